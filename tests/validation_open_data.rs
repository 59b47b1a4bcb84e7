//! Semi-real validation of the calibration check (design.md 2.7) and of the selection it
//! replicates, on open data shipped inside a registry package: scikit-learn 1.6.1's bundled
//! `load_diabetes` and `load_breast_cancer` datasets, exported by
//! tests/scripts/make_open_data.py into tests/data/open/ (predictions from a scikit-learn
//! model fit on separate training rows; see tests/data/README.md).
//!
//! The outside reference is the guarantee itself (Jin & Candes 2023, design.md 2.4):
//! conditional calibration with the exact density ratio keeps FDR <= q, so its realized FDR
//! over replicates must be <= q + 2 Monte Carlo SE (SE = sample SD of the
//! per-replicate false discovery proportions / sqrt(replicates), as reported by the check).
//! The induced shifts are the check's own: row i goes to the pseudo-pool with probability
//! min(0.95, c exp(S z_i)), z the standardized tilt, either the real domain classifier's
//! log-odds (labeled vs the exported pool, as `weighbridge check` uses) or minus a named
//! feature. Levels: q = 0.2 for the power assertions, because the sets are small (100-125
//! calibrating rows per replicate) and at q = 0.1 conditional calibration selects nothing in
//! about half the diabetes replicates (docs/validation.md); the FDR bound is checked at
//! q = 0.1 and 0.2.
//!
//! Fitted weights are not covered by the guarantee (design.md 2.5). Fitting on all rows
//! (the default) stays within q + 2 SE here; fitting on a held-out half does not on
//! breast_cancer, which is what justifies the default. Both facts are asserted so that a
//! change in either sends the author to docs/validation.md.
//!
//! Run with `--nocapture` to see the FDR and power of every setting.

use std::collections::HashSet;
use std::path::{Path, PathBuf};

use weighbridge::check::{calibration_check, CheckOptions, CheckOutcome, CheckWeights};
use weighbridge::fdr::Pruning;
use weighbridge::select::SelectOptions;
use weighbridge::shift::{FitRows, ShiftParams};
use weighbridge::table::{read_units, ReadOptions, Role, UnitTable};
use weighbridge::weighting::{obtain_weights, WeightSource};

/// Replicates per setting: SE of an FDR near 0.1-0.2 about 0.01; the file runs in a few
/// seconds in release.
const REPLICATES: usize = 300;

struct Dataset {
    /// File stem in tests/data/open/.
    stem: &'static str,
    /// Named beside every check.
    source: &'static str,
    features: &'static str,
    threshold: f64,
    /// The feature of the documented feature tilt.
    tilt_feature: &'static str,
}

/// Disease progression (y > 140.5, the median), LinearRegression predictions; feature tilt
/// along s5 (f9, log serum triglycerides), toward small values.
const DIABETES: Dataset = Dataset {
    stem: "diabetes",
    source: "scikit-learn 1.6.1 load_diabetes(scaled=False)",
    features: "f1..f10",
    threshold: 140.5,
    tilt_feature: "f9",
};

/// Malignant = 1, LogisticRegression probabilities with threshold 0.5 (clipped score);
/// feature tilt along worst concave points (f28), toward small values.
const BREAST_CANCER: Dataset = Dataset {
    stem: "breast_cancer",
    source: "scikit-learn 1.6.1 load_breast_cancer()",
    features: "f1..f30",
    threshold: 0.5,
    tilt_feature: "f28",
};

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/open")
        .join(name)
}

fn read_options(d: &Dataset, outcome: Option<&str>) -> ReadOptions {
    ReadOptions {
        id: "id".into(),
        outcome: outcome.map(String::from),
        prediction: "pred".into(),
        threshold_column: None,
        weight_column: None,
        features: vec![d.features.into()],
        delimiter: None,
        keep_columns: Vec::new(),
        outcome_cells: Default::default(),
    }
}

fn load(d: &Dataset) -> (UnitTable, UnitTable) {
    let labeled = read_units(
        &data(&format!("{}_labeled.csv", d.stem)),
        Role::Labeled,
        &read_options(d, Some("y")),
    )
    .unwrap();
    let pool = read_units(
        &data(&format!("{}_pool.csv", d.stem)),
        Role::Pool,
        &read_options(d, None),
    )
    .unwrap();
    (labeled, pool)
}

#[derive(Clone, Copy, Debug)]
enum Tilt {
    /// Log-odds of the domain classifier fit on the real labeled vs pool files.
    Classifier,
    /// Minus the dataset's tilt feature, standardized.
    Feature,
}

fn tilt(d: &Dataset, labeled: &UnitTable, pool: &UnitTable, kind: Tilt) -> Vec<f64> {
    match kind {
        Tilt::Classifier => {
            let source = WeightSource::Fitted {
                params: ShiftParams::new(),
            };
            let weighting = obtain_weights(&source, labeled, pool).unwrap();
            weighting
                .labeled_weights()
                .unwrap()
                .iter()
                .map(|w| w.ln())
                .collect()
        }
        Tilt::Feature => {
            let f = labeled
                .feature_names
                .iter()
                .position(|n| n == d.tilt_feature)
                .unwrap();
            let n = labeled.len();
            let column = &labeled.features[f * n..(f + 1) * n];
            let mean = column.iter().sum::<f64>() / n as f64;
            let sd =
                (column.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n as f64).sqrt();
            column.iter().map(|x| -(x - mean) / sd).collect()
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum Weights {
    Exact,
    FittedAll,
    FittedHeldOut,
}

fn check(
    d: &Dataset,
    labeled: &UnitTable,
    tilt: &[f64],
    strength: f64,
    fdr: f64,
    weights: Weights,
    pruning: Pruning,
) -> CheckOutcome {
    // As `weighbridge check`: default classifier, diagnostics at their cheapest.
    let fitted = ShiftParams::new().permutations(1).cv_folds(2);
    let options = CheckOptions {
        replicates: REPLICATES,
        strength,
        pool_share: 0.5,
        tilt: weighbridge::check::Tilt::Logistic,
        select: SelectOptions {
            fdr,
            pruning,
            ..SelectOptions::default()
        },
        weights: match weights {
            Weights::Exact => CheckWeights::Exact,
            Weights::FittedAll => CheckWeights::Fitted(fitted),
            Weights::FittedHeldOut => CheckWeights::Fitted(fitted.fit_rows(FitRows::HeldOut {
                labeled_fraction: 0.5,
            })),
        },
    };
    let outcome = calibration_check(labeled, tilt, Some(d.threshold), &options, &|_| {}).unwrap();
    let r = &outcome.results;
    println!(
        "{} [{}] S={strength} q={fdr} {weights:?} {}: conditional FDR {:.3} +- {:.3} power \
         {:.3} (empty {:.2}); BH {:.3} power {:.3}; unweighted {:.3} power {:.3}",
        d.stem,
        d.source,
        pruning.name(),
        r.conditional.fdr,
        2.0 * r.conditional.fdr_se,
        r.conditional.power,
        r.conditional.empty_share,
        r.bh.fdr,
        r.bh.power,
        r.unweighted.fdr,
        r.unweighted.power,
    );
    outcome
}

/// Conditional calibration's FDR <= q + 2 SE over tilts, strengths and levels, with
/// non-vacuous power at q = 0.2 under the real-pool tilt.
fn fdr_within_level(d: &Dataset, weights: Weights) {
    let (labeled, pool) = load(d);
    for kind in [Tilt::Classifier, Tilt::Feature] {
        let z = tilt(d, &labeled, &pool, kind);
        for strength in [0.0, 1.0, 2.0] {
            for fdr in [0.1, 0.2] {
                let o = check(
                    d,
                    &labeled,
                    &z,
                    strength,
                    fdr,
                    weights,
                    Pruning::Homogeneous,
                );
                let c = &o.results.conditional;
                assert!(
                    c.fdr <= fdr + 2.0 * c.fdr_se,
                    "{} ({}), {kind:?} tilt, S = {strength}, q = {fdr}, {weights:?} weights: \
                     conditional calibration FDR {} +- {} (2 SE) above q",
                    d.stem,
                    d.source,
                    c.fdr,
                    2.0 * c.fdr_se
                );
                if fdr == 0.2 && matches!(kind, Tilt::Classifier) {
                    assert!(
                        c.power > 0.1 && c.mean_selected >= 5.0 && c.empty_share < 0.7,
                        "{} ({}), S = {strength}, {weights:?}: vacuous check {c:?}",
                        d.stem,
                        d.source
                    );
                }
            }
        }
    }
}

#[test]
fn diabetes_conditional_calibration_keeps_fdr_with_exact_weights() {
    fdr_within_level(&DIABETES, Weights::Exact);
}

#[test]
fn breast_cancer_conditional_calibration_keeps_fdr_with_exact_weights() {
    fdr_within_level(&BREAST_CANCER, Weights::Exact);
}

#[test]
fn diabetes_conditional_calibration_with_weights_fitted_on_all_rows() {
    fdr_within_level(&DIABETES, Weights::FittedAll);
}

#[test]
fn breast_cancer_conditional_calibration_with_weights_fitted_on_all_rows() {
    fdr_within_level(&BREAST_CANCER, Weights::FittedAll);
}

#[test]
fn breast_cancer_held_out_fitting_overshoots_where_all_rows_does_not() {
    // The evidence for `--fit-rows all` as the default (docs/validation.md): on
    // scikit-learn 1.6.1 load_breast_cancer (30 features), a classifier fit on half of each
    // ~125-row side gives weights noisy enough that conditional calibration exceeds q even
    // without any shift; the fit on all rows stays within q.
    let d = &BREAST_CANCER;
    let (labeled, pool) = load(d);
    let z = tilt(d, &labeled, &pool, Tilt::Classifier);
    for strength in [0.0, 1.0] {
        let q = 0.1;
        let all = check(
            d,
            &labeled,
            &z,
            strength,
            q,
            Weights::FittedAll,
            Pruning::Homogeneous,
        );
        let held = check(
            d,
            &labeled,
            &z,
            strength,
            q,
            Weights::FittedHeldOut,
            Pruning::Homogeneous,
        );
        let (a, h) = (&all.results.conditional, &held.results.conditional);
        assert!(
            a.fdr <= q + 2.0 * a.fdr_se,
            "all rows, S = {strength}: {a:?}"
        );
        assert!(
            h.fdr - 2.0 * h.fdr_se > q,
            "held-out fitting no longer exceeds q at S = {strength} ({h:?}); update \
             docs/validation.md and reconsider the default"
        );
        let gap_se = (a.fdr_se * a.fdr_se + h.fdr_se * h.fdr_se).sqrt();
        assert!(h.fdr - a.fdr > 2.0 * gap_se, "{h:?} vs {a:?}");
    }
}

#[test]
fn ignoring_the_shift_exceeds_q_on_breast_cancer() {
    // scikit-learn 1.6.1 load_breast_cancer: the pseudo-pool leans toward benign-looking
    // rows, so the labeled part holds more malignant rows than the pool and unweighted
    // p-values are too small; with exact weights conditional calibration stays within q.
    let d = &BREAST_CANCER;
    let (labeled, pool) = load(d);
    for (kind, q) in [(Tilt::Classifier, 0.1), (Tilt::Feature, 0.2)] {
        let z = tilt(d, &labeled, &pool, kind);
        let o = check(
            d,
            &labeled,
            &z,
            2.0,
            q,
            Weights::Exact,
            Pruning::Homogeneous,
        );
        let (u, c) = (&o.results.unweighted, &o.results.conditional);
        assert!(u.fdr - 2.0 * u.fdr_se > q, "{kind:?}: unweighted {u:?}");
        assert!(c.fdr <= q + 2.0 * c.fdr_se, "{kind:?}: conditional {c:?}");
    }
}

#[test]
fn homogeneous_pruning_has_the_most_power() {
    // design.md 2.4 reports homogeneous pruning as the most powerful in simulation; here on
    // both scikit-learn 1.6.1 datasets, exact weights, real-pool tilt S = 1, q = 0.2.
    for d in [&DIABETES, &BREAST_CANCER] {
        let (labeled, pool) = load(d);
        let z = tilt(d, &labeled, &pool, Tilt::Classifier);
        let power = |pruning| {
            let o = check(d, &labeled, &z, 1.0, 0.2, Weights::Exact, pruning);
            let c = o.results.conditional;
            assert!(
                c.fdr <= 0.2 + 2.0 * c.fdr_se,
                "{} {pruning:?}: {c:?}",
                d.stem
            );
            (c.power, c.power_se)
        };
        let (homogeneous, se_h) = power(Pruning::Homogeneous);
        for other in [Pruning::Heterogeneous, Pruning::Deterministic] {
            let (p, se) = power(other);
            let gap_se = (se_h * se_h + se * se).sqrt();
            assert!(
                homogeneous - p > 2.0 * gap_se,
                "{} ({}): homogeneous power {homogeneous} vs {other:?} {p}",
                d.stem,
                d.source
            );
        }
    }
}

#[test]
fn exported_files_are_disjoint_and_pool_outcomes_are_kept_apart() {
    // The split of tests/scripts/make_open_data.py: labeled and pool rows are different
    // dataset rows (training rows appear in neither), the pool file has no outcome, and the
    // truth file covers exactly the pool.
    for (d, n_labeled, n_pool) in [(&DIABETES, 200, 100), (&BREAST_CANCER, 250, 150)] {
        let (labeled, pool) = load(d);
        assert_eq!(
            (labeled.len(), pool.len()),
            (n_labeled, n_pool),
            "{}",
            d.stem
        );
        let labeled_ids: HashSet<&String> = labeled.ids.iter().collect();
        assert!(pool.ids.iter().all(|id| !labeled_ids.contains(id)));
        let header = std::fs::read_to_string(data(&format!("{}_pool.csv", d.stem))).unwrap();
        assert!(!header.lines().next().unwrap().split(',').any(|c| c == "y"));
        let truth = std::fs::read_to_string(data(&format!("{}_pool_truth.csv", d.stem))).unwrap();
        let truth_ids: Vec<&str> = truth
            .lines()
            .skip(1)
            .map(|l| l.split(',').next().unwrap())
            .collect();
        assert_eq!(
            truth_ids,
            pool.ids.iter().map(String::as_str).collect::<Vec<_>>()
        );
    }
}
