//! Spearman (1904) rank correlation for the integration tests: Pearson correlation of
//! midranks (ties share the mean of their 1-based positions), scipy.stats.spearmanr's
//! definition. Checked against scipy in tests/cli_shift.rs and by hand in
//! tests/boosted_reference.rs. Included with `#[path = "common/ranks.rs"] mod ranks;`.

/// Midranks of `v`.
pub fn midranks(v: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..v.len()).collect();
    order.sort_by(|&a, &b| v[a].total_cmp(&v[b]));
    let mut ranks = vec![0.0; v.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && v[order[j + 1]] == v[order[i]] {
            j += 1;
        }
        let rank = (i + j) as f64 / 2.0 + 1.0;
        for &k in &order[i..=j] {
            ranks[k] = rank;
        }
        i = j + 1;
    }
    ranks
}

/// Spearman's rho of `a` and `b`.
pub fn spearman(a: &[f64], b: &[f64]) -> f64 {
    let (ra, rb) = (midranks(a), midranks(b));
    let n = a.len() as f64;
    let (ma, mb) = (ra.iter().sum::<f64>() / n, rb.iter().sum::<f64>() / n);
    let (mut ab, mut aa, mut bb) = (0.0, 0.0, 0.0);
    for (x, y) in ra.iter().zip(&rb) {
        ab += (x - ma) * (y - mb);
        aa += (x - ma) * (x - ma);
        bb += (y - mb) * (y - mb);
    }
    ab / (aa * bb).sqrt()
}
