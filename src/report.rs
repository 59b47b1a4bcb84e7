//! What a selection run hands back to people: the per-candidate table, the JSON summary
//! and the short text summary for the terminal.
//!
//! Everything here turns a [`SelectionOutcome`] into bytes or text; writing the bytes to
//! disk (atomically) is the caller's job (`crate::table::OutputSet`).

use std::fmt::Write as _;

use serde::Serialize;

use crate::select::SelectionOutcome;

/// The cautions every output carries (design.md section 1).
pub const CAUTIONS: [&str; 6] = [
    "The FDR guarantee is an average over repeated screens, not a promise about any one unit.",
    "It assumes the labeled units and the pool differ only through the features given \
     (covariate shift: the outcome's conditional distribution given the features is the same).",
    "It assumes labeled outcomes were not chosen by looking at the outcome, and that the \
     prediction model was fit on data separate from the labeled calibration rows.",
    "Estimated weights add error that the guarantee does not cover.",
    "The shortlist guides which experiments to run next; it is not a safety, clinical or \
     regulatory decision.",
    "Where units are people, decisions need a fairness review and must follow local law.",
];

/// Name and version of this tool, for summaries.
#[derive(Clone, Debug, Serialize)]
pub struct ToolInfo {
    pub name: &'static str,
    pub version: &'static str,
}

/// This build's name and version.
pub fn tool_info() -> ToolInfo {
    ToolInfo {
        name: env!("CARGO_PKG_NAME"),
        version: env!("CARGO_PKG_VERSION"),
    }
}

/// Where the inputs came from and how thresholds and weights were chosen; filled in by the
/// caller, copied into the summary as is.
#[derive(Clone, Debug, Default, Serialize)]
pub struct RunInputs {
    pub labeled_file: String,
    pub pool_file: String,
    /// e.g. "value 0.5" or "column c".
    pub threshold: String,
    /// e.g. "none (all weights 1)", "given in column w", "fitted".
    pub weights: String,
}

/// The JSON summary of one selection run (`summary.json`).
#[derive(Clone, Debug, Serialize)]
pub struct SelectSummary {
    pub tool: ToolInfo,
    pub inputs: RunInputs,
    pub n_labeled: usize,
    pub n_pool: usize,
    pub fdr: f64,
    pub procedure: &'static str,
    pub pruning: Option<&'static str>,
    pub pvalues: &'static str,
    pub score: &'static str,
    pub seed: u64,
    pub pruning_draw: Option<f64>,
    pub selected_count: usize,
    pub first_step_count: Option<usize>,
    /// How many BH at level `fdr` selects on the same weighted p-values.
    pub bh_selected_count: usize,
    pub bh_note: Option<String>,
    pub unreachable_count: usize,
    pub weights_vary: bool,
    pub total_labeled_weight: f64,
    pub labeled_ess: f64,
    pub labeled_ess_fraction: f64,
    /// Shift diagnostics when weights were fitted; otherwise null.
    pub shift: Option<serde_json::Value>,
    pub warnings: Vec<String>,
    pub cautions: Vec<&'static str>,
}

/// Build the summary of a run.
pub fn select_summary(outcome: &SelectionOutcome, inputs: RunInputs) -> SelectSummary {
    let s = &outcome.settings;
    let bh_note = outcome.weights_vary.then(|| {
        format!(
            "BH on the weighted {} p-values would select {}; with varying weights BH has no \
             finite-sample FDR guarantee.",
            s.pvalues.name(),
            outcome.bh_selected_count
        )
    });
    SelectSummary {
        tool: tool_info(),
        inputs,
        n_labeled: outcome.n_labeled,
        n_pool: outcome.scores.len(),
        fdr: s.fdr,
        procedure: s.procedure.name(),
        pruning: s.pruning.map(|p| p.name()),
        pvalues: s.pvalues.name(),
        score: s.score.name(),
        seed: s.seed,
        pruning_draw: outcome.pruning_draw,
        selected_count: outcome.selected_count,
        first_step_count: outcome.first_step_count,
        bh_selected_count: outcome.bh_selected_count,
        bh_note,
        unreachable_count: outcome.unreachable_count,
        weights_vary: outcome.weights_vary,
        total_labeled_weight: outcome.total_labeled_weight,
        labeled_ess: outcome.labeled_ess,
        labeled_ess_fraction: outcome.labeled_ess / outcome.n_labeled as f64,
        shift: None,
        warnings: outcome.warnings.clone(),
        cautions: CAUTIONS.to_vec(),
    }
}

/// Plain-words reason a unit can never be selected, or "" when none is known.
pub fn unselectable_reason(outcome: &SelectionOutcome, j: usize) -> String {
    if !outcome.unreachable[j] {
        return String::new();
    }
    let w = outcome.weights[j];
    format!(
        "its p-value can never go below {:.4} = w/(W+w) with weight {:.4e}, which is above \
         the FDR level {}: the labeled set has too little weight near this unit",
        w / (outcome.total_labeled_weight + w),
        w,
        outcome.settings.fdr
    )
}

/// `candidates.csv`: one row per pool unit, in input order.
///
/// Columns: `id, score, weight, p_value, selected`, then for conditional calibration
/// `first_step, conditional_count`, then `never_selectable_because`.
/// Floats are written in their shortest round-trip form (ryu), so the same run gives the
/// same bytes and reading them back gives the same numbers.
///
/// # Panics
/// If `ids` and the outcome differ in length.
pub fn candidates_csv(ids: &[String], outcome: &SelectionOutcome) -> Vec<u8> {
    assert_eq!(ids.len(), outcome.scores.len(), "ids / outcome length");
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(ids.len() * 64));
    let conditional = outcome.conditional_count.is_some();
    let mut header = vec!["id", "score", "weight", "p_value", "selected"];
    if conditional {
        header.extend(["first_step", "conditional_count"]);
    }
    header.push("never_selectable_because");
    writer.write_record(&header).expect("write to memory");
    let mut floats = ryu::Buffer::new();
    let mut integers = itoa_buffer();
    let mut record = csv::ByteRecord::with_capacity(128, header.len());
    for (j, id) in ids.iter().enumerate() {
        record.clear();
        record.push_field(id.as_bytes());
        for value in [outcome.scores[j], outcome.weights[j], outcome.p_values[j]] {
            record.push_field(floats.format(value).as_bytes());
        }
        record.push_field(bool_text(outcome.selected[j]));
        if let (Some(first), Some(count)) = (&outcome.first_step, &outcome.conditional_count) {
            record.push_field(bool_text(first[j]));
            integers.clear();
            let _ = write!(integers, "{}", count[j]);
            record.push_field(integers.as_bytes());
        }
        if outcome.unreachable[j] {
            record.push_field(unselectable_reason(outcome, j).as_bytes());
        } else {
            record.push_field(b"");
        }
        writer.write_byte_record(&record).expect("write to memory");
    }
    writer.into_inner().expect("flush to memory")
}

fn itoa_buffer() -> String {
    String::with_capacity(20)
}

fn bool_text(value: bool) -> &'static [u8] {
    if value {
        b"true"
    } else {
        b"false"
    }
}

/// The short summary printed on stdout.
pub fn text_summary(summary: &SelectSummary, ids: &[String], outcome: &SelectionOutcome) -> String {
    let mut out = String::new();
    let s = summary;
    let _ = writeln!(
        out,
        "weighbridge {}: {} of {} pool units selected at FDR {} ({}{}; {} p-values, {} score)",
        s.tool.version,
        s.selected_count,
        s.n_pool,
        s.fdr,
        procedure_words(s.procedure),
        s.pruning
            .map(|p| format!(", {p} pruning"))
            .unwrap_or_default(),
        s.pvalues,
        s.score
    );
    let _ = writeln!(
        out,
        "  labeled units: {}  weights: {}  effective sample size: {:.1} ({:.1}% of labeled)",
        s.n_labeled,
        s.inputs.weights,
        s.labeled_ess,
        100.0 * s.labeled_ess_fraction
    );
    if let Some(first) = s.first_step_count {
        let _ = writeln!(out, "  passed the first step: {first}");
    }
    let _ = writeln!(
        out,
        "  BH on the same {} p-values would select: {}{}",
        s.pvalues,
        s.bh_selected_count,
        if s.weights_vary {
            " (BH has no finite-sample guarantee when weights vary; conditional calibration \
             recomputes the p-values per unit and can select more or fewer)"
        } else {
            ""
        }
    );
    let _ = writeln!(
        out,
        "  never selectable at this level (weight too large for the labeled set): {}",
        s.unreachable_count
    );
    let _ = writeln!(out, "  seed: {}", s.seed);
    if s.selected_count > 0 {
        let mut chosen: Vec<usize> = (0..ids.len()).filter(|&j| outcome.selected[j]).collect();
        chosen.sort_by(|&a, &b| outcome.p_values[a].total_cmp(&outcome.p_values[b]));
        let shown: Vec<&str> = chosen.iter().take(10).map(|&j| ids[j].as_str()).collect();
        let _ = writeln!(
            out,
            "  first selected (smallest p-values): {}{}",
            shown.join(", "),
            if chosen.len() > shown.len() {
                ", ..."
            } else {
                ""
            }
        );
    }
    if !s.warnings.is_empty() {
        let _ = writeln!(out, "warnings (most serious first):");
        for w in &s.warnings {
            let _ = writeln!(out, "  - {w}");
        }
    }
    out
}

fn procedure_words(procedure: &str) -> &'static str {
    match procedure {
        "conditional" => "conditional calibration",
        "bh" => "Benjamini-Hochberg",
        "by" => "Benjamini-Yekutieli",
        _ => "unknown procedure",
    }
}
