//! `weighbridge columns FILE`: list every column of a table with its position and what its
//! first rows hold (numbers, censored values, empty cells, an example), so that column flags
//! (`--outcome`, `--features MolWt..TPSA`, `--keep-columns`) can be written without opening
//! the file elsewhere.

use std::fmt::Write as _;
use std::path::PathBuf;

use clap::Args;

use crate::io::column_overview;
use crate::io::errors::shown_text;

use super::common::DelimiterArg;
use super::{print_stdout, Failure};

const COLUMNS_HELP: &str = "\
Reads the header and at most --rows data rows (the file is read as the other commands read
it: comma or tab by extension, .gz and .zst decompressed, `-` for standard input), then
prints one line per column:

  position  name  numeric  censored  empty  other  example

numeric: cells that are finite numbers; censored: cells such as >10000 or <=1; empty: empty
cells; other: the rest (text, NA, ...); example: the first non-empty cell. Feature ranges
use these positions: --features MolWt..TPSA takes every column from MolWt to TPSA.

Writes nothing. Exit codes: 0 success, 2 bad usage or input.

Examples:
  weighbridge columns fixtures/labeled.csv
  weighbridge columns assays.csv.gz --rows 5000
  zcat assays.csv.gz | weighbridge columns -";

/// Arguments of `columns`.
#[derive(Debug, Args)]
#[command(after_long_help = COLUMNS_HELP)]
pub struct ColumnsArgs {
    /// The table (CSV, or TSV by extension; .gz and .zst are decompressed; `-` reads
    /// standard input).
    #[arg(value_name = "FILE")]
    pub file: PathBuf,
    /// Data rows looked at for the counts.
    #[arg(long, default_value_t = 1000, value_name = "N")]
    pub rows: usize,
    /// Field delimiter [default: tab for .tsv/.tab files, else comma].
    #[arg(long, value_enum)]
    pub delimiter: Option<DelimiterArg>,
}

/// Examples longer than this are cut in the listing.
const EXAMPLE_CHARS: usize = 30;

/// Run `columns`.
pub fn run(a: ColumnsArgs) -> Result<(), Failure> {
    let overview = column_overview(&a.file, a.delimiter.map(DelimiterArg::byte), a.rows)?;
    let shown_path = crate::io::source::display_path(&a.file);
    let mut text = format!(
        "{}: {} columns (header on line {}); counts over {} {} data row{}\n",
        shown_path.display(),
        overview.names.len(),
        overview.header_line,
        if overview.complete {
            "all"
        } else {
            "the first"
        },
        overview.rows_read,
        if overview.rows_read == 1 { "" } else { "s" },
    );
    let names: Vec<String> = overview.names.iter().map(|n| shown_text(n)).collect();
    let width = names
        .iter()
        .map(|n| n.chars().count())
        .max()
        .unwrap_or(0)
        .clamp(6, 40);
    let _ = writeln!(
        text,
        "{:>4}  {:<width$}  {:>8}  {:>8}  {:>6}  {:>6}  example",
        "#", "column", "numeric", "censored", "empty", "other"
    );
    for (c, name) in names.iter().enumerate() {
        let other =
            overview.rows_read - overview.numeric[c] - overview.censored[c] - overview.empty[c];
        let example = overview.example[c].as_deref().map_or(String::new(), |e| {
            let mut chars = e.chars();
            let mut cut: String = chars.by_ref().take(EXAMPLE_CHARS).collect();
            if chars.next().is_some() {
                cut.push('…');
            }
            cut
        });
        let _ = writeln!(
            text,
            "{:>4}  {:<width$}  {:>8}  {:>8}  {:>6}  {:>6}  {example}",
            c + 1,
            name,
            overview.numeric[c],
            overview.censored[c],
            overview.empty[c],
            other,
        );
    }
    print_stdout(&text);
    Ok(())
}
