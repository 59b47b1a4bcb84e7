//! Summaries of a run: the per-candidate table, the JSON summaries and the short text
//! summaries for the terminal, for a selection (`select`) and for a shift assessment
//! (`shift`, and `select --fit-weights`), and the cautions every output carries.
//!
//! Everything here turns a [`SelectionOutcome`] or a [`FittedWeights`] into bytes or text;
//! writing the bytes to disk (atomically) is the caller's job (`crate::io::OutputSet`).

use std::fmt::Write as _;

use serde::Serialize;

use crate::selection::draw::DrawSummary;
use crate::selection::level_curve::LevelPoint;
use crate::selection::pipeline::{draw_sentence, draw_severity, SelectionOutcome};
use crate::selection::resolution::Resolution;
use crate::shift::weighting::{fit_rows_statement, FittedWeights};
use crate::shift::{FeatureBalance, Severity, ShiftOptions, ShiftSummary, ShiftWarning};

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

/// Stated beside every level curve.
pub const LEVEL_CURVE_NOTE: &str = "The FDR guarantee holds for a level chosen before looking \
     at the shortlist; choosing the level from this curve after seeing it voids the guarantee. \
     bh_count is BH on the randomized weighted p-values (what --procedure bh selects with this \
     seed); bh_selected_count is BH on this run's own p-values.";

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
    /// What the pruning draw does to the shortlist: `expected_selected_count`,
    /// `empty_probability`, `sizes` [{`size`, `probability`}], the method, and Monte Carlo
    /// errors where estimated.
    pub draw: DrawSummary,
    /// `severe` / `caution` / `note` when the shortlist depends on the draw (by its empty
    /// probability), null otherwise.
    pub draw_severity: Option<&'static str>,
    /// The draw's consequences in one sentence, null when the shortlist is fixed.
    pub draw_statement: Option<String>,
    /// Pool units at the p-value floor, which the labeled set cannot rank: `floor_count`,
    /// `first_step_floor_count`, `smallest_floor_pvalue`, `bh_needs_at_least`,
    /// `stable_levels`, `reading`.
    pub resolution: Resolution,
    /// Per FDR level: `fdr`, `conditional_expected_count`, `conditional_empty_probability`,
    /// `conditional_fixed`, `bh_count` (what `--procedure bh` selects with the same seed:
    /// BH on randomized weighted p-values). Null when not computed (pools above 10^5 units
    /// without `--level-curve`).
    pub level_curve: Option<Vec<LevelPoint>>,
    /// What the level curve means and does not mean.
    pub level_curve_note: Option<&'static str>,
    pub selected_count: usize,
    pub first_step_count: Option<usize>,
    /// How many BH at level `fdr` selects on the same weighted p-values.
    pub bh_selected_count: usize,
    /// The p-values behind `bh_selected_count` (the run's own weighted p-values).
    pub bh_pvalues: &'static str,
    pub bh_note: Option<String>,
    pub unreachable_count: usize,
    pub weights_vary: bool,
    pub total_labeled_weight: f64,
    pub labeled_ess: f64,
    pub labeled_ess_fraction: f64,
    /// Shift diagnostics when weights were fitted; otherwise null.
    pub shift: Option<ShiftSection>,
    /// Set when the fitted weights were unreliable and the run went ahead only because of
    /// `--allow-unreliable-weights`: which diagnostics, and what that means. Null otherwise.
    pub unreliable_weights: Option<UnreliableMark>,
    pub warnings: Vec<String>,
    pub cautions: Vec<&'static str>,
    /// Labeled rows left out because their outcome was a missing-value token
    /// (`--missing-outcome drop`; set by the command from the labeled table).
    pub dropped_missing_outcome_count: usize,
    /// Labeled outcomes given as censored values (`>x`, `<=x`, ...) and used by their bound.
    pub censored_outcome_count: usize,
}

/// The mark of a run allowed through on unreliable fitted weights.
#[derive(Clone, Debug, Serialize)]
pub struct UnreliableMark {
    /// The flag that allowed the run.
    pub allowed_by: &'static str,
    /// The diagnostics past their thresholds.
    pub reasons: Vec<crate::shift::Unreliable>,
    /// What this means for the shortlist, in plain words.
    pub statement: String,
}

impl UnreliableMark {
    /// The mark for these reasons (non-empty).
    pub fn new(reasons: Vec<crate::shift::Unreliable>) -> Self {
        let names: Vec<&str> = reasons.iter().map(|r| r.diagnostic.as_str()).collect();
        UnreliableMark {
            allowed_by: "--allow-unreliable-weights",
            statement: format!(
                "UNRELIABLE WEIGHTS: the fitted weights fail {} ({}); this run went ahead \
                 only because of --allow-unreliable-weights. In simulation such runs had \
                 realized FDR above q (docs/validation.md): do not read this shortlist as \
                 FDR-controlled.",
                if names.len() == 1 {
                    "one reliability check"
                } else {
                    "several reliability checks"
                },
                names.join(", ")
            ),
            reasons,
        }
    }
}

/// Build the summary of a run.
pub fn select_summary(outcome: &SelectionOutcome, inputs: RunInputs) -> SelectSummary {
    let s = &outcome.settings;
    let draw_statement = draw_sentence(&outcome.draw, outcome.selected_count, s.seed);
    let bh_note = outcome.weights_vary.then(|| {
        format!(
            "BH on the weighted {} p-values would select {}; with varying weights BH has no \
             finite-sample FDR guarantee.",
            outcome.bh_pvalues.name(),
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
        draw: outcome.draw.clone(),
        draw_severity: draw_statement
            .is_some()
            .then(|| draw_severity(&outcome.draw)),
        draw_statement,
        resolution: outcome.resolution.clone(),
        level_curve: outcome.level_curve.clone(),
        level_curve_note: outcome.level_curve.as_ref().map(|_| LEVEL_CURVE_NOTE),
        selected_count: outcome.selected_count,
        first_step_count: outcome.first_step_count,
        bh_selected_count: outcome.bh_selected_count,
        bh_pvalues: outcome.bh_pvalues.name(),
        bh_note,
        unreachable_count: outcome.unreachable_count,
        weights_vary: outcome.weights_vary,
        total_labeled_weight: outcome.total_labeled_weight,
        labeled_ess: outcome.labeled_ess,
        labeled_ess_fraction: outcome.labeled_ess / outcome.n_labeled as f64,
        shift: None,
        unreliable_weights: None,
        warnings: outcome.warnings.clone(),
        cautions: CAUTIONS.to_vec(),
        dropped_missing_outcome_count: 0,
        censored_outcome_count: 0,
    }
}

/// Start of the selection's warning about unreachable units (`crate::selection::pipeline`), repeated by
/// the shift diagnostic `unreachable_share`.
const SELECTION_UNREACHABLE_PREFIX: &str = "unreachable units:";
/// Start of the selection's warning about the effective sample size, repeated by the shift
/// diagnostic `ess_fraction`.
const SELECTION_ESS_PREFIX: &str = "effective sample size:";

/// Fold the shift diagnostics of fitted weights into a selection summary: the `shift`
/// object, and the shift warnings first (they are the worst: weights that cannot be trusted
/// make every count below them doubtful), in their documented worst-first order, followed
/// by the selection's own warnings. A selection warning that repeats a shift warning (the
/// effective sample size, unreachable units) is dropped.
pub fn add_shift(summary: &mut SelectSummary, section: ShiftSection) {
    let named = |d: &str| section.summary.warnings.iter().any(|w| w.diagnostic == d);
    let repeats = |w: &String| {
        (named("ess_fraction") && w.starts_with(SELECTION_ESS_PREFIX))
            || (named("unreachable_share") && w.starts_with(SELECTION_UNREACHABLE_PREFIX))
    };
    let mut warnings: Vec<String> = section.summary.warnings.iter().map(warning_line).collect();
    warnings.extend(summary.warnings.iter().filter(|w| !repeats(w)).cloned());
    summary.warnings = warnings;
    summary.shift = Some(section);
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
        crate::selection::level_text(outcome.settings.fdr)
    )
}

/// `candidates.csv`: one row per pool unit, in input order.
///
/// Columns: `id, score, weight, p_value, selected`, then for conditional calibration
/// `first_step, conditional_count`, then `never_selectable_because`, `selection_probability`
/// (over the pruning draw, the run's p-values held fixed; 0 or 1 without a draw), `q_value`
/// (BH-adjusted p-value of the run's own p-values) and `q_value_by` (BY-adjusted, filled for
/// `--procedure by` runs only).
/// Floats are written in their shortest round-trip form (ryu), so the same run gives the
/// same bytes and reading them back gives the same numbers.
///
/// # Panics
/// If `ids` and the outcome differ in length.
///
/// The last column, `unreliable_weights`, is `true` on every row of a run allowed through
/// on unreliable fitted weights (`--allow-unreliable-weights`), `false` otherwise.
pub fn candidates_csv(ids: &[String], outcome: &SelectionOutcome, unreliable: bool) -> Vec<u8> {
    assert_eq!(ids.len(), outcome.scores.len(), "ids / outcome length");
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(ids.len() * 64));
    let conditional = outcome.conditional_count.is_some();
    let mut header = vec!["id", "score", "weight", "p_value", "selected"];
    if conditional {
        header.extend(["first_step", "conditional_count"]);
    }
    header.extend([
        "never_selectable_because",
        "selection_probability",
        "q_value",
        "q_value_by",
        "unreliable_weights",
    ]);
    writer.write_record(&header).expect("write to memory");
    let mut floats = ryu::Buffer::new();
    let mut integers = itoa::Buffer::new();
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
            record.push_field(integers.format(count[j]).as_bytes());
        }
        if outcome.unreachable[j] {
            record.push_field(unselectable_reason(outcome, j).as_bytes());
        } else {
            record.push_field(b"");
        }
        record.push_field(
            floats
                .format(outcome.draw.selection_probability[j])
                .as_bytes(),
        );
        record.push_field(floats.format(outcome.q_values[j]).as_bytes());
        match &outcome.q_values_by {
            Some(by) => record.push_field(floats.format(by[j]).as_bytes()),
            None => record.push_field(b""),
        }
        record.push_field(bool_text(unreliable));
        writer.write_byte_record(&record).expect("write to memory");
    }
    writer.into_inner().expect("flush to memory")
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
        crate::selection::level_text(s.fdr),
        procedure_words(s.procedure),
        s.pruning
            .map(|p| format!(", {p} pruning"))
            .unwrap_or_default(),
        s.pvalues,
        s.score
    );
    if let Some(mark) = &s.unreliable_weights {
        let _ = writeln!(out, "{}", mark.statement);
    }
    if let Some(shift) = &s.shift {
        let severe: Vec<&str> = shift
            .summary
            .warnings
            .iter()
            .filter(|w| w.severity == Severity::Severe)
            .map(|w| w.diagnostic.as_str())
            .collect();
        if !severe.is_empty() {
            let _ = writeln!(
                out,
                "  WARNING: the fitted weights fail {} severe check{} ({}; details below, worst \
                 first): read them before using this shortlist",
                severe.len(),
                if severe.len() == 1 { "" } else { "s" },
                severe.join(", ")
            );
        }
    }
    if let Some(statement) = &s.draw_statement {
        let _ = writeln!(
            out,
            "  {}: the shortlist depends on a random draw: {statement}",
            s.draw_severity.unwrap_or("caution").to_uppercase()
        );
    }
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
        "  BH on the weighted {} p-values would select: {}{}",
        s.bh_pvalues,
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
    if let Some(shift) = &s.shift {
        let _ = writeln!(out, "shift diagnostics of the fitted weights:");
        out.push_str(&shift_diagnostics_text(shift, "  "));
        let _ = writeln!(out, "  {}", shift.fit_rows_note);
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

// ---------------------------------------------------------------------------------------
// Shift assessment: shift.json, weights.csv, balance.csv and the text summary
// ---------------------------------------------------------------------------------------

/// The shift part of a summary: settings, the fitting mode in words, and every diagnostic of
/// [`ShiftSummary`] (its fields appear at this object's top level: `auc`, `auc_ci`,
/// `permutation_p`, `ess`, `ess_fraction`, `khat`, `unreachable_count`, `converged`,
/// `iterations`, `warnings`, ...).
#[derive(Clone, Debug, Serialize)]
pub struct ShiftSection {
    /// The options the classifier and the diagnostics ran with.
    pub settings: ShiftOptions,
    /// The feature columns given (after ranges were resolved).
    pub features: Vec<String>,
    /// Labeled rows read, whether they calibrate or not.
    pub labeled_rows: usize,
    /// Which fitting mode was used, how many labeled rows calibrate, and why fitting on all
    /// rows is the default.
    pub fit_rows_note: String,
    /// Every diagnostic and the warnings, worst first.
    #[serde(flatten)]
    pub summary: ShiftSummary,
}

/// Build the shift section of a summary from fitted weights.
pub fn shift_section(fitted: &FittedWeights, features: &[String]) -> ShiftSection {
    let summary = fitted.assessment.summary.clone();
    let labeled_rows = fitted.assessment.labeled_calibrates.len();
    ShiftSection {
        settings: fitted.options.clone(),
        features: features.to_vec(),
        labeled_rows,
        fit_rows_note: fit_rows_statement(
            fitted.options.fit_rows(),
            labeled_rows,
            summary.calibration_rows,
        ),
        summary,
    }
}

/// Where the inputs of a shift assessment came from.
#[derive(Clone, Debug, Default, Serialize)]
pub struct ShiftInputs {
    pub labeled_file: String,
    pub pool_file: String,
}

/// `shift.json`: tool, inputs, settings and every diagnostic (see [`ShiftSection`]).
#[derive(Clone, Debug, Serialize)]
pub struct ShiftReport {
    pub tool: ToolInfo,
    pub inputs: ShiftInputs,
    #[serde(flatten)]
    pub shift: ShiftSection,
}

/// Build `shift.json`'s content.
pub fn shift_report(section: ShiftSection, inputs: ShiftInputs) -> ShiftReport {
    ShiftReport {
        tool: tool_info(),
        inputs,
        shift: section,
    }
}

/// `weights.csv`: one row per labeled row, then one per pool row, each set in input order.
///
/// Columns: `id, set` (`labeled` or `pool`), `pool_probability` (e(x) = P(pool | x) at the
/// real set sizes), `weight` (the density ratio after capping), `in_fit` (the row was in the
/// classifier's fitting sample), `calibrates` (a labeled row that calibrates; always false
/// for pool rows). Floats in shortest round-trip form (ryu).
///
/// # Panics
/// If the id lists and the assessment differ in length.
pub fn weights_csv(labeled_ids: &[String], pool_ids: &[String], fitted: &FittedWeights) -> Vec<u8> {
    let a = &fitted.assessment;
    assert_eq!(
        labeled_ids.len(),
        a.labeled.weight.len(),
        "labeled ids / weights"
    );
    assert_eq!(pool_ids.len(), a.pool.weight.len(), "pool ids / weights");
    let rows = labeled_ids.len() + pool_ids.len();
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(rows * 64));
    writer
        .write_record([
            "id",
            "set",
            "pool_probability",
            "weight",
            "in_fit",
            "calibrates",
        ])
        .expect("write to memory");
    let mut floats = ryu::Buffer::new();
    let mut record = csv::ByteRecord::with_capacity(96, 6);
    let sets = [
        (
            "labeled",
            labeled_ids,
            &a.labeled,
            Some(&a.labeled_calibrates),
        ),
        ("pool", pool_ids, &a.pool, None),
    ];
    for (set, ids, results, calibrates) in sets {
        for (i, id) in ids.iter().enumerate() {
            record.clear();
            record.push_field(id.as_bytes());
            record.push_field(set.as_bytes());
            record.push_field(floats.format(results.pool_probability[i]).as_bytes());
            record.push_field(floats.format(results.weight[i]).as_bytes());
            record.push_field(bool_text(results.in_fit[i]));
            record.push_field(bool_text(calibrates.is_some_and(|c| c[i])));
            writer.write_byte_record(&record).expect("write to memory");
        }
    }
    writer.into_inner().expect("flush to memory")
}

/// `balance.csv`: `feature, smd_unweighted, smd_weighted`, one row per input feature, pool
/// minus labeled (an infinite SMD, from a feature constant in both sets at different
/// values, is written `inf` / `-inf`).
pub fn balance_csv(balance: &[FeatureBalance]) -> Vec<u8> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    writer
        .write_record(["feature", "smd_unweighted", "smd_weighted"])
        .expect("write to memory");
    for b in balance {
        writer
            .write_record([
                b.feature.clone(),
                float_text(b.smd_unweighted),
                float_text(b.smd_weighted),
            ])
            .expect("write to memory");
    }
    writer.into_inner().expect("flush to memory")
}

fn float_text(v: f64) -> String {
    if v.is_finite() {
        ryu::Buffer::new().format(v).to_string()
    } else {
        v.to_string()
    }
}

/// A number for people: 3 decimals without trailing zeros, scientific when very large or
/// very small, `inf` / `NaN` as such.
pub(crate) fn shown(v: f64) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    if v != 0.0 && (v.abs() >= 1e5 || v.abs() < 1e-3) {
        return format!("{v:.3e}");
    }
    let text = format!("{v:.3}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".to_string()
    } else {
        text.to_string()
    }
}

fn severity_word(severity: Severity) -> &'static str {
    match severity {
        Severity::Severe => "severe",
        Severity::Caution => "caution",
    }
}

/// One shift warning as a line: the diagnostic, its severity, value and threshold, and what
/// it means for the shortlist.
pub fn warning_line(w: &ShiftWarning) -> String {
    format!(
        "{} ({}; value {}, threshold {}): {}",
        w.diagnostic,
        severity_word(w.severity),
        shown(w.value),
        shown(w.threshold),
        w.message
    )
}

/// The diagnostics as aligned lines, each prefixed by `indent`.
pub fn shift_diagnostics_text(section: &ShiftSection, indent: &str) -> String {
    let s = &section.summary;
    let mut lines = Vec::new();
    discrimination_lines(s, &mut lines);
    weight_reliability_lines(s, &mut lines);
    balance_lines(s, &mut lines);
    weight_lines(s, &mut lines);
    classifier_lines(s, &mut lines);
    let mut out = String::new();
    for (label, text) in lines {
        let _ = writeln!(out, "{indent}{label:<26}{text}");
    }
    out
}

/// Lines of [`shift_diagnostics_text`]: (label, text).
type DiagnosticLines = Vec<(String, String)>;

/// How well the classifier tells the sets apart: AUC and the permutation test.
fn discrimination_lines(s: &ShiftSummary, lines: &mut DiagnosticLines) {
    let mut line = |label: &str, text: String| lines.push((label.to_string(), text));
    line(
        "domain-classifier AUC",
        format!(
            "{} (95% CI {} to {}; {}-fold cross-validated; 0.5 = no detectable shift)",
            shown(s.auc),
            shown(s.auc_ci[0]),
            shown(s.auc_ci[1]),
            s.auc_details.folds
        ),
    );
    line(
        "test of \"no shift\"",
        format!(
            "permutation p = {:.4} ({} permutations; the smallest possible p is {:.4})",
            s.permutation_p,
            s.auc_details.permutations,
            1.0 / (s.auc_details.permutations as f64 + 1.0)
        ),
    );
}

/// Whether weighted estimates can be trusted: effective sample size and k-hat.
fn weight_reliability_lines(s: &ShiftSummary, lines: &mut DiagnosticLines) {
    let mut line = |label: &str, text: String| lines.push((label.to_string(), text));
    line(
        "effective sample size",
        format!(
            "{:.1} of {} calibrating labeled rows ({:.1}%)",
            s.ess,
            s.calibration_rows,
            100.0 * s.ess_fraction
        ),
    );
    line(
        "Pareto k-hat",
        format!(
            "{} (reliable below {})",
            shown(s.khat),
            shown(s.khat_threshold)
        ),
    );
}

/// Balance after weighting (features, their squares and products) and overlap.
fn balance_lines(s: &ShiftSummary, lines: &mut DiagnosticLines) {
    let mut line = |label: &str, text: String| lines.push((label.to_string(), text));
    let worst = |pick: fn(&FeatureBalance) -> f64| {
        s.balance
            .iter()
            .max_by(|a, b| pick(a).abs().total_cmp(&pick(b).abs()))
    };
    if let (Some(before), Some(after)) = (worst(|b| b.smd_unweighted), worst(|b| b.smd_weighted)) {
        line(
            "worst |SMD|",
            format!(
                "{} {} before weighting, {} {} after (flagged above {})",
                before.feature,
                shown(before.smd_unweighted.abs()),
                after.feature,
                shown(after.smd_weighted.abs()),
                shown(s.smd_threshold)
            ),
        );
    }
    match &s.adequacy.worst_feature {
        Some(feature) => line(
            "squares/products |SMD|",
            format!(
                "worst {feature} {} after weighting (flagged above {}; large = the weight \
                 model misses part of the shift)",
                shown(
                    s.adequacy
                        .max_abs_weighted_squares
                        .max(s.adequacy.max_abs_weighted_products)
                ),
                shown(s.adequacy.threshold)
            ),
        ),
        None => line("squares/products |SMD|", "none (one feature)".to_string()),
    }
    line(
        "overlap",
        format!(
            "{:.1}% of the pool above balanced probability 0.9, {:.1}% above 0.95",
            100.0 * s.overlap.pool_share_above_0_9,
            100.0 * s.overlap.pool_share_above_0_95
        ),
    );
}

/// The weights: quantiles, capping, unreachable pool units.
fn weight_lines(s: &ShiftSummary, lines: &mut DiagnosticLines) {
    let mut line = |label: &str, text: String| lines.push((label.to_string(), text));
    let q = |values: &[f64], level: f64| {
        s.weights
            .quantile_levels
            .iter()
            .position(|&l| l == level)
            .map_or(f64::NAN, |i| values[i])
    };
    line(
        "weights (labeled)",
        format!(
            "median {}, 99th percentile {}, max {}; largest single share {:.2}%",
            shown(q(&s.weights.labeled_quantiles, 0.5)),
            shown(q(&s.weights.labeled_quantiles, 0.99)),
            shown(q(&s.weights.labeled_quantiles, 1.0)),
            100.0 * s.weights.largest_weight_share
        ),
    );
    line(
        "weights (pool)",
        format!(
            "median {}, 99th percentile {}, max {}",
            shown(q(&s.weights.pool_quantiles, 0.5)),
            shown(q(&s.weights.pool_quantiles, 0.99)),
            shown(q(&s.weights.pool_quantiles, 1.0))
        ),
    );
    if let Some(cap) = &s.weights.cap {
        line(
            "capping",
            format!(
                "at the {} quantile = {}: {} labeled and {} pool weights lowered",
                shown(cap.quantile),
                shown(cap.cap),
                cap.labeled_capped,
                cap.pool_capped
            ),
        );
    }
    line(
        &format!("unreachable at FDR {}", crate::selection::level_text(s.fdr)),
        format!(
            "{} of {} pool units (weight too large for the labeled set)",
            s.unreachable_count, s.pool_rows
        ),
    );
}

/// The classifier fit: convergence, penalty, terms, rows, dropped columns.
fn classifier_lines(s: &ShiftSummary, lines: &mut DiagnosticLines) {
    let mut line = |label: &str, text: String| lines.push((label.to_string(), text));
    let fit = &s.fit;
    if let Some(b) = &fit.boosted {
        line(
            "classifier",
            format!(
                "boosted trees, cross-fitted in {} folds (out-of-fold probabilities for the \
                 fitting rows); trees per fold {:?} (early stopping on a {:.0}% validation \
                 split), learning rate {}, at most {} leaves, at least {} rows per leaf; \
                 probabilities clipped to [{}, {}]: {} low, {} high of {} fitting rows; fit \
                 on {} labeled and {} pool rows",
                b.params.folds,
                b.trees_per_fold,
                100.0 * b.params.validation_fraction,
                shown(b.params.learning_rate),
                b.params.max_leaf_nodes,
                b.params.min_samples_leaf,
                b.probability_clip,
                1.0 - b.probability_clip,
                b.out_of_fold_clipped_low,
                b.out_of_fold_clipped_high,
                b.rows,
                fit.labeled_rows_fit,
                fit.pool_rows_fit
            ),
        );
    } else {
        line(
            "classifier",
            format!(
                "{} after {} Newton iterations (gradient norm {}); penalty alpha {} (scikit-learn \
             C = {}); {} terms; fit on {} labeled and {} pool rows",
                if s.converged {
                    "converged"
                } else {
                    "NOT converged"
                },
                s.iterations,
                shown(fit.report.gradient_norm),
                shown(fit.alpha),
                shown(1.0 / fit.alpha),
                fit.terms.len(),
                fit.labeled_rows_fit,
                fit.pool_rows_fit
            ),
        );
    }
    if !fit.dropped_constant_columns.is_empty() {
        line(
            "dropped constant columns",
            fit.dropped_constant_columns.join(", "),
        );
    }
    let clipped: Vec<String> = fit
        .clipped_features
        .iter()
        .map(|c| {
            format!(
                "{} ({} value{}, most extreme {} in {} row {})",
                c.feature,
                c.clipped_labeled + c.clipped_pool,
                if c.clipped_labeled + c.clipped_pool == 1 {
                    ""
                } else {
                    "s"
                },
                shown(c.most_extreme.value),
                c.most_extreme.set,
                c.most_extreme.row + 1
            )
        })
        .collect();
    line(
        "feature transform",
        match fit.feature_transform {
            crate::shift::FeatureTransform::Clip if clipped.is_empty() => {
                "clip at outer fences (1%/99% order statistics +- 2 spans); no value beyond them"
                    .to_string()
            }
            crate::shift::FeatureTransform::Clip => format!(
                "clip at outer fences (1%/99% order statistics +- 2 spans); clipped: {}",
                clipped.join("; ")
            ),
            crate::shift::FeatureTransform::Rank => {
                "rank (normal scores of the ranks on the fitting rows)".to_string()
            }
            crate::shift::FeatureTransform::None => "none (raw values)".to_string(),
        },
    );
    line(
        "usable for selection",
        if s.refusal_reasons.is_empty() {
            "yes: no reliability check failed (k-hat, ESS >= 2%, AUC <= 0.99)".to_string()
        } else {
            format!(
                "NO: `select --fit-weights` would refuse these weights (exit code 3): {}",
                s.refusal_reasons
                    .iter()
                    .map(|r| r.diagnostic.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        },
    );
}

/// The `shift` command's stdout summary: worst problems first (the warnings), then every
/// diagnostic, then the fitting mode.
pub fn shift_text(report: &ShiftReport) -> String {
    let section = &report.shift;
    let s = &section.summary;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "weighbridge {} shift: labeled {} ({} rows) vs pool {} ({} rows), {} feature{}",
        report.tool.version,
        report.inputs.labeled_file,
        section.labeled_rows,
        report.inputs.pool_file,
        s.pool_rows,
        section.features.len(),
        if section.features.len() == 1 { "" } else { "s" }
    );
    if !s.refusal_reasons.is_empty() {
        let names: Vec<&str> = s
            .refusal_reasons
            .iter()
            .map(|r| r.diagnostic.as_str())
            .collect();
        let _ = writeln!(
            out,
            "UNRELIABLE: `select --fit-weights` would refuse these weights (exit code 3) because \
             of {}; see the warnings below",
            names.join(", ")
        );
    }
    if s.warnings.is_empty() {
        let _ = writeln!(
            out,
            "no warnings: no diagnostic crossed its threshold (this does not prove the \
             weights right; see the cautions in the README)"
        );
    } else {
        let _ = writeln!(out, "warnings (most serious first):");
        for w in &s.warnings {
            let _ = writeln!(out, "  - {}", warning_line(w));
        }
    }
    let _ = writeln!(out, "diagnostics:");
    out.push_str(&shift_diagnostics_text(section, "  "));
    let _ = writeln!(out, "{}", section.fit_rows_note);
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::conformal::score::Thresholds;
    use crate::selection::pipeline::{run_selection, LabeledInput, PoolInput, SelectOptions};

    #[test]
    fn shown_numbers_are_short() {
        assert_eq!(shown(0.7), "0.7");
        assert_eq!(shown(0.123456), "0.123");
        assert_eq!(shown(12.0), "12");
        assert_eq!(shown(1e-9), "1.000e-9");
        assert_eq!(shown(f64::INFINITY), "inf");
        assert_eq!(shown(-0.0001), "-1.000e-4");
        assert_eq!(shown(0.0), "0");
    }

    /// The de-duplication in [`add_shift`] recognises the selection's warnings by how they
    /// start; this pins those starts to what `crate::selection::pipeline` writes.
    #[test]
    fn selection_warning_prefixes_match_the_selection_module() {
        // 200 labeled units with weights 1 except a few huge ones: tiny ESS; pool units
        // with weights large relative to W: unreachable.
        let n = 200;
        let y = vec![0.0; n];
        let mu: Vec<f64> = (0..n).map(|i| i as f64 / n as f64).collect();
        let mut w = vec![1.0; n];
        w[0] = 1e6;
        let pool_mu = [0.99, 0.5, 0.2];
        let pool_w = [1.0, 1e9, 1.0];
        let o = run_selection(
            &SelectOptions::default(),
            LabeledInput {
                outcome: &y,
                prediction: &mu,
                thresholds: Thresholds::Constant(0.5),
                weights: Some(&w),
            },
            PoolInput {
                prediction: &pool_mu,
                thresholds: Thresholds::Constant(0.5),
                weights: Some(&pool_w),
            },
        )
        .unwrap();
        assert!(
            o.warnings
                .iter()
                .any(|x| x.starts_with(SELECTION_UNREACHABLE_PREFIX)),
            "{:#?}",
            o.warnings
        );
        assert!(
            o.warnings
                .iter()
                .any(|x| x.starts_with(SELECTION_ESS_PREFIX)),
            "{:#?}",
            o.warnings
        );
    }
}
