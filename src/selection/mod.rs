//! Multiple testing and the selection pipeline (design.md sections 2.3 and 2.4).
//!
//! - [`bh`]: Benjamini–Hochberg, Benjamini–Yekutieli, BH-adjusted p-values, unreachable
//!   units, and the one comparison rule [`bh::within_level`] with [`bh::TIE_TOLERANCE`];
//! - [`conditional`]: conditional calibration (Jin & Candes 2023), its `K_j` in
//!   `O(m log m)`;
//! - [`pruning`]: the pruning of conditional calibration's first-step set;
//! - [`draw`]: what the pruning draw does to the shortlist (size distribution, empty
//!   probability, per-unit selection probability);
//! - [`level_curve`]: expected conditional shortlist and BH count over a grid of levels;
//! - [`resolution`]: pool units at the p-value floor, which the labeled set cannot rank;
//! - [`pipeline`]: one run from scores to the shortlist (checked options, scores ->
//!   p-values -> procedure, counts, warnings).

pub mod bh;
pub mod conditional;
pub mod draw;
pub mod level_curve;
pub mod pipeline;
pub mod pruning;
pub mod resolution;
