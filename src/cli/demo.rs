//! `weighbridge demo`: the whole job on an invented screening scenario (see
//! `crate::workflows::demo`), with the truth known, so that the output can say how far the shortlist
//! can be trusted and what ignoring the shift would have done.

use std::fmt::Write as _;
use std::path::PathBuf;

use clap::Args;
use linfa::ParamGuard;
use serde::Serialize;

use crate::conformal::score::Direction;
use crate::io::OutputSet;
use crate::report::html::{selection_report, shift_part, Part, PoolView, Table, WeightsMethod};
use crate::report::{
    add_shift, candidates_csv, select_summary, shortlist_csv, warning_line, Columns, PoolColumns,
    RunInputs, ShiftSection, ThresholdRule, CAUTIONS,
};
use crate::shift::weighting::{fit_rows_statement, FittedWeights};
use crate::shift::FeatureBalance;
use crate::workflows::batch::DEFAULT_MAX_PROBABILITY;
use crate::workflows::demo::{
    batch_comparison, batch_step, compared_selections, default_batch_size,
    false_discovery_proportion, fit_params, fit_weights, generate, repeated_screens,
    spearman_correlation, BatchStep, DemoError, DemoScenario, ShortlistTruth, BATCH_LABEL,
    COMPARED, FEATURES, THRESHOLD,
};

use super::{command_line, commit_outputs, open_output, print_stdout, Failure, StepStatus};

const DEMO_HELP: &str = "\
Generates an invented compound library (our own simulation, no real data): a labeled set of
assayed compounds chosen with a bias on three descriptors and a pool ten times larger, with
a model's predictions. Fits density-ratio weights from the descriptors f1..f5 with the
domain classifier (as `weighbridge shift` does), prints its diagnostics and how well the
fitted weights agree with the exact density ratio (known here by construction), runs the
selection with fitted weights, with the true weights and without weights, and, because the
demo knows every compound's true activity, reports how many of each shortlist are really
inactive, for this screen and averaged over --screens further screens.

Then the calibration-batch step (as `weighbridge batch` and `select --batch-design` do): a
batch of --batch-size compounds (expected; 300 by default, a tenth of a smaller pool) is
drawn from the pool with the default ranked design, assayed (in the simulation: their true
activities are read), and used as the labeled set with the exact weights
(1 - pi) / pi; the drawn compounds leave the pool. Its shortlist is shown next to the one
with fitted weights: sizes, realized false discovery proportion and power.

Writes into --out: labeled.csv, pool.csv (the inputs; column w holds the exact density
ratio, which the default selection does not use), candidates.csv and summary.json (the
selection with fitted weights, diagnostics under `shift`), weights.csv (the fitted weights),
pool_truth.csv (the hidden true activities) and report.html (a self-contained page:
warnings, settings, shortlist, diagnostics with plots, the comparison with the truth, the
calibration batch, cautions and method; its file:// address is printed at the end). The
batch step adds batch_assayed.csv (the drawn compounds: id, y, pred,
inclusion_probability, w = exact weight), batch_pool.csv (the pool without them, same
columns but y), batch_candidates.csv (the exact-weight selection, one row per compound of
batch_pool.csv) and batch_summary.json (the design, that selection's summary, and both
shortlists against the truth). `weighbridge select --labeled batch_assayed.csv --pool
batch_pool.csv --threshold 6.5 --weight-column w --fdr Q --seed S` repeats the
exact-weight selection.

Takes about a second in a release build with the default sizes (20 screens).

Example:
  cargo run --release -- demo --out weighbridge-demo";

/// Arguments of `demo`.
#[derive(Debug, Args)]
#[command(after_long_help = DEMO_HELP)]
pub struct DemoArgs {
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-demo", value_name = "DIR")]
    pub out: PathBuf,
    /// Write into --out even if it holds files that no weighbridge run made (files of
    /// other names are left alone; same-named ones are overwritten).
    #[arg(long)]
    pub force: bool,
    /// Seed of the invented data and of the selection's random draws.
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Number of labeled (already assayed) compounds.
    #[arg(long, default_value_t = 3000)]
    pub labeled: usize,
    /// Number of untested compounds in the pool.
    #[arg(long, default_value_t = 30000)]
    pub pool: usize,
    /// Target false discovery rate.
    #[arg(long, default_value_t = 0.1)]
    pub fdr: f64,
    /// How many further invented screens to average over, each with freshly fitted
    /// weights (0 to skip).
    #[arg(long, default_value_t = 20)]
    pub screens: usize,
    /// Expected size of the calibration batch drawn from the pool (0 to skip the step)
    /// [default: 300, or a tenth of a pool under 3000].
    #[arg(long, value_name = "N", allow_negative_numbers = true)]
    pub batch_size: Option<f64>,
}

/// Label permutations of the demo's own shift test (the default of `weighbridge shift`).
const DEMO_PERMUTATIONS: usize = 1000;

impl From<DemoError> for Failure {
    fn from(e: DemoError) -> Self {
        match e {
            DemoError::Select(e) => e.into(),
            DemoError::Batch(e) => Failure::Input(format!("--batch-size: {e}")),
            other => Failure::Internal(other.to_string()),
        }
    }
}

/// The feature with the largest |SMD| by `pick`.
fn worst_by(balance: &[FeatureBalance], pick: fn(&FeatureBalance) -> f64) -> (&str, f64) {
    balance
        .iter()
        .map(|b| (b.feature.as_str(), pick(b).abs()))
        .max_by(|a, b| a.1.total_cmp(&b.1))
        .unwrap_or(("none", 0.0))
}

/// The demo's short account of the shift and the fitted weights.
fn shift_lines(out: &mut String, section: &ShiftSection, rho: f64) {
    let s = &section.summary;
    let _ = writeln!(
        out,
        "Shift, measured from the descriptors {} (the selection uses these fitted weights, \
         not the true ones):",
        FEATURES.join(", ")
    );
    let _ = writeln!(
        out,
        "  domain-classifier AUC {:.3} (95% CI {:.3} to {:.3}; 0.5 = no detectable shift), \
         permutation p = {:.4}",
        s.auc, s.auc_ci[0], s.auc_ci[1], s.permutation_p
    );
    let _ = writeln!(
        out,
        "  effective sample size {:.0} of {} labeled compounds ({:.1}%); Pareto k-hat {:.2} \
         (reliable below {:.2})",
        s.ess,
        s.calibration_rows,
        100.0 * s.ess_fraction,
        s.khat,
        s.khat_threshold
    );
    let (before_name, before) = worst_by(&s.balance, |b| b.smd_unweighted);
    let (after_name, after) = worst_by(&s.balance, |b| b.smd_weighted);
    let _ = writeln!(
        out,
        "  worst |SMD| {before:.2} ({before_name}) before weighting, {after:.2} ({after_name}) \
         after (flagged above {:.2})",
        s.smd_threshold
    );
    let _ = writeln!(
        out,
        "  fitted vs true weights: Spearman correlation {rho:.3} (the exact density ratio is \
         known in this simulation: column w of the data files)"
    );
    let _ = writeln!(
        out,
        "  pool compounds that can never be selected at this level: {}",
        s.unreachable_count
    );
    if s.warnings.is_empty() {
        let _ = writeln!(out, "  shift warnings: none");
    } else {
        let _ = writeln!(out, "  shift warnings (most serious first):");
        for w in &s.warnings {
            let _ = writeln!(out, "    - {}", warning_line(w));
        }
    }
    let _ = writeln!(out, "  {}\n", section.fit_rows_note);
}

/// `batch_summary.json`: the batch design, the exact-weight selection, and both shortlists
/// against the truth.
#[derive(Serialize)]
struct BatchSummary<'a> {
    tool: crate::report::ToolInfo,
    /// What the step did, in plain words.
    description: &'static str,
    /// The seed of the draw (derived from the demo's seed; `workflows::demo::batch_seed`).
    batch_seed: u64,
    /// The design and its draw (`weighbridge batch`'s design.json fields).
    design: &'a crate::workflows::batch::BatchOutcome,
    /// The exact-weight selection's summary (the fields of summary.json).
    selection: crate::report::SelectSummary,
    /// The fitted-weight shortlist and the exact-weight one, against the truth.
    comparison: &'a [ShortlistTruth; 2],
}

const BATCH_DESCRIPTION: &str = "A calibration batch drawn from the pool by Poisson \
    sampling with the default ranked design (crate::workflows::batch), assayed in the \
    simulation by reading the drawn compounds' true activities, and used as the labeled set \
    with the exact weights (1 - pi) / pi; the drawn compounds left the pool. The fitted-weight \
    shortlist selects from the whole pool, the exact-weight one from the pool without the \
    batch.";

/// The printed account of the batch step.
fn batch_lines(out: &mut String, batch: &BatchStep, figures: &[ShortlistTruth; 2]) {
    let d = &batch.design;
    let _ = writeln!(
        out,
        "\nCalibration batch (docs/method.md): {} of {} pool compounds drawn (expected {:.0}, \
         ranked design), assayed here by reading their true activities, then used as the \
         labeled set with the exact weights (1 - pi) / pi; the drawn compounds left the pool.",
        d.drawn_size, d.pool_units, d.expected_size
    );
    for line in &d.reading {
        let _ = writeln!(out, "  - {line}");
    }
    let _ = writeln!(
        out,
        "{:<34} {:>13} {:>10} {:>9} {:>9} {:>7} {:>7}",
        "shortlist", "calibrated by", "pool", "selected", "inactive", "FDP", "power"
    );
    for f in figures {
        let _ = writeln!(
            out,
            "{:<34} {:>13} {:>10} {:>9} {:>9} {:>6.1}% {:>6.1}%",
            f.shortlist,
            f.calibration_units,
            f.pool_units,
            f.selected,
            f.truly_inactive,
            100.0 * f.false_discovery_proportion,
            100.0 * f.power
        );
    }
    let _ = writeln!(
        out,
        "(power: the share of the truly active compounds in the pool each shortlist selected \
         from. The exact weights need no classifier and carry the finite-sample guarantee; \
         the batch's outcomes must not be used to retrain the model whose predictions this \
         selection calibrates.)"
    );
}

/// The batch step's files: the assayed batch and the remaining pool as a labeled/pool pair
/// `select --weight-column w` can rerun, the exact-weight candidates, and the summary.
fn add_batch_files(
    files: &mut OutputSet,
    scenario: &DemoScenario,
    batch: &BatchStep,
    figures: &[ShortlistTruth; 2],
    q: f64,
) -> Result<(), Failure> {
    let pool = &scenario.pool;
    let table = |rows: &[usize], with_outcome: bool| -> Vec<u8> {
        let mut writer = csv::Writer::from_writer(Vec::new());
        let mut header = vec!["id"];
        if with_outcome {
            header.push("y");
        }
        header.extend(["pred", "inclusion_probability", "w"]);
        writer.write_record(&header).expect("write to memory");
        for &j in rows {
            let mut row = vec![pool.ids[j].clone()];
            if with_outcome {
                row.push(format!("{:.4}", pool.outcome[j]));
            }
            row.push(format!("{:.4}", pool.prediction[j]));
            row.push(batch.design.probabilities[j].to_string());
            row.push(batch.weight(j).to_string());
            writer.write_record(&row).expect("write to memory");
        }
        writer.into_inner().expect("flush to memory")
    };
    files.add("batch_assayed.csv", table(&batch.drawn, true));
    files.add("batch_pool.csv", table(&batch.left, false));
    let left_ids: Vec<String> = batch.left.iter().map(|&j| pool.ids[j].clone()).collect();
    let left_prediction: Vec<f64> = batch.left.iter().map(|&j| pool.prediction[j]).collect();
    let no_kept = crate::io::KeptColumns::default();
    let left_columns = crate::report::PoolColumns {
        ids: &left_ids,
        prediction: &left_prediction,
        kept: &no_kept,
        direction: crate::conformal::score::Direction::Above,
    };
    files.add(
        "batch_candidates.csv",
        candidates_csv(&left_columns, &batch.outcome, false),
    );
    files.add(
        "batch_shortlist.csv",
        crate::report::shortlist_csv(&left_columns, &batch.outcome),
    );
    let mut selection = select_summary(
        &batch.outcome,
        RunInputs {
            labeled_file: "batch_assayed.csv (invented demo data: the calibration batch)"
                .to_string(),
            pool_file: "batch_pool.csv (invented demo data: the pool without the batch)"
                .to_string(),
            threshold: format!("value {THRESHOLD}"),
            weights: "exact by design: (1 - pi) / pi from the batch's inclusion probabilities \
                      (column w)"
                .to_string(),
        },
    );
    selection.add_warning(crate::warning::Warning::new(
        "batch_outcomes_not_for_training",
        crate::warning::Level::Low,
        "calibration_batch",
        format!(
            "calibration batch: the batch's outcomes must not be used to retrain the model \
             whose predictions this selection calibrates; that voids the exactness of the \
             weights (FDR {q})."
        ),
    ));
    let summary = BatchSummary {
        tool: crate::report::tool_info(),
        description: BATCH_DESCRIPTION,
        batch_seed: batch.design.seed,
        design: &batch.design,
        selection,
        comparison: figures,
    };
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the batch summary: {e}")))?;
    files.add("batch_summary.json", json);
    Ok(())
}

/// The report's section on the batch step.
fn batch_part(batch: &BatchStep, figures: &[ShortlistTruth; 2], q: f64, screens: usize) -> Part {
    let d = &batch.design;
    let mut paragraphs = vec![format!(
        "Fitted weights are estimates, and the FDR guarantee does not cover their error. A \
         calibration batch removes the estimate: {} of the {} pool compounds were drawn \
         (expected {:.0}), each independently with a known inclusion probability pi (higher \
         for compounds the model ranks high), and assayed (in this simulation: their true \
         activities were read). With the batch as the labeled set, the ratio of the pool's \
         density to the batch's is exactly (1 - pi) / pi, so conditional calibration keeps FDR \
         <= {q} in finite samples with nothing estimated (Tibshirani, Barber, Candes & Ramdas \
         2019; docs/method.md). The drawn compounds left the pool: batch_assayed.csv and \
         batch_pool.csv hold the two sets (column w: the exact weight), batch_candidates.csv \
         the selection, batch_summary.json the design and the figures below.",
        d.drawn_size, d.pool_units, d.expected_size
    )];
    paragraphs.extend(d.reading.iter().cloned());
    if screens > 0 {
        paragraphs.push(format!(
            "One screen's false discovery proportion scatters around its average; the averages \
             over {screens} further screens (a fresh batch each) are in the table of the section \
             above, row \"{BATCH_LABEL}\"."
        ));
    }
    Part {
        id: "calibration-batch".to_string(),
        heading: "A calibration batch: exact weights (demo)".to_string(),
        paragraphs,
        tables: vec![Table {
            header: [
                "shortlist",
                "weights",
                "calibrated by",
                "pool units",
                "selected",
                "truly inactive",
                "FDP",
                "power",
            ]
            .map(String::from)
            .to_vec(),
            rows: figures
                .iter()
                .map(|f| {
                    vec![
                        f.shortlist.to_string(),
                        f.weights.to_string(),
                        f.calibration_units.to_string(),
                        f.pool_units.to_string(),
                        f.selected.to_string(),
                        f.truly_inactive.to_string(),
                        format!("{:.1}%", 100.0 * f.false_discovery_proportion),
                        format!("{:.1}%", 100.0 * f.power),
                    ]
                })
                .collect(),
            note: Some(
                "FDP: the share of the shortlist that is truly inactive; power: the share of \
                 the truly active compounds of the pool it selected from."
                    .to_string(),
            ),
            scroll: false,
            rows_in: None,
        }],
        figures: Vec::new(),
    }
}

/// Run `demo`.
pub fn run(args: DemoArgs) -> Result<(), Failure> {
    if args.labeled < 10 || args.pool < 10 {
        return Err(Failure::Input(
            "--labeled and --pool must each be at least 10".to_string(),
        ));
    }
    let batch_size = match args.batch_size {
        None => Some(default_batch_size(args.pool)),
        Some(0.0) => None,
        // The design's own bound (crate::workflows::batch), checked before the folder is
        // touched.
        Some(n) if !(n > 0.0 && n < args.pool as f64 * DEFAULT_MAX_PROBABILITY) => {
            return Err(Failure::Input(format!(
                "--batch-size must be 0 (skip the step) or a number > 0 and below {} (the \
                 pool of {} times the largest inclusion probability {DEFAULT_MAX_PROBABILITY}), \
                 got {n}",
                args.pool as f64 * DEFAULT_MAX_PROBABILITY,
                args.pool
            )))
        }
        Some(n) => Some(n),
    };
    let folder = open_output(&args.out, args.force, &[])?;
    let status = StepStatus::new(false);
    status.step("inventing the scenario");
    let scenario = generate(args.labeled, args.pool, args.seed);
    let q = args.fdr;
    let params = fit_params(args.seed, q, DEMO_PERMUTATIONS);
    let options = params
        .clone()
        .check()
        .map_err(|e| Failure::Input(format!("--fdr: {e}")))?;
    status.step("fitting the domain classifier and its diagnostics");
    let assessment = fit_weights(&scenario, params).map_err(DemoError::from)?;
    status.step("selecting with and without weights");
    let outcomes = compared_selections(&scenario, &assessment, q, args.seed, true)?;
    let weighted = &outcomes[0];
    let fitted = FittedWeights {
        options,
        assessment,
    };
    let names: Vec<String> = FEATURES.iter().map(|f| f.to_string()).collect();
    let section = ShiftSection {
        settings: fitted.options.clone(),
        features: names,
        labeled_rows: scenario.labeled.len(),
        fit_rows_note: fit_rows_statement(
            fitted.options.fit_rows(),
            scenario.labeled.len(),
            fitted.assessment.summary.calibration_rows,
        ),
        summary: fitted.assessment.summary.clone(),
    };
    let a = &fitted.assessment;
    let rho = spearman_correlation(
        &[&a.labeled.weight[..], &a.pool.weight[..]].concat(),
        &[
            &scenario.labeled.true_weight[..],
            &scenario.pool.true_weight[..],
        ]
        .concat(),
    );

    let actives_in_pool = scenario
        .pool
        .outcome
        .iter()
        .filter(|&&y| y > THRESHOLD)
        .count();
    let mut files = OutputSet::new();
    files.add("labeled.csv", scenario.labeled.to_csv(true));
    files.add("pool.csv", scenario.pool.to_csv(false));
    let mut truth = String::from("id,y\n");
    for (id, y) in scenario.pool.ids.iter().zip(&scenario.pool.outcome) {
        let _ = writeln!(truth, "{id},{y:.4}");
    }
    files.add("pool_truth.csv", truth.into_bytes());
    let no_kept = crate::io::KeptColumns::default();
    let pool_columns = PoolColumns {
        ids: &scenario.pool.ids,
        prediction: &scenario.pool.prediction,
        kept: &no_kept,
        direction: Direction::Above,
    };
    files.add(
        "candidates.csv",
        candidates_csv(&pool_columns, weighted, false),
    );
    files.add("shortlist.csv", shortlist_csv(&pool_columns, weighted));
    files.add(
        "weights.csv",
        crate::report::weights_csv(&scenario.labeled.ids, &scenario.pool.ids, &fitted),
    );
    let mut summary = select_summary(
        weighted,
        RunInputs {
            labeled_file: "labeled.csv (invented demo data)".to_string(),
            pool_file: "pool.csv (invented demo data)".to_string(),
            threshold: format!("value {THRESHOLD}"),
            weights: format!(
                "fitted by a domain classifier on {} (fit on all rows); column w holds the \
                 exact density ratio of the simulation, not used by this selection",
                FEATURES.join(", ")
            ),
        },
    );
    summary.command_line = command_line();
    summary.threshold_rule = Some(ThresholdRule::new(Some(THRESHOLD), None, Direction::Above));
    summary.columns = Some(Columns {
        id: "id".to_string(),
        outcome: Some("y".to_string()),
        prediction: Some("pred".to_string()),
        threshold_column: None,
        weight_column: None,
        features: FEATURES.iter().map(|f| f.to_string()).collect(),
        keep_columns: Vec::new(),
    });
    add_shift(&mut summary, section.clone());
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    files.add("summary.json", json);

    let mut out = String::new();
    let _ = writeln!(
        out,
        "weighbridge demo: an invented compound library (simulated, seed {})\n",
        args.seed
    );
    let _ = writeln!(
        out,
        "The team assayed {} compounds, mostly from an older series; {} untested compounds \
         remain, many from newer chemistry.\nA compound is active when its measured activity \
         exceeds {THRESHOLD}. The model's predictions are good for the older series and \
         optimistic for the newer chemistry.\n\
         Goal: a shortlist in which at most {:.0}% are inactive on average (FDR {q}).\n",
        scenario.labeled.len(),
        scenario.pool.len(),
        100.0 * q
    );
    shift_lines(&mut out, &section, rho);
    let _ = writeln!(
        out,
        "{:<48} {:>9} {:>10} {:>8}",
        "procedure", "selected", "inactive", "FDP"
    );
    let mut this_screen = Table {
        header: ["procedure", "selected", "truly inactive", "FDP"]
            .map(String::from)
            .to_vec(),
        rows: Vec::new(),
        note: Some(format!(
            "The pool holds {actives_in_pool} truly active compounds; the first row is the \
             shortlist above."
        )),
        scroll: false,
        rows_in: None,
    };
    for ((name, _, _), o) in COMPARED.iter().zip(&outcomes) {
        let (false_hits, chosen) = false_discovery_proportion(&scenario.pool, &o.selected);
        let fdp = if chosen == 0 {
            0.0
        } else {
            false_hits as f64 / chosen as f64
        };
        this_screen.rows.push(vec![
            name.to_string(),
            chosen.to_string(),
            false_hits.to_string(),
            format!("{:.1}%", 100.0 * fdp),
        ]);
        let _ = writeln!(
            out,
            "{name:<48} {chosen:>9} {false_hits:>10} {:>7.1}%",
            100.0 * fdp
        );
    }
    let _ = writeln!(
        out,
        "\n(The pool holds {actives_in_pool} truly active compounds. The false discovery \
         proportion (FDP) of one screen scatters around its average; the guarantee is about \
         the average over repeated screens:)"
    );
    let mut repeated_table = None;
    if args.screens > 0 {
        status.step(&format!("{} further screens", args.screens));
        let repeated = repeated_screens(
            args.labeled,
            args.pool,
            q,
            args.seed,
            args.screens,
            batch_size,
        )?;
        let _ = writeln!(
            out,
            "\nAveraged over {} further invented screens (fresh data and freshly fitted \
             weights each time):",
            args.screens
        );
        let _ = writeln!(
            out,
            "{:<48} {:>9} {:>16} {:>7}",
            "procedure", "selected", "FDR +- 2 SE", "power"
        );
        repeated_table = Some(Table {
            header: ["procedure", "mean selected", "FDR", "2 SE", "power"]
                .map(String::from)
                .to_vec(),
            rows: repeated
                .iter()
                .map(|r| {
                    vec![
                        r.label.to_string(),
                        format!("{:.0}", r.mean_selected),
                        format!("{:.1}%", 100.0 * r.fdr),
                        format!("{:.1}%", 200.0 * r.fdr_se),
                        format!("{:.1}%", 100.0 * r.power),
                    ]
                })
                .collect(),
            note: Some(format!(
                "Averaged over {} further invented screens, each with fresh data and freshly \
                 fitted weights; FDR is the mean false discovery proportion, power the mean \
                 share of truly active compounds selected.",
                args.screens
            )),
            scroll: false,
            rows_in: None,
        });
        for r in &repeated {
            let _ = writeln!(
                out,
                "{:<48} {:>9.0} {:>8.1}% +- {:>4.1} {:>6.1}%",
                r.label,
                r.mean_selected,
                100.0 * r.fdr,
                200.0 * r.fdr_se,
                100.0 * r.power
            );
        }
    }
    let batch_section = match batch_size {
        Some(size) => {
            status.step("drawing and selecting with a calibration batch");
            let batch = batch_step(&scenario, size, q, args.seed)?;
            let figures = batch_comparison(&scenario, weighted, &batch);
            batch_lines(&mut out, &batch, &figures);
            add_batch_files(&mut files, &scenario, &batch, &figures, q)?;
            Some(batch_part(&batch, &figures, q, args.screens))
        }
        None => None,
    };
    if !weighted.warnings.is_empty() {
        let _ = writeln!(out, "\nWarnings on the selection with fitted weights:");
        for w in &weighted.warnings {
            let _ = writeln!(out, "  - {w}");
        }
    }
    let _ = writeln!(out, "\nCautions:");
    for c in CAUTIONS {
        let _ = writeln!(out, "  - {c}");
    }

    let part = shift_part(&section, &a.labeled.weight, &a.pool.weight)
        .map_err(|e| Failure::Internal(e.to_string()))?;
    let mut report = selection_report(
        &summary,
        &PoolView {
            ids: &scenario.pool.ids,
            predictions: &scenario.pool.prediction,
            threshold: Some(THRESHOLD),
            direction: Direction::Above,
        },
        weighted,
        Some(part),
        WeightsMethod::Fitted,
    );
    report.title = "weighbridge demo: an invented compound library".to_string();
    let mut tables = vec![this_screen];
    tables.extend(repeated_table);
    report.extra.push(Part {
        figures: Vec::new(),
        id: "comparison".to_string(),
        heading: "Compared with the truth (demo only)".to_string(),
        paragraphs: vec![
            format!(
                "The data are simulated (seed {}), so every compound's true activity is known \
                 (pool_truth.csv). The table compares the shortlist with fitted weights against \
                 BH on the same weights, conditional calibration with the exact density ratio, \
                 and BH ignoring the shift, by their false discovery proportion (FDP): the share \
                 of the shortlist that is truly inactive (activity at or below {THRESHOLD}).",
                args.seed
            ),
            format!(
                "One screen's FDP scatters around its average; the guarantee (FDR at most {q}) \
                 is about the average over repeated screens."
            ),
        ],
        tables,
    });
    report.extra.extend(batch_section);
    files.add("report.html", report.render().into_bytes());
    status.step("writing the outputs and report.html");
    commit_outputs(folder, files, "demo")?;
    drop(status);
    let report_path = std::path::absolute(args.out.join("report.html"))
        .unwrap_or_else(|_| args.out.join("report.html"));
    let _ = writeln!(
        out,
        "\nWrote labeled.csv, pool.csv, pool_truth.csv, shortlist.csv (the shortlist with \
         fitted weights, best predicted first), candidates.csv, summary.json, weights.csv{} \
         and report.html to {}",
        if batch_size.is_some() {
            ", batch_assayed.csv, batch_pool.csv, batch_candidates.csv, batch_shortlist.csv, batch_summary.json"
        } else {
            ""
        },
        args.out.display()
    );
    let _ = writeln!(out, "Open the report: file://{}", report_path.display());
    print_stdout(&out);
    Ok(())
}
