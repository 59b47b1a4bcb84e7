//! The pool read in chunks of rows, for the streamed selection: the same header, column
//! choice and cell checks as [`read_units`](super::read_units) (the rows go through the
//! same `Rows::push`), but only one chunk is held at a time, so a pool of 5*10^7 rows is
//! read in memory proportional to the chunk. Duplicate ids are found from 8-byte hashes
//! collected by the caller ([`id_hash`]) and located by a second read
//! ([`PoolChunks::locate_duplicate`]).

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use super::{
    display_path, editor_line, id_hash as hash_of, open_table, read_header, ChosenColumns, Role,
    RowRules, Rows, Source,
};
use crate::io::errors::{shown, InputError};
use crate::io::ReadOptions;

/// A pool file opened for reading chunk by chunk.
pub struct PoolChunks {
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

    pub fn ids(&self) -> &[String] {
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

    /// Editor line of row `r` of this chunk.
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
                first_line.insert(id.clone(), line);
            }
        }
        Ok(None)
    }
}
