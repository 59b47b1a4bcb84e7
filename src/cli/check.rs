//! `weighbridge check`: does the pipeline keep FDR <= q on data like mine? A simulation on
//! the user's own labeled set (see `crate::workflows::check` for the method).

use std::fmt::Write as _;
use std::io::IsTerminal;
use std::path::PathBuf;

use clap::{Args, ValueEnum};
use serde::Serialize;

use crate::conformal::pvalue::PValueKind;
use crate::conformal::score::ScoreKind;
use crate::io::{check_same_features, read_units, OutputSet, Role};
use crate::report::{tool_info, ToolInfo};
use crate::selection::pipeline::{Procedure, SelectOptions};
use crate::shift::weighting::{obtain_weights, WeightSource};
use crate::workflows::check::{
    calibration_check, CheckOptions, CheckOutcome, CheckWeights, PI_MAX,
};

use super::common::{weighting_failure, DelimiterArg, FitArgs, InputArgs, PValuesArg, ScoreArg};
use super::{commit_outputs, print_stdout, Failure};

const CHECK_HELP: &str = "\
Uses only the labeled set, where outcomes are known. Each replicate splits it at random into
a pseudo-labeled part and a pseudo-pool, sending row i to the pseudo-pool with probability
min(0.95, c exp(S z_i)): z_i is how much the row resembles the real pool (the standardized
log-odds of a domain classifier fit on the real labeled and pool files), S is --strength,
and c makes the pseudo-pool hold --pool-share of the rows on average. The exact density
ratio of that split is known. The whole pipeline then runs on each replicate (weights fitted
as `select --fit-weights` would, or the exact ratio with --weights exact), and the realized
false discovery proportion and power of three selections are averaged: conditional
calibration with the weights, BH on weighted p-values, and BH ignoring the shift.

Cost: one classifier fit per replicate (diagnostics skipped) plus three selections;
replicates run in parallel. A few seconds for 200 replicates of a few thousand rows.

Writes check.json (settings, split, results.{conditional,bh,unweighted}.{fdr, fdr_se,
power, power_se, mean_selected, empty_share}) and prints a table.

Example:
  weighbridge check --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\
      --threshold 6.5 --features f1..f5 --replicates 200 --strength 1 --fdr 0.2";

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
    /// Feature columns in both files: a comma list of names and/or ranges like `f1..f32`.
    #[arg(long, value_name = "LIST", required = true)]
    pub features: Vec<String>,
    #[command(flatten)]
    pub fit: FitArgs,
    /// Weights used inside each replicate.
    #[arg(long, value_enum, default_value_t = CheckWeightsArg::Fitted)]
    pub weights: CheckWeightsArg,
    /// Number of simulated screens.
    #[arg(long, default_value_t = 200)]
    pub replicates: usize,
    /// Strength S of the induced shift (0 = none; 1 = rows one standard deviation more
    /// pool-like are e times as likely to go to the pseudo-pool).
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
    tool: ToolInfo,
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
    #[serde(flatten)]
    outcome: &'a CheckOutcome,
    reading: Vec<String>,
}

/// How to read the results, in plain words.
fn reading(outcome: &CheckOutcome, q: f64) -> Vec<String> {
    let mut lines = Vec::new();
    let r = &outcome.results;
    let verdict = |name: &str, fdr: f64, se: f64| {
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
    lines.push(verdict(
        "conditional calibration",
        r.conditional.fdr,
        r.conditional.fdr_se,
    ));
    lines.push(verdict("BH on weighted p-values", r.bh.fdr, r.bh.fdr_se));
    lines.push(verdict(
        "BH ignoring the shift",
        r.unweighted.fdr,
        r.unweighted.fdr_se,
    ));
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
    let (labeled_read, pool_read) = a.input.read_options(None, &a.features, a.delimiter);
    let labeled = read_units(&a.input.labeled, Role::Labeled, &labeled_read)?;
    let pool = read_units(&a.input.pool, Role::Pool, &pool_read)?;
    check_same_features(&labeled, &pool)?;

    // The direction of the real shift: the classifier's log-odds at the labeled rows
    // (log w differs from it by a constant, which the standardization removes).
    let real = obtain_weights(
        &WeightSource::Fitted {
            params: params.clone(),
        },
        &labeled,
        &pool,
    )
    .map_err(|e| weighting_failure(e, &a.input.labeled, &a.input.pool))?;
    let real_fit = real.fitted().expect("fitted weights were asked for");
    let tilt: Vec<f64> = real_fit
        .assessment
        .labeled
        .weight
        .iter()
        .map(|w| w.ln())
        .collect();
    let real_shift_auc = real_fit.assessment.summary.auc;

    let options = CheckOptions {
        replicates: a.replicates,
        strength: a.strength,
        pool_share: a.pool_share,
        select: select.clone(),
        weights: match a.weights {
            // Diagnostics are not needed inside replicates: the cheapest valid settings.
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
    let outcome = calibration_check(&labeled, &tilt, a.input.threshold, &options, &progress)
        .map_err(|e| Failure::Input(format!("calibration check: {e}")))?;

    let report = CheckReport {
        tool: tool_info(),
        labeled_file: a.input.labeled.display().to_string(),
        pool_file: a.input.pool.display().to_string(),
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
        outcome: &outcome,
        reading: reading(&outcome, a.fdr),
    };
    let mut files = OutputSet::new();
    let json = serde_json::to_vec_pretty(&report)
        .map_err(|e| Failure::Internal(format!("cannot serialize the check: {e}")))?;
    files.add("check.json", json);
    commit_outputs(files, &a.out)?;

    if !a.quiet {
        let mut text = String::new();
        let _ = writeln!(
            text,
            "weighbridge {} calibration check: {} replicates, strength {}, FDR {} ({})",
            report.tool.version, outcome.replicates, outcome.strength, a.fdr, report.weights
        );
        let _ = writeln!(
            text,
            "  each replicate: {:.0} pseudo-labeled and {:.0} pseudo-pool rows on average, {:.1}% \
             of pool rows above threshold; the weights' effective sample size is {:.0}% of the \
             calibrating rows",
            outcome.mean_pseudo_labeled,
            outcome.mean_pseudo_pool,
            100.0 * outcome.mean_interesting_share,
            100.0 * outcome.mean_calibration_ess_fraction
        );
        let _ = writeln!(
            text,
            "{:<36} {:>16} {:>16} {:>9}",
            "selection", "FDR +- 2 SE", "power +- 2 SE", "selected"
        );
        let r = &outcome.results;
        for (name, p) in [
            ("conditional calibration (weighted)", &r.conditional),
            ("BH on weighted p-values", &r.bh),
            ("BH ignoring the shift", &r.unweighted),
        ] {
            let _ = writeln!(
                text,
                "{name:<36} {:>8.3} +- {:.3} {:>8.3} +- {:.3} {:>9.1}",
                p.fdr,
                2.0 * p.fdr_se,
                p.power,
                2.0 * p.power_se,
                p.mean_selected
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
