//! Summaries of a run: the per-candidate table, the JSON summaries and the short text
//! summaries for the terminal, for a selection (`select`) and for a shift assessment
//! (`shift`, and `select --fit-weights`), and the cautions every output carries.
//!
//! Everything here turns a [`SelectionOutcome`] or a [`FittedWeights`] into bytes or text;
//! writing the bytes to disk (atomically) is the caller's job (`crate::io::OutputSet`).

use std::fmt::Write as _;

use serde::Serialize;

use super::float_text::{ColumnHint, FloatText};
use crate::conformal::score::Direction;
use crate::io::read::KeptColumns;
use crate::io::{ReadOptions, UnitTable};
use crate::selection::draw::DrawSummary;
use crate::selection::level_curve::LevelPoint;
use crate::selection::pipeline::{draw_level, draw_sentence, draw_severity, SelectionOutcome};
use crate::selection::resolution::Resolution;
use crate::shift::weighting::{fit_rows_statement, FittedWeights};
use crate::shift::{FeatureBalance, Severity, ShiftOptions, ShiftSummary, ShiftWarning};
use crate::warning::{prose_number, Level, Warning};

/// `schema_version` of every JSON output: the version of the documented shape
/// (docs/outputs.md). It changes only when a key is renamed, removed or changes type;
/// added keys keep it. 1 is the first versioned shape.
pub const SCHEMA_VERSION: u32 = 1;

/// The column names a run used (`columns` in the JSON outputs): as given on the command
/// line, features resolved to names.
#[derive(Clone, Debug, Default, PartialEq, Serialize)]
pub struct Columns {
    pub id: String,
    /// Outcome column of the labeled file (null for commands that read none).
    pub outcome: Option<String>,
    /// Prediction column (null for `shift`, which reads none).
    pub prediction: Option<String>,
    pub threshold_column: Option<String>,
    pub weight_column: Option<String>,
    /// Feature columns, ranges resolved (empty when none are used).
    pub features: Vec<String>,
    /// Pass-through columns (`--keep-columns`), empty when none.
    pub keep_columns: Vec<String>,
}

impl Columns {
    /// The columns of `read` with the resolved `features` and `kept` names.
    pub fn of(read: &ReadOptions, features: &[String], kept: &[String]) -> Self {
        Columns {
            id: read.id.clone(),
            outcome: read.outcome.clone(),
            prediction: (!read.prediction.is_empty()).then(|| read.prediction.clone()),
            threshold_column: read.threshold_column.clone(),
            weight_column: read.weight_column.clone(),
            features: features.to_vec(),
            keep_columns: if kept.is_empty() {
                read.keep_columns.clone()
            } else {
                kept.to_vec()
            },
        }
    }
}

/// Which units are interesting (`threshold_rule` in the JSON outputs): outcome above or
/// below one value, or a per-unit threshold column.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ThresholdRule {
    /// The one threshold (`--threshold`); absent with a threshold column.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub value: Option<f64>,
    /// The per-unit threshold column (`--threshold-column`); absent with one value.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub column: Option<String>,
    /// `above` (default) or `below` (`--lower-is-better`).
    pub direction: &'static str,
}

impl ThresholdRule {
    /// The rule of a run: `column` wins over `value` (as in the selection).
    pub fn new(value: Option<f64>, column: Option<&str>, direction: Direction) -> Self {
        ThresholdRule {
            value: if column.is_some() { None } else { value },
            column: column.map(str::to_string),
            direction: direction.word(),
        }
    }

    /// The rule in the user's words: "outcome above 6.5", "outcome below the threshold in
    /// column `c`".
    pub fn words(&self) -> String {
        match (&self.column, self.value) {
            (Some(column), _) => format!(
                "outcome {} the threshold in column `{column}`",
                self.direction
            ),
            (None, Some(value)) => format!("outcome {} {}", self.direction, value_text(value)),
            (None, None) => format!("outcome {} its threshold", self.direction),
        }
    }
}

/// A threshold as the user typed it: shortest round-trip form (6.5, 100, 1e-7).
fn value_text(v: f64) -> String {
    ryu::Buffer::new()
        .format(v)
        .trim_end_matches(".0")
        .to_string()
}

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

/// The JSON summary of one selection run (`summary.json`; every key in docs/outputs.md).
#[derive(Clone, Debug, Serialize)]
pub struct SelectSummary {
    /// [`SCHEMA_VERSION`].
    pub schema_version: u32,
    pub tool: ToolInfo,
    /// The command line of the run (argv, program name first); empty when not run from
    /// the command line.
    pub command_line: Vec<String>,
    pub inputs: RunInputs,
    /// The threshold as numbers: `{value, direction}` or `{column, direction}` (`inputs.
    /// threshold` keeps the earlier string). Null when not known.
    pub threshold_rule: Option<ThresholdRule>,
    /// The column names used; null when not known.
    pub columns: Option<Columns>,
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
    /// The same on the ordered scale (`low`, `medium`, `high`), null when fixed.
    pub draw_level: Option<Level>,
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
    /// Every warning as one line (the earlier form), worst first.
    pub warnings: Vec<String>,
    /// The same warnings as objects `{code, severity, level, level_rank, diagnostic,
    /// value, threshold, message}`, in the same order.
    pub warning_details: Vec<Warning>,
    pub cautions: Vec<&'static str>,
    /// Labeled rows left out because their outcome was a missing-value token
    /// (`--missing-outcome drop`; set by the command from the labeled table).
    pub dropped_missing_outcome_count: usize,
    /// Labeled outcomes given as censored values (`>x`, `<=x`, ...) and used by their bound.
    pub censored_outcome_count: usize,
    /// How the pool was held: `mode` (`in_memory` or `streamed`), `memory_budget_bytes`,
    /// `estimated_in_memory_bytes`, and for a streamed run its passes. Null when not set
    /// by the command.
    pub memory: Option<MemoryUse>,
}

/// How `select` held the pool (summary.json `memory`).
#[derive(Clone, Debug, Serialize)]
pub struct MemoryUse {
    /// `in_memory` or `streamed`.
    pub mode: &'static str,
    /// The budget (`--memory-budget`, default 1 GiB).
    pub memory_budget_bytes: u64,
    /// What holding the pool in memory was estimated to need; null for a pool that can be
    /// read only once (standard input, a pipe).
    pub estimated_in_memory_bytes: Option<u64>,
    /// Streamed runs: times the pool file was read (2), times its scores were passed
    /// through the temporary file, units that needed their exact rank, and whether those
    /// went to a temporary file. Null in memory.
    pub pool_reads: Option<usize>,
    pub score_passes: Option<usize>,
    pub ranked_units: Option<usize>,
    pub ranked_units_spilled: Option<bool>,
}

impl MemoryUse {
    /// An in-memory run under `budget`, with what it was estimated to need.
    pub fn in_memory(budget: u64, estimate: Option<u64>) -> Self {
        MemoryUse {
            mode: "in_memory",
            memory_budget_bytes: budget,
            estimated_in_memory_bytes: estimate,
            pool_reads: None,
            score_passes: None,
            ranked_units: None,
            ranked_units_spilled: None,
        }
    }
}

impl SelectSummary {
    /// Append a warning in both forms (`warnings` and `warning_details`).
    pub fn add_warning(&mut self, warning: Warning) {
        self.warnings.push(warning.line());
        self.warning_details.push(warning);
    }
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
        schema_version: SCHEMA_VERSION,
        tool: tool_info(),
        command_line: Vec::new(),
        inputs,
        threshold_rule: None,
        columns: None,
        n_labeled: outcome.n_labeled,
        n_pool: outcome.pool_size,
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
        draw_level: draw_statement.is_some().then(|| draw_level(&outcome.draw)),
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
        warnings: outcome.warnings.iter().map(Warning::line).collect(),
        warning_details: outcome.warnings.clone(),
        cautions: CAUTIONS.to_vec(),
        dropped_missing_outcome_count: 0,
        censored_outcome_count: 0,
        memory: None,
    }
}

/// Codes of the selection's warnings that a shift warning repeats (selection code, shift
/// diagnostic): the effective sample size and the unreachable units.
const REPEATED_BY_SHIFT: [(&str, &str); 2] = [
    ("labeled_ess_low", "ess_fraction"),
    ("unreachable_units", "unreachable_share"),
];

/// Fold the shift diagnostics of fitted weights into a selection summary: the `shift`
/// object, and the warnings worst first by level, the shift warnings first among equals
/// (weights that cannot be trusted make every count below them doubtful) in their
/// documented order, then the selection's own. A selection warning that repeats a shift warning (the
/// effective sample size, unreachable units) is dropped.
pub fn add_shift(summary: &mut SelectSummary, section: ShiftSection) {
    let named = |d: &str| section.summary.warnings.iter().any(|w| w.diagnostic == d);
    let repeats = |w: &Warning| {
        REPEATED_BY_SHIFT
            .iter()
            .any(|&(code, diagnostic)| w.code == code && named(diagnostic))
    };
    let mut details: Vec<Warning> = section
        .summary
        .warnings
        .iter()
        .map(ShiftWarning::to_warning)
        .collect();
    let mut lines: Vec<String> = section.summary.warnings.iter().map(warning_line).collect();
    // The summary's lines and objects are parallel; keep them so.
    for (line, warning) in summary.warnings.iter().zip(&summary.warning_details) {
        if !repeats(warning) {
            lines.push(line.clone());
            details.push(warning.clone());
        }
    }
    // Worst first across both sources; among equals the shift's come first.
    let mut paired: Vec<(String, Warning)> = lines.into_iter().zip(details).collect();
    paired.sort_by_key(|p| std::cmp::Reverse(p.1.level));
    (summary.warnings, summary.warning_details) = paired.into_iter().unzip();
    summary.shift = Some(section);
}

/// Plain-words reason a unit can never be selected, or "" when none is known.
pub fn unselectable_reason(outcome: &SelectionOutcome, j: usize) -> String {
    if !outcome.unreachable[j] {
        return String::new();
    }
    unreachable_text(
        outcome.weights[j],
        outcome.total_labeled_weight,
        outcome.settings.fdr,
    )
}

/// [`unselectable_reason`] for a unit of weight `w`, labeled total `total`, level `fdr`.
pub fn unreachable_text(w: f64, total: f64, fdr: f64) -> String {
    format!(
        "its p-value can never go below {} = w/(W+w) with weight {} (labeled total W = {}), \
         which is above the FDR level {}: the labeled set has too little weight near this unit",
        prose_number(w / (total + w)),
        prose_number(w),
        prose_number(total),
        crate::selection::level_text(fdr)
    )
}

/// The pool side of a run's outputs: ids, predictions in the user's units, pass-through
/// columns, and which side of the threshold is interesting.
#[derive(Clone, Copy, Debug)]
pub struct PoolColumns<'a> {
    pub ids: &'a [String],
    /// The predictions as read (the user's units, not negated for `--lower-is-better`).
    pub prediction: &'a [f64],
    /// `--keep-columns` cells, copied verbatim.
    pub kept: &'a KeptColumns,
    pub direction: Direction,
}

impl<'a> PoolColumns<'a> {
    /// The columns of a pool table.
    pub fn of(table: &'a UnitTable, direction: Direction) -> Self {
        PoolColumns {
            ids: &table.ids,
            prediction: &table.prediction,
            kept: &table.kept,
            direction,
        }
    }
}

/// The selected units, best first: by prediction, higher first for [`Direction::Above`]
/// and lower first for [`Direction::Below`], ties in input order.
///
/// # Panics
/// If `prediction` and `selected` differ in length.
pub fn shortlist_order(prediction: &[f64], selected: &[bool], direction: Direction) -> Vec<usize> {
    assert_eq!(
        prediction.len(),
        selected.len(),
        "prediction / selected length"
    );
    let mut chosen: Vec<usize> = (0..selected.len()).filter(|&j| selected[j]).collect();
    // A stable sort keeps input order among equal predictions.
    match direction {
        Direction::Above => chosen.sort_by(|&a, &b| prediction[b].total_cmp(&prediction[a])),
        Direction::Below => chosen.sort_by(|&a, &b| prediction[a].total_cmp(&prediction[b])),
    }
    chosen
}

/// Names of the columns we write in `candidates.csv`, `shortlist.csv` and `batch.csv`; a kept column of
/// the same name is written as `input_NAME` so that every header name is unique.
const OUR_COLUMNS: [&str; 18] = [
    "id",
    "score",
    "weight",
    "p_value",
    "selected",
    "first_step",
    "conditional_count",
    "never_selectable_because",
    "selection_probability",
    "q_value",
    "q_value_by",
    "unreliable_weights",
    "prediction",
    "shortlist_rank",
    "rank",
    "input_id",
    "input_prediction",
    // batch.csv
    "inclusion_probability",
];

/// Header names of the kept columns: verbatim, or `input_NAME` when NAME is one of ours.
pub fn kept_header(names: &[String]) -> Vec<String> {
    names
        .iter()
        .map(|n| {
            if OUR_COLUMNS.contains(&n.as_str()) {
                format!("input_{n}")
            } else {
                n.clone()
            }
        })
        .collect()
}

/// The columns of `candidates.csv`, the same whatever the procedure.
pub const CANDIDATES_COLUMNS: [&str; 14] = [
    "id",
    "score",
    "weight",
    "p_value",
    "selected",
    "first_step",
    "conditional_count",
    "never_selectable_because",
    "selection_probability",
    "q_value",
    "q_value_by",
    "unreliable_weights",
    "prediction",
    "shortlist_rank",
];

/// `candidates.csv`: one row per pool unit, in input order, with the same columns whatever
/// the procedure ([`CANDIDATES_COLUMNS`], then the kept columns; docs/outputs.md).
///
/// Columns: `id, score, weight, p_value, selected, first_step, conditional_count`
/// (conditional calibration only; empty cells for BH and BY), `never_selectable_because`
/// (empty unless unreachable), `selection_probability` (over the pruning draw, the run's
/// p-values held fixed; 0 or 1 without a draw), `q_value` (BH-adjusted p-value of the
/// run's own p-values), `q_value_by` (BY-adjusted, filled for `--procedure by` runs only),
/// `unreliable_weights` (`true` on every row of a run allowed through on unreliable fitted
/// weights), `prediction` (as read), `shortlist_rank` (the unit's line in shortlist.csv,
/// empty when not selected), then the `--keep-columns` cells verbatim.
/// Floats are written in their shortest round-trip form (ryu), so the same run gives the
/// same bytes and reading them back gives the same numbers.
///
/// # Panics
/// If the pool columns and the outcome differ in length.
pub fn candidates_csv(
    pool: &PoolColumns<'_>,
    outcome: &SelectionOutcome,
    unreliable: bool,
) -> Vec<u8> {
    let order = shortlist_order(pool.prediction, &outcome.selected, pool.direction);
    candidates_csv_in_order(pool, outcome, unreliable, &order)
}

/// Rows of `candidates.csv` formatted together, in parallel with other pieces.
const ROWS_PER_PIECE: usize = 1 << 13;

/// [`candidates_csv`] given the shortlist's order ([`shortlist_order`]), for a caller that
/// needs the order for more than one output. Rows are formatted in parallel pieces.
///
/// # Panics
/// If the pool columns and the outcome differ in length.
pub fn candidates_csv_in_order(
    pool: &PoolColumns<'_>,
    outcome: &SelectionOutcome,
    unreliable: bool,
    order: &[usize],
) -> Vec<u8> {
    use rayon::prelude::*;
    let ids = pool.ids;
    assert_eq!(ids.len(), outcome.scores.len(), "ids / outcome length");
    assert_eq!(ids.len(), pool.prediction.len(), "ids / predictions length");
    let mut writer = csv::Writer::from_writer(Vec::new());
    let header = candidates_header(&pool.kept.names);
    writer.write_record(&header).expect("write to memory");
    let mut rank = vec![0usize; ids.len()];
    for (r, &j) in order.iter().enumerate() {
        rank[j] = r + 1;
    }
    let mut out = writer.into_inner().expect("flush to memory");
    out.reserve(ids.len() * 112);
    // A group of pieces at a time, so that the formatted pieces waiting to be appended
    // stay a few megabytes (not a second copy of the file).
    let starts: Vec<usize> = (0..ids.len()).step_by(ROWS_PER_PIECE).collect();
    for group in starts.chunks(PIECES_PER_GROUP) {
        let pieces: Vec<Vec<u8>> = group
            .par_iter()
            .map(|&from| {
                let to = (from + ROWS_PER_PIECE).min(ids.len());
                candidate_lines(pool, outcome, unreliable, &rank, from..to)
            })
            .collect();
        for piece in pieces {
            out.extend_from_slice(&piece);
        }
    }
    out
}

/// Pieces formatted in parallel before they are appended.
const PIECES_PER_GROUP: usize = 16;

/// The candidates.csv lines of rows `rows` (`rank[j]`: shortlist rank, 0 if not selected).
fn candidate_lines(
    pool: &PoolColumns<'_>,
    outcome: &SelectionOutcome,
    unreliable: bool,
    rank: &[usize],
    rows: std::ops::Range<usize>,
) -> Vec<u8> {
    let mut out = Vec::with_capacity(rows.len() * 112);
    let mut cells = RowCells::new();
    for j in rows {
        let id = &pool.ids[j];
        let reason = outcome.unreachable[j].then(|| unselectable_reason(outcome, j));
        let row = CandidateRow {
            id,
            score: outcome.scores[j],
            weight: outcome.weights[j],
            p_value: outcome.p_values[j],
            selected: outcome.selected[j],
            conditional: match (&outcome.first_step, &outcome.conditional_count) {
                (Some(first), Some(count)) => Some((first[j], count[j])),
                _ => None,
            },
            unreachable_reason: reason.as_deref(),
            selection_probability: outcome.draw.selection_probability[j],
            q_value: outcome.q_values[j],
            q_value_by: outcome.q_values_by.as_ref().map(|by| by[j]),
            unreliable,
            prediction: pool.prediction[j],
            shortlist_rank: (rank[j] > 0).then_some(rank[j]),
            kept: pool.kept.row(j),
        };
        cells.candidate_line(&row, &mut out);
    }
    out
}

/// The header of `candidates.csv`: [`CANDIDATES_COLUMNS`], then the kept columns.
pub fn candidates_header(kept_names: &[String]) -> Vec<String> {
    let mut header: Vec<String> = CANDIDATES_COLUMNS.iter().map(|c| c.to_string()).collect();
    header.extend(kept_header(kept_names));
    header
}

/// The header of `shortlist.csv`: [`SHORTLIST_COLUMNS`], then the kept columns.
pub fn shortlist_header(kept_names: &[String]) -> Vec<String> {
    let mut header: Vec<String> = SHORTLIST_COLUMNS.iter().map(|c| c.to_string()).collect();
    header.extend(kept_header(kept_names));
    header
}

/// One unit's row of `candidates.csv` (the in-memory and the streamed selection write
/// rows through the same [`RowCells::candidate`]). `kept` holds the `--keep-columns`
/// cells: owned strings in memory, slices of one buffer in the streamed selection.
pub struct CandidateRow<'a, K: AsRef<[u8]> = String> {
    pub id: &'a str,
    pub score: f64,
    pub weight: f64,
    pub p_value: f64,
    pub selected: bool,
    /// Conditional calibration: first step and `K_j`.
    pub conditional: Option<(bool, usize)>,
    /// Why an unreachable unit can never be selected.
    pub unreachable_reason: Option<&'a str>,
    pub selection_probability: f64,
    pub q_value: f64,
    pub q_value_by: Option<f64>,
    pub unreliable: bool,
    pub prediction: f64,
    pub shortlist_rank: Option<usize>,
    pub kept: &'a [K],
}

/// One unit's row of `shortlist.csv`.
pub struct ShortlistRow<'a, K: AsRef<[u8]> = String> {
    pub rank: usize,
    pub id: &'a str,
    pub prediction: f64,
    pub p_value: f64,
    pub q_value: f64,
    pub selection_probability: f64,
    pub weight: f64,
    pub kept: &'a [K],
}

/// Where a row's fields go: a line of CSV text ([`CsvLine`]) or, in the tests, a
/// `csv::ByteRecord` for the csv crate's writer to compare with.
pub trait FieldSink {
    /// A field that may need quoting (ids, kept cells, prose).
    fn text(&mut self, field: &[u8]);
    /// A field that never needs quoting (numbers, `true`/`false`, empty).
    fn plain(&mut self, field: &[u8]) {
        self.text(field);
    }
}

impl FieldSink for csv::ByteRecord {
    fn text(&mut self, field: &[u8]) {
        self.push_field(field);
    }
}

/// One CSV line appended to a buffer, fields quoted exactly where the csv crate's default
/// writer quotes them (a field holding `,`, `"`, `\r` or `\n` goes in double quotes, its
/// quotes doubled), ended by `\n`. Numbers, most of a row, skip the scan for those bytes.
pub struct CsvLine<'a> {
    out: &'a mut Vec<u8>,
    started: bool,
}

impl<'a> CsvLine<'a> {
    /// A line to append to `out`.
    pub fn new(out: &'a mut Vec<u8>) -> Self {
        CsvLine {
            out,
            started: false,
        }
    }

    /// End the line.
    pub fn finish(self) {
        self.out.push(b'\n');
    }

    fn separate(&mut self) {
        if self.started {
            self.out.push(b',');
        }
        self.started = true;
    }
}

impl FieldSink for CsvLine<'_> {
    fn text(&mut self, field: &[u8]) {
        self.separate();
        if field
            .iter()
            .any(|&b| matches!(b, b',' | b'"' | b'\r' | b'\n'))
        {
            self.out.push(b'"');
            for &b in field {
                if b == b'"' {
                    self.out.push(b'"');
                }
                self.out.push(b);
            }
            self.out.push(b'"');
        } else {
            self.out.extend_from_slice(field);
        }
    }

    fn plain(&mut self, field: &[u8]) {
        self.separate();
        self.out.extend_from_slice(field);
    }
}

/// Number buffers reused for writing output rows.
pub struct RowCells {
    floats: FloatText,
    /// candidates.csv's score, weight, selection_probability and prediction, then
    /// shortlist.csv's prediction, selection_probability and weight.
    columns: [ColumnHint; 7],
    integers: itoa::Buffer,
}

impl Default for RowCells {
    fn default() -> Self {
        RowCells::new()
    }
}

impl RowCells {
    pub fn new() -> Self {
        RowCells {
            floats: FloatText::new(),
            columns: [ColumnHint::default(); 7],
            integers: itoa::Buffer::new(),
        }
    }

    /// Append a `candidates.csv` row to `out` (floats in their shortest round-trip form).
    pub fn candidate_line<K: AsRef<[u8]>>(&mut self, row: &CandidateRow<'_, K>, out: &mut Vec<u8>) {
        let mut line = CsvLine::new(out);
        self.candidate(row, &mut line);
        line.finish();
    }

    /// Append a `shortlist.csv` row to `out`.
    pub fn shortlist_line<K: AsRef<[u8]>>(&mut self, row: &ShortlistRow<'_, K>, out: &mut Vec<u8>) {
        let mut line = CsvLine::new(out);
        self.shortlisted(row, &mut line);
        line.finish();
    }

    /// The fields of a `candidates.csv` row, in [`CANDIDATES_COLUMNS`] order.
    pub fn candidate<K: AsRef<[u8]>>(
        &mut self,
        row: &CandidateRow<'_, K>,
        sink: &mut impl FieldSink,
    ) {
        let RowCells {
            floats,
            columns,
            integers,
        } = self;
        sink.text(row.id.as_bytes());
        // Scores, weights and predictions are often short decimals; p- and q-values rarely.
        sink.plain(floats.format_column(row.score, &mut columns[0]));
        sink.plain(floats.format_column(row.weight, &mut columns[1]));
        sink.plain(floats.format_long(row.p_value));
        sink.plain(bool_text(row.selected));
        match row.conditional {
            Some((first, count)) => {
                sink.plain(bool_text(first));
                sink.plain(integers.format(count).as_bytes());
            }
            None => {
                sink.plain(b"");
                sink.plain(b"");
            }
        }
        sink.text(row.unreachable_reason.unwrap_or("").as_bytes());
        sink.plain(floats.format_column(row.selection_probability, &mut columns[2]));
        sink.plain(floats.format_long(row.q_value));
        match row.q_value_by {
            Some(by) => sink.plain(floats.format_long(by)),
            None => sink.plain(b""),
        }
        sink.plain(bool_text(row.unreliable));
        sink.plain(floats.format_column(row.prediction, &mut columns[3]));
        match row.shortlist_rank {
            Some(rank) => sink.plain(integers.format(rank).as_bytes()),
            None => sink.plain(b""),
        }
        for cell in row.kept {
            sink.text(cell.as_ref());
        }
    }

    /// The fields of a `shortlist.csv` row, in [`SHORTLIST_COLUMNS`] order.
    pub fn shortlisted<K: AsRef<[u8]>>(
        &mut self,
        row: &ShortlistRow<'_, K>,
        sink: &mut impl FieldSink,
    ) {
        let RowCells {
            floats,
            columns,
            integers,
        } = self;
        sink.plain(integers.format(row.rank).as_bytes());
        sink.text(row.id.as_bytes());
        sink.plain(floats.format_column(row.prediction, &mut columns[4]));
        sink.plain(floats.format_long(row.p_value));
        sink.plain(floats.format_long(row.q_value));
        sink.plain(floats.format_column(row.selection_probability, &mut columns[5]));
        sink.plain(floats.format_column(row.weight, &mut columns[6]));
        for cell in row.kept {
            sink.text(cell.as_ref());
        }
    }
}

/// The columns of `shortlist.csv` before the kept columns.
pub const SHORTLIST_COLUMNS: [&str; 7] = [
    "rank",
    "id",
    "prediction",
    "p_value",
    "q_value",
    "selection_probability",
    "weight",
];

/// `shortlist.csv`: the selected units only, best first ([`shortlist_order`]), with
/// [`SHORTLIST_COLUMNS`] and then the `--keep-columns` cells verbatim (CSV-quoted where
/// needed). `rank` counts from 1; `p_value` is the p-value the procedure used, `q_value`
/// its BH adjustment, `selection_probability` the unit's probability of selection over the
/// pruning draw (1 without a draw). A header only when nothing is selected.
///
/// # Panics
/// If the pool columns and the outcome differ in length.
pub fn shortlist_csv(pool: &PoolColumns<'_>, outcome: &SelectionOutcome) -> Vec<u8> {
    let order = shortlist_order(pool.prediction, &outcome.selected, pool.direction);
    shortlist_csv_in_order(pool, outcome, &order)
}

/// [`shortlist_csv`] given the shortlist's order ([`shortlist_order`]).
///
/// # Panics
/// If the pool columns and the outcome differ in length.
pub fn shortlist_csv_in_order(
    pool: &PoolColumns<'_>,
    outcome: &SelectionOutcome,
    order: &[usize],
) -> Vec<u8> {
    assert_eq!(pool.ids.len(), outcome.scores.len(), "ids / outcome length");
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(64 + order.len() * 96));
    let header = shortlist_header(&pool.kept.names);
    writer.write_record(&header).expect("write to memory");
    let mut out = writer.into_inner().expect("flush to memory");
    let mut cells = RowCells::new();
    for (r, &j) in order.iter().enumerate() {
        let row = ShortlistRow {
            rank: r + 1,
            id: &pool.ids[j],
            prediction: pool.prediction[j],
            p_value: outcome.p_values[j],
            q_value: outcome.q_values[j],
            selection_probability: outcome.draw.selection_probability[j],
            weight: outcome.weights[j],
            kept: pool.kept.row(j),
        };
        cells.shortlist_line(&row, &mut out);
    }
    out
}

fn bool_text(value: bool) -> &'static [u8] {
    if value {
        b"true"
    } else {
        b"false"
    }
}

/// The short summary printed on stdout.
///
/// Names what "interesting" means in the user's words (`threshold_rule`: "outcome below
/// 100" with `--lower-is-better`), and the top of shortlist.csv in its order.
pub fn text_summary(
    summary: &SelectSummary,
    pool: &PoolColumns<'_>,
    outcome: &SelectionOutcome,
) -> String {
    let order = shortlist_order(pool.prediction, &outcome.selected, pool.direction);
    text_summary_in_order(summary, pool, &order)
}

/// [`text_summary`] given the shortlist's order ([`shortlist_order`]).
pub fn text_summary_in_order(
    summary: &SelectSummary,
    pool: &PoolColumns<'_>,
    order: &[usize],
) -> String {
    let top: Vec<&str> = order
        .iter()
        .take(TOP_SHOWN)
        .map(|&j| pool.ids[j].as_str())
        .collect();
    summary_text(summary, &top)
}

/// Ids shown from the top of shortlist.csv in the printed summary.
pub const TOP_SHOWN: usize = 10;

/// [`text_summary`] of a streamed selection, which hands over the top of the shortlist
/// (at most [`TOP_SHOWN`] ids, best first) instead of per-unit results.
pub fn text_summary_of_top(summary: &SelectSummary, top: &[String]) -> String {
    let top: Vec<&str> = top.iter().map(String::as_str).collect();
    summary_text(summary, &top)
}

fn summary_text(summary: &SelectSummary, top: &[&str]) -> String {
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
                "  WARNING: the fitted weights fail {} check{} of high concern ({}; details \
                 below, worst first): read them before using this shortlist",
                severe.len(),
                if severe.len() == 1 { "" } else { "s" },
                severe.join(", ")
            );
        }
    }
    if let Some(rule) = &s.threshold_rule {
        let _ = writeln!(
            out,
            "  interesting units: {}; the shortlist holds the units likely to be so",
            rule.words()
        );
    }
    if let Some(statement) = &s.draw_statement {
        let _ = writeln!(
            out,
            "  the shortlist depends on a random draw (concern: {}): {statement}",
            s.draw_level.unwrap_or(Level::Medium).word()
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
        let _ = writeln!(
            out,
            "  top of shortlist.csv (best predicted first): {}{}",
            top.join(", "),
            if s.selected_count > top.len() {
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
    /// [`SCHEMA_VERSION`].
    pub schema_version: u32,
    pub tool: ToolInfo,
    /// The command line of the run (argv); empty when not run from the command line.
    pub command_line: Vec<String>,
    pub inputs: ShiftInputs,
    /// The column names used; null when not known.
    pub columns: Option<Columns>,
    /// The warnings (`warnings`, below) in the shape every output shares.
    pub warning_details: Vec<Warning>,
    #[serde(flatten)]
    pub shift: ShiftSection,
}

/// Build `shift.json`'s content (`command_line` and `columns` are the caller's to fill).
pub fn shift_report(section: ShiftSection, inputs: ShiftInputs) -> ShiftReport {
    ShiftReport {
        schema_version: SCHEMA_VERSION,
        tool: tool_info(),
        command_line: Vec::new(),
        inputs,
        columns: None,
        warning_details: section
            .summary
            .warnings
            .iter()
            .map(ShiftWarning::to_warning)
            .collect(),
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

/// One shift warning as a line: the diagnostic, its level of concern, value and
/// threshold, and what it means for the shortlist.
pub fn warning_line(w: &ShiftWarning) -> String {
    format!(
        "{} (concern: {}; value {}, threshold {}): {}",
        w.diagnostic,
        w.level.word(),
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
            "{} (reliable below {}): {}",
            shown(s.khat),
            shown(s.khat_threshold),
            crate::shift::warnings::khat_reading(
                s.khat,
                s.khat_threshold,
                s.weights.largest_weight_share,
                s.ess,
                s.calibration_rows
            )
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

    /// The rows written directly are byte for byte what the csv crate's writer (the
    /// reference, crates.io `csv` 1.x with its default quoting) writes for the same fields,
    /// on ids and kept cells holding every byte the quoting rule looks at.
    #[test]
    fn rows_written_directly_match_the_csv_writer() {
        let awkward = [
            "",
            "plain",
            "a,b",
            "say \"hi\"",
            "\"",
            "line\nbreak",
            "cr\rhere",
            "\r\n",
            " lead",
            "tail ",
            "tab\there",
            "#hash",
            "'single'",
            "é ü 数",
            ",,,",
            "\"\"",
            "x\"",
            "semi;colon",
        ];
        let mut cells = RowCells::new();
        let mut direct = Vec::new();
        // Flexible: the two kinds of rows differ in length; quoting is the default's.
        let mut reference = csv::WriterBuilder::new()
            .flexible(true)
            .from_writer(Vec::new());
        for (i, id) in awkward.iter().enumerate() {
            let kept: Vec<String> = vec![
                awkward[(i + 3) % awkward.len()].to_string(),
                awkward[(i * 7 + 1) % awkward.len()].to_string(),
            ];
            let reason = (i % 2 == 0).then_some(awkward[(i + 5) % awkward.len()]);
            let row = CandidateRow {
                id,
                score: -1.5e-300 * i as f64,
                weight: 1.0 / (i as f64 + 0.5),
                p_value: f64::from(u8::try_from(i).unwrap()) / 17.0,
                selected: i % 3 == 0,
                conditional: (i % 4 != 0).then_some((i % 5 == 0, i * 1001)),
                unreachable_reason: reason,
                selection_probability: if i == 1 { f64::NAN } else { 0.25 },
                q_value: if i == 2 { f64::INFINITY } else { 1e21 },
                q_value_by: (i % 2 == 1).then_some(0.3),
                unreliable: i == 4,
                prediction: -0.0,
                shortlist_rank: (i % 3 == 0).then_some(i + 1),
                kept: &kept,
            };
            cells.candidate_line(&row, &mut direct);
            let mut record = csv::ByteRecord::new();
            cells.candidate(&row, &mut record);
            reference.write_byte_record(&record).unwrap();
            let short = ShortlistRow {
                rank: i + 1,
                id,
                prediction: 7.25,
                p_value: 1e-7,
                q_value: 0.5,
                selection_probability: 1.0,
                weight: 2.0,
                kept: &kept,
            };
            cells.shortlist_line(&short, &mut direct);
            let mut record = csv::ByteRecord::new();
            cells.shortlisted(&short, &mut record);
            reference.write_byte_record(&record).unwrap();
        }
        let reference = reference.into_inner().unwrap();
        assert_eq!(
            String::from_utf8(direct).unwrap(),
            String::from_utf8(reference).unwrap()
        );
    }

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

    /// The de-duplication in [`add_shift`] recognises the selection's warnings by their
    /// codes; this pins those codes to what `crate::selection::pipeline` writes.
    #[test]
    fn selection_warning_codes_match_the_selection_module() {
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
        for (code, _) in REPEATED_BY_SHIFT {
            assert!(
                o.warnings.iter().any(|x| x.code == code),
                "{code}: {:#?}",
                o.warnings
            );
        }
        // Objects and lines stay parallel in the summary.
        let summary = select_summary(&o, RunInputs::default());
        assert_eq!(summary.warnings.len(), summary.warning_details.len());
        for (line, w) in summary.warnings.iter().zip(&summary.warning_details) {
            assert_eq!(line, &w.line());
        }
    }

    /// A pool of four units, two selected, predictions with a tie, for the output tables.
    fn four_unit_outcome() -> SelectionOutcome {
        // 19 inactive labeled units (scores 0.5 - mu in [-0.45, 0.45]); BH at 0.2 with
        // conservative p-values selects the pool units scoring below every labeled score
        // (the hand example of `selection::pipeline`'s tests).
        let y = vec![0.0; 19];
        let mu: Vec<f64> = (1..=19).map(|i| i as f64 / 20.0).collect();
        let options = SelectOptions {
            fdr: 0.2,
            procedure: crate::selection::pipeline::Procedure::Bh,
            pvalues: Some(crate::conformal::pvalue::PValueKind::Conservative),
            ..SelectOptions::default()
        };
        run_selection(
            &options,
            LabeledInput {
                outcome: &y,
                prediction: &mu,
                thresholds: Thresholds::Constant(0.5),
                weights: None,
            },
            PoolInput {
                prediction: &[0.2, 0.99, 0.1, 0.995],
                thresholds: Thresholds::Constant(0.5),
                weights: None,
            },
        )
        .unwrap()
    }

    #[test]
    fn shortlist_order_is_best_first_with_ties_in_input_order() {
        let prediction = [5.0, 7.0, 7.0, 1.0, 9.0];
        let selected = [true, true, true, false, true];
        assert_eq!(
            shortlist_order(&prediction, &selected, Direction::Above),
            [4, 1, 2, 0]
        );
        assert_eq!(
            shortlist_order(&prediction, &selected, Direction::Below),
            [0, 1, 2, 4]
        );
        assert!(shortlist_order(&prediction, &[false; 5], Direction::Above).is_empty());
    }

    #[test]
    fn shortlist_and_candidates_carry_kept_cells_verbatim() {
        let o = four_unit_outcome();
        assert_eq!(o.selected, [false, true, false, true]);
        let ids: Vec<String> = ["a", "b", "c", "d"].map(String::from).to_vec();
        let prediction = [0.2, 0.99, 0.1, 0.995];
        let kept = KeptColumns {
            names: vec!["smiles".to_string(), "score".to_string()],
            values: ["C1=CC", "x", "CC(=O)O, salt", "y", "N", "z", "O\"q", "w"]
                .map(String::from)
                .to_vec(),
        };
        let pool = PoolColumns {
            ids: &ids,
            prediction: &prediction,
            kept: &kept,
            direction: Direction::Above,
        };
        let bytes = shortlist_csv(&pool, &o);
        let mut reader = csv::Reader::from_reader(&bytes[..]);
        let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
        // A kept column named like one of ours is renamed `input_NAME`.
        assert_eq!(
            header,
            [
                "rank",
                "id",
                "prediction",
                "p_value",
                "q_value",
                "selection_probability",
                "weight",
                "smiles",
                "input_score"
            ]
        );
        let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
        // d (0.995) before b (0.99); cells with commas and quotes come back verbatim.
        assert_eq!((&rows[0][0], &rows[0][1]), ("1", "d"));
        assert_eq!(&rows[0][7], "O\"q");
        assert_eq!((&rows[1][0], &rows[1][1]), ("2", "b"));
        assert_eq!(&rows[1][7], "CC(=O)O, salt");
        // p = 1/20 for both (hand computation), q = BH-adjusted 0.05 * 4 / 2 = 0.1.
        assert_eq!(rows[1][3].parse::<f64>().unwrap(), 0.05);
        assert!((rows[1][4].parse::<f64>().unwrap() - 0.1).abs() < 1e-15);
        assert_eq!(rows[1][5].parse::<f64>().unwrap(), 1.0);

        let bytes = candidates_csv(&pool, &o, false);
        let mut reader = csv::Reader::from_reader(&bytes[..]);
        let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
        assert_eq!(header[..CANDIDATES_COLUMNS.len()], CANDIDATES_COLUMNS);
        assert_eq!(
            header[CANDIDATES_COLUMNS.len()..],
            ["smiles", "input_score"]
        );
        let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
        let column = |name: &str| header.iter().position(|h| h == name).unwrap();
        let ranks: Vec<&str> = rows.iter().map(|r| &r[column("shortlist_rank")]).collect();
        assert_eq!(ranks, ["", "2", "", "1"]);
        // BH has no first step: the conditional-only cells are empty, not missing.
        assert!(rows.iter().all(|r| r[column("first_step")].is_empty()));
        assert!(rows
            .iter()
            .all(|r| r[column("conditional_count")].is_empty()));
        assert_eq!(&rows[2][column("smiles")], "N");
        assert_eq!(rows[3][column("prediction")].parse::<f64>().unwrap(), 0.995);
    }

    #[test]
    fn empty_shortlist_is_a_header() {
        let mut o = four_unit_outcome();
        o.selected = vec![false; 4];
        let ids: Vec<String> = ["a", "b", "c", "d"].map(String::from).to_vec();
        let kept = KeptColumns::default();
        let pool = PoolColumns {
            ids: &ids,
            prediction: &[0.2, 0.99, 0.1, 0.995],
            kept: &kept,
            direction: Direction::Below,
        };
        let text = String::from_utf8(shortlist_csv(&pool, &o)).unwrap();
        assert_eq!(text, format!("{}\n", SHORTLIST_COLUMNS.join(",")));
    }

    #[test]
    fn threshold_rules_in_the_users_words() {
        let below = ThresholdRule::new(Some(100.0), None, Direction::Below);
        assert_eq!(below.words(), "outcome below 100");
        assert_eq!(
            serde_json::to_value(&below).unwrap(),
            serde_json::json!({"value": 100.0, "direction": "below"})
        );
        let column = ThresholdRule::new(None, Some("c"), Direction::Above);
        assert_eq!(column.words(), "outcome above the threshold in column `c`");
        assert_eq!(
            serde_json::to_value(&column).unwrap(),
            serde_json::json!({"column": "c", "direction": "above"})
        );
        assert_eq!(
            ThresholdRule::new(Some(6.5), None, Direction::Above).words(),
            "outcome above 6.5"
        );
    }

    #[test]
    fn text_summary_speaks_the_users_direction_and_names_the_shortlist() {
        let o = four_unit_outcome();
        let ids: Vec<String> = ["a", "b", "c", "d"].map(String::from).to_vec();
        let prediction = [0.2, 0.99, 0.1, 0.995];
        let kept = KeptColumns::default();
        let mut summary = select_summary(&o, RunInputs::default());
        summary.threshold_rule = Some(ThresholdRule::new(Some(0.5), None, Direction::Below));
        let pool = PoolColumns {
            ids: &ids,
            prediction: &prediction,
            kept: &kept,
            direction: Direction::Below,
        };
        let text = text_summary(&summary, &pool, &o);
        assert!(
            text.contains("interesting units: outcome below 0.5"),
            "{text}"
        );
        // Lower is better: b (0.99) before d (0.995).
        assert!(
            text.contains("top of shortlist.csv (best predicted first): b, d\n"),
            "{text}"
        );
    }

    #[test]
    fn unreachable_reason_reads_at_three_digits() {
        let mut o = four_unit_outcome();
        o.unreachable[0] = true;
        o.weights[0] = 33.302;
        let reason = unselectable_reason(&o, 0);
        // W = 19 labeled units of weight 1; 33.302 / (19 + 33.302) = 0.6367.
        assert!(reason.contains("with weight 33.3 "), "{reason}");
        assert!(reason.contains("go below 0.637 "), "{reason}");
        assert!(!reason.contains("e1"), "{reason}");
    }
}
