//! `weighbridge check`: does the pipeline keep FDR <= q on data like mine? A simulation on
//! the user's own labeled set (see `crate::workflows::check` for the method).

use std::fmt::Write as _;
use std::io::IsTerminal;
use std::path::PathBuf;

use clap::{Args, ValueEnum};
use serde::Serialize;

use crate::conformal::pvalue::PValueKind;
use crate::conformal::score::ScoreKind;
use crate::io::{check_same_features, OutputSet};
use crate::report::{tool_info, ToolInfo};
use crate::selection::pipeline::{Procedure, SelectOptions};
use crate::shift::reliability::percent_two_significant;
use crate::shift::weighting::{obtain_weights, WeightSource};
use crate::shift::{unreliable_weights, Unreliable};
use crate::workflows::check::{
    calibration_check, CheckOptions, CheckOutcome, CheckWeights, ProcedureResult, Tilt, PI_MAX,
};

use super::common::{
    weighting_failure, ClassifierArg, DelimiterArg, FitArgs, InputArgs, PValuesArg, ScoreArg,
};
use super::{commit_outputs, open_output, print_stdout, Failure};

const CHECK_HELP: &str = "\
Uses only the labeled set, where outcomes are known. Each replicate splits it at random into
a pseudo-labeled part and a pseudo-pool, sending row i to the pseudo-pool with probability
sigmoid(a + S t_i): t_i is row i's log-weight from a domain classifier fit on the real labeled
and pool files (how much the row resembles the real pool), S is --strength, and a makes the
pseudo-pool hold --pool-share of the rows on average. The exact density ratio of that split,
exp(a + S t_i), has the classifier's own form, so the weight model is well specified and
--strength 1 reproduces your own shift. The whole pipeline then runs on each replicate
(weights fitted as `select --fit-weights` would), and once more with the exact ratio; the
realized false discovery proportion and power of three selections are averaged: conditional
calibration with the weights, BH on weighted p-values, and BH ignoring the shift.

Each replicate also records whether its fitted weights raised a severe warning or would have
been refused by `select` (exit 3); the results count every replicate, and beside them stand
the share of flagged replicates and the FDR among the others.

--stress-test TILT replaces the tilt by a shift the weight model is not built to describe
(capped, quadratic, variance, prediction); its verdict is labelled a stress test.

Cost: one classifier fit per replicate plus six selections; replicates run in parallel. A few
seconds for 200 replicates of a few thousand rows.

Writes check.json (settings, split, results and results_exact_weights, each with
{conditional,bh,unweighted}.{fdr, fdr_se, power, power_se, mean_selected, empty_share,
flagged_share, refused_share, fdr_unflagged, ...}) and prints a table.

Example:
  weighbridge check --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\
      --threshold 6.5 --features f1..f5 --replicates 200 --strength 1 --fdr 0.2";

/// `--stress-test` of `check`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum StressTestArg {
    /// pi = min(0.95, c exp(S z)): a flat top the classifier cannot describe.
    Capped,
    /// A tilt quadratic in the real fitted log-weight.
    Quadratic,
    /// Pseudo-pool rows concentrated near the feature centre (a variance shift).
    Variance,
    /// A tilt along the model's prediction, outside the classifier's features.
    Prediction,
}

impl From<StressTestArg> for Tilt {
    fn from(a: StressTestArg) -> Tilt {
        match a {
            StressTestArg::Capped => Tilt::Capped,
            StressTestArg::Quadratic => Tilt::Quadratic,
            StressTestArg::Variance => Tilt::Variance,
            StressTestArg::Prediction => Tilt::Prediction,
        }
    }
}

/// `--weights` of `check`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum CheckWeightsArg {
    /// Fit the weights in every replicate, as `select --fit-weights` does.
    Fitted,
    /// Use the exact density ratio of the simulated split (no fitting error).
    Exact,
}

/// Arguments of `check`.
#[derive(Debug, Args)]
#[command(after_long_help = CHECK_HELP)]
pub struct CheckArgs {
    #[command(flatten)]
    pub input: InputArgs,
    /// Feature columns in both files: a comma list of names and/or ranges like `f1..f32`
    /// or `MolWt..TPSA` (every column from MolWt to TPSA in the header).
    #[arg(long, value_name = "LIST", required = true)]
    pub features: Vec<String>,
    #[command(flatten)]
    pub fit: FitArgs,
    /// Weights used inside each replicate for `results` (results_exact_weights always uses
    /// the exact ratio).
    #[arg(long, value_enum, default_value_t = CheckWeightsArg::Fitted)]
    pub weights: CheckWeightsArg,
    /// Replace the logistic tilt by a misspecified one (a stress test, never the headline
    /// verdict).
    #[arg(long, value_enum, value_name = "TILT")]
    pub stress_test: Option<StressTestArg>,
    /// Number of simulated screens.
    #[arg(long, default_value_t = 200)]
    pub replicates: usize,
    /// Strength S of the induced shift (0 = none; 1 = the real shift: the pseudo-pool's
    /// density ratio is proportional to the real fitted weights).
    #[arg(long, default_value_t = 1.0, allow_negative_numbers = true)]
    pub strength: f64,
    /// Mean share of the labeled rows sent to the pseudo-pool, in (0, 0.9].
    #[arg(long, default_value_t = 0.5)]
    pub pool_share: f64,
    /// Target false discovery rate q.
    #[arg(long, default_value_t = 0.1, allow_negative_numbers = true)]
    pub fdr: f64,
    /// Score function.
    #[arg(long, value_enum, default_value_t = ScoreArg::Clipped)]
    pub score: ScoreArg,
    /// p-values of the BH runs [default: randomized]; conditional calibration always uses
    /// conservative ones.
    #[arg(long, value_enum)]
    pub pvalues: Option<PValuesArg>,
    /// Seed of the splits, fits and selections.
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-check", value_name = "DIR")]
    pub out: PathBuf,
    /// Write into --out even if it holds files that no weighbridge run made (files of
    /// other names are left alone; same-named ones are overwritten).
    #[arg(long)]
    pub force: bool,
    /// Field delimiter [default: tab for .tsv/.tab files, else comma].
    #[arg(long, value_enum)]
    pub delimiter: Option<DelimiterArg>,
    /// Do not print the table.
    #[arg(long)]
    pub quiet: bool,
}

/// `check.json`.
#[derive(Debug, Serialize)]
struct CheckReport<'a> {
    schema_version: u32,
    tool: ToolInfo,
    command_line: Vec<String>,
    threshold_rule: crate::report::ThresholdRule,
    columns: crate::report::Columns,
    labeled_file: String,
    pool_file: String,
    fdr: f64,
    score: &'static str,
    bh_pvalues: &'static str,
    weights: &'static str,
    features: &'a [String],
    seed: u64,
    pi_max: f64,
    real_shift_auc: f64,
    /// Why the real fit's weights would be refused by `select` (empty when they would not).
    real_fit_unreliable: Vec<Unreliable>,
    #[serde(flatten)]
    outcome: &'a CheckOutcome,
    reading: Vec<String>,
    /// The real fit's shift warnings (worst first), as objects.
    warning_details: Vec<crate::warning::Warning>,
}

/// How to read the results, in plain words.
fn reading(outcome: &CheckOutcome, q: f64, fitted: bool) -> Vec<String> {
    let mut lines = Vec::new();
    if outcome.stress_test {
        lines.push(format!(
            "STRESS TEST ({}): this is not the verdict on data like yours; it shows how the \
             pipeline behaves when the shift has a form the weight model cannot describe.",
            outcome.tilt_description
        ));
    }
    let r = &outcome.results;
    let verdict = |name: &str, p: &ProcedureResult| {
        let (fdr, se) = (p.fdr, p.fdr_se);
        if fdr - 2.0 * se > q {
            format!(
                "{name}: realized FDR {fdr:.3} +- {:.3} (2 SE) is above q = {q}: on data like \
                 these, this selection does not keep its target.",
                2.0 * se
            )
        } else {
            format!(
                "{name}: realized FDR {fdr:.3} +- {:.3} (2 SE) is consistent with <= q = {q}.",
                2.0 * se
            )
        }
    };
    lines.push(verdict("conditional calibration", &r.conditional));
    lines.push(verdict("BH on weighted p-values", &r.bh));
    lines.push(verdict("BH ignoring the shift", &r.unweighted));
    if fitted {
        let e = &outcome.results_exact_weights;
        lines.push(format!(
            "with the exact density ratio instead of fitted weights: conditional calibration \
             FDR {:.3} +- {:.3}, BH on weighted p-values {:.3} +- {:.3}; a gap to the fitted \
             rows above is the cost of estimating the weights.",
            e.conditional.fdr,
            2.0 * e.conditional.fdr_se,
            e.bh.fdr,
            2.0 * e.bh.fdr_se
        ));
        let c = &r.conditional;
        if c.flagged_share > 0.0 {
            let others = match (c.fdr_unflagged, c.fdr_unflagged_se) {
                (Some(f), Some(se)) => format!(
                    "conditional calibration FDR among the other {} replicates {f:.3} +- {:.3}",
                    c.unflagged_replicates,
                    2.0 * se
                ),
                _ => "no replicate was free of them".to_string(),
            };
            lines.push(format!(
                "{} of replicates raised a severe weight warning and {} would have been \
                 refused by `select` (exit 3); {others}. The results above count every \
                 replicate, as if run with --allow-unreliable-weights.",
                percent_two_significant(c.flagged_share),
                percent_two_significant(c.refused_share),
            ));
        }
    }
    if r.conditional.empty_share > 0.5 {
        lines.push(format!(
            "conditional calibration selected nothing in {:.0}% of replicates: at this level \
             and shift the labeled set is too small or the weights too extreme for power; \
             its FDR estimate then says little.",
            100.0 * r.conditional.empty_share
        ));
    }
    if outcome.degenerate_share > 0.0 {
        lines.push(format!(
            "{:.1}% of replicates could not run the pipeline (an empty pseudo-pool or \
             pseudo-labeled part, or a classifier that cannot be fit on so few rows); they \
             count as empty selections. Use more labeled rows or a pool share nearer 0.5.",
            100.0 * outcome.degenerate_share
        ));
    }
    lines
}

/// Run `check`.
pub fn run(a: CheckArgs) -> Result<(), Failure> {
    a.input.check_threshold()?;
    let select = SelectOptions {
        fdr: a.fdr,
        procedure: Procedure::Conditional,
        pvalues: a.pvalues.map(|p| match p {
            PValuesArg::Conservative => PValueKind::Conservative,
            PValuesArg::Randomized => PValueKind::Randomized,
        }),
        score: match a.score {
            ScoreArg::Clipped => ScoreKind::Clipped,
            ScoreArg::Residual => ScoreKind::Residual,
        },
        seed: a.seed,
        ..SelectOptions::default()
    };
    let check_fdr = SelectOptions {
        pvalues: None,
        ..select.clone()
    };
    check_fdr.check()?;
    let params = a.fit.params(a.seed, a.fdr)?;
    let setup = a
        .input
        .setup(None, &a.features, a.delimiter, &[], select.score)?;
    let select = SelectOptions {
        direction: setup.direction,
        ..select
    };
    let labeled_path = setup.files.labeled_path().to_path_buf();
    let pool_path = setup.files.pool_path().to_path_buf();
    let folder = open_output(&a.out, a.force, &setup.files.paths())?;
    let (labeled, pool) = setup.files.read(&setup.labeled_read, &setup.pool_read)?;
    check_same_features(&labeled, &pool)?;

    // The real shift: the classifier's fitted log-weight at the labeled rows (it differs
    // from the log-odds by the constant log(n / m), which the tilt's offset absorbs).
    let real = obtain_weights(
        &WeightSource::Fitted {
            params: params.clone(),
        },
        &labeled,
        &pool,
    )
    .map_err(|e| weighting_failure(e, &labeled_path, &pool_path))?;
    let real_fit = real.fitted().expect("fitted weights were asked for");
    let log_weight: Vec<f64> = real_fit
        .assessment
        .labeled
        .weight
        .iter()
        .map(|w| w.ln())
        .collect();
    let real_shift_auc = real_fit.assessment.summary.auc;
    let real_fit_unreliable = unreliable_weights(&real_fit.assessment.summary);

    let options = CheckOptions {
        replicates: a.replicates,
        strength: a.strength,
        pool_share: a.pool_share,
        tilt: a.stress_test.map_or(Tilt::Logistic, Tilt::from),
        select: select.clone(),
        weights: match a.weights {
            // Diagnostics are not needed inside replicates: the cheapest valid settings
            // (boosted trees keep the user's folds: there they are the cross-fitting that
            // makes the weights).
            CheckWeightsArg::Fitted if a.fit.classifier == Some(ClassifierArg::Boosted) => {
                CheckWeights::Fitted(params.clone().permutations(1))
            }
            CheckWeightsArg::Fitted => {
                CheckWeights::Fitted(params.clone().permutations(1).cv_folds(2))
            }
            CheckWeightsArg::Exact => CheckWeights::Exact,
        },
    };
    let show_progress = !a.quiet && std::io::stderr().is_terminal();
    let total = a.replicates;
    let progress = move |done: usize| {
        if show_progress {
            eprint!("\rreplicates: {done}/{total}");
            if done == total {
                eprintln!();
            }
        }
    };
    let outcome = calibration_check(
        &labeled,
        &log_weight,
        a.input.threshold,
        &options,
        &progress,
    )
    .map_err(|e| Failure::Input(format!("calibration check: {e}")))?;

    let report = CheckReport {
        schema_version: crate::report::SCHEMA_VERSION,
        tool: tool_info(),
        command_line: super::command_line(),
        threshold_rule: crate::report::ThresholdRule::new(
            a.input.threshold,
            a.input.threshold_column.as_deref(),
            select.direction,
        ),
        columns: crate::report::Columns::of(&setup.labeled_read, &labeled.feature_names, &[]),
        warning_details: real_fit
            .assessment
            .summary
            .warnings
            .iter()
            .map(crate::shift::ShiftWarning::to_warning)
            .collect(),
        labeled_file: labeled_path.display().to_string(),
        pool_file: pool_path.display().to_string(),
        fdr: a.fdr,
        score: select.score.name(),
        bh_pvalues: select.pvalues.unwrap_or(PValueKind::Randomized).name(),
        weights: match a.weights {
            CheckWeightsArg::Fitted => "fitted in every replicate",
            CheckWeightsArg::Exact => "exact density ratio of the split",
        },
        features: &labeled.feature_names,
        seed: a.seed,
        pi_max: PI_MAX,
        real_shift_auc,
        real_fit_unreliable,
        outcome: &outcome,
        reading: reading(
            &outcome,
            a.fdr,
            matches!(a.weights, CheckWeightsArg::Fitted),
        ),
    };
    let mut files = OutputSet::new();
    let json = serde_json::to_vec_pretty(&report)
        .map_err(|e| Failure::Internal(format!("cannot serialize the check: {e}")))?;
    files.add("check.json", json);
    commit_outputs(folder, files, "check")?;

    if !a.quiet {
        let mut text = String::new();
        let _ = writeln!(
            text,
            "weighbridge {} calibration check: {} replicates, strength {}, FDR {} ({})",
            report.tool.version,
            outcome.replicates,
            outcome.strength,
            crate::selection::level_text(a.fdr),
            report.weights
        );
        let _ = writeln!(text, "  shift: {}", outcome.tilt_description);
        let _ = writeln!(
            text,
            "  each replicate: {:.0} pseudo-labeled and {:.0} pseudo-pool rows on average, {:.1}% \
             of pool rows above threshold; the weights' effective sample size is {} of the \
             calibrating rows",
            outcome.mean_pseudo_labeled,
            outcome.mean_pseudo_pool,
            100.0 * outcome.mean_interesting_share,
            percent_two_significant(outcome.mean_calibration_ess_fraction)
        );
        let _ = writeln!(
            text,
            "{:<36} {:>16} {:>16} {:>9} {:>8}",
            "selection", "FDR +- 2 SE", "power +- 2 SE", "selected", "flagged"
        );
        let r = &outcome.results;
        for (name, p) in [
            ("conditional calibration (weighted)", &r.conditional),
            ("BH on weighted p-values", &r.bh),
            ("BH ignoring the shift", &r.unweighted),
        ] {
            let _ = writeln!(
                text,
                "{name:<36} {:>8.3} +- {:.3} {:>8.3} +- {:.3} {:>9.1} {:>8}",
                p.fdr,
                2.0 * p.fdr_se,
                p.power,
                2.0 * p.power_se,
                p.mean_selected,
                percent_two_significant(p.flagged_share)
            );
        }
        if !report.real_fit_unreliable.is_empty() {
            let _ = writeln!(
                text,
                "  note: `select --fit-weights` would refuse the weights fitted on your real files \
                 ({}); this check tells what the pipeline does with such weights.",
                report
                    .real_fit_unreliable
                    .iter()
                    .map(|u| u.diagnostic.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            );
        }
        for line in &report.reading {
            let _ = writeln!(text, "  - {line}");
        }
        let _ = writeln!(text, "wrote {}", a.out.join("check.json").display());
        print_stdout(&text);
    }
    Ok(())
}
