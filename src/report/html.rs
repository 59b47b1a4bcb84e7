//! `report.html`: one self-contained page a reviewer can read without the tool — inline CSS,
//! the shift plots as inline SVG (from `crate::report::plots`), no external assets, no JavaScript.
//!
//! Sections, in this order: title and one-line verdict; warnings (worst first); settings;
//! the shortlist (or, for an audit, the audited list) with the plot of the selection; shift
//! diagnostics with plots when weights were fitted; extra sections a command adds (the level
//! curve, a rescreen's changes, the demo's comparison with the truth); the cautions
//! ([`CAUTIONS`], verbatim); the method, with its sources.
//!
//! For people and for print: tables are in the page flow (no scroll boxes); a long table
//! shows its first [`TABLE_ROWS_SHOWN`] rows and names the file that has them all; plots are
//! shown at the size they are drawn (`crate::report::plots`: text at least 11 px at 100%
//! zoom) and scroll sideways on a narrow screen instead of shrinking; print CSS lets tables
//! run over pages with their header repeated, and fits plots to the paper.
//!
//! Everything here builds a `String`; writing it (atomically, with the other outputs) is the
//! caller's job (`crate::io::OutputSet`). Every piece of user-provided text (ids, file
//! names, column names) goes through [`escape`].

use std::fmt::Write as _;

use crate::conformal::score::Direction;
use crate::report::plots::{
    balance_svg, overlap_svg, selection_svg, weights_svg, PlotError, SelectionPlot,
    SELECTION_PLOT_MARKS,
};
use crate::report::SelectSummary;
use crate::report::{shift_diagnostics_text, ShiftReport, ShiftSection, CAUTIONS};
use crate::selection::pipeline::SelectionOutcome;
use crate::shift::{Severity, ShiftWarning};
use crate::workflows::rescreen::{Change, ChangeCounts, UnitChange};

/// Rows a long table shows in the report (the shortlist, an audited list, a rescreen's
/// changes); the file named in [`Table::rows_in`] has every row.
pub const TABLE_ROWS_SHOWN: usize = 100;
/// Rows of the shortlist table shown in the report (the same cap as every long table).
pub const SHORTLIST_ROWS_SHOWN: usize = TABLE_ROWS_SHOWN;
/// Bins of the weight histogram (as in `weighbridge shift`).
const WEIGHT_PLOT_BINS: usize = 40;

/// Escape text for HTML element content and double-quoted attribute values.
///
/// # Examples
/// ```
/// use weighbridge::report::html::escape;
/// assert_eq!(escape("<b>&\"'"), "&lt;b&gt;&amp;&quot;&#39;");
/// ```
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// One warning as the report lists it.
#[derive(Clone, Debug)]
pub struct Finding {
    /// The diagnostic or check that raised it (e.g. `khat`, `unreachable units`).
    pub diagnostic: String,
    /// `severe`, `caution`, or `note` for the selection's own warnings.
    pub severity: String,
    /// The value and threshold as text (a dash when the message states them itself).
    pub value: String,
    pub threshold: String,
    /// What it means for the shortlist.
    pub meaning: String,
}

impl Finding {
    /// A shift warning: diagnostic, severity, value, threshold, meaning.
    pub fn from_shift(w: &ShiftWarning) -> Self {
        Finding {
            diagnostic: w.diagnostic.clone(),
            severity: match w.severity {
                Severity::Severe => "severe".to_string(),
                Severity::Caution => "caution".to_string(),
            },
            value: number(w.value),
            threshold: number(w.threshold),
            meaning: w.message.clone(),
        }
    }

    /// A warning object (`warning_details`): its diagnostic, its level on the ordered
    /// scale (low < medium < high), value, threshold and message.
    pub fn from_warning(w: &crate::warning::Warning) -> Self {
        let dash = || "\u{2014}".to_string();
        Finding {
            diagnostic: if w.title.is_empty() {
                w.diagnostic.clone()
            } else {
                w.title.clone()
            },
            severity: w.level.word().to_string(),
            value: w.value.map_or_else(dash, number),
            threshold: w.threshold.map_or_else(dash, number),
            meaning: w.message.clone(),
        }
    }

    /// A warning given as one line "name: message" (the selection's and the audit's own
    /// warnings, which state their values in the message).
    pub fn from_line(line: &str) -> Self {
        let (diagnostic, meaning) = match line.split_once(": ") {
            Some((name, rest)) if name.len() <= 40 => (name.to_string(), rest.to_string()),
            _ => ("selection".to_string(), line.to_string()),
        };
        Finding {
            diagnostic,
            severity: "warning".to_string(),
            value: "\u{2014}".to_string(),
            threshold: "\u{2014}".to_string(),
            meaning,
        }
    }
}

/// A table of text cells (escaped when rendered), always in the page flow.
#[derive(Clone, Debug, Default)]
pub struct Table {
    pub header: Vec<String>,
    pub rows: Vec<Vec<String>>,
    /// A sentence shown under the table.
    pub note: Option<String>,
    /// No longer used: tables are never put in a scroll box (they were unreadable and did
    /// not print). Kept so that callers building a `Table` keep compiling.
    pub scroll: bool,
    /// The file that holds every row. When set, the page shows the first
    /// [`TABLE_ROWS_SHOWN`] rows and says that the rest are in this file; when `None`,
    /// every row is shown.
    pub rows_in: Option<String>,
}

/// A section of plain paragraphs, figures and tables (in that order).
#[derive(Clone, Debug, Default)]
pub struct Part {
    /// HTML id (letters and dashes) and the heading.
    pub id: String,
    pub heading: String,
    pub paragraphs: Vec<String>,
    pub tables: Vec<Table>,
    /// Inline SVG figures (from `crate::report::plots`), shown after the paragraphs and
    /// before the tables.
    pub figures: Vec<String>,
}

/// The pool as the shortlist table and the selection plot show it, beside the selection
/// outcome (which has no predictions or ids).
#[derive(Clone, Copy, Debug)]
pub struct PoolView<'a> {
    /// Pool ids, in the order of the selection outcome.
    pub ids: &'a [String],
    /// The model's prediction per pool unit, in the user's units.
    pub predictions: &'a [f64],
    /// The outcome threshold when one value holds for every unit (`--threshold`); `None`
    /// with per-unit thresholds.
    pub threshold: Option<f64>,
    /// Which side of the threshold is interesting; "best first" follows it.
    pub direction: Direction,
}

/// The shift diagnostics with their three plots (SVG text).
#[derive(Clone, Debug)]
pub struct ShiftPart {
    pub section: ShiftSection,
    pub overlap_svg: String,
    pub weights_svg: String,
    pub balance_svg: String,
}

/// Draw the three shift plots for a report.
///
/// # Errors
/// As the plot functions of `crate::report::plots`.
pub fn shift_part(
    section: &ShiftSection,
    calibration_weights: &[f64],
    pool_weights: &[f64],
) -> Result<ShiftPart, PlotError> {
    let s = &section.summary;
    Ok(ShiftPart {
        section: section.clone(),
        overlap_svg: overlap_svg(&s.overlap)?,
        weights_svg: weights_svg(calibration_weights, pool_weights, WEIGHT_PLOT_BINS)?,
        balance_svg: balance_svg(&s.balance)?,
    })
}

/// Where the run's weights came from, for the method section.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum WeightsMethod {
    /// Every weight 1.
    None,
    /// Given in a column (text says which).
    Given(String),
    /// Fitted by the domain classifier.
    Fitted,
}

/// A whole report.
#[derive(Clone, Debug)]
pub struct Report {
    pub title: String,
    pub verdict: String,
    /// Worst first.
    pub warnings: Vec<Finding>,
    /// (setting, value) pairs.
    pub settings: Vec<(String, String)>,
    /// The shortlist (select, demo) or the audited list (audit); `None` for `shift`.
    pub main: Option<Part>,
    pub shift: Option<ShiftPart>,
    /// Extra sections (the demo's comparison with the truth), after the diagnostics.
    pub extra: Vec<Part>,
    pub weights_method: WeightsMethod,
    /// The selection procedure's name (`conditional`, `bh`, `by`), if the run selected.
    pub procedure: Option<String>,
}

/// A number for people (the same form as the text summaries).
use crate::report::summary::shown as number;

/// A table cell: 3 decimals (so a column's numbers line up), the form of [`number`] when
/// very large or very small.
fn cell_number(v: f64) -> String {
    if v.is_finite() && (v == 0.0 || (v.abs() >= 1e-3 && v.abs() < 1e5)) {
        format!("{v:.3}")
    } else {
        number(v)
    }
}

/// A p-value for people: 4 significant digits.
fn p_value_text(p: f64) -> String {
    if p != 0.0 && p.abs() < 1e-3 {
        format!("{p:.3e}")
    } else {
        format!("{p:.4}")
    }
}

/// The settings rows of a selection summary.
pub fn selection_settings(summary: &SelectSummary) -> Vec<(String, String)> {
    let s = summary;
    let mut rows = vec![
        ("labeled file".to_string(), s.inputs.labeled_file.clone()),
        ("pool file".to_string(), s.inputs.pool_file.clone()),
        (
            "interesting units".to_string(),
            s.threshold_rule
                .as_ref()
                .map_or_else(|| s.inputs.threshold.clone(), |rule| rule.words()),
        ),
        ("target FDR q".to_string(), number(s.fdr)),
        ("procedure".to_string(), s.procedure.to_string()),
        (
            "pruning".to_string(),
            s.pruning
                .unwrap_or("none (not conditional calibration)")
                .to_string(),
        ),
        ("p-values".to_string(), s.pvalues.to_string()),
        ("score".to_string(), s.score.to_string()),
        ("seed".to_string(), s.seed.to_string()),
        ("weights".to_string(), s.inputs.weights.clone()),
        ("labeled units".to_string(), s.n_labeled.to_string()),
        ("pool units".to_string(), s.n_pool.to_string()),
        (
            "tool".to_string(),
            format!("{} {}", s.tool.name, s.tool.version),
        ),
    ];
    if let Some(draw) = s.pruning_draw {
        rows.push(("pruning draw".to_string(), number(draw)));
    }
    if let Some(shift) = &s.shift {
        rows.push(("classifier features".to_string(), shift.features.join(", ")));
        rows.push(("weight fit".to_string(), shift.fit_rows_note.clone()));
    }
    rows
}

/// Order of the shortlist: best prediction first (highest, or lowest with
/// `Direction::Below`), ties by p-value, then input order (the order of shortlist.csv: the
/// model's ranking; among units at the p-value floor, p-values differ only by weight).
pub fn best_first(pool: &PoolView<'_>, outcome: &SelectionOutcome) -> Vec<usize> {
    let mut chosen: Vec<usize> = (0..pool.ids.len())
        .filter(|&j| outcome.selected[j])
        .collect();
    chosen.sort_by(|&a, &b| {
        let (pa, pb) = (pool.predictions[a], pool.predictions[b]);
        let by_prediction = match pool.direction {
            Direction::Above => pb.total_cmp(&pa),
            Direction::Below => pa.total_cmp(&pb),
        };
        by_prediction
            .then(outcome.p_values[a].total_cmp(&outcome.p_values[b]))
            .then(a.cmp(&b))
    });
    chosen
}

/// The plot of the selection (prediction against weight) and the sentence that says what
/// it marks; `None` when there is nothing to draw.
pub fn selection_figure(
    summary: &SelectSummary,
    pool: &PoolView<'_>,
    outcome: &SelectionOutcome,
) -> Option<(String, String)> {
    let q = outcome.settings.fdr;
    let w = outcome.total_labeled_weight;
    let plot = SelectionPlot {
        predictions: pool.predictions,
        weights: &outcome.weights,
        p_values: &outcome.p_values,
        selected: &outcome.selected,
        first_step: outcome.first_step.as_deref(),
        threshold: pool.threshold,
        // w / (W + w) > q  <=>  w > q W / (1 - q).
        unreachable_above: (q < 1.0).then(|| q * w / (1.0 - q)),
    };
    let (svg, marks) = selection_svg(&plot).ok()?;
    let kinds = [
        "selected",
        "passed the first step but pruned",
        "not selected",
    ];
    let counted: Vec<String> = (0..3)
        .filter(|&k| marks.total[k] > 0)
        .map(|k| {
            if marks.shown[k] == marks.total[k] {
                format!("all {} {}", marks.total[k], kinds[k])
            } else {
                format!("{} of the {} {}", marks.shown[k], marks.total[k], kinds[k])
            }
        })
        .collect();
    let mut text = format!(
        "The plot shows each pool unit's prediction against its {} ({}). It marks {}",
        if crate::report::plots::weights_vary(&outcome.weights) {
            "weight (log scale): units far to the right sit where the labeled set has little \
             weight, and need a better prediction to be selected"
        } else {
            "p-value (log scale; every weight is the same)"
        },
        if summary.first_step_count.is_some() {
            "filled: selected; hollow: passed the first step of conditional calibration, \
             removed by the pruning draw; grey: not selected"
        } else {
            "filled: selected; grey: not selected"
        },
        counted.join(", ")
    );
    if marks.complete {
        text.push('.');
    } else {
        let _ = write!(
            text,
            ": at most {SELECTION_PLOT_MARKS} marks are drawn, so a group too large for its \
             share shows evenly spaced units in prediction order (candidates.csv has every \
             unit)."
        );
    }
    if let Some(c) = pool.threshold {
        let _ = write!(
            text,
            " The horizontal line is the outcome threshold {} (a unit is interesting when its \
             outcome is {} it).",
            number(c),
            pool.direction.word()
        );
    }
    Some((svg, text))
}

/// The shortlist section: the selected units best prediction first ([`best_first`]), the
/// first [`TABLE_ROWS_SHOWN`] in the table, and the plot of the selection.
pub fn shortlist_part(
    summary: &SelectSummary,
    pool: &PoolView<'_>,
    outcome: &SelectionOutcome,
) -> Part {
    let chosen = best_first(pool, outcome);
    let shown = chosen.len().min(TABLE_ROWS_SHOWN);
    let mut paragraphs = vec![format!(
        "{} of {} pool units selected at FDR {}. {} candidates.csv in the same folder lists \
         every pool unit with its score, weight, p-value and, where known, why it could never \
         be selected.",
        summary.selected_count,
        summary.n_pool,
        number(summary.fdr),
        if chosen.len() > shown {
            format!("The table shows the first {shown}, best prediction first;")
        } else {
            "The table shows all of them, best prediction first;".to_string()
        }
    )];
    if let Some(first) = summary.first_step_count {
        paragraphs.push(format!(
            "Passed the first step of conditional calibration: {first}. BH on the weighted {} \
             p-values would select {}{}.",
            summary.bh_pvalues,
            summary.bh_selected_count,
            if summary.weights_vary {
                " (no finite-sample guarantee when weights vary)"
            } else {
                ""
            }
        ));
    }
    paragraphs.push(format!(
        "Never selectable at this level (weight too large for the labeled set): {}.",
        summary.unreachable_count
    ));
    paragraphs.push(
        "Selection probability: the chance that the unit is on the shortlist over the \
         pruning draw, with this run's p-values held fixed (1 for every selected unit when \
         the shortlist does not depend on the draw). q-value: the smallest FDR level at \
         which BH on these p-values would select the unit."
            .to_string(),
    );
    let mut figures = Vec::new();
    if let Some((svg, text)) = selection_figure(summary, pool, outcome) {
        paragraphs.push(text);
        figures.push(svg);
    }
    let rows = chosen
        .iter()
        .enumerate()
        .map(|(rank, &j)| {
            vec![
                (rank + 1).to_string(),
                pool.ids[j].clone(),
                cell_number(pool.predictions[j]),
                p_value_text(outcome.p_values[j]),
                p_value_text(outcome.q_values[j]),
                format!("{:.3}", outcome.draw.selection_probability[j]),
                cell_number(outcome.weights[j]),
                cell_number(outcome.scores[j]),
            ]
        })
        .collect();
    Part {
        figures,
        id: "shortlist".to_string(),
        heading: "Shortlist".to_string(),
        paragraphs,
        tables: vec![Table {
            header: [
                "rank",
                "id",
                "prediction",
                "p-value",
                "q-value",
                "selection probability",
                "weight",
                "score",
            ]
            .map(String::from)
            .to_vec(),
            rows,
            note: None,
            scroll: false,
            rows_in: Some("shortlist.csv".to_string()),
        }],
    }
}

/// A rescreen's changes: counts, the notes of the comparison, and the units newly selected
/// (first, best p-value first) or dropped (then), each with why; the first
/// [`TABLE_ROWS_SHOWN`] in the table, every unit in changes.csv.
pub fn changes_part(rows: &[UnitChange], counts: &ChangeCounts, notes: &[String]) -> Part {
    let mut paragraphs = vec![format!(
        "Against the previous run: the pool went from {} to {} units ({} new, {} no longer \
         in it); the shortlist from {} to {} units. Kept {}; newly selected {} units that \
         were in the pool before and {} new units; dropped {}.",
        counts.previous_pool,
        counts.current_pool,
        counts.new_units,
        counts.left_pool,
        counts.previously_selected,
        counts.selected,
        counts.kept,
        counts.newly_selected,
        counts.new_selected,
        counts.dropped
    )];
    if counts.dropped > 0 {
        paragraphs.push(format!(
            "Why units dropped (a unit can have several reasons): its weight moved ({}), its \
             score moved ({}), its p-value moved ({}), only the pool grew so the BH line q k / \
             m got stricter ({}).",
            counts.dropped_weight_moved,
            counts.dropped_score_moved,
            counts.dropped_p_value_moved,
            counts.dropped_pool_grew
        ));
    }
    paragraphs.extend(notes.iter().cloned());
    let rank = |c: Change| match c {
        Change::NewlySelected | Change::NewSelected => 0,
        Change::Dropped => 1,
        _ => 2,
    };
    let mut changed: Vec<&UnitChange> = rows.iter().filter(|r| rank(r.change) < 2).collect();
    changed.sort_by(|a, b| {
        rank(a.change).cmp(&rank(b.change)).then(
            a.p_value
                .unwrap_or(f64::INFINITY)
                .total_cmp(&b.p_value.unwrap_or(f64::INFINITY)),
        )
    });
    let p = |v: Option<f64>| v.map_or("\u{2014}".to_string(), p_value_text);
    let table = Table {
        header: [
            "id",
            "change",
            "why",
            "previous p-value",
            "p-value",
            "new, poorly covered",
        ]
        .map(String::from)
        .to_vec(),
        rows: changed
            .iter()
            .map(|r| {
                vec![
                    r.id.clone(),
                    r.change.words().to_string(),
                    if r.why.is_empty() {
                        "\u{2014}".to_string()
                    } else {
                        r.why.clone()
                    },
                    p(r.previous_p_value),
                    p(r.p_value),
                    if r.new_poorly_covered { "yes" } else { "no" }.to_string(),
                ]
            })
            .collect(),
        note: changed
            .is_empty()
            .then(|| "No unit was newly selected or dropped.".to_string()),
        scroll: false,
        rows_in: Some("changes.csv".to_string()),
    };
    Part {
        id: "changes".to_string(),
        heading: "Changes since the previous run".to_string(),
        paragraphs,
        tables: vec![table],
        figures: Vec::new(),
    }
}

/// The verdict line of a selection.
pub fn selection_verdict(summary: &SelectSummary) -> String {
    let severe = summary.shift.as_ref().map_or(0, |s| {
        s.summary
            .warnings
            .iter()
            .filter(|w| w.severity == Severity::Severe)
            .count()
    });
    let mut verdict = format!(
        "{}{} of {} pool units selected at FDR {}",
        summary
            .unreliable_weights
            .as_ref()
            .map(|m| format!("{} ", m.statement))
            .unwrap_or_default(),
        summary.selected_count,
        summary.n_pool,
        number(summary.fdr)
    );
    if let Some(statement) = &summary.draw_statement {
        let _ = write!(
            verdict,
            ". The shortlist depends on a random draw: {}",
            statement.trim_end_matches('.')
        );
    }
    if severe > 0 {
        let _ = write!(
            verdict,
            "; the fitted weights fail {severe} severe check{}: read the warnings before \
             using this shortlist",
            if severe == 1 { "" } else { "s" }
        );
    } else if !summary.warnings.is_empty() {
        verdict.push_str("; see the warnings below");
    } else {
        verdict.push_str("; no warnings");
    }
    verdict
}

/// The draw, the resolution diagnostic and the level curve (table and plot), when the
/// summary has a level curve.
pub fn level_curve_part(summary: &SelectSummary) -> Option<Part> {
    let curve = summary.level_curve.as_ref()?;
    let mut paragraphs = Vec::new();
    if let Some(statement) = &summary.draw_statement {
        paragraphs.push(format!(
            "The shortlist depends on a random draw: {statement}"
        ));
    }
    paragraphs.push(summary.resolution.reading.clone());
    if let Some(note) = summary.level_curve_note {
        paragraphs.push(note.to_string());
    }
    let rows = curve
        .iter()
        .map(|p| {
            vec![
                number(p.fdr),
                format!("{:.1}", p.conditional_expected_count),
                format!("{:.2}", p.conditional_empty_probability),
                if p.conditional_fixed { "no" } else { "yes" }.to_string(),
                p.bh_count.to_string(),
            ]
        })
        .collect();
    let figures = crate::report::plots::level_curve_svg(curve)
        .map(|svg| vec![svg])
        .unwrap_or_default();
    Some(Part {
        id: "level-curve".to_string(),
        heading: "The draw and the level curve".to_string(),
        paragraphs,
        tables: vec![Table {
            header: vec![
                "FDR level".to_string(),
                "conditional: expected size".to_string(),
                "conditional: empty probability".to_string(),
                "depends on the draw".to_string(),
                "BH (randomized p-values)".to_string(),
            ],
            rows,
            note: None,
            scroll: false,
            rows_in: None,
        }],
        figures,
    })
}

/// A report of a selection (`select`, `rescreen`, the demo); `shift` when weights were
/// fitted. A command adds its own sections to `extra` (after the level curve).
pub fn selection_report(
    summary: &SelectSummary,
    pool: &PoolView<'_>,
    outcome: &SelectionOutcome,
    shift: Option<ShiftPart>,
    weights_method: WeightsMethod,
) -> Report {
    // The warning objects (`SelectSummary::add_warning` keeps them beside the strings):
    // one ordered scale, worst first.
    let warnings: Vec<Finding> = summary
        .warning_details
        .iter()
        .map(Finding::from_warning)
        .collect();
    Report {
        title: "weighbridge selection report".to_string(),
        verdict: selection_verdict(summary),
        warnings,
        settings: selection_settings(summary),
        main: Some(shortlist_part(summary, pool, outcome)),
        shift,
        extra: level_curve_part(summary).into_iter().collect(),
        weights_method,
        procedure: Some(summary.procedure.to_string()),
    }
}

/// A report of a shift assessment (`shift`): no shortlist.
pub fn shift_report_html(report: &ShiftReport, part: ShiftPart) -> Report {
    let section = &report.shift;
    let s = &section.summary;
    let severe = s
        .warnings
        .iter()
        .filter(|w| w.severity == Severity::Severe)
        .count();
    let verdict = format!(
        "Domain-classifier AUC {} (0.5 = no detectable shift), effective sample size {:.1}% \
         of the labeled rows; {}",
        number(s.auc),
        100.0 * s.ess_fraction,
        match (severe, s.warnings.len()) {
            (0, 0) => "no diagnostic crossed its threshold".to_string(),
            (0, n) => format!("{n} caution{}", if n == 1 { "" } else { "s" }),
            (k, n) => format!("{k} severe warning{} of {n}", if k == 1 { "" } else { "s" }),
        }
    );
    let settings = vec![
        (
            "labeled file".to_string(),
            report.inputs.labeled_file.clone(),
        ),
        ("pool file".to_string(), report.inputs.pool_file.clone()),
        ("features".to_string(), section.features.join(", ")),
        ("weight fit".to_string(), section.fit_rows_note.clone()),
        ("level for unreachable units".to_string(), number(s.fdr)),
        (
            "tool".to_string(),
            format!("{} {}", report.tool.name, report.tool.version),
        ),
    ];
    Report {
        title: "weighbridge shift report".to_string(),
        verdict,
        warnings: s.warnings.iter().map(Finding::from_shift).collect(),
        settings,
        main: None,
        shift: Some(part),
        extra: Vec::new(),
        weights_method: WeightsMethod::Fitted,
        procedure: None,
    }
}

const STYLE: &str = "
body { font-family: sans-serif; color: #1a1a1a; max-width: 1100px; margin: 1.5em auto;
       padding: 0 1em; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; margin-top: 1.6em; }
p.verdict { font-size: 1.1em; font-weight: bold; background: #f3f3f3; padding: 0.5em 0.7em;
            border-left: 5px solid #555; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.55em; text-align: left; vertical-align: top; }
th { background: #eee; }
section#settings th { white-space: nowrap; }
div.wide { overflow-x: auto; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.word { white-space: nowrap; }
tr.severe td { background: #fde2e1; }
tr.caution td { background: #fff4d6; }
tr.warning td { background: #fff9e8; }
p.more { font-style: italic; }
figure { margin: 0.8em 0; overflow-x: auto; }
figure svg { display: block; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
pre { background: #f7f7f7; padding: 0.6em; overflow-x: auto; font-size: 0.88em; }
code, .formula { font-family: monospace; }
.formula { display: block; background: #f7f7f7; padding: 0.4em 0.6em; margin: 0.4em 0; }
@media print {
  body { max-width: none; margin: 0; padding: 0; font-size: 10pt; }
  div.wide, figure, pre { overflow: visible; }
  figure svg { max-width: 100%; height: auto; }
  figure, tr { break-inside: avoid; }
  thead { display: table-header-group; }
  h2, h3 { break-after: avoid; }
  p.verdict, tr.severe td, tr.caution td, tr.warning td, th { print-color-adjust: exact;
    -webkit-print-color-adjust: exact; }
}
";

fn is_numeric(cell: &str) -> bool {
    !cell.is_empty() && cell.trim_end_matches('%').parse::<f64>().is_ok()
}

fn table_html(out: &mut String, table: &Table) {
    let shown = match &table.rows_in {
        Some(_) => table.rows.len().min(TABLE_ROWS_SHOWN),
        None => table.rows.len(),
    };
    out.push_str("<div class=\"wide\">\n<table>\n<thead><tr>");
    for h in &table.header {
        let _ = write!(out, "<th>{}</th>", escape(h));
    }
    out.push_str("</tr></thead>\n<tbody>\n");
    for row in &table.rows[..shown] {
        out.push_str("<tr>");
        for cell in row {
            if is_numeric(cell) {
                let _ = write!(out, "<td class=\"num\">{}</td>", escape(cell));
            } else if !cell.contains(char::is_whitespace) {
                // One word (an id): kept on one line.
                let _ = write!(out, "<td class=\"word\">{}</td>", escape(cell));
            } else {
                let _ = write!(out, "<td>{}</td>", escape(cell));
            }
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</tbody>\n</table>\n</div>\n");
    if let (Some(file), true) = (&table.rows_in, shown < table.rows.len()) {
        let _ = writeln!(
            out,
            "<p class=\"more\">The first {shown} of {} rows are shown; the other {} are in {}.</p>",
            table.rows.len(),
            table.rows.len() - shown,
            escape(file)
        );
    }
    if let Some(note) = &table.note {
        let _ = writeln!(out, "<p>{}</p>", escape(note));
    }
}

fn part_html(out: &mut String, part: &Part) {
    let _ = writeln!(
        out,
        "<section id=\"{}\">\n<h2>{}</h2>",
        escape(&part.id),
        escape(&part.heading)
    );
    for p in &part.paragraphs {
        let _ = writeln!(out, "<p>{}</p>", escape(p));
    }
    for svg in &part.figures {
        let _ = writeln!(out, "<figure>{}</figure>", inline_svg(svg));
    }
    for t in &part.tables {
        table_html(out, t);
    }
    out.push_str("</section>\n");
}

/// An SVG from plotters, made fit for inline use: the XML namespace attribute is dropped
/// (the HTML parser puts `<svg>` in the SVG namespace by itself), so that the page holds no
/// URL at all.
fn inline_svg(svg: &str) -> String {
    svg.replacen(" xmlns=\"http://www.w3.org/2000/svg\"", "", 1)
        .replace("xmlns:xlink=\"http://www.w3.org/1999/xlink\"", "")
}

fn shift_html(out: &mut String, part: &ShiftPart) {
    let section = &part.section;
    let s = &section.summary;
    out.push_str("<section id=\"shift\">\n<h2>Shift diagnostics</h2>\n");
    let _ = writeln!(
        out,
        "<p>{} (the domain classifier) was fit to tell labeled rows from pool rows on {}; \
         its odds are the density-ratio weights. Each diagnostic below has a threshold; \
         crossing it raises a warning (listed at the top, worst first).</p>",
        match s.fit.classifier {
            crate::shift::ClassifierKind::Logistic => "A logistic regression",
            crate::shift::ClassifierKind::Boosted => {
                "A cross-fitted gradient-boosted tree model (each fitting row's probability \
                 from a model trained without it)"
            }
        },
        escape(&section.features.join(", "))
    );
    out.push_str("<table>\n<thead><tr><th>diagnostic</th><th>value</th></tr></thead>\n<tbody>\n");
    for line in shift_diagnostics_text(section, "").lines() {
        // `shift_diagnostics_text` pads each label to 26 characters.
        let (label, value) = match line.char_indices().nth(26) {
            Some((at, _)) => line.split_at(at),
            None => (line, ""),
        };
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td>{}</td></tr>",
            escape(label.trim()),
            escape(value.trim())
        );
    }
    out.push_str("</tbody>\n</table>\n");

    out.push_str(
        "<h3>Feature balance before and after weighting</h3>\n<p>Standardized mean difference \
         (pool minus labeled) per feature; |SMD| above the threshold is flagged (Austin \
         2009).</p>\n",
    );
    let balance = Table {
        header: ["feature", "SMD before weighting", "SMD after weighting"]
            .map(String::from)
            .to_vec(),
        rows: s
            .balance
            .iter()
            .map(|b| {
                vec![
                    b.feature.clone(),
                    number(b.smd_unweighted),
                    number(b.smd_weighted),
                ]
            })
            .collect(),
        note: Some(format!("flagged above |SMD| {}", number(s.smd_threshold))),
        scroll: false,
        rows_in: None,
    };
    table_html(out, &balance);
    let _ = writeln!(
        out,
        "<p>Weight-model adequacy: the largest weighted |SMD| on squared features is {} and on \
         pairwise products {} (flagged above {}); a large value means the classifier misses \
         part of the shift, which breaks every weighted procedure.</p>",
        number(s.adequacy.max_abs_weighted_squares),
        number(s.adequacy.max_abs_weighted_products),
        number(s.adequacy.threshold)
    );
    for (svg, caption) in [
        (
            &part.overlap_svg,
            "Overlap: the classifier's probability of \"pool\" at equal set sizes, w/(1+w), \
             for each set. Pool mass near 1 with no labeled mass there means the labeled set \
             does not cover that part of the pool.",
        ),
        (
            &part.weights_svg,
            "Weights (log10) of the calibrating labeled rows and of the pool. A long right \
             tail in the labeled weights means a few rows carry the calibration.",
        ),
        (
            &part.balance_svg,
            "|SMD| per feature before (open circles) and after (filled) weighting; the \
             vertical line marks the flag threshold.",
        ),
    ] {
        let _ = writeln!(
            out,
            "<figure>\n{}\n<figcaption>{}</figcaption>\n</figure>",
            inline_svg(svg),
            escape(caption)
        );
    }
    out.push_str("</section>\n");
}

fn method_html(out: &mut String, report: &Report) {
    out.push_str("<section id=\"method\">\n<h2>Method</h2>\n");
    out.push_str(
        "<p><b>Question.</b> For each pool unit j with threshold c<sub>j</sub>, the null \
         hypothesis is Y<sub>j</sub> &le; c<sub>j</sub> (\"not interesting\"); a selected unit \
         is claimed to have Y<sub>j</sub> &gt; c<sub>j</sub>. The false discovery rate (FDR) is \
         the expected share of selected units for which the claim is wrong.</p>\n\
         <p><b>Scores.</b> Labeled units get V<sub>i</sub> = V(X<sub>i</sub>, Y<sub>i</sub>); \
         pool units are scored at their threshold, V&#770;<sub>j</sub> = V(X<sub>j</sub>, \
         c<sub>j</sub>). The clipped score is V = +&infin; when y &gt; c and c &minus; &mu;(x) \
         otherwise (Jin &amp; Cand&egrave;s 2023); the residual score is V = y &minus; \
         &mu;(x), with &mu; the prediction model's output.</p>\n\
         <p><b>Weighted conformal p-values</b> (Tibshirani, Barber, Cand&egrave;s &amp; Ramdas \
         2019; Jin &amp; Cand&egrave;s 2023). With weights w<sub>i</sub> = w(X<sub>i</sub>) on \
         the n labeled units, W = &sum;<sub>i</sub> w<sub>i</sub>, and w<sub>j</sub> for pool \
         unit j:</p>\n\
         <span class=\"formula\">conservative: p<sub>j</sub> = ( &sum;<sub>i</sub> \
         w<sub>i</sub> 1{V<sub>i</sub> &le; V&#770;<sub>j</sub>} + w<sub>j</sub> ) / (W + \
         w<sub>j</sub>)</span>\n\
         <span class=\"formula\">randomized: p<sub>j</sub> = ( &sum;<sub>i</sub> \
         w<sub>i</sub> 1{V<sub>i</sub> &lt; V&#770;<sub>j</sub>} + U<sub>j</sub> \
         (w<sub>j</sub> + &sum;<sub>i</sub> w<sub>i</sub> 1{V<sub>i</sub> = \
         V&#770;<sub>j</sub>}) ) / (W + w<sub>j</sub>), U<sub>j</sub> ~ Uniform(0, 1) \
         (seeded)</span>\n\
         <p>With every weight 1 these are ordinary split-conformal p-values.</p>\n\
         <p><b>Benjamini&ndash;Hochberg</b> (Benjamini &amp; Hochberg 1995): with m pool units \
         and sorted p-values p<sub>(1)</sub> &le; &hellip; &le; p<sub>(m)</sub>, select the \
         k* smallest, k* = max{k : p<sub>(k)</sub> &le; q k / m}. With equal weights this \
         controls FDR &le; q (Jin &amp; Cand&egrave;s 2023); with varying weights it has no \
         finite-sample proof, though it usually stays near q.</p>\n\
         <p><b>Conditional calibration</b> (Jin &amp; Cand&egrave;s 2023, building on Fithian \
         &amp; Lei 2022) keeps FDR &le; q in finite samples under covariate shift with known \
         weights. It uses the conservative p-values. For each pool unit j it recomputes the \
         other units' p-values as if j were part of the labeled set:</p>\n\
         <span class=\"formula\">p<sub>l</sub><sup>(j)</sup> = ( &sum;<sub>i</sub> \
         w<sub>i</sub> 1{V<sub>i</sub> &lt; V&#770;<sub>l</sub>} + w<sub>j</sub> \
         1{V&#770;<sub>j</sub> &lt; V&#770;<sub>l</sub>} ) / (W + w<sub>j</sub>) for l &ne; \
         j, p<sub>j</sub><sup>(j)</sup> = 0</span>\n\
         <p>K<sub>j</sub> is the number BH at level q selects from these m p-values (at least \
         1). <b>First step:</b> R1 = {j : p<sub>j</sub> &le; q K<sub>j</sub> / m}. \
         <b>Pruning</b> with draws &xi;<sub>j</sub>: r* = max{r : #{j in R1 : \
         &xi;<sub>j</sub> K<sub>j</sub> &le; r} &ge; r}, and the shortlist is {j in R1 : \
         &xi;<sub>j</sub> K<sub>j</sub> &le; r*}. Homogeneous pruning (one shared uniform \
         &xi;, the default) had the highest power in our simulations; heterogeneous uses one \
         uniform per unit; deterministic (&xi; = 1) uses no randomness but is nearly \
         powerless when weights vary. With random pruning the shortlist depends, at its \
         margin, on one seeded draw (the seed is in the settings). All K<sub>j</sub> are \
         computed in O(m log m) from the sorted pool scores.</p>\n\
         <p><b>Unreachable units.</b> Every p-value is at least w<sub>j</sub> / (W + \
         w<sub>j</sub>). A pool unit with w<sub>j</sub> / (W + w<sub>j</sub>) &gt; q can never \
         be selected at level q: the labeled set has too little weight near it. Such units \
         are counted and named in candidates.csv.</p>\n\
         <p><b>Benjamini&ndash;Yekutieli</b> replaces q by q / &sum;<sub>k&le;m</sub> 1/k: \
         valid under any dependence, less powerful.</p>\n",
    );
    if let Some(p) = &report.procedure {
        let _ = writeln!(
            out,
            "<p><b>This run</b> used the procedure <code>{}</code>.</p>",
            escape(p)
        );
    }
    match &report.weights_method {
        WeightsMethod::None => out.push_str(
            "<p><b>Weights.</b> None: every weight is 1, i.e. the labeled set is treated as \
             exchangeable with the pool (no shift assumed).</p>\n",
        ),
        WeightsMethod::Given(text) => {
            let _ = writeln!(
                out,
                "<p><b>Weights.</b> Given by the user ({}): they must be proportional to the \
                 density ratio of the pool to the labeled set at each unit's features.</p>",
                escape(text)
            );
        }
        WeightsMethod::Fitted => out.push_str(
            "<p><b>Weights</b> were fitted with a domain classifier: an L2-penalized logistic \
             regression (Newton's method with step halving, intercept unpenalized) on the \
             standardized features labels labeled rows 0 and pool rows 1; with e(x) = P(pool \
             | x), w(x) is proportional to e(x) / (1 &minus; e(x)) (the class-size ratio is a \
             constant and cancels). Diagnostics: cross-validated AUC with a DeLong interval \
             and a permutation test of \"no shift\" (classifier two-sample test, Lopez-Paz \
             &amp; Oquab 2017); Kish effective sample size (&sum;w)<sup>2</sup> / \
             &sum;w<sup>2</sup> (Kish 1965); Pareto k-hat of the weight tail (Vehtari, Simpson, \
             Gelman, Yao &amp; Gabry 2024); standardized mean differences before and after \
             weighting (Austin 2009), also on squared and pairwise-product features to check \
             the weight model. With <code>--classifier boosted</code> the classifier is \
             gradient-boosted trees on the binary log loss (Friedman 2001), cross-fitted: \
             each fitting row's probability comes from the fold model that did not see it, \
             probabilities clipped to [0.001, 0.999]. Before the fit, values beyond wide \
             outer fences (the 1% and 99% order statistics &plusmn; 2 spans) are set to the \
             fences and named, unless another feature transform was chosen. Fitted weights \
             with k-hat above its threshold, an effective sample size below 2% or an AUC \
             above 0.99 are refused unless explicitly allowed. Estimated weights add error \
             the guarantee does not cover.</p>\n",
        ),
    }
    out.push_str(
        "<h3>Sources</h3>\n<ul>\n\
         <li>Tibshirani, R. J., Barber, R. F., Cand&egrave;s, E. J., Ramdas, A. (2019). \
         Conformal prediction under covariate shift. NeurIPS 2019.</li>\n\
         <li>Jin, Y., Cand&egrave;s, E. J. (2023). Selection by prediction with conformal \
         p-values. JMLR 24; and Model-free selective inference under covariate shift via \
         weighted conformal p-values (2023).</li>\n\
         <li>Benjamini, Y., Hochberg, Y. (1995). Controlling the false discovery rate. \
         JRSS B 57(1).</li>\n\
         <li>Fithian, W., Lei, L. (2022). Conditional calibration for false discovery rate \
         control under dependence. Annals of Statistics 50(6).</li>\n\
         <li>Kish, L. (1965). Survey Sampling. Wiley.</li>\n\
         <li>Vehtari, A., Simpson, D., Gelman, A., Yao, Y., Gabry, J. (2024). Pareto \
         smoothed importance sampling. JMLR 25.</li>\n\
         <li>Austin, P. C. (2009). Balance diagnostics for comparing the distribution of \
         baseline covariates between treatment groups in propensity-score matched samples. \
         Statistics in Medicine 28.</li>\n\
         <li>Lopez-Paz, D., Oquab, M. (2017). Revisiting classifier two-sample tests. \
         ICLR 2017.</li>\n\
         <li>Friedman, J. H. (2001). Greedy function approximation: a gradient boosting \
         machine. Annals of Statistics 29(5).</li>\n\
         </ul>\n</section>\n",
    );
}

impl Report {
    /// The whole page.
    pub fn render(&self) -> String {
        let mut out = String::with_capacity(64 * 1024);
        let _ = write!(
            out,
            "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
             <title>{}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n",
            escape(&self.title)
        );
        let _ = writeln!(
            out,
            "<header id=\"title\">\n<h1>{}</h1>\n<p class=\"verdict\">{}</p>\n</header>",
            escape(&self.title),
            escape(&self.verdict)
        );

        out.push_str("<section id=\"warnings\">\n<h2>Warnings (most serious first)</h2>\n");
        if self.warnings.is_empty() {
            out.push_str(
                "<p>None: no diagnostic crossed its threshold. This does not prove the \
                 weights right; see the cautions below.</p>\n",
            );
        } else {
            out.push_str(
                "<div class=\"wide\">\n<table>\n<thead><tr><th>diagnostic</th><th>concern</th>\
                 <th>value</th><th>threshold</th><th>what it means</th></tr></thead>\n<tbody>\n",
            );
            for w in &self.warnings {
                let class = match w.severity.as_str() {
                    "severe" | "high" => "severe",
                    "caution" | "medium" => "caution",
                    _ => "warning",
                };
                let _ = writeln!(
                    out,
                    "<tr class=\"{class}\"><td>{}</td><td>{}</td><td class=\"num\">{}</td>\
                     <td class=\"num\">{}</td><td>{}</td></tr>",
                    escape(&w.diagnostic),
                    escape(&w.severity),
                    escape(&w.value),
                    escape(&w.threshold),
                    escape(&w.meaning)
                );
            }
            out.push_str("</tbody>\n</table>\n</div>\n");
        }
        out.push_str("</section>\n");

        out.push_str(
            "<section id=\"settings\">\n<h2>Settings</h2>\n<div class=\"wide\">\n<table>\n<tbody>\n",
        );
        for (name, value) in &self.settings {
            let _ = writeln!(
                out,
                "<tr><th>{}</th><td>{}</td></tr>",
                escape(name),
                escape(value)
            );
        }
        out.push_str("</tbody>\n</table>\n</div>\n</section>\n");

        if let Some(main) = &self.main {
            part_html(&mut out, main);
        }
        if let Some(shift) = &self.shift {
            shift_html(&mut out, shift);
        } else {
            out.push_str(
                "<section id=\"shift\">\n<h2>Shift diagnostics</h2>\n<p>Not computed: the \
                 weights were not fitted in this run (run with fitted weights, or \
                 <code>weighbridge shift</code>, to measure the shift).</p>\n</section>\n",
            );
        }
        for part in &self.extra {
            part_html(&mut out, part);
        }

        out.push_str("<section id=\"cautions\">\n<h2>Cautions</h2>\n<ul>\n");
        for c in CAUTIONS {
            let _ = writeln!(out, "<li>{}</li>", escape(c));
        }
        out.push_str("</ul>\n</section>\n");

        method_html(&mut out, self);
        out.push_str("</body>\n</html>\n");
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::conformal::score::Thresholds;
    use crate::report::{add_shift, select_summary, shift_section, RunInputs};
    use crate::selection::pipeline::{run_selection, LabeledInput, PoolInput, SelectOptions};
    use crate::shift::weighting::FittedWeights;
    use crate::shift::{assess_shift_with, FeatureView, ShiftParams};
    use linfa::ParamGuard;

    /// A small shifted data set (invented, for the page's structure only): labeled feature
    /// centred at 0, pool at 0.5; outcome = feature + noise-free offset by id.
    fn fitted_report(odd_id: &str) -> String {
        let n = 200;
        let m = 300;
        let lx: Vec<f64> = (0..n).map(|i| (i as f64 / n as f64) * 4.0 - 2.0).collect();
        let px: Vec<f64> = (0..m).map(|j| (j as f64 / m as f64) * 4.0 - 1.5).collect();
        let names = vec!["f1".to_string()];
        let params = ShiftParams::new().seed(3).fdr(0.2).permutations(20);
        let options = params.clone().check().unwrap();
        let assessment = assess_shift_with(
            FeatureView::new(&lx, n, &names).unwrap(),
            FeatureView::new(&px, m, &names).unwrap(),
            params,
        )
        .unwrap();
        let fitted = FittedWeights {
            options,
            assessment,
        };
        let y: Vec<f64> = lx
            .iter()
            .enumerate()
            .map(|(i, x)| x + if i % 3 == 0 { 1.0 } else { -0.5 })
            .collect();
        let outcome = run_selection(
            &SelectOptions {
                fdr: 0.2,
                ..SelectOptions::default()
            },
            LabeledInput {
                outcome: &y,
                prediction: &lx,
                thresholds: Thresholds::Constant(0.5),
                weights: Some(&fitted.assessment.labeled.weight),
            },
            PoolInput {
                prediction: &px,
                thresholds: Thresholds::Constant(0.5),
                weights: Some(&fitted.assessment.pool.weight),
            },
        )
        .unwrap();
        let mut ids: Vec<String> = (0..m).map(|j| format!("u{j}")).collect();
        // The unit with the largest prediction is selected if anything is.
        ids[m - 1] = odd_id.to_string();
        let mut summary = select_summary(
            &outcome,
            RunInputs {
                labeled_file: "lab<el>ed.csv".to_string(),
                pool_file: "pool.csv".to_string(),
                threshold: "value 0.5".to_string(),
                weights: "fitted".to_string(),
            },
        );
        let section = shift_section(&fitted, &names);
        add_shift(&mut summary, section.clone());
        let part = shift_part(
            &section,
            &fitted.assessment.labeled.weight,
            &fitted.assessment.pool.weight,
        )
        .unwrap();
        assert!(
            outcome.selected[m - 1],
            "the test needs the odd id selected"
        );
        let view = PoolView {
            ids: &ids,
            predictions: &px,
            threshold: Some(0.5),
            direction: Direction::Above,
        };
        selection_report(&summary, &view, &outcome, Some(part), WeightsMethod::Fitted).render()
    }

    #[test]
    fn every_section_in_order_without_script_or_urls() {
        let html = fitted_report("plain");
        let ids = [
            "id=\"title\"",
            "id=\"warnings\"",
            "id=\"settings\"",
            "id=\"shortlist\"",
            "id=\"shift\"",
            "id=\"cautions\"",
            "id=\"method\"",
        ];
        let positions: Vec<usize> = ids
            .iter()
            .map(|s| html.find(s).unwrap_or_else(|| panic!("missing {s}")))
            .collect();
        assert!(positions.windows(2).all(|w| w[0] < w[1]), "{positions:?}");
        // The selection plot and the three shift plots (SelectOptions' default computes no
        // level curve).
        assert_eq!(html.matches("<svg").count(), 4);
        assert!(html.find("Selection: prediction against weight") < html.find("id=\"shift\""));
        assert!(!html.to_lowercase().contains("<script"));
        assert!(!html.contains("http://") && !html.contains("https://"));
        for c in CAUTIONS {
            assert!(html.contains(&escape(c)), "caution missing: {c}");
        }
        for source in [
            "Tibshirani",
            "Benjamini",
            "Kish",
            "Vehtari",
            "Austin",
            "Lopez-Paz",
        ] {
            assert!(html.contains(source), "{source}");
        }
    }

    #[test]
    fn user_text_is_escaped() {
        let html = fitted_report("<b>&\"");
        assert!(html.contains("&lt;b&gt;&amp;&quot;"));
        assert!(!html.contains("<b>&\""));
        assert!(html.contains("lab&lt;el&gt;ed.csv"));
    }

    /// Tables are in the page flow: no scroll box, no height limit, on screen or in print.
    #[test]
    fn tables_are_never_in_scroll_boxes() {
        let html = fitted_report("plain");
        for banned in [
            "class=\"scroll\"",
            "max-height",
            "overflow-y",
            "overflow: auto",
        ] {
            assert!(!html.contains(banned), "{banned}");
        }
        // Plots are not shrunk to the page width on screen (their text would shrink with
        // them), only in print.
        let print = STYLE.find("@media print").unwrap();
        assert!(STYLE.find("max-width: 100%").unwrap() > print);
    }

    /// A long table shows its first TABLE_ROWS_SHOWN rows and names the file with the rest;
    /// a table without a file shows every row.
    #[test]
    fn long_tables_show_the_first_rows_and_point_to_the_file() {
        let rows: Vec<Vec<String>> = (0..250).map(|i| vec![format!("unit-{i}")]).collect();
        let mut table = Table {
            header: vec!["id".to_string()],
            rows,
            rows_in: Some("candidates.csv".to_string()),
            ..Table::default()
        };
        let mut out = String::new();
        table_html(&mut out, &table);
        assert_eq!(out.matches("<tr>").count(), 1 + TABLE_ROWS_SHOWN);
        assert!(out.contains("unit-99<") && !out.contains("unit-100<"));
        assert!(out
            .contains("The first 100 of 250 rows are shown; the other 150 are in candidates.csv."));
        table.rows_in = None;
        let mut out = String::new();
        table_html(&mut out, &table);
        assert_eq!(out.matches("<tr>").count(), 251);
        assert!(!out.contains("rows are shown"));
    }

    /// The shortlist table: best prediction first, with the prediction and selection
    /// probability columns (and the other columns of shortlist.csv).
    #[test]
    fn shortlist_table_is_best_first_with_prediction_and_probability() {
        let html = fitted_report("plain");
        let start = html.find("id=\"shortlist\"").unwrap();
        let section = &html[start..html[start..].find("</section>").unwrap() + start];
        assert!(section.contains(
            "<th>rank</th><th>id</th><th>prediction</th><th>p-value</th><th>q-value</th>\
             <th>selection probability</th><th>weight</th><th>score</th>"
        ));
        // The pool's predictions increase with the unit index (fitted_report), so best
        // first means the largest index, `plain`, first.
        let first_row = &section[section.find("<tbody>").unwrap()..];
        assert!(first_row
            .starts_with("<tbody>\n<tr><td class=\"num\">1</td><td class=\"word\">plain</td>"));
    }

    #[test]
    fn escape_covers_the_five_characters() {
        assert_eq!(escape("a<b>c&d\"e'f"), "a&lt;b&gt;c&amp;d&quot;e&#39;f");
        assert_eq!(escape("plain"), "plain");
    }
}
