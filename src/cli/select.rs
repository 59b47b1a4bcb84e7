//! `weighbridge select`: read a labeled file and a pool file, decide the weights (none,
//! given in a column, or fitted by the domain classifier with `--fit-weights`), compute
//! weighted conformal p-values, select a shortlist with FDR control, write `shortlist.csv`,
//! `candidates.csv` and `summary.json` to the output folder and print a short summary.

use crate::io::OutputSet;
use crate::report::summary::{
    candidates_csv_in_order, shortlist_csv_in_order, text_summary_in_order,
};
use crate::report::{
    add_shift, select_summary, shift_section, shortlist_order, MemoryUse, PoolColumns, RunInputs,
};
use crate::selection::pipeline::{run_selection, LabeledInput, PoolInput, SelectError};
use crate::shift::weighting::WeightSource;

use super::batch_design::{apply_design, read_design};
use super::common::{
    describe_run, obtain_run_weights, read_inputs, reliability_gate, report_pointer,
    selection_inputs, selection_report_page, shared_ids_warning, weighting_is_fitted,
};
pub use super::common::{SelectArgs, SelectConfig};
use super::{commit_outputs, open_output, print_stdout, Failure, PhaseTimer, StepStatus};

/// `weighbridge select`: the selection's arguments and the memory budget.
#[derive(Debug, clap::Args)]
pub struct SelectCommand {
    #[command(flatten)]
    pub selection: SelectArgs,
    /// Memory the run may use, e.g. 1GiB, 512MiB, 4G. When holding the pool in memory
    /// would need more (estimated from the pool file's size: about 200 bytes per row plus
    /// twice the row's length), the pool is streamed from the file instead: read once,
    /// its scores passed a few times through temporary files next to --out, memory about
    /// 16 bytes per pool row, the same outputs. Streaming covers two files with no or
    /// given weights and conditional calibration with homogeneous or deterministic pruning,
    /// without --report; other runs stay in memory. Standard input (--pool -) is streamed
    /// only when this option is given (it is copied to a temporary file first).
    #[arg(long, value_name = "SIZE", value_parser = parse_budget_arg)]
    pub memory_budget: Option<u64>,
}

fn parse_budget_arg(text: &str) -> Result<u64, String> {
    super::select_streamed::parse_budget(text)
}

/// Run the selection; a level no unit can reach is blamed on the labeled file by name.
fn select_or_explain(
    config: &SelectConfig,
    labeled: LabeledInput<'_>,
    pool: PoolInput<'_>,
) -> Result<crate::selection::pipeline::SelectionOutcome, Failure> {
    let weighted = labeled.weights.is_some() || pool.weights.is_some();
    run_selection(&config.options, labeled, pool).map_err(|e| explain(config, weighted, e))
}

/// The message for a selection error, naming the file or the weights to blame.
pub(crate) fn explain(config: &SelectConfig, weighted: bool, e: SelectError) -> Failure {
    match e {
        SelectError::LabeledSetTooSmall {
            fdr,
            n_labeled,
            smallest_floor,
        } if weighted && 1.0 / (n_labeled as f64 + 1.0) <= fdr => Failure::Input(format!(
            "no pool unit can ever be selected at FDR level {}: with the weights of {}, \
             the smallest possible p-value w_j / (W + w_j) is {smallest_floor:.4} (W = total \
             weight of the {n_labeled} labeled rows). The pool's weights are large compared \
             with the labeled set's: the pool lies where the labeled set has little weight \
             (little overlap), so more labeled rows like the current ones will not help; \
             labeled rows like the pool, or a higher --fdr, will.",
            crate::selection::level_text(fdr),
            match &config.weights {
                WeightSource::Given { column } => format!("column {column}"),
                _ => "the fit".to_string(),
            }
        )),
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
    }
}

/// Run `select`: streamed when the in-memory run would need more than the memory budget
/// and the run is one streaming covers, else in memory.
pub fn run(command: SelectCommand) -> Result<(), Failure> {
    let config = SelectConfig::try_from(command.selection)?;
    let budget = command
        .memory_budget
        .unwrap_or(super::select_streamed::DEFAULT_BUDGET);
    let estimate = super::select_streamed::in_memory_estimate(&config.pool_path);
    let over = match estimate {
        Some(bytes) => bytes > budget,
        // Standard input or a pipe: streamed when a budget is given.
        None => command.memory_budget.is_some(),
    };
    if over {
        match super::select_streamed::not_streamable(&config) {
            None => {
                let why = match estimate {
                    Some(bytes) => format!(
                        "in memory it would need about {}, above the memory budget of {}",
                        bytes_text(bytes),
                        bytes_text(budget)
                    ),
                    None => "a pool read once (standard input or a pipe) with --memory-budget"
                        .to_string(),
                };
                return super::select_streamed::run(&config, budget, estimate, &why);
            }
            Some(flag) if !config.quiet => eprintln!(
                "note: this run would need about {} in memory, above the memory budget of \
                 {}, but the streamed selection does not cover {flag}; running in memory.",
                estimate.map_or("an unknown amount".to_string(), bytes_text),
                bytes_text(budget)
            ),
            Some(_) => {}
        }
    }
    run_in_memory(config, MemoryUse::in_memory(budget, estimate))
}

/// A byte count in words: "1.5 GiB", "200 MiB".
fn bytes_text(bytes: u64) -> String {
    let b = bytes as f64;
    if b >= (1u64 << 30) as f64 {
        format!("{:.1} GiB", b / (1u64 << 30) as f64)
    } else if b >= (1u64 << 20) as f64 {
        format!("{:.0} MiB", b / (1u64 << 20) as f64)
    } else {
        format!("{:.0} KiB", (b / 1024.0).max(1.0))
    }
}

fn run_in_memory(config: SelectConfig, memory: MemoryUse) -> Result<(), Failure> {
    let mut timer = PhaseTimer::new();
    let folder = open_output(
        &config.out,
        config.force,
        &[&config.labeled_path, &config.pool_path],
    )?;
    let status = StepStatus::new(config.quiet);
    status.step("reading the labeled and pool files");
    let (labeled, pool) = read_inputs(&config)?;
    let outcome_counts = (labeled.dropped_missing_outcome, labeled.censored_outcomes);
    // A calibration batch: the assayed units calibrate with the design's exact weights and
    // the drawn units leave the pool.
    let design = match &config.batch_design {
        Some(dir) => Some(apply_design(
            &read_design(dir)?,
            &labeled,
            &pool,
            config.allow_missing_batch,
        )?),
        None => None,
    };
    let (labeled, pool) = match design.as_ref() {
        Some(d) => (&d.labeled, &d.pool),
        None => (&labeled, &pool),
    };
    timer.mark("read inputs");
    if weighting_is_fitted(&config) {
        status.step("fitting the domain classifier and its diagnostics");
    }
    let weighting = obtain_run_weights(&config, labeled, pool)?;
    if weighting.fitted().is_some() {
        timer.mark("fit weights and diagnostics");
    }
    // Unreliable fitted weights stop the run here (exit 3) unless allowed.
    let unreliable = reliability_gate(&config, &weighting)?;
    // Held-out fitting: the rows that fit the classifier do not calibrate.
    let calibration = weighting.calibration(labeled);
    status.step("scores, p-values and selection");
    let (labeled_input, pool_input) = selection_inputs(&config, pool, &calibration, &weighting);
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
        weights: match design.as_ref() {
            Some(d) => d.description.clone(),
            None => weighting.describe(),
        },
    };
    let mut summary = select_summary(&outcome, inputs);
    describe_run(&mut summary, &config, labeled, pool);
    if let Some(d) = design.as_ref() {
        for w in &d.warnings {
            summary.add_warning(w.clone());
        }
    }
    if let Some(fitted) = weighting.fitted() {
        add_shift(&mut summary, shift_section(fitted, &labeled.feature_names));
    }
    if let Some(w) = shared_ids_warning(labeled, pool) {
        summary.add_warning(w);
    }
    summary.unreliable_weights = unreliable;
    summary.memory = Some(memory);
    (
        summary.dropped_missing_outcome_count,
        summary.censored_outcome_count,
    ) = outcome_counts;
    let columns = PoolColumns::of(pool, config.direction);
    // The shortlist's order, sorted once for candidates.csv, shortlist.csv and the summary.
    let order = shortlist_order(columns.prediction, &outcome.selected, columns.direction);
    let mut files = OutputSet::new();
    files.add(
        "candidates.csv",
        candidates_csv_in_order(
            &columns,
            &outcome,
            summary.unreliable_weights.is_some(),
            &order,
        ),
    );
    files.add(
        "shortlist.csv",
        shortlist_csv_in_order(&columns, &outcome, &order),
    );
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    files.add("summary.json", json);
    if config.report {
        files.add(
            "report.html",
            selection_report_page(
                &config,
                &summary,
                pool,
                &outcome,
                &weighting,
                &calibration,
                Vec::new(),
            )?,
        );
    }
    timer.mark("format outputs");
    status.step("writing the outputs");
    commit_outputs(folder, files, "select")?;
    timer.mark("write outputs");
    drop(status);
    if !config.quiet {
        let mut text = text_summary_in_order(&summary, &columns, &order);
        text.push_str(&format!(
            "wrote {} (the {} selected units, best first), {} and {}\n",
            config.out.join("shortlist.csv").display(),
            summary.selected_count,
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
