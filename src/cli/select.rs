//! `weighbridge select`: read a labeled file and a pool file, decide the weights (none,
//! given in a column, or fitted by the domain classifier with `--fit-weights`), compute
//! weighted conformal p-values, select a shortlist with FDR control, write `candidates.csv`
//! and `summary.json` to the output folder and print a short summary.

use std::path::PathBuf;

use clap::{Args, ValueEnum};

use crate::conformal::pvalue::PValueKind;
use crate::conformal::score::{ScoreKind, Thresholds};
use crate::io::{check_same_features, read_units, OutputSet, ReadOptions, Role, UnitTable};
use crate::report::html::{selection_report, shift_part, WeightsMethod};
use crate::report::{
    add_shift, candidates_csv, select_summary, shift_section, text_summary, RunInputs,
};
use crate::selection::pipeline::{
    run_selection, LabeledInput, PoolInput, Procedure, SelectError, SelectOptions,
};
use crate::selection::pruning::Pruning;
use crate::shift::weighting::{obtain_weights, Calibration, WeightSource, Weighting};

use super::shift::{feature_selectors, weighting_failure, FitArgs};
use super::{commit_outputs, print_stdout, Failure, PhaseTimer, StepStatus};

const SELECT_HELP: &str = "\
Reads both files completely into memory (about 100 bytes per row plus 8 per feature).
Cost: O((n + m) log n) for the p-values, O(m log m) for conditional calibration.

Weights: none (every weight 1: no shift assumed), given in a column of both files
(--weight-column), or fitted (--fit-weights --features LIST): a domain classifier tells
labeled rows from pool rows and its odds become the density-ratio weights, with the fit
options of `weighbridge shift` (--penalty, --expand, --fit-rows, --fit-fraction,
--cap-quantile, --pool-sample, --folds, --permutations; same defaults; the fit uses
--seed and counts unreachable units at --fdr). The fit costs about what `weighbridge shift`
costs; its diagnostics and warnings go into summary.json (`shift`) and the summary below.
With --fit-rows held-out the labeled rows that fit the classifier do not calibrate.

Outputs in --out (written all at once; nothing is written when an input is bad):
  candidates.csv  one row per pool unit in input order: id, score, weight, p_value,
                  selected, [first_step, conditional_count,] never_selectable_because
  summary.json    settings, counts, warnings, seed, tool version, and with --fit-weights
                  the shift diagnostics (`shift`)
  report.html     with --report: one self-contained page (no scripts, no external files)

Exit codes: 0 success, 2 bad usage or input, 1 internal failure.

Examples:
  # weights given in column w, one threshold for every unit
  weighbridge select --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\
      --threshold 6.5 --weight-column w --fdr 0.1 --out shortlist

  # per-unit thresholds, plain BH on conservative p-values
  weighbridge select --labeled labeled.csv --pool pool.csv --threshold-column c \\
      --procedure bh --pvalues conservative --fdr 0.2

  # weights fitted on the descriptors f1..f5
  weighbridge select --labeled fixtures/labeled.csv --pool fixtures/pool.csv \\
      --threshold 6.5 --fit-weights --features f1..f5 --fdr 0.1 --out shortlist";

/// The input files and their columns, shared by `select` (and so `audit`, `rescreen`) and
/// `check`.
#[derive(Debug, Args)]
// Exactly one of the two threshold flags; as a group, the error names both choices.
#[command(group(
    clap::ArgGroup::new("threshold_choice")
        .args(["threshold", "threshold_column"])
        .required(true)
        .multiple(false)
))]
pub struct InputArgs {
    /// Labeled file (CSV, or TSV by extension): units with measured outcome and prediction.
    #[arg(long, value_name = "FILE")]
    pub labeled: PathBuf,
    /// Pool file: untested units with predictions.
    #[arg(long, value_name = "FILE")]
    pub pool: PathBuf,
    /// Id column (both files).
    #[arg(long, default_value = "id", value_name = "NAME")]
    pub id: String,
    /// Outcome column (labeled file only).
    #[arg(long, default_value = "y", value_name = "NAME")]
    pub outcome: String,
    /// Prediction column (both files).
    #[arg(long, default_value = "pred", value_name = "NAME")]
    pub prediction: String,
    /// One threshold for every unit: a unit is interesting when its outcome exceeds it.
    #[arg(long, value_name = "VALUE", allow_negative_numbers = true)]
    pub threshold: Option<f64>,
    /// Per-unit thresholds, a column present in both files.
    #[arg(long, value_name = "NAME")]
    pub threshold_column: Option<String>,
}

impl InputArgs {
    /// A constant threshold must be finite.
    ///
    /// # Errors
    /// [`Failure::Input`] for NaN or infinite `--threshold`.
    pub(crate) fn check_threshold(&self) -> Result<(), Failure> {
        match self.threshold {
            Some(c) if !c.is_finite() => Err(Failure::Input(format!(
                "--threshold must be a finite number, got {c}"
            ))),
            _ => Ok(()),
        }
    }

    /// How to read the labeled and the pool file with these columns.
    pub(crate) fn read_options(
        &self,
        weight_column: Option<String>,
        features: &[String],
        delimiter: Option<DelimiterArg>,
    ) -> (ReadOptions, ReadOptions) {
        let pool = ReadOptions {
            id: self.id.clone(),
            outcome: None,
            prediction: self.prediction.clone(),
            threshold_column: self.threshold_column.clone(),
            weight_column,
            features: feature_selectors(features),
            delimiter: delimiter.map(DelimiterArg::byte),
        };
        let labeled = ReadOptions {
            outcome: Some(self.outcome.clone()),
            ..pool.clone()
        };
        (labeled, pool)
    }
}

/// Command-line arguments of `select`, as typed.
#[derive(Debug, Args)]
#[command(after_long_help = SELECT_HELP)]
pub struct SelectArgs {
    #[command(flatten)]
    pub input: InputArgs,
    /// Density-ratio weights (pool / labeled), a column in both files. Without it (and
    /// without --fit-weights) every weight is 1, i.e. no shift is assumed.
    #[arg(long, value_name = "NAME")]
    pub weight_column: Option<String>,
    /// Fit the weights with a domain classifier on the --features columns (see `weighbridge
    /// shift --help` for the fit options, which apply here too).
    #[arg(long, conflicts_with = "weight_column", requires = "features")]
    pub fit_weights: bool,
    /// With --fit-weights: feature columns in both files, a comma list of names and/or
    /// ranges such as `f1..f32`.
    #[arg(long, value_name = "LIST", requires = "fit_weights")]
    pub features: Vec<String>,
    #[command(flatten)]
    pub fit: FitArgs,
    /// Score function.
    #[arg(long, value_enum, default_value_t = ScoreArg::Clipped)]
    pub score: ScoreArg,
    /// Selection procedure.
    #[arg(long, value_enum, default_value_t = ProcedureArg::Conditional)]
    pub procedure: ProcedureArg,
    /// p-values [default: conservative for conditional, randomized for bh and by].
    #[arg(long, value_enum)]
    pub pvalues: Option<PValuesArg>,
    /// Pruning of conditional calibration.
    #[arg(long, value_enum, default_value_t = PruningArg::Homogeneous)]
    pub pruning: PruningArg,
    /// Target false discovery rate q, in (0, 1].
    #[arg(
        long,
        default_value_t = 0.1,
        value_name = "Q",
        allow_negative_numbers = true
    )]
    pub fdr: f64,
    /// Seed of the random draws (randomized p-values, pruning).
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-out", value_name = "DIR")]
    pub out: PathBuf,
    /// Field delimiter [default: tab for .tsv/.tab files, else comma].
    #[arg(long, value_enum)]
    pub delimiter: Option<DelimiterArg>,
    /// Do not print the summary.
    #[arg(long)]
    pub quiet: bool,
    /// Also write report.html: a self-contained page (warnings, settings, shortlist,
    /// shift diagnostics with plots, cautions, method).
    #[arg(long)]
    pub report: bool,
}

/// `--score`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum ScoreArg {
    /// +inf for outcomes above the threshold, else threshold - prediction (most powerful
    /// for a fixed threshold; works for 0/1 outcomes with probabilities).
    Clipped,
    /// outcome - prediction.
    Residual,
}

/// `--procedure`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum ProcedureArg {
    /// Conditional calibration: finite-sample FDR control under covariate shift.
    Conditional,
    /// Benjamini-Hochberg on the weighted p-values.
    Bh,
    /// Benjamini-Yekutieli: valid under any dependence, less powerful.
    By,
}

/// `--pvalues`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum PValuesArg {
    /// Ties count against the unit; required by conditional calibration.
    Conservative,
    /// Ties broken by a seeded uniform draw.
    Randomized,
}

/// `--pruning`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum PruningArg {
    /// One shared random draw (most powerful).
    Homogeneous,
    /// One random draw per unit.
    Heterogeneous,
    /// No randomness; nearly powerless when weights vary.
    Deterministic,
}

/// `--delimiter`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum DelimiterArg {
    Comma,
    Tab,
    Semicolon,
}

impl DelimiterArg {
    pub(crate) fn byte(self) -> u8 {
        match self {
            DelimiterArg::Comma => b',',
            DelimiterArg::Tab => b'\t',
            DelimiterArg::Semicolon => b';',
        }
    }
}

/// Checked configuration of one `select` run.
#[derive(Debug, Clone)]
pub struct SelectConfig {
    pub labeled_path: PathBuf,
    pub pool_path: PathBuf,
    pub labeled_read: ReadOptions,
    pub pool_read: ReadOptions,
    pub threshold: Option<f64>,
    pub options: SelectOptions,
    /// Where the weights come from.
    pub weights: WeightSource,
    pub out: PathBuf,
    pub quiet: bool,
    /// Write report.html too.
    pub report: bool,
}

impl TryFrom<SelectArgs> for SelectConfig {
    type Error = Failure;

    fn try_from(a: SelectArgs) -> Result<Self, Failure> {
        a.input.check_threshold()?;
        let options = SelectOptions {
            fdr: a.fdr,
            procedure: match a.procedure {
                ProcedureArg::Conditional => Procedure::Conditional,
                ProcedureArg::Bh => Procedure::Bh,
                ProcedureArg::By => Procedure::By,
            },
            pruning: match a.pruning {
                PruningArg::Homogeneous => Pruning::Homogeneous,
                PruningArg::Heterogeneous => Pruning::Heterogeneous,
                PruningArg::Deterministic => Pruning::Deterministic,
            },
            pvalues: a.pvalues.map(|p| match p {
                PValuesArg::Conservative => PValueKind::Conservative,
                PValuesArg::Randomized => PValueKind::Randomized,
            }),
            score: match a.score {
                ScoreArg::Clipped => ScoreKind::Clipped,
                ScoreArg::Residual => ScoreKind::Residual,
            },
            seed: a.seed,
        };
        // Usage errors (bad q, conditional + randomized, stray fit options) before any file
        // is read.
        options.check()?;
        let weights = if a.fit_weights {
            WeightSource::Fitted {
                params: a.fit.params(a.seed, a.fdr)?,
            }
        } else if let Some(flag) = a.fit.first_given() {
            return Err(Failure::Input(format!(
                "{flag} is an option of the weight fit and needs --fit-weights. Hint: add \
                 --fit-weights --features LIST, or drop {flag}."
            )));
        } else if let Some(column) = &a.weight_column {
            WeightSource::Given {
                column: column.clone(),
            }
        } else {
            WeightSource::None
        };
        let (labeled_read, pool_read) =
            a.input
                .read_options(a.weight_column.clone(), &a.features, a.delimiter);
        Ok(SelectConfig {
            labeled_path: a.input.labeled,
            pool_path: a.input.pool,
            labeled_read,
            pool_read,
            threshold: a.input.threshold,
            options,
            weights,
            out: a.out,
            quiet: a.quiet,
            report: a.report,
        })
    }
}

/// The selection's two sides: the calibrating labeled rows (held-out fitting drops the rows
/// that fit the classifier) and the pool, with the run's weights and thresholds.
pub(crate) fn selection_inputs<'a>(
    config: &SelectConfig,
    pool: &'a UnitTable,
    calibration: &'a Calibration<'a>,
    weighting: &'a Weighting<'a>,
) -> (LabeledInput<'a>, PoolInput<'a>) {
    (
        LabeledInput {
            outcome: &calibration.outcome,
            prediction: &calibration.prediction,
            thresholds: match (&calibration.threshold, config.threshold) {
                (Some(column), _) => Thresholds::PerUnit(column),
                (None, Some(c)) => Thresholds::Constant(c),
                (None, None) => unreachable!("clap requires --threshold or --threshold-column"),
            },
            weights: calibration.weights.as_deref(),
        },
        PoolInput {
            prediction: &pool.prediction,
            thresholds: thresholds_of(pool, config.threshold),
            weights: weighting.pool_weights(),
        },
    )
}

/// Thresholds of a table: the constant, or its threshold column.
pub(crate) fn thresholds_of(table: &UnitTable, constant: Option<f64>) -> Thresholds<'_> {
    match (&table.threshold, constant) {
        (Some(column), _) => Thresholds::PerUnit(column),
        (None, Some(c)) => Thresholds::Constant(c),
        (None, None) => unreachable!("clap requires --threshold or --threshold-column"),
    }
}

/// Read both files with the configured columns (and the same feature columns in both when
/// weights are fitted).
pub(crate) fn read_inputs(config: &SelectConfig) -> Result<(UnitTable, UnitTable), Failure> {
    let labeled = read_units(&config.labeled_path, Role::Labeled, &config.labeled_read)?;
    let pool = read_units(&config.pool_path, Role::Pool, &config.pool_read)?;
    check_same_features(&labeled, &pool)?;
    Ok((labeled, pool))
}

/// The run's weights (none, given or fitted; see [`crate::shift::weighting`]), with errors mapped
/// to exit codes and messages naming the files.
pub(crate) fn obtain_run_weights<'a>(
    config: &SelectConfig,
    labeled: &'a UnitTable,
    pool: &'a UnitTable,
) -> Result<Weighting<'a>, Failure> {
    obtain_weights(&config.weights, labeled, pool)
        .map_err(|e| weighting_failure(e, &config.labeled_path, &config.pool_path))
}

/// Run the selection; a level no unit can reach is blamed on the labeled file by name.
fn select_or_explain(
    config: &SelectConfig,
    labeled: LabeledInput<'_>,
    pool: PoolInput<'_>,
) -> Result<crate::selection::pipeline::SelectionOutcome, Failure> {
    run_selection(&config.options, labeled, pool).map_err(|e| match e {
        SelectError::LabeledSetTooSmall { .. } => Failure::Input(format!(
            "labeled file {}: {e}{}",
            config.labeled_path.display(),
            if matches!(&config.weights, WeightSource::Fitted { .. }) {
                " (with --fit-rows held-out only the rows that did not fit the classifier \
                 calibrate)"
            } else {
                ""
            }
        )),
        other => other.into(),
    })
}

/// Are the weights fitted in this run (the step worth announcing)?
pub(crate) fn weighting_is_fitted(config: &SelectConfig) -> bool {
    matches!(config.weights, WeightSource::Fitted { .. })
}

/// How the method section of report.html describes the weights.
pub(crate) fn weights_method(source: &WeightSource) -> WeightsMethod {
    match source {
        WeightSource::None => WeightsMethod::None,
        WeightSource::Given { column } => WeightsMethod::Given(format!("column {column}")),
        _ => WeightsMethod::Fitted,
    }
}

/// report.html of a selection run (`select --report`, `rescreen --report`).
pub(crate) fn selection_report_page(
    source: WeightSource,
    summary: &crate::report::SelectSummary,
    ids: &[String],
    outcome: &crate::selection::pipeline::SelectionOutcome,
    weighting: &Weighting<'_>,
    calibration: &Calibration<'_>,
) -> Result<Vec<u8>, Failure> {
    let part = match (weighting.fitted(), summary.shift.as_ref()) {
        (Some(fitted), Some(section)) => Some(
            shift_part(
                section,
                calibration.weights.as_deref().unwrap_or(&[]),
                &fitted.assessment.pool.weight,
            )
            .map_err(|e| Failure::Internal(e.to_string()))?,
        ),
        _ => None,
    };
    let report = selection_report(summary, ids, outcome, part, weights_method(&source));
    Ok(report.render().into_bytes())
}

/// "report: file:///abs/path/report.html" for the end of a summary.
pub(crate) fn report_pointer(out: &std::path::Path) -> String {
    let path = out.join("report.html");
    let path = std::path::absolute(&path).unwrap_or(path);
    format!("report: file://{}\n", path.display())
}

/// Run `select`.
pub fn run(args: SelectArgs) -> Result<(), Failure> {
    let mut timer = PhaseTimer::new();
    let config = SelectConfig::try_from(args)?;
    let status = StepStatus::new(config.quiet);
    status.step("reading the labeled and pool files");
    let (labeled, pool) = read_inputs(&config)?;
    timer.mark("read inputs");
    if weighting_is_fitted(&config) {
        status.step("fitting the domain classifier and its diagnostics");
    }
    let weighting = obtain_run_weights(&config, &labeled, &pool)?;
    if weighting.fitted().is_some() {
        timer.mark("fit weights and diagnostics");
    }
    // Held-out fitting: the rows that fit the classifier do not calibrate.
    let calibration = weighting.calibration(&labeled);
    status.step("scores, p-values and selection");
    let (labeled_input, pool_input) = selection_inputs(&config, &pool, &calibration, &weighting);
    let outcome = select_or_explain(&config, labeled_input, pool_input)?;
    timer.mark("scores, p-values, selection");
    let inputs = RunInputs {
        labeled_file: config.labeled_path.display().to_string(),
        pool_file: config.pool_path.display().to_string(),
        threshold: match (&config.pool_read.threshold_column, config.threshold) {
            (Some(name), _) => format!("column {name}"),
            (None, Some(c)) => format!("value {c}"),
            (None, None) => String::new(),
        },
        weights: weighting.describe(),
    };
    let mut summary = select_summary(&outcome, inputs);
    if let Some(fitted) = weighting.fitted() {
        add_shift(&mut summary, shift_section(fitted, &labeled.feature_names));
    }
    let mut files = OutputSet::new();
    files.add("candidates.csv", candidates_csv(&pool.ids, &outcome));
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    files.add("summary.json", json);
    if config.report {
        files.add(
            "report.html",
            selection_report_page(
                config.weights.clone(),
                &summary,
                &pool.ids,
                &outcome,
                &weighting,
                &calibration,
            )?,
        );
    }
    timer.mark("format outputs");
    status.step("writing the outputs");
    commit_outputs(files, &config.out)?;
    timer.mark("write outputs");
    drop(status);
    if !config.quiet {
        let mut text = text_summary(&summary, &pool.ids, &outcome);
        text.push_str(&format!(
            "wrote {} and {}\n",
            config.out.join("candidates.csv").display(),
            config.out.join("summary.json").display()
        ));
        if config.report {
            text.push_str(&report_pointer(&config.out));
        }
        print_stdout(&text);
    }
    Ok(())
}
