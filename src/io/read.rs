//! Reading the labeled and pool CSV/TSV files into column vectors ([`read_units`]) and
//! lists of ids ([`read_id_list`]): the csv reader, editor line numbers, cell parsing.
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
use std::io::Read;
use std::path::{Path, PathBuf};

use super::columns::{ChosenColumns, Column, Header};
use super::errors::{shown, InputError};
use super::outcome::{classify, decide_censored, MissingOutcome, OutcomeCell, OutcomeCells};
use super::source::{display_path, Source};

mod chunks;
pub use chunks::{id_hash as pool_id_hash, PoolChunk, PoolChunks};

/// Which file a table came from; used in messages ("labeled file", "pool file").
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Role {
    Labeled,
    Pool,
    /// A list of ids chosen earlier (`audit --shortlist`).
    Shortlist,
    /// One table holding both (`--table`): rows with an outcome are labeled, the others
    /// the pool.
    Table,
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Role::Labeled => "labeled file",
            Role::Pool => "pool file",
            Role::Shortlist => "shortlist file",
            Role::Table => "table",
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
    /// A column copied verbatim to the outputs (`--keep-columns`).
    Kept,
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
            ColumnKind::Kept => "kept column",
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
            ColumnKind::Kept => "--keep-columns",
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
    /// (see [`resolve_features`](super::resolve_features)).
    pub features: Vec<String>,
    /// Field delimiter. `None`: tab if the file name ends in .tsv/.tab, else comma.
    pub delimiter: Option<u8>,
    /// Columns copied verbatim to the outputs (`--keep-columns`), in this order. Required
    /// in a pool file and a one-table input; a labeled file reads those it has.
    pub keep_columns: Vec<String>,
    /// How labeled outcome cells that are not plain numbers are read (missing-value
    /// tokens, censored values); defaults to [`OutcomeCells::default`].
    pub outcome_cells: OutcomeCells,
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
            keep_columns: Vec::new(),
            outcome_cells: OutcomeCells::default(),
        }
    }
}

/// Columns copied verbatim from the input to the outputs (`--keep-columns`): their names
/// and their cells, row-major (row `r`, kept column `k` at `values[r * names.len() + k]`).
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct KeptColumns {
    pub names: Vec<String>,
    pub values: Vec<String>,
}

impl KeptColumns {
    /// The kept cells of row `r`, in `names` order (empty when nothing is kept).
    pub fn row(&self, r: usize) -> &[String] {
        let k = self.names.len();
        &self.values[r * k..(r + 1) * k]
    }

    /// The kept cells of rows `rows`, in that order.
    pub fn subset(&self, rows: &[usize]) -> KeptColumns {
        KeptColumns {
            names: self.names.clone(),
            values: rows
                .iter()
                .flat_map(|&r| self.row(r).iter().cloned())
                .collect(),
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
    /// Pass-through columns (`--keep-columns`); empty unless asked for.
    pub kept: KeptColumns,
    /// Labeled rows left out because their outcome was a missing-value token
    /// (`--missing-outcome drop`); 0 for a pool.
    pub dropped_missing_outcome: usize,
    /// Labeled outcomes given as censored values (`>x`, `<=x`, ...) and decided by their
    /// bound; 0 for a pool.
    pub censored_outcomes: usize,
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

/// The field delimiter for `path`: `explicit` if given, else tab for names ending in
/// `.tsv` or `.tab` (any case; also before a `.gz` or `.zst` ending, as in `x.tsv.gz`),
/// else comma.
pub fn delimiter_for(path: &Path, explicit: Option<u8>) -> u8 {
    if let Some(delimiter) = explicit {
        return delimiter;
    }
    let name = path
        .file_name()
        .and_then(|name| name.to_str())
        .unwrap_or_default()
        .to_ascii_lowercase();
    let name = [".gz", ".zst"]
        .iter()
        .find_map(|ending| name.strip_suffix(ending))
        .unwrap_or(&name);
    if name.ends_with(".tsv") || name.ends_with(".tab") {
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
/// The [`Source`] remembers the recent runs of line-end bytes, so the newlines between that
/// position and the record's first byte are counted without reading the file again.
fn editor_line(source: &Source, position: &csv::Position) -> u64 {
    position.line() + source.newlines_from(position.byte())
}

/// Map a csv error to an [`InputError`]; `reached_line` (where the reader stopped) stands in
/// when csv gives no position, as for I/O errors.
fn csv_error(
    source_reader: &Source,
    path: &Path,
    delimiter: u8,
    header: &[String],
    reached_line: u64,
    error: csv::Error,
) -> InputError {
    let line = error.position().map_or(reached_line, |position| {
        editor_line(source_reader, position)
    });
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
fn number_error(path: &Path, line: u64, record: &csv::ByteRecord, column: &Column) -> InputError {
    let cell = record.get(column.index).unwrap_or_default().trim_ascii();
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
fn number_cell(
    path: &Path,
    line: u64,
    record: &csv::ByteRecord,
    column: &Column,
) -> Result<f64, InputError> {
    match record.get(column.index).and_then(parse_finite) {
        Some(value) => Ok(value),
        None => Err(number_error(path, line, record, column)),
    }
}

#[inline]
fn weight_cell(
    path: &Path,
    line: u64,
    record: &csv::ByteRecord,
    column: &Column,
) -> Result<f64, InputError> {
    match record.get(column.index).and_then(parse_finite) {
        Some(value) if value > 0.0 => Ok(value),
        _ => Err(number_error(path, line, record, column)),
    }
}

/// An id cell: trimmed, non-empty UTF-8 without control characters (a NUL, a tab or a
/// line break inside an id is almost always a damaged file, and would garble every output
/// that lists ids).
#[inline]
fn id_cell<'r>(
    path: &Path,
    line: u64,
    record: &'r csv::ByteRecord,
    column: &Column,
) -> Result<&'r str, InputError> {
    let cell = record.get(column.index).unwrap_or_default().trim_ascii();
    match std::str::from_utf8(cell) {
        Ok(id) if !id.is_empty() => {
            if let Some(bad) = id.chars().find(|c| c.is_control()) {
                return Err(InputError::ControlInId {
                    path: path.to_path_buf(),
                    line,
                    column: column.name.clone(),
                    id: shown(cell),
                    code: bad as u32,
                });
            }
            Ok(id)
        }
        Ok(_) => Err(InputError::EmptyId {
            path: path.to_path_buf(),
            line,
            column: column.name.clone(),
        }),
        Err(_) => Err(InputError::InvalidUtf8 {
            path: path.to_path_buf(),
            line,
            column: column.name.clone(),
        }),
    }
}

/// Read one file of units.
///
/// Reads the whole file into memory: about 8 bytes per number plus the ids.
/// Header names and cells are trimmed of ASCII whitespace; a UTF-8 byte order mark, blank
/// lines and CRLF line ends are accepted; gzip and Zstandard files are decompressed
/// ([`Source::open`]).
///
/// # Errors
/// Every bad input is an [`InputError`] variant naming the file, line and column: file
/// cannot be opened, empty file, no data rows, missing or doubled column, non-numeric,
/// empty, NaN or infinite cell, empty or non-UTF-8 id, duplicate id, weight <= 0, wrong
/// number of fields, feature selection that does not resolve, a missing or undecidable
/// censored outcome (see [`OutcomeCells`]).
pub fn read_units(path: &Path, role: Role, options: &ReadOptions) -> Result<UnitTable, InputError> {
    read_units_choosing(path, role, options, |_| None)
}

/// [`read_units`] for a file whose prediction column is chosen once the header is known:
/// `choose` gets the header names and may return the column to read as the prediction
/// (else `options.prediction` is read). `shift` uses it to read a feature in place of a
/// prediction without opening the file twice (a named pipe or standard input can be read
/// only once).
///
/// # Errors
/// As [`read_units`].
pub fn read_units_choosing(
    path: &Path,
    role: Role,
    options: &ReadOptions,
    choose: impl FnOnce(&[String]) -> Option<String>,
) -> Result<UnitTable, InputError> {
    let (table, _) = read_file(path, role, options, None, choose)?;
    Ok(table)
}

/// Read one table holding both the labeled rows and the pool (`--table`), once, from start
/// to end (standard input works): a row whose outcome cell is empty, or one of
/// `untested_markers` (trimmed, ignoring ASCII case), is a pool row; every other row is
/// labeled and its outcome is read as in a labeled file (missing-value tokens, censored
/// values: `options.outcome_cells`, where an empty cell means untested instead). Both
/// tables keep the file's row order; messages name the file and its editor lines.
///
/// `options.outcome` names the outcome column (required). Returns `(labeled, pool)`, with
/// roles [`Role::Labeled`] and [`Role::Pool`] and the same path.
///
/// # Errors
/// As [`read_units`]; also [`InputError::TableSideEmpty`] when no row is labeled or no row
/// is untested, and [`InputError::DuplicateId`] for an id on two rows of either kind.
pub fn read_table(
    path: &Path,
    options: &ReadOptions,
    untested_markers: &[String],
) -> Result<(UnitTable, UnitTable), InputError> {
    read_table_choosing(path, options, untested_markers, |_| None)
}

/// [`read_table`] with the prediction column chosen from the header, as in
/// [`read_units_choosing`].
///
/// # Errors
/// As [`read_table`].
///
/// # Panics
/// If `options.outcome` is `None`.
pub fn read_table_choosing(
    path: &Path,
    options: &ReadOptions,
    untested_markers: &[String],
    choose: impl FnOnce(&[String]) -> Option<String>,
) -> Result<(UnitTable, UnitTable), InputError> {
    assert!(
        options.outcome.is_some(),
        "a one-table read needs the outcome column to tell labeled rows from the pool"
    );
    let (labeled, pool) = read_file(path, Role::Table, options, Some(untested_markers), choose)?;
    Ok((labeled, pool.expect("a one-table read returns the pool")))
}

/// The one reader behind [`read_units`] and [`read_table`]: with `untested` (a one-table
/// read) the rows are split into a labeled table and a pool.
fn read_file(
    path: &Path,
    role: Role,
    options: &ReadOptions,
    untested: Option<&[String]>,
    choose: impl FnOnce(&[String]) -> Option<String>,
) -> Result<(UnitTable, Option<UnitTable>), InputError> {
    let shown_path = display_path(path);
    let (mut reader, delimiter, file_len) = open_table(path, &shown_path, options.delimiter)?;
    let header = read_header(&mut reader, &shown_path, role, delimiter)?;
    let columns = match choose(&header.names) {
        Some(prediction) => header.choose_columns(&ReadOptions {
            prediction,
            ..options.clone()
        })?,
        None => header.choose_columns(options)?,
    };
    let rules = RowRules {
        cells: &options.outcome_cells,
        untested,
    };
    let rows = read_rows(
        &mut reader,
        &shown_path,
        delimiter,
        &header.names,
        &columns,
        &rules,
        file_len,
    )?;
    let header_line = header.line;
    let (mut table, mut pool) = finish_table(&shown_path, role, header_line, columns, rows)?;
    table.path = path.to_path_buf();
    if let Some(pool) = pool.as_mut() {
        pool.path = path.to_path_buf();
    }
    Ok((table, pool))
}

/// Open `path` for reading (not a directory; `-` is standard input) with the delimiter it
/// gets; also returns the file length (0 for a pipe), from which the row count is estimated.
fn open_table(
    path: &Path,
    shown_path: &Path,
    explicit_delimiter: Option<u8>,
) -> Result<(csv::Reader<Source>, u8, u64), InputError> {
    let source = Source::open(path).map_err(|source| open_error(shown_path, source))?;
    let file_len = source.len_hint();
    let delimiter = delimiter_for(path, explicit_delimiter);
    Ok((csv_reader(delimiter, source), delimiter, file_len))
}

/// Why an input could not be opened: a binary format that is not a table (named, with what
/// to do), or the operating system's reason.
pub(crate) fn open_error(shown_path: &Path, source: std::io::Error) -> InputError {
    if source.kind() == std::io::ErrorKind::InvalidData {
        InputError::NotText {
            path: shown_path.to_path_buf(),
            message: source.to_string(),
        }
    } else {
        InputError::Open {
            path: shown_path.to_path_buf(),
            source,
        }
    }
}

/// The header row: its editor line and its names, trimmed (each must be UTF-8).
fn read_header<'a>(
    reader: &mut csv::Reader<Source>,
    path: &'a Path,
    role: Role,
    delimiter: u8,
) -> Result<Header<'a>, InputError> {
    let header_record = match reader.byte_headers() {
        Ok(record) => record.clone(),
        Err(error) => return Err(csv_error(reader.get_ref(), path, delimiter, &[], 1, error)),
    };
    if header_record.is_empty() {
        return Err(InputError::EmptyFile {
            path: path.to_path_buf(),
            role,
        });
    }
    let header_line = header_record
        .position()
        .map_or(1, |position| editor_line(reader.get_ref(), position));
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
    Ok(Header {
        path,
        role,
        line: header_line,
        names,
    })
}

/// The chosen columns' values, gathered row by row.
struct Rows {
    ids: IdColumn,
    prediction: Vec<f64>,
    /// NaN for the untested rows of a one-table read.
    outcome: Vec<f64>,
    threshold: Vec<f64>,
    weight: Vec<f64>,
    features: FeatureBuffer,
    /// Kept cells, row-major.
    kept: Vec<String>,
    /// One-table read: whether each row is untested (a pool row).
    untested: Vec<bool>,
    dropped_missing_outcome: usize,
    censored_outcomes: usize,
    lines: RowLines,
}

/// The ids of a table's rows in one text buffer: no allocation per id (allocating and
/// freeing one string per id took about a tenth of the streamed read's time at 10^7
/// rows). The in-memory reader turns them into strings at the end, one copy more.
#[derive(Default)]
pub struct IdColumn {
    text: String,
    /// `ends[r]`: where row r's id ends in `text`.
    ends: Vec<usize>,
}

impl IdColumn {
    fn push(&mut self, id: &str) {
        self.text.push_str(id);
        self.ends.push(self.text.len());
    }

    fn reserve(&mut self, rows: usize) {
        self.ends.reserve(rows);
        self.text.reserve(rows.saturating_mul(8));
    }

    /// Rows held.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    /// True when no row is held.
    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    /// Row `r`'s id.
    ///
    /// # Panics
    /// If `r >= self.len()`.
    pub fn get(&self, r: usize) -> &str {
        let start = if r == 0 { 0 } else { self.ends[r - 1] };
        &self.text[start..self.ends[r]]
    }

    /// The ids in row order.
    pub fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        (0..self.len()).map(|r| self.get(r))
    }

    fn into_strings(self) -> Vec<String> {
        self.iter().map(str::to_owned).collect()
    }
}

/// How a row's outcome cell is read: the assay conventions and, in a one-table read, the
/// markers of untested rows.
struct RowRules<'a> {
    cells: &'a OutcomeCells,
    untested: Option<&'a [String]>,
}

/// Editor line of every data row, stored compactly: row `r` is on line `r + shift`, and the
/// shift changes only at blank lines, quoted line breaks and dropped rows, so only the
/// changes are kept. Used to name both lines of a repeated id without reading the file again.
#[derive(Default)]
struct RowLines {
    /// `(first row, shift)`, increasing in row.
    shifts: Vec<(usize, u64)>,
}

impl RowLines {
    #[inline]
    fn note(&mut self, row: usize, line: u64) {
        let shift = line.wrapping_sub(row as u64);
        if !matches!(self.shifts.last(), Some(&(_, last)) if last == shift) {
            self.shifts.push((row, shift));
        }
    }

    fn line(&self, row: usize) -> u64 {
        let index = self.shifts.partition_point(|&(first, _)| first <= row);
        index
            .checked_sub(1)
            .map_or(0, |i| (row as u64).wrapping_add(self.shifts[i].1))
    }
}

/// At most this many rows are reserved before the first grows: a guess from the file size
/// beyond it (a sparse or mostly empty file) would ask for more memory than exists; growing
/// past it costs a few copies.
const MAX_RESERVED_ROWS: u64 = 1 << 22;

impl Rows {
    fn new(feature_count: usize) -> Self {
        Rows {
            ids: IdColumn::default(),
            prediction: Vec::new(),
            outcome: Vec::new(),
            threshold: Vec::new(),
            weight: Vec::new(),
            features: FeatureBuffer::new(feature_count),
            kept: Vec::new(),
            untested: Vec::new(),
            dropped_missing_outcome: 0,
            censored_outcomes: 0,
            lines: RowLines::default(),
        }
    }

    /// Size every chosen column for `estimate` rows.
    fn reserve(&mut self, estimate: usize, columns: &ChosenColumns, split: bool) {
        self.ids.reserve(estimate);
        self.prediction.reserve(estimate);
        if columns.outcome.is_some() {
            self.outcome.reserve(estimate);
        }
        if columns.threshold.is_some() {
            self.threshold.reserve(estimate);
        }
        if columns.weight.is_some() {
            self.weight.reserve(estimate);
        }
        if split {
            self.untested.reserve(estimate);
        }
        self.features.reserve_rows(estimate);
    }

    /// Parse one record's chosen cells (id, prediction, outcome, threshold, weight, features,
    /// kept columns, in that order, so the first bad cell is the one reported). A labeled row
    /// whose outcome is a missing-value token is skipped (and counted) under
    /// `--missing-outcome drop` before any other cell is looked at.
    fn push(
        &mut self,
        path: &Path,
        line: u64,
        record: &csv::ByteRecord,
        columns: &ChosenColumns,
        rules: &RowRules<'_>,
    ) -> Result<(), InputError> {
        let outcome_cell = columns.outcome.as_ref().map(|column| {
            classify(
                record.get(column.index).unwrap_or_default(),
                rules.cells,
                rules.untested,
            )
        });
        if outcome_cell == Some(OutcomeCell::Missing)
            && rules.cells.missing == MissingOutcome::Drop
            && !rules.cells.tested_only
        {
            self.dropped_missing_outcome += 1;
            return Ok(());
        }
        self.lines.note(self.ids.len(), line);
        self.ids.push(id_cell(path, line, record, &columns.id)?);
        self.prediction
            .push(number_cell(path, line, record, &columns.prediction)?);
        // A censored outcome is decided against this row's threshold, read first then.
        let censored =
            matches!(outcome_cell, Some(OutcomeCell::Censored(..))) && !rules.cells.tested_only;
        let mut threshold = None;
        if let (Some(column), true) = (&columns.threshold, censored) {
            threshold = Some(number_cell(path, line, record, column)?);
        }
        if let (Some(column), Some(cell)) = (&columns.outcome, outcome_cell) {
            let value = if rules.cells.tested_only {
                f64::NAN
            } else {
                self.outcome_value(path, line, record, column, cell, threshold, rules)?
            };
            self.outcome.push(value);
            if rules.untested.is_some() {
                self.untested.push(cell == OutcomeCell::Untested);
            }
        }
        if let Some(column) = &columns.threshold {
            let value = match threshold {
                Some(value) => value,
                None => number_cell(path, line, record, column)?,
            };
            self.threshold.push(value);
        }
        if let Some(column) = &columns.weight {
            self.weight.push(weight_cell(path, line, record, column)?);
        }
        self.features.start_row();
        for (f, column) in columns.features.iter().enumerate() {
            self.features
                .set(f, number_cell(path, line, record, column)?);
        }
        self.features.finish_row();
        for column in &columns.kept {
            self.kept.push(kept_cell(path, line, record, column)?);
        }
        Ok(())
    }

    /// The outcome to store for a classified cell (NaN for an untested row), or the located
    /// error: a missing value under `--missing-outcome error`, an unreadable cell, a censored
    /// value its bound does not decide or that the score cannot use.
    #[allow(clippy::too_many_arguments)]
    fn outcome_value(
        &mut self,
        path: &Path,
        line: u64,
        record: &csv::ByteRecord,
        column: &Column,
        cell: OutcomeCell,
        row_threshold: Option<f64>,
        rules: &RowRules<'_>,
    ) -> Result<f64, InputError> {
        let text = || shown(record.get(column.index).unwrap_or_default().trim_ascii());
        match cell {
            OutcomeCell::Value(value) => Ok(value),
            OutcomeCell::Untested => Ok(f64::NAN),
            OutcomeCell::Missing => Err(InputError::MissingOutcome {
                path: path.to_path_buf(),
                line,
                column: column.name.clone(),
                value: text(),
                one_table: rules.untested.is_some(),
            }),
            OutcomeCell::Unreadable => match number_error(path, line, record, column) {
                error @ InputError::NotFinite { .. } => Err(error),
                _ => Err(InputError::UnreadableOutcome {
                    path: path.to_path_buf(),
                    line,
                    column: column.name.clone(),
                    value: text(),
                    one_table: rules.untested.is_some(),
                }),
            },
            OutcomeCell::Censored(bound, x) => {
                let problem = match rules.cells.censored {
                    None => Err(
                        "censored values are not accepted here (they need a threshold and a \
                         direction to be decided)"
                            .to_string(),
                    ),
                    Some(rule) if rule.score_needs_value => Err(
                        "the residual score (--score residual) needs the measured value itself, \
                         not a bound"
                            .to_string(),
                    ),
                    Some(rule) => match row_threshold.or(rule.threshold) {
                        Some(c) => decide_censored(bound, x, c, rule.direction),
                        None => Err("no threshold is known for this row".to_string()),
                    },
                };
                match problem {
                    Ok(value) => {
                        self.censored_outcomes += 1;
                        Ok(value)
                    }
                    Err(problem) => Err(InputError::CensoredOutcome {
                        path: path.to_path_buf(),
                        line,
                        column: column.name.clone(),
                        value: text(),
                        problem,
                        residual: rules.cells.censored.is_some_and(|r| r.score_needs_value),
                    }),
                }
            }
        }
    }
}

/// A kept cell, verbatim (it must be UTF-8).
fn kept_cell(
    path: &Path,
    line: u64,
    record: &csv::ByteRecord,
    column: &Column,
) -> Result<String, InputError> {
    let cell = record.get(column.index).unwrap_or_default();
    match std::str::from_utf8(cell) {
        Ok(text) => Ok(text.to_owned()),
        Err(_) => Err(InputError::InvalidUtf8 {
            path: path.to_path_buf(),
            line,
            column: column.name.clone(),
        }),
    }
}

/// Read every data row, checking each chosen cell.
fn read_rows(
    reader: &mut csv::Reader<Source>,
    path: &Path,
    delimiter: u8,
    header_names: &[String],
    columns: &ChosenColumns,
    rules: &RowRules<'_>,
    file_len: u64,
) -> Result<Rows, InputError> {
    let mut rows = Rows::new(columns.features.len());
    let mut record = csv::ByteRecord::new();
    let mut reserved = false;
    loop {
        match reader.read_byte_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(error) => {
                let reached_line = reader.position().line();
                return Err(csv_error(
                    reader.get_ref(),
                    path,
                    delimiter,
                    header_names,
                    reached_line,
                    error,
                ));
            }
        }
        if !reserved {
            // Size every column from the file length and this row's length; generous,
            // since untouched capacity is never paged in, but bounded.
            let row_bytes = (record.as_slice().len() + record.len()).max(1) as u64;
            let estimate = (file_len / row_bytes).saturating_mul(5) / 4 + 16;
            let estimate = estimate.min(file_len / 2 + 16).min(MAX_RESERVED_ROWS) as usize;
            rows.reserve(estimate, columns, rules.untested.is_some());
            reserved = true;
        }
        let line = match record.position() {
            Some(position) => {
                let line = editor_line(reader.get_ref(), position);
                reader.get_mut().forget_before(position.byte());
                line
            }
            None => 0,
        };
        rows.push(path, line, &record, columns, rules)?;
    }
    Ok(rows)
}

/// The rows `keep` of a column-major feature buffer of `n` rows and `width` features.
fn feature_rows(features: &[f64], n: usize, width: usize, keep: &[usize]) -> Vec<f64> {
    let mut out = Vec::with_capacity(width * keep.len());
    for f in 0..width {
        let column = &features[f * n..(f + 1) * n];
        out.extend(keep.iter().map(|&r| column[r]));
    }
    out
}

/// Check the rows as a whole (at least one, ids unique) and build the table; a one-table
/// read ([`Role::Table`]) is split into the labeled table and the pool.
fn finish_table(
    path: &Path,
    role: Role,
    header_line: u64,
    columns: ChosenColumns,
    rows: Rows,
) -> Result<(UnitTable, Option<UnitTable>), InputError> {
    let Rows {
        ids,
        mut prediction,
        outcome,
        threshold,
        weight,
        features,
        kept,
        untested,
        dropped_missing_outcome,
        censored_outcomes,
        lines,
    } = rows;
    let mut ids = ids.into_strings();
    if ids.is_empty() {
        return Err(InputError::NoRows {
            path: path.to_path_buf(),
            role,
            header_line,
        });
    }
    if let Some((first_row, row)) = find_duplicate_id(&ids) {
        return Err(InputError::DuplicateId {
            path: path.to_path_buf(),
            line: lines.line(row),
            first_line: lines.line(first_row),
            column: columns.id.name,
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
    let kept = KeptColumns {
        names: columns.kept.iter().map(|c| c.name.clone()).collect(),
        values: kept,
    };
    let whole = UnitTable {
        path: path.to_path_buf(),
        role,
        ids,
        outcome: finish(outcome, &columns.outcome),
        prediction,
        threshold: finish(threshold, &columns.threshold),
        weight: finish(weight, &columns.weight),
        feature_names: columns.feature_names,
        features: features.into_column_major(),
        kept,
        dropped_missing_outcome,
        censored_outcomes,
    };
    if role != Role::Table {
        return Ok((whole, None));
    }
    let (pool_rows, labeled_rows): (Vec<usize>, Vec<usize>) =
        (0..whole.len()).partition(|&r| untested[r]);
    let outcome_name = columns.outcome.as_ref().map_or("", |c| c.name.as_str());
    for (rows, labeled) in [(&labeled_rows, true), (&pool_rows, false)] {
        if rows.is_empty() {
            return Err(InputError::TableSideEmpty {
                path: path.to_path_buf(),
                header_line,
                column: outcome_name.to_string(),
                labeled,
            });
        }
    }
    let part = |rows: &[usize], role: Role| {
        let pick = |values: &Option<Vec<f64>>| {
            values
                .as_ref()
                .map(|v| rows.iter().map(|&r| v[r]).collect::<Vec<f64>>())
        };
        UnitTable {
            path: whole.path.clone(),
            role,
            ids: rows.iter().map(|&r| whole.ids[r].clone()).collect(),
            outcome: match role {
                Role::Labeled => pick(&whole.outcome),
                _ => None,
            },
            prediction: rows.iter().map(|&r| whole.prediction[r]).collect(),
            threshold: pick(&whole.threshold),
            weight: pick(&whole.weight),
            feature_names: whole.feature_names.clone(),
            features: feature_rows(
                &whole.features,
                whole.len(),
                whole.feature_names.len(),
                rows,
            ),
            kept: whole.kept.subset(rows),
            dropped_missing_outcome: match role {
                Role::Labeled => whole.dropped_missing_outcome,
                _ => 0,
            },
            censored_outcomes: match role {
                Role::Labeled => whole.censored_outcomes,
                _ => 0,
            },
        }
    };
    Ok((
        part(&labeled_rows, Role::Labeled),
        Some(part(&pool_rows, Role::Pool)),
    ))
}

/// What the first rows of a table hold, column by column (`weighbridge columns`).
#[derive(Clone, Debug, PartialEq)]
pub struct ColumnOverview {
    /// Editor line of the header.
    pub header_line: u64,
    /// Header names, in order.
    pub names: Vec<String>,
    /// Data rows looked at.
    pub rows_read: usize,
    /// Whether those were all the rows.
    pub complete: bool,
    /// Per column: cells that are finite numbers.
    pub numeric: Vec<usize>,
    /// Per column: censored values such as `>10000` or `<=1`.
    pub censored: Vec<usize>,
    /// Per column: empty cells.
    pub empty: Vec<usize>,
    /// Per column: the first non-empty cell, if any.
    pub example: Vec<Option<String>>,
}

/// Count what the first `max_rows` data rows of `path` hold per column (numbers, censored
/// values, empty cells) and keep one example cell each. Reads the file as the other
/// readers do (delimiter by extension or `delimiter`, `-`, .gz/.zst) and stops after
/// `max_rows` rows.
///
/// # Errors
/// The file cannot be opened, is empty, has a non-UTF-8 header, or a row up to `max_rows`
/// is malformed (wrong number of fields).
pub fn column_overview(
    path: &Path,
    delimiter: Option<u8>,
    max_rows: usize,
) -> Result<ColumnOverview, InputError> {
    let shown_path = display_path(path);
    let (mut reader, delimiter, _) = open_table(path, &shown_path, delimiter)?;
    let header = read_header(&mut reader, &shown_path, Role::Table, delimiter)?;
    let width = header.names.len();
    let mut overview = ColumnOverview {
        header_line: header.line,
        names: header.names.clone(),
        rows_read: 0,
        complete: false,
        numeric: vec![0; width],
        censored: vec![0; width],
        empty: vec![0; width],
        example: vec![None; width],
    };
    let cells = OutcomeCells {
        missing_values: Vec::new(),
        ..OutcomeCells::default()
    };
    let mut record = csv::ByteRecord::new();
    while overview.rows_read < max_rows {
        match reader.read_byte_record(&mut record) {
            Ok(true) => {}
            Ok(false) => {
                overview.complete = true;
                break;
            }
            Err(error) => {
                let reached_line = reader.position().line();
                return Err(csv_error(
                    reader.get_ref(),
                    &shown_path,
                    delimiter,
                    &header.names,
                    reached_line,
                    error,
                ));
            }
        }
        if let Some(position) = record.position() {
            reader.get_mut().forget_before(position.byte());
        }
        overview.rows_read += 1;
        for (c, raw) in record.iter().enumerate() {
            let cell = raw.trim_ascii();
            if cell.is_empty() {
                overview.empty[c] += 1;
                continue;
            }
            match classify(cell, &cells, None) {
                OutcomeCell::Value(_) => overview.numeric[c] += 1,
                OutcomeCell::Censored(..) => overview.censored[c] += 1,
                _ => {}
            }
            if overview.example[c].is_none() {
                overview.example[c] = Some(shown(cell));
            }
        }
    }
    if !overview.complete {
        // Exactly `max_rows` rows: tell whether there are more.
        overview.complete = matches!(reader.read_byte_record(&mut record), Ok(false));
    }
    Ok(overview)
}

/// A 64-bit hash of an id for finding repeated ids: 8 bytes at a time, each mixed in by a
/// multiply and a rotation, then the splitmix64 generator's output mix (common practice;
/// shifts and constants as in Vigna's public-domain splitmix64.c, from memory). Not keyed:
/// only speed depends on it, since rows with equal hashes are always compared as strings.
fn id_hash(id: &str) -> u64 {
    const MIX: u64 = 0xbf58_476d_1ce4_e5b9;
    let bytes = id.as_bytes();
    let mut h = 0x9e37_79b9_7f4a_7c15 ^ bytes.len() as u64;
    let mut words = bytes.chunks_exact(8);
    for word in &mut words {
        let w = u64::from_le_bytes(word.try_into().expect("8 bytes"));
        h = (h ^ w).wrapping_mul(MIX).rotate_left(31);
    }
    let rest = words.remainder();
    if !rest.is_empty() {
        let mut last = [0u8; 8];
        last[..rest.len()].copy_from_slice(rest);
        h = (h ^ u64::from_le_bytes(last))
            .wrapping_mul(MIX)
            .rotate_left(31);
    }
    h ^= h >> 30;
    h = h.wrapping_mul(MIX);
    h ^= h >> 27;
    h = h.wrapping_mul(0x94d0_49bb_1331_11eb);
    h ^ (h >> 31)
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
    let shown_path = display_path(path);
    let source = Source::open(path).map_err(|source| open_error(&shown_path, source))?;
    let delimiter = delimiter_for(path, delimiter);
    let path = shown_path.as_path();
    let mut reader = csv::ReaderBuilder::new()
        .delimiter(delimiter)
        .flexible(true)
        .from_reader(source);
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

#[cfg(test)]
mod tests {
    //! Expected numbers come from Rust's own `str::parse::<f64>` ("Rust std as reference");
    //! expected line numbers are counted by hand in the fixture text, the way a text editor
    //! numbers lines (header = line 1).
    use super::*;

    #[test]
    fn id_hashes_of_distinct_ids_differ() {
        // 2*10^6 ids of the usual shapes; a 64-bit hash collides among them with
        // probability about 1e-7, so a repeat here means a poor mix.
        let mut hashes: Vec<u64> = (0..1_000_000)
            .map(|i| format!("U{i}"))
            .chain((0..1_000_000).map(|i| format!("CMPD-{i:09}-X")))
            .map(|id| id_hash(&id))
            .collect();
        hashes.extend(["a", "aa", "aaaaaaaa", "aaaaaaaaa", "b"].map(id_hash));
        let all = hashes.len();
        hashes.sort_unstable();
        hashes.dedup();
        assert_eq!(hashes.len(), all);
    }
    use crate::io::columns::check_same_features;
    use crate::io::source::check_one_stdin;
    use std::fs;
    use std::io;
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

    #[test]
    fn control_characters_in_ids_are_located_errors() {
        for (content, code) in [
            (&b"id,pred\na,1\nb\x00c,2\n"[..], 0),
            (b"id,pred\na,1\n\"b\nc\",2\n", 10),
            (b"id\tpred\na\t1\n\"b\x07\"\t2\n", 7),
        ] {
            let name = if code == 7 { "pool.tsv" } else { "pool.csv" };
            let (error, message) = read_error(name, content, Role::Pool, &ReadOptions::new("pred"));
            assert!(
                matches!(error, InputError::ControlInId { line: 3, code: c, .. } if c == code),
                "{message}"
            );
            assert_located(&message, name, 3, "id");
            assert!(message.contains(&format!("U+{code:04X}")), "{message}");
        }
    }

    #[test]
    fn named_pipe_is_read_once() {
        // A FIFO can be read only once; earlier versions reopened the file for line numbers
        // and hung. A writer thread feeds it; a bad cell must still give the editor line.
        let dir = TempDir::new().unwrap();
        for (content, expect_line) in [
            (&b"id,pred\n\na,1\nb,2\n"[..], None),
            (b"id,pred\r\na,1\r\n\r\nb,x\r\n", Some(4)),
            (b"id,pred\na,1\n\nb,2\na,3\n", Some(5)),
        ] {
            let path = dir.path().join("pipe.csv");
            let _ = fs::remove_file(&path);
            let status = std::process::Command::new("mkfifo")
                .arg(&path)
                .status()
                .unwrap();
            assert!(status.success());
            let writer_path = path.clone();
            let writer = std::thread::spawn(move || {
                fs::write(writer_path, content).unwrap();
            });
            let result = read_units(&path, Role::Pool, &ReadOptions::new("pred"));
            writer.join().unwrap();
            match expect_line {
                None => assert_eq!(result.unwrap().ids, ["a", "b"]),
                Some(line) => {
                    let message = result.unwrap_err().to_string();
                    assert!(message.contains(&format!("line {line}")), "{message}");
                }
            }
        }
    }

    #[test]
    fn sparse_file_is_a_located_error_not_an_abort() {
        // 8 GB of NUL bytes after a valid header and row (a sparse file, cheap on Linux):
        // the row reservation must stay bounded and the endless line must stop at the
        // line-length cap with the line it is on.
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "pool.csv", b"id,pred\na,0.5\n");
        let file = fs::OpenOptions::new().write(true).open(&path).unwrap();
        file.set_len(8 << 30).unwrap();
        drop(file);
        let error = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap_err();
        let message = error.to_string();
        assert!(
            matches!(error, InputError::Read { line: 3, .. }),
            "{message}"
        );
        assert!(
            message.contains("line 3") && message.contains("MiB"),
            "{message}"
        );
        assert!(message.len() < 500, "{message}");
    }

    #[test]
    fn at_most_one_input_is_standard_input() {
        let file = Path::new("a.csv");
        let dash = Path::new("-");
        check_one_stdin(&[("--labeled", dash), ("--pool", file)]).unwrap();
        check_one_stdin(&[("--labeled", file), ("--pool", file)]).unwrap();
        let error =
            check_one_stdin(&[("--shortlist", file), ("--labeled", dash), ("--pool", dash)])
                .unwrap_err();
        let message = error.to_string();
        assert!(
            message.contains("--labeled") && message.contains("--pool") && message.contains("Hint"),
            "{message}"
        );
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
            (b"id,pred\na,\"1\n\"\nb,x\n", 4),
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
            b"\xef\xbb\xbf id , pred \r\n\"x \"\"1\"\"\",\" 1.5e2 \"\r\n\r\n\"y,z\",\"-0.5\r\n\"\r\n";
        let path = write(&dir, "pool.csv", content);
        let table = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap();
        assert_eq!(table.ids, ["x \"1\"", "y,z"]);
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
}

#[cfg(test)]
mod one_table_and_conventions_tests {
    //! One-table reads, assay conventions, kept columns and compressed inputs. Expected
    //! rows, counts and lines are read off the literal inputs by hand (header = line 1);
    //! compressed inputs are checked against the same text read plain.
    use super::*;
    use crate::conformal::score::Direction;
    use crate::io::outcome::CensoredRule;
    use std::fs;
    use std::io::Write as _;
    use tempfile::TempDir;

    fn write(dir: &TempDir, name: &str, content: &[u8]) -> PathBuf {
        let path = dir.path().join(name);
        fs::write(&path, content).unwrap();
        path
    }

    fn options(threshold: Option<f64>, direction: Direction) -> ReadOptions {
        ReadOptions {
            outcome: Some("y".to_string()),
            features: vec!["a..b".to_string()],
            outcome_cells: OutcomeCells {
                censored: Some(CensoredRule {
                    direction,
                    threshold,
                    score_needs_value: false,
                }),
                ..OutcomeCells::default()
            },
            ..ReadOptions::new("pred")
        }
    }

    const TABLE: &str = "id,y,pred,a,b,series\n\
                         u1,7.5,7.0,1,2,S1\n\
                         p1,,6.0,3,4,S2\n\
                         u2,5.0,5.5,5,6,S1\n\
                         \n\
                         p2,untested,8.0,7,8,S3\n\
                         u3,>8,6.9,9,10,S2\n";

    #[test]
    fn a_table_splits_into_labeled_rows_and_the_pool_in_file_order() {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "assays.csv", TABLE.as_bytes());
        let read = ReadOptions {
            keep_columns: vec!["series".to_string()],
            ..options(Some(6.5), Direction::Above)
        };
        let (labeled, pool) = read_table(&path, &read, &["UNTESTED".to_string()]).unwrap();
        assert_eq!(labeled.ids, ["u1", "u2", "u3"]);
        assert_eq!(labeled.role, Role::Labeled);
        assert_eq!(labeled.outcome.as_deref(), Some(&[7.5, 5.0, 8.0][..]));
        assert_eq!(labeled.prediction, [7.0, 5.5, 6.9]);
        assert_eq!(labeled.feature_column(1), [2.0, 6.0, 10.0]);
        assert_eq!(labeled.censored_outcomes, 1);
        assert_eq!(pool.ids, ["p1", "p2"]);
        assert_eq!(pool.role, Role::Pool);
        assert!(pool.outcome.is_none());
        assert_eq!(pool.prediction, [6.0, 8.0]);
        assert_eq!(pool.feature_column(0), [3.0, 7.0]);
        assert_eq!(pool.feature_names, ["a", "b"]);
        assert_eq!(pool.kept.names, ["series"]);
        assert_eq!(pool.kept.row(1), ["S3"]);
        assert_eq!(labeled.kept.row(2), ["S2"]);
        assert_eq!(
            (pool.dropped_missing_outcome, pool.censored_outcomes),
            (0, 0)
        );
    }

    #[test]
    fn table_errors_name_the_file_and_the_editor_line() {
        let dir = TempDir::new().unwrap();
        // An id on a labeled and on a pool row: a duplicate, lines 2 and 4.
        let path = write(
            &dir,
            "t.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,,1,1,1\nx,,1,1,1\n",
        );
        let error = read_table(&path, &options(Some(0.5), Direction::Above), &[]).unwrap_err();
        assert!(
            matches!(
                error,
                InputError::DuplicateId {
                    line: 4,
                    first_line: 2,
                    ..
                }
            ),
            "{error}"
        );
        // A bad cell after a blank line: line 5 of the table.
        let path = write(
            &dir,
            "t.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,,1,1,1\n\nz,,1,q,1\n",
        );
        let message = read_table(&path, &options(Some(0.5), Direction::Above), &[])
            .unwrap_err()
            .to_string();
        assert!(message.contains("t.csv line 5, column `a`"), "{message}");
        // No pool rows, no labeled rows.
        let path = write(&dir, "t.csv", b"id,y,pred,a,b\nx,1,1,1,1\n");
        let error = read_table(&path, &options(Some(0.5), Direction::Above), &[]).unwrap_err();
        assert!(
            matches!(error, InputError::TableSideEmpty { labeled: false, .. }),
            "{error}"
        );
        assert!(
            error.to_string().contains("no pool (untested) rows"),
            "{error}"
        );
        let path = write(&dir, "t.csv", b"id,y,pred,a,b\nx,,1,1,1\n");
        let error = read_table(&path, &options(Some(0.5), Direction::Above), &[]).unwrap_err();
        assert!(
            matches!(error, InputError::TableSideEmpty { labeled: true, .. }),
            "{error}"
        );
        // Junk in the outcome: the hint lists what an outcome cell may hold.
        let path = write(
            &dir,
            "t.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,pending,1,1,1\n",
        );
        let error = read_table(&path, &options(Some(0.5), Direction::Above), &[]).unwrap_err();
        let message = error.to_string();
        assert!(
            matches!(error, InputError::UnreadableOutcome { line: 3, .. }),
            "{message}"
        );
        assert!(message.contains("--untested-marker"), "{message}");
    }

    #[test]
    fn missing_outcomes_stop_or_are_dropped_and_counted() {
        let dir = TempDir::new().unwrap();
        let content = b"id,y,pred,a,b\nx,1,1,1,1\ny,NA,1,1,1\nz,,2,q,1\nw,2,3,1,1\n";
        let path = write(&dir, "labeled.csv", content);
        let error =
            read_units(&path, Role::Labeled, &options(Some(0.5), Direction::Above)).unwrap_err();
        let message = error.to_string();
        assert!(
            matches!(error, InputError::MissingOutcome { line: 3, .. }),
            "{message}"
        );
        assert!(
            message.contains("labeled.csv line 3, column `y`: `NA`")
                && message.contains("--missing-outcome drop"),
            "{message}"
        );
        // Dropped rows are not read further (z's bad feature cell is never looked at).
        let mut drop = options(Some(0.5), Direction::Above);
        drop.outcome_cells.missing = MissingOutcome::Drop;
        let table = read_units(&path, Role::Labeled, &drop).unwrap();
        assert_eq!(table.ids, ["x", "w"]);
        assert_eq!(table.dropped_missing_outcome, 2);
        assert_eq!(table.outcome.as_deref(), Some(&[1.0, 2.0][..]));
        // A duplicate id after dropped rows still gets its editor lines.
        let path = write(
            &dir,
            "labeled.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,NA,1,1,1\nx,2,1,1,1\n",
        );
        let error = read_units(&path, Role::Labeled, &drop).unwrap_err();
        assert!(
            matches!(
                error,
                InputError::DuplicateId {
                    line: 4,
                    first_line: 2,
                    ..
                }
            ),
            "{error}"
        );
        // In a table, NA is missing but the empty cell is untested; the hint offers the marker.
        let path = write(
            &dir,
            "t.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,NA,1,1,1\nz,,1,1,1\n",
        );
        let message = read_table(&path, &options(Some(0.5), Direction::Above), &[])
            .unwrap_err()
            .to_string();
        assert!(message.contains("--untested-marker 'NA'"), "{message}");
        let (labeled, pool) = read_table(&path, &drop, &[]).unwrap();
        assert_eq!((labeled.ids.len(), labeled.dropped_missing_outcome), (1, 1));
        assert_eq!(pool.ids, ["z"]);
    }

    #[test]
    fn censored_outcomes_decided_per_row_or_located_errors() {
        let dir = TempDir::new().unwrap();
        // Per-row thresholds: >7 at c = 6.5 is above; <5 at c = 6 is not; >7 at c = 8 is not
        // decided (line 4).
        let content = b"id,y,pred,c,a,b\nx,>7,1,6.5,1,1\ny,<5,1,6,1,1\nz,>7,1,8,1,1\n";
        let path = write(&dir, "labeled.csv", content);
        let read = ReadOptions {
            threshold_column: Some("c".to_string()),
            ..options(None, Direction::Above)
        };
        let error = read_units(&path, Role::Labeled, &read).unwrap_err();
        let message = error.to_string();
        assert!(
            matches!(error, InputError::CensoredOutcome { line: 4, .. }),
            "{message}"
        );
        assert!(
            message.contains("`>7`") && message.contains("threshold 8"),
            "{message}"
        );
        let path = write(
            &dir,
            "labeled.csv",
            b"id,y,pred,c,a,b\nx,>7,1,6.5,1,1\ny,<5,1,6,1,1\n",
        );
        let table = read_units(&path, Role::Labeled, &read).unwrap();
        assert_eq!(table.outcome.as_deref(), Some(&[7.0, 5.0][..]));
        assert_eq!(table.censored_outcomes, 2);
        // Lower is better: <1 nM at 100 is below; >5 at 100 is not decided.
        let path = write(
            &dir,
            "labeled.csv",
            b"id,y,pred,a,b\nx,<1,1,1,1\ny,>5,1,1,1\n",
        );
        let message = read_units(
            &path,
            Role::Labeled,
            &options(Some(100.0), Direction::Below),
        )
        .unwrap_err()
        .to_string();
        assert!(
            message.contains("line 3") && message.contains("below 100"),
            "{message}"
        );
        // The residual score needs the value.
        let mut residual = options(Some(0.5), Direction::Above);
        residual.outcome_cells.censored = Some(CensoredRule {
            direction: Direction::Above,
            threshold: Some(0.5),
            score_needs_value: true,
        });
        let path = write(
            &dir,
            "labeled.csv",
            b"id,y,pred,a,b\nx,1,1,1,1\ny,>5,1,1,1\n",
        );
        let message = read_units(&path, Role::Labeled, &residual)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("line 3") && message.contains("--score residual"),
            "{message}"
        );
    }

    #[test]
    fn kept_columns_are_required_in_the_pool_only() {
        let dir = TempDir::new().unwrap();
        let read = ReadOptions {
            keep_columns: vec!["smiles".to_string(), "series".to_string()],
            ..ReadOptions::new("pred")
        };
        let path = write(
            &dir,
            "pool.csv",
            b"id,pred,series,smiles\na,1, S1 ,C(=O)O\nb,2,S2,CC\n",
        );
        let pool = read_units(&path, Role::Pool, &read).unwrap();
        assert_eq!(pool.kept.names, ["smiles", "series"]);
        // Verbatim: spaces kept.
        assert_eq!(pool.kept.row(0), ["C(=O)O", " S1 "]);
        let labeled_read = ReadOptions {
            outcome: Some("y".to_string()),
            ..read.clone()
        };
        let path = write(&dir, "labeled.csv", b"id,y,pred,series\na,1,1,S1\n");
        let labeled = read_units(&path, Role::Labeled, &labeled_read).unwrap();
        assert_eq!(labeled.kept.names, ["series"]);
        assert_eq!(labeled.kept.row(0), ["S1"]);
        let path = write(&dir, "pool.csv", b"id,pred,Series\na,1,S1\n");
        let error = read_units(&path, Role::Pool, &read).unwrap_err();
        let message = error.to_string();
        assert!(
            matches!(
                error,
                InputError::MissingColumn {
                    kind: ColumnKind::Kept,
                    ..
                }
            ),
            "{message}"
        );
        assert!(message.contains("--keep-columns"), "{message}");
    }

    #[test]
    fn unknown_columns_suggest_the_right_name() {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "labeled.csv", b"compound_id,pIC50,pred\na,1,1\n");
        let read = ReadOptions {
            id: "compound_id".to_string(),
            outcome: Some("pic50".to_string()),
            ..ReadOptions::new("pred")
        };
        let message = read_units(&path, Role::Labeled, &read)
            .unwrap_err()
            .to_string();
        assert!(message.contains("did you mean `pIC50`?"), "{message}");
        assert!(message.contains("its columns are"), "{message}");
        // Many columns: the suggestion, the first twenty and where to see them all.
        let names: Vec<String> = (0..30).map(|i| format!("col{i}")).collect();
        let header = format!("id,pred,{},Target\n", names.join(","));
        let row = format!("a,1,{},1\n", vec!["0"; 30].join(","));
        let path = write(&dir, "labeled.csv", format!("{header}{row}").as_bytes());
        let read = ReadOptions {
            outcome: Some("target".to_string()),
            ..ReadOptions::new("pred")
        };
        let message = read_units(&path, Role::Labeled, &read)
            .unwrap_err()
            .to_string();
        assert!(message.contains("did you mean `Target`?"), "{message}");
        assert!(message.contains("weighbridge columns"), "{message}");
    }

    fn gzip(bytes: &[u8]) -> Vec<u8> {
        let mut encoder = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        encoder.write_all(bytes).unwrap();
        encoder.finish().unwrap()
    }

    fn zstd(bytes: &[u8]) -> Vec<u8> {
        ruzstd::encoding::compress_to_vec(bytes, ruzstd::encoding::CompressionLevel::Fastest)
    }

    #[test]
    fn gzip_and_zstd_read_as_the_plain_text_with_its_lines() {
        let dir = TempDir::new().unwrap();
        let plain = TABLE.as_bytes();
        let read = options(Some(6.5), Direction::Above);
        let reference =
            read_table(&write(&dir, "t.csv", plain), &read, &["untested".into()]).unwrap();
        // Two gzip members, two zstd frames with a skippable frame between them, and
        // misnamed files (the first bytes decide).
        let half = plain.len() / 2;
        let two_members = [gzip(&plain[..half]), gzip(&plain[half..])].concat();
        let skippable = [
            &0x184D_2A50u32.to_le_bytes()[..],
            &3u32.to_le_bytes(),
            b"abc",
        ]
        .concat();
        let two_frames = [zstd(&plain[..half]), skippable, zstd(&plain[half..])].concat();
        for (name, bytes) in [
            ("t.csv.gz", gzip(plain)),
            ("t.gz.csv", two_members),
            ("t.csv.zst", zstd(plain)),
            ("t.csv", two_frames),
        ] {
            let path = write(&dir, name, &bytes);
            let (labeled, pool) = read_table(&path, &read, &["untested".into()]).unwrap();
            assert_eq!(labeled.ids, reference.0.ids, "{name}");
            assert_eq!(labeled.outcome, reference.0.outcome, "{name}");
            assert_eq!(pool.ids, reference.1.ids, "{name}");
            assert_eq!(pool.features, reference.1.features, "{name}");
        }
        // A bad cell after a blank line keeps the line of the decompressed text.
        let bad = b"id,pred\na,1\n\nb,x\n";
        for bytes in [gzip(bad), zstd(bad)] {
            let path = write(&dir, "pool.csv.gz", &bytes);
            let message = read_units(&path, Role::Pool, &ReadOptions::new("pred"))
                .unwrap_err()
                .to_string();
            assert!(
                message.contains("pool.csv.gz line 4, column `pred`"),
                "{message}"
            );
        }
        // Cut short: a read error naming the format.
        let cut = gzip(TABLE.as_bytes());
        let path = write(&dir, "t.csv.gz", &cut[..cut.len() - 12]);
        let message = read_table(&path, &read, &["untested".into()])
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("gzip data is damaged or cut short"),
            "{message}"
        );
        // A tab-separated file stays tab-separated when compressed.
        let path = write(&dir, "pool.tsv.zst", &zstd(b"id\tpred\na\t0.5\n"));
        let table = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap();
        assert_eq!(table.prediction, [0.5]);
        assert_eq!(delimiter_for(Path::new("x.TSV.GZ"), None), b'\t');
        assert_eq!(delimiter_for(Path::new("x.csv.zst"), None), b',');
    }

    #[test]
    fn other_binary_formats_are_named() {
        let dir = TempDir::new().unwrap();
        for (bytes, needle) in [
            (&b"PK\x03\x04\x14\x00\x06\x00rest"[..], "ZIP archive"),
            (b"PAR1\x15\x04\x15", "Parquet"),
            (b"BZh91AY&SY", "bzip2"),
            (b"\xfd7zXZ\x00\x00\x04", "xz"),
            (b"\xff\xfei\x00d\x00", "UTF-16"),
            (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1\x00", ".xls"),
        ] {
            let path = write(&dir, "input.csv", bytes);
            let error = read_units(&path, Role::Pool, &ReadOptions::new("pred")).unwrap_err();
            let message = error.to_string();
            assert!(matches!(error, InputError::NotText { .. }), "{message}");
            assert!(
                message.contains(needle) && message.contains("Hint:"),
                "{needle}: {message}"
            );
            assert!(message.contains("input.csv"), "{message}");
        }
    }

    #[test]
    fn column_overview_counts_the_first_rows() {
        let dir = TempDir::new().unwrap();
        let path = write(&dir, "t.csv.gz", &gzip(TABLE.as_bytes()));
        let overview = column_overview(&path, None, 1000).unwrap();
        assert_eq!(overview.names, ["id", "y", "pred", "a", "b", "series"]);
        assert_eq!(overview.rows_read, 5);
        assert!(overview.complete);
        // y: 7.5, 5.0 numeric; >8 censored; one empty; `untested` other.
        assert_eq!(
            (overview.numeric[1], overview.censored[1], overview.empty[1]),
            (2, 1, 1)
        );
        assert_eq!(overview.numeric[2], 5);
        assert_eq!(overview.example[5].as_deref(), Some("S1"));
        let overview = column_overview(&path, None, 2).unwrap();
        assert_eq!((overview.rows_read, overview.complete), (2, false));
        let overview = column_overview(&path, None, 5).unwrap();
        assert_eq!((overview.rows_read, overview.complete), (5, true));
    }
}
