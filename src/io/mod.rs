//! Input and output files: reading the labeled and pool CSV/TSV files into column vectors
//! with column selection and located errors, and writing output files atomically.
//!
//! Nothing here does statistics: the readers only check what every later step relies on
//! (finite numbers, positive weights, unique non-empty ids, the requested columns exist).
//!
//! - [`read`]: [`read_units`], [`read_id_list`], [`UnitTable`], [`ReadOptions`], the csv
//!   reader and cell parsing;
//! - [`columns`]: column selection ([`resolve_features`] with ranges such as `f1..f32` and
//!   `MolWt..TPSA`, [`check_same_features`], header lookup, did-you-mean suggestions);
//! - [`outcome`]: assay conventions in labeled outcome cells (missing-value tokens,
//!   censored values, untested rows of a one-table input);
//! - [`errors`]: [`InputError`] and the wording of its messages;
//! - [`source`]: [`Source`], an input read once (file, named pipe, or `-` for standard
//!   input) that knows its line ends, so messages give editor lines without reopening;
//! - [`output`]: [`write_atomic`] and [`OutputSet`];
//! - [`folder`]: [`RunFolder`]: the output folder holds one run's outputs (lock, manifest,
//!   stale files, leftovers of killed runs, refusing folders the tool did not make).

pub mod columns;
pub mod errors;
pub mod folder;
pub mod outcome;
pub mod output;
pub mod read;
pub mod source;

pub use columns::{check_same_features, resolve_features};
pub use errors::InputError;
pub use folder::{FolderError, Manifest, RunFolder, MANIFEST};
pub use outcome::{CensoredRule, MissingOutcome, OutcomeCells};
pub use output::{abandon_temporaries, write_atomic, OutputSet, StagedFile};
pub use read::{
    column_overview, delimiter_for, parse_finite, pool_id_hash, read_id_list, read_table,
    read_table_choosing, read_units, read_units_choosing, ColumnKind, ColumnOverview, KeptColumns,
    PoolChunk, PoolChunks, ReadOptions, Role, UnitTable,
};
pub use source::{check_one_stdin, Format, Source};
