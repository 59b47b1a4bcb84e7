//! Calibration check by simulation (design.md 2.7): "on data like mine, does this pipeline
//! keep FDR <= q?"
//!
//! Only the labeled set is used, because only there are outcomes known. Each replicate
//! splits it at random into a pseudo-labeled part and a pseudo-pool, with a covariate shift
//! of known form: row `i` goes to the pseudo-pool with probability
//! `pi_i = min(PI_MAX, c exp(S z_i))`, where `z_i` is the standardized log-odds of the real
//! domain classifier (how much row `i` looks like the real pool), `S` the strength set by
//! the user, and `c` fixed so that the mean of `pi` is the requested pool share. Rows are
//! drawn independently (Poisson sampling), so the exact density ratio pool/labeled at row
//! `i` is `pi_i / (1 - pi_i)`. The full pipeline then runs on the pair — weights fitted by
//! the domain classifier in the user's mode (or the exact ratio, to separate the
//! procedure's behaviour from the fitting error), scores, p-values, selection — and since
//! the pseudo-pool's outcomes are known, each replicate's false discovery proportion and
//! power are recorded. Averages over replicates estimate FDR and power; their Monte Carlo
//! standard errors are the sample standard deviations over `sqrt(replicates)`.
//!
//! Three selections are compared: conditional calibration with the weights, BH on the
//! weighted p-values, and BH ignoring the shift (every weight 1).

use std::sync::atomic::{AtomicUsize, Ordering};

use rand::Rng;
use rayon::prelude::*;
use serde::Serialize;
use thiserror::Error;

use crate::conformal::pvalue::PValueKind;
use crate::conformal::score::Thresholds;
use crate::io::{Role, UnitTable};
use crate::random::{stream, Stream};
use crate::selection::pipeline::{
    kish_ess, run_selection, LabeledInput, PoolInput, Procedure, SelectError, SelectOptions,
};
use crate::shift::weighting::{obtain_weights, WeightSource, WeightingError};
use crate::shift::{ShiftError, ShiftParams};

/// Largest probability of sending a row to the pseudo-pool, so that every density ratio
/// `pi / (1 - pi)` stays finite (at most 19). Common practice.
pub const PI_MAX: f64 = 0.95;

/// Which weights the replicated pipeline uses.
#[derive(Clone, Debug)]
pub enum CheckWeights {
    /// Fitted by the domain classifier with these options, as `select --fit-weights` would.
    Fitted(ShiftParams),
    /// The exact density ratio of the simulated split (no fitting error).
    Exact,
}

/// Settings of a check.
#[derive(Clone, Debug)]
pub struct CheckOptions {
    /// Replicates. Defaults to 200.
    pub replicates: usize,
    /// Shift strength `S` (0 = no shift). Defaults to 1.
    pub strength: f64,
    /// Mean share of the labeled rows sent to the pseudo-pool. Defaults to 0.5.
    pub pool_share: f64,
    /// The selection settings (level q, score, pruning, p-values of the BH run, seed).
    pub select: SelectOptions,
    pub weights: CheckWeights,
}

/// Why a check cannot run.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum CheckError {
    #[error("replicates must be at least 2, got {0}")]
    TooFewReplicates(usize),
    #[error("the shift strength must be a finite number >= 0, got {0}")]
    BadStrength(f64),
    #[error("the pool share must be in (0, 0.9], got {0}")]
    BadPoolShare(f64),
    #[error("the labeled set has {rows} rows; a calibration check needs at least {needed}")]
    TooFewRows { rows: usize, needed: usize },
    #[error("the labeled table has no outcome column")]
    NoOutcome,
    #[error("{tilt} tilt scores for {rows} labeled rows")]
    TiltLength { tilt: usize, rows: usize },
    #[error("replicate {replicate}: {source}")]
    Weighting {
        replicate: usize,
        #[source]
        source: WeightingError,
    },
    #[error("replicate {replicate}: {source}")]
    Selection {
        replicate: usize,
        #[source]
        source: SelectError,
    },
}

/// Realized FDR and power of one selection over the replicates.
#[derive(Clone, Debug, Serialize)]
pub struct ProcedureResult {
    /// Mean false discovery proportion (0 for an empty selection).
    pub fdr: f64,
    pub fdr_se: f64,
    /// Mean share of the pseudo-pool's interesting units that were selected.
    pub power: f64,
    pub power_se: f64,
    pub mean_selected: f64,
    /// Share of replicates with an empty selection.
    pub empty_share: f64,
}

/// The three compared selections.
#[derive(Clone, Debug, Serialize)]
pub struct CheckResults {
    pub conditional: ProcedureResult,
    pub bh: ProcedureResult,
    pub unweighted: ProcedureResult,
}

/// Outcome of a check.
#[derive(Clone, Debug, Serialize)]
pub struct CheckOutcome {
    pub replicates: usize,
    pub strength: f64,
    pub pool_share: f64,
    /// The constant `c` of `pi = min(PI_MAX, c exp(S z))`.
    pub tilt_constant: f64,
    /// Kish ESS of the exact ratios over the labeled rows, as a share of them. Not
    /// monotone in the strength: once many rows reach `PI_MAX` their ratios are equal.
    pub exact_ess_fraction: f64,
    /// Mean over replicates of the Kish ESS of the weights the selection used (exact or
    /// fitted) over the calibrating rows, as a share of those rows: how much of the
    /// pseudo-labeled part effectively calibrates.
    pub mean_calibration_ess_fraction: f64,
    pub mean_pseudo_labeled: f64,
    pub mean_pseudo_pool: f64,
    /// Mean share of interesting units (outcome above threshold) in the pseudo-pool.
    pub mean_interesting_share: f64,
    /// Share of replicates in which the pipeline could not run — an empty pseudo-pool or
    /// pseudo-labeled part, or a domain classifier that cannot be fit on the split (too
    /// few rows, one class, every feature constant). They count as empty selections, as
    /// the real pipeline would produce no shortlist; only small labeled sets or extreme
    /// pool shares get here.
    pub degenerate_share: f64,
    pub results: CheckResults,
}

/// `pi_i = min(PI_MAX, c exp(S z_i))` with `c` found by bisection so that `mean(pi) = share`.
fn tilt_probabilities(z: &[f64], strength: f64, share: f64) -> (Vec<f64>, f64) {
    let probs = |log_c: f64| -> Vec<f64> {
        z.iter()
            .map(|&zi| (log_c + strength * zi).exp().min(PI_MAX))
            .collect()
    };
    let mean = |p: &[f64]| p.iter().sum::<f64>() / p.len() as f64;
    let (mut lo, mut hi) = (-60.0_f64, 10.0_f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mean(&probs(mid)) < share {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let log_c = 0.5 * (lo + hi);
    (probs(log_c), log_c.exp())
}

fn subset(table: &UnitTable, rows: &[usize], role: Role) -> UnitTable {
    let n = table.len();
    let pick = |v: &[f64]| rows.iter().map(|&i| v[i]).collect::<Vec<f64>>();
    let mut features = Vec::with_capacity(rows.len() * table.feature_names.len());
    for f in 0..table.feature_names.len() {
        let column = &table.features[f * n..(f + 1) * n];
        features.extend(rows.iter().map(|&i| column[i]));
    }
    UnitTable {
        path: table.path.clone(),
        role,
        ids: rows.iter().map(|&i| table.ids[i].clone()).collect(),
        outcome: table.outcome.as_deref().map(pick),
        prediction: pick(&table.prediction),
        threshold: table.threshold.as_deref().map(pick),
        weight: None,
        feature_names: table.feature_names.clone(),
        features,
    }
}

struct ReplicateResult {
    /// The pipeline could not run on this split (see `CheckOutcome::degenerate_share`).
    degenerate: bool,
    pseudo_labeled: usize,
    /// Kish ESS share of the calibrating rows' weights (unused for a degenerate split).
    calibration_ess_fraction: f64,
    pseudo_pool: usize,
    interesting_share: f64,
    /// (FDP, power, selected) per compared selection.
    per_selection: [(f64, f64, usize); 3],
}

fn mean_and_se(values: impl Iterator<Item = f64> + Clone) -> (f64, f64) {
    let n = values.clone().count() as f64;
    let mean = values.clone().sum::<f64>() / n;
    let variance = values.map(|x| (x - mean) * (x - mean)).sum::<f64>() / (n - 1.0).max(1.0);
    (mean, (variance / n).sqrt())
}

/// Run the calibration check.
///
/// `labeled` must carry outcomes (and features, for fitted weights); `tilt` holds one score
/// per labeled row saying how much it resembles the real pool (the real domain classifier's
/// log-odds); `constant_threshold` is used when the table has no per-row thresholds.
/// `progress` is called after each finished replicate with the number finished so far.
///
/// # Errors
/// Invalid settings, too few rows, or a replicate whose weighting or selection fails.
pub fn calibration_check(
    labeled: &UnitTable,
    tilt: &[f64],
    constant_threshold: Option<f64>,
    options: &CheckOptions,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<CheckOutcome, CheckError> {
    check_settings(labeled, tilt, options)?;
    let n = labeled.len();
    let z = standardized(tilt);
    let (pi, tilt_constant) = tilt_probabilities(&z, options.strength, options.pool_share);
    let exact_ratio: Vec<f64> = pi.iter().map(|p| p / (1.0 - p)).collect();
    let exact_ess_fraction = kish_ess(&exact_ratio) / n as f64;

    let simulation = Simulation {
        labeled,
        pi: &pi,
        exact_ratio: &exact_ratio,
        constant_threshold,
        options,
    };
    let finished = AtomicUsize::new(0);
    let replicates: Vec<ReplicateResult> = (0..options.replicates)
        .into_par_iter()
        .map(|r| {
            let result = simulation.replicate(r)?;
            progress(finished.fetch_add(1, Ordering::Relaxed) + 1);
            Ok(result)
        })
        .collect::<Result<Vec<_>, CheckError>>()?;
    Ok(summarize(
        &replicates,
        options,
        tilt_constant,
        exact_ess_fraction,
    ))
}

/// Reject settings and inputs a check cannot run on.
fn check_settings(
    labeled: &UnitTable,
    tilt: &[f64],
    options: &CheckOptions,
) -> Result<(), CheckError> {
    if options.replicates < 2 {
        return Err(CheckError::TooFewReplicates(options.replicates));
    }
    if !(options.strength.is_finite() && options.strength >= 0.0) {
        return Err(CheckError::BadStrength(options.strength));
    }
    if !(options.pool_share > 0.0 && options.pool_share <= 0.9) {
        return Err(CheckError::BadPoolShare(options.pool_share));
    }
    if labeled.outcome.is_none() {
        return Err(CheckError::NoOutcome);
    }
    let n = labeled.len();
    if n < 40 {
        return Err(CheckError::TooFewRows {
            rows: n,
            needed: 40,
        });
    }
    if tilt.len() != n {
        return Err(CheckError::TiltLength {
            tilt: tilt.len(),
            rows: n,
        });
    }
    // The BH runs' p-value choice is applied per procedure below; check the rest.
    let select_checked = SelectOptions {
        pvalues: None,
        ..options.select.clone()
    };
    select_checked
        .check()
        .map_err(|source| CheckError::Selection {
            replicate: 0,
            source,
        })?;
    Ok(())
}

/// The tilt scores standardized to mean 0 and standard deviation 1 (all 0 when constant).
fn standardized(tilt: &[f64]) -> Vec<f64> {
    let n = tilt.len();
    let (mean_tilt, sd_tilt) = {
        let mean = tilt.iter().sum::<f64>() / n as f64;
        let var = tilt.iter().map(|t| (t - mean) * (t - mean)).sum::<f64>() / n as f64;
        (mean, var.sqrt())
    };
    tilt.iter()
        .map(|t| {
            if sd_tilt > 0.0 {
                (t - mean_tilt) / sd_tilt
            } else {
                0.0
            }
        })
        .collect()
}

/// What every replicate shares: the labeled table, the split probabilities and exact ratios.
struct Simulation<'a> {
    labeled: &'a UnitTable,
    /// `pi_i`, the probability that row `i` goes to the pseudo-pool.
    pi: &'a [f64],
    /// `pi_i / (1 - pi_i)`.
    exact_ratio: &'a [f64],
    constant_threshold: Option<f64>,
    options: &'a CheckOptions,
}

/// One replicate's screen: the calibrating pseudo-labeled rows and the pseudo-pool (with
/// the weights of the weighted runs), and the pseudo-pool's truth.
struct Screen<'a> {
    labeled: LabeledInput<'a>,
    pool: PoolInput<'a>,
    /// Outcome above threshold, per pseudo-pool unit.
    interesting: &'a [bool],
    interesting_count: usize,
}

impl ReplicateResult {
    /// A split the pipeline cannot run on: an empty part, or no classifier fits.
    fn degenerate(pseudo_labeled: usize, pseudo_pool: usize) -> Self {
        ReplicateResult {
            degenerate: true,
            pseudo_labeled,
            calibration_ess_fraction: 1.0,
            pseudo_pool,
            interesting_share: 0.0,
            per_selection: [(0.0, 0.0, 0); 3],
        }
    }
}

impl Simulation<'_> {
    fn threshold_of(&self, table: &UnitTable, i: usize) -> f64 {
        match (&table.threshold, self.constant_threshold) {
            (Some(c), _) => c[i],
            (None, Some(c)) => c,
            (None, None) => f64::INFINITY,
        }
    }

    /// Replicate `r`: split, weigh, run the three selections on the split.
    fn replicate(&self, r: usize) -> Result<ReplicateResult, CheckError> {
        let (labeled, options, exact_ratio) = (self.labeled, self.options, self.exact_ratio);
        let constant_threshold = self.constant_threshold;
        let seed = options.select.seed;
        let mut rng = stream(seed.wrapping_add(r as u64), Stream::Simulation);
        let mut pool_rows = Vec::new();
        let mut labeled_rows = Vec::new();
        for (i, &p) in self.pi.iter().enumerate() {
            if rng.gen::<f64>() < p {
                pool_rows.push(i);
            } else {
                labeled_rows.push(i);
            }
        }
        // An empty part leaves nothing to calibrate or nothing to select from.
        if labeled_rows.is_empty() || pool_rows.is_empty() {
            return Ok(ReplicateResult::degenerate(
                labeled_rows.len(),
                pool_rows.len(),
            ));
        }
        let pseudo_labeled = subset(labeled, &labeled_rows, Role::Labeled);
        let mut pseudo_pool = subset(labeled, &pool_rows, Role::Pool);
        let truth = pseudo_pool.outcome.take().unwrap_or_default();
        let interesting: Vec<bool> = (0..pseudo_pool.len())
            .map(|j| truth[j] > self.threshold_of(&pseudo_pool, j))
            .collect();
        let interesting_count = interesting.iter().filter(|&&x| x).count();

        let exact_labeled: Vec<f64> = labeled_rows.iter().map(|&i| exact_ratio[i]).collect();
        let exact_pool: Vec<f64> = pool_rows.iter().map(|&i| exact_ratio[i]).collect();
        let source = match &options.weights {
            CheckWeights::Fitted(params) => WeightSource::Fitted {
                params: params.clone().seed(seed.wrapping_add(r as u64)),
            },
            CheckWeights::Exact => WeightSource::None,
        };
        let weighting = match obtain_weights(&source, &pseudo_labeled, &pseudo_pool) {
            Ok(w) => w,
            // The split cannot carry a classifier: the real pipeline would stop here.
            Err(WeightingError::Shift(
                ShiftError::TooFewRows { .. }
                | ShiftError::OneClass { .. }
                | ShiftError::AllConstant { .. },
            )) => {
                return Ok(ReplicateResult::degenerate(
                    labeled_rows.len(),
                    pool_rows.len(),
                ))
            }
            Err(source) => {
                return Err(CheckError::Weighting {
                    replicate: r,
                    source,
                })
            }
        };
        let calibration = weighting.calibration(&pseudo_labeled);
        // Exact ratios: every pseudo-labeled row calibrates (no fit), so they align.
        let (labeled_weights, pool_weights): (Option<&[f64]>, Option<&[f64]>) = match options
            .weights
        {
            CheckWeights::Exact => (Some(&exact_labeled), Some(&exact_pool)),
            CheckWeights::Fitted(_) => (calibration.weights.as_deref(), weighting.pool_weights()),
        };
        let thresholds_labeled = match &calibration.threshold {
            Some(c) => Thresholds::PerUnit(c),
            None => Thresholds::Constant(constant_threshold.unwrap_or(f64::INFINITY)),
        };
        let thresholds_pool = match &pseudo_pool.threshold {
            Some(c) => Thresholds::PerUnit(c),
            None => Thresholds::Constant(constant_threshold.unwrap_or(f64::INFINITY)),
        };
        let calibration_ess_fraction = match labeled_weights {
            Some(w) if !w.is_empty() => kish_ess(w) / w.len() as f64,
            _ => 1.0,
        };
        let screen = Screen {
            labeled: LabeledInput {
                outcome: &calibration.outcome,
                prediction: &calibration.prediction,
                thresholds: thresholds_labeled,
                weights: labeled_weights,
            },
            pool: PoolInput {
                prediction: &pseudo_pool.prediction,
                thresholds: thresholds_pool,
                weights: pool_weights,
            },
            interesting: &interesting,
            interesting_count,
        };
        let per_selection = [
            self.select_once(r, &screen, Procedure::Conditional, true)?,
            self.select_once(r, &screen, Procedure::Bh, true)?,
            self.select_once(r, &screen, Procedure::Bh, false)?,
        ];
        Ok(ReplicateResult {
            degenerate: false,
            pseudo_labeled: calibration.rows(),
            calibration_ess_fraction,
            pseudo_pool: pseudo_pool.len(),
            interesting_share: interesting_count as f64 / pseudo_pool.len().max(1) as f64,
            per_selection,
        })
    }

    /// One selection on replicate `r`'s screen (with its weights or every weight 1):
    /// `(FDP, power, selected)`.
    fn select_once(
        &self,
        r: usize,
        screen: &Screen<'_>,
        procedure: Procedure,
        weighted: bool,
    ) -> Result<(f64, f64, usize), CheckError> {
        let options = self.options;
        let seed = options.select.seed;
        let (interesting, interesting_count) = (screen.interesting, screen.interesting_count);
        let select = SelectOptions {
            procedure,
            pvalues: match procedure {
                Procedure::Conditional => Some(PValueKind::Conservative),
                _ => options.select.pvalues,
            },
            seed: seed.wrapping_add(r as u64),
            ..options.select.clone()
        };
        let o = run_selection(
            &select,
            LabeledInput {
                weights: if weighted {
                    screen.labeled.weights
                } else {
                    None
                },
                ..screen.labeled
            },
            PoolInput {
                weights: if weighted { screen.pool.weights } else { None },
                ..screen.pool
            },
        );
        let o = match o {
            Ok(o) => o,
            // A replicate whose labeled part cannot reach the level selects nothing.
            Err(SelectError::LabeledSetTooSmall { .. }) => return Ok((0.0, 0.0, 0)),
            Err(source) => {
                return Err(CheckError::Selection {
                    replicate: r,
                    source,
                })
            }
        };
        let chosen = o.selected_count;
        let true_hits = (0..o.selected.len())
            .filter(|&j| o.selected[j] && interesting[j])
            .count();
        let fdp = if chosen == 0 {
            0.0
        } else {
            (chosen - true_hits) as f64 / chosen as f64
        };
        let power = if interesting_count == 0 {
            0.0
        } else {
            true_hits as f64 / interesting_count as f64
        };
        Ok((fdp, power, chosen))
    }
}

/// Averages over the replicates.
fn summarize(
    replicates: &[ReplicateResult],
    options: &CheckOptions,
    tilt_constant: f64,
    exact_ess_fraction: f64,
) -> CheckOutcome {
    let procedure_result = |c: usize| {
        let (fdr, fdr_se) = mean_and_se(replicates.iter().map(move |r| r.per_selection[c].0));
        let (power, power_se) = mean_and_se(replicates.iter().map(move |r| r.per_selection[c].1));
        let count = replicates.len() as f64;
        ProcedureResult {
            fdr,
            fdr_se,
            power,
            power_se,
            mean_selected: replicates
                .iter()
                .map(|r| r.per_selection[c].2 as f64)
                .sum::<f64>()
                / count,
            empty_share: replicates
                .iter()
                .filter(|r| r.per_selection[c].2 == 0)
                .count() as f64
                / count,
        }
    };
    let count = replicates.len() as f64;
    CheckOutcome {
        replicates: replicates.len(),
        strength: options.strength,
        pool_share: options.pool_share,
        tilt_constant,
        exact_ess_fraction,
        mean_calibration_ess_fraction: {
            let run: Vec<f64> = replicates
                .iter()
                .filter(|r| !r.degenerate)
                .map(|r| r.calibration_ess_fraction)
                .collect();
            if run.is_empty() {
                1.0
            } else {
                run.iter().sum::<f64>() / run.len() as f64
            }
        },
        mean_pseudo_labeled: replicates
            .iter()
            .map(|r| r.pseudo_labeled as f64)
            .sum::<f64>()
            / count,
        mean_pseudo_pool: replicates.iter().map(|r| r.pseudo_pool as f64).sum::<f64>() / count,
        mean_interesting_share: replicates.iter().map(|r| r.interesting_share).sum::<f64>() / count,
        degenerate_share: replicates.iter().filter(|r| r.degenerate).count() as f64 / count,
        results: CheckResults {
            conditional: procedure_result(0),
            bh: procedure_result(1),
            unweighted: procedure_result(2),
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::workflows::demo::{generate, FEATURES, LABELED_MEAN, THRESHOLD};

    /// The demo's labeled set as a table (invented data; here the reference is the FDR
    /// guarantee itself, Jin & Candes 2023, checked by simulation).
    fn demo_labeled(rows: usize, seed: u64) -> (UnitTable, Vec<f64>) {
        let s = generate(rows, 10, seed);
        let set = s.labeled;
        let mut features = Vec::with_capacity(rows * 5);
        for f in 0..5 {
            features.extend(set.features.iter().map(|x| x[f]));
        }
        // Tilt toward the real pool: its log density ratio, -b'x (src/demo.rs).
        let tilt = set
            .features
            .iter()
            .map(|x| -LABELED_MEAN.iter().zip(x).map(|(b, v)| b * v).sum::<f64>())
            .collect();
        let table = UnitTable {
            path: "demo".into(),
            role: Role::Labeled,
            ids: set.ids.clone(),
            outcome: Some(set.outcome.clone()),
            prediction: set.prediction.clone(),
            threshold: None,
            weight: None,
            feature_names: FEATURES.iter().map(|s| s.to_string()).collect(),
            features,
        };
        (table, tilt)
    }

    fn options(weights: CheckWeights, replicates: usize, strength: f64) -> CheckOptions {
        CheckOptions {
            replicates,
            strength,
            pool_share: 0.5,
            select: SelectOptions::default(),
            weights,
        }
    }

    #[test]
    fn exact_weights_keep_fdr_and_ignoring_the_shift_does_not() {
        // q = 0.2: the demo's labeled set holds few actives (about 6%), and at 0.1 the
        // conditional selection is mostly empty, which would make the check vacuous.
        let (table, tilt) = demo_labeled(3000, 3);
        let mut o = options(CheckWeights::Exact, 120, 1.0);
        o.select.fdr = 0.2;
        let outcome = calibration_check(&table, &tilt, Some(THRESHOLD), &o, &|_| {}).unwrap();
        let r = &outcome.results;
        // Conditional calibration: FDR <= q within 3 Monte Carlo SE (Jin & Candes 2023).
        assert!(
            r.conditional.fdr <= 0.2 + 3.0 * r.conditional.fdr_se,
            "{r:?}"
        );
        assert!(
            r.conditional.power > 0.0 && r.conditional.mean_selected > 5.0,
            "{r:?}"
        );
        // Ignoring the shift: the scenario's model is optimistic where the tilt points.
        assert!(r.unweighted.fdr > 0.2 + 3.0 * r.unweighted.fdr_se, "{r:?}");
        assert_eq!(outcome.replicates, 120);
        // The tilt makes the calibrating rows' exact weights unequal.
        assert!(
            outcome.mean_calibration_ess_fraction > 0.0
                && outcome.mean_calibration_ess_fraction < 0.95,
            "{}",
            outcome.mean_calibration_ess_fraction
        );
        assert!((outcome.mean_pseudo_pool / 3000.0 - 0.5).abs() < 0.05);
    }

    #[test]
    fn fitted_weights_run_and_are_reproducible() {
        let (table, tilt) = demo_labeled(600, 4);
        let params = ShiftParams::new().permutations(1).cv_folds(2);
        let run = || {
            calibration_check(
                &table,
                &tilt,
                Some(THRESHOLD),
                &options(CheckWeights::Fitted(params.clone()), 8, 1.0),
                &|_| {},
            )
            .unwrap()
        };
        let (a, b) = (run(), run());
        assert_eq!(a.results.conditional.fdr, b.results.conditional.fdr);
        assert_eq!(a.results.bh.power, b.results.bh.power);
        assert!(a.results.conditional.fdr >= 0.0 && a.results.conditional.fdr <= 1.0);
    }

    #[test]
    fn splits_with_an_empty_part_count_as_empty_selections() {
        // 40 rows, no shift: with a pool share of 0.05 about (0.95)^40 = 13% of the splits
        // have an empty pseudo-pool, with 0.9 about 1.5% an empty pseudo-labeled part, and
        // the classifier needs at least 2 rows per side.
        let (table, tilt) = demo_labeled(40, 6);
        for (share, weights) in [
            (0.05, CheckWeights::Exact),
            (
                0.05,
                CheckWeights::Fitted(ShiftParams::new().permutations(1).cv_folds(2)),
            ),
            (0.9, CheckWeights::Exact),
        ] {
            let mut o = options(weights, 200, 0.0);
            o.pool_share = share;
            let outcome = calibration_check(&table, &tilt, Some(THRESHOLD), &o, &|_| {}).unwrap();
            assert!(
                outcome.degenerate_share > 0.0 && outcome.degenerate_share < 0.5,
                "share {share}: {}",
                outcome.degenerate_share
            );
            assert!(outcome.results.conditional.fdr <= 1.0);
            if matches!(o.weights, CheckWeights::Exact) {
                // No shift: equal exact weights, every calibrating row counts fully.
                assert!((outcome.mean_calibration_ess_fraction - 1.0).abs() < 1e-12);
            }
        }
        // Without degenerate splits the share is 0.
        let (table, tilt) = demo_labeled(400, 6);
        let outcome = calibration_check(
            &table,
            &tilt,
            Some(THRESHOLD),
            &options(CheckWeights::Exact, 20, 1.0),
            &|_| {},
        )
        .unwrap();
        assert_eq!(outcome.degenerate_share, 0.0);
    }

    #[test]
    fn bad_settings_are_errors() {
        let (table, tilt) = demo_labeled(100, 5);
        let check =
            |o: CheckOptions| calibration_check(&table, &tilt, Some(THRESHOLD), &o, &|_| {});
        assert!(matches!(
            check(options(CheckWeights::Exact, 1, 1.0)),
            Err(CheckError::TooFewReplicates(1))
        ));
        assert!(matches!(
            check(options(CheckWeights::Exact, 5, -1.0)),
            Err(CheckError::BadStrength(_))
        ));
        assert!(matches!(
            calibration_check(
                &table,
                &tilt[..10],
                Some(THRESHOLD),
                &options(CheckWeights::Exact, 5, 1.0),
                &|_| {}
            ),
            Err(CheckError::TiltLength { .. })
        ));
    }

    #[test]
    fn tilt_probabilities_hit_the_share_and_stay_below_the_cap() {
        let z: Vec<f64> = (0..1000).map(|i| (i as f64 - 500.0) / 250.0).collect();
        for (strength, share) in [(0.0, 0.5), (1.0, 0.5), (3.0, 0.3), (6.0, 0.5)] {
            let (pi, _) = tilt_probabilities(&z, strength, share);
            let mean = pi.iter().sum::<f64>() / pi.len() as f64;
            assert!(
                (mean - share).abs() < 1e-9,
                "strength {strength}: mean {mean}"
            );
            assert!(pi.iter().all(|&p| p > 0.0 && p <= PI_MAX));
        }
        // No shift: every row has the same probability.
        let (pi, _) = tilt_probabilities(&z, 0.0, 0.5);
        assert!(pi.iter().all(|&p| (p - 0.5).abs() < 1e-9));
    }
}
