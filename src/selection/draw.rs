//! What the pruning draw of conditional calibration does to the shortlist (design.md 2.4).
//!
//! Conditional calibration (Jin & Candes 2023) keeps a first-step set `R1` of `s` units, each
//! with its count `K_j`, then prunes with draws `xi_j`:
//! `r* = max{r : #{j in R1 : xi_j K_j <= r} >= r}`, `R = {j in R1 : xi_j K_j <= r*}`,
//! `|R| = r*`. Everything here is a probability over those draws with the run's p-values
//! (and so `R1` and the `K_j`) held fixed; with randomized p-values that means given the
//! seed's tie-breaking draws.
//!
//! # Homogeneous pruning (one shared `xi ~ Uniform(0, 1)`): exact
//! With `K_(1) <= ... <= K_(s)` the sorted counts, `#{j : xi K_j <= r} >= r` holds exactly
//! when `xi K_(r) <= r`, so `r*(xi) = max{r : xi <= r / K_(r)}` (0 if none) and
//! `P(r* >= r) = min(1, M_r)` with the suffix maximum `M_r = max_{r' >= r} r' / K_(r')`.
//! The shortlist is always the `r*` units with the smallest counts; a group of tied counts
//! is never split (if `K_(r*) = K_(r*+1)`, then `xi K_(r*+1) <= r*` too and `r*` would not
//! be the maximum), so a unit whose count first appears at sorted position `a` is selected
//! with probability `min(1, M_a)`. `O(s log s)`: one sort and one backward pass.
//!
//! # Heterogeneous pruning (independent `xi_j`): Monte Carlo
//! Each replicate of the draws costs `O(s)`: a unit passes rank `r` exactly when
//! `ceil(xi_j K_j) <= r`, so a histogram of `max(1, ceil(xi_j K_j))` and one cumulative
//! pass give `r*`. Seeded, with binomial (or replicate) standard errors.
//!
//! # Fixed selections (BH, BY, deterministic pruning)
//! No draw: every probability is 0 or 1.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rayon::prelude::*;
use serde::Serialize;

/// One possible shortlist size and its probability over the pruning draw.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SizeProbability {
    /// Number of units in the shortlist.
    pub size: usize,
    /// Probability of that size over the draw.
    pub probability: f64,
}

/// How the draw's consequences were obtained.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum DrawMethod {
    /// No random draw decides the shortlist (BH, BY, deterministic pruning).
    NoDraw,
    /// Exact computation (homogeneous pruning).
    Exact,
    /// Seeded Monte Carlo over the draws (heterogeneous pruning).
    MonteCarlo,
}

/// The consequences of the pruning draw: the distribution of the shortlist size and each
/// unit's selection probability.
#[derive(Clone, Debug, Serialize)]
pub struct DrawSummary {
    /// How the numbers below were obtained.
    pub method: DrawMethod,
    /// Expected number of selected units.
    pub expected_selected_count: f64,
    /// Probability that nothing is selected.
    pub empty_probability: f64,
    /// Every size with a positive probability, smallest first.
    pub sizes: Vec<SizeProbability>,
    /// Monte Carlo only: number of replicates of the draws.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub draws: Option<usize>,
    /// Monte Carlo only: standard error of `expected_selected_count`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub expected_selected_count_se: Option<f64>,
    /// Monte Carlo only: binomial standard error of `empty_probability`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub empty_probability_se: Option<f64>,
    /// Monte Carlo only: the largest binomial standard error of a unit's selection
    /// probability.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub selection_probability_se_max: Option<f64>,
    /// Per pool unit, in input order: probability of being selected over the draw.
    #[serde(skip)]
    pub selection_probability: Vec<f64>,
}

impl DrawSummary {
    /// True when the shortlist does not depend on the draw: every unit's selection
    /// probability is 0 or 1.
    pub fn is_fixed(&self) -> bool {
        self.selection_probability
            .iter()
            .all(|&p| p == 0.0 || p == 1.0)
    }

    /// The most likely size and its probability (the smallest size among equals).
    pub fn most_likely_size(&self) -> (usize, f64) {
        self.sizes.iter().fold((0, f64::NEG_INFINITY), |best, s| {
            if s.probability > best.1 {
                (s.size, s.probability)
            } else {
                best
            }
        })
    }
}

/// A selection decided without a draw: probabilities 0 or 1.
pub fn fixed_selection(selected: &[bool]) -> DrawSummary {
    let count = selected.iter().filter(|&&s| s).count();
    DrawSummary {
        method: DrawMethod::NoDraw,
        expected_selected_count: count as f64,
        empty_probability: if count == 0 { 1.0 } else { 0.0 },
        sizes: vec![SizeProbability {
            size: count,
            probability: 1.0,
        }],
        draws: None,
        expected_selected_count_se: None,
        empty_probability_se: None,
        selection_probability_se_max: None,
        selection_probability: selected.iter().map(|&s| f64::from(u8::from(s))).collect(),
    }
}

/// Exact consequences of homogeneous pruning (one shared `xi ~ Uniform(0, 1)`).
///
/// # Formula
/// `P(|R| >= r) = min(1, max_{r' >= r} r' / K_(r'))` over the sorted counts of the first
/// step; a unit whose count first appears at sorted position `a` is selected with
/// probability `P(|R| >= a)` (module docs).
///
/// # Panics
/// If `first_step` and `counts` differ in length, or a first-step count is 0.
///
/// # Examples
/// ```
/// use weighbridge::selection::draw::homogeneous_draw;
/// // Two first-step units with K = 4: the shortlist is both with probability 2/4.
/// let d = homogeneous_draw(&[true, true, false], &[4, 4, 9]);
/// assert_eq!(d.empty_probability, 0.5);
/// assert_eq!(d.selection_probability, vec![0.5, 0.5, 0.0]);
/// ```
pub fn homogeneous_draw(first_step: &[bool], counts: &[usize]) -> DrawSummary {
    assert_eq!(first_step.len(), counts.len(), "first_step / counts length");
    let mut sorted: Vec<usize> = first_step
        .iter()
        .zip(counts)
        .filter(|(&in_r1, _)| in_r1)
        .map(|(_, &k)| k)
        .collect();
    assert!(sorted.iter().all(|&k| k >= 1), "a first-step count is 0");
    sorted.sort_unstable();
    let s = sorted.len();
    // at_least[r - 1] = P(r* >= r) = min(1, suffix max of r'/K_(r')).
    let mut at_least = vec![0.0; s];
    let mut running = 0.0_f64;
    for r in (1..=s).rev() {
        running = running.max(r as f64 / sorted[r - 1] as f64);
        at_least[r - 1] = running.min(1.0);
    }
    // `+ 0.0`: an empty sum is -0.0, which would print as "-0.0".
    let expected: f64 = at_least.iter().sum::<f64>() + 0.0;
    let non_empty = at_least.first().copied().unwrap_or(0.0);
    let mut sizes = Vec::new();
    if non_empty < 1.0 {
        sizes.push(SizeProbability {
            size: 0,
            probability: 1.0 - non_empty,
        });
    }
    for r in 1..=s {
        let next = at_least.get(r).copied().unwrap_or(0.0);
        let probability = at_least[r - 1] - next;
        if probability > 0.0 {
            sizes.push(SizeProbability {
                size: r,
                probability,
            });
        }
    }
    let selection_probability = first_step
        .iter()
        .zip(counts)
        .map(|(&in_r1, &k)| {
            if in_r1 {
                // First sorted position (1-based) holding count k.
                let a = sorted.partition_point(|&x| x < k) + 1;
                at_least[a - 1]
            } else {
                0.0
            }
        })
        .collect();
    DrawSummary {
        method: DrawMethod::Exact,
        expected_selected_count: expected,
        empty_probability: 1.0 - non_empty,
        sizes,
        draws: None,
        expected_selected_count_se: None,
        empty_probability_se: None,
        selection_probability_se_max: None,
        selection_probability,
    }
}

/// The number of Monte Carlo replicates for heterogeneous pruning on a pool of `m` units
/// with `s` first-step units: about three unit-steps per pool unit (a replicate costs
/// about `s` steps of a few nanoseconds, the run itself a few hundred nanoseconds per pool
/// unit, so this keeps the estimate near 5% of the run; small runs get at least 2*10^6
/// steps, a few milliseconds), at least 200 and at most 10^4.
pub fn monte_carlo_draws(m: usize, s: usize) -> usize {
    const MIN: usize = 200;
    const MAX: usize = 10_000;
    if s == 0 {
        return MIN;
    }
    ((3 * m).max(2_000_000) / s).clamp(MIN, MAX)
}

/// Replicates per independently seeded chunk, so results do not depend on the thread count.
const CHUNK: usize = 50;

/// Seeded Monte Carlo consequences of heterogeneous pruning (independent `xi_j`).
///
/// # Formula
/// Per replicate: `r_j = max(1, ceil(xi_j K_j))` for `j in R1`, `r* = max{r : #{r_j <= r}
/// >= r}`, unit `j` selected when `r_j <= r*` (module docs). Probabilities are replicate
/// frequencies; standard errors are binomial (`sqrt(p (1 - p) / N)`) and, for the expected
/// size, the replicate standard deviation over `sqrt(N)`.
///
/// # Panics
/// If `first_step` and `counts` differ in length or `draws` is 0.
pub fn heterogeneous_draw(
    first_step: &[bool],
    counts: &[usize],
    draws: usize,
    seed: u64,
) -> DrawSummary {
    assert_eq!(first_step.len(), counts.len(), "first_step / counts length");
    assert!(draws > 0, "at least one Monte Carlo replicate");
    let members: Vec<usize> = (0..first_step.len()).filter(|&j| first_step[j]).collect();
    let s = members.len();
    let keys: Vec<f64> = members.iter().map(|&j| counts[j] as f64).collect();
    let chunks = draws.div_ceil(CHUNK);
    let tallies: Vec<Tally> = (0..chunks)
        .into_par_iter()
        .map(|chunk| {
            let mut rng = ChaCha20Rng::seed_from_u64(seed);
            rng.set_stream(0x100 + chunk as u64);
            let replicates = CHUNK.min(draws - chunk * CHUNK);
            let mut tally = Tally::new(s);
            let mut ranks = vec![0usize; s];
            let mut passing = vec![0usize; s + 2];
            for _ in 0..replicates {
                passing.iter_mut().for_each(|c| *c = 0);
                for (rank, &k) in ranks.iter_mut().zip(&keys) {
                    let key = rng.gen::<f64>() * k;
                    *rank = (key.ceil() as usize).clamp(1, s + 1);
                    passing[*rank] += 1;
                }
                let mut cumulative = 0;
                let mut r_star = 0;
                for (r, &c) in passing.iter().enumerate().take(s + 1).skip(1) {
                    cumulative += c;
                    if cumulative >= r {
                        r_star = r;
                    }
                }
                for (hits, &rank) in tally.unit_hits.iter_mut().zip(&ranks) {
                    *hits += u64::from(rank <= r_star);
                }
                tally.size_hits[r_star] += 1;
                tally.size_sum += r_star as f64;
                tally.size_sum_sq += (r_star * r_star) as f64;
            }
            tally
        })
        .collect();
    let mut total = Tally::new(s);
    for t in tallies {
        total.add(&t);
    }
    let n = draws as f64;
    let frequency = |hits: u64| hits as f64 / n;
    let binomial_se = |p: f64| (p * (1.0 - p) / n).sqrt();
    let mean = total.size_sum / n;
    let variance = if draws > 1 {
        ((total.size_sum_sq - n * mean * mean) / (n - 1.0)).max(0.0)
    } else {
        0.0
    };
    let empty = frequency(total.size_hits[0]);
    let sizes = (0..=s)
        .filter(|&r| total.size_hits[r] > 0)
        .map(|r| SizeProbability {
            size: r,
            probability: frequency(total.size_hits[r]),
        })
        .collect();
    let mut selection_probability = vec![0.0; first_step.len()];
    let mut se_max = 0.0_f64;
    for (&j, &hits) in members.iter().zip(&total.unit_hits) {
        let p = frequency(hits);
        selection_probability[j] = p;
        se_max = se_max.max(binomial_se(p));
    }
    DrawSummary {
        method: DrawMethod::MonteCarlo,
        expected_selected_count: mean,
        empty_probability: empty,
        sizes,
        draws: Some(draws),
        expected_selected_count_se: Some((variance / n).sqrt()),
        empty_probability_se: Some(binomial_se(empty)),
        selection_probability_se_max: Some(se_max),
        selection_probability,
    }
}

/// Per-chunk Monte Carlo counts.
struct Tally {
    unit_hits: Vec<u64>,
    size_hits: Vec<u64>,
    size_sum: f64,
    size_sum_sq: f64,
}

impl Tally {
    fn new(s: usize) -> Self {
        Tally {
            unit_hits: vec![0; s],
            size_hits: vec![0; s + 1],
            size_sum: 0.0,
            size_sum_sq: 0.0,
        }
    }

    fn add(&mut self, other: &Tally) {
        for (a, b) in self.unit_hits.iter_mut().zip(&other.unit_hits) {
            *a += b;
        }
        for (a, b) in self.size_hits.iter_mut().zip(&other.size_hits) {
            *a += b;
        }
        self.size_sum += other.size_sum;
        self.size_sum_sq += other.size_sum_sq;
    }
}

#[cfg(test)]
// The brute-force checks index several parallel arrays by unit.
#[allow(clippy::needless_range_loop)]
mod tests {
    use super::*;

    /// The pruning rule itself (design.md 2.4), as `fdr::prune` applies it.
    fn prune_size(keys: &[(usize, f64)]) -> (usize, Vec<bool>) {
        let mut k: Vec<f64> = keys.iter().map(|&(c, xi)| xi * c as f64).collect();
        let unsorted = k.clone();
        k.sort_by(f64::total_cmp);
        let r = (1..=k.len())
            .rev()
            .find(|&r| k[r - 1] <= r as f64)
            .unwrap_or(0);
        (r, unsorted.iter().map(|&x| x <= r as f64).collect())
    }

    fn lcg(state: &mut u64) -> u64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        *state >> 33
    }

    #[test]
    fn two_tied_units() {
        let d = homogeneous_draw(&[true, true, false], &[4, 4, 9]);
        assert_eq!(d.empty_probability, 0.5);
        assert_eq!(d.expected_selected_count, 1.0);
        assert_eq!(d.selection_probability, vec![0.5, 0.5, 0.0]);
        assert_eq!(
            d.sizes,
            vec![
                SizeProbability {
                    size: 0,
                    probability: 0.5
                },
                SizeProbability {
                    size: 2,
                    probability: 0.5
                }
            ]
        );
    }

    #[test]
    fn homogeneous_matches_a_fine_grid_of_draws() {
        // Brute force: apply the pruning rule at 20,000 evenly spaced draws (midpoints, so
        // no draw sits on a boundary r / K) and compare frequencies with the exact values;
        // a boundary can fall in one grid cell per distinct r / K, so the tolerance is the
        // number of distinct ratios times one cell.
        let mut state = 7u64;
        for case in 0..300 {
            let m = 1 + (lcg(&mut state) % 12) as usize;
            let first: Vec<bool> = (0..m).map(|_| lcg(&mut state) % 3 != 0).collect();
            let top = 1 + (lcg(&mut state) % 30) as usize;
            let counts: Vec<usize> = (0..m)
                .map(|_| 1 + (lcg(&mut state) as usize % top))
                .collect();
            let d = homogeneous_draw(&first, &counts);
            let grid = 20_000;
            let mut unit = vec![0.0; m];
            let mut size_freq = std::collections::BTreeMap::new();
            let mut mean = 0.0;
            for g in 0..grid {
                let xi = (g as f64 + 0.5) / grid as f64;
                let keys: Vec<(usize, f64)> = (0..m)
                    .filter(|&j| first[j])
                    .map(|j| (counts[j], xi))
                    .collect();
                let (r, chosen) = prune_size(&keys);
                *size_freq.entry(r).or_insert(0.0) += 1.0 / grid as f64;
                mean += r as f64 / grid as f64;
                let mut it = chosen.into_iter();
                for j in 0..m {
                    if first[j] && it.next().unwrap() {
                        unit[j] += 1.0 / grid as f64;
                    }
                }
            }
            let tol = (m as f64 + 1.0) / grid as f64 + 1e-12;
            for j in 0..m {
                assert!(
                    (unit[j] - d.selection_probability[j]).abs() <= tol,
                    "case {case} unit {j}: grid {} exact {}",
                    unit[j],
                    d.selection_probability[j]
                );
            }
            assert!((mean - d.expected_selected_count).abs() <= m as f64 * tol);
            let empty = size_freq.get(&0).copied().unwrap_or(0.0);
            assert!((empty - d.empty_probability).abs() <= tol);
            let total: f64 = d.sizes.iter().map(|s| s.probability).sum();
            assert!((total - 1.0).abs() < 1e-12);
            for s in &d.sizes {
                let f = size_freq.get(&s.size).copied().unwrap_or(0.0);
                assert!(
                    (f - s.probability).abs() <= tol,
                    "case {case} size {}",
                    s.size
                );
            }
        }
    }

    #[test]
    fn heterogeneous_monte_carlo_is_close_to_brute_force() {
        // Two units, K = (2, 2): the shortlist is both when both xi <= 1 (always true for
        // r = 2 since xi K <= 2), so always both: probability 1.
        let d = heterogeneous_draw(&[true, true], &[2, 2], 1000, 1);
        assert_eq!(d.empty_probability, 0.0);
        assert_eq!(d.selection_probability, vec![1.0, 1.0]);
        // One unit with K = 4: selected when xi <= 1/4.
        let d = heterogeneous_draw(&[true], &[4], 20_000, 3);
        let se = d.empty_probability_se.unwrap();
        assert!((d.empty_probability - 0.75).abs() < 4.0 * se);
        // Deterministic across chunking: same seed, same numbers.
        let again = heterogeneous_draw(&[true], &[4], 20_000, 3);
        assert_eq!(again.empty_probability, d.empty_probability);
    }

    #[test]
    fn heterogeneous_matches_a_grid_over_two_and_three_draws() {
        // Brute force over a grid of independent draws (midpoints) for s = 2 and 3, against
        // the Monte Carlo estimate within 4 binomial SE plus the grid's resolution.
        for (first, counts) in [
            (vec![true, true], vec![3usize, 5]),
            (vec![true, true, true], vec![2, 6, 6]),
            (vec![true, false, true, true], vec![4, 9, 4, 7]),
        ] {
            let members: Vec<usize> = (0..first.len()).filter(|&j| first[j]).collect();
            let s = members.len();
            let g: usize = if s == 2 { 400 } else { 60 };
            let cells = g.pow(s as u32);
            let mut unit = vec![0.0; first.len()];
            let mut empty = 0.0;
            for cell in 0..cells {
                let mut rest = cell;
                let keys: Vec<(usize, f64)> = members
                    .iter()
                    .map(|&j| {
                        let xi = ((rest % g) as f64 + 0.5) / g as f64;
                        rest /= g;
                        (counts[j], xi)
                    })
                    .collect();
                let (r, chosen) = prune_size(&keys);
                if r == 0 {
                    empty += 1.0 / cells as f64;
                }
                for (&j, c) in members.iter().zip(chosen) {
                    if c {
                        unit[j] += 1.0 / cells as f64;
                    }
                }
            }
            let d = heterogeneous_draw(&first, &counts, 40_000, 11);
            let tol = 4.0 * d.selection_probability_se_max.unwrap().max(0.0025) + 2.0 / g as f64;
            for j in 0..first.len() {
                assert!(
                    (unit[j] - d.selection_probability[j]).abs() <= tol,
                    "unit {j}: grid {} mc {}",
                    unit[j],
                    d.selection_probability[j]
                );
            }
            assert!((empty - d.empty_probability).abs() <= tol);
        }
    }

    #[test]
    fn no_first_step_units() {
        let d = homogeneous_draw(&[false, false], &[3, 3]);
        assert_eq!(d.empty_probability, 1.0);
        assert_eq!(d.expected_selected_count, 0.0);
        assert!(
            d.expected_selected_count.is_sign_positive(),
            "prints as 0, not -0"
        );
        let d = heterogeneous_draw(&[false], &[3], 200, 1);
        assert_eq!(d.empty_probability, 1.0);
    }
}
