//! Library example: fit density-ratio weights with the domain classifier and inspect the
//! shift diagnostics.
//!
//! Run: `cargo run --release --example fit_weights_and_diagnose` (CI runs it with `--ci`).
//! Uses the invented demo scenario, whose exact density ratio is known, and compares the
//! fitted weights with it.

use weighbridge::demo::{generate, FEATURES};
use weighbridge::shift::{assess_shift_with, Expansion, FeatureView, ShiftParams};

/// Column-major features of a demo set.
fn column_major(rows: &[[f64; 5]]) -> Vec<f64> {
    (0..5)
        .flat_map(|f| rows.iter().map(move |x| x[f]))
        .collect()
}

/// Spearman rank correlation (ties not expected with continuous data).
fn spearman(a: &[f64], b: &[f64]) -> f64 {
    let ranks = |v: &[f64]| {
        let mut order: Vec<usize> = (0..v.len()).collect();
        order.sort_by(|&i, &j| v[i].total_cmp(&v[j]));
        let mut r = vec![0.0; v.len()];
        for (rank, &i) in order.iter().enumerate() {
            r[i] = rank as f64;
        }
        r
    };
    let (ra, rb) = (ranks(a), ranks(b));
    let n = a.len() as f64;
    let mean = (n - 1.0) / 2.0;
    let cov: f64 = ra
        .iter()
        .zip(&rb)
        .map(|(x, y)| (x - mean) * (y - mean))
        .sum();
    let var: f64 = ra.iter().map(|x| (x - mean) * (x - mean)).sum();
    cov / var
}

fn main() {
    let quick = std::env::args().any(|a| a == "--ci");
    let (n, m) = if quick { (1000, 5000) } else { (3000, 30000) };
    let scenario = generate(n, m, 7);
    let names: Vec<String> = FEATURES.iter().map(|s| s.to_string()).collect();
    let labeled = column_major(&scenario.labeled.features);
    let pool = column_major(&scenario.pool.features);
    let assessment = assess_shift_with(
        FeatureView::new(&labeled, n, &names).expect("finite features"),
        FeatureView::new(&pool, m, &names).expect("finite features"),
        ShiftParams::new()
            .expansion(Expansion::None)
            .permutations(if quick { 99 } else { 999 }),
    )
    .expect("fit");
    let s = &assessment.summary;
    println!(
        "AUC {:.3} [{:.3}, {:.3}], permutation p {:.4}",
        s.auc, s.auc_ci[0], s.auc_ci[1], s.permutation_p
    );
    println!(
        "ESS {:.0} ({:.1}% of labeled), Pareto k-hat {:.2} (threshold {:.2})",
        s.ess,
        100.0 * s.ess_fraction,
        s.khat,
        s.khat_threshold
    );
    println!(
        "classifier: {} Newton iterations, converged {}",
        s.iterations, s.converged
    );
    for balance in &s.balance {
        println!("{balance:?}");
    }
    for warning in &s.warnings {
        println!("warning: {}", warning.message);
    }
    let rho = spearman(&assessment.pool.weight, &scenario.pool.true_weight);
    println!("Spearman correlation of fitted and exact pool weights: {rho:.4}");
    assert!(s.converged);
    assert!(
        rho > 0.95,
        "fitted weights should track the exact ratio, got {rho}"
    );
}
