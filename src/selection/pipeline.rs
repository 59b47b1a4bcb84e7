//! The selection pipeline: scores -> weighted conformal p-values -> BH, BY or conditional
//! calibration, for one labeled set and one pool held in memory.
//!
//! Data flows one way (design.md section 3): the caller has read and validated the tables
//! and decided the weights; this module computes scores (`crate::conformal::score`), p-values
//! (`crate::conformal::pvalue`) and the selection (`crate::selection`), and collects the counts and
//! warnings a summary needs. It does no I/O.

use serde::Serialize;
use thiserror::Error;

use crate::conformal::pvalue::{
    pool_pvalues, CalibrationSet, PValueError, PValueKind, PoolPValues,
};
use crate::conformal::score::{
    labeled_scores_toward, pool_scores_toward, Direction, ScoreKind, Thresholds,
};
use crate::selection::bh::{
    self, benjamini_hochberg, benjamini_yekutieli, check_fdr, SelectionError,
};
use crate::selection::conditional::conditional_calibration;
use crate::selection::draw::{fixed_selection, DrawMethod, DrawSummary};
use crate::selection::level_curve::{curve_levels, draw_of, level_curve, LevelPoint};
use crate::selection::pruning::Pruning;
use crate::selection::resolution::{self, Resolution};
use crate::warning::{Level, Warning};

/// Which multiple-testing procedure makes the shortlist.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Procedure {
    /// Conditional calibration with pruning: finite-sample FDR control under covariate
    /// shift with the true weights (design.md 2.4). The default.
    Conditional,
    /// Benjamini–Hochberg on the weighted p-values (no finite-sample proof when weights vary).
    Bh,
    /// Benjamini–Yekutieli: valid under any dependence, less powerful.
    By,
}

impl Procedure {
    /// The name used on the command line and in summaries.
    pub fn name(self) -> &'static str {
        match self {
            Procedure::Conditional => "conditional",
            Procedure::Bh => "bh",
            Procedure::By => "by",
        }
    }

    /// The p-value kind used when the user does not choose one.
    pub fn default_pvalues(self) -> PValueKind {
        match self {
            Procedure::Conditional => PValueKind::Conservative,
            Procedure::Bh | Procedure::By => PValueKind::Randomized,
        }
    }
}

/// What the user asked for; turned into [`SelectSettings`] by [`SelectOptions::check`].
#[derive(Clone, Debug)]
pub struct SelectOptions {
    /// Target FDR level `q`, in (0, 1]. Defaults to 0.1.
    pub fdr: f64,
    /// Defaults to conditional calibration.
    pub procedure: Procedure,
    /// Pruning of conditional calibration; defaults to homogeneous.
    pub pruning: Pruning,
    /// p-value kind; `None` means the procedure's default.
    pub pvalues: Option<PValueKind>,
    /// Defaults to the clipped score.
    pub score: ScoreKind,
    /// Which side of the threshold is interesting; defaults to above. Below
    /// (`--lower-is-better`) changes the scores only (`crate::conformal::score`).
    pub direction: Direction,
    /// Seed of every random draw (randomized p-values, pruning).
    pub seed: u64,
    /// Compute the level curve (`crate::selection::level_curve`): `Some(true)` always,
    /// `Some(false)` never, `None` for pools up to 10^5 units. Defaults to `Some(false)` in
    /// the library (repeated runs such as the calibration check pay nothing); the `select`
    /// command passes `None` (or `Some(true)` with `--level-curve`).
    pub level_curve: Option<bool>,
    /// When every pool unit is unreachable at level q, return an empty selection (with
    /// every unit marked unreachable) instead of [`SelectError::LabeledSetTooSmall`].
    /// Defaults to `false`; `select --allow-unreliable-weights` sets it, so that a run
    /// allowed through on degenerate weights still writes its (empty) shortlist.
    pub empty_when_unreachable: bool,
}

impl Default for SelectOptions {
    fn default() -> Self {
        SelectOptions {
            fdr: 0.1,
            procedure: Procedure::Conditional,
            pruning: Pruning::Homogeneous,
            pvalues: None,
            score: ScoreKind::Clipped,
            direction: Direction::Above,
            seed: crate::random::DEFAULT_SEED,
            level_curve: Some(false),
            empty_when_unreachable: false,
        }
    }
}

/// Checked settings: every combination here is valid.
#[derive(Clone, Debug, Serialize)]
pub struct SelectSettings {
    pub fdr: f64,
    pub procedure: Procedure,
    /// Only for conditional calibration.
    pub pruning: Option<Pruning>,
    pub pvalues: PValueKind,
    pub score: ScoreKind,
    pub direction: Direction,
    pub seed: u64,
}

/// Why a selection cannot be run.
#[derive(Debug, Error, PartialEq)]
#[non_exhaustive]
pub enum SelectError {
    /// The FDR level is not in (0, 1].
    #[error("the FDR level must be in (0, 1], got {0}")]
    FdrOutOfRange(f64),
    /// Conditional calibration was asked for with randomized p-values.
    #[error(
        "conditional calibration needs conservative p-values: its FDR guarantee rests on \
         them (a null unit's recomputed count must equal its oracle version whenever it is \
         selected). Drop --pvalues randomized, or use --procedure bh"
    )]
    ConditionalNeedsConservative,
    /// Lengths of the inputs disagree.
    #[error("{what}: expected {expected} values, got {got}")]
    LengthMismatch {
        what: &'static str,
        expected: usize,
        got: usize,
    },
    /// The pool is empty.
    #[error("the pool has no units")]
    EmptyPool,
    /// No pool unit could be selected at this level whatever its outcome.
    #[error(
        "no pool unit can ever be selected at FDR level {}: the smallest possible p-value \
         is {smallest_floor:.4} (a unit's p-value is at least w_j / (W + w_j); with equal \
         weights 1 / (n + 1) for n = {n_labeled} labeled units). Use a larger labeled set \
         or a higher --fdr",
        super::level_text(*fdr)
    )]
    LabeledSetTooSmall {
        fdr: f64,
        n_labeled: usize,
        smallest_floor: f64,
    },
    /// A score, weight or p-value was rejected.
    #[error(transparent)]
    Selection(#[from] SelectionError),
}

impl From<PValueError> for SelectError {
    fn from(e: PValueError) -> Self {
        SelectError::Selection(SelectionError::PValue(e))
    }
}

impl SelectOptions {
    /// Validate the options.
    ///
    /// # Errors
    /// `fdr` outside (0, 1]; conditional calibration with randomized p-values.
    pub fn check(&self) -> Result<SelectSettings, SelectError> {
        check_fdr(self.fdr).map_err(|_| SelectError::FdrOutOfRange(self.fdr))?;
        let pvalues = self
            .pvalues
            .unwrap_or_else(|| self.procedure.default_pvalues());
        if self.procedure == Procedure::Conditional && pvalues == PValueKind::Randomized {
            return Err(SelectError::ConditionalNeedsConservative);
        }
        Ok(SelectSettings {
            fdr: self.fdr,
            procedure: self.procedure,
            pruning: (self.procedure == Procedure::Conditional).then_some(self.pruning),
            pvalues,
            score: self.score,
            direction: self.direction,
            seed: self.seed,
        })
    }
}

/// The labeled side of a selection, borrowed from the caller's tables.
#[derive(Clone, Copy, Debug)]
pub struct LabeledInput<'a> {
    pub outcome: &'a [f64],
    pub prediction: &'a [f64],
    pub thresholds: Thresholds<'a>,
    /// `None` = every weight 1 (no shift assumed).
    pub weights: Option<&'a [f64]>,
}

/// The pool side of a selection.
#[derive(Clone, Copy, Debug)]
pub struct PoolInput<'a> {
    pub prediction: &'a [f64],
    pub thresholds: Thresholds<'a>,
    /// `None` = every weight 1.
    pub weights: Option<&'a [f64]>,
}

/// Per-unit results, in the pool's input order, and the counts a summary needs.
#[derive(Clone, Debug)]
pub struct SelectionOutcome {
    pub settings: SelectSettings,
    pub n_labeled: usize,
    /// Pool size `m`. The per-unit vectors below have this length, except after a streamed
    /// selection (`select --memory-budget`), which writes the per-unit results as it goes
    /// and leaves them empty.
    pub pool_size: usize,
    /// `W`.
    pub total_labeled_weight: f64,
    /// Imputed pool scores `Vh_j`.
    pub scores: Vec<f64>,
    /// Pool weights `w_j` (1 when none were given).
    pub weights: Vec<f64>,
    /// The p-values the procedure used.
    pub p_values: Vec<f64>,
    pub selected: Vec<bool>,
    /// Conditional calibration only: `p_j <= q K_j / m`.
    pub first_step: Option<Vec<bool>>,
    /// Conditional calibration only: `K_j`.
    pub conditional_count: Option<Vec<usize>>,
    /// `w_j / (W + w_j) > q`: never selectable at this level.
    pub unreachable: Vec<bool>,
    pub selected_count: usize,
    pub first_step_count: Option<usize>,
    /// How many BH at level q selects on the same weighted p-values.
    pub bh_selected_count: usize,
    /// The p-values behind `bh_selected_count`.
    pub bh_pvalues: PValueKind,
    pub unreachable_count: usize,
    /// The shared draw of homogeneous pruning.
    pub pruning_draw: Option<f64>,
    /// True when the given weights are not all equal.
    pub weights_vary: bool,
    /// Kish effective sample size of the labeled weights, `(sum w)^2 / sum w^2`.
    pub labeled_ess: f64,
    /// What the pruning draw does to the shortlist (probabilities over the draw, the run's
    /// p-values held fixed); every probability is 0 or 1 for BH, BY and deterministic
    /// pruning.
    pub draw: DrawSummary,
    /// BH-adjusted p-values (q-values) of the run's own p-values:
    /// `min over k' >= k of p_(k') m / k'`, capped at 1.
    pub q_values: Vec<f64>,
    /// BY-adjusted p-values, for `--procedure by` runs only.
    pub q_values_by: Option<Vec<f64>>,
    /// Why the shortlist can be a draw: pool units at the p-value floor.
    pub resolution: Resolution,
    /// The level curve, when asked for.
    pub level_curve: Option<Vec<LevelPoint>>,
    /// Warnings about the selection, worst first.
    pub warnings: Vec<Warning>,
}

/// Kish (1965) effective sample size `(sum w)^2 / sum w^2`.
///
/// # Examples
/// ```
/// assert_eq!(weighbridge::selection::pipeline::kish_ess(&[1.0, 1.0, 1.0]), 3.0);
/// assert!((weighbridge::selection::pipeline::kish_ess(&[1.0, 3.0]) - 1.6).abs() < 1e-15);
/// ```
///
/// Computed on the weights divided by the power of two below the largest, so that neither
/// the squares of large weights (1e160 squared overflows) nor those of tiny ones (1e-300
/// squared underflows) reach the sums; the ratio is scale-free, so the value is the same.
pub fn kish_ess(weights: &[f64]) -> f64 {
    let max = weights.iter().fold(0.0f64, |a, &b| a.max(b));
    if !(max > 0.0 && max.is_finite()) {
        return 0.0;
    }
    let scale = crate::shift::weights::power_of_two_below(max);
    let (sum, sum_sq) = weights.iter().fold((0.0, 0.0), |(s, s2), &w| {
        let v = w / scale;
        (s + v, s2 + v * v)
    });
    sum * sum / sum_sq
}

fn check_len(what: &'static str, expected: usize, got: usize) -> Result<(), SelectError> {
    if expected == got {
        Ok(())
    } else {
        Err(SelectError::LengthMismatch {
            what,
            expected,
            got,
        })
    }
}

/// Run the selection.
///
/// # Errors
/// Invalid options, mismatched lengths, bad weights, an empty pool, or a level at which no
/// pool unit can ever be selected.
pub fn run_selection(
    options: &SelectOptions,
    labeled: LabeledInput<'_>,
    pool: PoolInput<'_>,
) -> Result<SelectionOutcome, SelectError> {
    let settings = options.check()?;
    let n = labeled.outcome.len();
    let m = pool.prediction.len();
    check_len("labeled predictions", n, labeled.prediction.len())?;
    if let Some(w) = labeled.weights {
        check_len("labeled weights", n, w.len())?;
    }
    if let Some(w) = pool.weights {
        check_len("pool weights", m, w.len())?;
    }
    if m == 0 {
        return Err(SelectError::EmptyPool);
    }
    let q = settings.fdr;

    let labeled_v = labeled_scores_toward(
        settings.score,
        settings.direction,
        labeled.outcome,
        labeled.prediction,
        labeled.thresholds,
    );
    let pool_v = pool_scores_toward(
        settings.score,
        settings.direction,
        pool.prediction,
        pool.thresholds,
    );
    let calibration = CalibrationSet::new(&labeled_v, labeled.weights)?;
    let total = calibration.total_weight();

    let unreachable = bh::unreachable(total, pool.weights, m, q);
    let unreachable_count = unreachable.iter().filter(|&&u| u).count();
    if unreachable_count == m && !options.empty_when_unreachable {
        let smallest_floor = (0..m)
            .map(|j| {
                let w = pool.weights.map_or(1.0, |w| w[j]);
                w / (total + w)
            })
            .fold(f64::INFINITY, f64::min);
        return Err(SelectError::LabeledSetTooSmall {
            fdr: q,
            n_labeled: n,
            smallest_floor,
        });
    }

    let pvalues = pool_pvalues(
        settings.pvalues,
        &calibration,
        &pool_v,
        pool.weights,
        settings.seed,
    )?;
    let p = pvalues.values();
    // BH on the same weighted p-values: the selection of `--procedure bh`, and the count
    // quoted beside the other procedures. (Quoting BH on randomized p-values beside
    // conditional calibration would cost a second p-value pass, about 8% of a 10^6-unit
    // run; the summary names the p-values instead.)
    let bh = benjamini_hochberg(&p, q)?;
    let bh_pvalues = settings.pvalues;

    let mut first_step = None;
    let mut conditional_count = None;
    let mut first_step_count = None;
    let mut pruning_draw = None;
    let selected = match settings.procedure {
        Procedure::Bh => bh.selected.clone(),
        Procedure::By => benjamini_yekutieli(&p, q)?.selected,
        Procedure::Conditional => {
            let pruning = settings.pruning.unwrap_or(Pruning::Homogeneous);
            let cc = conditional_calibration(
                &calibration,
                &pool_v,
                pool.weights,
                &pvalues,
                q,
                pruning,
                settings.seed,
            )?;
            first_step_count = Some(cc.first_step_count);
            pruning_draw = cc.pruning_draw;
            first_step = Some(cc.first_step);
            conditional_count = Some(cc.conditional_count);
            cc.selected
        }
    };
    let selected_count = selected.iter().filter(|&&s| s).count();

    let weights: Vec<f64> = pool.weights.map_or_else(|| vec![1.0; m], <[f64]>::to_vec);
    let weights_vary = weights_vary(labeled.weights, pool.weights);
    let labeled_ess = labeled.weights.map_or(n as f64, kish_ess);
    let draw = match (&first_step, &conditional_count, settings.pruning) {
        (Some(first), Some(counts), Some(pruning)) => {
            draw_of(first, counts, &selected, pruning, settings.seed)
        }
        _ => fixed_selection(&selected),
    };
    let wants_curve = options
        .level_curve
        .unwrap_or(m <= crate::selection::level_curve::DEFAULT_CURVE_MAX_POOL);
    let level_curve = if wants_curve {
        Some(run_level_curve(
            &settings,
            &calibration,
            &pool_v,
            pool.weights,
            &pvalues,
            &draw,
        )?)
    } else {
        None
    };
    let mut resolution = resolution::resolution(
        &calibration,
        &pool_v,
        pool.weights,
        first_step.as_deref(),
        q,
    );
    let depends_on_draw = !draw.is_fixed();
    match &level_curve {
        Some(curve) => {
            resolution.stable_levels = curve
                .iter()
                .filter(|point| point.conditional_fixed)
                .map(|point| point.fdr)
                .collect()
        }
        None if settings.procedure == Procedure::Conditional && !depends_on_draw => {
            resolution.stable_levels.push(q);
        }
        None => {}
    }
    resolution.reading = resolution::reading(&resolution, m, q, depends_on_draw);
    let q_values = bh::bh_adjusted(&p, 1.0)?;
    let q_values_by = if settings.procedure == Procedure::By {
        Some(bh::bh_adjusted(&p, bh::harmonic_number(m))?)
    } else {
        None
    };

    let mut outcome = SelectionOutcome {
        settings,
        n_labeled: n,
        pool_size: m,
        total_labeled_weight: total,
        scores: pool_v,
        weights,
        p_values: p,
        selected,
        first_step,
        conditional_count,
        unreachable,
        selected_count,
        first_step_count,
        bh_selected_count: bh.count,
        bh_pvalues,
        unreachable_count,
        pruning_draw,
        weights_vary,
        labeled_ess,
        draw,
        q_values,
        q_values_by,
        resolution,
        level_curve,
        warnings: vec![],
    };
    outcome.warnings = selection_warnings(&outcome);
    Ok(outcome)
}

/// The level curve of a run: the run's own p-values where they serve (conservative for
/// conditional calibration, randomized for BH), the other kind computed once.
fn run_level_curve(
    settings: &SelectSettings,
    calibration: &CalibrationSet,
    pool_v: &[f64],
    pool_weights: Option<&[f64]>,
    pvalues: &PoolPValues,
    draw: &DrawSummary,
) -> Result<Vec<LevelPoint>, SelectError> {
    let other = |kind| pool_pvalues(kind, calibration, pool_v, pool_weights, settings.seed);
    let (conservative, randomized) = match settings.pvalues {
        PValueKind::Conservative => (pvalues.clone(), other(PValueKind::Randomized)?),
        PValueKind::Randomized => (other(PValueKind::Conservative)?, pvalues.clone()),
    };
    let pruning = settings.pruning.unwrap_or(Pruning::Homogeneous);
    // At the run's own level the curve is the run: its draw is reused, not recomputed.
    let known = (settings.procedure == Procedure::Conditional).then_some((settings.fdr, draw));
    Ok(level_curve(
        calibration,
        pool_v,
        pool_weights,
        &conservative,
        &randomized.values(),
        &curve_levels(settings.fdr),
        pruning,
        settings.seed,
        known,
    )?)
}

fn weights_vary(labeled: Option<&[f64]>, pool: Option<&[f64]>) -> bool {
    let all: Vec<f64> = labeled
        .into_iter()
        .chain(pool)
        .flat_map(|w| w.iter().copied())
        .collect();
    all.windows(2).any(|pair| pair[0] != pair[1])
}

/// Share of the labeled set below which the Kish ESS is flagged (common practice).
pub const ESS_FRACTION_WARNING: f64 = 0.1;

/// Plain-words warnings about the selection itself, most serious first (by level; the
/// order below among equals). Shift diagnostics (AUC, k-hat, balance) add their own
/// warnings when weights are fitted.
///
/// Levels (our choice): unreachable units are `high` above 1% of the pool (the shift
/// diagnostic's `unreachable_share` threshold) and `low` below; a small labeled effective
/// sample size and an empty shortlist no unit could enter are `high`; BH with varying
/// weights, deterministic pruning with varying weights and an empty shortlist are `medium`;
/// a draw-dependent shortlist follows [`draw_level`].
pub(crate) fn selection_warnings(o: &SelectionOutcome) -> Vec<Warning> {
    let m = o.pool_size;
    let q = o.settings.fdr;
    let qt = super::level_text(q);
    let mut warnings = Vec::new();
    if o.unreachable_count > 0 {
        let share = o.unreachable_count as f64 / m as f64;
        let level = if share > crate::shift::warnings::UNREACHABLE_SHARE_HIGH {
            Level::High
        } else {
            Level::Low
        };
        warnings.push(
            Warning::new(
                "unreachable_units",
                level,
                "unreachable_count",
                format!(
                    "{} of {} pool units ({:.1}%) can never be selected at FDR {}: their \
                     p-value floor w_j / (W + w_j) exceeds {} because their weight is large \
                     relative to the labeled set's total weight. The labeled set does not \
                     cover the region of the pool they come from; assay a few of them to \
                     extend coverage.",
                    o.unreachable_count,
                    m,
                    100.0 * share,
                    qt,
                    qt
                ),
            )
            .measured(o.unreachable_count as f64, 0.0)
            .titled("unreachable units"),
        );
    }
    let ess_fraction = o.labeled_ess / o.n_labeled as f64;
    if o.weights_vary && ess_fraction < ESS_FRACTION_WARNING {
        warnings.push(
            Warning::new(
                "labeled_ess_low",
                Level::High,
                "labeled_ess_fraction",
                format!(
                    "the labeled weights are worth {:.1} equally weighted units ({:.1}% of {}), \
                     below the {:.0}% threshold (common practice). A few labeled units decide \
                     the p-values; the shortlist will be small and unstable.",
                    o.labeled_ess,
                    100.0 * ess_fraction,
                    o.n_labeled,
                    100.0 * ESS_FRACTION_WARNING
                ),
            )
            .measured(ess_fraction, ESS_FRACTION_WARNING)
            .titled("effective sample size"),
        );
    }
    if o.weights_vary && o.settings.procedure == Procedure::Bh {
        warnings.push(
            Warning::new(
                "bh_weighted_no_guarantee",
                Level::Medium,
                "procedure",
                "BH on weighted p-values has no finite-sample FDR guarantee (the p-values need \
                 not be positively dependent); in simulation it exceeded the target by up to \
                 about 5% of q in adversarial settings. Use --procedure conditional for the \
                 guarantee."
                    .to_string(),
            )
            .titled("BH with varying weights"),
        );
    }
    if o.settings.pruning == Some(Pruning::Deterministic) && o.weights_vary {
        warnings.push(
            Warning::new(
                "deterministic_pruning_weak",
                Level::Medium,
                "selected_count",
                format!(
                    "deterministic pruning is nearly powerless once weights vary: {} units \
                     passed the first step but only {} survived pruning. Homogeneous pruning \
                     (the default) keeps the same guarantee with more power.",
                    o.first_step_count.unwrap_or(0),
                    o.selected_count
                ),
            )
            .measured(
                o.selected_count as f64,
                o.first_step_count.unwrap_or(0) as f64,
            )
            .titled("deterministic pruning"),
        );
    }
    if o.selected_count == 0 && o.unreachable_count == m {
        warnings.push(
            Warning::new(
                "empty_shortlist_unreachable",
                Level::High,
                "unreachable_count",
                format!(
                    "no pool unit can be selected at FDR {qt} whatever its outcome: every \
                     unit's weight alone keeps its p-value above q (the smallest possible \
                     p-value is {}). {}",
                    crate::warning::prose_number(o.resolution.smallest_floor_pvalue),
                    if o.weights_vary {
                        "With these weights the pool lies where the labeled set has almost no \
                         weight (little overlap); more labeled rows alone will not fix it, \
                         labeled rows like the pool will."
                    } else {
                        "The labeled set is too small for this level: use more labeled rows or \
                         a higher --fdr."
                    }
                ),
            )
            .measured(o.unreachable_count as f64, m as f64)
            .titled("empty shortlist"),
        );
    } else if o.selected_count == 0 {
        warnings.push(
            Warning::new(
                "empty_shortlist",
                Level::Medium,
                "selected_count",
                format!(
                    "no pool unit was selected at FDR {qt}. BH on the weighted {} p-values \
                     would select {}.",
                    o.bh_pvalues.name(),
                    o.bh_selected_count
                ),
            )
            .titled("empty shortlist"),
        );
    }
    if let Some(sentence) = draw_sentence(&o.draw, o.selected_count, o.settings.seed) {
        let level = draw_level(&o.draw);
        let mut warning = Warning::new(
            "shortlist_from_draw",
            level,
            "empty_probability",
            format!(
                "{sentence} Conditional calibration keeps FDR <= q on average over the draw; a \
                 single screen gets one draw. See `resolution` in summary.json for why and \
                 what would fix it."
            ),
        )
        .titled("shortlist decided by a random draw");
        warning.value = Some(o.draw.empty_probability);
        warning.threshold = match level {
            Level::High => Some(DRAW_EMPTY_HIGH),
            Level::Medium => Some(DRAW_EMPTY_MEDIUM),
            Level::Low => None,
        };
        warnings.insert(0, warning);
    }
    crate::warning::worst_first(&mut warnings);
    warnings
}

/// Empty probability of a draw-dependent shortlist from which its concern is `high`.
pub const DRAW_EMPTY_HIGH: f64 = 0.5;
/// Empty probability from which it is `medium` (below: `low`).
pub const DRAW_EMPTY_MEDIUM: f64 = 0.05;

/// How much a draw-dependent shortlist matters, by its empty probability: `high` at 0.5 or
/// more, `medium` at 0.05 or more, `low` below (common practice, our choice).
pub fn draw_level(draw: &DrawSummary) -> Level {
    if draw.empty_probability >= DRAW_EMPTY_HIGH {
        Level::High
    } else if draw.empty_probability >= DRAW_EMPTY_MEDIUM {
        Level::Medium
    } else {
        Level::Low
    }
}

/// How serious a draw-dependent shortlist is, by its empty probability: `severe` at 0.5
/// or more, `caution` at 0.05 or more, `note` below (common practice, our choice).
/// The earlier word for [`draw_level`] (summary.json `draw_severity`).
pub fn draw_severity(draw: &DrawSummary) -> &'static str {
    draw_level(draw).legacy_severity()
}

/// The draw's consequences in one plain sentence, or `None` when the shortlist does not
/// depend on the draw.
///
/// # Examples
/// "83 units with probability 0.29, otherwise none (expected 24.3); this run's draw
/// (seed 5) gave 83."
pub fn draw_sentence(draw: &DrawSummary, selected_count: usize, seed: u64) -> Option<String> {
    if draw.method == DrawMethod::NoDraw || draw.is_fixed() {
        return None;
    }
    let mut sizes: Vec<_> = draw.sizes.iter().filter(|s| s.size > 0).collect();
    sizes.sort_by(|a, b| b.probability.total_cmp(&a.probability));
    let shown: Vec<String> = sizes
        .iter()
        .take(3)
        .map(|s| format!("{} units with probability {}", s.size, short(s.probability)))
        .collect();
    let mut text = shown.join(", ");
    if sizes.len() > 3 {
        text.push_str(&format!(", {} other sizes", sizes.len() - 3));
    }
    if draw.empty_probability > 0.0 {
        text.push_str(&format!(
            ", otherwise none (probability {})",
            short(draw.empty_probability)
        ));
    }
    let estimate = match draw.draws {
        Some(n) => format!(", estimated from {n} simulated draws"),
        None => String::new(),
    };
    Some(format!(
        "{text} (expected {:.1}{estimate}); this run's draw (seed {seed}) gave {selected_count}.",
        draw.expected_selected_count
    ))
}

/// A probability for people: two significant digits of itself, or of its distance from 1
/// when it is close to 1 (so 0.99942 reads "0.99942", not "1.00"); 0 and 1 exactly as such.
fn short(p: f64) -> String {
    if p <= 0.0 || p >= 1.0 {
        return format!("{}", p.clamp(0.0, 1.0));
    }
    let small = p.min(1.0 - p);
    let digits = (1 - small.log10().floor() as i32).max(2) as usize;
    format!("{p:.digits$}")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn small_case() -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        // 19 labeled units, all inactive (y = 0), predictions 0.1..0.9; pool predictions.
        let y = vec![0.0; 19];
        let mu: Vec<f64> = (1..=19).map(|i| i as f64 / 20.0).collect();
        let pool = vec![0.99, 0.98, 0.2, 0.1];
        (y, mu, pool)
    }

    #[test]
    fn probabilities_read_with_two_significant_digits() {
        assert_eq!(short(0.2912), "0.29");
        assert_eq!(short(0.00058), "0.00058");
        assert_eq!(short(0.99942), "0.99942");
        assert_eq!(short(0.5), "0.50");
        assert_eq!(short(1.0), "1");
        assert_eq!(short(0.0), "0");
    }

    #[test]
    fn conditional_with_randomized_is_a_usage_error() {
        let options = SelectOptions {
            pvalues: Some(PValueKind::Randomized),
            ..SelectOptions::default()
        };
        assert_eq!(
            options.check().unwrap_err(),
            SelectError::ConditionalNeedsConservative
        );
    }

    #[test]
    fn fdr_out_of_range() {
        for bad in [0.0, 1.5, -1.0, f64::NAN] {
            let options = SelectOptions {
                fdr: bad,
                ..SelectOptions::default()
            };
            assert!(matches!(
                options.check(),
                Err(SelectError::FdrOutOfRange(_))
            ));
        }
    }

    #[test]
    fn labeled_set_too_small_for_level() {
        // n = 4 labeled units: the smallest unweighted p-value is 1/5 > 0.1.
        let options = SelectOptions::default();
        let labeled = LabeledInput {
            outcome: &[0.0; 4],
            prediction: &[0.1, 0.2, 0.3, 0.4],
            thresholds: Thresholds::Constant(0.5),
            weights: None,
        };
        let pool = PoolInput {
            prediction: &[0.9],
            thresholds: Thresholds::Constant(0.5),
            weights: None,
        };
        assert!(matches!(
            run_selection(&options, labeled, pool),
            Err(SelectError::LabeledSetTooSmall { n_labeled: 4, .. })
        ));
    }

    #[test]
    fn unweighted_binary_example_by_hand() {
        // Clipped score, all labeled inactive: V_i = 0.5 - mu_i in [-0.45, 0.45].
        // Pool scores 0.5 - 0.99 = -0.49 and -0.48 lie below every labeled score, so their
        // conservative p-values are (0 + 1) / 20 = 0.05 (hand computation, design.md 2.2).
        let (y, mu, pool) = small_case();
        let options = SelectOptions {
            fdr: 0.2,
            procedure: Procedure::Bh,
            pvalues: Some(PValueKind::Conservative),
            ..SelectOptions::default()
        };
        let o = run_selection(
            &options,
            LabeledInput {
                outcome: &y,
                prediction: &mu,
                thresholds: Thresholds::Constant(0.5),
                weights: None,
            },
            PoolInput {
                prediction: &pool,
                thresholds: Thresholds::Constant(0.5),
                weights: None,
            },
        )
        .unwrap();
        assert_eq!(o.p_values[0], 0.05);
        assert_eq!(o.p_values[1], 0.05);
        // BH at 0.2 with m = 4: p_(2) = 0.05 <= 0.1; p_(3) = 16/20 > 0.15.
        assert_eq!(o.selected, vec![true, true, false, false]);
        assert_eq!(o.unreachable_count, 0);
        assert!(!o.weights_vary);
    }
}
