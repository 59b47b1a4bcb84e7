//! Multiple testing: Benjamini–Hochberg, Benjamini–Yekutieli and conditional-calibration
//! selection with pruning (design.md sections 2.3 and 2.4).
//!
//! * BH (Benjamini & Hochberg 1995): `k* = max{k : p_(k) <= q k / m}`; select the `k*`
//!   smallest p-values.
//! * BY (Benjamini & Yekutieli 2001): BH at level `q / sum_{k<=m} 1/k`.
//! * Conditional calibration (Jin & Candes 2023, weighted conformalized selection, built on
//!   Fithian & Lei 2022): for each pool unit `j`, `K_j` is the number BH(q) selects from the
//!   p-values recomputed with unit `j` moved into the calibration set,
//!   `p_l^(j) = (sum_i w_i 1{V_i < Vh_l} + w_j 1{Vh_j < Vh_l}) / (W + w_j)` (`l != j`),
//!   `p_j^(j) = 0`. First step `R1 = {j : p_j <= q K_j / m}` on the conservative p-values,
//!   then pruning with `xi_j`: `r* = max{r : #{j in R1 : xi_j K_j <= r} >= r}`,
//!   `R = {j in R1 : xi_j K_j <= r*}`. Finite-sample `FDR <= q m0 / m` under covariate shift
//!   with the true weights.
//!
//! The `K_j` are computed in `O(m log m)` in total (design.md 2.4): sort the pool scores
//! `s_1 <= ... <= s_m`, `A(k) = sum_i w_i 1{V_i < s_k}`, `b_j` the last sorted position
//! holding `Vh_j`. `K_j` is the largest `k` in `[b_j + 1, m]` with
//! `A(k) + w_j <= (q k / m)(W + w_j)`, else the largest `k` in `[2, b_j]` with
//! `A(k - 1) <= (q k / m)(W + w_j)`, else 1. Each region is found by a descent in a max
//! segment tree over per-index thresholds on `w_j` (`tau_k` for the high region,
//! `-sigma_k` for the low region), widened by a small margin so that they never miss a
//! passing index; every candidate is then re-decided by [`within_level`] itself, so the
//! result is exactly what the definition gives under that one comparison rule.
//!
//! Floating point: every decision "p <= q k / m" (BH, BY, `R1`, `K_j`, unreachable) goes
//! through [`within_level`], which lets exact ties pass with a one-sided relative
//! tolerance of [`TIE_TOLERANCE`].

use rand::Rng;
use rayon::prelude::*;
use serde::Serialize;
use thiserror::Error;

use crate::pvalue::{check_weights, weight_of, CalibrationSet, PValueError, PoolPValues};
use crate::random::{stream, Stream};

/// One-sided relative tolerance of every level comparison: `p <= t` is decided as
/// `numerator <= t * denominator * (1 + TIE_TOLERANCE)`, so that boundary cases that are
/// exact ties in rational arithmetic (common with integer-like weights and q = 0.2, 0.5)
/// pass whatever rounding the algebra took. Common practice; the value is far above the
/// rounding of a few floating-point operations (about 1e-16) and far below any gap that
/// continuous data produce by chance.
pub const TIE_TOLERANCE: f64 = 1e-12;

/// Extra relative margin used only to widen the segment-tree filters in the fast
/// conditional calibration, so that rounding in the rearranged thresholds never hides an
/// index that [`within_level`] would pass. Candidates are re-decided exactly.
const FILTER_MARGIN: f64 = 1e-9;

/// Broken preconditions of the selection procedures.
#[derive(Debug, Error, PartialEq)]
#[non_exhaustive]
pub enum SelectionError {
    /// The FDR level is not in (0, 1].
    #[error("the FDR level must be in (0, 1], got {0}")]
    FdrOutOfRange(f64),
    /// A p-value is NaN or outside [0, 1].
    #[error("p-value {index} is {value}; p-values must lie in [0, 1]")]
    BadPValue { index: usize, value: f64 },
    /// Weights or scores were rejected.
    #[error(transparent)]
    PValue(#[from] PValueError),
    /// A pool score is NaN.
    #[error("pool score {index} is NaN")]
    NanPoolScore { index: usize },
}

/// Check an FDR level.
///
/// # Errors
/// [`SelectionError::FdrOutOfRange`] unless `0 < q <= 1`.
pub fn check_fdr(q: f64) -> Result<f64, SelectionError> {
    if q > 0.0 && q <= 1.0 {
        Ok(q)
    } else {
        Err(SelectionError::FdrOutOfRange(q))
    }
}

/// The BH line at rank `k` of `m`: `q k / m`.
#[inline]
pub fn bh_level(q: f64, k: usize, m: usize) -> f64 {
    q * k as f64 / m as f64
}

/// The one comparison rule: is `numerator / denominator <= level`?
///
/// Decided as `numerator <= level * denominator * (1 + TIE_TOLERANCE)`.
///
/// # Examples
/// ```
/// use weighbridge::fdr::{bh_level, within_level};
/// // 3/20 <= 0.1 * 3 / 2 = 0.15: an exact tie in rational arithmetic, which passes
/// // although 0.1 * 3 / 2 rounds to 0.15000000000000002 or 0.1499999...
/// assert!(within_level(3.0, 20.0, bh_level(0.1, 3, 2)));
/// assert!(!within_level(3.1, 20.0, bh_level(0.1, 3, 2)));
/// ```
#[inline]
pub fn within_level(numerator: f64, denominator: f64, level: f64) -> bool {
    numerator <= level * denominator * (1.0 + TIE_TOLERANCE)
}

fn check_pvalues(p: &[f64]) -> Result<(), SelectionError> {
    if let Some(index) = p.iter().position(|x| !(0.0..=1.0).contains(x)) {
        return Err(SelectionError::BadPValue {
            index,
            value: p[index],
        });
    }
    Ok(())
}

/// Indices that sort `p` ascending (stable, so ties keep input order).
fn ascending_order(p: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..p.len()).collect();
    order.par_sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    order
}

/// A selection: which units were selected and how many.
#[derive(Clone, Debug, PartialEq)]
pub struct Selection {
    /// `selected[j]` is true when unit `j` is selected.
    pub selected: Vec<bool>,
    /// Number of selected units.
    pub count: usize,
}

/// Number of p-values BH selects at level `q`: `k* = max{k : p_(k) <= q k / m}` (0 if none).
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
pub fn bh_count(p: &[f64], q: f64) -> Result<usize, SelectionError> {
    check_fdr(q)?;
    check_pvalues(p)?;
    let order = ascending_order(p);
    Ok(step_up_count(p, &order, q))
}

fn step_up_count(p: &[f64], order: &[usize], q: f64) -> usize {
    let m = p.len();
    (1..=m)
        .rev()
        .find(|&k| within_level(p[order[k - 1]], 1.0, bh_level(q, k, m)))
        .unwrap_or(0)
}

/// Benjamini–Hochberg (1995) step-up selection at FDR level `q`.
///
/// # Formula
/// `k* = max{k : p_(k) <= q k / m}`; the `k*` smallest p-values are selected.
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
///
/// # Examples
/// ```
/// use weighbridge::fdr::benjamini_hochberg;
/// // p_(2) = 0.02 <= 0.05 * 2 / 4 = 0.025, p_(3) = 0.04 > 0.0375, p_(4) = 0.6 > 0.05.
/// let s = benjamini_hochberg(&[0.6, 0.01, 0.04, 0.02], 0.05).unwrap();
/// assert_eq!(s.selected, vec![false, true, false, true]);
/// ```
pub fn benjamini_hochberg(p: &[f64], q: f64) -> Result<Selection, SelectionError> {
    check_fdr(q)?;
    check_pvalues(p)?;
    let order = ascending_order(p);
    let count = step_up_count(p, &order, q);
    let mut selected = vec![false; p.len()];
    for &j in &order[..count] {
        selected[j] = true;
    }
    Ok(Selection { selected, count })
}

/// `sum_{k<=m} 1/k`, the Benjamini–Yekutieli correction factor.
pub fn harmonic_number(m: usize) -> f64 {
    // Summed from the smallest term up for accuracy.
    (1..=m).rev().map(|k| 1.0 / k as f64).sum()
}

/// Benjamini–Yekutieli (2001) selection: BH at level `q / sum_{k<=m} 1/k`; valid under any
/// dependence between the p-values.
///
/// # Errors
/// `q` outside (0, 1] or a p-value outside [0, 1].
pub fn benjamini_yekutieli(p: &[f64], q: f64) -> Result<Selection, SelectionError> {
    check_fdr(q)?;
    if p.is_empty() {
        return Ok(Selection {
            selected: vec![],
            count: 0,
        });
    }
    benjamini_hochberg(p, q / harmonic_number(p.len()))
}

/// BH-adjusted p-values: `min(1, min_{l >= k} m p_(l) / l)` at rank `k`; unit `j` is
/// selected by BH at level `q` exactly when its adjusted p-value is `<= q` (up to
/// [`TIE_TOLERANCE`]). With `factor = sum 1/k` these are the BY-adjusted p-values.
///
/// # Errors
/// A p-value outside [0, 1].
pub fn bh_adjusted(p: &[f64], factor: f64) -> Result<Vec<f64>, SelectionError> {
    check_pvalues(p)?;
    let m = p.len();
    let order = ascending_order(p);
    let mut adjusted = vec![0.0; m];
    let mut running = f64::INFINITY;
    for k in (1..=m).rev() {
        let j = order[k - 1];
        running = running.min(factor * m as f64 * p[j] / k as f64);
        adjusted[j] = running.min(1.0);
    }
    Ok(adjusted)
}

/// How the first-step set of conditional calibration is pruned (design.md 2.4).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Pruning {
    /// One shared `xi ~ Uniform(0, 1)`; the most powerful in simulation, the default.
    Homogeneous,
    /// Independent `xi_j ~ Uniform(0, 1)`.
    Heterogeneous,
    /// `xi_j = 1`; no randomness, but nearly powerless once weights vary.
    Deterministic,
}

impl Pruning {
    /// The name used on the command line and in summaries.
    pub fn name(self) -> &'static str {
        match self {
            Pruning::Homogeneous => "homogeneous",
            Pruning::Heterogeneous => "heterogeneous",
            Pruning::Deterministic => "deterministic",
        }
    }
}

/// Result of conditional calibration for every pool unit, in input order.
#[derive(Clone, Debug)]
pub struct ConditionalSelection {
    /// `K_j`.
    pub conditional_count: Vec<usize>,
    /// `j in R1`: `p_j <= q K_j / m`.
    pub first_step: Vec<bool>,
    /// `j in R` after pruning.
    pub selected: Vec<bool>,
    /// `|R1|`.
    pub first_step_count: usize,
    /// `|R| = r*`.
    pub selected_count: usize,
    /// The shared draw `xi` of homogeneous pruning.
    pub pruning_draw: Option<f64>,
}

/// Max segment tree over `values[0..len]` answering "rightmost index in `[lo, hi]` whose
/// value is `>= x`" in `O(log len)`.
struct RightmostAtLeast {
    size: usize,
    len: usize,
    tree: Vec<f64>,
}

impl RightmostAtLeast {
    fn new(values: &[f64]) -> Self {
        let len = values.len();
        let size = len.next_power_of_two().max(1);
        let mut tree = vec![f64::NEG_INFINITY; 2 * size];
        tree[size..size + len].copy_from_slice(values);
        for node in (1..size).rev() {
            tree[node] = tree[2 * node].max(tree[2 * node + 1]);
        }
        RightmostAtLeast { size, len, tree }
    }

    fn query(&self, lo: usize, hi: usize, x: f64) -> Option<usize> {
        if lo > hi || hi >= self.len {
            return None;
        }
        self.descend(1, 0, self.size - 1, lo, hi, x)
    }

    fn descend(
        &self,
        node: usize,
        node_lo: usize,
        node_hi: usize,
        lo: usize,
        hi: usize,
        x: f64,
    ) -> Option<usize> {
        let value = self.tree[node];
        // NaN never occurs, but must not pass.
        if node_hi < lo || node_lo > hi || value < x || value.is_nan() {
            return None;
        }
        if node_lo == node_hi {
            return Some(node_lo);
        }
        let mid = (node_lo + node_hi) / 2;
        self.descend(2 * node + 1, mid + 1, node_hi, lo, hi, x)
            .or_else(|| self.descend(2 * node, node_lo, mid, lo, hi, x))
    }
}

/// `K_j` for every pool unit, in input order, by the `O(m log m)` algorithm of design.md 2.4.
///
/// `pool_weights = None` means every weight is 1.
///
/// # Errors
/// `q` outside (0, 1], NaN pool scores, bad pool weights.
pub fn conditional_counts(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    q: f64,
) -> Result<Vec<usize>, SelectionError> {
    check_fdr(q)?;
    let m = pool_scores.len();
    if let Some(index) = pool_scores.iter().position(|v| v.is_nan()) {
        return Err(SelectionError::NanPoolScore { index });
    }
    if let Some(w) = pool_weights {
        check_weights("pool", w, m)?;
    }
    if m == 0 {
        return Ok(vec![]);
    }
    let total = calibration.total_weight();

    // Sorted pool scores s_1..s_m (0-based here: sorted[k - 1] = s_k).
    let mut order: Vec<usize> = (0..m).collect();
    order.par_sort_by(|&a, &b| pool_scores[a].total_cmp(&pool_scores[b]));
    let sorted: Vec<f64> = order.iter().map(|&j| pool_scores[j]).collect();

    // below[k - 1] = A(k) = sum_i w_i 1{V_i < s_k}, by one merge walk.
    let labeled = calibration.sorted_scores();
    let mut below = Vec::with_capacity(m);
    let mut cursor = 0;
    for &s in &sorted {
        while cursor < labeled.len() && labeled[cursor] < s {
            cursor += 1;
        }
        below.push(calibration.prefix_weight(cursor));
    }

    // last_tied[pos] = 1-based b for the unit at sorted position pos (0-based).
    let mut last_tied = vec![0usize; m];
    let mut end = m;
    for pos in (0..m).rev() {
        if pos + 1 < m && sorted[pos + 1] != sorted[pos] {
            end = pos + 1;
        }
        last_tied[pos] = end;
    }

    // Filters on w_j, indexed by k - 1 (k = 1..m), widened by FILTER_MARGIN.
    // High region: A(k) + w <= t (W + w)  <=>  w <= (t W - A(k)) / (1 - t) = tau_k (t < 1).
    // Low region (k >= 2): A(k-1) <= t (W + w)  <=>  w >= A(k-1) / t - W = sigma_k.
    let mut tau = Vec::with_capacity(m);
    let mut neg_sigma = Vec::with_capacity(m);
    for k in 1..=m {
        let t = bh_level(q, k, m) * (1.0 + TIE_TOLERANCE);
        let a = below[k - 1];
        let slack = 1.0 - t - FILTER_MARGIN;
        tau.push(if slack <= 0.0 {
            f64::INFINITY
        } else {
            (t * total - a + FILTER_MARGIN * (a + total)) / slack
        });
        neg_sigma.push(if k == 1 {
            f64::NEG_INFINITY // the low region starts at k = 2
        } else if bh_level(q, k, m) >= 1.0 {
            f64::INFINITY // sigma_k = -inf: every weight passes
        } else {
            let a_prev = below[k - 2];
            -(a_prev * (1.0 - FILTER_MARGIN) / t - total * (1.0 + FILTER_MARGIN))
        });
    }
    let high = RightmostAtLeast::new(&tau);
    let low = RightmostAtLeast::new(&neg_sigma);

    // Computed per sorted position, written back to input order below.
    let per_position: Vec<usize> = (0..m)
        .into_par_iter()
        .map(|pos| {
            let j = order[pos];
            let w = weight_of(pool_weights, j);
            let b = last_tied[pos];
            let denominator = total + w;
            // High region: k in [b + 1, m], i.e. indices [b, m - 1].
            let mut hi = m - 1;
            while b <= hi {
                match high.query(b, hi, w) {
                    Some(index) => {
                        let k = index + 1;
                        if within_level(below[index] + w, denominator, bh_level(q, k, m)) {
                            return k;
                        }
                        if index == 0 {
                            break;
                        }
                        hi = index - 1;
                    }
                    None => break,
                }
            }
            // Low region: k in [2, b], i.e. indices [1, b - 1].
            if b >= 2 {
                let mut hi = b - 1;
                while hi >= 1 {
                    match low.query(1, hi, -w) {
                        Some(index) => {
                            let k = index + 1;
                            if within_level(below[index - 1], denominator, bh_level(q, k, m)) {
                                return k;
                            }
                            hi = index - 1;
                        }
                        None => break,
                    }
                }
            }
            1
        })
        .collect();
    let mut counts = vec![0usize; m];
    for (pos, &j) in order.iter().enumerate() {
        counts[j] = per_position[pos];
    }
    Ok(counts)
}

/// Pruning: `r* = max{r : #{j in R1 : xi_j K_j <= r} >= r}`; returns `R` as a mask and `r*`.
///
/// `xi` gives `xi_j` for unit `j` (only read for units in `R1`).
pub fn prune(
    first_step: &[bool],
    counts: &[usize],
    xi: impl Fn(usize) -> f64,
) -> (Vec<bool>, usize) {
    let mut keys: Vec<(f64, usize)> = first_step
        .iter()
        .enumerate()
        .filter(|(_, &in_r1)| in_r1)
        .map(|(j, _)| (xi(j) * counts[j] as f64, j))
        .collect();
    keys.sort_by(|a, b| a.0.total_cmp(&b.0));
    // count(key <= r) >= r  <=>  the r-th smallest key is <= r.
    let r_star = (1..=keys.len())
        .rev()
        .find(|&r| keys[r - 1].0 <= r as f64)
        .unwrap_or(0);
    let mut selected = vec![false; first_step.len()];
    for &(key, j) in &keys {
        if key <= r_star as f64 {
            selected[j] = true;
        }
    }
    (selected, r_star)
}

/// Conditional-calibration selection at level `q` (design.md 2.4).
///
/// `pvalues` must be the conservative p-values of the same pool (see
/// [`crate::pvalue::conservative_pvalues`]); `seed` drives the pruning draws.
///
/// # Errors
/// `q` outside (0, 1], NaN pool scores, bad pool weights.
pub fn conditional_calibration(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    pvalues: &PoolPValues,
    q: f64,
    pruning: Pruning,
    seed: u64,
) -> Result<ConditionalSelection, SelectionError> {
    let counts = conditional_counts(calibration, pool_scores, pool_weights, q)?;
    let m = pool_scores.len();
    let first_step: Vec<bool> = (0..m)
        .map(|j| {
            within_level(
                pvalues.numerator[j],
                pvalues.denominator[j],
                bh_level(q, counts[j], m),
            )
        })
        .collect();
    let first_step_count = first_step.iter().filter(|&&x| x).count();
    let mut rng = stream(seed, Stream::Pruning);
    let (selected, selected_count, pruning_draw) = match pruning {
        Pruning::Deterministic => {
            let (s, r) = prune(&first_step, &counts, |_| 1.0);
            (s, r, None)
        }
        Pruning::Homogeneous => {
            let xi: f64 = rng.gen();
            let (s, r) = prune(&first_step, &counts, |_| xi);
            (s, r, Some(xi))
        }
        Pruning::Heterogeneous => {
            // One draw per pool unit in input order, whether or not it is in R1, so a
            // unit's draw does not depend on the others' first-step outcomes.
            let draws: Vec<f64> = (0..m).map(|_| rng.gen()).collect();
            let (s, r) = prune(&first_step, &counts, |j| draws[j]);
            (s, r, None)
        }
    };
    Ok(ConditionalSelection {
        conditional_count: counts,
        first_step,
        selected,
        first_step_count,
        selected_count,
        pruning_draw,
    })
}

/// Units that can never be selected at level `q`: their p-value floor `w_j / (W + w_j)`
/// exceeds `q` (design.md 2.2), decided with [`within_level`].
pub fn unreachable(
    total_labeled_weight: f64,
    pool_weights: Option<&[f64]>,
    m: usize,
    q: f64,
) -> Vec<bool> {
    (0..m)
        .map(|j| {
            let w = weight_of(pool_weights, j);
            !within_level(w, total_labeled_weight + w, q)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fdr_level_range() {
        assert!(check_fdr(1.0).is_ok());
        assert!(check_fdr(1e-9).is_ok());
        for bad in [0.0, -0.1, 1.5, f64::NAN, f64::INFINITY] {
            assert!(matches!(
                check_fdr(bad),
                Err(SelectionError::FdrOutOfRange(_))
            ));
        }
    }

    #[test]
    fn segment_tree_rightmost() {
        let t = RightmostAtLeast::new(&[5.0, 1.0, 3.0, 0.0, 2.0]);
        assert_eq!(t.query(0, 4, 2.5), Some(2));
        assert_eq!(t.query(0, 1, 2.5), Some(0));
        assert_eq!(t.query(3, 4, 2.5), None);
        assert_eq!(t.query(0, 4, 2.0), Some(4));
        assert_eq!(t.query(3, 3, -1.0), Some(3));
        assert_eq!(t.query(4, 3, -1.0), None);
    }

    #[test]
    fn pruning_counts_match_definition() {
        // Keys 1, 2, 2, 5: r = 3 has #{<= 3} = 3 >= 3; r = 4 has 3 < 4.
        let first = vec![true, true, true, true, false];
        let counts = vec![1, 2, 2, 5, 1];
        let (sel, r) = prune(&first, &counts, |_| 1.0);
        assert_eq!(r, 3);
        assert_eq!(sel, vec![true, true, true, false, false]);
        let (_, r) = prune(&[false; 3], &[1, 1, 1], |_| 1.0);
        assert_eq!(r, 0);
    }

    #[test]
    fn bh_adjusted_and_by() {
        let p = [0.01, 0.04, 0.03, 0.2];
        let adj = bh_adjusted(&p, 1.0).unwrap();
        // Hand computation: sorted .01 .03 .04 .2 -> 4p/k = .04 .06 .0533 .2 -> running min
        assert!((adj[0] - 0.04).abs() < 1e-15);
        assert!((adj[2] - 0.16 / 3.0).abs() < 1e-15);
        assert!((adj[1] - 0.16 / 3.0).abs() < 1e-15);
        assert!((adj[3] - 0.2).abs() < 1e-15);
        assert!((harmonic_number(3) - 11.0 / 6.0).abs() < 1e-15);
        assert_eq!(benjamini_yekutieli(&[], 0.1).unwrap().count, 0);
    }
}
