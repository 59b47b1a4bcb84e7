//! `weighbridge rescreen`: run the selection on an expanded pool and report what changed
//! against a previous run's output folder (see `crate::workflows::rescreen`).

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use clap::Args;
use serde::Serialize;
use serde_json::Value;

use crate::io::OutputSet;
use crate::report::html::changes_part;
use crate::report::{
    add_shift, candidates_csv, select_summary, shift_section, shortlist_csv, PoolColumns, RunInputs,
};
use crate::selection::pipeline::run_selection;
use crate::warning::{prose_number, Level, Warning};
use crate::workflows::rescreen::{compare, Change, ChangeCounts, CurrentUnit, PreviousUnit};

use super::common::{
    describe_run, obtain_run_weights, read_inputs, reliability_gate, report_pointer,
    selection_inputs, selection_report_page, shared_ids_warning, SelectArgs, SelectConfig,
};
use super::{commit_outputs, open_output, print_stdout, Failure};

const RESCREEN_HELP: &str = "\
Runs the same selection as `select` (every option applies) on the current files, then
compares it unit by unit (matched by id) with the candidates.csv and summary.json of a
previous run in --previous. Writes into --out: shortlist.csv, candidates.csv and
summary.json of the new run, changes.csv (id, change, why, previous_p_value, p_value,
new_poorly_covered, change_code) and changes.json (counts, how the diagnostics moved,
warnings); every field in docs/outputs.md. Folders written by earlier versions are read.

Changes: new to the pool (selected or not), newly selected, dropped (with the reasons that
apply: its weight moved, its score moved, its p-value moved, or the pool grew so the BH line
q k / m got stricter), kept, no longer in the pool. New units the labeled set cannot vouch
for (unreachable at --fdr, or a weight above every labeled weight) are flagged.

Example:
  weighbridge rescreen --previous round1 --labeled labeled.csv --pool pool_grown.csv \\
      --threshold 6.5 --fit-weights --features f1..f5 --fdr 0.1 --out round2";

/// Arguments of `rescreen`.
#[derive(Debug, Args)]
#[command(after_long_help = RESCREEN_HELP)]
pub struct RescreenArgs {
    /// Output folder of the previous run (`select`, `rescreen` or `demo`): its
    /// candidates.csv and summary.json are read.
    #[arg(long, value_name = "DIR")]
    pub previous: PathBuf,
    #[command(flatten)]
    pub selection: SelectArgs,
}

/// One diagnostic before and after.
#[derive(Debug, Serialize)]
struct Moved {
    diagnostic: &'static str,
    previous: Option<f64>,
    current: Option<f64>,
}

#[derive(Debug, Serialize)]
struct ChangesReport<'a> {
    schema_version: u32,
    tool: crate::report::ToolInfo,
    command_line: Vec<String>,
    previous_folder: String,
    #[serde(flatten)]
    counts: &'a ChangeCounts,
    diagnostics: Vec<Moved>,
    /// Settings that differ from the previous run's summary.json (empty when none do).
    setting_changes: Vec<SettingChange>,
    /// Every warning as one line (the earlier form), worst first.
    warnings: Vec<String>,
    /// The same warnings as objects, in the same order.
    warning_details: Vec<Warning>,
}

/// One setting that differs between the previous run and this one.
#[derive(Debug, Serialize, PartialEq)]
struct SettingChange {
    setting: &'static str,
    previous: String,
    current: String,
}

/// The settings compared with the previous run, and where summary.json keeps them.
const SETTINGS: &[(&str, &str)] = &[
    ("threshold", "/inputs/threshold"),
    ("direction", "/threshold_rule/direction"),
    ("fdr", "/fdr"),
    ("procedure", "/procedure"),
    ("pruning", "/pruning"),
    ("score", "/score"),
    ("pvalues", "/pvalues"),
    ("weights", "/inputs/weights"),
    ("features", "/shift/features"),
    ("labeled_file", "/inputs/labeled_file"),
];

/// A setting as text for comparing and printing. Thresholds are normalized to `value C`
/// (this version's form), since earlier versions may have stored the bare number or its
/// string; a file is compared by canonical path when it exists.
fn setting_text(setting: &str, value: &Value) -> String {
    match (setting, value) {
        ("threshold", Value::Number(n)) => format!("value {n}"),
        ("threshold", Value::String(s)) if s.trim().parse::<f64>().is_ok() => {
            format!("value {}", s.trim())
        }
        ("labeled_file", Value::String(s)) => std::fs::canonicalize(s)
            .map(|p| p.display().to_string())
            .unwrap_or_else(|_| s.clone()),
        (_, Value::String(s)) => s.clone(),
        (_, Value::Array(items)) => items
            .iter()
            .map(|v| v.as_str().map_or_else(|| v.to_string(), str::to_string))
            .collect::<Vec<_>>()
            .join(","),
        (_, other) => other.to_string(),
    }
}

/// The settings that differ. A setting the previous summary does not record (earlier
/// versions, or no fitted weights so no features) is not compared; one recorded before but
/// absent now (e.g. features when weights are no longer fitted) is "none".
fn setting_changes(previous: &Value, current: &Value) -> Vec<SettingChange> {
    SETTINGS
        .iter()
        .filter_map(|&(setting, pointer)| {
            let before = previous.pointer(pointer).filter(|v| !v.is_null())?;
            let before = setting_text(setting, before);
            let now = current
                .pointer(pointer)
                .filter(|v| !v.is_null())
                .map_or_else(|| "none".to_string(), |v| setting_text(setting, v));
            let same = match (before.parse::<f64>(), now.parse::<f64>()) {
                (Ok(a), Ok(b)) => a == b,
                _ => before == now,
            };
            (!same).then_some(SettingChange {
                setting,
                previous: before,
                current: now,
            })
        })
        .collect()
}

fn previous_file(dir: &Path, name: &str) -> PathBuf {
    dir.join(name)
}

fn read_previous(dir: &Path) -> Result<(Vec<PreviousUnit>, Value), Failure> {
    let candidates = previous_file(dir, "candidates.csv");
    let bad = |what: String| {
        Failure::Input(format!(
            "{}: {what}. Hint: --previous must be the output folder of an earlier `select`, \
             `rescreen` or `demo` run.",
            candidates.display()
        ))
    };
    let mut reader = csv::Reader::from_path(&candidates).map_err(|e| bad(e.to_string()))?;
    let header = reader.headers().map_err(|e| bad(e.to_string()))?.clone();
    let column = |name: &str| {
        header.iter().position(|h| h == name).ok_or_else(|| {
            let names: Vec<String> = header.iter().map(String::from).collect();
            bad(format!(
                "no column `{name}`{}",
                crate::io::errors::did_you_mean(name, &names)
            ))
        })
    };
    let (id, score, weight, p, selected) = (
        column("id")?,
        column("score")?,
        column("weight")?,
        column("p_value")?,
        column("selected")?,
    );
    let mut units = Vec::new();
    // Line of each id seen, to name both lines of a duplicate.
    let mut seen: std::collections::HashMap<String, u64> = std::collections::HashMap::new();
    for record in reader.records() {
        let record = record.map_err(|e| bad(e.to_string()))?;
        let line = record.position().map_or(0, |p| p.line());
        let number = |index: usize| -> Result<f64, Failure> {
            record
                .get(index)
                .and_then(|v| v.trim().parse::<f64>().ok())
                .ok_or_else(|| bad(format!("line {line}: `{}` is not a number", &record[index])))
        };
        if let Some(first) = seen.insert(record[id].to_string(), line) {
            return Err(bad(format!(
                "line {line}: id `{}` is also on line {first}; a run's candidates.csv lists \
                 each pool unit once",
                &record[id]
            )));
        }
        let chosen = match &record[selected] {
            "true" => true,
            "false" => false,
            other => {
                return Err(bad(format!(
                    "line {line}: column `selected` is `{other}`, expected true or false"
                )))
            }
        };
        units.push(PreviousUnit {
            id: record[id].to_string(),
            score: number(score)?,
            weight: number(weight)?,
            p_value: number(p)?,
            selected: chosen,
        });
    }
    let summary_path = previous_file(dir, "summary.json");
    let summary: Value = std::fs::read(&summary_path)
        .ok()
        .and_then(|bytes| serde_json::from_slice(&bytes).ok())
        .ok_or_else(|| {
            Failure::Input(format!(
                "{}: missing or not valid JSON. Hint: --previous must be the output folder of \
                 an earlier `select`, `rescreen` or `demo` run.",
                summary_path.display()
            ))
        })?;
    // Every summary.json since the first version has these keys (folders of earlier
    // versions stay readable); `{"hello": 1}` is not a run's summary.
    for key in ["fdr", "selected_count"] {
        if summary.get(key).and_then(Value::as_f64).is_none() {
            return Err(Failure::Input(format!(
                "{}: no number `{key}`, so it is not the summary.json of a weighbridge run. \
                 Hint: --previous must be the output folder of an earlier `select`, \
                 `rescreen` or `demo` run.",
                summary_path.display()
            )));
        }
    }
    Ok((units, summary))
}

/// `--out` must not be `--previous`: the new run would replace the one it is compared
/// with, and the next rescreen would compare a run with itself. Compared after
/// canonicalizing (`./round1`, `round1/` and a symlink to it are the same folder); an
/// `--out` that does not exist yet cannot be `--previous`, which must exist.
fn refuse_out_is_previous(out: &Path, previous: &Path) -> Result<(), Failure> {
    let same = match (std::fs::canonicalize(out), std::fs::canonicalize(previous)) {
        (Ok(out), Ok(previous)) => out == previous,
        _ => false,
    };
    if same {
        return Err(Failure::Input(format!(
            "--out {} is the --previous folder: the new run would overwrite the run it is \
             compared with. Hint: give a new --out folder, e.g. --out {}-next.",
            out.display(),
            previous.display().to_string().trim_end_matches('/')
        )));
    }
    Ok(())
}

/// A number from a summary by JSON pointer (e.g. "/shift/auc").
fn number_at(summary: &Value, pointer: &str) -> Option<f64> {
    summary.pointer(pointer).and_then(Value::as_f64)
}

/// A diagnostic's value for the console: counts as integers (`83`), the others at three
/// significant digits (`0.541`).
fn diagnostic_text(diagnostic: &str, value: f64) -> String {
    if diagnostic.ends_with("_count") && value.fract() == 0.0 && value.abs() < 1e15 {
        format!("{}", value as i64)
    } else {
        prose_number(value)
    }
}

/// The rescreen's own warnings, worst first: changed settings (`medium`: the comparison
/// mixes two causes), new poorly covered units (`medium`), units dropped only because the
/// pool grew (`low`: expected, and explained).
fn rescreen_warnings(
    setting_changes: &[SettingChange],
    counts: &ChangeCounts,
    fdr: f64,
) -> Vec<Warning> {
    let mut warnings = Vec::new();
    if !setting_changes.is_empty() {
        warnings.push(
            Warning::new(
                "settings_changed",
                Level::Medium,
                "setting_changes",
                format!(
                    "settings differ from the previous run ({}): the units newly selected and \
                     dropped below changed partly or wholly because of these settings, not only \
                     because the pool grew; rerun with the previous settings to see what the \
                     new units alone changed.",
                    setting_changes
                        .iter()
                        .map(|c| format!("{} {} -> {}", c.setting, c.previous, c.current))
                        .collect::<Vec<_>>()
                        .join("; ")
                ),
            )
            .measured(setting_changes.len() as f64, 0.0)
            .titled("settings changed"),
        );
    }
    if counts.new_poorly_covered > 0 {
        warnings.push(
            Warning::new(
                "new_poorly_covered",
                Level::Medium,
                "new_poorly_covered",
                format!(
                    "{} of {} new pool units sit where the labeled set gives little support \
                     (unreachable at FDR {} or a weight above every labeled weight): assay \
                     some of them to extend coverage before trusting selections there.",
                    counts.new_poorly_covered,
                    counts.new_units,
                    crate::selection::level_text(fdr)
                ),
            )
            .measured(counts.new_poorly_covered as f64, 0.0)
            .titled("new units poorly covered"),
        );
    }
    if counts.dropped_pool_grew > 0 {
        warnings.push(
            Warning::new(
                "dropped_pool_grew",
                Level::Low,
                "dropped_pool_grew",
                format!(
                    "{} previously selected units dropped only because the pool grew ({} -> {} \
                     units): their p-values did not move, but the BH line q k / m is stricter \
                     at every rank{}.",
                    counts.dropped_pool_grew,
                    counts.previous_pool,
                    counts.current_pool,
                    if setting_changes.is_empty() {
                        ""
                    } else {
                        " (or the changed settings moved it)"
                    }
                ),
            )
            .measured(counts.dropped_pool_grew as f64, 0.0)
            .titled("dropped as the pool grew"),
        );
    }
    warnings
}

/// Run `rescreen`.
pub fn run(args: RescreenArgs) -> Result<(), Failure> {
    let previous_dir = args.previous.clone();
    let mut selection = args.selection;
    // Not select's default: `rescreen --previous weighbridge-out` must not overwrite the
    // run it compares with.
    selection
        .out
        .get_or_insert_with(|| PathBuf::from("weighbridge-rescreen"));
    let config = SelectConfig::try_from(selection)?;
    config.refuse_batch_design("rescreen")?;
    refuse_out_is_previous(&config.out, &previous_dir)?;
    let folder = open_output(
        &config.out,
        config.force,
        &[
            &config.labeled_path,
            &config.pool_path,
            &previous_file(&previous_dir, "candidates.csv"),
            &previous_file(&previous_dir, "summary.json"),
        ],
    )?;
    let (previous, previous_summary) = read_previous(&previous_dir)?;
    let (labeled, pool) = read_inputs(&config)?;
    let weighting = obtain_run_weights(&config, &labeled, &pool)?;
    let unreliable = reliability_gate(&config, &weighting)?;
    let calibration = weighting.calibration(&labeled);
    let (labeled_input, pool_input) = selection_inputs(&config, &pool, &calibration, &weighting);
    let outcome = run_selection(&config.options, labeled_input, pool_input)?;
    let mut summary = select_summary(
        &outcome,
        RunInputs {
            labeled_file: config.labeled_path.display().to_string(),
            pool_file: config.pool_path.display().to_string(),
            threshold: match (&config.pool_read.threshold_column, config.threshold) {
                (Some(name), _) => format!("column {name}"),
                (None, Some(c)) => format!("value {c}"),
                (None, None) => String::new(),
            },
            weights: weighting.describe(),
        },
    );
    describe_run(&mut summary, &config, &labeled, &pool);
    if let Some(fitted) = weighting.fitted() {
        add_shift(&mut summary, shift_section(fitted, &labeled.feature_names));
    }
    if let Some(w) = shared_ids_warning(&labeled, &pool) {
        summary.add_warning(w);
    }
    summary.unreliable_weights = unreliable;
    summary.dropped_missing_outcome_count = labeled.dropped_missing_outcome;
    summary.censored_outcome_count = labeled.censored_outcomes;

    let current: Vec<CurrentUnit<'_>> = (0..pool.len())
        .map(|j| CurrentUnit {
            id: &pool.ids[j],
            score: outcome.scores[j],
            weight: outcome.weights[j],
            p_value: outcome.p_values[j],
            selected: outcome.selected[j],
            unreachable: outcome.unreachable[j],
        })
        .collect();
    let largest_labeled_weight = calibration
        .weights
        .as_deref()
        .map_or(1.0, |w| w.iter().copied().fold(f64::NEG_INFINITY, f64::max));
    let (rows, counts) = compare(
        &previous,
        &current,
        largest_labeled_weight,
        outcome.settings.fdr,
    );

    let current_summary = serde_json::to_value(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    let diagnostics: Vec<Moved> = [
        ("selected_count", "/selected_count"),
        ("unreachable_count", "/unreachable_count"),
        ("labeled_ess", "/labeled_ess"),
        ("labeled_ess_fraction", "/labeled_ess_fraction"),
        ("auc", "/shift/auc"),
        ("ess_fraction", "/shift/ess_fraction"),
        ("khat", "/shift/khat"),
    ]
    .into_iter()
    .map(|(diagnostic, pointer)| Moved {
        diagnostic,
        previous: number_at(&previous_summary, pointer),
        current: number_at(&current_summary, pointer),
    })
    .filter(|m| m.previous.is_some() || m.current.is_some())
    .collect();

    let setting_changes = setting_changes(&previous_summary, &current_summary);
    // Each unit whose selection changed is attributed to the changed settings too.
    let mut rows = rows;
    if !setting_changes.is_empty() {
        let names: Vec<&str> = setting_changes.iter().map(|c| c.setting).collect();
        for row in rows.iter_mut().filter(|r| {
            matches!(
                r.change,
                Change::NewlySelected | Change::Dropped | Change::NewSelected
            )
        }) {
            row.why = if row.why.is_empty() {
                format!("settings changed ({})", names.join(", "))
            } else {
                format!("settings changed ({}); {}", names.join(", "), row.why)
            };
        }
    }
    let warnings = rescreen_warnings(&setting_changes, &counts, outcome.settings.fdr);
    // The comparison's own notes (the report lists the selection's warnings separately).
    let comparison_notes: Vec<String> = warnings.iter().map(Warning::line).collect();
    let mut details = warnings;
    details.extend(summary.warning_details.iter().cloned());
    crate::warning::worst_first(&mut details);

    let report = ChangesReport {
        schema_version: crate::report::SCHEMA_VERSION,
        tool: crate::report::tool_info(),
        command_line: summary.command_line.clone(),
        previous_folder: previous_dir.display().to_string(),
        counts: &counts,
        diagnostics,
        setting_changes,
        warnings: details.iter().map(Warning::line).collect(),
        warning_details: details,
    };
    let mut changes = csv::Writer::from_writer(Vec::new());
    changes
        .write_record([
            "id",
            "change",
            "why",
            "previous_p_value",
            "p_value",
            "new_poorly_covered",
            "change_code",
        ])
        .expect("write to memory");
    for row in &rows {
        changes
            .write_record([
                row.id.clone(),
                row.change.words().to_string(),
                row.why.clone(),
                row.previous_p_value
                    .map_or(String::new(), |p| p.to_string()),
                row.p_value.map_or(String::new(), |p| p.to_string()),
                row.new_poorly_covered.to_string(),
                row.change.code().to_string(),
            ])
            .expect("write to memory");
    }
    let columns = PoolColumns::of(&pool, config.direction);
    let mut files = OutputSet::new();
    files.add(
        "candidates.csv",
        candidates_csv(&columns, &outcome, summary.unreliable_weights.is_some()),
    );
    files.add("shortlist.csv", shortlist_csv(&columns, &outcome));
    files.add(
        "summary.json",
        serde_json::to_vec_pretty(&summary)
            .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?,
    );
    files.add(
        "changes.csv",
        changes.into_inner().expect("flush to memory"),
    );
    if config.report {
        files.add(
            "report.html",
            selection_report_page(
                &config,
                &summary,
                &pool,
                &outcome,
                &weighting,
                &calibration,
                vec![changes_part(&rows, &counts, &comparison_notes)],
            )?,
        );
    }
    files.add(
        "changes.json",
        serde_json::to_vec_pretty(&report)
            .map_err(|e| Failure::Internal(format!("cannot serialize the changes: {e}")))?,
    );
    commit_outputs(folder, files, "rescreen")?;

    if !config.quiet {
        let mut text = String::new();
        let _ = writeln!(
            text,
            "weighbridge {} rescreen: pool {} -> {} units ({} new, {} left); selected {} -> {} at FDR {}",
            report.tool.version,
            counts.previous_pool,
            counts.current_pool,
            counts.new_units,
            counts.left_pool,
            counts.previously_selected,
            counts.selected,
            crate::selection::level_text(outcome.settings.fdr)
        );
        let _ = writeln!(
            text,
            "  kept {}, newly selected {} (in the pool before), new units selected {}, dropped \
             {} (weight moved {}, score moved {}, p-value moved {}, only the pool grew {})",
            counts.kept,
            counts.newly_selected,
            counts.new_units_selected,
            counts.dropped,
            counts.dropped_weight_moved,
            counts.dropped_score_moved,
            counts.dropped_p_value_moved,
            counts.dropped_pool_grew
        );
        for m in &report.diagnostics {
            let show =
                |v: Option<f64>| v.map_or("-".to_string(), |x| diagnostic_text(m.diagnostic, x));
            let _ = writeln!(
                text,
                "  {:<22} {:>12} -> {:>12}",
                m.diagnostic,
                show(m.previous),
                show(m.current)
            );
        }
        if !report.warnings.is_empty() {
            let _ = writeln!(text, "warnings (most serious first):");
            for w in &report.warnings {
                let _ = writeln!(text, "  - {w}");
            }
        }
        let _ = writeln!(
            text,
            "wrote shortlist.csv (the {} selected units, best first), candidates.csv, \
             summary.json, changes.csv and changes.json to {}",
            counts.selected,
            config.out.display()
        );
        if config.report {
            text.push_str(&report_pointer(&config.out));
        }
        print_stdout(&text);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn setting_changes_name_each_difference_and_skip_unrecorded_ones() {
        let previous = json!({
            "fdr": 0.1, "procedure": "conditional", "pruning": "homogeneous",
            "score": "clipped", "pvalues": "conservative",
            "inputs": {"threshold": "6.5", "weights": "given in column w",
                       "labeled_file": "no/such/labeled.csv"},
        });
        let mut current = previous.clone();
        // An earlier version's bare threshold string equals this version's `value 6.5`.
        current["inputs"]["threshold"] = json!("value 6.5");
        current["fdr"] = json!(0.2);
        current["shift"] = json!({"features": ["f1", "f2"]});
        assert_eq!(
            setting_changes(&previous, &current),
            [SettingChange {
                setting: "fdr",
                previous: "0.1".to_string(),
                current: "0.2".to_string()
            }]
        );
        current["inputs"]["threshold"] = json!("value 7");
        current["procedure"] = json!("bh");
        let names: Vec<&str> = setting_changes(&previous, &current)
            .iter()
            .map(|c| c.setting)
            .collect();
        assert_eq!(names, ["threshold", "fdr", "procedure"]);
        // Features recorded before, none now.
        let fitted = json!({"shift": {"features": ["f1"]}});
        let changes = setting_changes(&fitted, &json!({}));
        assert_eq!(changes[0].previous, "f1");
        assert_eq!(changes[0].current, "none");
        assert!(setting_changes(&json!({}), &current).is_empty());
    }
}
