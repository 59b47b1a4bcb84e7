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
//! Performance: X'WX is accumulated over row chunks in parallel (rayon), each chunk one
//! matrix product through ndarray's GEMM on the column-major buffer; per-chunk partial sums
//! are added in chunk order, so results do not depend on the thread count.

use linfa::dataset::{AsSingleTargets, DatasetBase};
use linfa::traits::Fit;
use linfa::ParamGuard;
use ndarray::linalg::general_mat_mul;
use ndarray::{Array2, ArrayBase, ArrayView2, Data, Ix2, ShapeBuilder};
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

    /// Gradient and Hessian of the full objective, and the data loss, at eta (= X beta).
    fn derivatives(&self, eta: &[f64], beta: &[f64]) -> (Vec<f64>, Array2<f64>, f64) {
        let (n, k) = (self.n, self.k);
        let parts: Vec<(Vec<f64>, Array2<f64>, f64)> = (0..self.chunks())
            .into_par_iter()
            .map_init(
                || vec![0.0; CHUNK * k],
                |u, c| {
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
                    let mut g = vec![0.0; k];
                    for j in 0..k {
                        let col = &self.x[j * n + lo..j * n + hi];
                        g[j] = dot(col, &resid);
                        let uj = &mut u[j * len..(j + 1) * len];
                        for ((o, x), w) in uj.iter_mut().zip(col).zip(&v) {
                            *o = x * w;
                        }
                    }
                    let xc = ArrayView2::from_shape((len, k).strides((1, n)), &self.x[lo..])
                        .expect("chunk view fits the buffer");
                    let uc = ArrayView2::from_shape((len, k).strides((1, len)), &u[..len * k])
                        .expect("chunk buffer fits");
                    let mut h = Array2::<f64>::zeros((k, k));
                    general_mat_mul(1.0, &xc.t(), &uc, 0.0, &mut h);
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
    // Start at the weighted class log-odds (the exact optimum when every slope is zero).
    let mut beta = vec![0.0; k];
    beta[0] = (w1 / w0).ln();
    let mut eta = vec![beta[0]; n];
    let mut iterations = 0;
    loop {
        let (g, h, data_loss) = problem.derivatives(&eta, &beta);
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
