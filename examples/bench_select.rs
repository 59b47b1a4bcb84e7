//! Benchmark of the selection core (issue: selection engine).
//!
//! Run: `cargo run --release --example bench_select` (add `-- --quick` for a smaller run).
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
//! Timings are medians of a few repeats on whatever machine runs this; report ratios.

#[path = "../tests/common/oracle.rs"]
mod oracle;

use std::io::Write;
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use rand::Rng;
use rand_distr::StandardNormal;
use weighbridge::fdr::{benjamini_hochberg, conditional_calibration, conditional_counts, Pruning};
use weighbridge::pvalue::{conservative_pvalues, randomized_pvalues, CalibrationSet};
use weighbridge::random::{stream, Stream};

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

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let (n, m, naive_m, repeats) = if quick {
        (2_000, 100_000, 2_000, 3)
    } else {
        (20_000, 1_000_000, 10_000, 5)
    };
    let q = 0.1;
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

    // Whole command, same process start-up, same files.
    let binary = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/release/weighbridge");
    if !binary.exists() {
        println!("command timings: not run (build target/release/weighbridge first)");
        return;
    }
    let dir = tempfile::tempdir().expect("temp dir");
    let labeled = dir.path().join("labeled.csv");
    let pool = dir.path().join("pool.csv");
    write_csv(
        &labeled,
        "L",
        &data.labeled_pred,
        Some(&data.labeled_outcome),
        &data.labeled_weights,
    );
    write_csv(&pool, "P", &data.pool_pred, None, &data.pool_weights);
    let run = |procedure: &str| {
        let out = dir.path().join(format!("out-{procedure}"));
        let start = Instant::now();
        let status = Command::new(&binary)
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
            .status()
            .expect("run weighbridge");
        assert!(status.success());
        start.elapsed()
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
}
