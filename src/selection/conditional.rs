//! Conditional-calibration selection (Jin & Candes 2023, weighted conformalized selection,
//! built on Fithian & Lei 2022; design.md section 2.4).
//!
//! For each pool unit `j`, `K_j` is the number BH(q) selects from the p-values recomputed
//! with unit `j` moved into the calibration set,
//! `p_l^(j) = (sum_i w_i 1{V_i < Vh_l} + w_j 1{Vh_j < Vh_l}) / (W + w_j)` (`l != j`),
//! `p_j^(j) = 0`. First step `R1 = {j : p_j <= q K_j / m}` on the conservative p-values,
//! then pruning with `xi_j` (see [`super::pruning`]):
//! `r* = max{r : #{j in R1 : xi_j K_j <= r} >= r}`, `R = {j in R1 : xi_j K_j <= r*}`.
//! Finite-sample `FDR <= q` under covariate shift with the true weights. (design.md states
//! `q m0 / m`; that needs a fixed set of nulls, but here whether a unit is null is random,
//! and simulations reach q itself: see the notes in tests/fdr_simulation.rs and
//! docs/validation.md.)
//!
//! The `K_j` are computed in `O(m log m)` in total (design.md 2.4): sort the pool scores
//! `s_1 <= ... <= s_m`, `A(k) = sum_i w_i 1{V_i < s_k}`, `b_j` the last sorted position
//! holding `Vh_j`. `K_j` is the largest `k` in `[b_j + 1, m]` with
//! `A(k) + w_j <= (q k / m)(W + w_j)`, else the largest `k` in `[2, b_j]` with
//! `A(k - 1) <= (q k / m)(W + w_j)`, else 1. Rearranged, each region asks for the rightmost
//! index in a range whose per-index threshold passes `w_j` (`w_j <= tau_k` high,
//! `w_j >= sigma_k` low). The thresholds are widened by a small margin so that they never
//! miss a passing index. The high region always ends at m, so its answer lies on the
//! right-to-left maxima of `tau` (one binary search per unit); for the low region the
//! units are visited in sorted order, so `b_j` only grows and a stack of the right-to-left
//! minima of `sigma` over `[2, b_j]` holds the answer (one binary search per unit). This
//! replaced a segment-tree descent that was about twice as slow at m = 10^6 (cache
//! misses). Every candidate is
//! then re-decided by [`within_level`] itself, so the result is exactly what the
//! definition gives under that one comparison rule.
//!
//! Floating point: every decision "p <= q k / m" (`R1`, `K_j`) goes through
//! [`within_level`], which lets exact ties pass with a one-sided relative tolerance of
//! [`TIE_TOLERANCE`].

use rayon::prelude::*;

use super::bh::{bh_level, check_fdr, within_level, SelectionError, TIE_TOLERANCE};
use super::pruning::{prune_with, Pruning};
use crate::conformal::pvalue::{check_weights, CalibrationSet, PoolPValues};

/// Extra relative margin used only to widen the segment-tree filters in the fast
/// conditional calibration, so that rounding in the rearranged thresholds never hides an
/// index that [`within_level`] would pass. Candidates are re-decided exactly.
pub(crate) const FILTER_MARGIN: f64 = 1e-9;

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

/// Indices of the right-to-left maxima of `keys` (each strictly above every key to its
/// right), from the right end leftwards; the keys increase along the returned list.
/// For any `lo`, the rightmost index in `[lo, len - 1]` with `key >= x` is on this list:
/// an index off the list has a key no larger than some index to its right.
pub(crate) fn right_to_left_maxima(keys: &[f64]) -> Vec<usize> {
    let mut stairs = Vec::new();
    let mut best = f64::NEG_INFINITY;
    for (index, &key) in keys.iter().enumerate().rev() {
        if key > best {
            best = key;
            stairs.push(index);
        }
    }
    stairs
}

/// Rightmost index in `[lo, hi]` with `passes_filter(index) && verify(index)`, scanning
/// leftwards from `hi`. Only used after a widened-filter candidate failed verification,
/// which needs a boundary gap between 1e-12 and 1e-9 relative (practically never).
pub(crate) fn scan_left(
    lo: usize,
    hi: usize,
    passes_filter: impl Fn(usize) -> bool,
    verify: impl Fn(usize) -> bool,
) -> Option<usize> {
    (lo..=hi).rev().find(|&i| passes_filter(i) && verify(i))
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
    PreparedPool::new(calibration, pool_scores, pool_weights)?.counts(q)
}

/// The pool sorted once, with `A(k)` and `b_j`, so that `K_j` can be computed at several
/// levels without sorting again (the level curve). Nothing here depends on q.
pub struct PreparedPool {
    /// `None` for an empty pool.
    sorted: Option<SortedPool>,
}

impl PreparedPool {
    /// Sort the pool scores and compute `A(k)` and `b_j`.
    ///
    /// # Errors
    /// NaN pool scores, bad pool weights.
    pub fn new(
        calibration: &CalibrationSet,
        pool_scores: &[f64],
        pool_weights: Option<&[f64]>,
    ) -> Result<Self, SelectionError> {
        let m = pool_scores.len();
        if let Some(index) = pool_scores.iter().position(|v| v.is_nan()) {
            return Err(SelectionError::NanPoolScore { index });
        }
        if let Some(w) = pool_weights {
            check_weights("pool", w, m)?;
        }
        let sorted = (m > 0).then(|| SortedPool::new(calibration, pool_scores, pool_weights, 1.0));
        Ok(PreparedPool { sorted })
    }

    /// `K_j` at level `q` for every pool unit, in input order.
    ///
    /// # Errors
    /// `q` outside (0, 1].
    pub fn counts(&mut self, q: f64) -> Result<Vec<usize>, SelectionError> {
        check_fdr(q)?;
        let Some(pool) = self.sorted.as_mut() else {
            return Ok(vec![]);
        };
        pool.q = q;
        let m = pool.m;
        let (tau, sigma) = pool.weight_filters();
        let mut per_position = pool.high_region(&tau);
        pool.low_region(&sigma, &mut per_position);
        // Neither region passes: K_j = 1 (p_j^(j) = 0 always passes).
        for k in per_position.iter_mut().filter(|k| **k == 0) {
            *k = 1;
        }
        let mut counts = vec![0usize; m];
        for (pos, &j) in pool.order.iter().enumerate() {
            counts[j] = per_position[pos];
        }
        Ok(counts)
    }
}

/// The pool in sorted score order with what both regions of the `K_j` search read.
struct SortedPool {
    q: f64,
    m: usize,
    /// `W`, the total labeled weight.
    total: f64,
    /// `order[pos]`: the input index of the unit at sorted position `pos`.
    order: Vec<usize>,
    /// `below[k - 1] = A(k) = sum_i w_i 1{V_i < s_k}`.
    below: Vec<f64>,
    /// `last_tied[pos]`: 1-based `b` for the unit at sorted position `pos` (0-based).
    last_tied: Vec<usize>,
    /// `sorted_weights[pos]`: the weight of the unit at sorted position `pos`, gathered
    /// once (`None` = every weight 1). Both regions read the weights in sorted order; a
    /// gather through `order` there was a random read before each dependent search.
    sorted_weights: Option<Vec<f64>>,
}

impl SortedPool {
    /// Sort the pool scores and compute `A(k)` and `b` (`pool_scores` non-empty, no NaN).
    fn new(
        calibration: &CalibrationSet,
        pool_scores: &[f64],
        pool_weights: Option<&[f64]>,
        q: f64,
    ) -> Self {
        let m = pool_scores.len();
        let total = calibration.total_weight();

        // Sorted pool scores s_1..s_m (0-based here: sorted[k - 1] = s_k).
        let mut pairs: Vec<(f64, usize)> = pool_scores.iter().copied().zip(0..m).collect();
        pairs.par_sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
        let (sorted, order): (Vec<f64>, Vec<usize>) = pairs.into_iter().unzip();

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
        let sorted_weights =
            pool_weights.map(|w| order.par_iter().map(|&j| w[j]).collect::<Vec<f64>>());
        SortedPool {
            q,
            m,
            total,
            order,
            below,
            last_tied,
            sorted_weights,
        }
    }

    #[inline]
    fn weight_at(&self, pos: usize) -> f64 {
        self.sorted_weights.as_ref().map_or(1.0, |w| w[pos])
    }

    #[inline]
    fn verify_high(&self, w: f64, index: usize) -> bool {
        within_level(
            self.below[index] + w,
            self.total + w,
            bh_level(self.q, index + 1, self.m),
        )
    }

    #[inline]
    fn verify_low(&self, w: f64, index: usize) -> bool {
        within_level(
            self.below[index - 1],
            self.total + w,
            bh_level(self.q, index + 1, self.m),
        )
    }

    /// The filters `(tau, sigma)` on `w_j`, indexed by `k - 1` (`k = 1..m`).
    fn weight_filters(&self) -> (Vec<f64>, Vec<f64>) {
        let (q, m, total, below) = (self.q, self.m, self.total, &self.below);
        // Filters on w_j, indexed by k - 1 (k = 1..m), widened by FILTER_MARGIN.
        // High region: A(k) + w <= t (W + w)  <=>  w <= (t W - A(k)) / (1 - t) = tau_k (t < 1).
        // Low region (k >= 2): A(k-1) <= t (W + w)  <=>  w >= A(k-1) / t - W = sigma_k.
        (1..=m)
            .into_par_iter()
            .map(|k| {
                let t = bh_level(q, k, m) * (1.0 + TIE_TOLERANCE);
                let a = below[k - 1];
                let slack = 1.0 - t - FILTER_MARGIN;
                let tau = if slack <= 0.0 {
                    f64::INFINITY
                } else {
                    (t * total - a + FILTER_MARGIN * (a + total)) / slack
                };
                let sigma = if k == 1 {
                    f64::INFINITY // the low region starts at k = 2
                } else if bh_level(q, k, m) >= 1.0 {
                    f64::NEG_INFINITY // every weight passes
                } else {
                    let a_prev = below[k - 2];
                    a_prev * (1.0 - FILTER_MARGIN) / t - total * (1.0 + FILTER_MARGIN)
                };
                (tau, sigma)
            })
            .unzip()
    }

    /// The high region of every unit (sorted positions): `K_j` when it lies there, else 0.
    fn high_region(&self, tau: &[f64]) -> Vec<usize> {
        let m = self.m;
        // High region: k in [b + 1, m], i.e. indices [b, m - 1]; it always ends at m, so the
        // rightmost index with tau >= w lies on the right-to-left maxima of tau (a binary
        // search: tau increases along that list; values kept beside indices for locality).
        let high_stairs = right_to_left_maxima(tau);
        let high_values: Vec<f64> = high_stairs.iter().map(|&i| tau[i]).collect();
        (0..m)
            .into_par_iter()
            .map(|pos| {
                let (w, lo) = (self.weight_at(pos), self.last_tied[pos]);
                if lo > m - 1 {
                    return 0;
                }
                let step = high_values.partition_point(|&t| t < w);
                match high_stairs.get(step) {
                    Some(&index) if index >= lo => {
                        if self.verify_high(w, index) {
                            index + 1
                        } else {
                            index
                                .checked_sub(1)
                                .filter(|&hi| hi >= lo)
                                .and_then(|hi| {
                                    scan_left(lo, hi, |i| tau[i] >= w, |i| self.verify_high(w, i))
                                })
                                .map_or(0, |i| i + 1)
                        }
                    }
                    _ => 0,
                }
            })
            .collect()
    }

    /// Fill in the low region for the units (sorted positions) whose high region gave 0.
    fn low_region(&self, sigma: &[f64], per_position: &mut [usize]) {
        let m = self.m;
        // Low region: k in [2, b], i.e. indices [1, b - 1], rightmost with sigma <= w. Within a
        // run of units in sorted order b only grows, so a stack keeps the right-to-left minima
        // of sigma over [1, b - 1] (sigma increases from bottom to top), where the answer lies.
        // Each thread takes a contiguous run of positions and builds its own stack.
        let chunk = m.div_ceil(rayon::current_num_threads().max(1));
        per_position
            .par_chunks_mut(chunk)
            .enumerate()
            .for_each(|(chunk_index, answers)| {
                let first = chunk_index * chunk;
                let mut stack: Vec<(f64, usize)> = Vec::new();
                let mut pushed = 1; // next index to push; index 0 (k = 1) is not in the low region
                for (offset, answer) in answers.iter_mut().enumerate() {
                    if *answer != 0 {
                        continue;
                    }
                    let pos = first + offset;
                    let b = self.last_tied[pos];
                    while pushed < b {
                        while stack.last().is_some_and(|&(top, _)| top >= sigma[pushed]) {
                            stack.pop();
                        }
                        stack.push((sigma[pushed], pushed));
                        pushed += 1;
                    }
                    if b < 2 {
                        continue;
                    }
                    let w = self.weight_at(pos);
                    let count = stack.partition_point(|&(s, _)| s <= w);
                    if count == 0 {
                        continue;
                    }
                    let index = stack[count - 1].1;
                    *answer = if self.verify_low(w, index) {
                        index + 1
                    } else {
                        index
                            .checked_sub(1)
                            .filter(|&hi| hi >= 1)
                            .and_then(|hi| {
                                scan_left(1, hi, |i| sigma[i] <= w, |i| self.verify_low(w, i))
                            })
                            .map_or(0, |i| i + 1)
                    };
                }
            });
    }
}

/// Conditional-calibration selection at level `q` (design.md 2.4).
///
/// `pvalues` must be the conservative p-values of the same pool (see
/// [`crate::conformal::pvalue::conservative_pvalues`]); `seed` drives the pruning draws.
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
    Ok(select_with_counts(counts, pvalues, q, pruning, seed))
}

/// The first step and pruning of conditional calibration for counts `K_j` already
/// computed at level `q` (e.g. by [`PreparedPool::counts`]).
pub fn select_with_counts(
    counts: Vec<usize>,
    pvalues: &PoolPValues,
    q: f64,
    pruning: Pruning,
    seed: u64,
) -> ConditionalSelection {
    let m = counts.len();
    let first_step: Vec<bool> = (0..m)
        .into_par_iter()
        .map(|j| {
            within_level(
                pvalues.numerator[j],
                pvalues.denominator[j],
                bh_level(q, counts[j], m),
            )
        })
        .collect();
    let first_step_count = first_step.iter().filter(|&&x| x).count();
    let (selected, selected_count, pruning_draw) = prune_with(pruning, &first_step, &counts, seed);
    ConditionalSelection {
        conditional_count: counts,
        first_step,
        selected,
        first_step_count,
        selected_count,
        pruning_draw,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    #[test]
    fn right_to_left_maxima_hold_every_suffix_answer() {
        use rand::SeedableRng;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        for _ in 0..300 {
            let len = rng.gen_range(1..40);
            let keys: Vec<f64> = (0..len).map(|_| rng.gen_range(0..6) as f64).collect();
            let stairs = right_to_left_maxima(&keys);
            for lo in 0..len {
                for x in 0..7 {
                    let x = x as f64;
                    let expected = (lo..len).rev().find(|&i| keys[i] >= x);
                    let step = stairs.partition_point(|&i| keys[i] < x);
                    let got = stairs.get(step).copied().filter(|&i| i >= lo);
                    assert_eq!(got, expected, "keys {keys:?} lo {lo} x {x}");
                }
            }
            let reject: Vec<bool> = (0..len).map(|_| rng.gen_bool(0.3)).collect();
            let hi = len - 1;
            assert_eq!(
                scan_left(0, hi, |i| keys[i] >= 3.0, |i| !reject[i]),
                (0..=hi).rev().find(|&i| keys[i] >= 3.0 && !reject[i])
            );
        }
    }
}
