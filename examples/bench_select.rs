//! Benchmark of the selection core (issue: selection engine).
//!
//! Run: `cargo run --release --example bench_select` (add `-- --quick` for a smaller run,
//! `-- --ci` for a small run that checks the streamed selection against the in-memory one).
//! Options: `--m N` pool size (default 10^6), `--keep DIR` writes the CSV files there and
//! keeps them (for tests/scripts/time_pyarrow_read.py), `--pyarrow PYTHON` times pyarrow's
//! CSV reader (2 threads) on the same pool file with that interpreter, `--no-naive`,
//! `--no-command`; `--streaming-only` runs only the streamed selection on a generated pool
//! (nothing stored; the pool is regenerated on each pass) and prints the process's peak
//! memory (VmHWM), for pools too large to hold. Pin to one core with `taskset -c 0`.
//!
//! Prints, for seeded synthetic data (n = 2*10^4 labeled, m = 10^6 pool, lognormal weights,
//! scores on a grid so that ties occur):
//! * core timings: conservative and randomized p-values, BH, the fast conditional counts,
//!   the whole conditional calibration, and their ratios to BH;
//! * fast vs naive (the O(m^2 log m) oracle of tests/common/oracle.rs) at m = 10^4;
//! * whole-command wall time of `weighbridge select` with `--procedure bh` and with
//!   `--procedure conditional` on the same CSV files (if target/release/weighbridge exists),
//!   and their ratio.
//!
//! * phase breakdown of the in-memory library pipeline (`run_selection`: p-values, BH,
//!   q-values, K_j, pruning, draw, resolution), and the library's conditional/bh ratio;
//! * the streamed selection (`selection::streaming`) on the same pool: time per pass, and a
//!   check that K_j, first step, selection and the BH count equal the in-memory ones;
//! * for the command runs, peak memory from `/usr/bin/time -v` when it exists and the
//!   command's own phase timings (`WEIGHBRIDGE_TIMINGS`).
//!
//! Timings are medians of a few repeats on whatever machine runs this; report ratios.

#[path = "../tests/common/oracle.rs"]
mod oracle;

use std::io::Write;
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use rand::Rng;
use rand::SeedableRng;
use rand_distr::StandardNormal;
use weighbridge::conformal::pvalue::PValueKind;
use weighbridge::conformal::score::Thresholds;
use weighbridge::fdr::{benjamini_hochberg, conditional_calibration, conditional_counts, Pruning};
use weighbridge::pvalue::{conservative_pvalues, randomized_pvalues, CalibrationSet};
use weighbridge::random::{stream, Stream};
use weighbridge::selection::bh::bh_adjusted;
use weighbridge::selection::conditional::select_with_counts;
use weighbridge::selection::draw::homogeneous_draw;
use weighbridge::selection::pipeline::{
    run_selection, LabeledInput, PoolInput, Procedure, SelectOptions,
};
use weighbridge::selection::resolution::resolution;
use weighbridge::selection::streaming::{
    run_streaming, ChunkVisitor, PoolSource, SlicePool, StreamingError, StreamingOptions, CHUNK,
};

struct Data {
    labeled_scores: Vec<f64>,
    labeled_weights: Vec<f64>,
    labeled_outcome: Vec<f64>,
    labeled_pred: Vec<f64>,
    pool_scores: Vec<f64>,
    pool_weights: Vec<f64>,
    pool_pred: Vec<f64>,
}

const THRESHOLD: f64 = 0.0;

fn make_data(n: usize, m: usize, seed: u64) -> Data {
    let mut rng = stream(seed, Stream::Simulation);
    let mut draw = |count: usize, shift: f64, with_outcome: bool| {
        let mut pred = Vec::with_capacity(count);
        let mut outcome = Vec::with_capacity(count);
        let mut weight = Vec::with_capacity(count);
        for _ in 0..count {
            let x: f64 = rng.sample::<f64, _>(StandardNormal) + shift;
            let mu = (x * 1000.0).round() / 1000.0; // grid: ties between units
            let y = x + 0.7 * rng.sample::<f64, _>(StandardNormal) - 0.8;
            pred.push(mu);
            if with_outcome {
                outcome.push((y * 1000.0).round() / 1000.0);
            }
            weight.push((0.8 * x).exp());
        }
        (pred, outcome, weight)
    };
    let (labeled_pred, labeled_outcome, labeled_weights) = draw(n, -0.5, true);
    let (pool_pred, _, pool_weights) = draw(m, 0.0, false);
    let labeled_scores = labeled_outcome
        .iter()
        .zip(&labeled_pred)
        .map(|(&y, &mu)| {
            if y > THRESHOLD {
                f64::INFINITY
            } else {
                THRESHOLD - mu
            }
        })
        .collect();
    let pool_scores = pool_pred.iter().map(|&mu| THRESHOLD - mu).collect();
    Data {
        labeled_scores,
        labeled_weights,
        labeled_outcome,
        labeled_pred,
        pool_scores,
        pool_weights,
        pool_pred,
    }
}

fn median_time<T>(repeats: usize, mut f: impl FnMut() -> T) -> (Duration, T) {
    let mut times = Vec::with_capacity(repeats);
    let mut last = None;
    for _ in 0..repeats {
        let start = Instant::now();
        let value = f();
        times.push(start.elapsed());
        last = Some(value);
    }
    times.sort();
    (times[times.len() / 2], last.expect("at least one repeat"))
}

fn secs(d: Duration) -> f64 {
    d.as_secs_f64()
}

fn write_csv(path: &Path, ids: &str, pred: &[f64], outcome: Option<&[f64]>, w: &[f64]) {
    let file = std::fs::File::create(path).expect("create csv");
    let mut out = std::io::BufWriter::new(file);
    if outcome.is_some() {
        writeln!(out, "id,y,pred,w").unwrap();
    } else {
        writeln!(out, "id,pred,w").unwrap();
    }
    for i in 0..pred.len() {
        match outcome {
            Some(y) => writeln!(out, "{ids}{i},{},{},{}", y[i], pred[i], w[i]).unwrap(),
            None => writeln!(out, "{ids}{i},{},{}", pred[i], w[i]).unwrap(),
        }
    }
}

/// The value after flag `name`, if given.
fn arg_value(name: &str) -> Option<String> {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1).cloned())
}

fn has_flag(name: &str) -> bool {
    std::env::args().any(|a| a == name)
}

/// Peak resident memory of this process so far (VmHWM, bytes), if /proc says.
fn peak_memory() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}

fn mib(bytes: u64) -> f64 {
    bytes as f64 / (1024.0 * 1024.0)
}

/// A pool source that records how long each pass took.
struct TimedPool<S> {
    inner: S,
    passes: Vec<Duration>,
}

impl<S: PoolSource> PoolSource for TimedPool<S> {
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError> {
        let start = Instant::now();
        let result = self.inner.pass(visit);
        self.passes.push(start.elapsed());
        result
    }
}

/// A pool generated chunk by chunk from a seed (the same units on every pass; nothing
/// stored): pool scores and weights shaped like `make_data`'s.
struct GeneratedPool {
    m: usize,
    seed: u64,
}

impl PoolSource for GeneratedPool {
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError> {
        let mut scores = Vec::with_capacity(CHUNK);
        let mut weights = Vec::with_capacity(CHUNK);
        let mut done = 0;
        let mut chunk = 0u64;
        while done < self.m {
            let take = (self.m - done).min(CHUNK);
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(self.seed ^ (chunk << 20));
            scores.clear();
            weights.clear();
            for _ in 0..take {
                let x: f64 = rng.sample(StandardNormal);
                scores.push(THRESHOLD - (x * 1000.0).round() / 1000.0);
                weights.push((0.8 * x).exp());
            }
            visit(&scores, Some(&weights));
            done += take;
            chunk += 1;
        }
        Ok(())
    }
}

fn streaming_options(q: f64) -> StreamingOptions {
    StreamingOptions {
        q,
        pruning: Pruning::Homogeneous,
        seed: 7,
        bh_pvalues: PValueKind::Conservative,
        memory_budget: 1 << 30,
    }
}

/// `--streaming-only`: the streamed selection on a generated pool, with peak memory.
fn streaming_only(n: usize, m: usize, q: f64) {
    let labeled = make_data(n, 1, 1);
    let cal = CalibrationSet::new(&labeled.labeled_scores, Some(&labeled.labeled_weights)).unwrap();
    let before = peak_memory();
    let mut pool = TimedPool {
        inner: GeneratedPool { m, seed: 3 },
        passes: vec![],
    };
    let start = Instant::now();
    let mut selection = run_streaming(&cal, &mut pool, streaming_options(q)).unwrap();
    let mut selected = 0usize;
    selection
        .for_each_unit(&mut pool, |_, unit| selected += usize::from(unit.selected))
        .unwrap();
    let total = start.elapsed();
    assert_eq!(selected, selection.counts.selected_count);
    println!(
        "streamed selection on a generated pool, n = {n}, m = {m}, q = {q}, {} threads:",
        rayon::current_num_threads()
    );
    println!("  {:?}", selection.counts);
    for (i, t) in pool.passes.iter().enumerate() {
        println!("  pass {}                        {:8.3} s", i + 1, secs(*t));
    }
    println!(
        "  total (generating the pool on every pass) {:8.3} s",
        secs(total)
    );
    match (before, peak_memory()) {
        (Some(b), Some(a)) => println!(
            "  peak memory (VmHWM): {:.1} MiB before the selection, {:.1} MiB after ({:.1} bytes per pool unit)",
            mib(b),
            mib(a),
            a as f64 / m as f64
        ),
        _ => println!("  peak memory: not available (/proc/self/status)"),
    }
}

fn main() {
    let quick = has_flag("--quick");
    let ci = has_flag("--ci");
    let (n, default_m, naive_m, repeats) = if ci {
        (2_000, 20_000, 500, 1)
    } else if quick {
        (2_000, 100_000, 2_000, 3)
    } else {
        (20_000, 1_000_000, 10_000, 5)
    };
    let m: usize = arg_value("--m").map_or(default_m, |v| v.parse().expect("--m N"));
    let q = 0.1;
    if has_flag("--streaming-only") {
        streaming_only(n, m, q);
        return;
    }
    println!(
        "bench_select: n = {n} labeled, m = {m} pool, q = {q}, {} threads",
        rayon::current_num_threads()
    );
    let data = make_data(n, m, 1);
    let cal = CalibrationSet::new(&data.labeled_scores, Some(&data.labeled_weights)).unwrap();

    let (t_cons, p) = median_time(repeats, || {
        conservative_pvalues(&cal, &data.pool_scores, Some(&data.pool_weights)).unwrap()
    });
    let (t_rand, _) = median_time(repeats, || {
        randomized_pvalues(&cal, &data.pool_scores, Some(&data.pool_weights), 7).unwrap()
    });
    let values = p.values();
    let (t_bh, bh) = median_time(repeats, || benjamini_hochberg(&values, q).unwrap());
    let (t_counts, _) = median_time(repeats, || {
        conditional_counts(&cal, &data.pool_scores, Some(&data.pool_weights), q).unwrap()
    });
    let (t_cc, cc) = median_time(repeats, || {
        conditional_calibration(
            &cal,
            &data.pool_scores,
            Some(&data.pool_weights),
            &p,
            q,
            Pruning::Homogeneous,
            7,
        )
        .unwrap()
    });
    println!("core timings (median of {repeats}):");
    println!("  conservative p-values        {:8.3} s", secs(t_cons));
    println!("  randomized p-values          {:8.3} s", secs(t_rand));
    println!(
        "  BH                           {:8.3} s   selected {}",
        secs(t_bh),
        bh.count
    );
    println!("  conditional counts K_j       {:8.3} s", secs(t_counts));
    println!(
        "  conditional calibration      {:8.3} s   first step {}, selected {}",
        secs(t_cc),
        cc.first_step_count,
        cc.selected_count
    );
    println!("ratios:");
    println!(
        "  (p-values + conditional) / (p-values + BH)   {:6.2}",
        secs(t_cons + t_cc) / secs(t_cons + t_bh)
    );
    println!(
        "  conditional / BH                             {:6.2}",
        secs(t_cc) / secs(t_bh)
    );

    phase_breakdown(&data, &cal, q, repeats.min(3));
    streamed_vs_in_memory(&cal, &data, q, &cc, bh.count);

    if has_flag("--no-naive") {
        command_timings(&data, m, repeats);
        return;
    }
    // Fast vs naive at naive_m.
    let small = make_data(n.min(2_000), naive_m, 2);
    let small_cal =
        CalibrationSet::new(&small.labeled_scores, Some(&small.labeled_weights)).unwrap();
    let (t_fast, fast) = median_time(repeats, || {
        conditional_counts(&small_cal, &small.pool_scores, Some(&small.pool_weights), q).unwrap()
    });
    let naive_labeled = oracle::NaiveLabeled::new(&small.labeled_scores, &small.labeled_weights);
    let (t_naive, naive) = median_time(1, || {
        oracle::naive_conditional_counts(&naive_labeled, &small.pool_scores, &small.pool_weights, q)
    });
    assert_eq!(fast, naive, "fast and naive K_j differ");
    println!("fast vs naive K_j at m = {naive_m} (identical results):");
    println!("  fast   {:10.4} s", secs(t_fast));
    println!("  naive  {:10.4} s", secs(t_naive));
    println!("  naive / fast  {:8.0}x", secs(t_naive) / secs(t_fast));
    command_timings(&data, m, repeats);
}

/// The in-memory library pipeline, phase by phase (the phases `run_selection` runs for a
/// conditional run at this size: no level curve), and `run_selection` itself for both
/// procedures.
fn phase_breakdown(data: &Data, cal: &CalibrationSet, q: f64, repeats: usize) {
    let w = Some(&data.pool_weights[..]);
    let mut phases: Vec<(&str, Duration)> = vec![];
    let start = Instant::now();
    let p = conservative_pvalues(cal, &data.pool_scores, w).unwrap();
    let values = p.values();
    phases.push(("conservative p-values", start.elapsed()));
    let start = Instant::now();
    let bh = benjamini_hochberg(&values, q).unwrap();
    phases.push(("BH count", start.elapsed()));
    let start = Instant::now();
    let counts = conditional_counts(cal, &data.pool_scores, w, q).unwrap();
    phases.push(("K_j", start.elapsed()));
    let start = Instant::now();
    let cc = select_with_counts(counts, &p, q, Pruning::Homogeneous, 7);
    phases.push(("first step + pruning", start.elapsed()));
    let start = Instant::now();
    let draw = homogeneous_draw(&cc.first_step, &cc.conditional_count);
    phases.push(("draw summary", start.elapsed()));
    let start = Instant::now();
    let res = resolution(cal, &data.pool_scores, w, Some(&cc.first_step), q);
    phases.push(("resolution", start.elapsed()));
    let start = Instant::now();
    let qv = bh_adjusted(&values, 1.0).unwrap();
    phases.push(("q-values (sort)", start.elapsed()));
    println!("in-memory pipeline phases (one run; BH {}, selected {}, expected {:.1}, floor {}, q-values {}):",
        bh.count, cc.selected_count, draw.expected_selected_count, res.floor_count, qv.len());
    let total: Duration = phases.iter().map(|(_, t)| *t).sum();
    for (name, t) in &phases {
        println!(
            "  {name:<28} {:8.3} s  {:5.1}%",
            secs(*t),
            100.0 * secs(*t) / secs(total)
        );
    }
    let run = |procedure| {
        let options = SelectOptions {
            fdr: q,
            procedure,
            pvalues: Some(PValueKind::Conservative),
            level_curve: Some(false),
            ..SelectOptions::default()
        };
        run_selection(
            &options,
            LabeledInput {
                outcome: &data.labeled_outcome,
                prediction: &data.labeled_pred,
                thresholds: Thresholds::Constant(THRESHOLD),
                weights: Some(&data.labeled_weights),
            },
            PoolInput {
                prediction: &data.pool_pred,
                thresholds: Thresholds::Constant(THRESHOLD),
                weights: Some(&data.pool_weights),
            },
        )
        .unwrap()
    };
    let (t_bh, _) = median_time(repeats, || run(Procedure::Bh));
    let (t_cc, _) = median_time(repeats, || run(Procedure::Conditional));
    println!("library run_selection (median of {repeats}): bh {:.3} s, conditional {:.3} s, conditional / bh {:.2}",
        secs(t_bh), secs(t_cc), secs(t_cc) / secs(t_bh));
}

/// The streamed selection on the in-memory pool: time per pass, and equality with the
/// in-memory results.
fn streamed_vs_in_memory(
    cal: &CalibrationSet,
    data: &Data,
    q: f64,
    cc: &weighbridge::selection::conditional::ConditionalSelection,
    bh_count: usize,
) {
    let mut pool = TimedPool {
        inner: SlicePool {
            scores: &data.pool_scores,
            weights: Some(&data.pool_weights),
        },
        passes: vec![],
    };
    let start = Instant::now();
    let mut streamed = run_streaming(cal, &mut pool, streaming_options(q)).unwrap();
    let mut same = true;
    streamed
        .for_each_unit(&mut pool, |j, unit| {
            let j = j as usize;
            same &= unit.conditional_count == cc.conditional_count[j]
                && unit.first_step == cc.first_step[j]
                && unit.selected == cc.selected[j];
        })
        .unwrap();
    let total = start.elapsed();
    assert!(same, "streamed and in-memory selections differ");
    assert_eq!(
        streamed.counts.bh_selected_count, bh_count,
        "BH counts differ"
    );
    assert_eq!(streamed.counts.selected_count, cc.selected_count);
    println!(
        "streamed selection on the same pool (identical K_j, first step, selection, BH count):"
    );
    println!("  {:?}", streamed.counts);
    for (i, t) in pool.passes.iter().enumerate() {
        println!("  pass {}                        {:8.3} s", i + 1, secs(*t));
    }
    println!("  total                         {:8.3} s", secs(total));
}

/// Maximum resident set size from `/usr/bin/time -v` output, in bytes.
fn max_rss(stderr: &str) -> Option<u64> {
    let line = stderr
        .lines()
        .find(|l| l.contains("Maximum resident set size"))?;
    let kb: u64 = line.rsplit(':').next()?.trim().parse().ok()?;
    Some(kb * 1024)
}

/// Whole command, same process start-up, same files.
fn command_timings(data: &Data, m: usize, repeats: usize) {
    if has_flag("--no-command") {
        return;
    }
    let binary = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/release/weighbridge");
    if !binary.exists() {
        println!("command timings: not run (build target/release/weighbridge first)");
        return;
    }
    let temp = tempfile::tempdir().expect("temp dir");
    let dir_path = arg_value("--keep").map_or_else(|| temp.path().to_path_buf(), Into::into);
    std::fs::create_dir_all(&dir_path).expect("--keep DIR");
    let labeled = dir_path.join("labeled.csv");
    let pool = dir_path.join("pool.csv");
    write_csv(
        &labeled,
        "L",
        &data.labeled_pred,
        Some(&data.labeled_outcome),
        &data.labeled_weights,
    );
    write_csv(&pool, "P", &data.pool_pred, None, &data.pool_weights);
    let time_v = Path::new("/usr/bin/time").exists();
    let peaks = std::cell::RefCell::new(Vec::<(String, u64)>::new());
    let phase_lines = std::cell::RefCell::new(Vec::<String>::new());
    let run = |procedure: &str| {
        let out = temp.path().join(format!("out-{procedure}"));
        let start = Instant::now();
        let mut command = if time_v {
            let mut c = Command::new("/usr/bin/time");
            c.arg("-v").arg(&binary);
            c
        } else {
            Command::new(&binary)
        };
        let output = command
            .env("WEIGHBRIDGE_TIMINGS", "1")
            .args(["select", "--labeled"])
            .arg(&labeled)
            .arg("--pool")
            .arg(&pool)
            .args(["--threshold", "0", "--weight-column", "w", "--fdr", "0.1"])
            .args([
                "--pvalues",
                "conservative",
                "--procedure",
                procedure,
                "--quiet",
            ])
            .arg("--out")
            .arg(&out)
            .output()
            .expect("run weighbridge");
        let elapsed = start.elapsed();
        assert!(
            output.status.success(),
            "{}",
            String::from_utf8_lossy(&output.stderr)
        );
        let stderr = String::from_utf8_lossy(&output.stderr);
        if let Some(peak) = max_rss(&stderr) {
            peaks.borrow_mut().push((procedure.to_string(), peak));
        }
        if procedure == "conditional" {
            *phase_lines.borrow_mut() = stderr
                .lines()
                .filter(|l| l.starts_with("timing:"))
                .map(str::to_string)
                .collect();
        }
        elapsed
    };
    let (t_cmd_bh, _) = median_time(repeats.min(3), || run("bh"));
    let (t_cmd_cc, _) = median_time(repeats.min(3), || run("conditional"));
    println!(
        "command wall time, `weighbridge select` on {m} pool rows (median of {}):",
        repeats.min(3)
    );
    println!("  --procedure bh            {:8.3} s", secs(t_cmd_bh));
    println!("  --procedure conditional   {:8.3} s", secs(t_cmd_cc));
    println!(
        "  conditional / bh          {:8.2}",
        secs(t_cmd_cc) / secs(t_cmd_bh)
    );
    let mut largest: Vec<(String, u64)> = vec![];
    for (procedure, peak) in peaks.borrow().iter() {
        match largest.iter_mut().find(|(p, _)| p == procedure) {
            Some(entry) => entry.1 = entry.1.max(*peak),
            None => largest.push((procedure.clone(), *peak)),
        }
    }
    for (procedure, peak) in &largest {
        println!(
            "  peak memory --procedure {procedure:<12} {:8.1} MiB ({:.0} bytes per pool unit)",
            mib(*peak),
            *peak as f64 / m as f64
        );
    }
    if !time_v {
        println!("  peak memory: not measured (/usr/bin/time missing)");
    }
    println!("  phases of the last conditional run (WEIGHBRIDGE_TIMINGS):");
    for line in phase_lines.borrow().iter() {
        println!("    {line}");
    }
    if let Some(python) = arg_value("--pyarrow") {
        let script =
            Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/scripts/time_pyarrow_read.py");
        let output = Command::new(python)
            .arg(&script)
            .arg(&pool)
            .args(["--threads", "2", "--repeats", "3"])
            .output()
            .expect("run the pyarrow helper");
        let text = String::from_utf8_lossy(&output.stdout);
        match text.trim().parse::<f64>() {
            Ok(t) if output.status.success() => println!(
                "  pyarrow read_csv, 2 threads (median of 3) {t:8.3} s; conditional select / pyarrow read {:6.2}",
                secs(t_cmd_cc) / t
            ),
            _ => println!("  pyarrow: not run ({})", String::from_utf8_lossy(&output.stderr).trim()),
        }
    }
}
