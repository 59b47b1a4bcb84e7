//! L2-penalized logistic regression by damped Newton (IRLS), written for the domain
//! classifier (design.md 2.5).
//!
//! # Formula
//! Minimize over beta = (intercept, slopes)
//!
//! L(beta) = sum_r s_r [log(1 + exp(eta_r)) - y_r eta_r] + (alpha / 2) ||slopes||^2,
//! eta_r = x_r' beta,
//!
//! with sample weights s_r (1 when absent). This is scikit-learn's `LogisticRegression` with
//! `C = 1 / alpha` (its objective is C times the summed loss plus half the squared norm, the
//! intercept unpenalized), and linfa-logistic's objective with the same `alpha`.
//! Gradient g = X'(s (p - y)) + alpha (0, slopes); Hessian H = X' diag(s p (1 - p)) X + alpha
//! diag(0, 1, ..., 1). Each iteration solves H d = -g by Cholesky (a small ridge is added only
//! if the factorization fails) and halves the step until the Armijo condition
//! L(beta + t d) <= L(beta) + 1e-4 t g'd holds (Nocedal & Wright 2006, Numerical
//! Optimization, algorithm 3.1 with Newton directions). The loss is evaluated with a stable
//! softplus, so near-separable data give large but finite coefficients, never NaN.
//!
//! Performance: with 400,000 rows or more, Newton starts from the fit on a strided
//! subsample of about 200,000 rows (sample weights scaled up, tolerance 1e-6), so the full
//! data need one or two iterations; the Hessian is skipped on an iteration that the previous
//! step predicts to be the converged one. X'WX is accumulated over row chunks in parallel (rayon), each chunk one
//! matrix product through ndarray's GEMM on the column-major buffer; per-chunk partial sums
//! are added in chunk order, so results do not depend on the thread count.

use linfa::dataset::{AsSingleTargets, DatasetBase};
use linfa::traits::Fit;
use linfa::ParamGuard;
use ndarray::{Array2, ArrayBase, Data, Ix2};
use rayon::prelude::*;
use serde::Serialize;

use super::ShiftError;

/// Rows per chunk of the parallel accumulation.
const CHUNK: usize = 8192;
/// Armijo sufficient-decrease constant.
const ARMIJO: f64 = 1e-4;
/// Step halvings before the line search gives up.
const MAX_HALVINGS: usize = 60;

/// Unchecked solver settings (linfa's params-then-checked-params pattern).
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticParams(pub LogisticValidParams);

/// Validated solver settings.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LogisticValidParams {
    /// L2 penalty on the slopes (scikit-learn C = 1 / alpha). Must be > 0 and finite.
    pub alpha: f64,
    /// Stop when max_j |g_j| / sum_r s_r <= tolerance (gradient of the mean loss).
    pub tolerance: f64,
    /// Maximum Newton iterations.
    pub max_iterations: usize,
}

impl Default for LogisticParams {
    /// alpha 1.0 (scikit-learn's default C = 1), tolerance 1e-8, 100 iterations.
    fn default() -> Self {
        Self(LogisticValidParams {
            alpha: 1.0,
            tolerance: 1e-8,
            max_iterations: 100,
        })
    }
}

impl LogisticParams {
    /// Penalty alpha. Defaults to 1.0.
    pub fn alpha(mut self, alpha: f64) -> Self {
        self.0.alpha = alpha;
        self
    }
    /// Gradient tolerance. Defaults to 1e-8.
    pub fn tolerance(mut self, tolerance: f64) -> Self {
        self.0.tolerance = tolerance;
        self
    }
    /// Iteration limit. Defaults to 100.
    pub fn max_iterations(mut self, max_iterations: usize) -> Self {
        self.0.max_iterations = max_iterations;
        self
    }
}

impl ParamGuard for LogisticParams {
    type Checked = LogisticValidParams;
    type Error = ShiftError;

    fn check_ref(&self) -> Result<&LogisticValidParams, ShiftError> {
        let p = &self.0;
        if !(p.alpha > 0.0 && p.alpha.is_finite()) {
            return Err(ShiftError::InvalidOption {
                name: "alpha",
                expected: "finite and > 0",
                value: p.alpha,
            });
        }
        if !(p.tolerance > 0.0 && p.tolerance.is_finite()) {
            return Err(ShiftError::InvalidOption {
                name: "tolerance",
                expected: "finite and > 0",
                value: p.tolerance,
            });
        }
        if p.max_iterations == 0 {
            return Err(ShiftError::InvalidOption {
                name: "max_iterations",
                expected: "at least 1",
                value: 0.0,
            });
        }
        Ok(p)
    }

    fn check(self) -> Result<LogisticValidParams, ShiftError> {
        self.check_ref()?;
        Ok(self.0)
    }
}

/// What the solver did.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FitReport {
    /// Newton steps taken.
    pub iterations: usize,
    /// max_j |g_j| / sum_r s_r at the returned coefficients.
    pub gradient_norm: f64,
    /// `gradient_norm <= tolerance`.
    pub converged: bool,
    /// Objective L(beta) at the returned coefficients.
    pub loss: f64,
}

/// A fitted model: intercept first, then one slope per column after the ones column.
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticModel {
    coefficients: Vec<f64>,
    report: FitReport,
}

impl LogisticModel {
    /// Intercept then slopes.
    pub fn coefficients(&self) -> &[f64] {
        &self.coefficients
    }
    /// Solver report.
    pub fn report(&self) -> &FitReport {
        &self.report
    }
    /// P(y = 1 | x) for each row of `x` (rows x slopes, without the ones column).
    pub fn predict_probability<D: Data<Elem = f64>>(&self, x: &ArrayBase<D, Ix2>) -> Vec<f64> {
        x.rows()
            .into_iter()
            .map(|row| {
                let eta = self.coefficients[0]
                    + row
                        .iter()
                        .zip(&self.coefficients[1..])
                        .map(|(a, b)| a * b)
                        .sum::<f64>();
                sigmoid(eta)
            })
            .collect()
    }
}

/// Numerically stable logistic function.
pub(crate) fn sigmoid(eta: f64) -> f64 {
    if eta >= 0.0 {
        1.0 / (1.0 + (-eta).exp())
    } else {
        let e = eta.exp();
        e / (1.0 + e)
    }
}

/// log(1 + exp(eta)) without overflow.
fn softplus(eta: f64) -> f64 {
    if eta > 0.0 {
        eta + (-eta).exp().ln_1p()
    } else {
        eta.exp().ln_1p()
    }
}

struct Problem<'a> {
    x: &'a [f64],
    n: usize,
    k: usize,
    y: &'a [bool],
    s: Option<&'a [f64]>,
    alpha: f64,
}

impl Problem<'_> {
    fn weight(&self, r: usize) -> f64 {
        self.s.map_or(1.0, |s| s[r])
    }

    fn penalty(&self, beta: &[f64]) -> f64 {
        0.5 * self.alpha * beta[1..].iter().map(|b| b * b).sum::<f64>()
    }

    fn chunks(&self) -> usize {
        self.n.div_ceil(CHUNK)
    }

    /// Summed loss (without penalty) at eta + t d.
    fn data_loss(&self, eta: &[f64], d: Option<(&[f64], f64)>) -> f64 {
        let parts: Vec<f64> = (0..self.chunks())
            .into_par_iter()
            .map(|c| {
                let (lo, hi) = (c * CHUNK, ((c + 1) * CHUNK).min(self.n));
                (lo..hi)
                    .map(|r| {
                        let e = match d {
                            Some((d, t)) => eta[r] + t * d[r],
                            None => eta[r],
                        };
                        let y = if self.y[r] { e } else { 0.0 };
                        self.weight(r) * (softplus(e) - y)
                    })
                    .sum()
            })
            .collect();
        parts.iter().sum()
    }

    /// Gradient and (when `hessian`) Hessian of the full objective, and the data loss, at
    /// eta (= X beta). Without `hessian` the returned matrix is all zeros.
    fn derivatives(
        &self,
        eta: &[f64],
        beta: &[f64],
        hessian: bool,
    ) -> (Vec<f64>, Array2<f64>, f64) {
        let (n, k) = (self.n, self.k);
        let parts: Vec<(Vec<f64>, Array2<f64>, f64)> = (0..self.chunks())
            .into_par_iter()
            .map_init(
                || GramScratch::new(k),
                |scratch, c| {
                    let (lo, hi) = (c * CHUNK, ((c + 1) * CHUNK).min(n));
                    let len = hi - lo;
                    let mut resid = vec![0.0; len];
                    let mut loss = 0.0;
                    let mut v = vec![0.0; len];
                    for (i, r) in (lo..hi).enumerate() {
                        let s = self.weight(r);
                        let p = sigmoid(eta[r]);
                        let y = if self.y[r] { 1.0 } else { 0.0 };
                        resid[i] = s * (p - y);
                        v[i] = s * p * (1.0 - p);
                        loss += s * (softplus(eta[r]) - y * eta[r]);
                    }
                    let g: Vec<f64> = (0..k)
                        .map(|j| dot(&self.x[j * n + lo..j * n + hi], &resid))
                        .collect();
                    let h = if hessian {
                        scratch.weighted_gram(self.x, n, lo, &v)
                    } else {
                        Array2::<f64>::zeros((k, k))
                    };
                    (g, h, loss)
                },
            )
            .collect();
        let mut g = vec![0.0; k];
        let mut h = Array2::<f64>::zeros((k, k));
        let mut loss = 0.0;
        for (pg, ph, pl) in parts {
            for (a, b) in g.iter_mut().zip(&pg) {
                *a += b;
            }
            h += &ph;
            loss += pl;
        }
        for j in 1..k {
            g[j] += self.alpha * beta[j];
            h[[j, j]] += self.alpha;
        }
        (g, h, loss)
    }

    /// X d for a coefficient-space direction d.
    fn times(&self, d: &[f64]) -> Vec<f64> {
        let (n, k) = (self.n, self.k);
        let mut out = vec![0.0; n];
        out.par_chunks_mut(CHUNK).enumerate().for_each(|(c, o)| {
            let lo = c * CHUNK;
            for (j, dj) in d.iter().enumerate().take(k) {
                let col = &self.x[j * n + lo..j * n + lo + o.len()];
                for (a, x) in o.iter_mut().zip(col) {
                    *a += dj * x;
                }
            }
        });
        out
    }
}

/// Scratch space for [`GramScratch::weighted_gram`]: one block of rows in row-major order
/// (columns padded to a multiple of 4) and the lower-triangle accumulator.
struct GramScratch {
    k: usize,
    padded: usize,
    rows: Vec<f64>,
    acc: Vec<f64>,
}

/// Rows transposed at a time (the block stays in L1/L2 cache).
const GRAM_BLOCK: usize = 128;

impl GramScratch {
    fn new(k: usize) -> Self {
        let padded = k.div_ceil(4) * 4;
        Self {
            k,
            padded,
            rows: vec![0.0; GRAM_BLOCK * padded],
            acc: vec![0.0; k * padded],
        }
    }

    /// sum_r v_r x_r x_r' over rows lo..lo + v.len() of the column-major `x` (n rows).
    ///
    /// Blocks of rows are transposed to row-major, then four rows at a time are added to
    /// the lower triangle as a rank-4 update (each accumulator entry gets four
    /// multiply-adds per load and store). Uses AVX2/FMA when the CPU has them.
    fn weighted_gram(&mut self, x: &[f64], n: usize, lo: usize, v: &[f64]) -> Array2<f64> {
        let (k, kp) = (self.k, self.padded);
        self.acc.fill(0.0);
        for start in (0..v.len()).step_by(GRAM_BLOCK) {
            let len = GRAM_BLOCK.min(v.len() - start);
            for j in 0..k {
                let col = &x[j * n + lo + start..j * n + lo + start + len];
                for (r, value) in col.iter().enumerate() {
                    self.rows[r * kp + j] = *value;
                }
            }
            let weights = &v[start..start + len];
            #[cfg(target_arch = "x86_64")]
            {
                if std::arch::is_x86_feature_detected!("avx2")
                    && std::arch::is_x86_feature_detected!("fma")
                {
                    // SAFETY: the CPU supports the features the function is compiled for.
                    unsafe { rank_updates_fma(&mut self.acc, &self.rows, weights, k, kp) };
                    continue;
                }
            }
            rank_updates::<false>(&mut self.acc, &self.rows, weights, k, kp);
        }
        let mut h = Array2::<f64>::zeros((k, k));
        for a in 0..k {
            for b in 0..=a {
                let value = self.acc[a * kp + b];
                h[[a, b]] = value;
                h[[b, a]] = value;
            }
        }
        h
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn rank_updates_fma(acc: &mut [f64], rows: &[f64], weights: &[f64], k: usize, kp: usize) {
    rank_updates::<true>(acc, rows, weights, k, kp);
}

/// acc[a][b] += sum_r w_r x_r[a] x_r[b] for b <= a (rounded up to a multiple of 4; the
/// extra entries are ignored), over the row-major block `rows`.
#[inline(always)]
fn rank_updates<const FMA: bool>(
    acc: &mut [f64],
    rows: &[f64],
    weights: &[f64],
    k: usize,
    kp: usize,
) {
    let madd = |a: f64, b: f64, c: f64| if FMA { a.mul_add(b, c) } else { a * b + c };
    let len = weights.len();
    let full = len - len % 4;
    for r in (0..full).step_by(4) {
        let x0 = &rows[r * kp..(r + 1) * kp];
        let x1 = &rows[(r + 1) * kp..(r + 2) * kp];
        let x2 = &rows[(r + 2) * kp..(r + 3) * kp];
        let x3 = &rows[(r + 3) * kp..(r + 4) * kp];
        let (w0, w1, w2, w3) = (weights[r], weights[r + 1], weights[r + 2], weights[r + 3]);
        for a in 0..k {
            let (c0, c1, c2, c3) = (w0 * x0[a], w1 * x1[a], w2 * x2[a], w3 * x3[a]);
            let width = (a + 1).div_ceil(4) * 4;
            let row = &mut acc[a * kp..a * kp + width];
            for ((((h, &y0), &y1), &y2), &y3) in row
                .iter_mut()
                .zip(&x0[..width])
                .zip(&x1[..width])
                .zip(&x2[..width])
                .zip(&x3[..width])
            {
                *h = madd(c3, y3, madd(c2, y2, madd(c1, y1, madd(c0, y0, *h))));
            }
        }
    }
    for r in full..len {
        let x0 = &rows[r * kp..(r + 1) * kp];
        for a in 0..k {
            let c0 = weights[r] * x0[a];
            let width = (a + 1).div_ceil(4) * 4;
            for (h, &y0) in acc[a * kp..a * kp + width].iter_mut().zip(&x0[..width]) {
                *h = madd(c0, y0, *h);
            }
        }
    }
}

/// Dot product with four independent accumulators (lets the compiler vectorize).
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0; 4];
    let ca = a.chunks_exact(4);
    let cb = b.chunks_exact(4);
    let tail: f64 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for i in 0..4 {
            acc[i] += x[i] * y[i];
        }
    }
    acc[0] + acc[1] + acc[2] + acc[3] + tail
}

/// In-place Cholesky solve of H d = rhs. Returns the failing pivot on breakdown.
fn cholesky_solve(h: &Array2<f64>, rhs: &[f64]) -> Result<Vec<f64>, usize> {
    let k = rhs.len();
    let mut l = h.clone();
    for j in 0..k {
        let mut diag = l[[j, j]];
        for p in 0..j {
            diag -= l[[j, p]] * l[[j, p]];
        }
        if diag <= 0.0 || !diag.is_finite() {
            return Err(j);
        }
        let d = diag.sqrt();
        l[[j, j]] = d;
        for i in j + 1..k {
            let mut v = l[[i, j]];
            for p in 0..j {
                v -= l[[i, p]] * l[[j, p]];
            }
            l[[i, j]] = v / d;
        }
    }
    let mut z = rhs.to_vec();
    for i in 0..k {
        for p in 0..i {
            z[i] -= l[[i, p]] * z[p];
        }
        z[i] /= l[[i, i]];
    }
    for i in (0..k).rev() {
        for p in i + 1..k {
            z[i] -= l[[p, i]] * z[p];
        }
        z[i] /= l[[i, i]];
    }
    Ok(z)
}

/// Fit the penalized logistic regression on a column-major design `x` of `n` rows whose
/// first column is all ones (the intercept), with labels `y` (true = class 1) and optional
/// sample weights.
///
/// # Formula
/// See the module documentation.
///
/// # Errors
/// [`ShiftError::OneClass`] when `y` has a single class,
/// [`ShiftError::NotPositiveDefinite`] when the Hessian cannot be factorized even with a
/// ridge, [`ShiftError::InvalidWeight`] for a negative or non-finite sample weight.
///
/// # Panics
/// When `x.len()` is not a multiple of `n`, or `y`/`sample_weights` do not have `n` entries.
///
/// # Examples
/// ```
/// use weighbridge::shift::{fit_logistic, LogisticParams};
/// use linfa::ParamGuard;
/// // Intercept column then one feature; class 1 tends to have larger x.
/// let x = [1.0, 1.0, 1.0, 1.0, -1.0, 0.5, 0.0, 2.0];
/// let y = [false, false, true, true];
/// let params = LogisticParams::default().check().unwrap();
/// let model = fit_logistic(&x, 4, &y, None, &params).unwrap();
/// assert!(model.report().converged);
/// assert!(model.coefficients()[1] > 0.0);
/// ```
pub fn fit_logistic(
    x: &[f64],
    n: usize,
    y: &[bool],
    sample_weights: Option<&[f64]>,
    params: &LogisticValidParams,
) -> Result<LogisticModel, ShiftError> {
    fit_logistic_from(x, n, y, sample_weights, params, None)
}

/// [`fit_logistic`] started at `start` (intercept then slopes) instead of the class
/// log-odds. The objective is strictly convex, so the result does not depend on the start
/// beyond the tolerance; a good start only saves iterations (used for the
/// cross-validation folds, started at the full fit).
///
/// # Errors
/// As [`fit_logistic`].
///
/// # Panics
/// As [`fit_logistic`], and when `start` does not have one entry per column.
pub fn fit_logistic_from(
    x: &[f64],
    n: usize,
    y: &[bool],
    sample_weights: Option<&[f64]>,
    params: &LogisticValidParams,
    start: Option<&[f64]>,
) -> Result<LogisticModel, ShiftError> {
    assert!(
        n > 0 && x.len() % n == 0,
        "design buffer must hold whole columns"
    );
    assert_eq!(y.len(), n);
    let k = x.len() / n;
    if let Some(s) = sample_weights {
        assert_eq!(s.len(), n);
        if let Some(i) = s.iter().position(|w| !(w.is_finite() && *w >= 0.0)) {
            return Err(ShiftError::InvalidWeight {
                index: i,
                value: s[i],
            });
        }
    }
    let problem = Problem {
        x,
        n,
        k,
        y,
        s: sample_weights,
        alpha: params.alpha,
    };
    let (mut w1, mut w0) = (0.0, 0.0);
    let (mut c1, mut c0) = (0, 0);
    for (r, &positive) in y.iter().enumerate() {
        if positive {
            w1 += problem.weight(r);
            c1 += 1;
        } else {
            w0 += problem.weight(r);
            c0 += 1;
        }
    }
    if c1 == 0 || c0 == 0 || w1 <= 0.0 || w0 <= 0.0 {
        return Err(ShiftError::OneClass {
            positives: c1,
            negatives: c0,
        });
    }
    let total = w0 + w1;
    // Start at the weighted class log-odds (the exact optimum when every slope is zero), or,
    // for large n, at the fit on a strided subsample (same objective up to sampling error):
    // Newton then needs one or two full-data iterations instead of four or five.
    if let Some(b) = start {
        assert_eq!(b.len(), k, "start needs one entry per column");
    }
    let warm = match start {
        Some(b) => Some(b.to_vec()),
        None => warm_start(&problem, params)?,
    };
    let mut beta = match warm {
        Some(start) => start,
        None => {
            let mut b = vec![0.0; k];
            b[0] = (w1 / w0).ln();
            b
        }
    };
    let mut eta = problem.times(&beta);
    let mut iterations = 0;
    // Skip the Hessian (the costly part) when the last step predicts convergence.
    let mut expect_converged = false;
    loop {
        let (mut g, mut h, data_loss) = problem.derivatives(&eta, &beta, !expect_converged);
        let loss = data_loss + problem.penalty(&beta);
        let gradient_norm = g.iter().fold(0.0f64, |m, v| m.max(v.abs())) / total;
        let converged = gradient_norm <= params.tolerance;
        let report = || FitReport {
            iterations,
            gradient_norm,
            converged,
            loss,
        };
        if converged || iterations >= params.max_iterations {
            return Ok(LogisticModel {
                coefficients: beta,
                report: report(),
            });
        }
        if expect_converged {
            (g, h, _) = problem.derivatives(&eta, &beta, true);
        }
        // Newton converges quadratically near the optimum: after a full step from a gradient
        // below sqrt(tolerance), the next gradient is expected below the tolerance.
        expect_converged = gradient_norm < params.tolerance.sqrt() * 1e-1;
        let neg_g: Vec<f64> = g.iter().map(|v| -v).collect();
        let mut ridge = 0.0;
        let step = loop {
            let mut hr = h.clone();
            for j in 0..k {
                hr[[j, j]] += ridge;
            }
            match cholesky_solve(&hr, &neg_g) {
                Ok(d) => break d,
                Err(pivot) => {
                    let scale = (0..k).map(|j| h[[j, j]].abs()).fold(0.0, f64::max).max(1.0);
                    ridge = if ridge == 0.0 {
                        1e-12 * scale
                    } else {
                        ridge * 100.0
                    };
                    if ridge > scale {
                        return Err(ShiftError::NotPositiveDefinite {
                            iteration: iterations,
                            pivot,
                        });
                    }
                }
            }
        };
        let slope: f64 = g.iter().zip(&step).map(|(a, b)| a * b).sum();
        let xd = problem.times(&step);
        let mut t = 1.0;
        let mut accepted = false;
        for _ in 0..MAX_HALVINGS {
            let trial_beta: Vec<f64> = beta.iter().zip(&step).map(|(b, d)| b + t * d).collect();
            let trial = problem.data_loss(&eta, Some((&xd, t))) + problem.penalty(&trial_beta);
            if trial.is_finite() && trial <= loss + ARMIJO * t * slope {
                beta = trial_beta;
                for (e, d) in eta.iter_mut().zip(&xd) {
                    *e += t * d;
                }
                accepted = true;
                break;
            }
            t *= 0.5;
        }
        if !accepted {
            // No decrease representable in floating point: report where we are.
            return Ok(LogisticModel {
                coefficients: beta,
                report: report(),
            });
        }
        iterations += 1;
    }
}

/// Rows from which a subsample warm start pays off.
const WARM_START_ROWS: usize = 200_000;

/// For n >= 2 WARM_START_ROWS, fit every `stride`-th row (stride = n / WARM_START_ROWS,
/// sample weights multiplied by the stride so the objective keeps its scale) to a loose
/// tolerance; `None` for smaller problems.
fn warm_start(
    problem: &Problem<'_>,
    params: &LogisticValidParams,
) -> Result<Option<Vec<f64>>, ShiftError> {
    let (n, k) = (problem.n, problem.k);
    if n < 2 * WARM_START_ROWS {
        return Ok(None);
    }
    let stride = n / WARM_START_ROWS;
    let rows: Vec<usize> = (0..n).step_by(stride).collect();
    let m = rows.len();
    let y: Vec<bool> = rows.iter().map(|&r| problem.y[r]).collect();
    if y.iter().all(|&v| v) || y.iter().all(|&v| !v) {
        return Ok(None);
    }
    let mut x = vec![0.0; m * k];
    x.par_chunks_mut(m).enumerate().for_each(|(j, col)| {
        let src = &problem.x[j * n..(j + 1) * n];
        for (o, &r) in col.iter_mut().zip(&rows) {
            *o = src[r];
        }
    });
    let s: Vec<f64> = rows
        .iter()
        .map(|&r| problem.weight(r) * stride as f64)
        .collect();
    let loose = LogisticValidParams {
        tolerance: params.tolerance.max(1e-6),
        ..params.clone()
    };
    let model = fit_logistic(&x, m, &y, Some(&s), &loose)?;
    Ok(Some(model.coefficients))
}

/// linfa entry point: records are rows x features (any layout, no ones column), targets
/// are `true` for class 1 (the pool). Dataset weights, when present, are sample weights.
impl<D: Data<Elem = f64>, T: AsSingleTargets<Elem = bool>> Fit<ArrayBase<D, Ix2>, T, ShiftError>
    for LogisticValidParams
{
    type Object = LogisticModel;

    fn fit(
        &self,
        dataset: &DatasetBase<ArrayBase<D, Ix2>, T>,
    ) -> Result<LogisticModel, ShiftError> {
        let records = &dataset.records;
        let n = records.nrows();
        let mut x = vec![1.0; n * (1 + records.ncols())];
        for (j, col) in records.columns().into_iter().enumerate() {
            for (o, v) in x[(j + 1) * n..(j + 2) * n].iter_mut().zip(col) {
                *o = *v;
            }
        }
        let y: Vec<bool> = dataset
            .targets
            .as_single_targets()
            .iter()
            .copied()
            .collect();
        let weights: Option<Vec<f64>> = dataset
            .weights()
            .map(|w| w.iter().map(|&v| f64::from(v)).collect());
        fit_logistic(&x, n, &y, weights.as_deref(), self)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use linfa::Dataset;
    use ndarray::Array1;

    fn params(alpha: f64) -> LogisticValidParams {
        LogisticParams::default()
            .alpha(alpha)
            .tolerance(1e-12)
            .check()
            .unwrap()
    }

    #[test]
    fn blocked_gram_matches_naive_sum() {
        // sum_r v_r x_r x_r' by its definition, against the blocked rank-4 kernel (both the
        // dispatched path and the portable one), with sizes that are not multiples of 4 or of
        // the block.
        let (n, k, lo, len) = (700, 7, 13, 301);
        let x: Vec<f64> = (0..n * k)
            .map(|i| ((i * 37 % 101) as f64 - 50.0) / 17.0)
            .collect();
        let v: Vec<f64> = (0..len).map(|i| 0.1 + (i % 9) as f64 / 10.0).collect();
        let mut naive = Array2::<f64>::zeros((k, k));
        for (t, w) in v.iter().enumerate() {
            for a in 0..k {
                for b in 0..k {
                    naive[[a, b]] += w * x[a * n + lo + t] * x[b * n + lo + t];
                }
            }
        }
        let mut scratch = GramScratch::new(k);
        let fast = scratch.weighted_gram(&x, n, lo, &v);
        let mut portable = vec![0.0; k * scratch.padded];
        for start in (0..len).step_by(GRAM_BLOCK) {
            let l = GRAM_BLOCK.min(len - start);
            let mut rows = vec![0.0; GRAM_BLOCK * scratch.padded];
            for j in 0..k {
                for r in 0..l {
                    rows[r * scratch.padded + j] = x[j * n + lo + start + r];
                }
            }
            rank_updates::<false>(
                &mut portable,
                &rows,
                &v[start..start + l],
                k,
                scratch.padded,
            );
        }
        for a in 0..k {
            for b in 0..=a {
                let scale = naive[[a, b]].abs().max(1.0);
                assert!((fast[[a, b]] - naive[[a, b]]).abs() < 1e-12 * scale);
                assert!((fast[[b, a]] - naive[[a, b]]).abs() < 1e-12 * scale);
                assert!((portable[a * scratch.padded + b] - naive[[a, b]]).abs() < 1e-12 * scale);
            }
        }
    }

    #[test]
    fn invalid_settings_are_rejected() {
        assert!(matches!(
            LogisticParams::default().alpha(0.0).check(),
            Err(ShiftError::InvalidOption { name: "alpha", .. })
        ));
        assert!(matches!(
            LogisticParams::default().tolerance(f64::NAN).check(),
            Err(ShiftError::InvalidOption {
                name: "tolerance",
                ..
            })
        ));
    }

    #[test]
    fn gradient_is_zero_at_the_optimum_by_finite_differences() {
        // Optimality check against the objective itself: central differences of L at the
        // returned beta must vanish (first-order condition; textbook, no outside data).
        let n = 500;
        let x0 = crate::shift::test_support::normal_table(n, &[0.0, 0.0], &[1.0, 1.0], 3);
        let mut x = vec![1.0; n];
        x.extend_from_slice(&x0);
        let y: Vec<bool> = (0..n).map(|r| x0[r] + 0.5 * x0[n + r] > 0.3).collect();
        let p = params(2.0);
        let model = fit_logistic(&x, n, &y, None, &p).unwrap();
        assert!(model.report().converged);
        let objective = |b: &[f64]| {
            let mut l = 0.5 * 2.0 * (b[1] * b[1] + b[2] * b[2]);
            for r in 0..n {
                let e = b[0] + b[1] * x[n + r] + b[2] * x[2 * n + r];
                l += softplus(e) - if y[r] { e } else { 0.0 };
            }
            l
        };
        for j in 0..3 {
            let h = 1e-5;
            let mut up = model.coefficients().to_vec();
            let mut down = up.clone();
            up[j] += h;
            down[j] -= h;
            let fd = (objective(&up) - objective(&down)) / (2.0 * h);
            assert!(fd.abs() < 1e-5, "coordinate {j}: {fd}");
        }
    }

    #[test]
    fn separable_data_stay_finite() {
        let n = 200;
        let mut x = vec![1.0; n];
        x.extend((0..n).map(|r| r as f64 / 10.0 - 10.0));
        let y: Vec<bool> = (0..n).map(|r| r >= n / 2).collect();
        let model = fit_logistic(&x, n, &y, None, &params(1e-6)).unwrap();
        assert!(model.coefficients().iter().all(|c| c.is_finite()));
        assert!(model.report().loss.is_finite());
        assert!(model.report().gradient_norm.is_finite());
    }

    #[test]
    fn one_class_is_an_error() {
        let x = [1.0, 1.0, 0.0, 1.0];
        let err = fit_logistic(&x, 2, &[true, true], None, &params(1.0)).unwrap_err();
        assert!(matches!(
            err,
            ShiftError::OneClass {
                positives: 2,
                negatives: 0
            }
        ));
    }

    #[test]
    fn integer_sample_weights_equal_repeated_rows() {
        // Weight 2 on a row must equal that row appearing twice (definition of sample weight).
        let xs = [-1.0, 0.2, 0.4, 1.5, -0.3];
        let ys = [false, false, true, true, true];
        let mut x = vec![1.0; 5];
        x.extend_from_slice(&xs);
        let w = [1.0, 2.0, 1.0, 1.0, 2.0];
        let weighted = fit_logistic(&x, 5, &ys, Some(&w), &params(0.5)).unwrap();
        let rx = [-1.0, 0.2, 0.2, 0.4, 1.5, -0.3, -0.3];
        let ry = [false, false, false, true, true, true, true];
        let mut x2 = vec![1.0; 7];
        x2.extend_from_slice(&rx);
        let repeated = fit_logistic(&x2, 7, &ry, None, &params(0.5)).unwrap();
        for (a, b) in weighted.coefficients().iter().zip(repeated.coefficients()) {
            assert!((a - b).abs() < 1e-9);
        }
    }

    #[test]
    fn linfa_fit_trait_matches_direct_call() {
        let records = ndarray::array![[0.0, 1.0], [1.0, 0.5], [2.0, -1.0], [3.0, 0.0], [0.5, 0.2]];
        let targets = Array1::from(vec![false, false, true, true, true]);
        let ds = Dataset::new(records.clone(), targets.clone());
        let model = params(1.0).fit(&ds).unwrap();
        let mut x = vec![1.0; 5];
        x.extend(records.column(0).iter());
        x.extend(records.column(1).iter());
        let direct = fit_logistic(&x, 5, targets.as_slice().unwrap(), None, &params(1.0)).unwrap();
        assert_eq!(model.coefficients(), direct.coefficients());
        let p = model.predict_probability(&records);
        assert!(p.iter().all(|v| (0.0..=1.0).contains(v)));
    }
}
