//! Times the cross-fitted boosted domain classifier (src/shift/boosted.rs): fit on
//! 120,000 rows x 32 features with 5 folds, then prediction on 1,000,000 new rows.
//!
//! Data: labeled rows N(0, I); pool rows the same but x0 scaled by 0.6 (a variance shift)
//! and x1 shifted by 0.3; half the rows each. Seeded, so figures are comparable run to run.
//!
//! `cargo run --release --example bench_boosted [-- ROWS FEATURES PREDICT_ROWS]`

use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use weighbridge::shift::boosted::{cross_fit, BoostedParams};
use weighbridge::shift::roc_auc;

/// Column-major table of `rows` rows and their classes.
fn table(rows: usize, features: usize, seed: u64) -> (Vec<f64>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let y: Vec<bool> = (0..rows).map(|_| rng.gen::<f64>() < 0.5).collect();
    let mut x = vec![0.0; rows * features];
    for f in 0..features {
        for r in 0..rows {
            let z: f64 = rng.sample(StandardNormal);
            x[f * rows + r] = match (y[r], f) {
                (true, 0) => 0.6 * z,
                (true, 1) => z + 0.3,
                _ => z,
            };
        }
    }
    (x, y)
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.parse())
        .collect::<Result<_, _>>()?;
    let rows = args.first().copied().unwrap_or(120_000);
    let features = args.get(1).copied().unwrap_or(32);
    let predict_rows = args.get(2).copied().unwrap_or(1_000_000);
    println!(
        "threads {}, fit {rows} rows x {features} features, predict {predict_rows} rows",
        rayon::current_num_threads()
    );

    let (x, y) = table(rows, features, 1);
    let pool = y.iter().filter(|&&v| v).count();
    // Class-balance weights: each class sums to rows / 2.
    let weights: Vec<f64> = y
        .iter()
        .map(|&p| {
            let class = if p { pool } else { rows - pool };
            rows as f64 / (2.0 * class as f64)
        })
        .collect();
    let params = BoostedParams::default();
    let start = Instant::now();
    let fit = cross_fit(&x, rows, &y, &weights, &params)?;
    let fit_seconds = start.elapsed().as_secs_f64();
    let report = fit.report();
    let auc = roc_auc(fit.out_of_fold_log_odds(), &y)?.auc;
    println!(
        "cross_fit: {fit_seconds:.2} s, {} folds, trees per fold {:?}, leaves per fold {:?}, \
         deepest tree per fold {:?}, out-of-fold AUC {auc:.4}",
        params.folds, report.trees_per_fold, report.leaves_per_fold, report.max_depth_per_fold
    );

    let (new_x, _) = table(predict_rows, features, 2);
    let start = Instant::now();
    let log_odds = fit.predict_log_odds(&new_x, predict_rows);
    let predict_seconds = start.elapsed().as_secs_f64();
    let mean = log_odds.iter().sum::<f64>() / predict_rows as f64;
    println!(
        "predict_log_odds: {predict_seconds:.2} s for {predict_rows} rows \
         ({:.0} ns per row over {} trees), mean log-odds {mean:.4}",
        1e9 * predict_seconds / predict_rows as f64,
        report.trees_per_fold.iter().sum::<usize>()
    );
    Ok(())
}
