//! The error every bad input file becomes ([`InputError`]) and the helpers that word its
//! messages (name lists, hints, delimiter names, cut-off cell values).
//!
//! Every message names the file, the line (1-based, the header is line 1, counted as a text
//! editor counts them), the column, what is wrong and what to do.

use std::io;
use std::path::PathBuf;

use super::read::{ColumnKind, Role};

/// A bad input file. The message names the file, line, column, the problem and a fix.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum InputError {
    #[error("cannot open {file}: {source}. Hint: check the path and that the file is readable.", file = .path.display())]
    Open {
        path: PathBuf,
        #[source]
        source: io::Error,
    },

    #[error("{file}: {message}", file = .path.display())]
    NotText { path: PathBuf, message: String },

    #[error("{file} line {line}: read error: {source}. Hint: check that the file is complete and readable.", file = .path.display())]
    Read {
        path: PathBuf,
        line: u64,
        #[source]
        source: io::Error,
    },

    #[error("{file} line 1: the {role} is empty (no header row). Hint: the first line must name the columns, e.g. `id,prediction,f1,f2`.", file = .path.display())]
    EmptyFile { path: PathBuf, role: Role },

    #[error("{file} line {header_line}: the {role} has a header but no data rows. Hint: add at least one row below the header.", file = .path.display())]
    NoRows {
        path: PathBuf,
        role: Role,
        header_line: u64,
    },

    #[error("{file} line {header_line} (header): the {role} has no column `{column}` for the {what}{detail}. Hint: {hint}", file = .path.display(), what = .kind.describe(), detail = column_detail(.column, .available, .path), hint = missing_column_hint(*.kind, .available))]
    MissingColumn {
        path: PathBuf,
        role: Role,
        header_line: u64,
        kind: ColumnKind,
        column: String,
        available: Vec<String>,
    },

    #[error("{file} line {header_line} (header), column `{column}`: the name appears in fields {first_field} and {second_field}, so it is unclear which to read. Hint: give the columns unique names.", file = .path.display())]
    DuplicateColumn {
        path: PathBuf,
        header_line: u64,
        column: String,
        first_field: usize,
        second_field: usize,
    },

    #[error("{file} line {line}, column `{column}`: `{value}` is not a number. Hint: every {what} must be a finite number like 0.25 or 1e-3; remove or fix the row.", file = .path.display(), what = .kind.describe())]
    NotANumber {
        path: PathBuf,
        line: u64,
        column: String,
        kind: ColumnKind,
        value: String,
    },

    #[error("{file} line {line}, column `{column}`: `{value}` is not a finite number (NaN, infinite, or too large for a 64-bit float). Hint: every {what} must be a finite number; remove or fix the row.", file = .path.display(), what = .kind.describe())]
    NotFinite {
        path: PathBuf,
        line: u64,
        column: String,
        kind: ColumnKind,
        value: String,
    },

    #[error("{file} line {line}, column `{column}`: the cell is empty. Hint: every {what} is required (missing values are not filled in); fill in the value or remove the row.", file = .path.display(), what = .kind.describe())]
    EmptyCell {
        path: PathBuf,
        line: u64,
        column: String,
        kind: ColumnKind,
    },

    #[error("{file} line {line}, column `{column}`: {shown_value} is a missing-value token, so this labeled row has no outcome. Hint: {hint}", file = .path.display(), shown_value = missing_shown(.value), hint = missing_outcome_hint(.value, *.one_table))]
    MissingOutcome {
        path: PathBuf,
        line: u64,
        column: String,
        value: String,
        /// A one-table input (`--table`), where an empty cell means untested.
        one_table: bool,
    },

    #[error("{file} line {line}, column `{column}`: outcome `{value}` is not a number. Hint: an outcome is a finite number like 6.5 or 1e-3, a censored value like >10000 or <=1 (decided by its bound when it can be), or a missing-value token (NA, N/A; set with --missing-values, then --missing-outcome drop leaves the row out){untested}; fix the cell or remove the row.", file = .path.display(), untested = if *.one_table { "; an empty cell or an --untested-marker token marks an untested (pool) row" } else { "" })]
    UnreadableOutcome {
        path: PathBuf,
        line: u64,
        column: String,
        value: String,
        one_table: bool,
    },

    #[error("{file} line {line}, column `{column}`: censored outcome `{value}`: {problem}. Hint: {hint}", file = .path.display(), hint = if *.residual { "use the default --score clipped, which needs only the side of the threshold, or give the measured value" } else { "give the measured value, remove the row, or mark it as missing (NA) and pass --missing-outcome drop" })]
    CensoredOutcome {
        path: PathBuf,
        line: u64,
        column: String,
        value: String,
        /// Why the bound cannot be used, in the user's units and words.
        problem: String,
        /// The score needs the value (`--score residual`).
        residual: bool,
    },

    #[error("{file} line {header_line} (header): the table has no {side} rows: {why}. Hint: {hint}", file = .path.display(), side = if *.labeled { "labeled" } else { "pool (untested)" }, why = if *.labeled { format!("every cell of the outcome column `{column}` is empty or an untested marker") } else { format!("every row has a value in the outcome column `{column}`") }, hint = if *.labeled { "check --outcome (the column with the measured values) and --untested-marker" } else { "rows to screen leave the outcome empty (or hold an --untested-marker token); for separate files use --labeled and --pool" })]
    TableSideEmpty {
        path: PathBuf,
        header_line: u64,
        column: String,
        /// True: no labeled rows; false: no pool rows.
        labeled: bool,
    },

    #[error("{file} line {line}, column `{column}`: the id is empty. Hint: every row needs a unique, non-empty id.", file = .path.display())]
    EmptyId {
        path: PathBuf,
        line: u64,
        column: String,
    },

    #[error("{file} line {line}, column `{column}`: the cell is not valid UTF-8. Hint: save the file as UTF-8 text.", file = .path.display())]
    InvalidUtf8 {
        path: PathBuf,
        line: u64,
        column: String,
    },

    #[error("{file} line {line}, column `{column}`: id `{id}` contains the control character U+{code:04X}. Hint: ids must be printable text (no NUL, tab or line break inside); check whether the file is damaged or was saved in another encoding.", file = .path.display())]
    ControlInId {
        path: PathBuf,
        line: u64,
        column: String,
        id: String,
        code: u32,
    },

    #[error("{first} and {second} are both `-` (standard input), which can be read only once. Hint: give at most one input as `-` and the others as files.")]
    StdinTwice { first: String, second: String },

    #[error("{file} line {line}, column `{column}`: id `{id}` already appears on line {first_line}. Hint: ids must be unique within a file; remove the repeated row or give it its own id.", file = .path.display())]
    DuplicateId {
        path: PathBuf,
        line: u64,
        first_line: u64,
        column: String,
        id: String,
    },

    #[error("{file} line {line}, column `{column}`: weight `{value}` is not positive. Hint: weights are density ratios (pool density over labeled density) and must be > 0; remove the unit rather than give it weight 0.", file = .path.display())]
    NonPositiveWeight {
        path: PathBuf,
        line: u64,
        column: String,
        value: String,
    },

    #[error("{file} line {line}: the row has {found} fields but the header has {expected} ({detail}). Hint: quote values that contain the delimiter, and check the delimiter ({delimiter}).", file = .path.display(), detail = field_count_detail(*.found, .header), delimiter = delimiter_name(*.delimiter))]
    FieldCount {
        path: PathBuf,
        line: u64,
        expected: usize,
        found: usize,
        header: Vec<String>,
        delimiter: u8,
    },

    #[error("{file} line {header_line} (header): feature selection failed: {message}. Hint: a range of two column names (`MolWt..TPSA`) takes every column between them in the header; a numbered range `f1..f32` needs every column f1, f2, ..., f32; `weighbridge columns FILE` lists the columns.", file = .path.display())]
    FeatureSelection {
        path: PathBuf,
        header_line: u64,
        message: String,
    },

    #[error("the feature columns differ: labeled file {labeled_file} uses [{labeled_names}] but pool file {pool_file} uses [{pool_names}]. Hint: select the same features, in the same order, in both files.", labeled_file = .labeled_path.display(), pool_file = .pool_path.display(), labeled_names = .labeled.join(", "), pool_names = .pool.join(", "))]
    FeatureMismatch {
        labeled_path: PathBuf,
        pool_path: PathBuf,
        labeled: Vec<String>,
        pool: Vec<String>,
    },

    #[error("{file} line {line}: the file is not valid CSV: {message}. Hint: check quoting and the delimiter.", file = .path.display())]
    Malformed {
        path: PathBuf,
        line: u64,
        message: String,
    },
}

/// At most this many names are listed in a message.
const LISTED_NAMES: usize = 20;
/// Cell values longer than this many characters are cut in messages.
const SHOWN_VALUE_CHARS: usize = 60;
/// Names (header cells, ids in listings) longer than this many characters are cut in
/// messages: a 10 MB header cell must not flood the terminal.
pub const SHOWN_NAME_CHARS: usize = 200;

/// Text as shown in messages: cut after [`SHOWN_NAME_CHARS`] characters with an ellipsis
/// and the full length, control characters escaped.
pub fn shown_text(text: &str) -> String {
    let mut chars = text.chars();
    let mut out: String = chars
        .by_ref()
        .take(SHOWN_NAME_CHARS)
        .flat_map(|c| {
            if c.is_control() {
                c.escape_default().collect::<Vec<_>>()
            } else {
                vec![c]
            }
        })
        .collect();
    if chars.next().is_some() {
        out.push_str(&format!("… ({} characters)", text.chars().count()));
    }
    out
}

pub(super) fn name_list(names: &[String]) -> String {
    let mut text = names
        .iter()
        .take(LISTED_NAMES)
        .map(|name| format!("`{}`", shown_text(name)))
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > LISTED_NAMES {
        text.push_str(&format!(" and {} more", names.len() - LISTED_NAMES));
    }
    text
}

/// "; did you mean `X`?" when a header name is close to `wanted` (see
/// [`suggest`](super::columns::suggest)), then the header's names: all of them when there are
/// at most twenty, else the first twenty and how to list them all.
pub(super) fn column_detail(wanted: &str, available: &[String], path: &std::path::Path) -> String {
    let mut text = did_you_mean(wanted, available);
    if available.len() <= LISTED_NAMES {
        text.push_str(&format!("; its columns are: {}", name_list(available)));
    } else {
        text.push_str(&format!(
            "; it has {} columns, the first {LISTED_NAMES}: {} (`weighbridge columns {}` lists them all)",
            available.len(),
            name_list(available),
            path.display()
        ));
    }
    text
}

/// "; did you mean `X`?" (or "`X` or `Y`") for the names close to `wanted`; empty if none.
pub(crate) fn did_you_mean(wanted: &str, available: &[String]) -> String {
    let close = super::columns::suggest(wanted, available);
    if close.is_empty() {
        return String::new();
    }
    let names: Vec<String> = close
        .iter()
        .map(|name| format!("`{}`", shown_text(name)))
        .collect();
    format!("; did you mean {}?", names.join(" or "))
}

fn missing_shown(value: &str) -> String {
    if value.is_empty() {
        "the empty cell".to_string()
    } else {
        format!("`{value}`")
    }
}

fn missing_outcome_hint(value: &str, one_table: bool) -> String {
    let mut hint = String::from(
        "fill in the measured value, or pass --missing-outcome drop to leave such rows out \
         (their count goes into summary.json `dropped_missing_outcome_count`); the tokens are \
         chosen with --missing-values (default NA,N/A and, with two files, the empty cell).",
    );
    if one_table {
        hint.push_str(&format!(
            " If `{value}` means \"not tested\" here, pass --untested-marker '{value}' to make \
             such rows part of the pool."
        ));
    }
    hint
}

fn missing_column_hint(kind: ColumnKind, available: &[String]) -> String {
    let mut hint = format!(
        "name the {} column with {} (names are case-sensitive).",
        kind.describe(),
        kind.flag()
    );
    if available.len() == 1 {
        hint.push_str(
            " The header has a single column: if the file uses another delimiter, pass it with --delimiter.",
        );
    }
    hint
}

fn field_count_detail(found: usize, header: &[String]) -> String {
    if found < header.len() {
        format!("no value for {}", name_list(&header[found..]))
    } else {
        format!(
            "{} extra after column `{}`",
            found - header.len(),
            shown_text(header.last().map_or("", String::as_str))
        )
    }
}

fn delimiter_name(delimiter: u8) -> String {
    match delimiter {
        b'\t' => "tab".to_string(),
        b',' => "comma".to_string(),
        other => format!("`{}`", other.escape_ascii()),
    }
}

/// A cell as shown in messages: lossy UTF-8, cut after [`SHOWN_VALUE_CHARS`] characters.
pub(super) fn shown(cell: &[u8]) -> String {
    let text = String::from_utf8_lossy(cell);
    let mut chars = text.chars();
    let mut out: String = chars.by_ref().take(SHOWN_VALUE_CHARS).collect();
    if chars.next().is_some() {
        out.push('…');
    }
    out
}
