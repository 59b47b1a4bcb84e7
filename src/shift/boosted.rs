//! Cross-fitted gradient-boosted trees for the domain classifier: a non-linear estimate of
//! e(x) = P(pool | x), hence of the density ratio w(x) = p_pool(x) / p_labeled(x) through
//! log w(x) = logit e(x) + const. Unlike the linear logistic model (`logistic`), trees see
//! a variance shift, thresholds and interactions.
//!
//! # Algorithm
//! Gradient boosting of regression trees on the binary log loss (Friedman 2001, "Greedy
//! function approximation: a gradient boosting machine", Ann. Statist. 29(5), with the
//! second-order (Newton) leaf values of Friedman, Hastie & Tibshirani 2000 / Chen & Guestrin
//! 2016), as in scikit-learn's `HistGradientBoostingClassifier` (the reference this module is
//! tested against, scikit-learn 1.6.1):
//!
//! * loss with sample weights s_r, labels y_r in {0, 1} (1 = pool row) and raw score F_r:
//!   L = sum_r s_r [log(1 + exp F_r) - y_r F_r]; gradient g_r = s_r (p_r - y_r), hessian
//!   h_r = s_r p_r (1 - p_r), p_r = 1 / (1 + exp(-F_r));
//! * initial score F_0 = log(sum_r s_r y_r / sum_r s_r (1 - y_r)), the weighted log-odds of
//!   the training rows;
//! * each tree is grown best-first (leaf-wise) up to `max_leaf_nodes` leaves: a leaf is split
//!   where the gain G_L^2/(H_L + l2) + G_R^2/(H_R + l2) - G^2/(H + l2) (G, H sums of g, h) is
//!   largest and > 0, each child keeping at least `min_samples_leaf` rows (counted, not
//!   weighted) and a hessian sum of at least 1e-3 (scikit-learn's `min_hessian_to_split`);
//!   a leaf's value is -learning_rate * G / (H + l2);
//! * split finding on histograms (LightGBM, Ke et al. 2017, "LightGBM: a highly efficient
//!   gradient boosting decision tree", NeurIPS): each feature is cut into at most `max_bins`
//!   bins at quantiles of the training rows (scikit-learn's rule: midpoints between distinct
//!   values when there are at most `max_bins` of them, else the "midpoint" percentiles at
//!   100 k / max_bins, k = 1 .. max_bins - 1); bin(x) = number of cut points < x, so a split
//!   "bin <= b" is the raw test x <= cut_b and prediction needs no binning. Per node the
//!   histogram of the smaller child is built and the larger one's is the parent's minus it;
//! * early stopping as in scikit-learn (`early_stopping=True`, `scoring="loss"`): a stratified
//!   `validation_fraction` of the training rows is held out; the weighted mean validation
//!   loss is recorded after the initial score and after each tree, and boosting stops once
//!   none of the last `patience` losses is below the one before them minus `tolerance`. The
//!   trees grown up to that point are all kept (scikit-learn keeps them too).
//!
//! Cross-fitting: rows are split into `folds` folds, stratified by class and seeded; the model
//! of fold k is fit (own bins, own validation split, own initial score) on the other folds
//! and predicts the rows of fold k, so every fit row gets an out-of-fold log-odds from a model
//! that never saw it. New rows get the mean of the fold models' log-odds. Log-odds are clipped
//! to [logit(c), logit(1 - c)], c = `probability_clip`.
//!
//! # Parallelism and determinism
//! Folds run one after the other; inside a fold the histograms and the split search run in
//! parallel over features (rayon), gradients in parallel over rows, and sums over rows are
//! taken in fixed chunks added in order, so results do not depend on the thread count.
//! Memory: one byte per training row and feature for the bins (`max_bins` <= 255), plus one
//! histogram (features x bins x 20 bytes) per open leaf.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::ShiftError;

/// Rows per chunk for parallel row loops and ordered partial sums.
const CHUNK: usize = 4096;
/// Rows per block of [`BoostedFit::predict_log_odds`].
const PREDICT_BLOCK: usize = 128;
/// Smallest hessian sum of a child (scikit-learn's `min_hessian_to_split` default).
const MIN_HESSIAN: f64 = 1e-3;
/// Rows walked in lockstep through one tree by [`BoostedFit::predict_log_odds`].
const LANES: usize = 8;
/// Stream of the fold assignment; fold k's validation split uses stream `VALIDATION_STREAM + k`.
const FOLD_STREAM: u64 = 1;
const VALIDATION_STREAM: u64 = 100;

/// Unchecked options of [`cross_fit`], validated there. Defaults mirror scikit-learn 1.6.1's
/// `HistGradientBoostingClassifier` (learning_rate 0.1, max_leaf_nodes 31,
/// min_samples_leaf 20, l2_regularization 0, max_bins 255, max_iter 100, and with
/// `early_stopping=True`: validation_fraction 0.1, n_iter_no_change 10, tol 1e-7).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BoostedParams {
    /// Most trees per fold model (scikit-learn `max_iter`). Default 100. Must be >= 1.
    pub max_trees: usize,
    /// Shrinkage of each leaf value. Default 0.1. Must be > 0 and finite.
    pub learning_rate: f64,
    /// Most leaves per tree. Default 31. Must be >= 2.
    pub max_leaf_nodes: usize,
    /// Fewest training rows (counted) in a leaf. Default 20. Must be >= 1.
    pub min_samples_leaf: usize,
    /// L2 penalty on leaf values (added to the hessian sum). Default 0. Must be >= 0.
    pub l2_regularization: f64,
    /// Most bins per feature. Default 255. Must be in [2, 255] (bins are stored as u8).
    pub max_bins: usize,
    /// Share of each fold's training rows held out for early stopping, per class. Default
    /// 0.1. Must be in [0, 1); 0 turns early stopping off (always `max_trees` trees).
    pub validation_fraction: f64,
    /// Trees without improvement before stopping (scikit-learn `n_iter_no_change`). Default
    /// 10. Must be >= 1.
    pub patience: usize,
    /// Least decrease of the validation loss that counts as an improvement. Default 1e-7.
    /// Must be >= 0 and finite.
    pub tolerance: f64,
    /// Cross-fitting folds. Default 5. Must be >= 2.
    pub folds: usize,
    /// Probabilities are clipped to [c, 1 - c] (log-odds to [logit c, logit(1 - c)]).
    /// Default 1e-3 (common practice). Must be in (0, 0.5).
    pub probability_clip: f64,
    /// Seed of the fold assignment and the validation splits. Default 0.
    pub seed: u64,
}

impl Default for BoostedParams {
    fn default() -> Self {
        Self {
            max_trees: 100,
            learning_rate: 0.1,
            max_leaf_nodes: 31,
            min_samples_leaf: 20,
            l2_regularization: 0.0,
            max_bins: 255,
            validation_fraction: 0.1,
            patience: 10,
            tolerance: 1e-7,
            folds: 5,
            probability_clip: 1e-3,
            seed: 0,
        }
    }
}

impl BoostedParams {
    fn validate(&self) -> Result<(), ShiftError> {
        let bad = |name, expected, value: f64| {
            Err(ShiftError::InvalidOption {
                name,
                expected,
                value,
            })
        };
        let p = self;
        if p.max_trees < 1 {
            return bad("max_trees", ">= 1", p.max_trees as f64);
        }
        if !(p.learning_rate > 0.0 && p.learning_rate.is_finite()) {
            return bad("learning_rate", "> 0 and finite", p.learning_rate);
        }
        if p.max_leaf_nodes < 2 {
            return bad("max_leaf_nodes", ">= 2", p.max_leaf_nodes as f64);
        }
        if p.min_samples_leaf < 1 {
            return bad("min_samples_leaf", ">= 1", p.min_samples_leaf as f64);
        }
        if !(p.l2_regularization >= 0.0 && p.l2_regularization.is_finite()) {
            return bad("l2_regularization", ">= 0 and finite", p.l2_regularization);
        }
        if !(2..=255).contains(&p.max_bins) {
            return bad("max_bins", "in [2, 255]", p.max_bins as f64);
        }
        if !(p.validation_fraction >= 0.0 && p.validation_fraction < 1.0) {
            return bad("validation_fraction", "in [0, 1)", p.validation_fraction);
        }
        if p.patience < 1 {
            return bad("patience", ">= 1", p.patience as f64);
        }
        if !(p.tolerance >= 0.0 && p.tolerance.is_finite()) {
            return bad("tolerance", ">= 0 and finite", p.tolerance);
        }
        if p.folds < 2 {
            return bad("folds", ">= 2", p.folds as f64);
        }
        if !(p.probability_clip > 0.0 && p.probability_clip < 0.5) {
            return bad("probability_clip", "in (0, 0.5)", p.probability_clip);
        }
        Ok(())
    }
}

/// Summary of a cross-fit, for JSON.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BoostedReport {
    /// The options used.
    pub params: BoostedParams,
    /// Fit rows, of which labeled (y false) and pool (y true).
    pub rows: usize,
    pub labeled_rows: usize,
    pub pool_rows: usize,
    /// Feature columns.
    pub features: usize,
    /// Per fold: rows the trees were grown on, rows held out for early stopping, rows
    /// predicted out of fold.
    pub training_rows_per_fold: Vec<usize>,
    pub validation_rows_per_fold: Vec<usize>,
    pub out_of_fold_rows_per_fold: Vec<usize>,
    /// Per fold: trees kept (after early stopping) and whether early stopping ended boosting
    /// before `max_trees`.
    pub trees_per_fold: Vec<usize>,
    pub stopped_early: Vec<bool>,
    /// Per fold: total leaves over its trees, and the deepest tree (splits root to leaf).
    pub leaves_per_fold: Vec<usize>,
    pub max_depth_per_fold: Vec<u32>,
    /// Per fold: the initial score (weighted log-odds of its training rows).
    pub initial_log_odds_per_fold: Vec<f64>,
    /// Per fold: weighted mean validation log loss after the initial score and after the
    /// last tree; `None` without early stopping.
    pub initial_validation_loss_per_fold: Vec<Option<f64>>,
    pub validation_loss_per_fold: Vec<Option<f64>>,
    /// The clip c and the log-odds bounds [logit c, logit(1 - c)].
    pub probability_clip: f64,
    pub log_odds_bounds: [f64; 2],
    /// Fit rows whose out-of-fold log-odds was clipped at the lower / upper bound.
    pub out_of_fold_clipped_low: usize,
    pub out_of_fold_clipped_high: usize,
}

/// One tree node; indices are into the fold model's node vector. A leaf is its own left and
/// right child (feature 0), so a walk may take more steps than the leaf's depth and stay put.
#[derive(Debug, Clone, Copy)]
struct Node {
    /// Split feature (0 for a leaf).
    feature: u32,
    /// Child for x <= cut and for not (x <= cut) (a NaN goes right).
    left: u32,
    right: u32,
    /// Raw cut point for a split; the leaf value for a leaf.
    value: f64,
}

impl Node {
    fn leaf(index: usize) -> Self {
        Self {
            feature: 0,
            left: index as u32,
            right: index as u32,
            value: 0.0,
        }
    }

    #[inline]
    fn child(&self, x: f64) -> usize {
        // Branch-free choice: neighbouring rows' walks overlap instead of waiting on
        // mispredicted branches.
        let left = x <= self.value; // false for a NaN: it goes right
        [self.right, self.left][usize::from(left)] as usize
    }
}

/// One fold's model: initial score and trees (nodes of all trees in one vector), each tree's
/// root and depth (most splits from root to a leaf).
#[derive(Debug, Clone)]
struct FoldModel {
    init: f64,
    nodes: Vec<Node>,
    roots: Vec<u32>,
    depths: Vec<u32>,
}

impl FoldModel {
    /// Raw score (log-odds, unclipped) of one row; `value(f)` is the row's feature f.
    #[inline]
    fn raw(&self, value: impl Fn(usize) -> f64) -> f64 {
        let mut score = self.init;
        for &root in &self.roots {
            score += tree_value(&self.nodes, root, &value);
        }
        score
    }
}

#[inline]
fn tree_value(nodes: &[Node], root: u32, value: &impl Fn(usize) -> f64) -> f64 {
    let mut i = root as usize;
    loop {
        let node = nodes[i];
        if node.left as usize == i {
            return node.value;
        }
        i = node.child(value(node.feature as usize));
    }
}

/// Result of [`cross_fit`]: the fold models, the out-of-fold log-odds and a report.
#[derive(Debug, Clone)]
pub struct BoostedFit {
    models: Vec<FoldModel>,
    features: usize,
    bounds: [f64; 2],
    out_of_fold: Vec<f64>,
    report: BoostedReport,
}

impl BoostedFit {
    /// Out-of-fold log-odds for each fit row, in the row order given to [`cross_fit`]: row i
    /// is predicted by the model of the fold that did not train on it; clipped to
    /// [logit(clip), logit(1 - clip)].
    pub fn out_of_fold_log_odds(&self) -> &[f64] {
        &self.out_of_fold
    }

    /// Log-odds for new rows (not in the fit): the mean over the fold models of their
    /// log-odds, clipped the same way. `x` is column-major (feature f of row r at
    /// `x[f * n_rows + r]`) with the fit's feature count. Values must be finite (a NaN goes
    /// to the right child of every split). Parallel over rows, no per-row allocation.
    ///
    /// # Panics
    /// When `x.len() != n_rows * features` (a caller bug, like an out-of-range index).
    pub fn predict_log_odds(&self, x: &[f64], n_rows: usize) -> Vec<f64> {
        assert_eq!(
            x.len(),
            n_rows * self.features,
            "predict_log_odds: {} values for {} rows x {} features",
            x.len(),
            n_rows,
            self.features
        );
        let mut out = vec![0.0; n_rows];
        let folds = self.models.len() as f64;
        let [lo, hi] = self.bounds;
        // Blocks of rows; inside a block, tree by tree over the rows, so one tree's nodes
        // stay in cache and the block's walks are independent of each other.
        out.par_chunks_mut(PREDICT_BLOCK)
            .enumerate()
            .for_each(|(chunk, block)| {
                let start = chunk * PREDICT_BLOCK;
                for model in &self.models {
                    for o in block.iter_mut() {
                        *o += model.init;
                    }
                    for (&root, &depth) in model.roots.iter().zip(&model.depths) {
                        for (lane, outs) in block.chunks_mut(LANES).enumerate() {
                            let first = start + lane * LANES;
                            let mut at = [root as usize; LANES];
                            for _ in 0..depth {
                                for (k, i) in at.iter_mut().enumerate().take(outs.len()) {
                                    let node = &model.nodes[*i];
                                    *i = node.child(x[node.feature as usize * n_rows + first + k]);
                                }
                            }
                            for (o, &i) in outs.iter_mut().zip(&at) {
                                *o += model.nodes[i].value;
                            }
                        }
                    }
                }
                for o in block.iter_mut() {
                    *o = (*o / folds).clamp(lo, hi);
                }
            });
        out
    }

    /// Summary for JSON.
    pub fn report(&self) -> &BoostedReport {
        &self.report
    }
}

/// Cross-fit gradient-boosted trees (module docs). `x` column-major (feature f at row r is
/// `x[f * n + r]`), raw feature values; `y[r]` true for a pool row; `sample_weights[r] > 0`
/// (class-balance weights). Deterministic for a given seed whatever the thread count.
///
/// # Errors
/// [`ShiftError::InvalidOption`] for an option out of range (or `y` / `sample_weights` of
/// the wrong length, named `y.len()` / `sample_weights.len()`), [`ShiftError::BufferLength`]
/// when `x.len()` is not a positive multiple of `n`, [`ShiftError::NonFinite`] for a NaN or
/// infinite feature value (feature named `column <f>`), [`ShiftError::InvalidWeight`] for a
/// weight that is not finite and > 0, [`ShiftError::OneClass`], and
/// [`ShiftError::TooFewRows`] when a class has fewer than 2 x `folds` rows.
pub fn cross_fit(
    x: &[f64],
    n: usize,
    y: &[bool],
    sample_weights: &[f64],
    params: &BoostedParams,
) -> Result<BoostedFit, ShiftError> {
    params.validate()?;
    if n == 0 || x.is_empty() || x.len() % n != 0 {
        let features = x.len().checked_div(n).unwrap_or(0);
        return Err(ShiftError::BufferLength {
            len: x.len(),
            rows: n,
            features,
            expected: n * features.max(1),
        });
    }
    let p = x.len() / n;
    for (name, len) in [
        ("y.len()", y.len()),
        ("sample_weights.len()", sample_weights.len()),
    ] {
        if len != n {
            return Err(ShiftError::InvalidOption {
                name,
                expected: "equal to the row count n",
                value: len as f64,
            });
        }
    }
    if let Some(pos) = x.iter().position(|v| !v.is_finite()) {
        return Err(ShiftError::NonFinite {
            feature: format!("column {}", pos / n),
            row: pos % n,
            value: x[pos],
        });
    }
    if let Some(index) = sample_weights
        .iter()
        .position(|w| !(w.is_finite() && *w > 0.0))
    {
        return Err(ShiftError::InvalidWeight {
            index,
            value: sample_weights[index],
        });
    }
    let pool_rows = y.iter().filter(|&&v| v).count();
    let labeled_rows = n - pool_rows;
    if pool_rows == 0 || labeled_rows == 0 {
        return Err(ShiftError::OneClass {
            positives: pool_rows,
            negatives: labeled_rows,
        });
    }
    let needed = 2 * params.folds;
    for (set, rows) in [("labeled set", labeled_rows), ("pool", pool_rows)] {
        if rows < needed {
            return Err(ShiftError::TooFewRows {
                set,
                rows,
                needed,
                reason:
                    "2 per fold: each fold needs out-of-fold rows and training rows of both classes",
            });
        }
    }

    // Stratified, seeded fold assignment: shuffle each class, deal rows to folds in turn.
    let mut fold_of = vec![0usize; n];
    let mut rng = ChaCha8Rng::seed_from_u64(params.seed);
    rng.set_stream(FOLD_STREAM);
    for class in [false, true] {
        let mut rows: Vec<usize> = (0..n).filter(|&r| y[r] == class).collect();
        rows.shuffle(&mut rng);
        for (i, r) in rows.into_iter().enumerate() {
            fold_of[r] = i % params.folds;
        }
    }

    let data = Data {
        x,
        n,
        p,
        y,
        w: sample_weights,
    };
    let lo = logit(params.probability_clip);
    let bounds = [lo, -lo];
    let mut out_of_fold = vec![0.0; n];
    let mut models = Vec::with_capacity(params.folds);
    let mut report = BoostedReport {
        params: params.clone(),
        rows: n,
        labeled_rows,
        pool_rows,
        features: p,
        training_rows_per_fold: vec![],
        validation_rows_per_fold: vec![],
        out_of_fold_rows_per_fold: vec![],
        trees_per_fold: vec![],
        stopped_early: vec![],
        leaves_per_fold: vec![],
        max_depth_per_fold: vec![],
        initial_log_odds_per_fold: vec![],
        initial_validation_loss_per_fold: vec![],
        validation_loss_per_fold: vec![],
        probability_clip: params.probability_clip,
        log_odds_bounds: bounds,
        out_of_fold_clipped_low: 0,
        out_of_fold_clipped_high: 0,
    };
    for k in 0..params.folds {
        let held: Vec<usize> = (0..n).filter(|&r| fold_of[r] == k).collect();
        let rest: Vec<usize> = (0..n).filter(|&r| fold_of[r] != k).collect();
        let mut rng = ChaCha8Rng::seed_from_u64(params.seed);
        rng.set_stream(VALIDATION_STREAM + k as u64);
        let (train, valid) = validation_split(&rest, y, params.validation_fraction, &mut rng);
        let fitted = fit_one(&data, &train, &valid, params);
        let raw: Vec<f64> = held
            .par_iter()
            .map(|&r| fitted.model.raw(|f| x[f * n + r]))
            .collect();
        for (&r, &s) in held.iter().zip(&raw) {
            if s < lo {
                report.out_of_fold_clipped_low += 1;
            } else if s > -lo {
                report.out_of_fold_clipped_high += 1;
            }
            out_of_fold[r] = s.clamp(lo, -lo);
        }
        report.training_rows_per_fold.push(train.len());
        report.validation_rows_per_fold.push(valid.len());
        report.out_of_fold_rows_per_fold.push(held.len());
        report.trees_per_fold.push(fitted.model.roots.len());
        report.stopped_early.push(fitted.stopped_early);
        report.leaves_per_fold.push(
            fitted
                .model
                .nodes
                .iter()
                .enumerate()
                .filter(|(i, node)| node.left as usize == *i)
                .count(),
        );
        report
            .max_depth_per_fold
            .push(fitted.model.depths.iter().copied().max().unwrap_or(0));
        report.initial_log_odds_per_fold.push(fitted.model.init);
        report
            .initial_validation_loss_per_fold
            .push(fitted.losses.first().copied());
        report
            .validation_loss_per_fold
            .push(fitted.losses.last().copied());
        models.push(fitted.model);
    }
    Ok(BoostedFit {
        models,
        features: p,
        bounds,
        out_of_fold,
        report,
    })
}

fn logit(p: f64) -> f64 {
    (p / (1.0 - p)).ln()
}

/// Split `rows` into (boosting rows, validation rows): per class, a seeded shuffle and the
/// first round(fraction x class rows) rows (at least 1, at most all but 1) to validation.
/// Both lists are returned sorted (row order does not depend on the shuffle).
fn validation_split(
    rows: &[usize],
    y: &[bool],
    fraction: f64,
    rng: &mut ChaCha8Rng,
) -> (Vec<usize>, Vec<usize>) {
    if fraction == 0.0 {
        return (rows.to_vec(), vec![]);
    }
    let mut train = Vec::with_capacity(rows.len());
    let mut valid = Vec::new();
    for class in [false, true] {
        let mut members: Vec<usize> = rows.iter().copied().filter(|&r| y[r] == class).collect();
        members.shuffle(rng);
        let take = ((fraction * members.len() as f64).round() as usize)
            .clamp(1, members.len().saturating_sub(1));
        valid.extend_from_slice(&members[..take]);
        train.extend_from_slice(&members[take..]);
    }
    train.sort_unstable();
    valid.sort_unstable();
    (train, valid)
}

/// The fit data (column-major features, labels, weights).
struct Data<'a> {
    x: &'a [f64],
    n: usize,
    p: usize,
    y: &'a [bool],
    w: &'a [f64],
}

struct Fitted {
    model: FoldModel,
    /// Validation losses: after the initial score, then after each tree.
    losses: Vec<f64>,
    stopped_early: bool,
}

/// Cut points of one feature from its values on the training rows (module docs).
fn cut_points(mut values: Vec<f64>, max_bins: usize) -> Vec<f64> {
    values.sort_unstable_by(f64::total_cmp);
    let mut distinct = values.clone();
    distinct.dedup();
    let mut cuts: Vec<f64> = if distinct.len() <= max_bins {
        distinct.windows(2).map(|v| 0.5 * (v[0] + v[1])).collect()
    } else {
        // numpy percentile, method="midpoint": mean of the order statistics around
        // (m - 1) q / 100.
        let last = (values.len() - 1) as f64;
        (1..max_bins)
            .map(|k| {
                let q = 100.0 * k as f64 / max_bins as f64;
                let h = last * q / 100.0;
                0.5 * (values[h.floor() as usize] + values[h.ceil() as usize])
            })
            .collect()
    };
    cuts.dedup();
    cuts
}

/// One histogram cell: sums of gradients and hessians and the row count of one bin.
#[derive(Debug, Clone, Copy, Default)]
struct Cell {
    g: f64,
    h: f64,
    c: u32,
}

/// Best split of a leaf.
#[derive(Debug, Clone, Copy)]
struct Split {
    gain: f64,
    feature: usize,
    bin: usize,
    left: Cell,
}

/// A leaf of the tree being grown: its rows are `order[start..end]`.
struct Leaf {
    node: usize,
    start: usize,
    end: usize,
    total: Cell,
    hist: Option<Vec<Cell>>,
    split: Option<Split>,
    /// Splits from the root.
    depth: u32,
}

/// Binned training rows and the grower's settings.
struct Grower<'a> {
    /// Column-major bins of the training rows (m rows).
    bins: Vec<u8>,
    m: usize,
    p: usize,
    /// Histogram cells per feature (the largest bin count).
    stride: usize,
    /// Bins of each feature.
    nbins: Vec<usize>,
    cuts: Vec<Vec<f64>>,
    params: &'a BoostedParams,
}

impl Grower<'_> {
    /// Histogram of the rows `rows` (training-row indices) with their ordered g, h.
    fn histogram(&self, rows: &[u32], g: &[f64], h: &[f64]) -> Vec<Cell> {
        let mut hist = vec![Cell::default(); self.p * self.stride];
        hist.par_chunks_mut(self.stride)
            .enumerate()
            .for_each(|(f, cells)| {
                let column = &self.bins[f * self.m..(f + 1) * self.m];
                for ((&r, &gi), &hi) in rows.iter().zip(g).zip(h) {
                    let cell = &mut cells[column[r as usize] as usize];
                    cell.g += gi;
                    cell.h += hi;
                    cell.c += 1;
                }
            });
        hist
    }

    /// Best split over all features of a leaf with histogram `hist` and sums `total`.
    fn best_split(&self, hist: &[Cell], total: Cell) -> Option<Split> {
        let l2 = self.params.l2_regularization;
        let msl = self.params.min_samples_leaf as u32;
        let parent = total.g * total.g / (total.h + l2);
        let per_feature: Vec<Option<Split>> = (0..self.p)
            .into_par_iter()
            .map(|f| {
                let cells = &hist[f * self.stride..f * self.stride + self.nbins[f]];
                let mut left = Cell::default();
                let mut best: Option<Split> = None;
                for (bin, cell) in cells[..cells.len().saturating_sub(1)].iter().enumerate() {
                    left.g += cell.g;
                    left.h += cell.h;
                    left.c += cell.c;
                    let right = Cell {
                        g: total.g - left.g,
                        h: total.h - left.h,
                        c: total.c - left.c,
                    };
                    if left.c < msl || right.c < msl {
                        continue;
                    }
                    if left.h < MIN_HESSIAN || right.h < MIN_HESSIAN {
                        continue;
                    }
                    let gain = left.g * left.g / (left.h + l2) + right.g * right.g / (right.h + l2)
                        - parent;
                    if gain > 0.0 && best.map_or(true, |b| gain > b.gain) {
                        best = Some(Split {
                            gain,
                            feature: f,
                            bin,
                            left,
                        });
                    }
                }
                best
            })
            .collect();
        // Ordered reduction: the first feature wins a tie.
        per_feature
            .into_iter()
            .flatten()
            .fold(None, |best, s| match best {
                Some(b) if b.gain >= s.gain => Some(b),
                _ => Some(s),
            })
    }

    /// Grow one tree on the gradients `g`, `h` of the training rows; appends its nodes to
    /// `nodes` (root first), adds each row's leaf value to `score` and returns the depth.
    fn grow(&self, g: &[f64], h: &[f64], nodes: &mut Vec<Node>, score: &mut [f64]) -> u32 {
        let params = self.params;
        let base = nodes.len();
        let mut order: Vec<u32> = (0..self.m as u32).collect();
        let mut scratch: Vec<u32> = Vec::with_capacity(self.m);
        let mut og: Vec<f64> = Vec::with_capacity(self.m);
        let mut oh: Vec<f64> = Vec::with_capacity(self.m);
        let total = Cell {
            g: ordered_sum(g),
            h: ordered_sum(h),
            c: self.m as u32,
        };
        nodes.push(Node::leaf(base));
        let mut leaves = vec![self.open_leaf(base, 0, self.m, total, None, &order, g, h)];
        let mut finished: Vec<Leaf> = Vec::new();
        while leaves.len() + finished.len() < params.max_leaf_nodes {
            // Best-first: the open leaf with the largest gain (first one on a tie).
            let pick = leaves
                .iter()
                .enumerate()
                .filter_map(|(i, leaf)| leaf.split.map(|s| (i, s.gain)))
                .fold(None, |best: Option<(usize, f64)>, (i, gain)| match best {
                    Some((_, b)) if b >= gain => best,
                    _ => Some((i, gain)),
                });
            let Some((index, _)) = pick else { break };
            let leaf = leaves.remove(index);
            let Some(split) = leaf.split else { break };
            // Stable partition of the leaf's rows: bin <= split.bin to the left.
            let column = &self.bins[split.feature * self.m..(split.feature + 1) * self.m];
            scratch.clear();
            let mut write = leaf.start;
            for i in leaf.start..leaf.end {
                let r = order[i];
                if column[r as usize] as usize <= split.bin {
                    order[write] = r;
                    write += 1;
                } else {
                    scratch.push(r);
                }
            }
            order[write..leaf.end].copy_from_slice(&scratch);
            let left_node = nodes.len();
            nodes[leaf.node] = Node {
                feature: split.feature as u32,
                left: left_node as u32,
                right: left_node as u32 + 1,
                value: self.cuts[split.feature][split.bin],
            };
            nodes.push(Node::leaf(left_node));
            nodes.push(Node::leaf(left_node + 1));
            let left_total = split.left;
            let right_total = Cell {
                g: leaf.total.g - left_total.g,
                h: leaf.total.h - left_total.h,
                c: leaf.total.c - left_total.c,
            };
            // Histogram of the smaller child directly, the other by subtraction.
            let parent_hist = leaf.hist.unwrap_or_default();
            let left_smaller = left_total.c <= right_total.c;
            let (small, large) = if left_smaller {
                ((leaf.start, write), (write, leaf.end))
            } else {
                ((write, leaf.end), (leaf.start, write))
            };
            let need = |c: u32| c as usize >= 2 * params.min_samples_leaf;
            let (small_total, large_total) = if left_smaller {
                (left_total, right_total)
            } else {
                (right_total, left_total)
            };
            let mut small_hist = None;
            let mut large_hist = None;
            if need(small_total.c) || need(large_total.c) {
                gather(&order[small.0..small.1], g, h, &mut og, &mut oh);
                let hs = self.histogram(&order[small.0..small.1], &og, &oh);
                let hl: Vec<Cell> = parent_hist
                    .iter()
                    .zip(&hs)
                    .map(|(a, b)| Cell {
                        g: a.g - b.g,
                        h: a.h - b.h,
                        c: a.c - b.c,
                    })
                    .collect();
                small_hist = Some(hs);
                large_hist = Some(hl);
            }
            let (small_node, large_node) = if left_smaller {
                (left_node, left_node + 1)
            } else {
                (left_node + 1, left_node)
            };
            for (node, range, t, hist) in [
                (small_node, small, small_total, small_hist),
                (large_node, large, large_total, large_hist),
            ] {
                let mut child = self.open_leaf(node, range.0, range.1, t, hist, &order, g, h);
                child.depth = leaf.depth + 1;
                if child.split.is_some() {
                    leaves.push(child);
                } else {
                    finished.push(child);
                }
            }
        }
        let mut depth = 0;
        for leaf in leaves.iter().chain(&finished) {
            let value = -params.learning_rate * leaf.total.g
                / (leaf.total.h + params.l2_regularization + 1e-15);
            nodes[leaf.node].value = value;
            for &r in &order[leaf.start..leaf.end] {
                score[r as usize] += value;
            }
            depth = depth.max(leaf.depth);
        }
        depth
    }

    /// A leaf with its best split when it may be split (`hist` given or built here).
    #[allow(clippy::too_many_arguments)]
    fn open_leaf(
        &self,
        node: usize,
        start: usize,
        end: usize,
        total: Cell,
        hist: Option<Vec<Cell>>,
        order: &[u32],
        g: &[f64],
        h: &[f64],
    ) -> Leaf {
        let mut leaf = Leaf {
            node,
            start,
            end,
            total,
            hist: None,
            split: None,
            depth: 0,
        };
        if (total.c as usize) < 2 * self.params.min_samples_leaf {
            return leaf;
        }
        let hist = hist.unwrap_or_else(|| {
            let (mut og, mut oh) = (Vec::new(), Vec::new());
            gather(&order[start..end], g, h, &mut og, &mut oh);
            self.histogram(&order[start..end], &og, &oh)
        });
        leaf.split = self.best_split(&hist, total);
        leaf.hist = leaf.split.map(|_| hist);
        leaf
    }
}

/// `og[i] = g[rows[i]]`, `oh[i] = h[rows[i]]` (contiguous gradients for the histogram loop).
fn gather(rows: &[u32], g: &[f64], h: &[f64], og: &mut Vec<f64>, oh: &mut Vec<f64>) {
    og.clear();
    oh.clear();
    og.extend(rows.iter().map(|&r| g[r as usize]));
    oh.extend(rows.iter().map(|&r| h[r as usize]));
}

/// Sum in fixed chunks added in order (independent of the thread count).
fn ordered_sum(v: &[f64]) -> f64 {
    let parts: Vec<f64> = v.par_chunks(CHUNK).map(|c| c.iter().sum()).collect();
    parts.iter().sum()
}

/// log(1 + exp(f)) without overflow.
fn softplus(f: f64) -> f64 {
    if f > 0.0 {
        f + (-f).exp().ln_1p()
    } else {
        f.exp().ln_1p()
    }
}

fn sigmoid(f: f64) -> f64 {
    1.0 / (1.0 + (-f).exp())
}

/// Fit one fold model on the rows `train`, early stopping on the rows `valid`.
fn fit_one(data: &Data, train: &[usize], valid: &[usize], params: &BoostedParams) -> Fitted {
    let (x, n, p) = (data.x, data.n, data.p);
    let m = train.len();
    let cuts: Vec<Vec<f64>> = (0..p)
        .into_par_iter()
        .map(|f| {
            let values = train.iter().map(|&r| x[f * n + r]).collect();
            cut_points(values, params.max_bins)
        })
        .collect();
    let mut bins = vec![0u8; m * p];
    bins.par_chunks_mut(m.max(1))
        .zip(&cuts)
        .enumerate()
        .for_each(|(f, (column, cut))| {
            for (b, &r) in column.iter_mut().zip(train) {
                let v = x[f * n + r];
                *b = cut.partition_point(|&c| c < v) as u8;
            }
        });
    let nbins: Vec<usize> = cuts.iter().map(|c| c.len() + 1).collect();
    let grower = Grower {
        bins,
        m,
        p,
        stride: nbins.iter().copied().max().unwrap_or(1),
        nbins,
        cuts,
        params,
    };

    let yt: Vec<f64> = train
        .iter()
        .map(|&r| f64::from(u8::from(data.y[r])))
        .collect();
    let wt: Vec<f64> = train.iter().map(|&r| data.w[r]).collect();
    let pos: Vec<f64> = yt.iter().zip(&wt).map(|(y, w)| y * w).collect();
    let (wpos, wall) = (ordered_sum(&pos), ordered_sum(&wt));
    let init = (wpos / (wall - wpos)).ln();
    let mut model = FoldModel {
        init,
        nodes: Vec::new(),
        roots: Vec::new(),
        depths: Vec::new(),
    };
    let mut score = vec![init; m];
    let mut g = vec![0.0; m];
    let mut h = vec![0.0; m];
    let mut val_score = vec![init; valid.len()];
    let val_loss = |s: &[f64]| -> f64 {
        let parts: Vec<(f64, f64)> = s
            .par_chunks(CHUNK)
            .zip(valid.par_chunks(CHUNK))
            .map(|(sc, rows)| {
                sc.iter().zip(rows).fold((0.0, 0.0), |(l, ws), (&f, &r)| {
                    let w = data.w[r];
                    let yv = f64::from(u8::from(data.y[r]));
                    (l + w * (softplus(f) - yv * f), ws + w)
                })
            })
            .collect();
        let (l, ws) = parts
            .iter()
            .fold((0.0, 0.0), |(a, b), &(c, d)| (a + c, b + d));
        l / ws
    };
    let early = !valid.is_empty();
    let mut losses = Vec::new();
    if early {
        losses.push(val_loss(&val_score));
    }
    let mut stopped_early = false;
    for _ in 0..params.max_trees {
        g.par_chunks_mut(CHUNK)
            .zip(h.par_chunks_mut(CHUNK))
            .enumerate()
            .for_each(|(c, (gc, hc))| {
                let start = c * CHUNK;
                for (i, (gi, hi)) in gc.iter_mut().zip(hc.iter_mut()).enumerate() {
                    let j = start + i;
                    let prob = sigmoid(score[j]);
                    *gi = wt[j] * (prob - yt[j]);
                    *hi = wt[j] * prob * (1.0 - prob);
                }
            });
        let root = model.nodes.len();
        let depth = grower.grow(&g, &h, &mut model.nodes, &mut score);
        model.roots.push(root as u32);
        model.depths.push(depth);
        if early {
            let nodes = &model.nodes;
            val_score
                .par_iter_mut()
                .zip(valid.par_iter())
                .for_each(|(s, &r)| *s += tree_value(nodes, root as u32, &|f| x[f * n + r]));
            losses.push(val_loss(&val_score));
            let k = params.patience;
            if losses.len() > k {
                let reference = losses[losses.len() - k - 1];
                if !losses[losses.len() - k..]
                    .iter()
                    .any(|&l| l < reference - params.tolerance)
                {
                    stopped_early = model.roots.len() < params.max_trees;
                    break;
                }
            }
        }
    }
    Fitted {
        model,
        losses,
        stopped_early,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shift::test_support::normal_table;
    use rand::Rng;

    /// Labels: the first `labeled` rows false, the rest true.
    fn labels(labeled: usize, pool: usize) -> Vec<bool> {
        (0..labeled + pool).map(|r| r >= labeled).collect()
    }

    /// Two tables stacked row-wise (column-major both).
    fn stack(a: &[f64], na: usize, b: &[f64], nb: usize, p: usize) -> Vec<f64> {
        let mut out = Vec::with_capacity((na + nb) * p);
        for f in 0..p {
            out.extend_from_slice(&a[f * na..(f + 1) * na]);
            out.extend_from_slice(&b[f * nb..(f + 1) * nb]);
        }
        out
    }

    fn variance_shift(n: usize, seed: u64) -> (Vec<f64>, Vec<bool>) {
        let a = normal_table(n, &[0.0; 3], &[1.0; 3], seed);
        let b = normal_table(n, &[0.0; 3], &[0.6, 1.0, 1.0], seed + 1);
        (stack(&a, n, &b, n, 3), labels(n, n))
    }

    #[test]
    fn same_seed_same_output_whatever_the_thread_count() {
        let (x, y) = variance_shift(800, 3);
        let w = vec![1.0; y.len()];
        let params = BoostedParams::default();
        let run = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .expect("pool");
            pool.install(|| cross_fit(&x, y.len(), &y, &w, &params).expect("fit"))
        };
        let (one, two) = (run(1), run(2));
        assert_eq!(one.out_of_fold_log_odds(), two.out_of_fold_log_odds());
        assert_eq!(one.report(), two.report());
        let again = run(2);
        assert_eq!(two.out_of_fold_log_odds(), again.out_of_fold_log_odds());
        let new = normal_table(300, &[0.0; 3], &[1.0; 3], 99);
        assert_eq!(
            one.predict_log_odds(&new, 300),
            two.predict_log_odds(&new, 300)
        );
        // A different seed gives other folds, hence other out-of-fold values.
        let other =
            cross_fit(&x, y.len(), &y, &w, &BoostedParams { seed: 1, ..params }).expect("fit");
        assert_ne!(one.out_of_fold_log_odds(), other.out_of_fold_log_odds());
    }

    #[test]
    fn early_stopping_stops_on_pure_noise() {
        // Both classes from the same distribution: beyond chance the validation loss only
        // gets worse after the initial score, so boosting stops `patience` trees after the
        // last (chance) improvement of the 300-row validation loss (scikit-learn's rule, which
        // keeps those trees). Bound: 3 x patience = 30 trees, against max_trees = 200.
        let x = normal_table(3000, &[0.0; 4], &[1.0; 4], 11);
        let y = labels(1500, 1500);
        let w = vec![1.0; y.len()];
        let params = BoostedParams {
            max_trees: 200,
            ..BoostedParams::default()
        };
        let fit = cross_fit(&x, y.len(), &y, &w, &params).expect("fit");
        let report = fit.report();
        for (&trees, &early) in report.trees_per_fold.iter().zip(&report.stopped_early) {
            assert!(early, "{report:?}");
            assert!(trees <= 3 * params.patience, "{:?}", report.trees_per_fold);
        }
        // Without a signal the out-of-fold log-odds stay near 0 (equal classes).
        let oof = fit.out_of_fold_log_odds();
        let mean = oof.iter().sum::<f64>() / oof.len() as f64;
        assert!(mean.abs() < 0.05, "{mean}");
    }

    #[test]
    fn recovers_a_threshold_shift() {
        // Labeled x0 ~ U(0, 1); pool x0 > 0.5 with probability 0.8. True log ratio
        // log(0.8 / 0.5) above 0.5 and log(0.2 / 0.5) below: a step of log 4 = 1.386.
        let n = 2000;
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut x = vec![0.0; 2 * n * 2];
        for r in 0..2 * n {
            let u: f64 = rng.gen();
            x[r] = if r < n {
                u
            } else if rng.gen::<f64>() < 0.8 {
                0.5 + 0.5 * u
            } else {
                0.5 * u
            };
            x[2 * n + r] = rng.gen(); // noise feature
        }
        let y = labels(n, n);
        let w = vec![1.0; 2 * n];
        let fit = cross_fit(&x, 2 * n, &y, &w, &BoostedParams::default()).expect("fit");
        let oof = fit.out_of_fold_log_odds();
        let mean = |above: bool| {
            let v: Vec<f64> = (0..2 * n)
                .filter(|&r| (x[r] > 0.5) == above)
                .map(|r| oof[r])
                .collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        let step = mean(true) - mean(false);
        // Tolerance 0.3 (about 20%): boosting with shrinkage and early stopping shrinks the
        // step; each side's mean has a standard error near 0.05 (2000 rows).
        assert!((step - 4f64.ln()).abs() < 0.3, "step {step}");
        // New rows far from the cut get the right side.
        let new = vec![0.1, 0.9, 0.5, 0.5];
        let pred = fit.predict_log_odds(&new, 2);
        assert!(pred[1] - pred[0] > 1.0, "{pred:?}");
    }

    #[test]
    fn clipping_is_counted() {
        // Separable classes: labeled x0 in {0, ..., 49}, pool x0 in {100, ..., 149}. With at
        // most 255 distinct values every value is its own bin, so the gap is a cut point (with
        // quantile bins a bin may straddle the gap and mix a few rows of both classes). The
        // log-odds run far past logit(0.05) = -2.94 on both sides: every value is clipped.
        let n = 500;
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let x: Vec<f64> = (0..2 * n)
            .map(|r| f64::from(rng.gen_range(0..50u32) + if r < n { 0 } else { 100 }))
            .collect();
        let y = labels(n, n);
        let w = vec![1.0; 2 * n];
        let params = BoostedParams {
            probability_clip: 0.05,
            ..BoostedParams::default()
        };
        let fit = cross_fit(&x, 2 * n, &y, &w, &params).expect("fit");
        let report = fit.report();
        let bound = (0.95f64 / 0.05).ln();
        assert!((report.log_odds_bounds[1] - bound).abs() < 1e-12);
        assert_eq!(report.out_of_fold_clipped_low, n, "{report:?}");
        assert_eq!(report.out_of_fold_clipped_high, n, "{report:?}");
        let oof = fit.out_of_fold_log_odds();
        assert!(oof[..n].iter().all(|&v| v == -bound));
        assert!(oof[n..].iter().all(|&v| v == bound));
        assert_eq!(fit.predict_log_odds(&[-5.0, 200.0], 2), vec![-bound, bound]);
        // With the default clip 1e-3 (|logit| 6.9) fewer rows hit the bounds, and the count
        // is exactly the number of out-of-fold values at a bound.
        let fit = cross_fit(&x, 2 * n, &y, &w, &BoostedParams::default()).expect("fit");
        let [lo, hi] = fit.report().log_odds_bounds;
        let oof = fit.out_of_fold_log_odds();
        let at_lo = oof.iter().filter(|&&v| v == lo).count();
        let at_hi = oof.iter().filter(|&&v| v == hi).count();
        assert_eq!(fit.report().out_of_fold_clipped_low, at_lo);
        assert_eq!(fit.report().out_of_fold_clipped_high, at_hi);
    }

    #[test]
    fn doubling_the_pool_weight_adds_log_2() {
        // With class weights s_0 (labeled) and s_1 (pool), the weighted log loss is minimized
        // by F(x) = log(s_1 p(x | pool) n_1 / (s_0 p(x | labeled) n_0)): doubling s_1 adds
        // exactly log 2 to the population minimizer and to the initial score
        // log(sum s y / sum s (1 - y)) (to rounding, 1e-12). The trees approximate the
        // minimizer from data, so the out-of-fold log-odds move by log 2 on average up to
        // the boosted fit's estimation noise; with 1500 + 1500 rows a mean shift within 0.1
        // of log 2 = 0.693 (about 15%) is required.
        let (x, y) = variance_shift(1500, 21);
        let n = y.len();
        let w1 = vec![1.0; n];
        let w2: Vec<f64> = y.iter().map(|&p| if p { 2.0 } else { 1.0 }).collect();
        let params = BoostedParams::default();
        let a = cross_fit(&x, n, &y, &w1, &params).expect("fit");
        let b = cross_fit(&x, n, &y, &w2, &params).expect("fit");
        for (ia, ib) in a
            .report()
            .initial_log_odds_per_fold
            .iter()
            .zip(&b.report().initial_log_odds_per_fold)
        {
            assert!((ib - ia - 2f64.ln()).abs() < 1e-12, "{ia} {ib}");
        }
        let mean = |f: &BoostedFit| f.out_of_fold_log_odds().iter().sum::<f64>() / n as f64;
        let shift = mean(&b) - mean(&a);
        assert!((shift - 2f64.ln()).abs() < 0.1, "shift {shift}");
    }

    #[test]
    fn invalid_inputs_are_named() {
        let (x, y) = variance_shift(100, 1);
        let n = y.len();
        let w = vec![1.0; n];
        let ok = BoostedParams::default();
        let cases: Vec<(BoostedParams, &str)> = vec![
            (
                BoostedParams {
                    folds: 1,
                    ..ok.clone()
                },
                "folds",
            ),
            (
                BoostedParams {
                    learning_rate: 0.0,
                    ..ok.clone()
                },
                "learning_rate",
            ),
            (
                BoostedParams {
                    learning_rate: f64::NAN,
                    ..ok.clone()
                },
                "learning_rate",
            ),
            (
                BoostedParams {
                    probability_clip: 0.5,
                    ..ok.clone()
                },
                "probability_clip",
            ),
            (
                BoostedParams {
                    probability_clip: 0.0,
                    ..ok.clone()
                },
                "probability_clip",
            ),
            (
                BoostedParams {
                    max_bins: 256,
                    ..ok.clone()
                },
                "max_bins",
            ),
            (
                BoostedParams {
                    max_bins: 1,
                    ..ok.clone()
                },
                "max_bins",
            ),
            (
                BoostedParams {
                    max_leaf_nodes: 1,
                    ..ok.clone()
                },
                "max_leaf_nodes",
            ),
            (
                BoostedParams {
                    min_samples_leaf: 0,
                    ..ok.clone()
                },
                "min_samples_leaf",
            ),
            (
                BoostedParams {
                    max_trees: 0,
                    ..ok.clone()
                },
                "max_trees",
            ),
            (
                BoostedParams {
                    l2_regularization: -1.0,
                    ..ok.clone()
                },
                "l2_regularization",
            ),
            (
                BoostedParams {
                    validation_fraction: 1.0,
                    ..ok.clone()
                },
                "validation_fraction",
            ),
            (
                BoostedParams {
                    patience: 0,
                    ..ok.clone()
                },
                "patience",
            ),
            (
                BoostedParams {
                    tolerance: -1e-9,
                    ..ok.clone()
                },
                "tolerance",
            ),
        ];
        for (params, expected) in cases {
            match cross_fit(&x, n, &y, &w, &params) {
                Err(ShiftError::InvalidOption { name, .. }) => assert_eq!(name, expected),
                other => panic!("{expected}: {other:?}"),
            }
        }
        assert!(matches!(
            cross_fit(&x[1..], n, &y, &w, &ok),
            Err(ShiftError::BufferLength { .. })
        ));
        assert!(matches!(
            cross_fit(&x, n, &y[1..], &w, &ok),
            Err(ShiftError::InvalidOption {
                name: "y.len()",
                ..
            })
        ));
        let mut bad_x = x.clone();
        bad_x[n + 7] = f64::NAN;
        match cross_fit(&bad_x, n, &y, &w, &ok) {
            Err(ShiftError::NonFinite { feature, row, .. }) => {
                assert_eq!((feature.as_str(), row), ("column 1", 7));
            }
            other => panic!("{other:?}"),
        }
        let mut bad_w = w.clone();
        bad_w[3] = 0.0;
        assert!(matches!(
            cross_fit(&x, n, &y, &bad_w, &ok),
            Err(ShiftError::InvalidWeight { index: 3, .. })
        ));
        assert!(matches!(
            cross_fit(&x, n, &vec![false; n], &w, &ok),
            Err(ShiftError::OneClass { positives: 0, .. })
        ));
        let mut few = vec![false; n];
        for v in few.iter_mut().take(9) {
            *v = true;
        }
        assert!(matches!(
            cross_fit(&x, n, &few, &w, &ok),
            Err(ShiftError::TooFewRows {
                set: "pool",
                rows: 9,
                needed: 10,
                ..
            })
        ));
    }

    #[test]
    fn cut_points_follow_the_quantile_rule() {
        // Few distinct values: midpoints between them (scikit-learn's _find_binning_thresholds).
        assert_eq!(cut_points(vec![3.0, 1.0, 2.0, 2.0], 255), vec![1.5, 2.5]);
        // Many: numpy percentile "midpoint" at 100 k / max_bins; for 0..=9 and 4 bins the
        // positions 9 q / 100 are 2.25, 4.5, 6.75 -> 2.5, 4.5, 6.5 (hand computation).
        let v: Vec<f64> = (0..10).map(f64::from).collect();
        assert_eq!(cut_points(v, 4), vec![2.5, 4.5, 6.5]);
    }
}
