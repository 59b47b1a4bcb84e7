//! Conformity scores for "is the unseen outcome above its threshold?" screens.
//!
//! A score `V(x, y)` must be nondecreasing in `y`. Labeled units get `V_i = V(X_i, Y_i)`;
//! pool units, whose outcome is unknown, get the score imputed at their threshold,
//! `Vh_j = V(X_j, c_j)` (design.md section 2.1).
//!
//! * residual: `V = y - mu(x)`.
//! * clipped: `V = +inf` if `y > c`, else `c - mu(x)`; for the pool `Vh_j = c_j - mu(X_j)`.
//!   The "above every finite score" constant is `f64::INFINITY`: every comparison the
//!   p-values make (`<`, `<=`) treats it correctly, and it never reaches an output file.
//!   Usually the most powerful choice for a fixed threshold (Jin & Candes, JMLR 2023).
//!
//! Binary outcomes (0/1 with a predicted probability and threshold 0.5) need nothing
//! special: the clipped score applies directly.
//!
//! Lower-is-better screens (`--lower-is-better`, [`Direction::Below`]: a unit is interesting
//! when its outcome is *below* `c`, as for potency in nM) are handled here and only here: the
//! scores are those of the same screen with every outcome, prediction and threshold negated
//! (`y < c` is `-y > -c`), so every later step (p-values, BH, conditional calibration) is
//! unchanged:
//!
//! * residual: `V = mu(x) - y`;
//! * clipped: `V = +inf` if `y < c`, else `mu(x) - c`; for the pool `Vh_j = mu(X_j) - c_j`.

use serde::Serialize;

/// Which score function turns (outcome, prediction, threshold) into a conformity score.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ScoreKind {
    /// `V = +inf` when the outcome exceeds its threshold, else `c - mu(x)`.
    Clipped,
    /// `V = y - mu(x)`.
    Residual,
}

impl ScoreKind {
    /// The name used on the command line and in summaries.
    pub fn name(self) -> &'static str {
        match self {
            ScoreKind::Clipped => "clipped",
            ScoreKind::Residual => "residual",
        }
    }

    /// Score of a labeled unit with outcome `y`, threshold `c` and prediction `mu`.
    ///
    /// # Formula
    /// residual: `y - mu`; clipped: `+inf` if `y > c`, else `c - mu` (design.md 2.1).
    ///
    /// # Examples
    /// ```
    /// use weighbridge::conformal::score::ScoreKind;
    /// assert_eq!(ScoreKind::Residual.labeled_score(3.0, 2.0, 1.5), 1.5);
    /// assert_eq!(ScoreKind::Clipped.labeled_score(3.0, 2.0, 1.5), f64::INFINITY);
    /// assert_eq!(ScoreKind::Clipped.labeled_score(1.0, 2.0, 1.5), 0.5);
    /// ```
    pub fn labeled_score(self, y: f64, c: f64, mu: f64) -> f64 {
        match self {
            ScoreKind::Residual => y - mu,
            ScoreKind::Clipped => {
                if y > c {
                    f64::INFINITY
                } else {
                    c - mu
                }
            }
        }
    }

    /// Score of a pool unit imputed at its threshold: `c - mu` for both score kinds.
    pub fn pool_score(self, c: f64, mu: f64) -> f64 {
        c - mu
    }

    /// [`labeled_score`](Self::labeled_score) for a screen whose interesting side is
    /// `direction`.
    ///
    /// # Formula
    /// Above: as `labeled_score`. Below: the score of `(-y, -c, -mu)` above, i.e. residual
    /// `mu - y`; clipped `+inf` if `y < c`, else `mu - c`.
    ///
    /// # Examples
    /// ```
    /// use weighbridge::conformal::score::{Direction, ScoreKind};
    /// let below = Direction::Below;
    /// assert_eq!(ScoreKind::Clipped.labeled_score_toward(below, 50.0, 100.0, 80.0), f64::INFINITY);
    /// assert_eq!(ScoreKind::Clipped.labeled_score_toward(below, 150.0, 100.0, 80.0), -20.0);
    /// assert_eq!(ScoreKind::Residual.labeled_score_toward(below, 150.0, 100.0, 80.0), -70.0);
    /// ```
    pub fn labeled_score_toward(self, direction: Direction, y: f64, c: f64, mu: f64) -> f64 {
        match direction {
            Direction::Above => self.labeled_score(y, c, mu),
            Direction::Below => self.labeled_score(-y, -c, -mu),
        }
    }

    /// [`pool_score`](Self::pool_score) for a screen whose interesting side is `direction`:
    /// `c - mu` above, `mu - c` below.
    pub fn pool_score_toward(self, direction: Direction, c: f64, mu: f64) -> f64 {
        match direction {
            Direction::Above => self.pool_score(c, mu),
            Direction::Below => self.pool_score(-c, -mu),
        }
    }
}

/// Which side of the threshold makes a unit interesting: `Above` (the default, "outcome
/// exceeds c") or `Below` (`--lower-is-better`: "outcome below c", for potency in nM,
/// clearance, toxicity).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Direction {
    #[default]
    Above,
    Below,
}

impl Direction {
    /// "above" or "below", as outputs and messages say it ("below 100").
    pub fn word(self) -> &'static str {
        match self {
            Direction::Above => "above",
            Direction::Below => "below",
        }
    }

    /// Is outcome `y` on the interesting side of threshold `c` (strictly: equal is neither
    /// above nor below)?
    pub fn is_interesting(self, y: f64, c: f64) -> bool {
        match self {
            Direction::Above => y > c,
            Direction::Below => y < c,
        }
    }
}

/// Thresholds: one value for every unit, or one per unit.
#[derive(Clone, Copy, Debug)]
pub enum Thresholds<'a> {
    /// The same threshold for every unit (`--threshold VALUE`).
    Constant(f64),
    /// One threshold per unit, in the units' order (`--threshold-column NAME`).
    PerUnit(&'a [f64]),
}

impl Thresholds<'_> {
    /// Threshold of unit `index`.
    #[inline]
    pub fn get(&self, index: usize) -> f64 {
        match self {
            Thresholds::Constant(c) => *c,
            Thresholds::PerUnit(values) => values[index],
        }
    }
}

/// Scores of all labeled units (interesting: above the threshold).
///
/// # Panics
/// If `outcome` and `prediction` (or per-unit thresholds) have different lengths.
pub fn labeled_scores(
    kind: ScoreKind,
    outcome: &[f64],
    prediction: &[f64],
    thresholds: Thresholds<'_>,
) -> Vec<f64> {
    labeled_scores_toward(kind, Direction::Above, outcome, prediction, thresholds)
}

/// Imputed scores of all pool units (`c_j - mu(X_j)`; interesting: above the threshold).
pub fn pool_scores(kind: ScoreKind, prediction: &[f64], thresholds: Thresholds<'_>) -> Vec<f64> {
    pool_scores_toward(kind, Direction::Above, prediction, thresholds)
}

/// Scores of all labeled units, for a screen whose interesting side is `direction`.
///
/// # Panics
/// If `outcome` and `prediction` (or per-unit thresholds) have different lengths.
pub fn labeled_scores_toward(
    kind: ScoreKind,
    direction: Direction,
    outcome: &[f64],
    prediction: &[f64],
    thresholds: Thresholds<'_>,
) -> Vec<f64> {
    assert_eq!(
        outcome.len(),
        prediction.len(),
        "outcome/prediction lengths"
    );
    if let Thresholds::PerUnit(values) = thresholds {
        assert_eq!(values.len(), outcome.len(), "threshold length");
    }
    outcome
        .iter()
        .zip(prediction)
        .enumerate()
        .map(|(i, (&y, &mu))| kind.labeled_score_toward(direction, y, thresholds.get(i), mu))
        .collect()
}

/// Imputed scores of all pool units (`c_j - mu(X_j)`; below: `mu(X_j) - c_j`).
pub fn pool_scores_toward(
    kind: ScoreKind,
    direction: Direction,
    prediction: &[f64],
    thresholds: Thresholds<'_>,
) -> Vec<f64> {
    if let Thresholds::PerUnit(values) = thresholds {
        assert_eq!(values.len(), prediction.len(), "threshold length");
    }
    prediction
        .iter()
        .enumerate()
        .map(|(j, &mu)| kind.pool_score_toward(direction, thresholds.get(j), mu))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // Source for every expectation here: the definitions in design.md 2.1 (hand computation).
    #[test]
    fn clipped_is_infinite_exactly_above_threshold() {
        let s = ScoreKind::Clipped;
        assert_eq!(s.labeled_score(0.5, 0.5, 0.2), 0.3); // y == c is not "above"
        assert!(s.labeled_score(0.500001, 0.5, 0.2).is_infinite());
    }

    #[test]
    fn binary_outcomes_with_probabilities() {
        // active (1) above threshold 0.5 -> +inf; inactive (0) -> 0.5 - p.
        let v = labeled_scores(
            ScoreKind::Clipped,
            &[1.0, 0.0, 0.0],
            &[0.9, 0.8, 0.1],
            Thresholds::Constant(0.5),
        );
        assert!(v[0].is_infinite());
        assert!((v[1] - (-0.3)).abs() < 1e-15);
        assert!((v[2] - 0.4).abs() < 1e-15);
        let p = pool_scores(ScoreKind::Clipped, &[0.9], Thresholds::Constant(0.5));
        assert!((p[0] - (-0.4)).abs() < 1e-15);
    }

    #[test]
    fn scores_are_nondecreasing_in_outcome() {
        for kind in [ScoreKind::Clipped, ScoreKind::Residual] {
            let mut last = f64::NEG_INFINITY;
            for step in 0..200 {
                let y = -5.0 + step as f64 * 0.05;
                let v = kind.labeled_score(y, 1.0, 0.3);
                assert!(v >= last, "{kind:?} decreased at y = {y}");
                last = v;
            }
        }
    }

    #[test]
    fn per_unit_thresholds() {
        let v = labeled_scores(
            ScoreKind::Residual,
            &[1.0, 2.0],
            &[0.5, 0.5],
            Thresholds::PerUnit(&[0.0, 9.0]),
        );
        assert_eq!(v, vec![0.5, 1.5]);
        let p = pool_scores(
            ScoreKind::Residual,
            &[0.5, 0.5],
            Thresholds::PerUnit(&[0.0, 9.0]),
        );
        assert_eq!(p, vec![-0.5, 8.5]);
    }

    #[test]
    fn lower_is_better_is_the_negated_screen() {
        // Reference: the definition in the module documentation (negate y, c and mu and
        // score as above), checked against hand values and over a grid.
        let below = Direction::Below;
        let clipped = ScoreKind::Clipped;
        // Outcome 40 nM with threshold 100: below, interesting.
        assert!(clipped
            .labeled_score_toward(below, 40.0, 100.0, 70.0)
            .is_infinite());
        // Equal is not below.
        assert_eq!(
            clipped.labeled_score_toward(below, 100.0, 100.0, 70.0),
            -30.0
        );
        assert_eq!(clipped.pool_score_toward(below, 100.0, 70.0), -30.0);
        assert_eq!(
            ScoreKind::Residual.labeled_score_toward(below, 40.0, 100.0, 70.0),
            30.0
        );
        for kind in [ScoreKind::Clipped, ScoreKind::Residual] {
            for step in -20..=20 {
                let y = 100.0 + step as f64 * 7.5;
                let (c, mu) = (100.0, 90.0 + step as f64);
                assert_eq!(
                    kind.labeled_score_toward(below, y, c, mu),
                    kind.labeled_score(-y, -c, -mu)
                );
                assert_eq!(
                    kind.labeled_score_toward(Direction::Above, y, c, mu),
                    kind.labeled_score(y, c, mu)
                );
                assert_eq!(
                    kind.pool_score_toward(below, c, mu),
                    kind.pool_score(-c, -mu)
                );
                // Nonincreasing in y below (nondecreasing in -y).
                let lower = kind.labeled_score_toward(below, y - 1.0, c, mu);
                assert!(lower >= kind.labeled_score_toward(below, y, c, mu));
            }
        }
        assert!(below.is_interesting(99.0, 100.0) && !below.is_interesting(100.0, 100.0));
        assert!(Direction::Above.is_interesting(6.6, 6.5));
        assert!(!Direction::Above.is_interesting(6.5, 6.5));
    }
}
