//! The naive O(m^2 log m) conditional calibration, written straight from the definitions
//! in design.md 2.4 (one full BH run per pool unit). It is the oracle the fast algorithm
//! in `weighbridge::fdr` must match exactly; it shares only the comparison rule
//! (`within_level`) and the order in which labeled weights are summed (ascending score,
//! ties in input order), so that both see the same floating-point numbers.

#![allow(dead_code)]

use weighbridge::fdr::{bh_level, within_level};

/// Labeled scores and weights sorted by score (stable), summed left to right.
pub struct NaiveLabeled {
    scores: Vec<f64>,
    weights: Vec<f64>,
    pub total: f64,
}

impl NaiveLabeled {
    pub fn new(scores: &[f64], weights: &[f64]) -> Self {
        let mut order: Vec<usize> = (0..scores.len()).collect();
        order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
        let scores: Vec<f64> = order.iter().map(|&i| scores[i]).collect();
        let weights: Vec<f64> = order.iter().map(|&i| weights[i]).collect();
        let mut total = 0.0;
        for w in &weights {
            total += w;
        }
        NaiveLabeled {
            scores,
            weights,
            total,
        }
    }

    /// sum_i w_i 1{V_i < v}, by a plain loop.
    pub fn below(&self, v: f64) -> f64 {
        let mut acc = 0.0;
        for (s, w) in self.scores.iter().zip(&self.weights) {
            if *s < v {
                acc += w;
            }
        }
        acc
    }

    /// sum_i w_i 1{V_i <= v}, by a plain loop.
    pub fn at_or_below(&self, v: f64) -> f64 {
        let mut acc = 0.0;
        for (s, w) in self.scores.iter().zip(&self.weights) {
            if *s <= v {
                acc += w;
            }
        }
        acc
    }
}

/// Number BH(q) selects from p-values given as numerators over one common denominator.
pub fn naive_bh_count(mut numerators: Vec<f64>, denominator: f64, q: f64) -> usize {
    let m = numerators.len();
    numerators.sort_by(|a, b| a.total_cmp(b));
    let mut best = 0;
    for k in 1..=m {
        if within_level(numerators[k - 1], denominator, bh_level(q, k, m)) {
            best = k;
        }
    }
    best
}

/// K_j for every pool unit by the definition: m separate BH runs.
pub fn naive_conditional_counts(
    labeled: &NaiveLabeled,
    pool_scores: &[f64],
    pool_weights: &[f64],
    q: f64,
) -> Vec<usize> {
    let m = pool_scores.len();
    // A(Vh_l) for every l once (it does not depend on j).
    let below: Vec<f64> = pool_scores.iter().map(|&v| labeled.below(v)).collect();
    (0..m)
        .map(|j| {
            let wj = pool_weights[j];
            let denominator = labeled.total + wj;
            let numerators: Vec<f64> = (0..m)
                .map(|l| {
                    if l == j {
                        0.0
                    } else if pool_scores[j] < pool_scores[l] {
                        below[l] + wj
                    } else {
                        below[l]
                    }
                })
                .collect();
            naive_bh_count(numerators, denominator, q)
        })
        .collect()
}

/// First step, pruning and selection by the definitions, given K_j and the xi_j.
pub fn naive_selection(
    labeled: &NaiveLabeled,
    pool_scores: &[f64],
    pool_weights: &[f64],
    counts: &[usize],
    q: f64,
    xi: &[f64],
) -> (Vec<bool>, Vec<bool>) {
    let m = pool_scores.len();
    let first: Vec<bool> = (0..m)
        .map(|j| {
            let num = labeled.at_or_below(pool_scores[j]) + pool_weights[j];
            within_level(
                num,
                labeled.total + pool_weights[j],
                bh_level(q, counts[j], m),
            )
        })
        .collect();
    let size = first.iter().filter(|&&x| x).count();
    let mut r_star = 0;
    for r in 1..=size {
        let c = (0..m)
            .filter(|&j| first[j] && xi[j] * counts[j] as f64 <= r as f64)
            .count();
        if c >= r {
            r_star = r;
        }
    }
    let selected = (0..m)
        .map(|j| first[j] && xi[j] * counts[j] as f64 <= r_star as f64)
        .collect();
    (first, selected)
}
