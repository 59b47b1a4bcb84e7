//! `weighbridge batch`: design a calibration batch drawn from the pool with known inclusion
//! probabilities (see `crate::workflows::batch` for the method) and write what to assay.

use std::fmt::Write as _;
use std::path::PathBuf;

use clap::{Args, ValueEnum};
use serde::Serialize;

use crate::io::{read_units, OutputSet, ReadOptions, Role};
use crate::report::{tool_info, ToolInfo};
use crate::workflows::batch::{
    design_batch, BatchDesign, BatchOptions, BatchOutcome, DEFAULT_MAX_PROBABILITY,
};

use super::common::DelimiterArg;
use super::{commit_outputs, open_output, print_stdout, Failure};

const BATCH_HELP: &str = "\
Every pool unit is put in the batch independently with its own inclusion probability pi
(Poisson sampling), so the batch's size is random around --size. After the batch is
assayed, the units left in the pool and the assayed ones differ by a density ratio known
exactly, (1 - pi) / pi: weighted conformal selection with those weights keeps its
finite-sample FDR guarantee with nothing estimated.

The default design (ranked) gives units the model ranks high a higher probability (up to
--max-probability, 0.5 by default) so that the assayed units can rank the top of the pool,
decaying with rank to a floor that keeps every unit reachable at --fdr. --design uniform
gives every unit the same probability (for comparison; its shortlists are mostly all or
nothing).

Writes batch.csv (the units to assay: id, inclusion_probability, prediction, then the
--keep-columns cells verbatim), design.csv
(every pool unit's inclusion_probability and whether it was drawn, to recompute the weights
later) and design.json (settings, seed, expected size and spread, the floor, the expected
smallest p-value at the top, a checksum of the pool's ids, and a reading). Do not use the
batch's outcomes to retrain the model whose predictions the selection calibrates.

Example:
  weighbridge batch --pool fixtures/pool.csv --size 40 --fdr 0.2 --out round2-batch";

/// `--design`.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub enum DesignArg {
    /// Higher probabilities for the model's top-ranked units, down to a reachability floor.
    Ranked,
    /// The same probability for every unit.
    Uniform,
}

/// Arguments of `batch`.
#[derive(Debug, Args)]
#[command(after_long_help = BATCH_HELP)]
pub struct BatchArgs {
    /// Pool file (CSV, or TSV by extension): units with predictions.
    #[arg(long, value_name = "FILE")]
    pub pool: PathBuf,
    /// Id column.
    #[arg(long, default_value = "id", value_name = "NAME")]
    pub id: String,
    /// Prediction column (higher = more promising).
    #[arg(long, default_value = "pred", value_name = "NAME")]
    pub prediction: String,
    /// Expected number of units to assay (the drawn size varies around it).
    #[arg(long, value_name = "N", allow_negative_numbers = true)]
    pub size: f64,
    /// The FDR level the batch will be used at (sets the reachability floor).
    #[arg(
        long,
        default_value_t = 0.1,
        value_name = "Q",
        allow_negative_numbers = true
    )]
    pub fdr: f64,
    /// How inclusion probabilities are chosen.
    #[arg(long, value_enum, default_value_t = DesignArg::Ranked)]
    pub design: DesignArg,
    /// Floor of the inclusion probabilities (ranked design) [default: 4 times the
    /// reachability bound 1 / (1 + q (M - N) / (1 - q)), M pool units].
    #[arg(long, value_name = "P", allow_negative_numbers = true)]
    pub min_probability: Option<f64>,
    /// Cap of the inclusion probabilities, below 1 (pi = 1 would give weight 0).
    #[arg(long, default_value_t = DEFAULT_MAX_PROBABILITY, value_name = "P", allow_negative_numbers = true)]
    pub max_probability: f64,
    /// Columns copied verbatim from the pool into batch.csv (for the lab: structure,
    /// series, plate position), a comma list. Example: --keep-columns smiles,series.
    #[arg(long, value_name = "LIST")]
    pub keep_columns: Vec<String>,
    /// Seed of the draw.
    #[arg(long, default_value_t = crate::random::DEFAULT_SEED)]
    pub seed: u64,
    /// Output folder (created if missing).
    #[arg(long, default_value = "weighbridge-batch", value_name = "DIR")]
    pub out: PathBuf,
    /// Write into --out even if it holds files that no weighbridge run made (files of
    /// other names are left alone; same-named ones are overwritten).
    #[arg(long)]
    pub force: bool,
    /// Field delimiter [default: tab for .tsv/.tab files, else comma].
    #[arg(long, value_enum)]
    pub delimiter: Option<DelimiterArg>,
    /// Do not print the summary.
    #[arg(long)]
    pub quiet: bool,
}

/// `design.json`.
#[derive(Debug, Serialize)]
struct DesignReport<'a> {
    schema_version: u32,
    tool: ToolInfo,
    command_line: Vec<String>,
    /// The column names used (`id`, `prediction`; the others null or empty).
    columns: crate::report::Columns,
    pool_file: String,
    id_column: &'a str,
    prediction_column: &'a str,
    fdr: f64,
    requested_size: f64,
    /// FNV-1a 64-bit hash of the pool's ids in file order, each followed by a newline (an
    /// identity check for `select --batch-design`, not a cryptographic digest).
    pool_id_checksum: String,
    #[serde(flatten)]
    outcome: &'a BatchOutcome,
}

/// FNV-1a, 64 bit (Fowler, Noll, Vo): offset basis 0xcbf29ce484222325, prime 0x100000001b3.
fn fnv1a<'a>(bytes: impl Iterator<Item = &'a u8>) -> u64 {
    bytes.fold(0xcbf2_9ce4_8422_2325, |hash, &b| {
        (hash ^ u64::from(b)).wrapping_mul(0x0000_0100_0000_01b3)
    })
}

/// FNV-1a 64 over the ids, each followed by `\n`, as 16 hex digits.
pub(crate) fn id_checksum(ids: &[String]) -> String {
    let hash = fnv1a(ids.iter().flat_map(|id| id.as_bytes().iter().chain(b"\n")));
    format!("{hash:016x}")
}

fn csv_bytes(header: &[&str], rows: impl Iterator<Item = Vec<String>>) -> Vec<u8> {
    let mut writer = csv::Writer::from_writer(Vec::new());
    writer.write_record(header).expect("write to memory");
    for row in rows {
        writer.write_record(&row).expect("write to memory");
    }
    writer.into_inner().expect("flush to memory")
}

/// Run `batch`.
pub fn run(a: BatchArgs) -> Result<(), Failure> {
    let folder = open_output(&a.out, a.force, &[&a.pool])?;
    let read = ReadOptions {
        id: a.id.clone(),
        delimiter: a.delimiter.map(DelimiterArg::byte),
        keep_columns: super::common::feature_selectors(&a.keep_columns),
        ..ReadOptions::new(a.prediction.clone())
    };
    let pool = read_units(&a.pool, Role::Pool, &read)?;
    let options = BatchOptions {
        size: a.size,
        fdr: a.fdr,
        design: match a.design {
            DesignArg::Ranked => BatchDesign::Ranked,
            DesignArg::Uniform => BatchDesign::Uniform,
        },
        min_probability: a.min_probability,
        max_probability: a.max_probability,
        seed: a.seed,
    };
    let outcome = design_batch(&pool.prediction, &options)
        .map_err(|e| Failure::Input(format!("pool file {}: {e}", a.pool.display())))?;

    let mut floats = ryu::Buffer::new();
    let mut float = |v: f64| floats.format(v).to_string();
    let batch_rows: Vec<Vec<String>> = (0..pool.len())
        .filter(|&j| outcome.in_batch[j])
        .map(|j| {
            let mut row = vec![
                pool.ids[j].clone(),
                float(outcome.probabilities[j]),
                float(pool.prediction[j]),
            ];
            row.extend(pool.kept.row(j).iter().cloned());
            row
        })
        .collect();
    let design_rows: Vec<Vec<String>> = (0..pool.len())
        .map(|j| {
            vec![
                pool.ids[j].clone(),
                float(outcome.probabilities[j]),
                outcome.in_batch[j].to_string(),
            ]
        })
        .collect();
    let report = DesignReport {
        schema_version: crate::report::SCHEMA_VERSION,
        tool: tool_info(),
        command_line: super::command_line(),
        columns: crate::report::Columns {
            id: a.id.clone(),
            prediction: Some(a.prediction.clone()),
            keep_columns: pool.kept.names.clone(),
            ..crate::report::Columns::default()
        },
        pool_file: a.pool.display().to_string(),
        id_column: &a.id,
        prediction_column: &a.prediction,
        fdr: a.fdr,
        requested_size: a.size,
        pool_id_checksum: id_checksum(&pool.ids),
        outcome: &outcome,
    };
    let mut files = OutputSet::new();
    let mut batch_header: Vec<String> = ["id", "inclusion_probability", "prediction"]
        .map(String::from)
        .to_vec();
    batch_header.extend(crate::report::summary::kept_header(&pool.kept.names));
    let batch_header: Vec<&str> = batch_header.iter().map(String::as_str).collect();
    files.add(
        "batch.csv",
        csv_bytes(&batch_header, batch_rows.into_iter()),
    );
    files.add(
        "design.csv",
        csv_bytes(
            &["id", "inclusion_probability", "in_batch"],
            design_rows.into_iter(),
        ),
    );
    let json = serde_json::to_vec_pretty(&report)
        .map_err(|e| Failure::Internal(format!("cannot serialize the design: {e}")))?;
    files.add("design.json", json);
    commit_outputs(folder, files, "batch")?;

    if !a.quiet {
        let mut text = String::new();
        let _ = writeln!(
            text,
            "weighbridge {} batch: {} of {} pool units drawn to assay ({} design, expected {:.0}, \
             FDR {})",
            report.tool.version,
            outcome.drawn_size,
            outcome.pool_units,
            match outcome.design {
                BatchDesign::Ranked => "ranked",
                BatchDesign::Uniform => "uniform",
            },
            outcome.expected_size,
            a.fdr
        );
        for line in &outcome.reading {
            let _ = writeln!(text, "  - {line}");
        }
        let _ = writeln!(
            text,
            "wrote {}, {} and {}",
            a.out.join("batch.csv").display(),
            a.out.join("design.csv").display(),
            a.out.join("design.json").display()
        );
        print_stdout(&text);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn checksum_is_fnv1a() {
        // FNV-1a 64 test vectors of the reference implementation (from memory): "" gives
        // the offset basis, "a" gives 0xaf63dc4c8601ec8c.
        assert_eq!(fnv1a(b"".iter()), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a(b"a".iter()), 0xaf63_dc4c_8601_ec8c);
        assert_ne!(
            id_checksum(&["a".into(), "b".into()]),
            id_checksum(&["b".into(), "a".into()])
        );
    }
}
