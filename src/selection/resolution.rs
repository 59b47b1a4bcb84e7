//! Why a shortlist can be a draw: the resolution of the labeled set (design.md 2.2, 2.4).
//!
//! A pool unit with no labeled score at or below its own score (`sum_i w_i 1{V_i <= Vh_j}
//! = 0`) has its conservative p-value at the floor `w_j / (W + w_j)`: the labeled set
//! cannot rank such units against each other (for the clipped score: units predicted
//! above every labeled inactive). When many pool units sit there, every first-step unit
//! of conditional calibration has a large `K_j` and homogeneous pruning keeps all of
//! them or none. No BH line `q k / m` can be met by fewer than
//! `ceil(m * min_j w_j / (W + w_j) / q)` units, since every p-value is at least its floor.

use serde::Serialize;

use crate::conformal::pvalue::CalibrationSet;
use crate::selection::bh::{bh_level, within_level};

/// The resolution diagnostic of one run.
#[derive(Clone, Debug, Serialize)]
pub struct Resolution {
    /// Pool units with no labeled score at or below theirs (p-value at its floor).
    pub floor_count: usize,
    /// Of those, how many passed conditional calibration's first step (null otherwise).
    pub first_step_floor_count: Option<usize>,
    /// The smallest floor `w_j / (W + w_j)` over every pool unit.
    pub smallest_floor_pvalue: f64,
    /// `ceil(m * smallest_floor_pvalue / q)`, decided by the one comparison rule: no BH line
    /// on conservative p-values can be met by fewer units (above m: none can be met).
    pub bh_needs_at_least: usize,
    /// How many floor units a uniform random sample must hold so that, with probability
    /// 0.95, at least one of them is inactive (a labeled null score among the floor units,
    /// the first thing the labeled set needs to rank them), taking a share q of them as
    /// inactive as the planning value: `min(floor_count, ceil(ln 0.05 / ln(1 - q)))`
    /// (binomial; 0 when there are no floor units or q = 1).
    pub floor_sample_for_one_null: usize,
    /// Levels (of the level curve, or the run's own when no curve was computed) at which
    /// conditional calibration's shortlist does not depend on the draw.
    pub stable_levels: Vec<f64>,
    /// The same in plain words, with what would change it.
    pub reading: String,
}

/// Is pool score `v` below every labeled score (p-value at its floor)?
pub fn at_floor(calibration: &CalibrationSet, v: f64) -> bool {
    // Labeled weights are positive, so "no labeled weight at or below v" is "v below the
    // smallest labeled score".
    calibration
        .sorted_scores()
        .first()
        .map_or(true, |&lowest| v < lowest)
}

/// Compute the resolution diagnostic (`stable_levels` and `reading` are filled by the
/// caller, which knows the draw).
///
/// `pool_weights = None` means every weight is 1. `first_step` is conditional
/// calibration's first-step set when the run has one.
pub fn resolution(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    first_step: Option<&[bool]>,
    q: f64,
) -> Resolution {
    let m = pool_scores.len();
    let weight = |j: usize| pool_weights.map_or(1.0, |w| w[j]);
    let floor: Vec<bool> = pool_scores
        .iter()
        .map(|&v| at_floor(calibration, v))
        .collect();
    let floor_count = floor.iter().filter(|&&f| f).count();
    let first_step_floor_count = first_step.map(|r1| (0..m).filter(|&j| floor[j] && r1[j]).count());
    let smallest_weight = (0..m).map(weight).fold(f64::INFINITY, f64::min);
    resolution_of_counts(
        calibration.total_weight(),
        m,
        floor_count,
        first_step_floor_count,
        smallest_weight,
        q,
    )
}

/// [`resolution`] from its counts (the streamed selection gathers them pass by pass):
/// the floor units, those of them in the first step, and the smallest pool weight.
pub fn resolution_of_counts(
    total: f64,
    m: usize,
    floor_count: usize,
    first_step_floor_count: Option<usize>,
    smallest_weight: f64,
    q: f64,
) -> Resolution {
    // The smallest floor is the one of the smallest weight (w / (W + w) increases in w).
    let smallest_floor_pvalue = smallest_weight / (total + smallest_weight);
    let guess = (m as f64 * smallest_floor_pvalue / q)
        .ceil()
        .clamp(1.0, (m + 1) as f64) as usize;
    let passes =
        |k: usize| within_level(smallest_weight, total + smallest_weight, bh_level(q, k, m));
    let mut k = guess;
    while k > 1 && passes(k - 1) {
        k -= 1;
    }
    while k <= m && !passes(k) {
        k += 1;
    }
    let floor_sample_for_one_null = if floor_count == 0 || q >= 1.0 {
        0
    } else {
        ((0.05f64.ln() / (1.0 - q).ln()).ceil() as usize).min(floor_count)
    };
    Resolution {
        floor_count,
        floor_sample_for_one_null,
        first_step_floor_count,
        smallest_floor_pvalue,
        bh_needs_at_least: k,
        stable_levels: vec![],
        reading: String::new(),
    }
}

/// The plain-words reading of a resolution diagnostic for a run whose shortlist does or
/// does not depend on the draw.
pub fn reading(r: &Resolution, m: usize, q: f64, depends_on_draw: bool) -> String {
    let mut text = format!(
        "{} of {m} pool units have no labeled score at or below their own (for the clipped score: \
         predicted above every labeled inactive), so their \
         p-values sit at the floor w/(W+w) and the labeled set cannot rank them against each \
         other. No BH line at FDR {} can be met by fewer than {} units.",
        r.floor_count,
        super::level_text(q),
        r.bh_needs_at_least
    );
    if depends_on_draw {
        if let Some(first) = r.first_step_floor_count {
            text.push_str(&format!(
                " {first} of the floor units passed the first step; because the labeled set \
                 cannot tell them apart, pruning keeps them together or drops them together."
            ));
        }
        text.push_str(
            " What would change it: labeled outcomes among those floor units. Assay a random \
             sample of them, drawn with known inclusion probabilities (a calibration batch), \
             so that inactive ones among them give the labeled set scores to rank the rest \
             against; a higher FDR level (see the level curve) can also give a fixed shortlist.",
        );
        if r.floor_sample_for_one_null > 0 {
            text.push_str(&format!(
                " If a share {q} of the floor units is inactive (a planning value), a random \
                 sample of {} of them holds at least one inactive with probability 0.95; \
                 ranking them finely needs several such scores, so plan for a multiple of that.",
                r.floor_sample_for_one_null
            ));
        }
    }
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn floor_units_counted_by_hand() {
        // Labeled scores 0, 1, 2 (weights 1): pool scores -1 and -0.5 are below all of them.
        let cal = CalibrationSet::new(&[0.0, 1.0, 2.0], None).unwrap();
        let r = resolution(&cal, &[-1.0, -0.5, 0.0, 3.0], None, None, 0.5);
        assert_eq!(r.floor_count, 2);
        // Floor 1/4; ceil(4 * 0.25 / 0.5) = 2, and 0.25 <= 0.5 * 2 / 4 is an exact tie.
        assert_eq!(r.smallest_floor_pvalue, 0.25);
        assert_eq!(r.bh_needs_at_least, 2);
        // 1 - 0.5^k >= 0.95 first at k = 5, capped at the 2 floor units.
        assert_eq!(r.floor_sample_for_one_null, 2);
    }

    #[test]
    fn sample_for_one_null_score_by_hand() {
        // 1 - 0.9^k >= 0.95: 0.9^28 = 0.0523, 0.9^29 = 0.0471, so k = 29 (binomial).
        let cal = CalibrationSet::new(&[0.0], None).unwrap();
        let pool = vec![-1.0; 100];
        let r = resolution(&cal, &pool, None, None, 0.1);
        assert_eq!(r.floor_sample_for_one_null, 29);
    }

    #[test]
    fn bh_needs_more_than_m_when_no_line_can_be_met() {
        let cal = CalibrationSet::new(&[0.0], None).unwrap();
        // Floor 1/2 > q = 0.1 even at k = m.
        let r = resolution(&cal, &[-1.0, -2.0], None, None, 0.1);
        assert_eq!(r.bh_needs_at_least, 3);
    }
}
