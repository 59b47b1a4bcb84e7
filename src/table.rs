//! Reading the labeled and pool CSV/TSV files into column vectors, and writing output files
//! atomically.
//!
//! Every bad input becomes an [`InputError`] naming the file, the line (1-based, the header
//! is line 1, counted as a text editor counts them), the column, what is wrong and what to do.
//! Nothing here does statistics: the readers only check what every later step relies on
//! (finite numbers, positive weights, unique non-empty ids, the requested columns exist).
//!
//! Performance: one `csv::Reader` with one reused `csv::ByteRecord`, floats parsed from bytes
//! with `fast_float2`, columns pushed into vectors sized from the file length, features in
//! one column-major buffer. The only per-row allocation is the id `String`.

use std::collections::hash_map::Entry;
use std::collections::{HashMap, HashSet};
use std::fmt;
use std::fs::{self, File, OpenOptions};
use std::hash::{DefaultHasher, Hash, Hasher};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

/// Which file a table came from; used in messages ("labeled file", "pool file").
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Role {
    Labeled,
    Pool,
    /// A list of ids chosen earlier (`audit --shortlist`).
    Shortlist,
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Role::Labeled => "labeled file",
            Role::Pool => "pool file",
            Role::Shortlist => "shortlist file",
        })
    }
}

/// What a column holds; decides the wording of messages and which flag names it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ColumnKind {
    Id,
    Outcome,
    Prediction,
    Threshold,
    Weight,
    Feature,
}

impl ColumnKind {
    /// Plain-English name of one cell of this kind ("prediction", "feature value").
    pub fn describe(self) -> &'static str {
        match self {
            ColumnKind::Id => "id",
            ColumnKind::Outcome => "outcome",
            ColumnKind::Prediction => "prediction",
            ColumnKind::Threshold => "threshold",
            ColumnKind::Weight => "weight",
            ColumnKind::Feature => "feature value",
        }
    }

    /// The command-line flag that names a column of this kind.
    pub fn flag(self) -> &'static str {
        match self {
            ColumnKind::Id => "--id",
            ColumnKind::Outcome => "--outcome",
            ColumnKind::Prediction => "--prediction",
            ColumnKind::Threshold => "--threshold-column",
            ColumnKind::Weight => "--weight-column",
            ColumnKind::Feature => "--features",
        }
    }
}

/// What to read. Column names are given by the user (flags).
#[derive(Clone, Debug)]
pub struct ReadOptions {
    /// Id column; defaults to "id".
    pub id: String,
    /// Outcome column, read for [`Role::Labeled`] when `Some`; ignored for the pool.
    pub outcome: Option<String>,
    /// Prediction column (required).
    pub prediction: String,
    /// Per-row thresholds.
    pub threshold_column: Option<String>,
    /// Given density-ratio weights; every value must be finite and > 0.
    pub weight_column: Option<String>,
    /// Feature selectors, already split on commas: names or ranges "f1..f32"
    /// (see [`resolve_features`]).
    pub features: Vec<String>,
    /// Field delimiter. `None`: tab if the file name ends in .tsv/.tab, else comma.
    pub delimiter: Option<u8>,
}

impl ReadOptions {
    /// Options reading `prediction`, with id column "id" and nothing else.
    pub fn new(prediction: impl Into<String>) -> Self {
        ReadOptions {
            id: "id".to_string(),
            outcome: None,
            prediction: prediction.into(),
            threshold_column: None,
            weight_column: None,
            features: Vec::new(),
            delimiter: None,
        }
    }
}

/// One file's units, columns kept as contiguous vectors.
#[derive(Clone, Debug)]
pub struct UnitTable {
    pub path: PathBuf,
    pub role: Role,
    pub ids: Vec<String>,
    pub outcome: Option<Vec<f64>>,
    pub prediction: Vec<f64>,
    pub threshold: Option<Vec<f64>>,
    pub weight: Option<Vec<f64>>,
    pub feature_names: Vec<String>,
    /// Column-major: feature f of row r is features[f * n_rows + r].
    pub features: Vec<f64>,
}

impl UnitTable {
    /// Number of units (data rows).
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// Values of feature `f` (in `feature_names` order) for every row.
    ///
    /// # Panics
    /// If `f >= feature_names.len()`.
    pub fn feature_column(&self, f: usize) -> &[f64] {
        assert!(
            f < self.feature_names.len(),
            "feature index {f} out of range: the table has {} features",
            self.feature_names.len()
        );
        let n = self.len();
        &self.features[f * n..(f + 1) * n]
    }
}

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

    #[error("{file} line {header_line} (header): the {role} has no column `{column}` for the {what}; its columns are: {names}. Hint: {hint}", file = .path.display(), what = .kind.describe(), names = name_list(.available), hint = missing_column_hint(*.kind, .available))]
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

    #[error("{file} line {header_line} (header): feature selection failed: {message}. Hint: a range `f1..f32` needs every column f1, f2, ..., f32 in the header; otherwise list the feature names with --features.", file = .path.display())]
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

fn name_list(names: &[String]) -> String {
    let mut text = names
        .iter()
        .take(LISTED_NAMES)
        .map(|name| format!("`{name}`"))
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > LISTED_NAMES {
        text.push_str(&format!(" and {} more", names.len() - LISTED_NAMES));
    }
    text
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
            header.last().map_or("", String::as_str)
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
fn shown(cell: &[u8]) -> String {
    let text = String::from_utf8_lossy(cell);
    let mut chars = text.chars();
    let mut out: String = chars.by_ref().take(SHOWN_VALUE_CHARS).collect();
    if chars.next().is_some() {
        out.push('…');
    }
    out
}

/// The field delimiter for `path`: `explicit` if given, else tab for names ending in
/// `.tsv` or `.tab` (any case), else comma.
pub fn delimiter_for(path: &Path, explicit: Option<u8>) -> u8 {
    if let Some(delimiter) = explicit {
        return delimiter;
    }
    let tabbed = path
        .extension()
        .and_then(|ext| ext.to_str())
        .is_some_and(|ext| ext.eq_ignore_ascii_case("tsv") || ext.eq_ignore_ascii_case("tab"));
    if tabbed {
        b'\t'
    } else {
        b','
    }
}

/// The one place a CSV reader is configured: header row, fixed field count, double quotes.
fn csv_reader<R: Read>(delimiter: u8, input: R) -> csv::Reader<R> {
    csv::ReaderBuilder::new()
        .delimiter(delimiter)
        .has_headers(true)
        .flexible(false)
        .buffer_capacity(1 << 16)
        .from_reader(input)
}

/// The line a text editor shows for the record csv placed at `position`.
///
/// csv records the position where it *started looking* for a record, which is before any
/// blank lines it skipped and, in CRLF files, before the `\n` that ends the previous row.
/// So peek at the file there and count the newlines that precede the record's first byte.
/// Only called when reporting an error.
fn editor_line(path: &Path, position: &csv::Position) -> u64 {
    let mut line = position.line();
    let Ok(mut file) = File::open(path) else {
        return line;
    };
    if file.seek(SeekFrom::Start(position.byte())).is_err() {
        return line;
    }
    let mut buffer = [0u8; 4096];
    let mut at_file_start = position.byte() == 0;
    loop {
        let n = match file.read(&mut buffer) {
            Ok(0) | Err(_) => return line,
            Ok(n) => n,
        };
        let mut bytes = &buffer[..n];
        if at_file_start {
            // csv strips a UTF-8 byte order mark before the first record.
            bytes = bytes.strip_prefix(b"\xef\xbb\xbf").unwrap_or(bytes);
            at_file_start = false;
        }
        for &byte in bytes {
            match byte {
                b'\n' => line += 1,
                b'\r' => {}
                _ => return line,
            }
        }
    }
}

/// Editor line of a record read by `reader` (error path only).
fn record_line(path: &Path, record: &csv::ByteRecord) -> u64 {
    record
        .position()
        .map_or(0, |position| editor_line(path, position))
}

/// Map a csv error to an [`InputError`]; `reached_line` (where the reader stopped) stands in
/// when csv gives no position, as for I/O errors.
fn csv_error(
    path: &Path,
    delimiter: u8,
    header: &[String],
    reached_line: u64,
    error: csv::Error,
) -> InputError {
    let line = error
        .position()
        .map_or(reached_line, |position| editor_line(path, position));
    match error.into_kind() {
        csv::ErrorKind::Io(source) => InputError::Read {
            path: path.to_path_buf(),
            line,
            source,
        },
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => InputError::FieldCount {
            path: path.to_path_buf(),
            line,
            expected: expected_len as usize,
            found: len as usize,
            header: header.to_vec(),
            delimiter,
        },
        other => InputError::Malformed {
            path: path.to_path_buf(),
            line,
            message: format!("{other:?}"),
        },
    }
}

/// A column chosen from the header.
#[derive(Clone, Debug)]
struct Column {
    index: usize,
    name: String,
    kind: ColumnKind,
}

/// Header facts every column lookup needs.
struct Header<'a> {
    path: &'a Path,
    role: Role,
    line: u64,
    names: Vec<String>,
}

impl Header<'_> {
    fn column(&self, name: &str, kind: ColumnKind) -> Result<Column, InputError> {
        let mut matches = self
            .names
            .iter()
            .enumerate()
            .filter(|(_, header_name)| header_name.as_str() == name)
            .map(|(index, _)| index);
        let Some(index) = matches.next() else {
            return Err(InputError::MissingColumn {
                path: self.path.to_path_buf(),
                role: self.role,
                header_line: self.line,
                kind,
                column: name.to_string(),
                available: self.names.clone(),
            });
        };
        if let Some(second) = matches.next() {
            return Err(InputError::DuplicateColumn {
                path: self.path.to_path_buf(),
                header_line: self.line,
                column: name.to_string(),
                first_field: index + 1,
                second_field: second + 1,
            });
        }
        Ok(Column {
            index,
            name: name.to_string(),
            kind,
        })
    }
}

/// Features gathered row by row into one column-major buffer.
///
/// Each feature owns a stretch of `stride` slots; rows fill the stretches in parallel. When the
/// row estimate is exceeded the stretches are widened (one copy); at the end they are moved
/// together in place so feature f of row r sits at `f * rows + r`.
struct FeatureBuffer {
    values: Vec<f64>,
    width: usize,
    stride: usize,
    rows: usize,
}

impl FeatureBuffer {
    fn new(width: usize) -> Self {
        FeatureBuffer {
            values: Vec::new(),
            width,
            stride: 0,
            rows: 0,
        }
    }

    /// Make room for `rows` rows in total.
    fn reserve_rows(&mut self, rows: usize) {
        if rows <= self.stride {
            return;
        }
        // vec! of zeros comes from calloc: untouched pages cost no memory.
        let mut wider = vec![0.0; self.width * rows];
        for f in 0..self.width {
            wider[f * rows..f * rows + self.rows]
                .copy_from_slice(&self.values[f * self.stride..f * self.stride + self.rows]);
        }
        self.values = wider;
        self.stride = rows;
    }

    fn start_row(&mut self) {
        if self.rows == self.stride {
            self.reserve_rows((self.stride + self.stride / 2).max(1024));
        }
    }

    #[inline]
    fn set(&mut self, feature: usize, value: f64) {
        self.values[feature * self.stride + self.rows] = value;
    }

    fn finish_row(&mut self) {
        self.rows += 1;
    }

    fn into_column_major(mut self) -> Vec<f64> {
        let rows = self.rows;
        for f in 1..self.width {
            // f * rows <= f * stride, so moving features in increasing order never
            // overwrites one that has not been moved yet.
            self.values
                .copy_within(f * self.stride..f * self.stride + rows, f * rows);
        }
        self.values.truncate(self.width * rows);
        self.values.shrink_to_fit();
        self.values
    }
}

/// Why a cell is not a usable number (decided on the error path only).
fn number_error(path: &Path, record: &csv::ByteRecord, column: &Column) -> InputError {
    let cell = record.get(column.index).unwrap_or_default().trim_ascii();
    let line = record_line(path, record);
    let path = path.to_path_buf();
    let name = column.name.clone();
    if cell.is_empty() {
        return InputError::EmptyCell {
            path,
            line,
            column: name,
            kind: column.kind,
        };
    }
    match fast_float2::parse::<f64, _>(cell) {
        Ok(value) if !value.is_finite() => InputError::NotFinite {
            path,
            line,
            column: name,
            kind: column.kind,
            value: shown(cell),
        },
        Ok(_) if column.kind == ColumnKind::Weight => InputError::NonPositiveWeight {
            path,
            line,
            column: name,
            value: shown(cell),
        },
        _ => InputError::NotANumber {
            path,
            line,
            column: name,
            kind: column.kind,
            value: shown(cell),
        },
    }
}

/// Parse a cell as a finite f64 (ASCII whitespace around it is ignored).
///
/// Accepts what Rust's `str::parse::<f64>` accepts (decimal and scientific notation, leading
/// `+`/`-`) except the non-finite spellings (`nan`, `inf`, `infinity`) and values that
/// overflow to infinity.
pub fn parse_finite(cell: &[u8]) -> Option<f64> {
    match fast_float2::parse::<f64, _>(cell.trim_ascii()) {
        Ok(value) if value.is_finite() => Some(value),
        _ => None,
    }
}

#[inline]
fn number_cell(path: &Path, record: &csv::ByteRecord, column: &Column) -> Result<f64, InputError> {
    match record.get(column.index).and_then(parse_finite) {
        Some(value) => Ok(value),
        None => Err(number_error(path, record, column)),
    }
}

#[inline]
fn weight_cell(path: &Path, record: &csv::ByteRecord, column: &Column) -> Result<f64, InputError> {
    match record.get(column.index).and_then(parse_finite) {
        Some(value) if value > 0.0 => Ok(value),
        _ => Err(number_error(path, record, column)),
    }
}

#[inline]
fn id_cell(path: &Path, record: &csv::ByteRecord, column: &Column) -> Result<String, InputError> {
    let cell = record.get(column.index).unwrap_or_default().trim_ascii();
    match std::str::from_utf8(cell) {
        Ok(id) if !id.is_empty() => Ok(id.to_owned()),
        Ok(_) => Err(InputError::EmptyId {
            path: path.to_path_buf(),
            line: record_line(path, record),
            column: column.name.clone(),
        }),
        Err(_) => Err(InputError::InvalidUtf8 {
            path: path.to_path_buf(),
            line: record_line(path, record),
            column: column.name.clone(),
        }),
    }
}

fn optional_column(
    header: &Header<'_>,
    name: Option<&String>,
    kind: ColumnKind,
) -> Result<Option<Column>, InputError> {
    name.map(|name| header.column(name, kind)).transpose()
}

/// Read one file of units.
///
/// Reads the whole file into memory: about 8 bytes per number plus the ids.
/// Header names and cells are trimmed of ASCII whitespace; a UTF-8 byte order mark, blank
/// lines and CRLF line ends are accepted.
///
/// # Errors
/// Every bad input is an [`InputError`] variant naming the file, line and column: file
/// cannot be opened, empty file, no data rows, missing or doubled column, non-numeric,
/// empty, NaN or infinite cell, empty or non-UTF-8 id, duplicate id, weight <= 0, wrong
/// number of fields, feature selection that does not resolve.
pub fn read_units(path: &Path, role: Role, options: &ReadOptions) -> Result<UnitTable, InputError> {
    let open_error = |source| InputError::Open {
        path: path.to_path_buf(),
        source,
    };
    let file = File::open(path).map_err(open_error)?;
    let metadata = file.metadata().map_err(open_error)?;
    if metadata.is_dir() {
        return Err(open_error(io::Error::other(
            "it is a directory, not a file",
        )));
    }
    let file_len = metadata.len();
    let delimiter = delimiter_for(path, options.delimiter);
    let mut reader = csv_reader(delimiter, file);

    let header_record = reader
        .byte_headers()
        .map_err(|error| csv_error(path, delimiter, &[], 1, error))?
        .clone();
    if header_record.is_empty() {
        return Err(InputError::EmptyFile {
            path: path.to_path_buf(),
            role,
        });
    }
    let header_line = header_record
        .position()
        .map_or(1, |position| editor_line(path, position));
    let mut names = Vec::with_capacity(header_record.len());
    for (field, raw) in header_record.iter().enumerate() {
        match std::str::from_utf8(raw.trim_ascii()) {
            Ok(name) => names.push(name.to_string()),
            Err(_) => {
                return Err(InputError::InvalidUtf8 {
                    path: path.to_path_buf(),
                    line: header_line,
                    column: format!("header field {}", field + 1),
                })
            }
        }
    }
    let header = Header {
        path,
        role,
        line: header_line,
        names,
    };

    let id_column = header.column(&options.id, ColumnKind::Id)?;
    let prediction_column = header.column(&options.prediction, ColumnKind::Prediction)?;
    let outcome_column = match role {
        Role::Labeled => optional_column(&header, options.outcome.as_ref(), ColumnKind::Outcome)?,
        Role::Pool | Role::Shortlist => None,
    };
    let threshold_column = optional_column(
        &header,
        options.threshold_column.as_ref(),
        ColumnKind::Threshold,
    )?;
    let weight_column =
        optional_column(&header, options.weight_column.as_ref(), ColumnKind::Weight)?;
    let feature_names = resolve_features(&options.features, &header.names).map_err(|message| {
        InputError::FeatureSelection {
            path: path.to_path_buf(),
            header_line,
            message,
        }
    })?;
    let feature_columns = feature_names
        .iter()
        .map(|name| header.column(name, ColumnKind::Feature))
        .collect::<Result<Vec<_>, _>>()?;

    let mut ids: Vec<String> = Vec::new();
    let mut prediction: Vec<f64> = Vec::new();
    let mut outcome: Vec<f64> = Vec::new();
    let mut threshold: Vec<f64> = Vec::new();
    let mut weight: Vec<f64> = Vec::new();
    let mut features = FeatureBuffer::new(feature_columns.len());

    let mut record = csv::ByteRecord::new();
    loop {
        match reader.read_byte_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(error) => {
                let reached_line = reader.position().line();
                return Err(csv_error(
                    path,
                    delimiter,
                    &header.names,
                    reached_line,
                    error,
                ));
            }
        }
        if ids.is_empty() {
            // Size every column from the file length and this row's length; generous,
            // since untouched capacity is never paged in.
            let row_bytes = (record.as_slice().len() + record.len()).max(1) as u64;
            let estimate = (file_len / row_bytes).saturating_mul(5) / 4 + 16;
            let estimate = estimate.min(file_len / 2 + 16) as usize;
            ids.reserve(estimate);
            prediction.reserve(estimate);
            if outcome_column.is_some() {
                outcome.reserve(estimate);
            }
            if threshold_column.is_some() {
                threshold.reserve(estimate);
            }
            if weight_column.is_some() {
                weight.reserve(estimate);
            }
            features.reserve_rows(estimate);
        }

        ids.push(id_cell(path, &record, &id_column)?);
        prediction.push(number_cell(path, &record, &prediction_column)?);
        if let Some(column) = &outcome_column {
            outcome.push(number_cell(path, &record, column)?);
        }
        if let Some(column) = &threshold_column {
            threshold.push(number_cell(path, &record, column)?);
        }
        if let Some(column) = &weight_column {
            weight.push(weight_cell(path, &record, column)?);
        }
        features.start_row();
        for (f, column) in feature_columns.iter().enumerate() {
            features.set(f, number_cell(path, &record, column)?);
        }
        features.finish_row();
    }

    if ids.is_empty() {
        return Err(InputError::NoRows {
            path: path.to_path_buf(),
            role,
            header_line,
        });
    }
    if let Some((first_row, row)) = find_duplicate_id(&ids) {
        let lines = row_lines(path, delimiter, &[first_row, row]);
        return Err(InputError::DuplicateId {
            path: path.to_path_buf(),
            line: lines[1],
            first_line: lines[0],
            column: id_column.name,
            id: shown(ids[row].as_bytes()),
        });
    }

    ids.shrink_to_fit();
    prediction.shrink_to_fit();
    let finish = |mut values: Vec<f64>, column: &Option<Column>| {
        column.as_ref().map(|_| {
            values.shrink_to_fit();
            values
        })
    };
    Ok(UnitTable {
        path: path.to_path_buf(),
        role,
        ids,
        outcome: finish(outcome, &outcome_column),
        prediction,
        threshold: finish(threshold, &threshold_column),
        weight: finish(weight, &weight_column),
        feature_names,
        features: features.into_column_major(),
    })
}

fn id_hash(id: &str) -> u64 {
    let mut hasher = DefaultHasher::new();
    id.hash(&mut hasher);
    hasher.finish()
}

/// Rows `(first, second)` of the earliest repeated id (smallest `second`), if any.
///
/// Sorting 64-bit hashes is about ten times faster than a hash set of 10^7 ids (the set's
/// random memory access dominates) and needs 8 bytes per id; only rows whose hash repeats
/// are compared as strings.
fn find_duplicate_id(ids: &[String]) -> Option<(usize, usize)> {
    let mut hashes: Vec<u64> = ids.iter().map(|id| id_hash(id)).collect();
    hashes.sort_unstable();
    let repeated: HashSet<u64> = hashes
        .windows(2)
        .filter(|pair| pair[0] == pair[1])
        .map(|pair| pair[0])
        .collect();
    drop(hashes);
    if repeated.is_empty() {
        return None;
    }
    let mut first_rows: HashMap<&str, usize> = HashMap::new();
    for (row, id) in ids.iter().enumerate() {
        if repeated.contains(&id_hash(id)) {
            match first_rows.entry(id.as_str()) {
                Entry::Occupied(first) => return Some((*first.get(), row)),
                Entry::Vacant(slot) => {
                    slot.insert(row);
                }
            }
        }
    }
    None
}

/// Editor lines of the given data rows (0-based), found by reading the file again.
/// Error path only; rows that cannot be found get line 0.
fn row_lines(path: &Path, delimiter: u8, rows: &[usize]) -> Vec<u64> {
    let mut lines = vec![0; rows.len()];
    let Some(&last) = rows.iter().max() else {
        return lines;
    };
    let Ok(file) = File::open(path) else {
        return lines;
    };
    let mut reader = csv_reader(delimiter, file);
    let mut record = csv::ByteRecord::new();
    let mut row = 0;
    while row <= last && matches!(reader.read_byte_record(&mut record), Ok(true)) {
        for (slot, &wanted) in lines.iter_mut().zip(rows) {
            if wanted == row {
                *slot = record_line(path, &record);
            }
        }
        row += 1;
    }
    lines
}

/// Split "f12" into ("f", 12). `None` without a numeric suffix or on overflow.
fn numeric_suffix(name: &str) -> Option<(&str, u64)> {
    let prefix = name.trim_end_matches(|c: char| c.is_ascii_digit());
    let digits = &name[prefix.len()..];
    if digits.is_empty() {
        return None;
    }
    digits.parse().ok().map(|number| (prefix, number))
}

fn expand_range(
    selector: &str,
    from: &str,
    to: &str,
    header: &[String],
) -> Result<Vec<String>, String> {
    let (prefix, start) = numeric_suffix(from)
        .ok_or_else(|| format!("range `{selector}`: `{from}` does not end in a number"))?;
    let (end_prefix, end) = numeric_suffix(to)
        .ok_or_else(|| format!("range `{selector}`: `{to}` does not end in a number"))?;
    if prefix != end_prefix {
        return Err(format!(
            "range `{selector}`: both ends must share one prefix, got `{prefix}` and `{end_prefix}`"
        ));
    }
    if start > end {
        return Err(format!(
            "range `{selector}` runs backwards; write `{to}..{from}`"
        ));
    }
    let count = end - start + 1;
    if count > header.len() as u64 {
        return Err(format!(
            "range `{selector}` covers {count} columns but the header has only {}",
            header.len()
        ));
    }
    let mut by_number: HashMap<u64, Vec<&str>> = HashMap::new();
    for name in header {
        if let Some((name_prefix, number)) = numeric_suffix(name) {
            if name_prefix == prefix && (start..=end).contains(&number) {
                by_number.entry(number).or_default().push(name);
            }
        }
    }
    let mut names = Vec::with_capacity(count as usize);
    let mut missing = Vec::new();
    for number in start..=end {
        match by_number.get(&number).map(Vec::as_slice) {
            None | Some([]) => missing.push(format!("{prefix}{number}")),
            Some([name]) => names.push(name.to_string()),
            Some(several) => {
                return Err(format!(
                    "range `{selector}`: number {number} matches several columns: {}",
                    several.join(", ")
                ))
            }
        }
    }
    if !missing.is_empty() {
        return Err(format!(
            "range `{selector}`: the header lacks {}",
            name_list(&missing)
        ));
    }
    Ok(names)
}

/// Read a list of ids (one per data row) from column `column` of a CSV/TSV file, e.g. a
/// shortlist made earlier. Returns each id with its 1-based line number.
///
/// # Errors
/// The file cannot be opened or is not valid CSV, is empty or has no rows, lacks the
/// column, has an empty or duplicate id.
pub fn read_id_list(
    path: &Path,
    column: &str,
    delimiter: Option<u8>,
) -> Result<Vec<(String, u64)>, InputError> {
    let file = File::open(path).map_err(|source| InputError::Open {
        path: path.to_path_buf(),
        source,
    })?;
    let mut reader = csv::ReaderBuilder::new()
        .delimiter(delimiter_for(path, delimiter))
        .flexible(true)
        .from_reader(io::BufReader::new(file));
    let malformed = |e: csv::Error| InputError::Malformed {
        path: path.to_path_buf(),
        line: e.position().map_or(0, |p| p.line()),
        message: e.to_string(),
    };
    let header: Vec<String> = reader
        .headers()
        .map_err(malformed)?
        .iter()
        .map(|name| name.trim().trim_start_matches('\u{feff}').to_string())
        .collect();
    if header.iter().all(String::is_empty) {
        return Err(InputError::EmptyFile {
            path: path.to_path_buf(),
            role: Role::Shortlist,
        });
    }
    let Some(index) = header.iter().position(|name| name == column) else {
        return Err(InputError::MissingColumn {
            path: path.to_path_buf(),
            role: Role::Shortlist,
            header_line: 1,
            kind: ColumnKind::Id,
            column: column.to_string(),
            available: header,
        });
    };
    let mut ids: Vec<(String, u64)> = Vec::new();
    let mut first_line: HashMap<String, u64> = HashMap::new();
    for record in reader.records() {
        let record = record.map_err(malformed)?;
        let line = record.position().map_or(0, |p| p.line());
        let id = record.get(index).unwrap_or("").trim().to_string();
        if id.is_empty() {
            return Err(InputError::EmptyId {
                path: path.to_path_buf(),
                line,
                column: column.to_string(),
            });
        }
        if let Some(&first) = first_line.get(&id) {
            return Err(InputError::DuplicateId {
                path: path.to_path_buf(),
                line,
                first_line: first,
                column: column.to_string(),
                id,
            });
        }
        first_line.insert(id.clone(), line);
        ids.push((id, line));
    }
    if ids.is_empty() {
        return Err(InputError::NoRows {
            path: path.to_path_buf(),
            role: Role::Shortlist,
            header_line: 1,
        });
    }
    Ok(ids)
}

/// Expand feature selectors against a header.
///
/// A selector is a column name, or a range `f1..f5` meaning every header name with the same
/// prefix and numeric suffix 1, 2, ..., 5 (compared as numbers, so `f01` counts as 1), each
/// of which must exist. A selector that is itself a header name is taken as a name even if
/// it contains `..`. Selectors are trimmed; the result keeps the order given. Plain names are
/// not checked against the header here ([`read_units`] reports them as missing columns).
///
/// # Errors
/// An empty selector, a range that does not resolve (missing member, different prefixes,
/// no numeric suffix, backwards, ambiguous), or a feature selected twice.
pub fn resolve_features(selectors: &[String], header: &[String]) -> Result<Vec<String>, String> {
    let mut chosen: Vec<String> = Vec::new();
    let mut selected_by: HashMap<String, String> = HashMap::new();
    for raw in selectors {
        let selector = raw.trim();
        if selector.is_empty() {
            return Err(
                "empty feature name in the feature list (a doubled or trailing comma?)".to_string(),
            );
        }
        let names = match selector.split_once("..") {
            Some((from, to)) if !header.iter().any(|name| name == selector) => {
                expand_range(selector, from.trim(), to.trim(), header)?
            }
            _ => vec![selector.to_string()],
        };
        for name in names {
            match selected_by.entry(name.clone()) {
                Entry::Occupied(earlier) => {
                    return Err(format!(
                        "feature `{name}` is selected twice (by `{}` and by `{selector}`)",
                        earlier.get()
                    ))
                }
                Entry::Vacant(slot) => {
                    slot.insert(selector.to_string());
                }
            }
            chosen.push(name);
        }
    }
    Ok(chosen)
}

/// Check that the labeled and pool tables chose the same feature columns (same order).
///
/// # Errors
/// [`InputError::FeatureMismatch`] listing both choices.
pub fn check_same_features(labeled: &UnitTable, pool: &UnitTable) -> Result<(), InputError> {
    if labeled.feature_names == pool.feature_names {
        return Ok(());
    }
    Err(InputError::FeatureMismatch {
        labeled_path: labeled.path.clone(),
        pool_path: pool.path.clone(),
        labeled: labeled.feature_names.clone(),
        pool: pool.feature_names.clone(),
    })
}

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

/// Write `bytes` to a new hidden temporary file next to the target and fsync it.
fn write_temp(dir: &Path, file_name: &str, bytes: &[u8]) -> io::Result<PathBuf> {
    let process = std::process::id();
    loop {
        let count = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
        let temp = dir.join(format!(".{file_name}.{process}-{count}.tmp"));
        let mut file = match OpenOptions::new().write(true).create_new(true).open(&temp) {
            Ok(file) => file,
            Err(error) if error.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(error) => return Err(error),
        };
        let written = file.write_all(bytes).and_then(|()| file.sync_all());
        return match written {
            Ok(()) => Ok(temp),
            Err(error) => {
                let _ = fs::remove_file(&temp);
                Err(error)
            }
        };
    }
}

/// Make renames in `dir` durable. Best effort: not every platform can fsync a directory.
fn sync_dir(dir: &Path) {
    if let Ok(handle) = File::open(dir) {
        let _ = handle.sync_all();
    }
}

fn parent_dir(path: &Path) -> &Path {
    match path.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent,
        _ => Path::new("."),
    }
}

/// Write a file atomically: write to a temporary file in the same directory, fsync, rename.
///
/// Readers see either the old file or the complete new one, never a partial write; on error
/// the temporary file is removed. The directory must exist.
///
/// # Errors
/// I/O errors from creating, writing or renaming; `InvalidInput` if `path` has no file name.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let file_name = path
        .file_name()
        .and_then(|name| name.to_str())
        .ok_or_else(|| {
            io::Error::new(
                io::ErrorKind::InvalidInput,
                format!("cannot write {}: no UTF-8 file name", path.display()),
            )
        })?;
    let dir = parent_dir(path);
    let temp = write_temp(dir, file_name, bytes)?;
    if let Err(error) = fs::rename(&temp, path) {
        let _ = fs::remove_file(&temp);
        return Err(error);
    }
    sync_dir(dir);
    Ok(())
}

/// A set of output files that are all written or none.
///
/// [`OutputSet::add`] collects files in memory; [`OutputSet::commit`] writes each to a
/// temporary name, and only when all are written and synced renames them into place. A
/// failure while writing leaves no file behind. (The renames themselves are separate
/// operations; within one directory they do not fail in practice.)
#[derive(Debug, Default)]
pub struct OutputSet {
    files: Vec<(String, Vec<u8>)>,
}

impl OutputSet {
    pub fn new() -> Self {
        OutputSet::default()
    }

    /// Stage a file. A later `add` with the same name replaces the earlier bytes.
    pub fn add(&mut self, file_name: &str, bytes: Vec<u8>) {
        match self.files.iter_mut().find(|(name, _)| name == file_name) {
            Some(slot) => slot.1 = bytes,
            None => self.files.push((file_name.to_string(), bytes)),
        }
    }

    /// Names of the staged files, in the order first added.
    pub fn file_names(&self) -> impl Iterator<Item = &str> {
        self.files.iter().map(|(name, _)| name.as_str())
    }

    /// Create `dir` if needed, write every file to a temporary name, then rename them all.
    /// Returns the final paths in the order first added.
    ///
    /// # Errors
    /// `InvalidInput` for a file name that is empty, `.`/`..` or contains a path separator
    /// (checked before anything is written); I/O errors from writing or renaming.
    pub fn commit(self, dir: &Path) -> io::Result<Vec<PathBuf>> {
        for (name, _) in &self.files {
            let bad =
                name.is_empty() || name == "." || name == ".." || name.contains(['/', '\\', '\0']);
            if bad {
                return Err(io::Error::new(
                    io::ErrorKind::InvalidInput,
                    format!("output file name `{name}` must be a plain file name"),
                ));
            }
        }
        fs::create_dir_all(dir)?;
        // A directory in the way would make its rename fail after earlier files were
        // renamed; refuse before writing anything.
        for (name, _) in &self.files {
            let target = dir.join(name);
            if target.is_dir() {
                return Err(io::Error::other(format!(
                    "cannot write {}: a directory of that name exists",
                    target.display()
                )));
            }
        }
        let mut temps: Vec<PathBuf> = Vec::with_capacity(self.files.len());
        for (name, bytes) in &self.files {
            match write_temp(dir, name, bytes) {
                Ok(temp) => temps.push(temp),
                Err(error) => {
                    for temp in &temps {
                        let _ = fs::remove_file(temp);
                    }
                    return Err(error);
                }
            }
        }
        let mut finals = Vec::with_capacity(self.files.len());
        for (i, ((name, _), temp)) in self.files.iter().zip(&temps).enumerate() {
            let target = dir.join(name);
            if let Err(error) = fs::rename(temp, &target) {
                for leftover in &temps[i..] {
                    let _ = fs::remove_file(leftover);
                }
                return Err(error);
            }
            finals.push(target);
        }
        sync_dir(dir);
        Ok(finals)
    }
}

#[cfg(test)]
mod tests {
    //! Expected numbers come from Rust's own `str::parse::<f64>` ("Rust std as reference");
    //! expected line numbers are counted by hand in the fixture text, the way a text editor
    //! numbers lines (header = line 1).
    use super::*;
    use tempfile::TempDir;

    fn write(dir: &TempDir, name: &str, content: &[u8]) -> PathBuf {
        let path = dir.path().join(name);
        fs::write(&path, content).unwrap();
        path
    }

    /// Rust std as reference for every expected number.
    fn std_f64(text: &str) -> f64 {
        text.trim().parse::<f64>().unwrap()
    }

    fn labeled_options() -> ReadOptions {
        ReadOptions {
            outcome: Some("y".to_string()),
            features: vec!["f1..f2".to_string()],
            ..ReadOptions::new("pred")
        }
    }

    fn read_error(
        name: &str,
        content: &[u8],
        role: Role,
        options: &ReadOptions,
    ) -> (InputError, String) {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, name, content);
        let error = read_units(&path, role, options).expect_err("the input is bad");
        let message = error.to_string();
        (error, message)
    }

    /// The message names the file, the line and the column.
    fn assert_located(message: &str, file: &str, line: u64, column: &str) {
        assert!(
            message.contains(file),
            "no file name `{file}` in: {message}"
        );
        assert!(
            message.contains(&format!("line {line}")),
            "no `line {line}` in: {message}"
        );
        assert!(
            message.contains(&format!("`{column}`")),
            "no column `{column}` in: {message}"
        );
        assert!(message.contains("Hint: "), "no hint in: {message}");
    }

    const GOOD: &str = "id,y,pred,f1,f2\na,1,0.5,1,2\nb,0,0.25,3,4\n";

    // ---- bad inputs, one test per case ----

    #[test]
    fn missing_file_is_an_open_error_with_the_os_reason() {
        let dir = TempDir::new().unwrap();
        let path = dir.path().join("absent.csv");
        let error = read_units(&path, Role::Labeled, &labeled_options()).unwrap_err();
        assert!(matches!(error, InputError::Open { .. }));
        let message = error.to_string();
        assert!(message.contains("absent.csv"), "{message}");
        let os = io::Error::from(io::ErrorKind::NotFound).to_string();
        assert!(
            message.to_lowercase().contains("no such file") || message.contains(&os),
            "{message}"
        );

        let error = read_units(dir.path(), Role::Pool, &labeled_options()).unwrap_err();
        assert!(matches!(error, InputError::Open { .. }), "{error}");
        assert!(error.to_string().contains("directory"));
    }

    #[test]
    fn empty_file_has_no_header() {
        for content in [&b""[..], b"\n\n", b"\r\n"] {
            let (error, message) = read_error("pool.csv", content, Role::Pool, &labeled_options());
            assert!(
                matches!(
                    error,
                    InputError::EmptyFile {
                        role: Role::Pool,
                        ..
                    }
                ),
                "{message}"
            );
            assert!(message.contains("pool.csv line 1"), "{message}");
            assert!(message.contains("pool file"), "{message}");
        }
    }

    #[test]
    fn header_without_rows() {
        let (error, message) = read_error(
            "labeled.csv",
            b"id,y,pred,f1,f2\n",
            Role::Labeled,
            &labeled_options(),
        );
        assert!(
            matches!(error, InputError::NoRows { header_line: 1, .. }),
            "{message}"
        );
        assert!(message.contains("labeled.csv line 1"), "{message}");
        assert!(message.contains("labeled file"), "{message}");
    }

    #[test]
    fn missing_column_lists_the_header_and_the_flag() {
        let options = ReadOptions {
            prediction: "score".to_string(),
            ..labeled_options()
        };
        let (error, message) = read_error("labeled.csv", GOOD.as_bytes(), Role::Labeled, &options);
        assert!(
            matches!(
                error,
                InputError::MissingColumn {
                    kind: ColumnKind::Prediction,
                    ..
                }
            ),
            "{message}"
        );
        assert_located(&message, "labeled.csv", 1, "score");
        for name in [
            "`id`",
            "`y`",
            "`pred`",
            "`f1`",
            "`f2`",
            "--prediction",
            "labeled file",
        ] {
            assert!(message.contains(name), "no {name} in: {message}");
        }

        // Each optional column is looked up and names its own flag.
        let cases = [
            (
                ReadOptions {
                    outcome: Some("activity".into()),
                    ..labeled_options()
                },
                "--outcome",
            ),
            (
                ReadOptions {
                    threshold_column: Some("cut".into()),
                    ..labeled_options()
                },
                "--threshold-column",
            ),
            (
                ReadOptions {
                    weight_column: Some("w".into()),
                    ..labeled_options()
                },
                "--weight-column",
            ),
            (
                ReadOptions {
                    id: "name".into(),
                    ..labeled_options()
                },
                "--id",
            ),
            (
                ReadOptions {
                    features: vec!["f1".into(), "g".into()],
                    ..labeled_options()
                },
                "--features",
            ),
        ];
        for (options, flag) in cases {
            let (error, message) =
                read_error("labeled.csv", GOOD.as_bytes(), Role::Labeled, &options);
            assert!(
                matches!(error, InputError::MissingColumn { .. }),
                "{message}"
            );
            assert!(message.contains(flag), "no {flag} in: {message}");
        }
    }

    #[test]
    fn single_column_header_suggests_the_delimiter() {
        let (error, message) = read_error(
            "pool.csv",
            b"id;pred\na;0.5\n",
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        assert!(
            matches!(error, InputError::MissingColumn { .. }),
            "{message}"
        );
        assert_located(&message, "pool.csv", 1, "id");
        assert!(message.contains("`id;pred`"), "{message}");
        assert!(message.contains("--delimiter"), "{message}");
    }

    #[test]
    fn doubled_column_name_is_ambiguous() {
        let (error, message) = read_error(
            "pool.csv",
            b"id,pred,pred\na,0.5,0.6\n",
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        assert!(
            matches!(
                error,
                InputError::DuplicateColumn {
                    first_field: 2,
                    second_field: 3,
                    ..
                }
            ),
            "{message}"
        );
        assert_located(&message, "pool.csv", 1, "pred");
    }

    #[test]
    fn non_numeric_cell() {
        let content = "id,pred\na,0.5\nb,0.1\nc,n/a\n";
        let (error, message) = read_error(
            "pool.csv",
            content.as_bytes(),
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        assert!(
            matches!(
                error,
                InputError::NotANumber {
                    line: 4,
                    kind: ColumnKind::Prediction,
                    ..
                }
            ),
            "{message}"
        );
        assert!(
            message.contains(
                "pool.csv line 4, column `pred`: `n/a` is not a number. Hint: every prediction must be a finite number"
            ),
            "{message}"
        );
        for bad in ["1,5", "0x10", "1e", "--1", "1.2.3", "five", "\"1 2\""] {
            let content = format!("id,y,pred,f1,f2\na,1,0.5,1,2\nb,0,0.25,{bad},4\n");
            let (error, message) = read_error(
                "labeled.csv",
                content.as_bytes(),
                Role::Labeled,
                &labeled_options(),
            );
            match error {
                // "1,5" unquoted is an extra field, not a bad number.
                InputError::FieldCount { .. } if bad == "1,5" => continue,
                InputError::NotANumber {
                    line: 3,
                    kind: ColumnKind::Feature,
                    ..
                } => {}
                _ => panic!("{bad}: {message}"),
            }
            assert_located(&message, "labeled.csv", 3, "f1");
            assert!(message.contains("feature value"), "{message}");
        }
    }

    #[test]
    fn nan_and_infinite_values() {
        for bad in [
            "nan", "NaN", "-nan", "inf", "-inf", "Infinity", "1e400", "-1e309",
        ] {
            assert!(
                bad.parse::<f64>().is_ok_and(|v| !v.is_finite()),
                "Rust std parses {bad} as non-finite"
            );
            let content = format!("id,y,pred,f1,f2\na,1,0.5,1,2\nb,{bad},0.25,3,4\n");
            let (error, message) = read_error(
                "labeled.csv",
                content.as_bytes(),
                Role::Labeled,
                &labeled_options(),
            );
            assert!(
                matches!(
                    error,
                    InputError::NotFinite {
                        line: 3,
                        kind: ColumnKind::Outcome,
                        ..
                    }
                ),
                "{bad}: {message}"
            );
            assert_located(&message, "labeled.csv", 3, "y");
            assert!(message.contains(&format!("`{bad}`")), "{message}");
        }
    }

    #[test]
    fn empty_cell_in_a_required_column() {
        for blank in ["", "  ", "\"\""] {
            let content = format!("id,pred,thr\na,0.5,1\nb,0.5,{blank}\n");
            let options = ReadOptions {
                threshold_column: Some("thr".to_string()),
                ..ReadOptions::new("pred")
            };
            let (error, message) = read_error("pool.csv", content.as_bytes(), Role::Pool, &options);
            assert!(
                matches!(
                    error,
                    InputError::EmptyCell {
                        line: 3,
                        kind: ColumnKind::Threshold,
                        ..
                    }
                ),
                "{message}"
            );
            assert_located(&message, "pool.csv", 3, "thr");
        }
    }

    #[test]
    fn empty_id() {
        let (error, message) = read_error(
            "pool.csv",
            b"id,pred\na,0.5\n  ,0.5\n",
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        assert!(
            matches!(error, InputError::EmptyId { line: 3, .. }),
            "{message}"
        );
        assert_located(&message, "pool.csv", 3, "id");
    }

    #[test]
    fn id_that_is_not_utf8() {
        let (error, message) = read_error(
            "pool.csv",
            b"id,pred\na,0.5\nb\xff,0.5\n",
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        assert!(
            matches!(error, InputError::InvalidUtf8 { line: 3, .. }),
            "{message}"
        );
        assert_located(&message, "pool.csv", 3, "id");
    }

    #[test]
    fn duplicate_id_names_both_lines() {
        let content = "id,pred\na,0.5\nb,0.5\nc,0.5\n b ,0.5\na,0.1\n";
        let (error, message) = read_error(
            "pool.csv",
            content.as_bytes(),
            Role::Pool,
            &ReadOptions::new("pred"),
        );
        // " b " is trimmed, so line 5 repeats line 3 (found before the repeat of `a` on line 6).
        assert!(
            matches!(&error, InputError::DuplicateId { line: 5, first_line: 3, id, .. } if id == "b"),
            "{message}"
        );
        assert_located(&message, "pool.csv", 5, "id");
        assert!(message.contains("line 3"), "{message}");
    }

    #[test]
    fn duplicate_id_lines_survive_blank_lines_and_multiline_cells() {
        let content = "id,pred,note\na,0.5,\"two\nlines\"\n\nb,0.5,x\r\na,0.5,y\r\n";
        let options = ReadOptions::new("pred");
        let (error, message) = read_error("pool.csv", content.as_bytes(), Role::Pool, &options);
        assert!(
            matches!(
                error,
                InputError::DuplicateId {
                    line: 6,
                    first_line: 2,
                    ..
                }
            ),
            "{message}"
        );
    }

    #[test]
    fn weight_must_be_positive() {
        for bad in ["0", "-0", "-1.5", "0.0e0"] {
            let content = format!("id,pred,w\na,0.5,1\nb,0.5,{bad}\n");
            let options = ReadOptions {
                weight_column: Some("w".to_string()),
                ..ReadOptions::new("pred")
            };
            let (error, message) = read_error("pool.csv", content.as_bytes(), Role::Pool, &options);
            assert!(
                matches!(error, InputError::NonPositiveWeight { line: 3, .. }),
                "{bad}: {message}"
            );
            assert_located(&message, "pool.csv", 3, "w");
            assert!(message.contains("density ratio"), "{message}");
        }
        // A weight that is not a number at all is reported as such, not as non-positive.
        let options = ReadOptions {
            weight_column: Some("w".to_string()),
            ..ReadOptions::new("pred")
        };
        let (error, _) = read_error("pool.csv", b"id,pred,w\na,0.5,x\n", Role::Pool, &options);
        assert!(matches!(
            error,
            InputError::NotANumber {
                kind: ColumnKind::Weight,
                ..
            }
        ));
        let (error, _) = read_error("pool.csv", b"id,pred,w\na,0.5,inf\n", Role::Pool, &options);
        assert!(matches!(
            error,
            InputError::NotFinite {
                kind: ColumnKind::Weight,
                ..
            }
        ));
    }

    #[test]
    fn wrong_number_of_fields() {
        let (error, message) = read_error(
            "labeled.csv",
            b"id,y,pred,f1,f2\na,1,0.5,1,2\nb,0,0.25,3\n",
            Role::Labeled,
            &labeled_options(),
        );
        assert!(
            matches!(
                error,
                InputError::FieldCount {
                    line: 3,
                    expected: 5,
                    found: 4,
                    ..
                }
            ),
            "{message}"
        );
        assert_located(&message, "labeled.csv", 3, "f2");

        let (error, message) = read_error(
            "labeled.tsv",
            b"id\ty\tpred\tf1\tf2\na\t1\t0.5\t1\t2\t9\n",
            Role::Labeled,
            &labeled_options(),
        );
        assert!(
            matches!(
                error,
                InputError::FieldCount {
                    line: 2,
                    expected: 5,
                    found: 6,
                    ..
                }
            ),
            "{message}"
        );
        assert_located(&message, "labeled.tsv", 2, "f2");
        assert!(message.contains("tab"), "{message}");
    }

    #[test]
    fn feature_range_that_does_not_resolve() {
        let options = ReadOptions {
            features: vec!["f1..f3".to_string()],
            ..labeled_options()
        };
        let (error, message) = read_error("labeled.csv", GOOD.as_bytes(), Role::Labeled, &options);
        assert!(
            matches!(error, InputError::FeatureSelection { header_line: 1, .. }),
            "{message}"
        );
        assert_located(&message, "labeled.csv", 1, "f3");
    }

    #[test]
    fn different_feature_choices_are_rejected() {
        let dir = TempDir::new().unwrap();
        let labeled_path = write(&dir, "labeled.csv", GOOD.as_bytes());
        let pool_path = write(&dir, "pool.csv", b"id,pred,f1,f2\nz,0.5,1,2\n");
        let labeled = read_units(&labeled_path, Role::Labeled, &labeled_options()).unwrap();
        let pool_options = ReadOptions {
            features: vec!["f2".into(), "f1".into()],
            ..labeled_options()
        };
        let pool = read_units(&pool_path, Role::Pool, &pool_options).unwrap();
        let error = check_same_features(&labeled, &pool).unwrap_err();
        assert!(matches!(error, InputError::FeatureMismatch { .. }));
        let message = error.to_string();
        assert!(
            message.contains("labeled.csv") && message.contains("pool.csv"),
            "{message}"
        );
        assert!(
            message.contains("[f1, f2]") && message.contains("[f2, f1]"),
            "{message}"
        );

        let pool = read_units(&pool_path, Role::Pool, &labeled_options()).unwrap();
        check_same_features(&labeled, &pool).unwrap();
    }

    // ---- line numbers as an editor shows them ----

    #[test]
    fn line_numbers_count_blank_lines_crlf_quoted_newlines_and_bom() {
        let options = ReadOptions::new("pred");
        let cases: [(&[u8], u64); 6] = [
            // plain LF, bad cell on line 3
            (b"id,pred\na,1\nb,x\n", 3),
            // CRLF: csv reports the position before the previous row's `\n`
            (b"id,pred\r\na,1\r\nb,2\r\nc,x\r\n", 4),
            // blank lines before the bad row
            (b"id,pred\na,1\n\n\n\nb,x\n", 6),
            // CRLF blank lines
            (b"id,pred\r\na,1\r\n\r\n\r\nb,x\r\n", 5),
            // a quoted cell spanning two lines pushes later rows down
            (b"id,pred\n\"a\nA\",1\nb,x\n", 4),
            // byte order mark, blank lines before the header
            (b"\xef\xbb\xbf\n\nid,pred\na,1\nb,x", 5),
        ];
        for (content, line) in cases {
            let (error, message) = read_error("pool.csv", content, Role::Pool, &options);
            assert!(
                matches!(error, InputError::NotANumber { line: l, .. } if l == line),
                "{:?}: {message}",
                String::from_utf8_lossy(content)
            );
        }
        // Header line after leading blank lines and a BOM.
        let (error, message) = read_error(
            "pool.csv",
            b"\xef\xbb\xbf\r\n\r\nid,score\na,1\n",
            Role::Pool,
            &options,
        );
        assert!(
            matches!(error, InputError::MissingColumn { header_line: 3, .. }),
            "{message}"
        );
        // Field count errors get the same correction.
        let (error, message) = read_error(
            "pool.csv",
            b"id,pred\r\na,1\r\n\r\nb\r\n",
            Role::Pool,
            &options,
        );
        assert!(
            matches!(error, InputError::FieldCount { line: 4, .. }),
            "{message}"
        );
    }

    // ---- good inputs ----

    #[test]
    fn reads_comma_separated_labeled_file() {
        let dir = TempDir::new().unwrap();
        let content = "id,y,pred,thr,w,f1,f2,f3\n\
                       u1,1.5,0.25,1,2.5,1e-3,-2.5E+2,7\n\
                       u2, 0 , -0.125 ,1,0.5, .5 ,3.,+4\n\
                       u3,2,1,2,1,0,0,0\n";
        let path = write(&dir, "labeled.csv", content.as_bytes());
        let options = ReadOptions {
            threshold_column: Some("thr".into()),
            weight_column: Some("w".into()),
            features: vec!["f3".into(), "f1..f2".into()],
            ..labeled_options()
        };
        let table = read_units(&path, Role::Labeled, &options).unwrap();
        assert_eq!(table.len(), 3);
        assert!(!table.is_empty());
        assert_eq!(table.role, Role::Labeled);
        assert_eq!(table.path, path);
        assert_eq!(table.ids, ["u1", "u2", "u3"]);
        let numbers = |texts: &[&str]| texts.iter().map(|t| std_f64(t)).collect::<Vec<_>>();
        assert_eq!(
            table.outcome.as_deref(),
            Some(&numbers(&["1.5", "0", "2"])[..])
        );
        assert_eq!(table.prediction, numbers(&["0.25", "-0.125", "1"]));
        assert_eq!(
            table.threshold.as_deref(),
            Some(&numbers(&["1", "1", "2"])[..])
        );
        assert_eq!(
            table.weight.as_deref(),
            Some(&numbers(&["2.5", "0.5", "1"])[..])
        );
        assert_eq!(table.feature_names, ["f3", "f1", "f2"]);
        assert_eq!(table.feature_column(0), numbers(&["7", "+4", "0"]));
        assert_eq!(table.feature_column(1), numbers(&["1e-3", ".5", "0"]));
        assert_eq!(table.feature_column(2), numbers(&["-2.5E+2", "3.", "0"]));
        // Column-major layout, as documented on the field.
        let n = table.len();
        assert_eq!(table.features.len(), 3 * n);
        assert_eq!(table.features[2 * n + 1], std_f64("3."));
    }

    #[test]
    fn tab_separated_by_extension_and_explicit_delimiter() {
        let dir = TempDir::new().unwrap();
        let tsv = "id\tpred\tf1\n\"a,b\"\t0.5\t1e-3\nc\t  2  \t\"-7\"\n";
        for name in ["pool.tsv", "pool.TAB"] {
            let path = write(&dir, name, tsv.as_bytes());
            let options = ReadOptions {
                features: vec!["f1".into()],
                ..ReadOptions::new("pred")
            };
            let table = read_units(&path, Role::Pool, &options).unwrap();
            assert_eq!(table.ids, ["a,b", "c"]);
            assert_eq!(table.prediction, [std_f64("0.5"), std_f64("2")]);
            assert_eq!(table.feature_column(0), [std_f64("1e-3"), std_f64("-7")]);
            assert!(table.outcome.is_none() && table.threshold.is_none() && table.weight.is_none());
        }
        let path = write(&dir, "pool.txt", b"id;pred\nx;0.5\n");
        let options = ReadOptions {
            delimiter: Some(b';'),
            ..ReadOptions::new("pred")
        };
        let table = read_units(&path, Role::Pool, &options).unwrap();
        assert_eq!(table.prediction, [std_f64("0.5")]);
        assert_eq!(delimiter_for(Path::new("a.csv"), None), b',');
        assert_eq!(delimiter_for(Path::new("a.tsv"), None), b'\t');
        assert_eq!(delimiter_for(Path::new("a.tsv"), Some(b',')), b',');
    }

    #[test]
    fn quoted_fields_bom_crlf_and_spaced_header() {
        let dir = TempDir::new().unwrap();
        let content =
            b"\xef\xbb\xbf id , pred \r\n\"x \"\"1\"\"\",\" 1.5e2 \"\r\n\r\n\"y\nz\",\"-0.5\"\r\n";
        let path = write(&dir, "pool.csv", content);
        let table = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap();
        assert_eq!(table.ids, ["x \"1\"", "y\nz"]);
        assert_eq!(table.prediction, [std_f64("1.5e2"), std_f64("-0.5")]);
    }

    #[test]
    fn pool_ignores_the_outcome_column() {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "pool.csv", b"id,pred,f1,f2\na,0.5,1,2\n");
        let table = read_units(&path, Role::Pool, &labeled_options()).unwrap();
        assert!(table.outcome.is_none());
        let path = write(&dir, "labeled.csv", b"id,pred\na,0.5\n");
        let table = read_units(&path, Role::Labeled, &ReadOptions::new("pred")).unwrap();
        assert!(table.outcome.is_none());
    }

    #[test]
    fn feature_buffer_grows_past_a_low_row_estimate() {
        // The first row is long, so the estimate from the file length is far too low and the
        // buffer must widen several times; values must survive every copy.
        let dir = TempDir::new().unwrap();
        let mut content = String::from("id,pred,f1,f2,f3\n");
        content.push_str(&format!("r0,0.{},1,2,3\n", "1".repeat(3000)));
        let rows = 5000;
        for r in 1..rows {
            content.push_str(&format!("r{r},0,{r},{},{}\n", r * 2, r % 7));
        }
        let path = write(&dir, "pool.csv", content.as_bytes());
        let options = ReadOptions {
            features: vec!["f1..f3".into()],
            ..ReadOptions::new("pred")
        };
        let table = read_units(&path, Role::Pool, &options).unwrap();
        assert_eq!(table.len(), rows);
        assert_eq!(table.features.len(), 3 * rows);
        for r in 1..rows {
            assert_eq!(table.feature_column(0)[r], r as f64);
            assert_eq!(table.feature_column(1)[r], (r * 2) as f64);
            assert_eq!(table.feature_column(2)[r], (r % 7) as f64);
        }
        assert_eq!(table.feature_column(2)[0], 3.0);
    }

    #[test]
    fn no_features_gives_an_empty_buffer() {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "pool.csv", b"id,pred\na,0.5\nb,0.7\n");
        let table = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap();
        assert!(table.feature_names.is_empty() && table.features.is_empty());
    }

    // ---- number parsing against Rust std ----

    /// Reference: Rust std `str::parse::<f64>`, keeping finite values only.
    fn std_finite(text: &str) -> Option<f64> {
        text.trim_ascii()
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
    }

    fn assert_same_as_std(text: &str) {
        let ours = parse_finite(text.as_bytes());
        let reference = std_finite(text);
        assert_eq!(
            ours.map(f64::to_bits),
            reference.map(f64::to_bits),
            "{text:?}: ours {ours:?}, Rust std {reference:?}"
        );
    }

    #[test]
    fn number_parsing_matches_rust_std() {
        let fixed = [
            "0",
            "-0",
            "+0",
            "1",
            "1.",
            ".5",
            "+.5",
            "-.5",
            "1e-3",
            "1E+3",
            "1e308",
            "1.7976931348623157e308",
            "1.7976931348623159e308",
            "1e309",
            "4.9e-324",
            "2.4e-324",
            "1e-400",
            "0.1",
            "0.30000000000000004",
            "123456789012345678901234567890",
            "00012",
            "  7.25\t",
            "1e",
            "e5",
            ".",
            "+",
            "-",
            "",
            " ",
            "inf",
            "-Infinity",
            "NaN",
            "nan",
            "infinit",
            "0x10",
            "1_0",
            "1,5",
            "+-1",
            "--1",
            "1d3",
            "1.2.3",
            "١",
            "½",
            "1 2",
            "2.2250738585072011e-308",
            "2.2250738585072014e-308",
            "9007199254740993",
        ];
        for text in fixed {
            assert_same_as_std(text);
        }
        // Pseudo-random strings from a fixed xorshift64 stream: round-trip representations of
        // random bit patterns, random digit strings with exponents, and junk from a small
        // alphabet of characters that matter to a float parser.
        let mut state: u64 = 0x9E37_79B9_7F4A_7C15;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        for _ in 0..20_000 {
            let value = f64::from_bits(next());
            assert_same_as_std(&format!("{value}"));
            assert_same_as_std(&format!("{value:e}"));
            assert_same_as_std(&format!("{value:.3}"));
            let digits: String = (0..1 + next() % 25)
                .map(|_| char::from(b'0' + (next() % 10) as u8))
                .collect();
            let point = (next() % (digits.len() as u64 + 1)) as usize;
            let exponent = (next() % 700) as i64 - 350;
            assert_same_as_std(&format!(
                "{}.{}e{exponent}",
                &digits[..point],
                &digits[point..]
            ));
            let alphabet = b"0123456789.eE+-naifINF x";
            let junk: String = (0..1 + next() % 8)
                .map(|_| char::from(alphabet[(next() % alphabet.len() as u64) as usize]))
                .collect();
            assert_same_as_std(&junk);
        }
    }

    // ---- feature selectors ----

    fn names(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn feature_ranges_expand_by_numeric_suffix() {
        let header = names(&["id", "pred", "f1", "f2", "f3", "f10", "g1", "x..y"]);
        let resolve = |selectors: &[&str]| resolve_features(&names(selectors), &header);
        assert_eq!(resolve(&["f1..f3"]).unwrap(), ["f1", "f2", "f3"]);
        assert_eq!(resolve(&["f3", " f1..f2 "]).unwrap(), ["f3", "f1", "f2"]);
        assert_eq!(resolve(&["f2..f2", "g1"]).unwrap(), ["f2", "g1"]);
        assert_eq!(resolve(&["x..y"]).unwrap(), ["x..y"]);
        assert_eq!(resolve(&[]).unwrap(), Vec::<String>::new());
        // Plain names pass through; read_units reports the missing ones.
        assert_eq!(resolve(&["not_there"]).unwrap(), ["not_there"]);
        // Zero-padded names match by number.
        let padded = names(&["f01", "f02", "f03"]);
        assert_eq!(
            resolve_features(&names(&["f1..f3"]), &padded).unwrap(),
            ["f01", "f02", "f03"]
        );
        assert_eq!(
            resolve_features(&names(&["f02..f03"]), &padded).unwrap(),
            ["f02", "f03"]
        );
    }

    #[test]
    fn feature_ranges_that_fail() {
        let header = names(&["id", "f1", "f3", "f4", "g2", "h1", "h01"]);
        let fails = |selectors: &[&str], needle: &str| {
            let message = resolve_features(&names(selectors), &header).unwrap_err();
            assert!(message.contains(needle), "{selectors:?}: {message}");
        };
        fails(&["f1..f3"], "`f2`");
        fails(&["f1..g2"], "prefix");
        fails(&["f4..f1"], "backwards");
        fails(&["f..f3"], "does not end in a number");
        fails(&["h1..h1"], "several columns");
        fails(&["f1", "f1"], "selected twice");
        fails(&["f3..f4", "f4"], "`f4` is selected twice");
        fails(&["f1", ""], "empty feature name");
        fails(&["f1..f99999999999999"], "covers");
    }

    // ---- writing ----

    fn leftovers(dir: &Path) -> Vec<String> {
        fs::read_dir(dir)
            .unwrap()
            .map(|entry| entry.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|name| name.ends_with(".tmp"))
            .collect()
    }

    #[test]
    fn write_atomic_replaces_and_leaves_no_temporary_file() {
        let dir = TempDir::new().unwrap();
        let path = dir.path().join("summary.json");
        write_atomic(&path, b"first").unwrap();
        write_atomic(&path, b"second").unwrap();
        assert_eq!(fs::read(&path).unwrap(), b"second");
        assert!(leftovers(dir.path()).is_empty());
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 1);

        let missing = dir.path().join("no_such_dir").join("x.csv");
        assert!(write_atomic(&missing, b"x").is_err());
        assert!(!missing.exists());

        // The target is a directory: the rename fails and the temporary file is removed.
        let blocked = dir.path().join("blocked");
        fs::create_dir(&blocked).unwrap();
        fs::write(blocked.join("inside"), b"x").unwrap();
        assert!(write_atomic(&blocked, b"x").is_err());
        assert!(leftovers(dir.path()).is_empty());
    }

    #[test]
    fn output_set_writes_every_file() {
        let dir = TempDir::new().unwrap();
        let out = dir.path().join("results").join("run1");
        let mut set = OutputSet::new();
        set.add("candidates.csv", b"id,p\n".to_vec());
        set.add("summary.json", b"{}".to_vec());
        set.add("candidates.csv", b"id,p\na,0.5\n".to_vec());
        assert_eq!(
            set.file_names().collect::<Vec<_>>(),
            ["candidates.csv", "summary.json"]
        );
        let written = set.commit(&out).unwrap();
        assert_eq!(
            written,
            [out.join("candidates.csv"), out.join("summary.json")]
        );
        assert_eq!(fs::read(&written[0]).unwrap(), b"id,p\na,0.5\n");
        assert_eq!(fs::read(&written[1]).unwrap(), b"{}");
        assert!(leftovers(&out).is_empty());
        assert_eq!(fs::read_dir(&out).unwrap().count(), 2);
    }

    #[test]
    fn output_set_writes_nothing_when_a_name_is_bad() {
        for bad in ["", "..", "sub/file.csv"] {
            let dir = TempDir::new().unwrap();
            let out = dir.path().join("out");
            let mut set = OutputSet::new();
            set.add("good.csv", b"x".to_vec());
            set.add(bad, b"y".to_vec());
            let error = set.commit(&out).unwrap_err();
            assert_eq!(error.kind(), io::ErrorKind::InvalidInput);
            assert!(!out.exists(), "nothing may be created for {bad:?}");
        }
    }

    #[test]
    fn output_set_writes_nothing_when_a_target_is_a_directory() {
        let dir = TempDir::new().unwrap();
        fs::create_dir(dir.path().join("report.html")).unwrap();
        let mut set = OutputSet::new();
        set.add("candidates.csv", b"x".to_vec());
        set.add("report.html", b"y".to_vec());
        assert!(set.commit(dir.path()).is_err());
        assert!(!dir.path().join("candidates.csv").exists());
        assert!(leftovers(dir.path()).is_empty());
    }
}
