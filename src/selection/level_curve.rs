//! The level curve: what conditional calibration and BH would select at a grid of FDR
//! levels, for the same data and seed (design.md 2.3, 2.4).
//!
//! Per level q: conditional calibration's expected shortlist size and empty probability
//! over the pruning draw (`crate::selection::draw`), and `bh_count`, what `--procedure bh`
//! selects with the same seed (BH on the randomized weighted p-values). The FDR guarantee
//! holds for a level chosen before looking at the shortlist; the curve shows what a level
//! buys, not a licence to pick the level after the fact.

use serde::Serialize;

use crate::conformal::pvalue::{CalibrationSet, PoolPValues};
use crate::selection::bh::{bh_count, SelectionError};
use crate::selection::conditional::{select_with_counts, PreparedPool};
use crate::selection::draw::{
    fixed_selection, heterogeneous_draw, homogeneous_draw, monte_carlo_draws, DrawSummary,
};
use crate::selection::pruning::Pruning;

/// The levels every curve holds (the run's own level is added).
pub const CURVE_LEVELS: [f64; 5] = [0.05, 0.1, 0.2, 0.3, 0.5];

/// Pools up to this size get the curve by default; larger ones only on request.
pub const DEFAULT_CURVE_MAX_POOL: usize = 100_000;

/// One level of the curve.
#[derive(Clone, Debug, Serialize)]
pub struct LevelPoint {
    /// The FDR level q.
    pub fdr: f64,
    /// Conditional calibration: expected shortlist size over the pruning draw.
    pub conditional_expected_count: f64,
    /// Conditional calibration: probability of an empty shortlist over the draw.
    pub conditional_empty_probability: f64,
    /// True when conditional calibration's shortlist does not depend on the draw.
    pub conditional_fixed: bool,
    /// What `--procedure bh` selects with the same seed (randomized weighted p-values).
    pub bh_count: usize,
}

/// The levels of a curve for a run at level `q`: [`CURVE_LEVELS`] and `q`, ascending.
pub fn curve_levels(q: f64) -> Vec<f64> {
    let mut levels: Vec<f64> = CURVE_LEVELS.to_vec();
    if !levels.contains(&q) {
        levels.push(q);
    }
    levels.sort_by(f64::total_cmp);
    levels
}

/// The draw's consequences for one conditional-calibration result, as the pipeline
/// computes them (the same functions and seed, so the curve at the run's level equals the
/// run).
pub fn draw_of(
    first_step: &[bool],
    counts: &[usize],
    selected: &[bool],
    pruning: Pruning,
    seed: u64,
) -> DrawSummary {
    match pruning {
        Pruning::Homogeneous => homogeneous_draw(first_step, counts),
        Pruning::Heterogeneous => {
            let s = first_step.iter().filter(|&&f| f).count();
            heterogeneous_draw(
                first_step,
                counts,
                monte_carlo_draws(first_step.len(), s),
                seed,
            )
        }
        Pruning::Deterministic => fixed_selection(selected),
    }
}

/// The level curve.
///
/// `conservative` are the conservative p-values (conditional calibration needs them);
/// `randomized` the randomized p-values of the same seed (for `bh_count`). `known` is a
/// level whose conditional-calibration draw the caller already has (the run's own), which
/// is then not computed again.
///
/// # Errors
/// Bad levels, weights or scores (as the procedures themselves).
#[allow(clippy::too_many_arguments)]
pub fn level_curve(
    calibration: &CalibrationSet,
    pool_scores: &[f64],
    pool_weights: Option<&[f64]>,
    conservative: &PoolPValues,
    randomized: &[f64],
    levels: &[f64],
    pruning: Pruning,
    seed: u64,
    known: Option<(f64, &DrawSummary)>,
) -> Result<Vec<LevelPoint>, SelectionError> {
    // Sorted once; only the level-dependent thresholds are recomputed per level.
    let mut prepared = PreparedPool::new(calibration, pool_scores, pool_weights)?;
    levels
        .iter()
        .map(|&q| {
            let computed;
            let draw = match known {
                Some((level, draw)) if level == q => draw,
                _ => {
                    let cc =
                        select_with_counts(prepared.counts(q)?, conservative, q, pruning, seed);
                    computed = draw_of(
                        &cc.first_step,
                        &cc.conditional_count,
                        &cc.selected,
                        pruning,
                        seed,
                    );
                    &computed
                }
            };
            Ok(LevelPoint {
                fdr: q,
                conditional_expected_count: draw.expected_selected_count,
                conditional_empty_probability: draw.empty_probability,
                conditional_fixed: draw.is_fixed(),
                bh_count: bh_count(randomized, q)?,
            })
        })
        .collect()
}
