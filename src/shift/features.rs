//! Classifier features: standardization, constant-column dropping, and the optional squares
//! and pairwise products (design.md 2.5: "fit a logistic regression on standardized
//! features"; squares and products let a logistic model see variance and correlation shifts).
//!
//! # Formula
//! On the fitting rows, each input column a with at least two distinct values gets
//! z_a = (x_a - mean_a) / sd_a (population SD, as scikit-learn's `StandardScaler`). Expanded
//! terms are z_a^2 and z_a z_b (a < b), each standardized again on the fitting rows so that
//! the L2 penalty treats every term alike. A column (input or expanded) whose minimum equals
//! its maximum on the fitting rows is dropped and reported.
//!
//! Memory: the fitting matrix holds (fitting rows) x (1 + terms) doubles; prediction streams
//! rows in chunks and never materializes the expanded features of all rows. Pairwise
//! products of d features give d (d - 1) / 2 terms: use a pool sample for large d.

use rayon::prelude::*;
use serde::Serialize;

use super::{FeatureView, ShiftError};

/// Rows per chunk when streaming predictions.
const CHUNK: usize = 4096;

/// Extra features for the domain classifier.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Expansion {
    /// The standardized input features only.
    None,
    /// Inputs plus their squares (sees variance shifts).
    Squares,
    /// Inputs plus pairwise products (sees correlation shifts).
    Pairwise,
    /// Inputs, squares and pairwise products.
    SquaresAndPairwise,
}

impl Expansion {
    fn squares(self) -> bool {
        matches!(self, Expansion::Squares | Expansion::SquaresAndPairwise)
    }
    fn pairwise(self) -> bool {
        matches!(self, Expansion::Pairwise | Expansion::SquaresAndPairwise)
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum TermKind {
    /// Position in the kept base list.
    Base(usize),
    Square(usize),
    Product(usize, usize),
}

#[derive(Debug, Clone, PartialEq)]
struct Term {
    kind: TermKind,
    name: String,
    mean: f64,
    scale: f64,
}

/// Standardization and expansion fitted on the classifier's fitting rows, together with the
/// fitting matrix (column-major, column 0 all ones for the intercept).
#[derive(Debug, Clone, PartialEq)]
pub struct Design {
    /// Input column index of each kept base feature.
    kept: Vec<usize>,
    base_mean: Vec<f64>,
    base_scale: Vec<f64>,
    kept_names: Vec<String>,
    dropped: Vec<String>,
    terms: Vec<Term>,
    fit: Vec<f64>,
    n_fit: usize,
}

/// Mean, population SD (two passes), and whether the `count` values are all equal.
fn column_stats<I: Iterator<Item = f64> + Clone>(values: I, count: usize) -> (f64, f64, bool) {
    let n = count as f64;
    let (sum, lo, hi) = values
        .clone()
        .fold((0.0, f64::INFINITY, f64::NEG_INFINITY), |(s, lo, hi), v| {
            (s + v, lo.min(v), hi.max(v))
        });
    let mean = sum / n;
    let var = values.map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
    (mean, var.sqrt(), lo == hi)
}

impl Design {
    /// Fit standardization and expansion on the rows `labeled_rows` of `labeled` followed by
    /// the rows `pool_rows` of `pool`, and build the fitting matrix in that row order.
    ///
    /// # Errors
    /// [`ShiftError::AllConstant`] when no input column varies on the fitting rows.
    pub fn build(
        labeled: FeatureView<'_>,
        pool: FeatureView<'_>,
        labeled_rows: &[usize],
        pool_rows: &[usize],
        expansion: Expansion,
    ) -> Result<Self, ShiftError> {
        let n_fit = labeled_rows.len() + pool_rows.len();
        let names = labeled.names();
        // Fitting-row values of input column f, without copying them.
        let values = |f: usize| {
            let (lc, pc) = (labeled.column(f), pool.column(f));
            labeled_rows
                .iter()
                .map(move |&r| lc[r])
                .chain(pool_rows.iter().map(move |&r| pc[r]))
        };
        let gathered: Vec<(f64, f64, bool)> = (0..labeled.n_features())
            .into_par_iter()
            .map(|f| column_stats(values(f), n_fit))
            .collect();
        let mut kept = Vec::new();
        let mut dropped = Vec::new();
        let mut base_mean = Vec::new();
        let mut base_scale = Vec::new();
        for (f, (mean, sd, constant)) in gathered.iter().enumerate() {
            if *constant {
                dropped.push(names[f].clone());
            } else {
                kept.push(f);
                base_mean.push(*mean);
                base_scale.push(*sd);
            }
        }
        if kept.is_empty() {
            return Err(ShiftError::AllConstant { dropped });
        }
        let kept_names: Vec<String> = kept.iter().map(|&f| names[f].clone()).collect();
        let k = kept.len();
        let mut terms: Vec<Term> = (0..k)
            .map(|a| Term {
                kind: TermKind::Base(a),
                name: kept_names[a].clone(),
                mean: 0.0,
                scale: 1.0,
            })
            .collect();
        if expansion.squares() {
            terms.extend((0..k).map(|a| Term {
                kind: TermKind::Square(a),
                name: format!("{}^2", kept_names[a]),
                mean: 0.0,
                scale: 1.0,
            }));
        }
        if expansion.pairwise() {
            for a in 0..k {
                for b in a + 1..k {
                    terms.push(Term {
                        kind: TermKind::Product(a, b),
                        name: format!("{}*{}", kept_names[a], kept_names[b]),
                        mean: 0.0,
                        scale: 1.0,
                    });
                }
            }
        }

        let mut fit = vec![0.0; n_fit * (1 + terms.len())];
        fit[..n_fit].fill(1.0);
        {
            let (_, rest) = fit.split_at_mut(n_fit);
            let (base_part, _) = rest.split_at_mut(n_fit * k);
            base_part
                .par_chunks_mut(n_fit.max(1))
                .enumerate()
                .for_each(|(a, out)| {
                    let (mean, sd) = (base_mean[a], base_scale[a]);
                    for (o, v) in out.iter_mut().zip(values(kept[a])) {
                        *o = (v - mean) / sd;
                    }
                });
        }
        // Expanded terms from the standardized base columns, then standardized themselves.
        let mut keep_term = vec![true; terms.len()];
        if terms.len() > k {
            let (head, tail) = fit.split_at_mut(n_fit * (1 + k));
            let base = &head[n_fit..];
            let stats: Vec<(f64, f64, bool)> = tail
                .par_chunks_mut(n_fit.max(1))
                .enumerate()
                .map(|(i, out)| {
                    match terms[k + i].kind {
                        TermKind::Square(a) => {
                            let za = &base[a * n_fit..(a + 1) * n_fit];
                            for (o, z) in out.iter_mut().zip(za) {
                                *o = z * z;
                            }
                        }
                        TermKind::Product(a, b) => {
                            let za = &base[a * n_fit..(a + 1) * n_fit];
                            let zb = &base[b * n_fit..(b + 1) * n_fit];
                            for ((o, x), y) in out.iter_mut().zip(za).zip(zb) {
                                *o = x * y;
                            }
                        }
                        TermKind::Base(_) => unreachable!("base terms come first"),
                    }
                    let (mean, sd, constant) = column_stats(out.iter().copied(), n_fit);
                    if !constant {
                        for o in out.iter_mut() {
                            *o = (*o - mean) / sd;
                        }
                    }
                    (mean, sd, constant)
                })
                .collect();
            for (i, (mean, sd, constant)) in stats.into_iter().enumerate() {
                terms[k + i].mean = mean;
                terms[k + i].scale = sd;
                keep_term[k + i] = !constant;
            }
        }
        // Compact: move kept columns left over dropped expanded ones.
        let mut write = 1;
        let mut kept_terms = Vec::with_capacity(terms.len());
        for (t, term) in terms.into_iter().enumerate() {
            if keep_term[t] {
                if write != 1 + t {
                    fit.copy_within((1 + t) * n_fit..(2 + t) * n_fit, write * n_fit);
                }
                write += 1;
                kept_terms.push(term);
            } else {
                dropped.push(term.name);
            }
        }
        fit.truncate(write * n_fit);
        Ok(Self {
            kept,
            base_mean,
            base_scale,
            kept_names,
            dropped,
            terms: kept_terms,
            fit,
            n_fit,
        })
    }

    /// The fitting matrix, column-major, `n_fit_rows()` rows, `1 + n_terms()` columns
    /// (column 0 is the intercept's column of ones).
    pub fn fit_matrix(&self) -> &[f64] {
        &self.fit
    }

    /// Rows in the fitting matrix.
    pub fn n_fit_rows(&self) -> usize {
        self.n_fit
    }

    /// Terms after the intercept.
    pub fn n_terms(&self) -> usize {
        self.terms.len()
    }

    /// Names of the terms after the intercept (`x`, `x^2`, `x*y`).
    pub fn term_names(&self) -> Vec<String> {
        self.terms.iter().map(|t| t.name.clone()).collect()
    }

    /// Names of dropped constant columns (inputs first, then expanded terms).
    pub fn dropped(&self) -> &[String] {
        &self.dropped
    }

    /// Names of the kept input features (the base of the squares and products).
    pub fn kept_names(&self) -> &[String] {
        &self.kept_names
    }

    /// Write the standardized kept inputs z of rows `row(0..count)` of `view` into `out`
    /// (column-major, `count` rows, one column per kept input).
    pub(crate) fn fill_base(
        &self,
        view: FeatureView<'_>,
        count: usize,
        row: impl Fn(usize) -> usize,
        out: &mut [f64],
    ) {
        for (a, &f) in self.kept.iter().enumerate() {
            let col = view.column(f);
            let (mean, sd) = (self.base_mean[a], self.base_scale[a]);
            for (t, o) in out[a * count..(a + 1) * count].iter_mut().enumerate() {
                *o = (col[row(t)] - mean) / sd;
            }
        }
    }

    /// Number of kept inputs.
    pub fn n_kept(&self) -> usize {
        self.kept.len()
    }

    /// Linear predictor intercept + sum_t coef_t * term_t(x) for every row of `view`,
    /// streaming rows in chunks (parallel, no per-row allocation).
    ///
    /// `coefficients` has `1 + n_terms()` entries, intercept first, on the standardized scale.
    pub fn linear_predictor(&self, view: FeatureView<'_>, coefficients: &[f64]) -> Vec<f64> {
        assert_eq!(coefficients.len(), 1 + self.terms.len());
        // Fold the expanded terms' standardization into the coefficients.
        let mut intercept = coefficients[0];
        let slopes: Vec<f64> = self
            .terms
            .iter()
            .zip(&coefficients[1..])
            .map(|(t, c)| {
                intercept -= c * t.mean / t.scale;
                c / t.scale
            })
            .collect();
        let k = self.kept.len();
        let mut eta = vec![0.0; view.n_rows()];
        eta.par_chunks_mut(CHUNK).enumerate().for_each_init(
            || vec![0.0; CHUNK * k],
            |z, (chunk, out)| {
                let start = chunk * CHUNK;
                let c = out.len();
                self.fill_base(view, c, |t| start + t, &mut z[..c * k]);
                out.fill(intercept);
                for (term, &b) in self.terms.iter().zip(&slopes) {
                    match term.kind {
                        TermKind::Base(a) => {
                            for (o, x) in out.iter_mut().zip(&z[a * c..(a + 1) * c]) {
                                *o += b * x;
                            }
                        }
                        TermKind::Square(a) => {
                            for (o, x) in out.iter_mut().zip(&z[a * c..(a + 1) * c]) {
                                *o += b * x * x;
                            }
                        }
                        TermKind::Product(a, bb) => {
                            let za = &z[a * c..(a + 1) * c];
                            let zb = &z[bb * c..(bb + 1) * c];
                            for ((o, x), y) in out.iter_mut().zip(za).zip(zb) {
                                *o += b * x * y;
                            }
                        }
                    }
                }
            },
        );
        eta
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn view<'a>(values: &'a [f64], names: &'a [String]) -> FeatureView<'a> {
        FeatureView::new(values, values.len() / names.len(), names).unwrap()
    }

    #[test]
    fn constant_columns_are_dropped_and_named() {
        let names: Vec<String> = ["a", "flat", "b"].iter().map(|s| s.to_string()).collect();
        let lab = [1.0, 2.0, 3.0, 5.0, 5.0, 5.0, 0.0, 1.0, 0.0];
        let pool = [4.0, 6.0, 5.0, 5.0, 1.0, 1.0];
        let d = Design::build(
            view(&lab, &names),
            view(&pool, &names),
            &[0, 1, 2],
            &[0, 1],
            Expansion::None,
        )
        .unwrap();
        assert_eq!(d.dropped(), &["flat".to_string()]);
        assert_eq!(d.term_names(), vec!["a".to_string(), "b".to_string()]);
        // Standardized column a over rows 1,2,3,4,6: mean 3.2, population SD sqrt(2.96)
        // (hand computation).
        let col = &d.fit_matrix()[5..10];
        let sd = 2.96f64.sqrt();
        for (got, x) in col.iter().zip([1.0, 2.0, 3.0, 4.0, 6.0]) {
            assert!((got - (x - 3.2) / sd).abs() < 1e-12);
        }
    }

    #[test]
    fn all_constant_is_an_error() {
        let names = vec!["flat".to_string()];
        let err = Design::build(
            view(&[2.0, 2.0], &names),
            view(&[2.0], &names),
            &[0, 1],
            &[0],
            Expansion::Squares,
        )
        .unwrap_err();
        assert!(matches!(err, ShiftError::AllConstant { .. }));
    }

    #[test]
    fn symmetric_binary_square_is_dropped() {
        // A 0/1 column with half ones standardizes to +-1, so its square is constant.
        let names: Vec<String> = ["bit", "x"].iter().map(|s| s.to_string()).collect();
        let lab = [0.0, 1.0, 0.3, 0.9];
        let pool = [1.0, 0.0, 0.1, 2.0];
        let d = Design::build(
            view(&lab, &names),
            view(&pool, &names),
            &[0, 1],
            &[0, 1],
            Expansion::SquaresAndPairwise,
        )
        .unwrap();
        assert_eq!(d.dropped(), &["bit^2".to_string()]);
        assert_eq!(d.term_names(), vec!["bit", "x", "x^2", "bit*x"]);
    }

    #[test]
    fn streamed_predictor_matches_fit_matrix() {
        let names = crate::shift::test_support::names(3);
        let lab = crate::shift::test_support::normal_table(5000, &[0.0; 3], &[1.0, 2.0, 3.0], 7);
        let pool = crate::shift::test_support::normal_table(300, &[1.0; 3], &[1.0; 3], 8);
        let lrows: Vec<usize> = (0..5000).collect();
        let prows: Vec<usize> = (0..300).collect();
        let d = Design::build(
            view(&lab, &names),
            view(&pool, &names),
            &lrows,
            &prows,
            Expansion::SquaresAndPairwise,
        )
        .unwrap();
        let p = 1 + d.n_terms();
        let coef: Vec<f64> = (0..p).map(|i| 0.1 * i as f64 - 0.3).collect();
        let eta = d.linear_predictor(view(&lab, &names), &coef);
        let n = d.n_fit_rows();
        for r in [0, 17, 4095, 4096, 4999] {
            let direct: f64 = (0..p).map(|j| coef[j] * d.fit_matrix()[j * n + r]).sum();
            assert!(
                (eta[r] - direct).abs() < 1e-10,
                "row {r}: {} vs {direct}",
                eta[r]
            );
        }
    }
}
