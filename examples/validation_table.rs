//! The semi-real validation table of docs/validation.md: the calibration check
//! ([`weighbridge::check::calibration_check`], design.md 2.7) on open datasets shipped in the
//! scikit-learn 1.6.1 wheel, exported by tests/scripts/make_open_data.py into
//! tests/data/open/ (see tests/data/README.md).
//!
//! Run: `cargo run --release --example validation_table` prints the markdown block that sits
//! between the `table:begin` / `table:end` markers of docs/validation.md. With `--ci` it
//! regenerates the block and fails (exit 1) when the committed one differs; .ci/run does
//! that. Every draw is seeded (the library's default seed), so the output is deterministic
//! on a given machine; about 15 s on 2 cores.
//!
//! Per dataset and setting: realized FDR (+- 2 Monte Carlo SE) and power of conditional
//! calibration, BH on weighted randomized p-values and BH ignoring the shift, over
//! `REPLICATES` simulated screens. The induced shift sends labeled row i to the pseudo-pool
//! with probability sigmoid(a + S t_i) (the check's logistic tilt, well specified for the
//! linear classifier), where t is:
//! * `classifier`: the log-weight of the domain classifier fit on the real labeled vs real
//!   pool files (`ShiftParams::new()` defaults), as `weighbridge check` does;
//! * a named feature: minus that feature, standardized (the pseudo-pool leans toward its
//!   small values).
//!
//! Rows marked `stress: capped` use the misspecified capped tilt min(0.95, c exp(S z)) of
//! earlier versions instead (a stress test, not a verdict). "flagged" is the share of
//! replicates whose fitted weights raised a severe weight warning or would be refused by
//! `select`; "cond. FDR unflagged" the conditional calibration FDR over the others.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use weighbridge::check::{
    calibration_check, CheckOptions, CheckOutcome, CheckWeights, ProcedureResult, Tilt,
};
use weighbridge::fdr::Pruning;
use weighbridge::select::SelectOptions;
use weighbridge::shift::{FitRows, ShiftParams};
use weighbridge::table::{read_units, ReadOptions, Role, UnitTable};
use weighbridge::weighting::{obtain_weights, WeightSource};

/// Simulated screens per setting: Monte Carlo SE of an FDR near 0.1-0.2 is about 0.01-0.02.
const REPLICATES: usize = 500;
/// Mean share of the labeled rows sent to the pseudo-pool (the check's default).
const POOL_SHARE: f64 = 0.5;
const BEGIN: &str = "<!-- table:begin -->";
const END: &str = "<!-- table:end -->";

/// One exported dataset (tests/data/open/, made by tests/scripts/make_open_data.py).
struct Dataset {
    stem: &'static str,
    /// Dataset, loader and package version, for the heading.
    source: &'static str,
    features: &'static str,
    threshold: f64,
    /// The feature of the second tilt and its original name.
    tilt_feature: (&'static str, &'static str),
}

const DATASETS: [Dataset; 2] = [
    Dataset {
        stem: "diabetes",
        source: "diabetes: scikit-learn 1.6.1 `load_diabetes(scaled=False)`, \
                 LinearRegression pred, y > 140.5 (the median)",
        features: "f1..f10",
        threshold: 140.5,
        tilt_feature: ("f9", "s5"),
    },
    Dataset {
        stem: "breast_cancer",
        source: "breast_cancer: scikit-learn 1.6.1 `load_breast_cancer()`, \
                 LogisticRegression probability of malignant, y = 1 malignant, threshold 0.5",
        features: "f1..f30",
        threshold: 0.5,
        tilt_feature: ("f28", "worst concave points"),
    },
];

#[derive(Clone, Copy, PartialEq)]
enum Weights {
    Exact,
    FittedAll,
    FittedHeldOut,
}

impl Weights {
    fn name(self) -> &'static str {
        match self {
            Weights::Exact => "exact",
            Weights::FittedAll => "fitted, all rows",
            Weights::FittedHeldOut => "fitted, held-out",
        }
    }
}

/// One row of the table.
struct Setting {
    /// 0 = classifier tilt, 1 = feature tilt.
    tilt: usize,
    /// Logistic (the verdict) or a stress-test form.
    form: Tilt,
    strength: f64,
    fdr: f64,
    weights: Weights,
    pruning: Pruning,
    /// Which default or claim the row bears on.
    bears_on: &'static str,
}

fn settings() -> Vec<Setting> {
    let all = [Weights::Exact, Weights::FittedAll, Weights::FittedHeldOut];
    let mut rows = Vec::new();
    let mut add_form = |tilt, form, strength, fdr, weights, pruning, bears_on| {
        rows.push(Setting {
            tilt,
            form,
            strength,
            fdr,
            weights,
            pruning,
            bears_on,
        })
    };
    let mut add = |tilt, strength, fdr, weights, pruning, bears_on| {
        add_form(
            tilt,
            Tilt::Logistic,
            strength,
            fdr,
            weights,
            pruning,
            bears_on,
        )
    };
    for fdr in [0.1, 0.2] {
        for weights in all {
            add(0, 0.0, fdr, weights, Pruning::Homogeneous, "no shift");
        }
    }
    for strength in [1.0, 2.0] {
        for fdr in [0.1, 0.2] {
            for weights in all {
                let bears_on = match weights {
                    Weights::Exact => "guarantee",
                    _ => "fit rows",
                };
                add(0, strength, fdr, weights, Pruning::Homogeneous, bears_on);
            }
        }
    }
    for fdr in [0.1, 0.2] {
        for weights in all {
            add(1, 2.0, fdr, weights, Pruning::Homogeneous, "feature tilt");
        }
    }
    for pruning in [Pruning::Heterogeneous, Pruning::Deterministic] {
        for weights in [Weights::Exact, Weights::FittedAll] {
            add(0, 1.0, 0.2, weights, pruning, "pruning");
        }
    }
    for weights in [Weights::Exact, Weights::FittedAll] {
        add_form(
            0,
            Tilt::Capped,
            2.0,
            0.2,
            weights,
            Pruning::Homogeneous,
            "stress test",
        );
    }
    rows
}

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/open")
        .join(name)
}

fn load(d: &Dataset) -> Result<(UnitTable, UnitTable), String> {
    let pool_read = ReadOptions {
        id: "id".into(),
        outcome: None,
        prediction: "pred".into(),
        threshold_column: None,
        weight_column: None,
        features: vec![d.features.into()],
        delimiter: None,
        keep_columns: Vec::new(),
        outcome_cells: Default::default(),
    };
    let labeled_read = ReadOptions {
        outcome: Some("y".into()),
        ..pool_read.clone()
    };
    let read = |suffix: &str, role, options: &ReadOptions| {
        read_units(&data(&format!("{}_{suffix}.csv", d.stem)), role, options)
            .map_err(|e| e.to_string())
    };
    Ok((
        read("labeled", Role::Labeled, &labeled_read)?,
        read("pool", Role::Pool, &pool_read)?,
    ))
}

/// Log-odds of the real domain classifier at the labeled rows (log w differs by a constant).
fn classifier_tilt(labeled: &UnitTable, pool: &UnitTable) -> Result<Vec<f64>, String> {
    let source = WeightSource::Fitted {
        params: ShiftParams::new(),
    };
    let weighting = obtain_weights(&source, labeled, pool).map_err(|e| e.to_string())?;
    let weights = weighting.labeled_weights().ok_or("no labeled weights")?;
    Ok(weights.iter().map(|w| w.ln()).collect())
}

/// Minus the named feature, standardized: the pseudo-pool leans toward its small values.
fn feature_tilt(labeled: &UnitTable, name: &str) -> Result<Vec<f64>, String> {
    let f = labeled
        .feature_names
        .iter()
        .position(|n| n == name)
        .ok_or_else(|| format!("no feature {name}"))?;
    let n = labeled.len();
    let column = &labeled.features[f * n..(f + 1) * n];
    let mean = column.iter().sum::<f64>() / n as f64;
    let sd = (column.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n as f64).sqrt();
    Ok(column.iter().map(|x| -(x - mean) / sd).collect())
}

fn run(
    labeled: &UnitTable,
    tilt: &[f64],
    threshold: f64,
    s: &Setting,
) -> Result<CheckOutcome, String> {
    // As `weighbridge check`: default classifier, diagnostics at their cheapest.
    let fitted = ShiftParams::new().permutations(1).cv_folds(2);
    let options = CheckOptions {
        replicates: REPLICATES,
        strength: s.strength,
        pool_share: POOL_SHARE,
        tilt: s.form,
        select: SelectOptions {
            fdr: s.fdr,
            pruning: s.pruning,
            ..SelectOptions::default()
        },
        weights: match s.weights {
            Weights::Exact => CheckWeights::Exact,
            Weights::FittedAll => CheckWeights::Fitted(fitted),
            Weights::FittedHeldOut => CheckWeights::Fitted(fitted.fit_rows(FitRows::HeldOut {
                labeled_fraction: 0.5,
            })),
        },
    };
    calibration_check(labeled, tilt, Some(threshold), &options, &|_| {}).map_err(|e| e.to_string())
}

fn table() -> Result<String, String> {
    let mut out = String::new();
    out.push_str(&format!(
        "{REPLICATES} replicates per row; pseudo-pool share {POOL_SHARE}; FDR and power are \
         means over replicates, +- 2 Monte Carlo SE. n / m: mean calibrating rows / \
         pseudo-pool rows per replicate. ESS: mean Kish ESS of the weights used over the \
         calibrating rows, as a share of them. Conditional size: mean shortlist size of conditional calibration. \
         Conditional empty: share of replicates where conditional calibration \
         selected nothing. Flagged: share of replicates whose fitted weights raised a severe \
         weight warning or would be refused by `select`; cond. FDR unflagged: conditional \
         calibration FDR over the others. **above q**: FDR - 2 SE > q.\n"
    ));
    for d in &DATASETS {
        let (labeled, pool) = load(d)?;
        let tilts = [
            ("classifier".to_string(), classifier_tilt(&labeled, &pool)?),
            (
                format!("-{} ({})", d.tilt_feature.0, d.tilt_feature.1),
                feature_tilt(&labeled, d.tilt_feature.0)?,
            ),
        ];
        out.push_str(&format!(
            "\n#### {} ({} labeled, {} pool rows)\n\n",
            d.source,
            labeled.len(),
            pool.len()
        ));
        out.push_str(
            "| tilt | S | q | weights | pruning | n / m | ESS | conditional FDR | conditional \
             power | conditional size | conditional empty | BH FDR | BH power | unweighted FDR | unweighted power | \
             flagged | cond. FDR unflagged | bears on |\n",
        );
        out.push_str("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|\n");
        for s in settings() {
            let o = run(&labeled, &tilts[s.tilt].1, d.threshold, &s)?;
            let r = &o.results;
            // "above q": the realized FDR exceeds q by more than 2 Monte Carlo SE.
            let fdr = |p: &ProcedureResult| {
                let flag = if p.fdr - 2.0 * p.fdr_se > s.fdr {
                    " **above q**"
                } else {
                    ""
                };
                format!("{:.3} +- {:.3}{flag}", p.fdr, 2.0 * p.fdr_se)
            };
            let tilt_name = if s.strength == 0.0 {
                "none".to_string()
            } else if s.form.is_stress_test() {
                format!("{} (stress: capped)", tilts[s.tilt].0)
            } else {
                tilts[s.tilt].0.clone()
            };
            let unflagged = match r.conditional.fdr_unflagged {
                Some(f) => format!("{f:.3}"),
                None => "-".to_string(),
            };
            out.push_str(&format!(
                "| {tilt_name} | {} | {} | {} | {} | {:.0} / {:.0} | {:.2} | {} | {:.3} | {:.1} | {:.2} \
                 | {} | {:.3} | {} | {:.3} | {:.2} | {} | {} |\n",
                s.strength,
                s.fdr,
                s.weights.name(),
                s.pruning.name(),
                o.mean_pseudo_labeled,
                o.mean_pseudo_pool,
                o.mean_calibration_ess_fraction,
                fdr(&r.conditional),
                r.conditional.power,
                r.conditional.mean_selected,
                r.conditional.empty_share,
                fdr(&r.bh),
                r.bh.power,
                fdr(&r.unweighted),
                r.unweighted.power,
                r.conditional.flagged_share,
                unflagged,
                s.bears_on,
            ));
        }
    }
    Ok(out)
}

#[path = "support/marked_block.rs"]
mod marked_block;

fn main() -> ExitCode {
    match table() {
        Ok(generated) => marked_block::print_or_compare(
            &generated,
            BEGIN,
            END,
            "cargo run --release --example validation_table",
        ),
        Err(e) => {
            eprintln!("validation_table: {e}");
            ExitCode::FAILURE
        }
    }
}
