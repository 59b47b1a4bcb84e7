//! `weighbridge audit`: was an earlier shortlist distorted by covariate shift?
//!
//! Reads the shortlist's ids, the labeled file and the pool file (with the same options as
//! `select`), and writes `audit.csv` (one row per listed unit) and `audit.json` (the list
//! as a whole), plus a short summary on stdout.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::path::PathBuf;

use clap::Args;
use serde::Serialize;

use crate::io::errors::shown_text;
use crate::io::{check_one_stdin, read_id_list, OutputSet};
use crate::report::html::{shift_part, Finding, Part, Report, Table};
use crate::report::shift_section;
use crate::report::{tool_info, Columns, ThresholdRule, ToolInfo, CAUTIONS, SCHEMA_VERSION};
use crate::shift::weighting::{Calibration, FittedWeights, Weighting};
use crate::warning::{Level, Warning};
use crate::workflows::audit::{audit_shortlist, AuditOutcome, POOL_PROBABILITY_LIMIT};

use super::common::{
    obtain_run_weights, read_inputs, report_pointer, selection_inputs, shared_ids_warning,
    weighting_is_fitted, weights_method, SelectArgs, SelectConfig,
};
use super::{command_line, commit_outputs, open_output, print_stdout, Failure, StepStatus};

const AUDIT_HELP: &str = "\
Takes a list of pool ids chosen earlier (by ranking, by an unweighted selection, by hand)
and asks whether it was distorted by covariate shift. Every option of `select` applies: the
weighted selection, p-values and weights are computed exactly as `select` would.

Per listed unit (audit.csv): p_value_unweighted, p_value_weighted (over the whole pool),
survives (selected by the weighted selection at --fdr), poorly_covered (unreachable at --fdr,
a weight above every labeled weight, or e(x) > 0.9 with fitted weights), weight, and why.
For the list (audit.json): listed_count, survivors_count, fdr_level_unweighted and
fdr_level_weighted (the smallest BH level at which every listed unit would be selected:
the largest BH-adjusted p-value over the list), poorly_covered_count, warnings.

Example:
  weighbridge audit --shortlist earlier.csv --labeled fixtures/labeled.csv \\
      --pool fixtures/pool.csv --threshold 6.5 --weight-column w --fdr 0.1 --out audit";

/// Arguments of `audit`.
#[derive(Debug, Args)]
#[command(after_long_help = AUDIT_HELP)]
pub struct AuditArgs {
    /// CSV/TSV file listing the pool ids of the earlier shortlist.
    #[arg(long, value_name = "FILE")]
    pub shortlist: PathBuf,
    /// Id column of the shortlist file [default: the value of --id].
    #[arg(long, value_name = "NAME")]
    pub shortlist_id: Option<String>,
    /// Listed ids that are not in the pool (e.g. compounds assayed since): `skip` audits
    /// the others and names the skipped ids in audit.json and the printed summary; `error`
    /// stops with exit code 2.
    #[arg(long, value_enum, default_value_t = UnknownIds::Skip)]
    pub unknown_ids: UnknownIds,
    #[command(flatten)]
    pub selection: SelectArgs,
}

/// What `audit` does with listed ids that are not in the pool.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum UnknownIds {
    Skip,
    Error,
}

/// A listed id and its line in the shortlist file.
type ListedId = (String, u64);

/// At most this many skipped ids are named in audit.json and the printed summary.
const UNKNOWN_IDS_LISTED: usize = 50;

/// `audit.json`.
#[derive(Debug, Serialize)]
struct AuditSummary<'a> {
    schema_version: u32,
    tool: ToolInfo,
    command_line: Vec<String>,
    threshold_rule: ThresholdRule,
    columns: Columns,
    /// Why `select` would refuse the fitted weights (empty when it would not, or without
    /// fitted weights). An audit does not refuse: this is its first finding.
    unreliable_weights: Vec<crate::shift::Unreliable>,
    shortlist_file: String,
    labeled_file: String,
    pool_file: String,
    fdr: f64,
    procedure: &'static str,
    pvalues: &'static str,
    score: &'static str,
    seed: u64,
    weights: String,
    listed_count: usize,
    survivors_count: usize,
    fdr_level_unweighted: f64,
    fdr_level_weighted: f64,
    poorly_covered_count: usize,
    poorly_covered_share: f64,
    weighted_selected_count: usize,
    largest_labeled_weight: f64,
    pool_probability_limit: f64,
    warnings: Vec<String>,
    /// The same findings as objects, in the same order.
    warning_details: &'a [Warning],
    cautions: Vec<&'static str>,
    /// Listed ids not in the pool and skipped (`--unknown-ids skip`), the first
    /// [`UNKNOWN_IDS_LISTED`] in list order; `unknown_ids_count` counts them all.
    unknown_ids: Vec<String>,
    unknown_ids_count: usize,
}

fn audit_csv(ids: &[(String, u64)], outcome: &AuditOutcome) -> Vec<u8> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    writer
        .write_record([
            "id",
            "p_value_unweighted",
            "p_value_weighted",
            "bh_level_unweighted",
            "bh_level_weighted",
            "survives",
            "poorly_covered",
            "weight",
            "pool_probability",
            "unreachable",
            "why_poorly_covered",
        ])
        .expect("write to memory");
    for ((id, _), unit) in ids.iter().zip(&outcome.units) {
        let mut reasons = Vec::new();
        if unit.unreachable {
            reasons.push("its p-value floor w/(W+w) exceeds the FDR level");
        }
        if unit.beyond_labeled_weights {
            reasons.push("its weight exceeds every labeled weight");
        }
        if unit.high_pool_probability {
            reasons.push("the domain classifier puts it in the pool with e(x) > 0.9");
        }
        writer
            .write_record([
                id.clone(),
                unit.p_value_unweighted.to_string(),
                unit.p_value_weighted.to_string(),
                unit.adjusted_unweighted.to_string(),
                unit.adjusted_weighted.to_string(),
                unit.survives.to_string(),
                unit.poorly_covered.to_string(),
                unit.weight.to_string(),
                unit.pool_probability
                    .map_or(String::new(), |e| e.to_string()),
                unit.unreachable.to_string(),
                reasons.join("; "),
            ])
            .expect("write to memory");
    }
    writer.into_inner().expect("flush to memory")
}

/// report.html of an audit: the findings first, the settings, the audited list (every
/// listed unit), the shift diagnostics when weights were fitted, the cautions and method.
fn audit_report(
    summary: &AuditSummary<'_>,
    listed_ids: &[(String, u64)],
    outcome: &AuditOutcome,
    weighting: &Weighting<'_>,
    calibration: &Calibration<'_>,
    config: &SelectConfig,
) -> Result<Report, Failure> {
    let mut warnings: Vec<Finding> = weighting
        .fitted()
        .map(|f| {
            f.assessment
                .summary
                .warnings
                .iter()
                .map(Finding::from_shift)
                .collect()
        })
        .unwrap_or_default();
    warnings.extend(
        outcome
            .warnings
            .iter()
            .map(|w| Finding::from_line(&w.line())),
    );
    let shift = match weighting.fitted() {
        Some(fitted) => Some(
            shift_part(
                &shift_section(fitted, &fitted_feature_names(fitted)),
                calibration.weights.as_deref().unwrap_or(&[]),
                &fitted.assessment.pool.weight,
            )
            .map_err(|e| Failure::Internal(e.to_string()))?,
        ),
        None => None,
    };
    let rows = listed_ids
        .iter()
        .zip(&outcome.units)
        .map(|((id, _), u)| {
            vec![
                id.clone(),
                format!("{:.4}", u.p_value_unweighted),
                format!("{:.4}", u.p_value_weighted),
                format!("{:.4}", u.adjusted_weighted),
                if u.survives { "yes" } else { "no" }.to_string(),
                if u.poorly_covered { "yes" } else { "no" }.to_string(),
                format!("{:.4}", u.weight),
            ]
        })
        .collect();
    let settings = [
        ("earlier shortlist", summary.shortlist_file.clone()),
        ("labeled file", summary.labeled_file.clone()),
        ("pool file", summary.pool_file.clone()),
        ("target FDR q", summary.fdr.to_string()),
        ("procedure", summary.procedure.to_string()),
        ("p-values", summary.pvalues.to_string()),
        ("score", summary.score.to_string()),
        ("seed", summary.seed.to_string()),
        ("weights", summary.weights.clone()),
        (
            "tool",
            format!("{} {}", summary.tool.name, summary.tool.version),
        ),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_string(), v))
    .collect();
    Ok(Report {
        title: "weighbridge audit of an earlier shortlist".to_string(),
        verdict: format!(
            "{} listed units: the smallest BH level selecting the whole list is {:.4} without \
             weights and {:.4} with weights; {} survive the weighted selection at FDR {}; {} \
             ({:.0}%) sit in poorly covered regions",
            outcome.listed_count,
            outcome.fdr_level_unweighted,
            outcome.fdr_level_weighted,
            outcome.survivors_count,
            summary.fdr,
            outcome.poorly_covered_count,
            100.0 * summary.poorly_covered_share
        ),
        warnings,
        settings,
        main: Some(Part {
            figures: Vec::new(),
            id: "shortlist".to_string(),
            heading: "Audited list".to_string(),
            paragraphs: vec![format!(
                "Every listed unit, in the order of the list (audit.csv has the same rows with \
                 more columns). \"BH level\" is the unit's BH-adjusted weighted p-value: the \
                 smallest level at which BH would select it. \"Poorly covered\": unreachable \
                 at FDR {}, a weight above every labeled weight ({:.4}), or, with fitted \
                 weights, a balanced pool probability above {}.",
                summary.fdr, summary.largest_labeled_weight, POOL_PROBABILITY_LIMIT
            )],
            tables: vec![Table {
                header: [
                    "id",
                    "p-value unweighted",
                    "p-value weighted",
                    "BH level weighted",
                    "survives",
                    "poorly covered",
                    "weight",
                ]
                .map(String::from)
                .to_vec(),
                rows,
                note: None,
                scroll: outcome.listed_count > 15,
                rows_in: Some("audit.csv".to_string()),
            }],
        }),
        shift,
        extra: Vec::new(),
        weights_method: weights_method(&config.weights),
        procedure: Some(summary.procedure.to_string()),
    })
}

/// The feature names a fit used (its settings' input features).
fn fitted_feature_names(fitted: &FittedWeights) -> Vec<String> {
    fitted
        .assessment
        .summary
        .balance
        .iter()
        .map(|b| b.feature.clone())
        .collect()
}

/// Run `audit`.
pub fn run(args: AuditArgs) -> Result<(), Failure> {
    let shortlist_column = args
        .shortlist_id
        .clone()
        .unwrap_or_else(|| args.selection.input.id.clone());
    let shortlist_path = args.shortlist.clone();
    let args_unknown = args.unknown_ids;
    let mut selection = args.selection;
    // Not select's folder: an audit there would remove select's summary.json as stale.
    selection
        .out
        .get_or_insert_with(|| PathBuf::from("weighbridge-audit"));
    let config = SelectConfig::try_from(selection)?;
    config.refuse_batch_design("audit")?;
    let folder = open_output(
        &config.out,
        config.force,
        &[&config.labeled_path, &config.pool_path, &shortlist_path],
    )?;
    let status = StepStatus::new(config.quiet);
    let mut inputs = vec![("--shortlist", shortlist_path.as_path())];
    inputs.extend(config.inputs.flags());
    check_one_stdin(&inputs)?;
    status.step("reading the labeled and pool files");
    let (labeled, pool) = read_inputs(&config)?;
    let listed_ids = read_id_list(
        &shortlist_path,
        &shortlist_column,
        config.pool_read.delimiter,
    )?;

    let position: HashMap<&str, usize> = pool
        .ids
        .iter()
        .enumerate()
        .map(|(j, id)| (id.as_str(), j))
        .collect();
    let (known, unknown): (Vec<ListedId>, Vec<ListedId>) = listed_ids
        .into_iter()
        .partition(|(id, _)| position.contains_key(id.as_str()));
    let listed_ids = known;
    let missing: Vec<String> = unknown
        .iter()
        .map(|(id, line)| format!("`{}` (line {line})", shown_text(id)))
        .collect();
    if !missing.is_empty() && (args_unknown == UnknownIds::Error || listed_ids.is_empty()) {
        return Err(Failure::Input(format!(
            "{}: {} listed id(s) are not in the pool file {}: {}{}. Hint: audit a list drawn from \
             this pool, with ids spelled as in its `{}` column{}.",
            shortlist_path.display(),
            missing.len(),
            config.pool_path.display(),
            missing
                .iter()
                .take(10)
                .cloned()
                .collect::<Vec<_>>()
                .join(", "),
            if missing.len() > 10 { ", ..." } else { "" },
            config.pool_read.id,
            if listed_ids.is_empty() {
                " (no listed id is in the pool, so there is nothing to audit)"
            } else {
                "; --unknown-ids skip audits the others"
            }
        )));
    }
    let listed: Vec<usize> = listed_ids
        .iter()
        .map(|(id, _)| position[id.as_str()])
        .collect();

    if weighting_is_fitted(&config) {
        status.step("fitting the domain classifier and its diagnostics");
    }
    let weighting = obtain_run_weights(&config, &labeled, &pool)?;
    status.step("p-values and selection with and without weights");
    // Held-out fitting: the rows that fit the classifier do not calibrate.
    let calibration = weighting.calibration(&labeled);
    // e(x) on the equal-size scale w / (1 + w), as the shift diagnostics use it: the raw
    // e(x) mostly reflects the pool/labeled size ratio.
    let pool_probability: Option<Vec<f64>> = weighting.fitted().map(|f| {
        f.assessment
            .pool
            .weight
            .iter()
            .map(|w| w / (1.0 + w))
            .collect()
    });
    let (labeled_input, pool_input) = selection_inputs(&config, &pool, &calibration, &weighting);
    let outcome = audit_shortlist(
        &config.options,
        labeled_input,
        pool_input,
        &listed,
        pool_probability.as_deref(),
    )?;

    let settings = config.options.check()?;
    let weights = weighting.describe();
    // With fitted weights, the shift diagnostics' own warnings come first (worst first).
    let mut warnings: Vec<Warning> = weighting
        .fitted()
        .map(|f| {
            f.assessment
                .summary
                .warnings
                .iter()
                .map(crate::shift::ShiftWarning::to_warning)
                .collect()
        })
        .unwrap_or_default();
    warnings.extend(outcome.warnings.iter().cloned());
    warnings.extend(shared_ids_warning(&labeled, &pool));
    // Unreliable fitted weights are the first finding: `select` would refuse them.
    let unreliable = weighting
        .fitted()
        .map(|f| f.assessment.summary.refusal_reasons.clone())
        .unwrap_or_default();
    if !unreliable.is_empty() {
        let detail: Vec<String> = unreliable
            .iter()
            .map(|u| format!("{}: {}", u.diagnostic, u.message))
            .collect();
        warnings.insert(
            0,
            Warning::new(
                "unreliable_weights",
                Level::High,
                "refusal_reasons",
                format!(
                    "`select` would refuse them (exit code 3), so every weighted figure of \
                     this audit rests on weights that extrapolate; {}",
                    detail.join("; ")
                ),
            )
            .titled("unreliable fitted weights"),
        );
    }
    // Worst first; among equals, unreliable weights, then the shift's, then the list's.
    crate::warning::worst_first(&mut warnings);
    let summary = AuditSummary {
        schema_version: SCHEMA_VERSION,
        tool: tool_info(),
        command_line: command_line(),
        threshold_rule: ThresholdRule::new(
            config.threshold,
            config.pool_read.threshold_column.as_deref(),
            config.direction,
        ),
        columns: Columns::of(
            &config.labeled_read,
            &labeled.feature_names,
            &pool.kept.names,
        ),
        unreliable_weights: unreliable,
        shortlist_file: shortlist_path.display().to_string(),
        labeled_file: config.labeled_path.display().to_string(),
        pool_file: config.pool_path.display().to_string(),
        fdr: settings.fdr,
        procedure: settings.procedure.name(),
        pvalues: settings.pvalues.name(),
        score: settings.score.name(),
        seed: settings.seed,
        weights,
        listed_count: outcome.listed_count,
        survivors_count: outcome.survivors_count,
        fdr_level_unweighted: outcome.fdr_level_unweighted,
        fdr_level_weighted: outcome.fdr_level_weighted,
        poorly_covered_count: outcome.poorly_covered_count,
        poorly_covered_share: outcome.poorly_covered_count as f64 / outcome.listed_count as f64,
        weighted_selected_count: outcome.weighted_selected_count,
        largest_labeled_weight: outcome.largest_labeled_weight,
        pool_probability_limit: POOL_PROBABILITY_LIMIT,
        warnings: warnings.iter().map(Warning::line).collect(),
        warning_details: &warnings,
        cautions: CAUTIONS.to_vec(),
        unknown_ids: unknown
            .iter()
            .take(UNKNOWN_IDS_LISTED)
            .map(|(id, _)| id.clone())
            .collect(),
        unknown_ids_count: unknown.len(),
    };
    let mut files = OutputSet::new();
    files.add("audit.csv", audit_csv(&listed_ids, &outcome));
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the audit: {e}")))?;
    files.add("audit.json", json);
    if config.report {
        let report = audit_report(
            &summary,
            &listed_ids,
            &outcome,
            &weighting,
            &calibration,
            &config,
        )?;
        files.add("report.html", report.render().into_bytes());
    }
    status.step("writing the outputs");
    commit_outputs(folder, files, "audit")?;
    drop(status);

    if !config.quiet {
        let mut text = String::new();
        let _ = writeln!(
            text,
            "weighbridge {} audit of {} ({} listed units) at FDR {}",
            summary.tool.version,
            summary.shortlist_file,
            outcome.listed_count,
            crate::selection::level_text(settings.fdr)
        );
        let _ = writeln!(
            text,
            "  smallest BH level selecting the whole list: {:.4} without weights, {:.4} with weights",
            outcome.fdr_level_unweighted, outcome.fdr_level_weighted
        );
        let _ = writeln!(
            text,
            "  survive the weighted selection ({}): {} of {}",
            settings.procedure.name(),
            outcome.survivors_count,
            outcome.listed_count
        );
        let _ = writeln!(
            text,
            "  in poorly covered regions: {} ({:.0}%)",
            outcome.poorly_covered_count,
            100.0 * summary.poorly_covered_share
        );
        if !unknown.is_empty() {
            let _ = writeln!(
                text,
                "  skipped, not in the pool: {} listed id(s): {}{}",
                unknown.len(),
                missing
                    .iter()
                    .take(UNKNOWN_IDS_LISTED)
                    .cloned()
                    .collect::<Vec<_>>()
                    .join(", "),
                if unknown.len() > UNKNOWN_IDS_LISTED {
                    format!(" and {} more", unknown.len() - UNKNOWN_IDS_LISTED)
                } else {
                    String::new()
                }
            );
        }
        if !summary.warnings.is_empty() {
            let _ = writeln!(text, "findings (most serious first):");
            for w in &summary.warnings {
                let _ = writeln!(text, "  - {w}");
            }
        }
        let _ = writeln!(
            text,
            "wrote {} and {}",
            config.out.join("audit.csv").display(),
            config.out.join("audit.json").display()
        );
        if config.report {
            text.push_str(&report_pointer(&config.out));
        }
        print_stdout(&text);
    }
    Ok(())
}
