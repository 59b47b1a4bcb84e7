//! weighbridge: shortlists from screening predictions with a false discovery rate
//! guarantee when the labeled set and the pool differ (covariate shift).
pub mod audit;
pub mod check;
pub mod cli;
pub mod conformal;
pub mod demo;
pub mod fdr;
pub mod html_report;
pub mod io;
pub mod plots;
pub mod random;
pub mod report;
pub mod rescreen;
pub mod select;
pub mod shift;
pub mod weighting;

/// Old paths of [`conformal::score`] and [`conformal::pvalue`].
pub use conformal::{pvalue, score};
/// Old path of [`io`].
pub use io as table;
