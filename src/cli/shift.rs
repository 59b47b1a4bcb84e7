//! `weighbridge shift`: fit the domain classifier that tells labeled rows from pool rows,
//! turn it into density-ratio weights, and report the shift diagnostics (`shift.json`,
//! `weights.csv`, `balance.csv`, three SVG plots and a text summary, worst problems first).
//!
//! The fit options it shares with `select --fit-weights` and `check` ([`FitArgs`]) and the
//! mapping of weighting errors to exit codes are in [`super::common`].

use std::path::{Path, PathBuf};

use clap::Args;

use crate::io::{
    check_one_stdin, check_same_features, read_table_choosing, read_units_choosing,
    resolve_features, ColumnKind, InputError, OutcomeCells, OutputSet, ReadOptions, Role,
    UnitTable,
};
use crate::report::html::{shift_report_html, ShiftPart};
use crate::report::plots::{balance_svg, overlap_svg, weights_svg};
use crate::report::{
    balance_csv, shift_report, shift_section, shift_text, weights_csv, ShiftInputs,
};
use crate::shift::weighting::{obtain_weights, WeightSource, Weighting};
use crate::shift::ShiftParams;

use super::common::{
    feature_selectors, input_files, report_pointer, weighting_failure, DelimiterArg, FitArgs,
    InputFiles,
};
use super::{commit_outputs, open_output, print_stdout, Failure, PhaseTimer, StepStatus};

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
      --expand squares --out shift-report

  # one assay export (rows with an empty pIC50 are the pool), every column MolWt..TPSA
  weighbridge shift --table assays.csv.gz --outcome pIC50 --id compound_id \\
      --features MolWt..TPSA --out shift-report";

/// Command-line arguments of `shift`, as typed.
#[derive(Debug, Args)]
#[command(after_long_help = SHIFT_HELP)]
pub struct ShiftArgs {
    /// Labeled file (CSV, or TSV by extension; .gz and .zst are decompressed; `-` reads
    /// standard input): units already measured. Give --labeled and --pool, or --table.
    #[arg(long, value_name = "FILE", conflicts_with = "table")]
    pub labeled: Option<PathBuf>,
    /// Pool file: untested units.
    #[arg(long, value_name = "FILE", conflicts_with = "table")]
    pub pool: Option<PathBuf>,
    /// One table holding both: rows whose --outcome cell is empty (or an
    /// --untested-marker) are the pool, every other row is labeled (the outcome's value is
    /// not used here: `NA` or `>10000` count as tested). Example: --table assays.csv
    /// --outcome pIC50.
    #[arg(long, value_name = "FILE")]
    pub table: Option<PathBuf>,
    /// With --table: the outcome column, which tells tested rows from untested ones
    /// [default: y].
    #[arg(long, value_name = "NAME", requires = "table")]
    pub outcome: Option<String>,
    /// With --table: a token that also means "not tested" (besides the empty cell),
    /// ignoring case; repeat for several. Example: --untested-marker untested.
    #[arg(long, value_name = "TOKEN", requires = "table")]
    pub untested_marker: Vec<String>,
    /// Feature columns, in both files: a comma list of names and/or ranges: `f1..f32`
    /// (every column f1, f2, ..., f32) or `MolWt..TPSA` (every column from MolWt to TPSA
    /// in the header; `weighbridge columns FILE` shows the order).
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
    /// Also write report.html: a self-contained page (warnings, settings, diagnostics with
    /// plots, cautions, method).
    #[arg(long)]
    pub report: bool,
}

/// Checked configuration of one `shift` run.
#[derive(Debug, Clone)]
pub struct ShiftConfig {
    /// The labeled file (the table itself with `--table`).
    pub labeled_path: PathBuf,
    /// The pool file (the table itself with `--table`).
    pub pool_path: PathBuf,
    /// Two files or one table.
    pub inputs: InputFiles,
    /// With `--table`: the outcome column that tells tested rows from untested ones.
    pub outcome: String,
    pub read: ReadOptions,
    pub params: ShiftParams,
    pub out: PathBuf,
    /// Write into a folder the tool did not make (`--force`).
    pub force: bool,
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
            keep_columns: Vec::new(),
            outcome_cells: OutcomeCells {
                tested_only: true,
                ..OutcomeCells::default()
            },
        };
        if a.table.is_none() && a.outcome.is_some() {
            return Err(Failure::Input(
                "--outcome applies to --table only here (it tells tested rows from untested \
                 ones). Hint: drop --outcome, or give one --table FILE."
                    .to_string(),
            ));
        }
        let inputs = input_files(
            a.labeled.as_ref(),
            a.pool.as_ref(),
            a.table.as_ref(),
            &a.untested_marker,
        )?;
        Ok(ShiftConfig {
            labeled_path: inputs.labeled_path().to_path_buf(),
            pool_path: inputs.pool_path().to_path_buf(),
            inputs,
            outcome: a.outcome.unwrap_or_else(|| "y".to_string()),
            read,
            params,
            out: a.out,
            force: a.force,
            quiet: a.quiet,
            report: a.report,
        })
    }
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
    let (table, _) = read_features(path, role, base, None)?;
    Ok(table)
}

/// [`read_feature_table`] for one table holding both sets (`--table`): rows whose `outcome`
/// cell is empty or one of `markers` are the pool. Returns `(labeled, pool)`.
fn read_feature_tables(
    path: &Path,
    base: &ReadOptions,
    outcome: &str,
    markers: &[String],
) -> Result<(UnitTable, UnitTable), Failure> {
    let options = ReadOptions {
        outcome: Some(outcome.to_string()),
        ..base.clone()
    };
    let (labeled, pool) = read_features(path, Role::Table, &options, Some(markers))?;
    Ok((labeled, pool.expect("a one-table read returns the pool")))
}

/// The reader behind both: the stand-in prediction column, then `read_units_choosing` or,
/// with `markers`, `read_table_choosing`.
fn read_features(
    path: &Path,
    role: Role,
    base: &ReadOptions,
    markers: Option<&[String]>,
) -> Result<(UnitTable, Option<UnitTable>), Failure> {
    let options = ReadOptions {
        prediction: base.id.clone(),
        ..base.clone()
    };
    let mut stand_in = base.id.clone();
    let choose = |names: &[String]| {
        let resolved = resolve_features(&base.features, names).ok()?;
        let first = resolved.first()?;
        let chosen = names.iter().any(|n| n == first).then(|| first.clone())?;
        stand_in = chosen.clone();
        Some(chosen)
    };
    let read = match markers {
        None => read_units_choosing(path, role, &options, choose).map(|table| (table, None)),
        Some(markers) => read_table_choosing(path, &options, markers, choose)
            .map(|(labeled, pool)| (labeled, Some(pool))),
    };
    let (mut table, mut pool) = read.map_err(|mut e| {
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
    if let Some(pool) = pool.as_mut() {
        pool.prediction = Vec::new();
    }
    Ok((table, pool))
}

/// Run `shift`.
pub fn run(args: ShiftArgs) -> Result<(), Failure> {
    let mut timer = PhaseTimer::new();
    let config = ShiftConfig::try_from(args)?;
    let folder = open_output(
        &config.out,
        config.force,
        &[&config.labeled_path, &config.pool_path],
    )?;
    let status = StepStatus::new(config.quiet);
    status.step("reading the labeled and pool files");
    check_one_stdin(&config.inputs.flags())?;
    let (labeled, pool) = match &config.inputs {
        InputFiles::Two { labeled, pool } => (
            read_feature_table(labeled, Role::Labeled, &config.read)?,
            read_feature_table(pool, Role::Pool, &config.read)?,
        ),
        InputFiles::Table {
            path,
            untested_markers,
        } => read_feature_tables(path, &config.read, &config.outcome, untested_markers)?,
    };
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
    let mut report = report;
    report.command_line = super::command_line();
    report.columns = Some(crate::report::Columns::of(
        &config.read,
        &labeled.feature_names,
        &[],
    ));
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
    commit_outputs(folder, files, "shift")?;
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
            text.push_str(&report_pointer(&config.out));
        }
        print_stdout(&text);
    }
    Ok(())
}
