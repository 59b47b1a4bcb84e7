//! What a run hands back to people, as bytes or text (writing them to disk is the caller's
//! job, `crate::io::OutputSet`):
//!
//! - [`summary`]: `candidates.csv`, `shortlist.csv`, `summary.json`, `shift.json`, `weights.csv`,
//!   `balance.csv`, the text summaries for the terminal, and the cautions;
//! - [`html`]: the self-contained `report.html` (inline CSS and SVG, no scripts);
//! - [`plots`]: the SVG plots of the shift diagnostics.

pub mod float_text;
pub mod html;
pub mod plots;
pub mod summary;

pub use summary::{
    add_shift, balance_csv, candidates_csv, kept_header, select_summary, shift_diagnostics_text,
    shift_report, shift_section, shift_text, shortlist_csv, shortlist_order, text_summary,
    tool_info, unselectable_reason, warning_line, weights_csv, Columns, MemoryUse, PoolColumns,
    RunInputs, SelectSummary, ShiftInputs, ShiftReport, ShiftSection, ThresholdRule, ToolInfo,
    UnreliableMark, CANDIDATES_COLUMNS, CAUTIONS, SCHEMA_VERSION, SHORTLIST_COLUMNS,
};
