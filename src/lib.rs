//! weighbridge: shortlists from screening predictions with a false discovery rate
//! guarantee when the labeled set and the pool differ (covariate shift).
pub mod cli;
pub mod conformal;
pub mod io;
pub mod random;
pub mod report;
pub mod selection;
pub mod shift;
pub mod warning;
pub mod workflows;

/// Old paths of [`conformal::score`] and [`conformal::pvalue`].
pub use conformal::{pvalue, score};
/// Old path of [`io`].
pub use io as table;
/// Old path of [`selection::pipeline`].
pub use selection::pipeline as select;

/// Old path of the multiple-testing procedures, now in [`selection::bh`],
/// [`selection::conditional`] and [`selection::pruning`].
pub mod fdr {
    pub use crate::selection::bh::*;
    pub use crate::selection::conditional::*;
    pub use crate::selection::pruning::*;
}
/// Old paths of [`report::html`] and [`report::plots`].
pub use report::html as html_report;
pub use report::plots;
/// Old path of [`shift::weighting`].
pub use shift::weighting;
/// Old paths of the [`workflows`] modules.
pub use workflows::{audit, check, demo, rescreen};
