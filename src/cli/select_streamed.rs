//! `select` with the pool streamed: memory proportional to the labeled set, a chunk of the
//! pool, and 16 bytes per pool unit for the q-values, instead of about 200 bytes per pool
//! unit plus the outputs. Used when the in-memory run would need more than
//! `--memory-budget` (default 1 GiB), for the runs the streamed selection covers
//! (two files, no or given weights, conditional calibration with homogeneous or
//! deterministic pruning, no report); docs/streaming.md has the passes and their costs.
//!
//! The passes over the pool:
//! 1. the CSV, once, with every check of the in-memory reader: each unit's prediction,
//!    score and weight go to an unnamed temporary file (24 bytes, the side file, which the
//!    selection's passes read), its id and kept cells to a second, and its id to an 8-byte hash
//!    (repeated ids are then located by one more read); each score's bucket goes into the
//!    selection's histogram, so the selection needs no pass of its own for it;
//! 2. the selection's own passes ([`crate::selection::streaming`]) over the side file:
//!    the decide pass hands over each unit's p-value, `K_j` and first step, written to a
//!    third file (16 bytes per unit) and collected as `(p, j)` pairs for the q-values;
//!    the units that needed their exact rank are settled in place after the rank rounds;
//! 3. no pass: the q-values (the pairs sorted), the first-step counts (the draw's
//!    consequences) and the selected units' predictions (the shortlist's order);
//! 4. the temporary files of passes 1 and 2 read back, writing candidates.csv in input
//!    order (the selection decided from each record and `r*`) and the shortlist rows, which
//!    are then put in their order.
//!
//! Every number written is computed by the same functions as the in-memory path, so the
//! files are byte-identical (tests/cli_streamed_select.rs).

use rayon::prelude::*;
use std::cell::RefCell;
use std::collections::{HashSet, VecDeque};
use std::fs::File;
use std::hash::BuildHasherDefault;
use std::io::{self, BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::mpsc::{sync_channel, Receiver};

use crate::conformal::pvalue::CalibrationSet;
use crate::conformal::score::{labeled_scores_toward, pool_scores_toward, Thresholds};
use crate::io::source::is_stdin;
use crate::io::{
    pool_id_hash, read_units, InputError, OutputSet, PoolChunk, PoolChunks, Role, Source,
    StagedFile,
};
use crate::report::summary::{
    candidates_header, shortlist_header, text_summary_of_top, unreachable_text, CandidateRow,
    RowCells, ShortlistRow, TOP_SHOWN,
};
use crate::report::{select_summary, RunInputs};
use crate::selection::bh::{bh_adjusted_pairs, within_level};
use crate::selection::draw::{fixed_selection, homogeneous_draw, DrawSummary};
use crate::selection::pipeline::{
    kish_ess, selection_warnings, Procedure, SelectError, SelectionOutcome,
};
use crate::selection::pruning::Pruning;
use crate::selection::resolution;
use crate::selection::streaming::{
    run_streaming_with_histogram, ChunkVisitor, PoolBuckets, PoolHistogram, PoolSource,
    StreamingError, StreamingOptions, CHUNK,
};
use crate::shift::weighting::WeightSource;

use super::common::{describe_run_columns, shared_ids_warning_of, InputFiles, SelectConfig};
use super::{commit_outputs, open_output, print_stdout, Failure, PhaseTimer, StepStatus};

/// The default `--memory-budget`: 1 GiB.
pub const DEFAULT_BUDGET: u64 = 1 << 30;

/// Rows read from the CSV per chunk.
const ROWS_PER_CHUNK: usize = 1 << 16;

/// Parse a `--memory-budget` value: a number of bytes with an optional unit (K, M, G, T
/// with or without "iB"/"B", powers of 1024), e.g. `1GiB`, `512M`, `2000000000`.
///
/// # Errors
/// A message naming the value and the accepted forms.
pub fn parse_budget(text: &str) -> Result<u64, String> {
    let t = text.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (number, unit) = t.split_at(split);
    let unit = unit.trim().to_ascii_lowercase();
    let factor: u64 = match unit.as_str() {
        "" | "b" => 1,
        "k" | "kb" | "kib" => 1 << 10,
        "m" | "mb" | "mib" => 1 << 20,
        "g" | "gb" | "gib" => 1 << 30,
        "t" | "tb" | "tib" => 1 << 40,
        _ => u64::MAX,
    };
    let value: Option<f64> = number.parse().ok();
    match value {
        Some(v) if factor != u64::MAX && v.is_finite() && v > 0.0 => {
            let bytes = v * factor as f64;
            if bytes >= 1.0 && bytes < u64::MAX as f64 {
                Ok(bytes as u64)
            } else {
                Err(format!("--memory-budget {text}: out of range"))
            }
        }
        _ => Err(format!(
            "--memory-budget {text}: expected a size such as 1GiB, 512MiB, 2G or a number \
             of bytes"
        )),
    }
}

/// Why this run cannot be streamed, in the user's flags; `None` when it can.
pub(crate) fn not_streamable(config: &SelectConfig) -> Option<&'static str> {
    let o = &config.options;
    if matches!(config.inputs, InputFiles::Table { .. }) {
        Some("--table (give --labeled and --pool)")
    } else if matches!(config.weights, WeightSource::Fitted { .. }) {
        Some("--fit-weights (the classifier needs the pool's features in memory)")
    } else if config.batch_design.is_some() {
        Some("--batch-design")
    } else if config.report {
        Some("--report (its plots need every unit)")
    } else if o.level_curve == Some(true) {
        Some("--level-curve")
    } else if o.procedure != Procedure::Conditional {
        Some("--procedure bh or by (their p-values are randomized by default)")
    } else if o.pruning == Pruning::Heterogeneous {
        Some("--pruning heterogeneous (its Monte Carlo draw needs every unit)")
    } else {
        None
    }
}

/// Bytes the in-memory `select` is estimated to need for this pool file: about
/// `170 + 2 * (row length)` bytes per row (columns, p-values, order, the candidates.csv
/// buffer; measured 226 bytes per row at 10^7 rows of 30 bytes), rows estimated from the
/// file's length and its first rows (a compressed file is taken to hold four times its
/// size). `None` for standard input, whose size is not known before it is read.
pub(crate) fn in_memory_estimate(pool: &Path) -> Option<u64> {
    if read_once_only(pool) {
        // Sampling a pipe would consume what the run must read.
        return None;
    }
    let len = std::fs::metadata(pool).ok()?.len();
    let mut source = Source::open(pool).ok()?;
    let compressed = !matches!(source.format(), crate::io::Format::Text);
    let mut sample = vec![0u8; 1 << 18];
    let mut filled = 0;
    while filled < sample.len() {
        match source.read(&mut sample[filled..]) {
            Ok(0) => break,
            Ok(k) => filled += k,
            Err(_) => return None,
        }
    }
    let lines = memchr::memchr_iter(b'\n', &sample[..filled]).count().max(1) as u64;
    let row = (filled as u64 / lines).max(1);
    let text_len = if compressed {
        len.saturating_mul(4)
    } else {
        len
    };
    let rows = text_len / row;
    Some(rows.saturating_mul(170 + 2 * row))
}

/// Whether the pool can be read only once: standard input, a named pipe, a device.
pub(crate) fn read_once_only(pool: &Path) -> bool {
    is_stdin(pool) || std::fs::metadata(pool).is_ok_and(|m| !m.is_file())
}

/// A folder for the run's temporary files: the nearest existing folder at or above the
/// output folder (so they are on the disk the outputs go to, not in a memory-backed /tmp).
fn temp_dir_for(out: &Path) -> PathBuf {
    let absolute = std::path::absolute(out).unwrap_or_else(|_| out.to_path_buf());
    absolute
        .ancestors()
        .find(|p| p.is_dir())
        .map_or_else(std::env::temp_dir, Path::to_path_buf)
}

fn internal(what: &str) -> impl Fn(io::Error) -> Failure + '_ {
    move |e| Failure::Internal(format!("{what}: {e}"))
}

fn streaming_failure(e: StreamingError) -> Failure {
    match e {
        StreamingError::Selection(e) => SelectError::Selection(e).into(),
        StreamingError::EmptyPool => SelectError::EmptyPool.into(),
        other => Failure::Internal(other.to_string()),
    }
}

/// The side file of read 1 read as the selection's pool (the score and weight of each
/// record), pass by pass, with progress on the terminal. The records of the last two
/// chunks handed out stay in `recent` (with each chunk's first unit), where the decide
/// pass's visitor, which comes one chunk late, finds each unit's prediction.
struct SidePool<'s> {
    file: &'s File,
    units: u64,
    has_weight: bool,
    recent: &'s RefCell<VecDeque<(u64, Vec<u8>)>>,
    status: &'s StepStatus,
    pass: usize,
}

/// The records [`SidePool`] kept for the chunk starting at unit `from`.
fn recent_records(recent: &VecDeque<(u64, Vec<u8>)>, from: u64) -> Option<&[u8]> {
    recent
        .iter()
        .find(|(start, _)| *start == from)
        .map(|(_, records)| records.as_slice())
}

impl PoolSource for SidePool<'_> {
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError> {
        use std::os::unix::fs::FileExt;
        self.pass += 1;
        let label = format!("selection, pass {} over the scores", self.pass);
        let mut scores = Vec::with_capacity(CHUNK);
        let mut weights = Vec::with_capacity(CHUNK);
        let mut done = 0u64;
        while done < self.units {
            let take = (self.units - done).min(CHUNK as u64) as usize;
            {
                let mut recent = self.recent.borrow_mut();
                let mut records = match recent.len() {
                    0 | 1 => Vec::new(),
                    _ => recent.pop_front().map(|(_, r)| r).unwrap_or_default(),
                };
                records.resize(take * SIDE_BYTES, 0);
                self.file
                    .read_exact_at(&mut records, done * SIDE_BYTES as u64)?;
                scores.clear();
                weights.clear();
                for record in records.chunks_exact(SIDE_BYTES) {
                    let [_, score, weight] = side_numbers(record);
                    scores.push(score);
                    weights.push(weight);
                }
                recent.push_back((done, records));
            }
            visit(&scores, self.has_weight.then_some(&weights[..]));
            done += take as u64;
            self.status
                .progress(&label, done as f64 / self.units.max(1) as f64);
        }
        Ok(())
    }
}

/// A hasher for keys that are already 64-bit hashes ([`pool_id_hash`]): the key itself.
#[derive(Default)]
struct Prehashed(u64);

impl std::hash::Hasher for Prehashed {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        // Only u64 keys are hashed; anything else is folded in, not dropped.
        for &b in bytes {
            self.0 = self.0.rotate_left(8) ^ u64::from(b);
        }
    }

    fn write_u64(&mut self, value: u64) {
        self.0 = value;
    }
}

/// What pass 1 learns besides the spilled pool.
struct FirstPass {
    m: usize,
    smallest_weight: f64,
    largest_weight: f64,
    /// Some pool weight differs from the first labeled (or pool) weight.
    weights_vary: bool,
    shared_first: Vec<String>,
    shared_count: usize,
    kept_names: Vec<String>,
}

/// Run `select` streamed. `why` says why (printed with the summary).
pub(crate) fn run(
    config: &SelectConfig,
    budget: u64,
    estimate: Option<u64>,
    why: &str,
) -> Result<(), Failure> {
    let mut timer = PhaseTimer::new();
    let settings = config.options.check()?;
    let q = settings.fdr;
    let mut folder = open_output(
        &config.out,
        config.force,
        &[&config.labeled_path, &config.pool_path],
    )?;
    let temp_dir = temp_dir_for(&config.out);
    let status = StepStatus::new(config.quiet);
    status.step("reading the labeled file");
    crate::io::check_one_stdin(&[
        ("--labeled", config.labeled_path.as_path()),
        ("--pool", config.pool_path.as_path()),
    ])?;
    let labeled = read_units(&config.labeled_path, Role::Labeled, &config.labeled_read)?;
    let n = labeled.len();
    let labeled_thresholds = match (&labeled.threshold, config.threshold) {
        (Some(column), _) => Thresholds::PerUnit(column),
        (None, Some(c)) => Thresholds::Constant(c),
        (None, None) => unreachable!("clap requires --threshold or --threshold-column"),
    };
    let labeled_v = labeled_scores_toward(
        settings.score,
        settings.direction,
        labeled.outcome.as_deref().unwrap_or(&[]),
        &labeled.prediction,
        labeled_thresholds,
    );
    let calibration =
        CalibrationSet::new(&labeled_v, labeled.weight.as_deref()).map_err(SelectError::from)?;
    let total = calibration.total_weight();
    let lowest_labeled = calibration.sorted_scores().first().copied();

    // Standard input or a pipe is read once: its bytes go to a temporary file read like
    // the pool file.
    let (pool_path, _stdin_copy) = if read_once_only(&config.pool_path) {
        status.step("copying the pool to a temporary file (it can be read only once)");
        // A registered temporary file: removed when the run ends, also by Ctrl-C.
        let mut copy = StagedFile::create(&temp_dir, "pool-copy")
            .map_err(internal("cannot create a temporary file for the pool"))?;
        let copied = if is_stdin(&config.pool_path) {
            io::copy(&mut io::stdin().lock(), &mut copy)
        } else {
            std::fs::File::open(&config.pool_path)
                .and_then(|mut pipe| io::copy(&mut pipe, &mut copy))
        };
        copied.map_err(internal("cannot copy the pool to a temporary file"))?;
        (copy.path().to_path_buf(), Some(copy))
    } else {
        (config.pool_path.clone(), None)
    };
    let shown = crate::io::source::display_path(&config.pool_path);
    let open_pool = || PoolChunks::open_shown(&pool_path, &shown, &config.pool_read);
    let pool_len = std::fs::metadata(&pool_path).map_or(0, |m| m.len());
    timer.mark("read labeled");

    // Pass 1: the CSV.
    let chunks = open_pool()?;
    let kept_width = chunks.kept_names().len();
    let side_file =
        tempfile::tempfile_in(&temp_dir).map_err(internal("cannot create a temporary file"))?;
    let mut side = BufWriter::with_capacity(1 << 20, side_file);
    // Each row's id and kept cells, length-prefixed, for writing the outputs without
    // reading the CSV again.
    let text_file =
        tempfile::tempfile_in(&temp_dir).map_err(internal("cannot create a temporary file"))?;
    let mut text = BufWriter::with_capacity(1 << 20, text_file);
    let labeled_ids: HashSet<&str> = labeled.ids.iter().map(String::as_str).collect();
    // The labeled ids' hashes: a pool id is looked up by the hash computed anyway for the
    // duplicate check, and compared as a string only when that hash is a labeled one's.
    let labeled_hashes: HashSet<u64, BuildHasherDefault<Prehashed>> =
        labeled.ids.iter().map(|id| pool_id_hash(id)).collect();
    let first_weight = labeled.weight.as_ref().and_then(|w| w.first().copied());
    let mut first = FirstPass {
        m: 0,
        smallest_weight: f64::INFINITY,
        largest_weight: labeled
            .weight
            .as_ref()
            .map_or(1.0, |w| w.iter().fold(0.0, |a: f64, &b| a.max(b))),
        weights_vary: labeled
            .weight
            .as_ref()
            .is_some_and(|w| w.windows(2).any(|p| p[0] != p[1])),
        shared_first: Vec::new(),
        shared_count: 0,
        kept_names: chunks.kept_names(),
    };
    let mut hashes: Vec<u64> = Vec::new();
    // The selection's first pass, done here.
    let pool_buckets = PoolBuckets::new(&calibration);
    let mut histogram = PoolHistogram::new(&calibration);
    let write_error = internal("cannot write a temporary file");
    let (has_threshold, has_weight) = (chunks.has_threshold(), chunks.has_weight());
    let prepare = Prepare {
        config,
        settings: &settings,
        has_threshold,
        has_weight,
        kept_width,
        labeled_ids: &labeled_ids,
        labeled_hashes: &labeled_hashes,
        first_weight,
        buckets: &pool_buckets,
    };
    std::thread::scope(|scope| -> Result<(), Failure> {
        let mut ahead = ReadAhead::start(scope, chunks, pool_len, &prepare);
        while let Some((chunk, fraction)) = ahead.next()? {
            if chunk.too_long {
                return Err(write_error(io::Error::other("a cell of 4 GiB or more")));
            }
            histogram.add(
                &chunk.scores,
                has_weight.then_some(&chunk.weights[..]),
                &chunk.buckets,
            );
            side.write_all(&chunk.side).map_err(&write_error)?;
            text.write_all(&chunk.text).map_err(&write_error)?;
            hashes.extend_from_slice(&chunk.hashes);
            first.smallest_weight = first.smallest_weight.min(chunk.smallest_weight);
            first.largest_weight = first.largest_weight.max(chunk.largest_weight);
            first.weights_vary |= chunk.weights_vary;
            for id in chunk.shared {
                if first.shared_first.len() < super::common::SHARED_IDS_LISTED {
                    first.shared_first.push(id);
                }
                first.shared_count += 1;
            }
            first.m += chunk.scores.len();
            if pool_len > 0 {
                status.progress("reading the pool", fraction);
            }
        }
        Ok(())
    })?;
    let m = first.m;
    hashes.par_sort_unstable();
    let repeated: HashSet<u64> = hashes
        .windows(2)
        .filter(|p| p[0] == p[1])
        .map(|p| p[0])
        .collect();
    drop(hashes);
    // Once, or twice when an 8-byte hash repeats (to find the repeated id, if any).
    let pool_reads = if repeated.is_empty() { 1 } else { 2 };
    if !repeated.is_empty() {
        if let Some(error) = open_pool()?.locate_duplicate(&repeated)? {
            return Err(error.into());
        }
    }
    if crate::shift::weights::overflow_safe_scale(first.largest_weight, n + m) != 1.0 {
        return Err(Failure::Input(format!(
            "the weights in column {} are so large that their sums would overflow; the \
             streamed selection does not rescale them. Hint: divide the weights in both \
             files by the same large number (ratios are what count), or raise \
             --memory-budget to run in memory.",
            config.pool_read.weight_column.as_deref().unwrap_or("w")
        )));
    }
    let side_file = side
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write a temporary file: {e}")))?;
    let mut text_file = text
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write a temporary file: {e}")))?;
    timer.mark("pass 1: read the pool");

    // No unit can reach the level: the same error as in memory.
    let wmin = first.smallest_weight;
    if !within_level(wmin, total + wmin, q) {
        return Err(super::select::explain(
            config,
            labeled.weight.is_some(),
            SelectError::LabeledSetTooSmall {
                fdr: q,
                n_labeled: n,
                smallest_floor: wmin / (total + wmin),
            },
        ));
    }

    // Pass 2: the streamed selection.
    let pruning = settings.pruning.unwrap_or(Pruning::Homogeneous);
    let recent_chunks = RefCell::new(VecDeque::new());
    let mut pool = SidePool {
        file: &side_file,
        units: m as u64,
        has_weight,
        recent: &recent_chunks,
        status: &status,
        pass: 0,
    };
    let options = StreamingOptions {
        q,
        pruning,
        seed: settings.seed,
        bh_pvalues: settings.pvalues,
        memory_budget: (budget / 2) as usize,
    };
    // Each unit's p-value and decisions (`UnitRecord`), written during the selection's
    // decide pass and read back when writing the outputs: the units whose K_j needs their
    // exact rank are settled in place afterwards, and the selection itself (which needs
    // r*) is decided when the outputs are written.
    let units_file =
        tempfile::tempfile_in(&temp_dir).map_err(internal("cannot create a temporary file"))?;
    let mut units_out = BufWriter::with_capacity(1 << 20, units_file);
    // (p_j, j), turned into (q-value, j) in input order.
    let mut q_values: Vec<(f64, usize)> = Vec::with_capacity(m);
    // The first-step units' K_j, and (prediction, j) in the same order.
    let mut first_counts: Vec<usize> = Vec::new();
    let mut first_units: Vec<(f64, u64)> = Vec::new();
    let mut first_step_floor = 0usize;
    let at_floor = |score: f64| lowest_labeled.map_or(true, |lowest| score < lowest);
    let mut side_error: Option<io::Error> = None;
    let mut record = [0u8; SIDE_BYTES];
    let mut unit_bytes: Vec<u8> = Vec::new();
    let mut selection = run_streaming_with_histogram(
        &calibration,
        histogram,
        &mut pool,
        options,
        |from, units| {
            if side_error.is_some() {
                return;
            }
            // The records of the chunk the decide pass is visiting (SidePool).
            let recent = recent_chunks.borrow();
            let side_bytes = recent_records(&recent, from).unwrap_or_default();
            if side_bytes.len() != units.len() * SIDE_BYTES {
                side_error = Some(io::Error::other("the decide pass is out of step"));
                return;
            }
            unit_bytes.clear();
            for (i, (unit, side_record)) in units
                .iter()
                .zip(side_bytes.chunks_exact(SIDE_BYTES))
                .enumerate()
            {
                let j = from + i as u64;
                let p = unit.numerator / unit.denominator;
                let k = unit.conditional_count.unwrap_or(0);
                unit_bytes.extend_from_slice(&UnitRecord::of(p, k, unit.first_step).0);
                q_values.push((p, j as usize));
                if unit.first_step {
                    let [prediction, score, _] = side_numbers(side_record);
                    first_counts.push(k);
                    first_units.push((prediction, j));
                    first_step_floor += usize::from(at_floor(score));
                }
            }
            if let Err(e) = units_out.write_all(&unit_bytes) {
                side_error = Some(e);
            }
        },
    )
    .map_err(streaming_failure)?;
    if let Some(e) = side_error {
        return Err(Failure::Internal(format!(
            "cannot read or write a temporary file: {e}"
        )));
    }
    let counts = selection.counts.clone();
    let r_star = selection.r_star();
    let units_file = units_out
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write a temporary file: {e}")))?;
    timer.mark("pass 2: streamed selection");

    // The units that needed their exact rank: their records settled in place.
    status.step("p-values and the shortlist's order");
    {
        use std::os::unix::fs::FileExt;
        let mut io_error: Option<io::Error> = None;
        selection
            .for_each_ranked(|j, k, first_step| {
                if io_error.is_some() {
                    return;
                }
                let settled = units_file
                    .write_all_at(
                        &UnitRecord::packed(k, first_step).to_le_bytes(),
                        j * UNIT_BYTES as u64 + 8,
                    )
                    .and_then(|()| {
                        if first_step {
                            side_file.read_exact_at(&mut record, j * SIDE_BYTES as u64)
                        } else {
                            Ok(())
                        }
                    });
                if let Err(e) = settled {
                    io_error = Some(e);
                    return;
                }
                if first_step {
                    let [prediction, score, _] = side_numbers(&record);
                    first_counts.push(k);
                    first_units.push((prediction, j));
                    first_step_floor += usize::from(at_floor(score));
                }
            })
            .map_err(streaming_failure)?;
        if let Some(e) = io_error {
            return Err(Failure::Internal(format!(
                "cannot read or write a temporary file: {e}"
            )));
        }
    }
    let shared_xi = selection.shared_xi().ok_or_else(|| {
        Failure::Internal("the streamed select runs with a shared pruning draw only".into())
    })?;
    let selects = |first_step: bool, k: usize| selection.selects(first_step, k, shared_xi);
    let mut chosen: Vec<(f64, u64)> = first_units
        .iter()
        .zip(&first_counts)
        .filter(|&(_, &k)| selects(true, k))
        .map(|(&unit, _)| unit)
        .collect();
    drop(first_units);
    if chosen.len() != r_star {
        return Err(Failure::Internal(format!(
            "{} units selected where pruning kept {r_star}",
            chosen.len()
        )));
    }
    let (mut side_file, mut units_file) = (side_file, units_file);
    use std::io::Seek;
    timer.mark("pass 3: the ranked units and the selection");
    let q_values = bh_adjusted_pairs(q_values, 1.0);
    timer.mark("pass 3: q-values");
    // The shortlist's order: best predicted first, ties in input order (`shortlist_order`).
    match config.direction {
        crate::conformal::score::Direction::Above => {
            chosen.par_sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)))
        }
        crate::conformal::score::Direction::Below => {
            chosen.par_sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)))
        }
    }
    // rank_of[i] = rank of the i-th selected unit in input order.
    let mut by_input: Vec<(u64, u32)> = chosen
        .iter()
        .enumerate()
        .map(|(r, &(_, j))| (j, (r + 1) as u32))
        .collect();
    drop(chosen);
    by_input.par_sort_unstable_by_key(|&(j, _)| j);
    let ranks: Vec<u32> = by_input.into_iter().map(|(_, r)| r).collect();
    first_counts.sort_unstable();
    let draw = match pruning {
        Pruning::Deterministic => fixed_selection(&vec![true; r_star]),
        _ => homogeneous_draw(&vec![true; first_counts.len()], &first_counts),
    };
    timer.mark("pass 3: the shortlist's order");

    // The summary, as the in-memory path builds it.
    let mut res = resolution::resolution_of_counts(
        total,
        m,
        counts.floor_count,
        Some(first_step_floor),
        wmin,
        q,
    );
    let depends_on_draw = !draw.is_fixed();
    if !depends_on_draw {
        res.stable_levels.push(q);
    }
    res.reading = resolution::reading(&res, m, q, depends_on_draw);
    let selection_probability =
        |first_step: bool, selected: bool, k: usize, d: &DrawSummary| match pruning {
            Pruning::Deterministic => f64::from(u8::from(selected)),
            _ if first_step => d.selection_probability[first_counts.partition_point(|&x| x < k)],
            _ => 0.0,
        };
    let bh_pvalues = settings.pvalues;
    let mut outcome = SelectionOutcome {
        settings: settings.clone(),
        n_labeled: n,
        pool_size: m,
        total_labeled_weight: total,
        scores: Vec::new(),
        weights: Vec::new(),
        p_values: Vec::new(),
        selected: Vec::new(),
        first_step: None,
        conditional_count: None,
        unreachable: Vec::new(),
        selected_count: r_star,
        first_step_count: Some(counts.first_step_count),
        bh_selected_count: counts.bh_selected_count,
        bh_pvalues,
        unreachable_count: counts.unreachable_count,
        pruning_draw: counts.pruning_draw,
        weights_vary: first.weights_vary,
        labeled_ess: labeled.weight.as_deref().map_or(n as f64, kish_ess),
        draw,
        q_values: Vec::new(),
        q_values_by: None,
        resolution: res,
        level_curve: None,
        warnings: Vec::new(),
    };
    outcome.warnings = selection_warnings(&outcome);

    // Pass 4: the temporary files of passes 1 and 2 read back in blocks of rows, each
    // block's rows formatted in parallel pieces and written in order by a second thread.
    status.step("writing candidates.csv");
    // Written in place under the commit's temporary name: renamed, not copied, at the end
    // (the output folder is created now for that; removed again if the run fails).
    folder.create_now()?;
    let candidates_file = StagedFile::create(&config.out, "candidates.csv")
        .map_err(internal("cannot create candidates.csv"))?;
    let shortlist_rows_file =
        tempfile::tempfile_in(&temp_dir).map_err(internal("cannot create a temporary file"))?;
    let shortlist_rows = BufWriter::with_capacity(1 << 20, shortlist_rows_file);
    let header = candidates_header(&first.kept_names);
    // The header through the csv writer; the rows are formatted in pieces (format_rows),
    // larger than this buffer, so that they go to the file without another copy.
    let mut with_header =
        csv::Writer::from_writer(BufWriter::with_capacity(1 << 16, candidates_file));
    with_header
        .write_record(&header)
        .map_err(|e| Failure::Internal(format!("cannot write candidates.csv: {e}")))?;
    let candidates = with_header
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write candidates.csv: {e}")))?;
    let read_error = internal("cannot read a temporary file");
    for file in [&mut side_file, &mut units_file, &mut text_file] {
        file.rewind().map_err(&read_error)?;
    }
    let mut blocks = BlockReader {
        side: BufReader::with_capacity(1 << 20, side_file),
        units: BufReader::with_capacity(1 << 20, units_file),
        text: BufReader::with_capacity(1 << 20, text_file),
        fields_per_row: 1 + kept_width,
        ranks: &ranks,
        selects: &selects,
        selected_seen: 0,
        start: 0,
    };
    let draw = &outcome.draw;
    let shape = RowShape { total, q };
    let probability_of = |first_step: bool, selected: bool, k: usize| {
        selection_probability(first_step, selected, k, draw)
    };
    let (candidates, shortlist_rows, row_at, top) = std::thread::scope(|scope| {
        let (to_writer, formatted) = sync_channel::<(Block, Vec<FormattedRows>)>(1);
        let writer = scope.spawn(move || -> Result<_, Failure> {
            let (mut candidates, mut shortlist_rows) = (candidates, shortlist_rows);
            // (offset, length) of each shortlist row in the rows file, by rank.
            let mut row_at: Vec<(u64, u32)> = vec![(0, 0); r_star];
            let mut top: Vec<String> = vec![String::new(); r_star.min(TOP_SHOWN)];
            let mut written_bytes = 0u64;
            for (block, pieces) in formatted {
                for piece in pieces {
                    candidates
                        .write_all(&piece.candidates)
                        .map_err(internal("cannot write candidates.csv"))?;
                    shortlist_rows
                        .write_all(&piece.shortlist)
                        .map_err(internal("cannot write shortlist.csv"))?;
                    for (rank, r, len) in piece.shortlist_rows {
                        row_at[rank - 1] = (written_bytes, len);
                        written_bytes += u64::from(len);
                        if rank <= top.len() {
                            top[rank - 1] = String::from_utf8_lossy(block.id(r)).into_owned();
                        }
                    }
                }
            }
            Ok((candidates, shortlist_rows, row_at, top))
        });
        let mut done = 0usize;
        let formatting = (|| -> Result<(), Failure> {
            while done < m {
                let block = blocks
                    .next(ROWS_PER_CHUNK.min(m - done))
                    .map_err(&read_error)?;
                done += block.len;
                let pieces = (0..block.len)
                    .step_by(ROWS_PER_PIECE)
                    .collect::<Vec<_>>()
                    .into_par_iter()
                    .map(|from| {
                        let to = (from + ROWS_PER_PIECE).min(block.len);
                        format_rows(&shape, &block, from..to, &q_values, probability_of)
                    })
                    .collect::<Result<Vec<_>, Failure>>()?;
                if to_writer.send((block, pieces)).is_err() {
                    // The writer stopped: its error is reported below.
                    break;
                }
                status.progress("writing candidates.csv", done as f64 / m as f64);
            }
            Ok(())
        })();
        // The writer's loop ends when the channel closes.
        drop(to_writer);
        let written = writer
            .join()
            .map_err(|_| Failure::Internal("the writer of candidates.csv panicked".into()))?;
        // A failure of the writer explains a failed hand-over: it comes first.
        let written = written?;
        formatting?;
        Ok::<_, Failure>(written)
    })?;
    let candidates_file = candidates
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write candidates.csv: {e}")))?;
    let rows_file = shortlist_rows
        .into_inner()
        .map_err(|e| Failure::Internal(format!("cannot write shortlist.csv: {e}")))?;
    let shortlist_file = ordered_shortlist(
        &config.out,
        &rows_file,
        &row_at,
        &shortlist_header(&first.kept_names),
    )
    .map_err(internal("cannot write shortlist.csv"))?;
    timer.mark("pass 4: write candidates and shortlist");

    let inputs = RunInputs {
        labeled_file: config.labeled_path.display().to_string(),
        pool_file: config.pool_path.display().to_string(),
        threshold: match (&config.pool_read.threshold_column, config.threshold) {
            (Some(name), _) => format!("column {name}"),
            (None, Some(c)) => format!("value {c}"),
            (None, None) => String::new(),
        },
        weights: match &config.weights {
            WeightSource::Given { column } => crate::shift::weighting::given_weights_text(column),
            _ => crate::shift::weighting::no_weights_text(),
        },
    };
    let mut summary = select_summary(&outcome, inputs);
    describe_run_columns(
        &mut summary,
        config,
        &labeled.feature_names,
        &first.kept_names,
    );
    let shared: Vec<&str> = first.shared_first.iter().map(String::as_str).collect();
    if let Some(w) = shared_ids_warning_of(&shared, first.shared_count) {
        summary.add_warning(w);
    }
    summary.dropped_missing_outcome_count = labeled.dropped_missing_outcome;
    summary.censored_outcome_count = labeled.censored_outcomes;
    summary.memory = Some(crate::report::MemoryUse {
        mode: "streamed",
        pool_reads: Some(pool_reads),
        score_passes: Some(counts.passes),
        ranked_units: Some(counts.ranked_units),
        ranked_units_spilled: Some(counts.spilled),
        ..crate::report::MemoryUse::in_memory(budget, estimate)
    });
    let mut files = OutputSet::new();
    files.add_staged("candidates.csv", candidates_file);
    files.add_staged("shortlist.csv", shortlist_file);
    let json = serde_json::to_vec_pretty(&summary)
        .map_err(|e| Failure::Internal(format!("cannot serialize the summary: {e}")))?;
    files.add("summary.json", json);
    status.step("writing the outputs");
    commit_outputs(folder, files, "select")?;
    timer.mark("write outputs");
    drop(status);
    if !config.quiet {
        let mut text = text_summary_of_top(&summary, &top);
        text.push_str(&format!(
            "streamed selection ({why}): the pool was read {} and the selection went over \
             its scores {}; {} needed {} exact rank{}\n",
            times(pool_reads),
            times(counts.passes),
            match counts.ranked_units {
                1 => "1 unit".to_string(),
                k => format!("{k} units"),
            },
            if counts.ranked_units == 1 {
                "its"
            } else {
                "their"
            },
            if counts.spilled {
                ", held in a temporary file"
            } else {
                ""
            }
        ));
        text.push_str(&format!(
            "wrote {} (the {} selected units, best first), {} and {}\n",
            config.out.join("shortlist.csv").display(),
            summary.selected_count,
            config.out.join("candidates.csv").display(),
            config.out.join("summary.json").display()
        ));
        print_stdout(&text);
    }
    Ok(())
}

/// The scores of a chunk's rows.
fn chunk_scores(
    config: &SelectConfig,
    settings: &crate::selection::pipeline::SelectSettings,
    chunk: &PoolChunk,
    has_threshold: bool,
) -> Vec<f64> {
    let thresholds = match (chunk.threshold(has_threshold), config.threshold) {
        (Some(column), _) => Thresholds::PerUnit(column),
        (None, Some(c)) => Thresholds::Constant(c),
        (None, None) => unreachable!("clap requires --threshold or --threshold-column"),
    };
    pool_scores_toward(
        settings.score,
        settings.direction,
        chunk.prediction(),
        thresholds,
    )
}

/// "once", "twice", "3 times".
fn times(n: usize) -> String {
    match n {
        1 => "once".to_string(),
        2 => "twice".to_string(),
        n => format!("{n} times"),
    }
}

/// What read 1 needs from a chunk of the pool, computed off the main thread.
struct PreparedChunk {
    scores: Vec<f64>,
    /// The chunk's weights (empty without a weight column).
    weights: Vec<f64>,
    /// The side-file records ([`SIDE_BYTES`] per row).
    side: Vec<u8>,
    /// The text-file cells: id and kept cells per row, each length-prefixed.
    text: Vec<u8>,
    /// [`pool_id_hash`] of each id.
    hashes: Vec<u64>,
    /// [`PoolBuckets::of`] the scores.
    buckets: Vec<u32>,
    smallest_weight: f64,
    largest_weight: f64,
    weights_vary: bool,
    /// Ids also in the labeled file, in input order.
    shared: Vec<String>,
    /// A cell too long for the text file.
    too_long: bool,
}

/// How read 1 turns a parsed chunk into a [`PreparedChunk`] (the same for every chunk).
struct Prepare<'a> {
    config: &'a SelectConfig,
    settings: &'a crate::selection::pipeline::SelectSettings,
    has_threshold: bool,
    has_weight: bool,
    kept_width: usize,
    labeled_ids: &'a HashSet<&'a str>,
    labeled_hashes: &'a HashSet<u64, BuildHasherDefault<Prehashed>>,
    first_weight: Option<f64>,
    /// The selection's buckets of the scores (its histogram is built during read 1).
    buckets: &'a PoolBuckets<'a>,
}

impl Prepare<'_> {
    fn chunk(&self, chunk: PoolChunk) -> PreparedChunk {
        let scores = chunk_scores(self.config, self.settings, &chunk, self.has_threshold);
        let weights = chunk.weight(self.has_weight);
        let rows = chunk.len();
        let mut side = Vec::with_capacity(rows * SIDE_BYTES);
        let mut text = Vec::with_capacity(rows * 16 * (1 + self.kept_width));
        let mut hashes = Vec::with_capacity(rows);
        let mut shared = Vec::new();
        let (mut smallest_weight, mut largest_weight) = (f64::INFINITY, f64::NEG_INFINITY);
        let mut weights_vary = false;
        let mut too_long = false;
        // A weight differing from the first labeled one (or the chunk's first).
        let reference = self.first_weight.or(weights.map(|w| w[0]));
        for (r, id) in chunk.ids().iter().enumerate() {
            let w = weights.map_or(1.0, |w| w[r]);
            side.extend_from_slice(&chunk.prediction()[r].to_le_bytes());
            side.extend_from_slice(&scores[r].to_le_bytes());
            side.extend_from_slice(&w.to_le_bytes());
            let kept = chunk
                .kept_row(r, self.kept_width)
                .iter()
                .map(String::as_str);
            let cells = std::iter::once(id).chain(kept);
            for cell in cells {
                if push_cell(&mut text, cell.as_bytes()).is_err() {
                    too_long = true;
                }
            }
            let hash = pool_id_hash(id);
            hashes.push(hash);
            smallest_weight = smallest_weight.min(w);
            largest_weight = largest_weight.max(w);
            if weights.is_some() && Some(w) != reference {
                weights_vary = true;
            }
            if self.labeled_hashes.contains(&hash) && self.labeled_ids.contains(id) {
                shared.push(id.to_owned());
            }
        }
        PreparedChunk {
            buckets: self.buckets.of(&scores),
            weights: weights.map_or_else(Vec::new, <[f64]>::to_vec),
            scores,
            side,
            text,
            hashes,
            smallest_weight,
            largest_weight,
            weights_vary,
            shared,
            too_long,
        }
    }
}

/// The pool's chunks read and prepared on other threads, ahead of their use, so that
/// parsing the CSV and preparing the temporary files' records overlap the writing. A plain
/// file without quotes is parsed in parallel blocks ([`PoolChunks::in_parallel`]) and each
/// round of blocks prepared in parallel; other input is parsed and prepared by one thread.
struct ReadAhead<'scope> {
    chunks: Receiver<Result<(PreparedChunk, f64), InputError>>,
    reader: Option<std::thread::ScopedJoinHandle<'scope, ()>>,
}

impl<'scope> ReadAhead<'scope> {
    fn start<'env>(
        scope: &'scope std::thread::Scope<'scope, 'env>,
        chunks: PoolChunks,
        pool_len: u64,
        prepare: &'scope Prepare<'env>,
    ) -> Self {
        let (sender, receiver) = sync_channel(8);
        let reader = scope.spawn(move || match chunks.in_parallel() {
            Ok(mut blocks) => loop {
                match blocks.next_chunks() {
                    Ok(round) if round.is_empty() => return,
                    Ok(round) => {
                        let fraction = blocks.fraction_read(pool_len);
                        let prepared: Vec<PreparedChunk> = round
                            .into_par_iter()
                            .map(|chunk| prepare.chunk(chunk))
                            .collect();
                        for chunk in prepared {
                            if sender.send(Ok((chunk, fraction))).is_err() {
                                return;
                            }
                        }
                    }
                    Err(e) => {
                        let _ = sender.send(Err(e));
                        return;
                    }
                }
            },
            Err(mut chunks) => loop {
                let mut chunk = chunks.chunk();
                let next = match chunks.next_chunk(&mut chunk, ROWS_PER_CHUNK) {
                    Ok(true) => Ok((prepare.chunk(chunk), chunks.fraction_read(pool_len))),
                    Ok(false) => return,
                    Err(e) => Err(e),
                };
                let last = next.is_err();
                if sender.send(next).is_err() || last {
                    return;
                }
            },
        });
        ReadAhead {
            chunks: receiver,
            reader: Some(reader),
        }
    }

    /// The next chunk and the fraction of the file read so far; `None` at the end.
    fn next(&mut self) -> Result<Option<(PreparedChunk, f64)>, Failure> {
        match self.chunks.recv() {
            Ok(Ok(next)) => Ok(Some(next)),
            Ok(Err(e)) => Err(e.into()),
            // The reader has stopped: at the end of the file, or by a panic (not an end).
            Err(_) => match self.reader.take().map(std::thread::ScopedJoinHandle::join) {
                Some(Err(_)) => Err(Failure::Internal(
                    "the thread reading the pool stopped unexpectedly".to_string(),
                )),
                _ => Ok(None),
            },
        }
    }
}

/// Bytes per row in the pass-1 side file: prediction, score and weight (f64, little
/// endian).
const SIDE_BYTES: usize = 24;

/// The prediction, score and weight of a side-file record.
fn side_numbers(record: &[u8]) -> [f64; 3] {
    let at = |i: usize| f64::from_le_bytes(record[8 * i..8 * i + 8].try_into().expect("8 bytes"));
    [at(0), at(1), at(2)]
}

/// Append one cell to the pass-1 text file: its length (u32, little endian), its bytes.
fn push_cell(out: &mut Vec<u8>, cell: &[u8]) -> Result<(), CellTooLong> {
    let len = u32::try_from(cell.len()).map_err(|_| CellTooLong)?;
    out.extend_from_slice(&len.to_le_bytes());
    out.extend_from_slice(cell);
    Ok(())
}

/// A cell of 4 GiB or more, which the text file's length prefix cannot hold.
#[derive(Clone, Copy, Debug)]
struct CellTooLong;

/// Bytes of a [`UnitRecord`].
const UNIT_BYTES: usize = 16;

/// A unit's decide-pass result as 16 bytes: its p-value (f64) and a u64 holding `K_j` with
/// the first-step flag in bit 63 (whether it is selected follows from these and `r*`).
struct UnitRecord([u8; UNIT_BYTES]);

const FIRST_STEP_BIT: u64 = 1 << 63;

impl UnitRecord {
    fn of(p: f64, k: usize, first_step: bool) -> Self {
        let mut bytes = [0u8; UNIT_BYTES];
        bytes[..8].copy_from_slice(&p.to_le_bytes());
        bytes[8..].copy_from_slice(&Self::packed(k, first_step).to_le_bytes());
        UnitRecord(bytes)
    }

    /// The record's second half: `K_j` and the first-step flag.
    fn packed(k: usize, first_step: bool) -> u64 {
        let k = k as u64;
        assert!(k < FIRST_STEP_BIT, "K_j below 2^63");
        k | if first_step { FIRST_STEP_BIT } else { 0 }
    }

    /// (p-value, first step, `K_j`) of a record's bytes.
    fn read(bytes: &[u8]) -> (f64, bool, usize) {
        let p = f64::from_le_bytes(bytes[..8].try_into().expect("8 bytes"));
        let packed = u64::from_le_bytes(bytes[8..16].try_into().expect("8 bytes"));
        (
            p,
            packed & FIRST_STEP_BIT != 0,
            (packed & !FIRST_STEP_BIT) as usize,
        )
    }
}

/// Consecutive rows read back from the temporary files for pass 4.
struct Block {
    /// Index of the block's first row in the pool.
    start: usize,
    len: usize,
    /// `SIDE_BYTES` per row.
    side: Vec<u8>,
    /// `UNIT_BYTES` per row ([`UnitRecord`]).
    units: Vec<u8>,
    /// The rows' ids and kept cells, one after the other in one buffer ...
    text: Vec<u8>,
    /// ... field `f` of the block being `text[ends[f]..ends[f + 1]]` (`fields_per_row`
    /// fields per row, the id first).
    ends: Vec<usize>,
    fields_per_row: usize,
    /// The shortlist rank of each row (selected rows only).
    ranks: Vec<Option<usize>>,
}

impl Block {
    fn field(&self, f: usize) -> &[u8] {
        &self.text[self.ends[f]..self.ends[f + 1]]
    }

    fn id(&self, r: usize) -> &[u8] {
        self.field(r * self.fields_per_row)
    }
}

/// The readers of pass 4 over the temporary files, in step.
struct BlockReader<'r> {
    side: BufReader<File>,
    units: BufReader<File>,
    text: BufReader<File>,
    fields_per_row: usize,
    /// Rank of each selected unit in input order.
    ranks: &'r [u32],
    /// The pruning rule: selected from the first step and `K_j`.
    selects: &'r dyn Fn(bool, usize) -> bool,
    selected_seen: usize,
    start: usize,
}

impl BlockReader<'_> {
    /// The next `len` rows.
    fn next(&mut self, len: usize) -> io::Result<Block> {
        let mut side = vec![0u8; len * SIDE_BYTES];
        self.side.read_exact(&mut side)?;
        let mut units = vec![0u8; len * UNIT_BYTES];
        self.units.read_exact(&mut units)?;
        let fields = len * self.fields_per_row;
        let mut ends = Vec::with_capacity(fields + 1);
        ends.push(0);
        let mut text = Vec::with_capacity(fields * 12);
        let mut prefix = [0u8; 4];
        for _ in 0..fields {
            self.text.read_exact(&mut prefix)?;
            let cell = u32::from_le_bytes(prefix) as usize;
            let at = text.len();
            text.resize(at + cell, 0);
            self.text.read_exact(&mut text[at..])?;
            ends.push(text.len());
        }
        let ranks = units
            .chunks_exact(UNIT_BYTES)
            .map(|record| {
                let (_, first_step, k) = UnitRecord::read(record);
                (self.selects)(first_step, k).then(|| {
                    self.selected_seen += 1;
                    self.ranks[self.selected_seen - 1] as usize
                })
            })
            .collect();
        let block = Block {
            start: self.start,
            len,
            side,
            units,
            text,
            ends,
            fields_per_row: self.fields_per_row,
            ranks,
        };
        self.start += len;
        Ok(block)
    }
}

/// Rows formatted together in pass 4 (a piece of a block).
const ROWS_PER_PIECE: usize = 1 << 13;

/// What every candidates.csv row of a run shares.
struct RowShape {
    total: f64,
    q: f64,
}

/// One piece's formatted rows: candidates.csv bytes, shortlist rows' bytes, and for each
/// shortlist row its rank, its row in the block and its length.
struct FormattedRows {
    candidates: Vec<u8>,
    shortlist: Vec<u8>,
    shortlist_rows: Vec<(usize, usize, u32)>,
}

/// Format the rows `rows` of a block (`q_values` is the whole pool's), as the in-memory
/// path's candidates.csv and shortlist.csv rows.
fn format_rows(
    shape: &RowShape,
    block: &Block,
    rows: std::ops::Range<usize>,
    q_values: &[f64],
    probability_of: impl Fn(bool, bool, usize) -> f64,
) -> Result<FormattedRows, Failure> {
    let (total, q) = (shape.total, shape.q);
    let mut candidates = Vec::with_capacity(rows.len() * 112);
    let mut shortlist = Vec::new();
    let mut shortlist_rows = Vec::new();
    let mut cells = RowCells::new();
    let mut kept: Vec<&[u8]> = Vec::with_capacity(block.fields_per_row - 1);
    for r in rows {
        let [prediction, score, w] = side_numbers(&block.side[r * SIDE_BYTES..]);
        let (p, first_step, k) = UnitRecord::read(&block.units[r * UNIT_BYTES..]);
        let selected = block.ranks[r].is_some();
        let q_value = q_values[block.start + r];
        let reason = (!within_level(w, total + w, q)).then(|| unreachable_text(w, total, q));
        let probability = probability_of(first_step, selected, k);
        let id = std::str::from_utf8(block.id(r)).map_err(|_| {
            Failure::Internal("a temporary file holds an id that is not UTF-8".into())
        })?;
        kept.clear();
        let first_field = r * block.fields_per_row;
        kept.extend((1..block.fields_per_row).map(|c| block.field(first_field + c)));
        let row = CandidateRow {
            id,
            score,
            weight: w,
            p_value: p,
            selected,
            conditional: Some((first_step, k)),
            unreachable_reason: reason.as_deref(),
            selection_probability: probability,
            q_value,
            q_value_by: None,
            unreliable: false,
            prediction,
            shortlist_rank: block.ranks[r],
            kept: &kept,
        };
        cells.candidate_line(&row, &mut candidates);
        if let Some(rank) = block.ranks[r] {
            let row = ShortlistRow {
                rank,
                id,
                prediction,
                p_value: p,
                q_value,
                selection_probability: probability,
                weight: w,
                kept: &kept,
            };
            let before = shortlist.len();
            cells.shortlist_line(&row, &mut shortlist);
            shortlist_rows.push((rank, r, (shortlist.len() - before) as u32));
        }
    }
    Ok(FormattedRows {
        candidates,
        shortlist,
        shortlist_rows,
    })
}

/// shortlist.csv: the header, then the rows of `rows` in rank order (`row_at[rank - 1]` is
/// a row's offset and length).
fn ordered_shortlist(
    dir: &Path,
    rows: &File,
    row_at: &[(u64, u32)],
    header: &[String],
) -> io::Result<StagedFile> {
    use std::os::unix::fs::FileExt;
    let file = StagedFile::create(dir, "shortlist.csv")?;
    let mut out = csv::Writer::from_writer(BufWriter::with_capacity(1 << 20, file));
    out.write_record(header)?;
    let mut out = out.into_inner().map_err(|e| e.into_error())?;
    let mut buffer = Vec::new();
    for &(offset, len) in row_at {
        buffer.resize(len as usize, 0);
        rows.read_exact_at(&mut buffer, offset)?;
        out.write_all(&buffer)?;
    }
    out.into_inner().map_err(|e| e.into_error())
}

#[cfg(test)]
mod tests {
    use super::parse_budget;

    #[test]
    fn budgets_in_binary_units_and_plain_bytes() {
        // Common practice: K, M, G as powers of 1024 for memory sizes, as in `free -h`.
        assert_eq!(parse_budget("1GiB"), Ok(1 << 30));
        assert_eq!(parse_budget("1G"), Ok(1 << 30));
        assert_eq!(parse_budget("512MiB"), Ok(512 << 20));
        assert_eq!(parse_budget("512 mb"), Ok(512 << 20));
        assert_eq!(parse_budget("1.5GiB"), Ok(3 << 29));
        assert_eq!(parse_budget("2048"), Ok(2048));
        assert_eq!(parse_budget("1KiB"), Ok(1024));
        for bad in ["", "lots", "-1G", "0", "1XB", "GiB", "1e3G", "nan"] {
            let e = parse_budget(bad).unwrap_err();
            assert!(
                e.starts_with(&format!("--memory-budget {bad}")),
                "{bad}: {e}"
            );
        }
    }
}
