//! Pruning of the first-step set `R1` of conditional calibration (Jin & Candes 2023,
//! design.md 2.4): `r* = max{r : #{j in R1 : xi_j K_j <= r} >= r}`,
//! `R = {j in R1 : xi_j K_j <= r*}`, with `xi_j` one shared uniform draw (homogeneous),
//! independent uniform draws (heterogeneous) or 1 (deterministic).

use rand::Rng;
use serde::Serialize;

use crate::random::{stream, Stream};

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

/// Prune the first-step set `first_step` with the draws `pruning` asks for, taken from the
/// pruning stream of `seed`: returns `R` as a mask, `r*` and the shared draw of homogeneous
/// pruning.
pub fn prune_with(
    pruning: Pruning,
    first_step: &[bool],
    counts: &[usize],
    seed: u64,
) -> (Vec<bool>, usize, Option<f64>) {
    let m = first_step.len();
    let mut rng = stream(seed, Stream::Pruning);
    match pruning {
        Pruning::Deterministic => {
            let (s, r) = prune(first_step, counts, |_| 1.0);
            (s, r, None)
        }
        Pruning::Homogeneous => {
            let xi: f64 = rng.gen();
            let (s, r) = prune(first_step, counts, |_| xi);
            (s, r, Some(xi))
        }
        Pruning::Heterogeneous => {
            // One draw per pool unit in input order, whether or not it is in R1, so a
            // unit's draw does not depend on the others' first-step outcomes.
            let draws: Vec<f64> = (0..m).map(|_| rng.gen()).collect();
            let (s, r) = prune(first_step, counts, |j| draws[j]);
            (s, r, None)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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
}
