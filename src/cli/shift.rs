//! `weighbridge shift`: fit the domain classifier that tells labeled rows from pool rows,
//! turn it into density-ratio weights, and report the shift diagnostics (`shift.json`,
//! `weights.csv`, `balance.csv`, three SVG plots and a text summary, worst problems first).
//!
//! Also holds what `select --fit-weights` (and later commands) share with it: the fit
//! options ([`FitArgs`]) and the mapping of weighting errors to exit codes.

use std::path::{Path, PathBuf};

use clap::{Args, ValueEnum};
use linfa::ParamGuard;

use crate::io::{
    check_same_features, delimiter_for, read_units, resolve_features, ColumnKind, InputError,
    OutputSet, ReadOptions, Role, UnitTable,
};
use crate::report::html::{shift_report_html, ShiftPart};
use crate::report::plots::{balance_svg, overlap_svg, weights_svg};
use crate::report::{
    balance_csv, shift_report, shift_section, shift_text, weights_csv, ShiftInputs,
};
use crate::shift::weighting::{obtain_weights, WeightSource, Weighting, WeightingError};
use crate::shift::{Expansion, FitRows, ShiftError, ShiftParams};

use super::select::DelimiterArg;
use super::{commit_outputs, print_stdout, Failure, PhaseTimer, StepStatus};

/// Default L2 penalty alpha (scikit-learn's default C = 1).
pub const DEFAULT_PENALTY: f64 = 1.0;
/// Default fraction of labeled (and pool) rows that fit the classifier in held-out mode
/// (an even split, common practice).
pub const DEFAULT_FIT_FRACTION: f64 = 0.5;
/// Default number of cross-validation folds for the AUC (common practice).
pub const DEFAULT_FOLDS: usize = 5;
/// Default number of label permutations for the test of "no shift": p-values down to
/// 1/1001 (common practice).
pub const DEFAULT_PERMUTATIONS: usize = 1000;
/// Bins of the weight histogram in weights.svg.
const WEIGHT_PLOT_BINS: usize = 40;

const SHIFT_HELP: &str = "\
Fits an L2-penalized logistic regression (damped Newton) that tells labeled rows (0) from
pool rows (1) on the standardized features, turns its probability e(x) = P(pool | x) into
density-ratio weights w(x) = (n/m) e(x)/(1 - e(x)), and reports how far the two sets differ
and whether the weights can be trusted. Constant feature columns are dropped and reported.

Costs: reads both files completely into memory (8 bytes per feature value). One Newton fit
on all fitting rows (a few passes over rows x terms^2), plus one fit per --folds fold for
the cross-validated AUC (on at most 200,000 rows), plus --permutations relabelings of the
out-of-fold scores (cheap). --expand pairwise adds d(d-1)/2 terms for d features: with many
features, fit on a pool sample (--pool-sample).

Outputs in --out (written all at once; nothing is written when an input is bad):
  shift.json    settings, every diagnostic (auc, auc_ci, permutation_p, ess, ess_fraction,
                khat, unreachable_count, converged, iterations, balance, adequacy, overlap,
                weight quantiles, ...), warnings worst first, tool version
  weights.csv   id, set (labeled/pool), pool_probability, weight, in_fit, calibrates
  balance.csv   feature, smd_unweighted, smd_weighted (pool minus labeled)
  overlap.svg   histograms of the balanced probability w/(1+w) for both sets
  weights.svg   histograms of log10 weight for both sets
  balance.svg   |SMD| per feature before and after weighting
  report.html   with --report: one self-contained page (no scripts, no external files)

Warnings (most serious first) name the diagnostic, its value, the threshold and what it
means for the shortlist: classifier not converged, clamped weights, imbalance left on
squares/products (the weight model misses part of the shift), Pareto k-hat above its
threshold (heavy weight tail), effective sample size below 10% of the labeled rows, AUC
above 0.95 (the sets barely overlap), more than 1% of the pool unreachable at --fdr,
|SMD| above 0.1 after weighting, more than 10% of the pool above balanced probability 0.9.

Exit codes: 0 success, 2 bad usage or input, 1 internal failure.

Examples:
  weighbridge shift --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\
      --features f1..f5 --out shift-report

  # a variance shift a linear classifier cannot see: add squared features
  weighbridge shift --labeled labeled.csv --pool pool.csv --features logp,mass,tpsa \\
      --expand squares --out shift-report";

/// `--expand`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ExpandArg {
    /// The standardized features only.
    None,
    /// Add squares (sees differences in spread).
    Squares,
    /// Add pairwise products (sees differences in correlation).
    Pairwise,
    /// Add squares and pairwise products.
    Both,
}

/// `--fit-rows`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum FitRowsArg {
    /// Fit on every labeled and pool row; every labeled row calibrates.
    All,
    /// Fit on a seeded fraction of the labeled rows and of the pool; those labeled rows do
    /// not calibrate.
    HeldOut,
}

/// Options of the domain-classifier fit, shared by `shift` and `select --fit-weights`.
/// Every option is optional so that a command can tell whether it was given; the defaults
/// are stated in the help and applied by [`FitArgs::params`].
#[derive(Clone, Debug, Default, Args)]
pub struct FitArgs {
    /// L2 penalty alpha on the standardized classifier slopes (loss summed over rows,
    /// intercept unpenalized; scikit-learn C = 1/alpha). Larger = smoother, less extreme
    /// weights [default: 1.0, scikit-learn's default C = 1].
    #[arg(long, value_name = "ALPHA", allow_negative_numbers = true)]
    pub penalty: Option<f64>,
    /// Extra classifier features: squares see differences in spread, pairwise products
    /// differences in correlation [default: none].
    #[arg(long, value_enum, value_name = "TERMS")]
    pub expand: Option<ExpandArg>,
    /// Rows the classifier is fit on [default: all; see the output for why].
    #[arg(long, value_enum, value_name = "MODE")]
    pub fit_rows: Option<FitRowsArg>,
    /// With --fit-rows held-out: fraction of the labeled rows (and of the pool) that fit
    /// the classifier, in (0, 1); those labeled rows do not calibrate [default: 0.5].
    #[arg(long, value_name = "F", allow_negative_numbers = true)]
    pub fit_fraction: Option<f64>,
    /// Cap every weight at this quantile of the fitted weights, in (0, 1]; capping is
    /// reported [default: no capping].
    #[arg(long, value_name = "Q", allow_negative_numbers = true)]
    pub cap_quantile: Option<f64>,
    /// Fit on a seeded random sample of at most N pool rows (class ratio corrected), then
    /// predict on every row; for very large pools [default: every pool row].
    #[arg(long, value_name = "N")]
    pub pool_sample: Option<usize>,
    /// Cross-validation folds for the AUC [default: 5].
    #[arg(long, value_name = "K")]
    pub folds: Option<usize>,
    /// Label permutations for the test of "no shift" [default: 1000].
    #[arg(long, value_name = "B")]
    pub permutations: Option<usize>,
}

impl FitArgs {
    /// The first fit option that was given, as its flag, if any (for commands where the fit
    /// options only apply together with another flag).
    pub fn first_given(&self) -> Option<&'static str> {
        [
            (self.penalty.is_some(), "--penalty"),
            (self.expand.is_some(), "--expand"),
            (self.fit_rows.is_some(), "--fit-rows"),
            (self.fit_fraction.is_some(), "--fit-fraction"),
            (self.cap_quantile.is_some(), "--cap-quantile"),
            (self.pool_sample.is_some(), "--pool-sample"),
            (self.folds.is_some(), "--folds"),
            (self.permutations.is_some(), "--permutations"),
        ]
        .into_iter()
        .find_map(|(given, flag)| given.then_some(flag))
    }

    /// Checked shift parameters with the documented defaults, `seed` for every random
    /// choice and `fdr` for the count of unreachable pool units.
    ///
    /// # Errors
    /// [`Failure::Input`] naming the flag for an out-of-range value, or `--fit-fraction`
    /// without `--fit-rows held-out`.
    pub fn params(&self, seed: u64, fdr: f64) -> Result<ShiftParams, Failure> {
        let fit_rows = match (self.fit_rows.unwrap_or(FitRowsArg::All), self.fit_fraction) {
            (FitRowsArg::All, None) => FitRows::All,
            (FitRowsArg::All, Some(_)) => {
                return Err(Failure::Input(
                    "--fit-fraction only applies to --fit-rows held-out (with the default \
                     --fit-rows all every row fits the classifier). Hint: add --fit-rows \
                     held-out or drop --fit-fraction."
                        .to_string(),
                ))
            }
            (FitRowsArg::HeldOut, fraction) => FitRows::HeldOut {
                labeled_fraction: fraction.unwrap_or(DEFAULT_FIT_FRACTION),
            },
        };
        let params = ShiftParams::new()
            .alpha(self.penalty.unwrap_or(DEFAULT_PENALTY))
            .expansion(match self.expand.unwrap_or(ExpandArg::None) {
                ExpandArg::None => Expansion::None,
                ExpandArg::Squares => Expansion::Squares,
                ExpandArg::Pairwise => Expansion::Pairwise,
                ExpandArg::Both => Expansion::SquaresAndPairwise,
            })
            .fit_rows(fit_rows)
            .cap_quantile(self.cap_quantile)
            .max_pool_sample(self.pool_sample)
            .cv_folds(self.folds.unwrap_or(DEFAULT_FOLDS))
            .permutations(self.permutations.unwrap_or(DEFAULT_PERMUTATIONS))
            .seed(seed)
            .fdr(fdr);
        params.check_ref().map_err(option_failure)?;
        Ok(params)
    }
}

/// The flag behind a shift option name.
fn flag_of(option: &str) -> &'static str {
    match option {
        "alpha" => "--penalty",
        "labeled_fraction" => "--fit-fraction",
        "cap_quantile" => "--cap-quantile",
        "max_pool_sample" => "--pool-sample",
        "cv_folds" => "--folds",
        "cv_max_rows" => "--folds",
        "permutations" => "--permutations",
        "fdr" => "--fdr",
        _ => "a fit option",
    }
}

/// An invalid shift option as a usage error naming the flag.
fn option_failure(e: ShiftError) -> Failure {
    match e {
        ShiftError::InvalidOption {
            name,
            expected,
            value,
        } => Failure::Input(format!(
            "{} must be {expected}, got {value}. Hint: see `weighbridge shift --help` for \
             the range and default of every fit option.",
            flag_of(name)
        )),
        other => Failure::Internal(format!("unexpected error while checking options: {other}")),
    }
}

/// Map a failure to obtain weights to an exit code and a message with a hint. `labeled` and
/// `pool` name the files in messages.
pub(crate) fn weighting_failure(e: WeightingError, labeled: &Path, pool: &Path) -> Failure {
    let files = format!("{} and {}", labeled.display(), pool.display());
    match e {
        WeightingError::Shift(ShiftError::AllConstant { dropped }) => Failure::Input(format!(
            "every selected feature is constant on the rows the classifier is fit on ({}) in \
             {files}: there is nothing to tell the labeled set from the pool. Hint: choose \
             feature columns that vary with --features.",
            dropped.join(", ")
        )),
        WeightingError::Shift(e @ ShiftError::TooFewRows { .. }) => Failure::Input(format!(
            "{files}: {e}. Hint: use fewer --folds (at least 2), a larger --fit-fraction, or \
             more rows."
        )),
        WeightingError::Shift(e @ ShiftError::InvalidOption { .. }) => option_failure(e),
        WeightingError::Shift(
            e @ (ShiftError::FeatureMismatch { .. }
            | ShiftError::NoFeatures
            | ShiftError::NonFinite { .. }
            | ShiftError::OneClass { .. }),
        ) => Failure::Input(format!("{files}: {e}")),
        WeightingError::Shift(other) => {
            Failure::Internal(format!("the domain classifier failed on {files}: {other}"))
        }
        e @ (WeightingError::NoFeatures { .. }
        | WeightingError::FeatureMismatch { .. }
        | WeightingError::GivenColumnNotRead { .. }) => Failure::Input(e.to_string()),
    }
}

/// Split `--features` selectors that were given as one comma list.
pub(crate) fn feature_selectors(raw: &[String]) -> Vec<String> {
    raw.iter()
        .flat_map(|s| s.split(','))
        .map(|s| s.trim().to_string())
        .collect()
}

/// Command-line arguments of `shift`, as typed.
#[derive(Debug, Args)]
#[command(after_long_help = SHIFT_HELP)]
pub struct ShiftArgs {
    /// Labeled file (CSV, or TSV by extension): units already measured.
    #[arg(long, value_name = "FILE")]
    pub labeled: PathBuf,
    /// Pool file: untested units.
    #[arg(long, value_name = "FILE")]
    pub pool: PathBuf,
    /// Feature columns, in both files: a comma list of names and/or ranges such as
    /// `f1..f32` (every column f1, f2, ..., f32).
    #[arg(long, value_name = "LIST", required = true)]
    pub features: Vec<String>,
    /// Id column (both files).
    #[arg(long, default_value = "id", value_name = "NAME")]
    pub id: String,
    #[command(flatten)]
    pub fit: FitArgs,
    /// Target false discovery rate q, in (0, 1]: counts the pool units whose weight alone
    /// keeps them from ever being selected at this level.
    #[arg(
        long,
        default_value_t = 0.1,
        value_name = "Q",
        allow_negative_numbers = true
    )]
    pub fdr: f64,
    /// Seed of every random choice (held-out split, pool sample, folds, permutations).
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-shift", value_name = "DIR")]
    pub out: PathBuf,
    /// Field delimiter [default: tab for .tsv/.tab files, else comma].
    #[arg(long, value_enum)]
    pub delimiter: Option<DelimiterArg>,
    /// Do not print the summary.
    #[arg(long)]
    pub quiet: bool,
    /// Also write report.html: a self-contained page (warnings, settings, diagnostics with
    /// plots, cautions, method).
    #[arg(long)]
    pub report: bool,
}

/// Checked configuration of one `shift` run.
#[derive(Debug, Clone)]
pub struct ShiftConfig {
    pub labeled_path: PathBuf,
    pub pool_path: PathBuf,
    pub read: ReadOptions,
    pub params: ShiftParams,
    pub out: PathBuf,
    pub quiet: bool,
    /// Write report.html too.
    pub report: bool,
}

impl TryFrom<ShiftArgs> for ShiftConfig {
    type Error = Failure;

    fn try_from(a: ShiftArgs) -> Result<Self, Failure> {
        if !(a.fdr > 0.0 && a.fdr <= 1.0) {
            return Err(Failure::Input(format!(
                "--fdr must be in (0, 1], got {}. Hint: e.g. --fdr 0.1.",
                a.fdr
            )));
        }
        let params = a.fit.params(a.seed, a.fdr)?;
        let read = ReadOptions {
            id: a.id,
            outcome: None,
            // Replaced per file by `read_feature_table`.
            prediction: String::new(),
            threshold_column: None,
            weight_column: None,
            features: feature_selectors(&a.features),
            delimiter: a.delimiter.map(DelimiterArg::byte),
        };
        Ok(ShiftConfig {
            labeled_path: a.labeled,
            pool_path: a.pool,
            read,
            params,
            out: a.out,
            quiet: a.quiet,
            report: a.report,
        })
    }
}

/// Header names of a file as `read_units` sees them (trimmed, byte order mark removed), or
/// `None` when the header cannot be read (then `read_units` reports why).
fn header_names(path: &Path, delimiter: Option<u8>) -> Option<Vec<String>> {
    let mut reader = csv::ReaderBuilder::new()
        .delimiter(delimiter_for(path, delimiter))
        .flexible(true)
        .from_path(path)
        .ok()?;
    let header = reader.byte_headers().ok()?;
    header
        .iter()
        .enumerate()
        .map(|(i, raw)| {
            let raw = if i == 0 {
                raw.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(raw)
            } else {
                raw
            };
            std::str::from_utf8(raw.trim_ascii())
                .ok()
                .map(str::to_string)
        })
        .collect()
}

/// Read the ids and feature columns of one file; `shift` needs no prediction column.
///
/// `read_units` always reads a prediction column, so it is pointed at the first selected
/// feature once the header shows that column exists (the column is then read twice, which
/// is harmless, and a bad cell in it is reported as a feature value). When the header
/// cannot be read or the features do not resolve, it is pointed at the id column instead,
/// so that `read_units` reports the real problem (missing file or id column, unresolvable
/// range, missing feature) with its own located message.
pub(crate) fn read_feature_table(
    path: &Path,
    role: Role,
    base: &ReadOptions,
) -> Result<UnitTable, Failure> {
    let stand_in = header_names(path, base.delimiter)
        .and_then(|names| {
            let resolved = resolve_features(&base.features, &names).ok()?;
            let first = resolved.first()?;
            names.iter().any(|n| n == first).then(|| first.clone())
        })
        .unwrap_or_else(|| base.id.clone());
    let options = ReadOptions {
        prediction: stand_in.clone(),
        ..base.clone()
    };
    let mut table = read_units(path, role, &options).map_err(|mut e| {
        // A bad cell in the stand-in column is a bad feature value.
        if let InputError::NotANumber { kind, column, .. }
        | InputError::NotFinite { kind, column, .. }
        | InputError::EmptyCell { kind, column, .. } = &mut e
        {
            if *kind == ColumnKind::Prediction && *column == stand_in {
                *kind = ColumnKind::Feature;
            }
        }
        Failure::from(e)
    })?;
    table.prediction = Vec::new();
    Ok(table)
}

/// Run `shift`.
pub fn run(args: ShiftArgs) -> Result<(), Failure> {
    let mut timer = PhaseTimer::new();
    let config = ShiftConfig::try_from(args)?;
    let status = StepStatus::new(config.quiet);
    status.step("reading the labeled and pool files");
    let labeled = read_feature_table(&config.labeled_path, Role::Labeled, &config.read)?;
    let pool = read_feature_table(&config.pool_path, Role::Pool, &config.read)?;
    check_same_features(&labeled, &pool)?;
    timer.mark("read inputs");
    status.step("fitting the domain classifier, cross-validated AUC and permutation test");
    let source = WeightSource::Fitted {
        params: config.params.clone(),
    };
    let weighting = obtain_weights(&source, &labeled, &pool)
        .map_err(|e| weighting_failure(e, &config.labeled_path, &config.pool_path))?;
    let Weighting::Fitted(fitted) = &weighting else {
        return Err(Failure::Internal(
            "fitted weights were asked for but not fitted".to_string(),
        ));
    };
    timer.mark("fit and diagnostics");

    let section = shift_section(fitted, &labeled.feature_names);
    let report = shift_report(
        section,
        ShiftInputs {
            labeled_file: config.labeled_path.display().to_string(),
            pool_file: config.pool_path.display().to_string(),
        },
    );
    let summary = &report.shift.summary;
    let plot_failure = |e: crate::report::plots::PlotError| Failure::Internal(e.to_string());
    let calibration_weights = weighting
        .calibration(&labeled)
        .weights
        .map(|w| w.into_owned())
        .unwrap_or_default();
    let mut files = OutputSet::new();
    let json = serde_json::to_vec_pretty(&report)
        .map_err(|e| Failure::Internal(format!("cannot serialize shift.json: {e}")))?;
    files.add("shift.json", json);
    files.add("weights.csv", weights_csv(&labeled.ids, &pool.ids, fitted));
    files.add("balance.csv", balance_csv(&summary.balance));
    let overlap = overlap_svg(&summary.overlap).map_err(plot_failure)?;
    let weights = weights_svg(
        &calibration_weights,
        &fitted.assessment.pool.weight,
        WEIGHT_PLOT_BINS,
    )
    .map_err(plot_failure)?;
    let balance = balance_svg(&summary.balance).map_err(plot_failure)?;
    if config.report {
        let part = ShiftPart {
            section: report.shift.clone(),
            overlap_svg: overlap.clone(),
            weights_svg: weights.clone(),
            balance_svg: balance.clone(),
        };
        files.add(
            "report.html",
            shift_report_html(&report, part).render().into_bytes(),
        );
    }
    files.add("overlap.svg", overlap.into_bytes());
    files.add("weights.svg", weights.into_bytes());
    files.add("balance.svg", balance.into_bytes());
    timer.mark("format outputs");
    status.step("writing the outputs");
    commit_outputs(files, &config.out)?;
    timer.mark("write outputs");
    drop(status);
    if !config.quiet {
        let mut text = shift_text(&report);
        text.push_str(&format!(
            "wrote shift.json, weights.csv, balance.csv, overlap.svg, weights.svg and \
             balance.svg to {}\n",
            config.out.display()
        ));
        if config.report {
            text.push_str(&super::select::report_pointer(&config.out));
        }
        print_stdout(&text);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_the_documented_ones() {
        let params = FitArgs::default().params(7, 0.1).unwrap().check().unwrap();
        assert_eq!(params.classifier().alpha, DEFAULT_PENALTY);
        assert_eq!(params.expansion(), Expansion::None);
        assert_eq!(params.fit_rows(), FitRows::All);
        assert_eq!(params.cap_quantile(), None);
        assert_eq!(params.max_pool_sample(), None);
        assert_eq!(params.cv_folds(), DEFAULT_FOLDS);
        assert_eq!(params.permutations(), DEFAULT_PERMUTATIONS);
        assert_eq!(params.seed(), 7);
        assert!(FitArgs::default().first_given().is_none());
    }

    #[test]
    fn held_out_fraction_defaults_and_needs_held_out_mode() {
        let held_out = FitArgs {
            fit_rows: Some(FitRowsArg::HeldOut),
            ..FitArgs::default()
        };
        let params = held_out.params(1, 0.1).unwrap().check().unwrap();
        assert_eq!(
            params.fit_rows(),
            FitRows::HeldOut {
                labeled_fraction: DEFAULT_FIT_FRACTION
            }
        );
        let stray = FitArgs {
            fit_fraction: Some(0.3),
            ..FitArgs::default()
        };
        assert!(
            matches!(stray.params(1, 0.1), Err(Failure::Input(m)) if m.contains("--fit-fraction"))
        );
        assert_eq!(stray.first_given(), Some("--fit-fraction"));
    }

    #[test]
    fn bad_values_name_their_flag() {
        let cases = [
            (
                FitArgs {
                    penalty: Some(0.0),
                    ..FitArgs::default()
                },
                "--penalty",
            ),
            (
                FitArgs {
                    cap_quantile: Some(1.5),
                    ..FitArgs::default()
                },
                "--cap-quantile",
            ),
            (
                FitArgs {
                    folds: Some(1),
                    ..FitArgs::default()
                },
                "--folds",
            ),
            (
                FitArgs {
                    fit_rows: Some(FitRowsArg::HeldOut),
                    fit_fraction: Some(1.0),
                    ..FitArgs::default()
                },
                "--fit-fraction",
            ),
            (
                FitArgs {
                    pool_sample: Some(1),
                    ..FitArgs::default()
                },
                "--pool-sample",
            ),
        ];
        for (args, flag) in cases {
            match args.params(1, 0.1) {
                Err(Failure::Input(m)) => assert!(m.starts_with(flag), "{m}"),
                other => panic!("{flag}: {other:?}"),
            }
        }
    }

    #[test]
    fn feature_lists_split_on_commas() {
        let raw = vec!["f1..f3, g".to_string(), "h".to_string()];
        assert_eq!(feature_selectors(&raw), ["f1..f3", "g", "h"]);
    }
}
