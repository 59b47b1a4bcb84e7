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
//!   `R = {j in R1 : xi_j K_j <= r*}`. Finite-sample `FDR <= q` under covariate shift with
//!   the true weights. (design.md states `q m0 / m`; that needs a fixed set of nulls, but
//!   here whether a unit is null is random, and simulations reach q itself: see the notes
//!   in tests/fdr_simulation.rs and docs/validation.md.)
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
//! Floating point: every decision "p <= q k / m" (BH, BY, `R1`, `K_j`, unreachable) goes
//! through [`within_level`], which lets exact ties pass with a one-sided relative
//! tolerance of [`TIE_TOLERANCE`].

use rand::Rng;
use rayon::prelude::*;
use serde::Serialize;
use thiserror::Error;

use crate::conformal::pvalue::{
    check_weights, weight_of, CalibrationSet, PValueError, PoolPValues,
};
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
    Ok(benjamini_hochberg(p, q)?.count)
}

/// Smallest rank `k` in `1..=m` at which `p` passes the BH line (`p <= q k / m` under
/// [`within_level`]), or `m + 1` if it passes at none. The decision is monotone in `k`
/// (`q k / m` is computed by monotone floating-point operations), so a guess from
/// `p m / q` corrected by a step or two is exact.
fn first_passing_rank(p: f64, q: f64, m: usize) -> usize {
    let guess = (p * m as f64 / q).ceil();
    let mut k = if guess >= 1.0 {
        (guess.min((m + 1) as f64)) as usize
    } else {
        1
    };
    while k > 1 && within_level(p, 1.0, bh_level(q, k - 1, m)) {
        k -= 1;
    }
    while k <= m && !within_level(p, 1.0, bh_level(q, k, m)) {
        k += 1;
    }
    k
}

/// Benjamini–Hochberg (1995) step-up selection at FDR level `q`.
///
/// # Formula
/// `k* = max{k : p_(k) <= q k / m}`; the `k*` smallest p-values are selected.
/// Computed in `O(m)` without sorting: with `r_j` the smallest rank at which `p_j` passes
/// the line, `p_(k) <= q k / m` holds exactly when `#{j : r_j <= k} >= k`, so
/// `k* = max{k : #{j : r_j <= k} >= k}` and the selected units are `{j : r_j <= k*}`.
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
    let m = p.len();
    let ranks: Vec<usize> = p.par_iter().map(|&x| first_passing_rank(x, q, m)).collect();
    let mut passing_at = vec![0usize; m + 2];
    for &r in &ranks {
        passing_at[r] += 1;
    }
    let mut cumulative = 0;
    let mut count = 0;
    for (k, &c) in passing_at.iter().enumerate().take(m + 1).skip(1) {
        cumulative += c;
        if cumulative >= k {
            count = k;
        }
    }
    let selected: Vec<bool> = ranks.iter().map(|&r| r <= count).collect();
    debug_assert_eq!(selected.iter().filter(|&&s| s).count(), count);
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

/// Indices of the right-to-left maxima of `keys` (each strictly above every key to its
/// right), from the right end leftwards; the keys increase along the returned list.
/// For any `lo`, the rightmost index in `[lo, len - 1]` with `key >= x` is on this list:
/// an index off the list has a key no larger than some index to its right.
fn right_to_left_maxima(keys: &[f64]) -> Vec<usize> {
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
fn scan_left(
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

    // Filters on w_j, indexed by k - 1 (k = 1..m), widened by FILTER_MARGIN.
    // High region: A(k) + w <= t (W + w)  <=>  w <= (t W - A(k)) / (1 - t) = tau_k (t < 1).
    // Low region (k >= 2): A(k-1) <= t (W + w)  <=>  w >= A(k-1) / t - W = sigma_k.
    let (tau, sigma): (Vec<f64>, Vec<f64>) = (1..=m)
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
        .unzip();
    let weight_at = |pos: usize| weight_of(pool_weights, order[pos]);
    let verify_high =
        |w: f64, index: usize| within_level(below[index] + w, total + w, bh_level(q, index + 1, m));
    let verify_low =
        |w: f64, index: usize| within_level(below[index - 1], total + w, bh_level(q, index + 1, m));

    // High region: k in [b + 1, m], i.e. indices [b, m - 1]; it always ends at m, so the
    // rightmost index with tau >= w lies on the right-to-left maxima of tau (a binary
    // search: tau increases along that list; values kept beside indices for locality).
    let high_stairs = right_to_left_maxima(&tau);
    let high_values: Vec<f64> = high_stairs.iter().map(|&i| tau[i]).collect();
    let mut per_position: Vec<usize> = (0..m)
        .into_par_iter()
        .map(|pos| {
            let (w, lo) = (weight_at(pos), last_tied[pos]);
            if lo > m - 1 {
                return 0;
            }
            let step = high_values.partition_point(|&t| t < w);
            match high_stairs.get(step) {
                Some(&index) if index >= lo => {
                    if verify_high(w, index) {
                        index + 1
                    } else {
                        index
                            .checked_sub(1)
                            .filter(|&hi| hi >= lo)
                            .and_then(|hi| {
                                scan_left(lo, hi, |i| tau[i] >= w, |i| verify_high(w, i))
                            })
                            .map_or(0, |i| i + 1)
                    }
                }
                _ => 0,
            }
        })
        .collect();

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
                let b = last_tied[pos];
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
                let w = weight_at(pos);
                let count = stack.partition_point(|&(s, _)| s <= w);
                if count == 0 {
                    continue;
                }
                let index = stack[count - 1].1;
                *answer = if verify_low(w, index) {
                    index + 1
                } else {
                    index
                        .checked_sub(1)
                        .filter(|&hi| hi >= 1)
                        .and_then(|hi| scan_left(1, hi, |i| sigma[i] <= w, |i| verify_low(w, i)))
                        .map_or(0, |i| i + 1)
                };
            }
        });
    // Neither region passes: K_j = 1 (p_j^(j) = 0 always passes).
    for k in per_position.iter_mut().filter(|k| **k == 0) {
        *k = 1;
    }
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
    let m = pool_scores.len();
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
