//! Benchmark of the domain-classifier fit at screening scale (design.md 2.5): 10^6 pool
//! rows and 2 x 10^4 labeled rows with 32 features, and a known logistic shift (seeded).
//!
//! Labeled rows are N(0, I); pool rows are N(beta, I) with beta_f = 0.25 for the first 8
//! features and 0 otherwise, so the true density ratio is exp(beta'x - |beta|^2 / 2), exactly
//! a logistic model. The example times: building the standardized design, the Newton fit,
//! predicting every row, and the whole `assess_shift` (cross-validation on 2 x 10^5 rows,
//! 1000 permutations, every diagnostic). It then writes the pool to a CSV in a temporary
//! folder and times `weighbridge::table::read_units` on it, printing fit / read.
//!
//! Figures (2026-12-02, 2-core AMD EPYC with AVX2/FMA, 24 GiB, shared with other workers'
//! compiles, load average 2.5-4 during the runs; seed 20261204; 10^6 pool + 2 x 10^4
//! labeled rows x 32 features), over five runs:
//! - fit (standardize 0.26-0.58 s + Newton 0.86-2.1 s, 3 full-data iterations after a
//!   subsample warm start, gradient norm 2.8e-13 + predict all rows 0.03-0.12 s):
//!   1.2-2.8 s;
//! - `read_units` on the same pool as CSV (639 MB): 2.5-5.1 s;
//! - fit / read: 0.45-0.62 (the fit is about twice as fast as reading);
//! - whole `assess_shift` (fit, 5-fold CV on 2 x 10^5 rows, 1000 permutations, all
//!   diagnostics): 4.3-6.0 s;
//! - Spearman correlation of fitted and true pool weights: 0.99888.
//!
//! Run: `cargo run --release --example bench_fit` (add `-- ROWS` for another pool size,
//! `-- ROWS fit-only` to stop after the fit).

use std::io::{BufWriter, Write};
use std::time::Instant;

use linfa::ParamGuard;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use weighbridge::shift::{assess_shift, fit_logistic, Design, Expansion, FeatureView, ShiftParams};
use weighbridge::table::{read_units, ReadOptions, Role};

const FEATURES: usize = 32;
const SHIFTED: usize = 8;
const BETA: f64 = 0.25;
const SEED: u64 = 20_261_204;

fn table(rows: usize, mean: f64, rng: &mut ChaCha8Rng) -> Vec<f64> {
    let mut out = Vec::with_capacity(rows * FEATURES);
    for f in 0..FEATURES {
        let mu = if f < SHIFTED { mean } else { 0.0 };
        for _ in 0..rows {
            let z: f64 = StandardNormal.sample(rng);
            out.push(mu + z);
        }
    }
    out
}

fn ranks(v: &[f64]) -> Vec<f64> {
    let mut idx: Vec<usize> = (0..v.len()).collect();
    idx.sort_unstable_by(|&a, &b| v[a].total_cmp(&v[b]));
    let mut r = vec![0.0; v.len()];
    for (rank, &i) in idx.iter().enumerate() {
        r[i] = rank as f64;
    }
    r
}

fn pearson(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    sab / (saa * sbb).sqrt()
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let pool_rows: usize = std::env::args()
        .nth(1)
        .map(|s| s.parse())
        .transpose()?
        .unwrap_or(1_000_000);
    let labeled_rows = 20_000;
    let names: Vec<String> = (1..=FEATURES).map(|i| format!("f{i}")).collect();
    let mut rng = ChaCha8Rng::seed_from_u64(SEED);
    let labeled = table(labeled_rows, 0.0, &mut rng);
    let pool = table(pool_rows, BETA, &mut rng);
    let lv = FeatureView::new(&labeled, labeled_rows, &names)?;
    let pv = FeatureView::new(&pool, pool_rows, &names)?;
    println!(
        "data: {labeled_rows} labeled + {pool_rows} pool rows x {FEATURES} features, seed {SEED}, rayon threads {}",
        rayon::current_num_threads()
    );

    // 1. The fit alone: design, Newton, prediction on all rows.
    let t0 = Instant::now();
    let lrows: Vec<usize> = (0..labeled_rows).collect();
    let prows: Vec<usize> = (0..pool_rows).collect();
    let design = Design::build(lv, pv, &lrows, &prows, Expansion::None)?;
    let t_design = t0.elapsed().as_secs_f64();
    let n = design.n_fit_rows();
    let y: Vec<bool> = (0..n).map(|r| r >= labeled_rows).collect();
    let params = weighbridge::shift::LogisticParams::default().check()?;
    let t1 = Instant::now();
    let model = fit_logistic(design.fit_matrix(), n, &y, None, &params)?;
    let t_newton = t1.elapsed().as_secs_f64();
    let t2 = Instant::now();
    let eta_pool = design.linear_predictor(pv, model.coefficients());
    let _eta_lab = design.linear_predictor(lv, model.coefficients());
    let t_predict = t2.elapsed().as_secs_f64();
    let fit_total = t0.elapsed().as_secs_f64();
    let r = model.report();
    println!(
        "fit: design {t_design:.2} s + Newton {t_newton:.2} s ({} iterations, gradient norm {:.1e}, converged {}) + predict {t_predict:.2} s = {fit_total:.2} s",
        r.iterations, r.gradient_norm, r.converged
    );

    // Fitted vs true log density ratio on the pool (Spearman = Pearson of ranks).
    let true_log: Vec<f64> = (0..pool_rows)
        .map(|i| (0..SHIFTED).map(|f| BETA * pool[f * pool_rows + i]).sum())
        .collect();
    let spearman = pearson(&ranks(&eta_pool), &ranks(&true_log));
    println!("Spearman(fitted, true weights) on the pool: {spearman:.5}");

    if std::env::args().nth(2).as_deref() == Some("fit-only") {
        return Ok(());
    }

    // 2. Everything assess_shift does.
    let options = ShiftParams::new().check()?;
    let t3 = Instant::now();
    let a = assess_shift(lv, pv, &options)?;
    let t_assess = t3.elapsed().as_secs_f64();
    let s = &a.summary;
    println!(
        "assess_shift (fit + 5-fold CV on {} rows + {} permutations + diagnostics): {t_assess:.2} s; auc {:.4} [{:.4}, {:.4}], ess_fraction {:.3}, khat {:.3}, warnings {}",
        s.auc_details.labeled_rows + s.auc_details.pool_rows,
        s.auc_details.permutations,
        s.auc,
        s.auc_ci[0],
        s.auc_ci[1],
        s.ess_fraction,
        s.khat,
        s.warnings.len()
    );

    // 3. Reading the same pool from CSV.
    let dir = tempfile::tempdir()?;
    let path = dir.path().join("pool.csv");
    {
        let mut w = BufWriter::with_capacity(1 << 20, std::fs::File::create(&path)?);
        write!(w, "id,prediction")?;
        for name in &names {
            write!(w, ",{name}")?;
        }
        writeln!(w)?;
        let mut buf = ryu_like::Buffer::default();
        for i in 0..pool_rows {
            write!(w, "p{i},0.5")?;
            for f in 0..FEATURES {
                w.write_all(b",")?;
                w.write_all(buf.format(pool[f * pool_rows + i]).as_bytes())?;
            }
            w.write_all(b"\n")?;
        }
        w.flush()?;
    }
    let bytes = std::fs::metadata(&path)?.len();
    let mut read_options = ReadOptions::new("prediction");
    read_options.features = vec!["f1..f32".to_string()];
    let t4 = Instant::now();
    let units = read_units(&path, Role::Pool, &read_options)?;
    let t_read = t4.elapsed().as_secs_f64();
    assert_eq!(units.len(), pool_rows);
    println!(
        "read_units on the pool CSV ({:.0} MB): {t_read:.2} s; fit / read = {:.2}",
        bytes as f64 / 1e6,
        fit_total / t_read
    );
    Ok(())
}

/// Shortest round-trip float formatting through std's `{}` (no extra dependency).
mod ryu_like {
    use std::fmt::Write;

    #[derive(Default)]
    pub struct Buffer(String);

    impl Buffer {
        pub fn format(&mut self, v: f64) -> &str {
            self.0.clear();
            write!(self.0, "{v}").expect("write to String");
            &self.0
        }
    }
}
