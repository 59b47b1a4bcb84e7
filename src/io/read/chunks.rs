//! The pool read in chunks of rows, for the streamed selection: the same header, column
//! choice and cell checks as [`read_units`](super::read_units) (the rows go through the
//! same `Rows::push`), but only one chunk is held at a time, so a pool of 5*10^7 rows is
//! read in memory proportional to the chunk. Duplicate ids are found from 8-byte hashes
//! collected by the caller ([`id_hash`]) and located by a second read
//! ([`PoolChunks::locate_duplicate`]).
//!
//! A plain text file with `\n` line ends and no `"` or `\r` byte (the usual export of
//! predictions) can be read faster ([`PoolChunks::in_parallel`]): its bytes
//! are cut into blocks at line ends and the blocks parsed on all cores, each by a csv reader
//! of its own and the same `Rows::push`. Without quotes a line end always ends a record, so
//! the rows are the same; any error sends the read back to the serial reader, from the
//! start, so that messages name the same line and column.

use std::collections::HashMap;
use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use super::{
    display_path, editor_line, id_hash as hash_of, open_table, read_header, ChosenColumns,
    IdColumn, Role, RowRules, Rows, Source,
};
use crate::io::errors::{shown, InputError};
use crate::io::ReadOptions;

/// A pool file opened for reading chunk by chunk.
pub struct PoolChunks {
    path: PathBuf,
    reader: csv::Reader<Source>,
    shown_path: PathBuf,
    delimiter: u8,
    header_names: Vec<String>,
    header_line: u64,
    columns: ChosenColumns,
    options: ReadOptions,
    record: csv::ByteRecord,
    rows_read: u64,
}

/// The rows of one chunk, in input order.
pub struct PoolChunk {
    rows: Rows,
}

impl PoolChunk {
    /// Rows in this chunk.
    pub fn len(&self) -> usize {
        self.rows.ids.len()
    }

    /// True when the chunk holds no row.
    pub fn is_empty(&self) -> bool {
        self.rows.ids.is_empty()
    }

    pub fn ids(&self) -> &IdColumn {
        &self.rows.ids
    }

    pub fn prediction(&self) -> &[f64] {
        &self.rows.prediction
    }

    /// The threshold column's values, when the pool has one.
    pub fn threshold(&self, has_column: bool) -> Option<&[f64]> {
        has_column.then_some(self.rows.threshold.as_slice())
    }

    /// The weight column's values, when the pool has one.
    pub fn weight(&self, has_column: bool) -> Option<&[f64]> {
        has_column.then_some(self.rows.weight.as_slice())
    }

    /// The kept cells of row `r` of this chunk.
    pub fn kept_row(&self, r: usize, width: usize) -> &[String] {
        &self.rows.kept[r * width..(r + 1) * width]
    }

    /// Editor line of row `r` of this chunk (chunks of [`PoolChunks::next_chunk`]; the
    /// parallel reader does not track lines, 0 there).
    pub fn line(&self, r: usize) -> u64 {
        self.rows.lines.line(r)
    }
}

/// The 64-bit hash the in-memory reader uses to find repeated ids.
pub fn id_hash(id: &str) -> u64 {
    hash_of(id)
}

impl PoolChunks {
    /// Open the pool file (not standard input: the streamed selection reads it more than
    /// once) and check its header against the columns asked for.
    ///
    /// # Errors
    /// As [`read_units`](super::read_units) for the header and the columns.
    pub fn open(path: &Path, options: &ReadOptions) -> Result<PoolChunks, InputError> {
        PoolChunks::open_shown(path, &display_path(path), options)
    }

    /// [`Self::open`] with the name messages give the file (a spilled copy of standard
    /// input is shown as "standard input").
    ///
    /// # Errors
    /// As [`Self::open`].
    pub fn open_shown(
        path: &Path,
        shown_path: &Path,
        options: &ReadOptions,
    ) -> Result<PoolChunks, InputError> {
        let (mut reader, delimiter, _) = open_table(path, shown_path, options.delimiter)?;
        let header = read_header(&mut reader, shown_path, Role::Pool, delimiter)?;
        let columns = header.choose_columns(options)?;
        Ok(PoolChunks {
            path: path.to_path_buf(),
            reader,
            shown_path: shown_path.to_path_buf(),
            delimiter,
            header_names: header.names.clone(),
            header_line: header.line,
            columns,
            options: options.clone(),
            record: csv::ByteRecord::new(),
            rows_read: 0,
        })
    }

    /// Share of a file of `len` bytes read so far (of the decompressed text for a
    /// compressed file, so only a rough guide there; at most 1).
    pub fn fraction_read(&self, len: u64) -> f64 {
        (self.reader.position().byte() as f64 / len.max(1) as f64).min(1.0)
    }

    /// Names of the kept columns, in the order asked for.
    pub fn kept_names(&self) -> Vec<String> {
        self.columns.kept.iter().map(|c| c.name.clone()).collect()
    }

    /// True when the pool has a threshold column / a weight column.
    pub fn has_threshold(&self) -> bool {
        self.columns.threshold.is_some()
    }

    pub fn has_weight(&self) -> bool {
        self.columns.weight.is_some()
    }

    /// An empty chunk to fill with [`Self::next_chunk`].
    pub fn chunk(&self) -> PoolChunk {
        PoolChunk {
            rows: Rows::new(self.columns.features.len()),
        }
    }

    /// Fill `chunk` with up to `max_rows` rows; `false` when the file had no more rows.
    ///
    /// # Errors
    /// The first bad cell or CSV error, located as the in-memory reader locates it.
    pub fn next_chunk(
        &mut self,
        chunk: &mut PoolChunk,
        max_rows: usize,
    ) -> Result<bool, InputError> {
        chunk.rows = Rows::new(self.columns.features.len());
        let rules = RowRules {
            cells: &self.options.outcome_cells,
            untested: None,
        };
        while chunk.rows.ids.len() < max_rows {
            match self.reader.read_byte_record(&mut self.record) {
                Ok(true) => {}
                Ok(false) => break,
                Err(error) => {
                    let reached_line = self.reader.position().line();
                    return Err(super::csv_error(
                        self.reader.get_ref(),
                        &self.shown_path,
                        self.delimiter,
                        &self.header_names,
                        reached_line,
                        error,
                    ));
                }
            }
            let line = match self.record.position() {
                Some(position) => {
                    let line = editor_line(self.reader.get_ref(), position);
                    self.reader.get_mut().forget_before(position.byte());
                    line
                }
                None => 0,
            };
            chunk
                .rows
                .push(&self.shown_path, line, &self.record, &self.columns, &rules)?;
        }
        self.rows_read += chunk.rows.ids.len() as u64;
        if self.rows_read == 0 {
            return Err(InputError::NoRows {
                path: self.shown_path.clone(),
                role: Role::Pool,
                header_line: self.header_line,
            });
        }
        Ok(!chunk.is_empty())
    }

    /// Read the file once more and return the error for the earliest repeated id among
    /// the ids whose hash is in `repeated` (hashes that repeat may still be different
    /// ids, in which case there is no error).
    ///
    /// # Errors
    /// Reading fails.
    pub fn locate_duplicate(
        mut self,
        repeated: &std::collections::HashSet<u64>,
    ) -> Result<Option<InputError>, InputError> {
        let mut first_line: HashMap<String, u64> = HashMap::new();
        let mut chunk = self.chunk();
        while self.next_chunk(&mut chunk, 1 << 16)? {
            for (r, id) in chunk.ids().iter().enumerate() {
                if !repeated.contains(&hash_of(id)) {
                    continue;
                }
                let line = chunk.line(r);
                if let Some(&first) = first_line.get(id) {
                    return Ok(Some(InputError::DuplicateId {
                        path: self.shown_path.clone(),
                        line,
                        first_line: first,
                        column: self.columns.id.name.clone(),
                        id: shown(id.as_bytes()),
                    }));
                }
                first_line.insert(id.to_owned(), line);
            }
        }
        Ok(None)
    }
}

/// Bytes per block of the parallel reader (cut back to the block's last line end).
const BLOCK_BYTES: usize = 1 << 20;

/// Blocks read, then parsed in parallel, per call of [`ParallelChunks::next_chunks`].
const BLOCKS_PER_ROUND: usize = 8;

/// A pool file read in blocks parsed in parallel ([`PoolChunks::in_parallel`]).
pub struct ParallelChunks {
    /// The serial reader past the header: its columns and settings, and the fallback.
    serial: PoolChunks,
    file: File,
    /// Bytes read from `file` but not yet parsed (the start of a line).
    carry: Vec<u8>,
    /// Bytes of the file read so far.
    read: u64,
    at_end: bool,
    rows_read: u64,
}

impl PoolChunks {
    /// The parallel reader of this file, when the file allows it: a regular, uncompressed
    /// file whose header ends with `\n` and whose bytes hold no `"` and no `\r` (one scan
    /// of the file). Otherwise this serial reader back, boxed, to read with.
    pub fn in_parallel(self) -> Result<ParallelChunks, Box<PoolChunks>> {
        if self.reader.get_ref().format() != crate::io::source::Format::Text {
            return Err(Box::new(self));
        }
        let Some((file, data_start)) = plain_data_start(&self.path) else {
            return Err(Box::new(self));
        };
        Ok(ParallelChunks {
            serial: self,
            file,
            carry: Vec::new(),
            read: data_start,
            at_end: false,
            rows_read: 0,
        })
    }
}

/// The file opened at its first data byte, when it is a regular file without `"` or `\r`
/// bytes and with a header line (blank lines before it skipped, as the csv reader skips
/// them) ended by `\n`.
fn plain_data_start(path: &Path) -> Option<(File, u64)> {
    use std::io::{Seek, SeekFrom};
    let mut file = File::open(path).ok()?;
    if !file.metadata().ok()?.is_file() {
        return None;
    }
    let mut buffer = vec![0u8; 1 << 20];
    let mut offset = 0u64;
    let mut data_start: Option<u64> = None;
    let mut in_header = false;
    loop {
        let got = file.read(&mut buffer).ok()?;
        if got == 0 {
            break;
        }
        let bytes = &buffer[..got];
        if memchr::memchr2(b'"', b'\r', bytes).is_some() {
            return None;
        }
        if data_start.is_none() {
            for (i, &b) in bytes.iter().enumerate() {
                match (in_header, b) {
                    (false, b'\n') => {}
                    (false, _) => in_header = true,
                    (true, b'\n') => {
                        data_start = Some(offset + i as u64 + 1);
                        break;
                    }
                    (true, _) => {}
                }
            }
        }
        offset += got as u64;
    }
    let start = data_start?;
    file.seek(SeekFrom::Start(start)).ok()?;
    Some((file, start))
}

impl ParallelChunks {
    /// Names of the kept columns, in the order asked for.
    pub fn kept_names(&self) -> Vec<String> {
        self.serial.kept_names()
    }

    /// Share of a file of `len` bytes read so far (at most 1).
    pub fn fraction_read(&self, len: u64) -> f64 {
        (self.read as f64 / len.max(1) as f64).min(1.0)
    }

    /// The next chunks in file order (a round of blocks parsed in parallel); empty at the
    /// end of the file.
    ///
    /// # Errors
    /// The first error of the file, as [`PoolChunks::next_chunk`] reports it (found by
    /// reading the file again serially).
    pub fn next_chunks(&mut self) -> Result<Vec<PoolChunk>, InputError> {
        loop {
            let blocks = match self.read_blocks() {
                Ok(blocks) => blocks,
                Err(()) => return Err(self.serial_error()),
            };
            let serial = &self.serial;
            let parser = BlockParser {
                shown_path: &serial.shown_path,
                delimiter: serial.delimiter,
                fields: serial.header_names.len(),
                columns: &serial.columns,
                rules: RowRules {
                    cells: &serial.options.outcome_cells,
                    untested: None,
                },
            };
            let parsed: Result<Vec<PoolChunk>, ()> =
                blocks.par_iter().map(|block| parser.parse(block)).collect();
            let Ok(chunks) = parsed else {
                return Err(self.serial_error());
            };
            let rows: usize = chunks.iter().map(PoolChunk::len).sum();
            self.rows_read += rows as u64;
            let done = self.at_end && self.carry.is_empty();
            if done && self.rows_read == 0 {
                return Err(self.serial_error());
            }
            let chunks: Vec<PoolChunk> = chunks.into_iter().filter(|c| !c.is_empty()).collect();
            // A round of blank lines only is not the end.
            if !chunks.is_empty() || done {
                return Ok(chunks);
            }
        }
    }

    /// Up to [`BLOCKS_PER_ROUND`] blocks, each ending at a line end (or at the file's end).
    /// `Err` when a block holds no line end (a line of a megabyte or more: the serial
    /// reader decides) or reading fails.
    fn read_blocks(&mut self) -> Result<Vec<Vec<u8>>, ()> {
        let mut blocks = Vec::with_capacity(BLOCKS_PER_ROUND);
        while blocks.len() < BLOCKS_PER_ROUND && !(self.at_end && self.carry.is_empty()) {
            let mut block = std::mem::take(&mut self.carry);
            let have = block.len();
            block.resize(BLOCK_BYTES.max(have), 0);
            let mut filled = have;
            while filled < block.len() && !self.at_end {
                match self.file.read(&mut block[filled..]) {
                    Ok(0) => self.at_end = true,
                    Ok(got) => {
                        filled += got;
                        self.read += got as u64;
                    }
                    Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                    Err(_) => return Err(()),
                }
            }
            block.truncate(filled);
            if !self.at_end {
                let Some(last) = memchr::memrchr(b'\n', &block) else {
                    return Err(());
                };
                self.carry = block[last + 1..].to_vec();
                block.truncate(last + 1);
            }
            if !block.is_empty() {
                blocks.push(block);
            }
        }
        Ok(blocks)
    }
}

/// What parsing a block needs (shared by the threads parsing blocks).
struct BlockParser<'a> {
    shown_path: &'a Path,
    delimiter: u8,
    /// Fields of the header, which every row must have.
    fields: usize,
    columns: &'a ChosenColumns,
    rules: RowRules<'a>,
}

impl BlockParser<'_> {
    /// The rows of one block; `Err` at the first problem (the serial reader names it).
    fn parse(&self, block: &[u8]) -> Result<PoolChunk, ()> {
        let mut chunk = PoolChunk {
            rows: Rows::new(self.columns.features.len()),
        };
        let mut reader = csv::ReaderBuilder::new()
            .delimiter(self.delimiter)
            .has_headers(false)
            .flexible(true)
            .from_reader(block);
        let mut record = csv::ByteRecord::new();
        loop {
            match reader.read_byte_record(&mut record) {
                Ok(true) => {}
                Ok(false) => return Ok(chunk),
                Err(_) => return Err(()),
            }
            if record.len() != self.fields {
                return Err(());
            }
            chunk
                .rows
                .push(self.shown_path, 0, &record, self.columns, &self.rules)
                .map_err(|_| ())?;
        }
    }
}

impl ParallelChunks {
    /// The error the serial reader finds in the file (the file may also have changed
    /// between the reads: then that is the error).
    fn serial_error(&self) -> InputError {
        let changed = || InputError::Read {
            path: self.serial.shown_path.clone(),
            line: 0,
            source: std::io::Error::other(
                "the file changed while it was read (the parallel and the serial read disagree)",
            ),
        };
        let mut serial = match PoolChunks::open_shown(
            &self.serial.path,
            &self.serial.shown_path,
            &self.serial.options,
        ) {
            Ok(serial) => serial,
            Err(e) => return e,
        };
        let mut chunk = serial.chunk();
        loop {
            match serial.next_chunk(&mut chunk, 1 << 16) {
                Ok(true) => {}
                Ok(false) => return changed(),
                Err(e) => return e,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::fmt::Write as _;

    fn options() -> ReadOptions {
        let mut options = ReadOptions::new("pred");
        options.weight_column = Some("w".to_string());
        options.keep_columns = vec!["note".to_string()];
        options
    }

    /// Every row of a file as (id, prediction, weight, kept cells), and the chunk count.
    fn rows_of(chunks: Vec<PoolChunk>) -> (Vec<(String, f64, f64, String)>, usize) {
        let count = chunks.len();
        let rows = chunks
            .iter()
            .flat_map(|c| {
                (0..c.len()).map(move |r| {
                    (
                        c.ids().get(r).to_string(),
                        c.prediction()[r],
                        c.weight(true).unwrap()[r],
                        c.kept_row(r, 1).join("|"),
                    )
                })
            })
            .collect();
        (rows, count)
    }

    fn serial(path: &Path) -> Result<Vec<PoolChunk>, InputError> {
        let mut reader = PoolChunks::open(path, &options())?;
        let mut all = Vec::new();
        loop {
            let mut chunk = reader.chunk();
            if !reader.next_chunk(&mut chunk, 1 << 16)? {
                return Ok(all);
            }
            all.push(chunk);
        }
    }

    fn parallel(path: &Path) -> Result<Result<Vec<PoolChunk>, InputError>, ()> {
        let Ok(mut reader) = PoolChunks::open(path, &options()).unwrap().in_parallel() else {
            return Err(());
        };
        let mut all = Vec::new();
        loop {
            match reader.next_chunks() {
                Ok(round) if round.is_empty() => return Ok(Ok(all)),
                Ok(round) => all.extend(round),
                Err(e) => return Ok(Err(e)),
            }
        }
    }

    /// A pool of `m` rows (several 1 MiB blocks at 10^5), blank lines before the header and
    /// every 7919 rows, a kept column, no line end after the last row; `edit` may change a
    /// row's text.
    fn write_pool(path: &Path, m: usize, edit: impl Fn(usize, String) -> String) {
        let mut text = String::from("\n\nid,pred,w,note\n");
        for j in 0..m {
            if j % 7919 == 7918 {
                text.push('\n');
            }
            let row = format!(
                "U{j},{:.4},{},n{}",
                (j as f64 * 0.618_034).fract() * 9.0 - 3.0,
                0.5 + (j % 11) as f64 * 0.125,
                j % 13
            );
            let _ = write!(text, "{}", edit(j, row));
            if j + 1 < m {
                text.push('\n');
            }
        }
        fs::write(path, text).unwrap();
    }

    use std::fs;

    #[test]
    fn the_parallel_reader_reads_the_rows_of_the_serial_one() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("pool.csv");
        write_pool(&path, 100_000, |_, row| row);
        let (expected, _) = rows_of(serial(&path).unwrap());
        let (got, chunks) = rows_of(parallel(&path).expect("read in parallel").unwrap());
        assert_eq!(expected.len(), 100_000);
        assert!(chunks > 1, "more than one block: {chunks}");
        assert!(got == expected, "the same rows in the same order");
    }

    #[test]
    fn quotes_and_carriage_returns_keep_the_serial_reader() {
        let dir = tempfile::tempdir().unwrap();
        let quoted = dir.path().join("quoted.csv");
        write_pool(&quoted, 50_000, |j, row| {
            if j == 49_000 {
                row.replace(",n", ",\"n") + "\""
            } else {
                row
            }
        });
        assert!(parallel(&quoted).is_err());
        let crlf = dir.path().join("crlf.csv");
        write_pool(&crlf, 1000, |_, row| row + "\r");
        assert!(parallel(&crlf).is_err());
        assert_eq!(
            serial(&crlf)
                .unwrap()
                .iter()
                .map(PoolChunk::len)
                .sum::<usize>(),
            1000
        );
    }

    /// Errors deep in a file are the serial reader's, word for word (line and column).
    #[test]
    fn errors_are_those_of_the_serial_reader() {
        let dir = tempfile::tempdir().unwrap();
        type Edit = fn(usize, String) -> String;
        let cases: [(&str, Edit); 4] = [
            ("bad number", |j, row| {
                if j == 90_000 {
                    row.replacen(",", ",x", 1)
                } else {
                    row
                }
            }),
            ("missing field", |j, row| {
                if j == 70_001 {
                    row.rsplit_once(',').unwrap().0.to_string()
                } else {
                    row
                }
            }),
            ("bad weight", |j, row| {
                if j == 99_999 {
                    format!("U{j},1.5,-2,n0")
                } else {
                    row
                }
            }),
            ("control byte", |j, row| {
                if j == 5 {
                    row.replacen('U', "U\u{1}", 1)
                } else {
                    row
                }
            }),
        ];
        for (name, edit) in cases {
            let path = dir.path().join("pool.csv");
            write_pool(&path, 100_000, edit);
            let expected = serial(&path)
                .err()
                .unwrap_or_else(|| panic!("{name}: no error"));
            let got = parallel(&path)
                .expect("read in parallel")
                .err()
                .unwrap_or_else(|| panic!("{name}: no error in parallel"));
            assert_eq!(got.to_string(), expected.to_string(), "{name}");
        }
        // A header and no rows.
        let path = dir.path().join("empty.csv");
        fs::write(&path, "id,pred,w,note\n\n").unwrap();
        let expected = serial(&path).err().expect("no rows");
        let got = parallel(&path)
            .expect("in parallel")
            .err()
            .expect("no rows");
        assert_eq!(got.to_string(), expected.to_string());
    }
}
