//! What several commands share: the input flags ([`InputArgs`]), the flags of `select`
//! ([`SelectArgs`], which `audit` and `rescreen` take whole) and its checked configuration
//! ([`SelectConfig`]), the options of the domain-classifier fit ([`FitArgs`], used by
//! `shift`, `select --fit-weights` and `check`), the value enums behind them, and the helpers
//! that read the inputs, obtain the weights, map weighting errors to exit codes and build
//! report.html of a selection.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use clap::{Args, ValueEnum};
use linfa::ParamGuard;

use crate::conformal::pvalue::PValueKind;
use crate::conformal::score::{Direction, ScoreKind, Thresholds};
use crate::io::{
    check_one_stdin, check_same_features, read_table, read_units, CensoredRule, MissingOutcome,
    OutcomeCells, ReadOptions, Role, UnitTable,
};
use crate::report::html::{selection_report, shift_part, PoolView, WeightsMethod};
use crate::report::UnreliableMark;
use crate::selection::pipeline::{LabeledInput, PoolInput, Procedure, SelectOptions};
use crate::selection::pruning::Pruning;
use crate::shift::weighting::{
    obtain_weights, Calibration, WeightSource, Weighting, WeightingError,
};
use crate::shift::weights::rescale_for_sums;
use crate::shift::{
    unreliable_weights, ClassifierKind, Expansion, FeatureTransform, FitRows, ShiftError,
    ShiftParams, Unreliable,
};

use super::Failure;

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

Outputs in --out (written all at once; nothing is written when an input is bad; every
field in docs/outputs.md):
  shortlist.csv   the selected units only, best predicted first: rank, id, prediction,
                  p_value, q_value, selection_probability, weight, kept columns
  candidates.csv  one row per pool unit in input order, the same columns for every
                  procedure: id, score, weight, p_value, selected, first_step,
                  conditional_count, never_selectable_because, ..., prediction,
                  shortlist_rank (empty cells where a column does not apply)
  summary.json    settings, counts, warnings, seed, tool version, command line, columns,
                  and with --fit-weights the shift diagnostics (`shift`)
  report.html     with --report: one self-contained page (no scripts, no external files)

Inputs: two files (--labeled, --pool) or one table (--table: rows whose outcome is empty
are the pool, the others labeled). Files may be gzip (.gz) or Zstandard (.zst) compressed
(recognised by their first bytes); `-` reads one input from standard input. A labeled
outcome may be censored (>10000, <1, >=x, <=x): accepted with the clipped score where the
bound decides the side of the threshold, counted in summary.json
`censored_outcome_count`. NA and N/A (--missing-values) mark a labeled row without a value:
an error, or with --missing-outcome drop left out and counted
(`dropped_missing_outcome_count`). `weighbridge columns FILE` lists a file's columns.

Exit codes: 0 success, 2 bad usage or input, 1 internal failure.

Examples:
  # one assay export: potency in nM (lower is better), untested rows leave IC50_nM empty
  weighbridge select --table assays.csv --id compound_id --outcome IC50_nM \\
      --prediction predicted_IC50_nM --lower-is-better --threshold 100 \\
      --fit-weights --features MolWt..TPSA --keep-columns smiles,series --out shortlist

  # a compressed pool from standard input; labeled rows with NA outcomes left out
  zcat pool.csv.gz | weighbridge select --labeled labeled.csv --pool - \\
      --threshold 6.5 --missing-outcome drop --out shortlist

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
    /// Labeled file (CSV, or TSV by extension; .gz and .zst are decompressed; `-` reads
    /// standard input): units with measured outcome and prediction. Give --labeled and
    /// --pool, or --table.
    #[arg(long, value_name = "FILE", conflicts_with = "table")]
    pub labeled: Option<PathBuf>,
    /// Pool file: untested units with predictions.
    #[arg(long, value_name = "FILE", conflicts_with = "table")]
    pub pool: Option<PathBuf>,
    /// One table holding both, as assay exports are: rows whose outcome cell is empty (or an
    /// --untested-marker) are the pool, every other row is labeled. Read once, so `-`
    /// (standard input) works. Example: --table assays.csv --outcome pIC50.
    #[arg(long, value_name = "FILE")]
    pub table: Option<PathBuf>,
    /// With --table: a token that also means "not tested" in the outcome column (besides
    /// the empty cell), ignoring case; repeat for several. Example: --untested-marker
    /// untested --untested-marker ND.
    #[arg(long, value_name = "TOKEN", requires = "table")]
    pub untested_marker: Vec<String>,
    /// Id column (both files).
    #[arg(long, default_value = "id", value_name = "NAME")]
    pub id: String,
    /// Outcome column (labeled file only; with --table it also tells labeled rows from
    /// the pool).
    #[arg(long, default_value = "y", value_name = "NAME")]
    pub outcome: String,
    /// Prediction column (both files).
    #[arg(long, default_value = "pred", value_name = "NAME")]
    pub prediction: String,
    /// One threshold for every unit: a unit is interesting when its outcome exceeds it
    /// (is below it with --lower-is-better).
    #[arg(long, value_name = "VALUE", allow_negative_numbers = true)]
    pub threshold: Option<f64>,
    /// Per-unit thresholds, a column present in both files.
    #[arg(long, value_name = "NAME")]
    pub threshold_column: Option<String>,
    /// A unit is interesting when its outcome is BELOW the threshold (potency in nM,
    /// clearance, toxicity). Outcomes, predictions and thresholds stay in your units.
    /// Example: --lower-is-better --threshold 100 (shortlist units likely below 100 nM).
    #[arg(long)]
    pub lower_is_better: bool,
    /// Comma list of tokens that mean "assayed, but no value" in a labeled outcome cell
    /// (ignoring case); an empty item is the empty cell. Replaces the default, `NA,N/A`
    /// plus the empty cell with two files (with --table an empty outcome means untested
    /// instead, and an --untested-marker is never a missing value). Example:
    /// --missing-values NA,N/A,nd,
    #[arg(long, value_name = "LIST")]
    pub missing_values: Option<String>,
    /// What a labeled row whose outcome is a missing-value token does: `error` stops with
    /// its file and line, `drop` leaves the row out and counts it (summary.json
    /// `dropped_missing_outcome_count`). Example: --missing-outcome drop.
    #[arg(long, value_enum, default_value_t = MissingOutcomeArg::Error, value_name = "WHAT")]
    pub missing_outcome: MissingOutcomeArg,
}

/// `--missing-outcome`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum MissingOutcomeArg {
    /// Stop with a located error (the default).
    Error,
    /// Leave such rows out and count them.
    Drop,
}

/// Where a run's labeled rows and pool come from.
#[derive(Clone, Debug)]
pub enum InputFiles {
    /// `--labeled FILE --pool FILE`.
    Two { labeled: PathBuf, pool: PathBuf },
    /// `--table FILE`: one table, split by the outcome cell.
    Table {
        path: PathBuf,
        untested_markers: Vec<String>,
    },
}

impl InputFiles {
    /// The labeled file (the table in one-table mode).
    pub fn labeled_path(&self) -> &Path {
        match self {
            InputFiles::Two { labeled, .. } => labeled,
            InputFiles::Table { path, .. } => path,
        }
    }

    /// The pool file (the table in one-table mode).
    pub fn pool_path(&self) -> &Path {
        match self {
            InputFiles::Two { pool, .. } => pool,
            InputFiles::Table { path, .. } => path,
        }
    }

    /// Each input with the flag that named it (for the one-standard-input check).
    pub fn flags(&self) -> Vec<(&'static str, &Path)> {
        match self {
            InputFiles::Two { labeled, pool } => vec![("--labeled", labeled), ("--pool", pool)],
            InputFiles::Table { path, .. } => vec![("--table", path)],
        }
    }

    /// The files read (for the output folder, which never removes them).
    pub fn paths(&self) -> Vec<&Path> {
        self.flags().into_iter().map(|(_, path)| path).collect()
    }

    /// Read the labeled rows and the pool: two files, or one table read once.
    ///
    /// # Errors
    /// A located [`crate::io::InputError`], or standard input given twice.
    pub(crate) fn read(
        &self,
        labeled_read: &ReadOptions,
        pool_read: &ReadOptions,
    ) -> Result<(UnitTable, UnitTable), Failure> {
        check_one_stdin(&self.flags())?;
        match self {
            InputFiles::Two { labeled, pool } => {
                let labeled = read_units(labeled, Role::Labeled, labeled_read)?;
                let pool = read_units(pool, Role::Pool, pool_read)?;
                Ok((labeled, pool))
            }
            InputFiles::Table {
                path,
                untested_markers,
            } => Ok(read_table(path, labeled_read, untested_markers)?),
        }
    }
}

/// The inputs of a run as [`InputArgs::setup`] resolves them.
#[derive(Clone, Debug)]
pub struct InputSetup {
    pub files: InputFiles,
    pub labeled_read: ReadOptions,
    pub pool_read: ReadOptions,
    pub direction: Direction,
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

    /// Exactly one input form: `--table FILE`, or `--labeled FILE --pool FILE`.
    ///
    /// # Errors
    /// [`Failure::Input`] naming what is missing and the two forms.
    pub(crate) fn files(&self) -> Result<InputFiles, Failure> {
        input_files(
            self.labeled.as_ref(),
            self.pool.as_ref(),
            self.table.as_ref(),
            &self.untested_marker,
        )
    }

    /// The missing-value tokens in force (see `--missing-values`).
    ///
    /// # Errors
    /// [`Failure::Input`] when an explicit list names the empty cell in one-table mode or
    /// shares a token with --untested-marker.
    fn missing_values(&self, one_table: bool) -> Result<Vec<String>, Failure> {
        let markers: Vec<String> = self
            .untested_marker
            .iter()
            .map(|m| m.trim().to_ascii_lowercase())
            .collect();
        let Some(list) = &self.missing_values else {
            return Ok(crate::io::outcome::DEFAULT_MISSING_VALUES
                .iter()
                .filter(|token| !(one_table && token.is_empty()))
                .filter(|token| !markers.contains(&token.to_ascii_lowercase()))
                .map(|token| token.to_string())
                .collect());
        };
        let tokens: Vec<String> = list.split(',').map(|t| t.trim().to_string()).collect();
        for token in &tokens {
            if one_table && token.is_empty() {
                return Err(Failure::Input(
                    "--missing-values names the empty cell, but with --table an empty outcome \
                     means \"not tested\" (the row is part of the pool). Hint: drop the empty \
                     item from --missing-values (e.g. `--missing-values NA,N/A`)."
                        .to_string(),
                ));
            }
            if markers.contains(&token.to_ascii_lowercase()) {
                return Err(Failure::Input(format!(
                    "`{token}` is given both as an --untested-marker (the row is part of the \
                     pool) and in --missing-values (assayed, no value). Hint: give it to one \
                     of the two."
                )));
            }
        }
        Ok(tokens)
    }

    /// Resolve the input flags: which files, how to read them, which side is interesting.
    /// `score` decides whether censored outcomes can be used (the residual score needs the
    /// value itself).
    ///
    /// # Errors
    /// [`Failure::Input`] for a bad combination of input flags.
    pub(crate) fn setup(
        &self,
        weight_column: Option<String>,
        features: &[String],
        delimiter: Option<DelimiterArg>,
        keep_columns: &[String],
        score: ScoreKind,
    ) -> Result<InputSetup, Failure> {
        let files = self.files()?;
        let one_table = matches!(files, InputFiles::Table { .. });
        let direction = if self.lower_is_better {
            Direction::Below
        } else {
            Direction::Above
        };
        let outcome_cells = OutcomeCells {
            missing_values: self.missing_values(one_table)?,
            missing: match self.missing_outcome {
                MissingOutcomeArg::Error => MissingOutcome::Error,
                MissingOutcomeArg::Drop => MissingOutcome::Drop,
            },
            censored: Some(CensoredRule {
                direction,
                threshold: self.threshold,
                score_needs_value: score == ScoreKind::Residual,
            }),
            tested_only: false,
        };
        let pool_read = ReadOptions {
            id: self.id.clone(),
            outcome: None,
            prediction: self.prediction.clone(),
            threshold_column: self.threshold_column.clone(),
            weight_column,
            features: feature_selectors(features),
            delimiter: delimiter.map(DelimiterArg::byte),
            keep_columns: keep_columns.to_vec(),
            outcome_cells,
        };
        let labeled_read = ReadOptions {
            outcome: Some(self.outcome.clone()),
            ..pool_read.clone()
        };
        Ok(InputSetup {
            files,
            labeled_read,
            pool_read,
            direction,
        })
    }
}

/// Exactly one input form from the flags as typed: `--table FILE` (with its untested
/// markers), or both `--labeled FILE` and `--pool FILE`.
///
/// # Errors
/// [`Failure::Input`] naming what is missing and the two forms.
pub(crate) fn input_files(
    labeled: Option<&PathBuf>,
    pool: Option<&PathBuf>,
    table: Option<&PathBuf>,
    untested_markers: &[String],
) -> Result<InputFiles, Failure> {
    const FORMS: &str = "give either --table FILE (one table: rows with an empty outcome are \
                         the pool) or both --labeled FILE and --pool FILE";
    if table.is_none() && !untested_markers.is_empty() {
        return Err(Failure::Input(
            "--untested-marker applies to --table only (with two files the pool file holds \
             the untested units). Hint: drop --untested-marker, or give one --table FILE."
                .to_string(),
        ));
    }
    match (labeled, pool, table) {
        (None, None, Some(path)) => Ok(InputFiles::Table {
            path: path.clone(),
            untested_markers: untested_markers.to_vec(),
        }),
        (Some(labeled), Some(pool), None) => Ok(InputFiles::Two {
            labeled: labeled.clone(),
            pool: pool.clone(),
        }),
        (Some(_), None, None) => Err(Failure::Input(format!(
            "--labeled is given but --pool is not. Hint: {FORMS}."
        ))),
        (None, Some(_), None) => Err(Failure::Input(format!(
            "--pool is given but --labeled is not. Hint: {FORMS}."
        ))),
        (None, None, None) => Err(Failure::Input(format!("no input is given. Hint: {FORMS}."))),
        _ => Err(Failure::Input(format!(
            "--table cannot be combined with --labeled or --pool. Hint: {FORMS}."
        ))),
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
    /// ranges: `f1..f32` (f1, f2, ..., f32) or `MolWt..TPSA` (every column from MolWt to
    /// TPSA in the header; `weighbridge columns FILE` shows the order).
    #[arg(long, value_name = "LIST", requires = "fit_weights")]
    pub features: Vec<String>,
    #[command(flatten)]
    pub fit: FitArgs,
    /// Columns copied verbatim from the pool (or the --table) into the outputs, a comma
    /// list; each must be in the pool; a labeled file may lack them. Example:
    /// --keep-columns smiles,series.
    #[arg(long, value_name = "LIST")]
    pub keep_columns: Vec<String>,
    /// With --fit-weights: run even when the fitted weights are unreliable (Pareto k-hat
    /// above its threshold, effective sample size below 2% of the labeled rows, or
    /// domain-classifier AUC above 0.99), which otherwise stops the run with exit code 3.
    /// Every output is then marked as such.
    #[arg(long, requires = "fit_weights")]
    pub allow_unreliable_weights: bool,
    /// A folder written by `weighbridge batch`: the labeled file holds the assayed batch
    /// units, the pool file is the pool the batch was drawn from; the drawn units leave the
    /// pool and the weights are the design's exact (1 - pi) / pi (no classifier).
    #[arg(long, value_name = "DIR", conflicts_with_all = ["weight_column", "fit_weights"])]
    pub batch_design: Option<PathBuf>,
    /// With --batch-design: go ahead when some drawn units have no outcome, treating them
    /// as never drawn (assumes they are missing at random given their features).
    #[arg(long, requires = "batch_design")]
    pub allow_missing_batch: bool,
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
    /// Compute the level curve (expected conditional shortlist and BH count at FDR 0.05,
    /// 0.1, 0.2, 0.3, 0.5 and --fdr) also for pools above 10^5 units; smaller pools always
    /// get it (summary.json `level_curve`).
    #[arg(long)]
    pub level_curve: bool,
    /// Seed of the random draws (randomized p-values, pruning).
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Output folder (created if missing); it holds this run's outputs only: files an
    /// earlier run wrote there and this one does not are removed [default: weighbridge-out;
    /// rescreen: weighbridge-rescreen; audit: weighbridge-audit].
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Write into --out even if it holds files that no weighbridge run made (files of
    /// other names are left alone; same-named ones are overwritten).
    #[arg(long)]
    pub force: bool,
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

/// `--out` of `select` when not given (`rescreen` and `audit` have their own).
pub const DEFAULT_OUT: &str = "weighbridge-out";

/// Checked configuration of one `select` run.
#[derive(Debug, Clone)]
pub struct SelectConfig {
    /// The labeled file (the table itself with `--table`).
    pub labeled_path: PathBuf,
    /// The pool file (the table itself with `--table`).
    pub pool_path: PathBuf,
    /// Two files or one table.
    pub inputs: InputFiles,
    pub labeled_read: ReadOptions,
    pub pool_read: ReadOptions,
    pub threshold: Option<f64>,
    pub options: SelectOptions,
    /// Where the weights come from.
    pub weights: WeightSource,
    pub out: PathBuf,
    /// Write into a folder the tool did not make (`--force`).
    pub force: bool,
    pub quiet: bool,
    /// Write report.html too.
    pub report: bool,
    /// Go ahead on unreliable fitted weights (`--allow-unreliable-weights`).
    pub allow_unreliable_weights: bool,
    /// `--batch-design` folder, if any.
    pub batch_design: Option<PathBuf>,
    /// `--allow-missing-batch`.
    pub allow_missing_batch: bool,
    /// Which side of the threshold is interesting (`--lower-is-better`: below).
    pub direction: crate::conformal::score::Direction,
}

impl SelectConfig {
    /// `--batch-design` is a `select` option only (for now): other commands refuse it
    /// rather than ignore it.
    pub(crate) fn refuse_batch_design(&self, command: &str) -> Result<(), Failure> {
        match &self.batch_design {
            Some(_) => Err(Failure::Input(format!(
                "--batch-design applies to `weighbridge select` only; `{command}` does not \
                 use a batch design yet. Hint: run `weighbridge select --batch-design DIR`."
            ))),
            None => Ok(()),
        }
    }
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
            direction: if a.input.lower_is_better {
                Direction::Below
            } else {
                Direction::Above
            },
            seed: a.seed,
            level_curve: a.level_curve.then_some(true),
            empty_when_unreachable: a.allow_unreliable_weights,
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
        } else if let Some(dir) = &a.batch_design {
            let out = a.out.clone().unwrap_or_else(|| PathBuf::from(DEFAULT_OUT));
            if std::path::absolute(dir).ok() == std::path::absolute(&out).ok() {
                return Err(Failure::Input(format!(
                    "--out {} is the batch design folder: the selection would overwrite the \
                     design it reads. Hint: choose another --out folder.",
                    out.display()
                )));
            }
            // The weights are attached to the tables by `batch_design::apply_design`.
            WeightSource::Given {
                column: crate::cli::batch_design::WEIGHT_NAME.to_string(),
            }
        } else {
            WeightSource::None
        };
        let setup = a.input.setup(
            a.weight_column.clone(),
            &a.features,
            a.delimiter,
            &feature_selectors(&a.keep_columns),
            options.score,
        )?;
        if a.batch_design.is_some() && matches!(setup.files, InputFiles::Table { .. }) {
            return Err(Failure::Input(
                "--batch-design needs the two files (the assayed batch and the pool it was \
                 drawn from) and does not read --table yet. Hint: give --labeled and --pool."
                    .to_string(),
            ));
        }
        Ok(SelectConfig {
            labeled_path: setup.files.labeled_path().to_path_buf(),
            pool_path: setup.files.pool_path().to_path_buf(),
            inputs: setup.files,
            labeled_read: setup.labeled_read,
            pool_read: setup.pool_read,
            threshold: a.input.threshold,
            options,
            weights,
            out: a.out.unwrap_or_else(|| PathBuf::from(DEFAULT_OUT)),
            force: a.force,
            quiet: a.quiet,
            report: a.report,
            allow_unreliable_weights: a.allow_unreliable_weights,
            batch_design: a.batch_design,
            allow_missing_batch: a.allow_missing_batch,
            direction: setup.direction,
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
    let (mut labeled, mut pool) = config
        .inputs
        .read(&config.labeled_read, &config.pool_read)?;
    check_same_features(&labeled, &pool)?;
    rescale_given_weights(&mut labeled, &mut pool);
    Ok((labeled, pool))
}

/// At most this many shared ids are named in the warning.
pub(crate) const SHARED_IDS_LISTED: usize = 10;

/// The warning for ids that appear in both the labeled file and the pool: a unit both
/// assayed and "untested" is usually a pool that was not updated after an assay, and it is
/// shortlisted as if its outcome were unknown. Names up to ten ids (pool order) and the
/// count; `None` when the files share no id. Concern `medium`.
pub(crate) fn shared_ids_warning(
    labeled: &UnitTable,
    pool: &UnitTable,
) -> Option<crate::warning::Warning> {
    let labeled_ids: std::collections::HashSet<&str> =
        labeled.ids.iter().map(String::as_str).collect();
    let shared: Vec<&str> = pool
        .ids
        .iter()
        .map(String::as_str)
        .filter(|id| labeled_ids.contains(id))
        .collect();
    let first: Vec<&str> = shared.iter().take(SHARED_IDS_LISTED).copied().collect();
    shared_ids_warning_of(&first, shared.len())
}

/// [`shared_ids_warning`] from the first shared ids in pool order (at most
/// [`SHARED_IDS_LISTED`] are named) and their total count.
pub(crate) fn shared_ids_warning_of(
    first: &[&str],
    count: usize,
) -> Option<crate::warning::Warning> {
    if count == 0 {
        return None;
    }
    let listed: Vec<String> = first
        .iter()
        .take(SHARED_IDS_LISTED)
        .map(|id| format!("`{}`", crate::io::errors::shown_text(id)))
        .collect();
    let more = count.saturating_sub(listed.len());
    let message = format!(
        "{} id(s) appear in the labeled file and in the pool ({}{}); such a unit is both \
         assayed and treated as untested. Remove assayed units from the pool, or check that \
         the two files use different ids for different units.",
        count,
        listed.join(", "),
        if more > 0 {
            format!(" and {more} more")
        } else {
            String::new()
        }
    );
    Some(
        crate::warning::Warning::new(
            "ids_in_both_files",
            crate::warning::Level::Medium,
            "shared_id_count",
            message,
        )
        .measured(count as f64, 0.0)
        .titled("ids in both files"),
    )
}

/// Record how the run was asked for in its summary: the command line, the threshold rule
/// as numbers and the column names used (`select`, `rescreen`).
pub(crate) fn describe_run(
    summary: &mut crate::report::SelectSummary,
    config: &SelectConfig,
    labeled: &crate::io::UnitTable,
    pool: &crate::io::UnitTable,
) {
    describe_run_columns(summary, config, &labeled.feature_names, &pool.kept.names);
}

/// [`describe_run`] from the column names alone (the streamed selection holds no table).
pub(crate) fn describe_run_columns(
    summary: &mut crate::report::SelectSummary,
    config: &SelectConfig,
    feature_names: &[String],
    kept_names: &[String],
) {
    summary.command_line = super::command_line();
    summary.threshold_rule = Some(crate::report::ThresholdRule::new(
        config.threshold,
        config.pool_read.threshold_column.as_deref(),
        config.direction,
    ));
    summary.columns = Some(crate::report::Columns::of(
        &config.labeled_read,
        feature_names,
        kept_names,
    ));
}

/// Given weights near the top of the float range are rescaled together by a power of two
/// so that their sums stay finite ([`rescale_for_sums`]; ratios, p-values and ties are
/// unchanged). A no-op for realistic weights and without a weight column.
pub(crate) fn rescale_given_weights(labeled: &mut UnitTable, pool: &mut UnitTable) {
    if let (Some(labeled), Some(pool)) = (labeled.weight.as_mut(), pool.weight.as_mut()) {
        rescale_for_sums(labeled, pool);
    }
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

/// Stop a run on unreliable fitted weights (design.md 2.9): exit code 3 with each
/// diagnostic, its value and threshold, and what to try; with `--allow-unreliable-weights`
/// go ahead and return the mark every output carries. Given weights and no weights are
/// never refused.
pub(crate) fn reliability_gate(
    config: &SelectConfig,
    weighting: &Weighting<'_>,
) -> Result<Option<UnreliableMark>, Failure> {
    let Some(fitted) = weighting.fitted() else {
        return Ok(None);
    };
    let reasons = unreliable_weights(&fitted.assessment.summary);
    if reasons.is_empty() {
        return Ok(None);
    }
    if config.allow_unreliable_weights {
        return Ok(Some(UnreliableMark::new(reasons)));
    }
    Err(Failure::Refused(refusal_message(
        &reasons,
        &config.labeled_path,
        &config.pool_path,
    )))
}

/// The message of a refusal: which diagnostics, values, thresholds, what to try.
pub(crate) fn refusal_message(reasons: &[Unreliable], labeled: &Path, pool: &Path) -> String {
    let mut text = format!(
        "the weights fitted on {} and {} are unreliable, so no shortlist was written (exit \
         code 3):",
        labeled.display(),
        pool.display()
    );
    for r in reasons {
        let _ = write!(text, "\n  - {}: {}", r.diagnostic, r.message);
    }
    let _ = write!(
        text,
        "\nIn simulation, runs past these thresholds had realized FDR above q (0.24 at q = \
         0.2, against 0.12 for the others; docs/validation.md). What to try: {}.",
        crate::shift::reliability::REMEDIES
    );
    text
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
    config: &SelectConfig,
    summary: &crate::report::SelectSummary,
    pool: &crate::io::UnitTable,
    outcome: &crate::selection::pipeline::SelectionOutcome,
    weighting: &Weighting<'_>,
    calibration: &Calibration<'_>,
    extra: Vec<crate::report::html::Part>,
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
    let view = PoolView {
        ids: &pool.ids,
        predictions: &pool.prediction,
        threshold: match config.pool_read.threshold_column {
            Some(_) => None,
            None => config.threshold,
        },
        direction: config.direction,
    };
    let mut report = selection_report(
        summary,
        &view,
        outcome,
        part,
        weights_method(&config.weights),
    );
    report.extra.extend(extra);
    Ok(report.render().into_bytes())
}

/// "report: file:///abs/path/report.html" for the end of a summary.
pub(crate) fn report_pointer(out: &std::path::Path) -> String {
    let path = out.join("report.html");
    let path = std::path::absolute(&path).unwrap_or(path);
    format!("report: file://{}\n", path.display())
}

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
    /// Domain classifier: `logistic` (L2-penalized logistic regression on the standardized
    /// features) or `boosted` (gradient-boosted trees, cross-fitted: every row's weight
    /// comes from a model that did not see it; sees variance shifts, thresholds and
    /// interactions) [default: logistic].
    #[arg(long, value_enum, value_name = "KIND")]
    pub classifier: Option<ClassifierArg>,
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
    /// How features are made robust before the fit and the balance diagnostics: `clip`
    /// sets values beyond wide outer fences (1%/99% order statistics +- 2 spans) to the
    /// fences and names them; `rank` uses normal scores of the ranks (for heavy tails,
    /// and with --expand squares); `none` the raw values [default: clip].
    #[arg(long, value_enum, value_name = "HOW")]
    pub feature_transform: Option<FeatureTransformArg>,
}

/// `--classifier`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ClassifierArg {
    /// L2-penalized logistic regression.
    Logistic,
    /// Cross-fitted gradient-boosted trees.
    Boosted,
}

/// `--feature-transform`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum FeatureTransformArg {
    /// Winsorize values beyond wide outer fences and name them.
    Clip,
    /// Normal-scores rank (quantile) transform.
    Rank,
    /// Raw values.
    None,
}

impl FitArgs {
    /// The first fit option that was given, as its flag, if any (for commands where the fit
    /// options only apply together with another flag).
    pub fn first_given(&self) -> Option<&'static str> {
        [
            (self.classifier.is_some(), "--classifier"),
            (self.penalty.is_some(), "--penalty"),
            (self.expand.is_some(), "--expand"),
            (self.fit_rows.is_some(), "--fit-rows"),
            (self.fit_fraction.is_some(), "--fit-fraction"),
            (self.cap_quantile.is_some(), "--cap-quantile"),
            (self.pool_sample.is_some(), "--pool-sample"),
            (self.folds.is_some(), "--folds"),
            (self.permutations.is_some(), "--permutations"),
            (self.feature_transform.is_some(), "--feature-transform"),
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
        let boosted = self.classifier == Some(ClassifierArg::Boosted);
        if boosted {
            for (given, flag) in [
                (
                    self.expand.is_some_and(|e| e != ExpandArg::None),
                    "--expand",
                ),
                (self.penalty.is_some(), "--penalty"),
            ] {
                if given {
                    return Err(Failure::Input(format!(
                        "{flag} applies to --classifier logistic only: boosted trees find \
                         squares, thresholds and interactions themselves and have no L2 \
                         penalty on slopes. Hint: drop {flag}, or use --classifier logistic."
                    )));
                }
            }
        }
        let params = ShiftParams::new()
            .classifier_kind(if boosted {
                ClassifierKind::Boosted
            } else {
                ClassifierKind::Logistic
            })
            .alpha(self.penalty.unwrap_or(DEFAULT_PENALTY))
            .expansion(match self.expand.unwrap_or(ExpandArg::None) {
                ExpandArg::None => Expansion::None,
                ExpandArg::Squares => Expansion::Squares,
                ExpandArg::Pairwise => Expansion::Pairwise,
                ExpandArg::Both => Expansion::SquaresAndPairwise,
            })
            .fit_rows(fit_rows)
            .feature_transform(match self.feature_transform {
                None | Some(FeatureTransformArg::Clip) => FeatureTransform::Clip,
                Some(FeatureTransformArg::Rank) => FeatureTransform::Rank,
                Some(FeatureTransformArg::None) => FeatureTransform::None,
            })
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
    let files = if labeled == pool {
        labeled.display().to_string()
    } else {
        format!("{} and {}", labeled.display(), pool.display())
    };
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
