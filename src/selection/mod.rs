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
//! - [`streaming`]: conditional calibration and the BH count with the pool streamed in
//!   passes (memory `O(n)` plus a budget);
//! - [`pipeline`]: one run from scores to the shortlist (checked options, scores ->
//!   p-values -> procedure, counts, warnings).

pub mod bh;
pub mod conditional;
pub mod draw;
pub mod level_curve;
pub mod pipeline;
pub mod pruning;
pub mod resolution;
pub mod streaming;

/// An FDR level for people: as typed for ordinary levels (`0.1`, `0.05`), in scientific
/// notation with three significant digits below 1e-4 (`1.00e-300`; Rust's `{}` would print
/// every one of the 300 zeros).
pub fn level_text(q: f64) -> String {
    if q != 0.0 && q.is_finite() && q.abs() < 1e-4 {
        format!("{q:.2e}")
    } else {
        format!("{q}")
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn levels_print_briefly() {
        assert_eq!(super::level_text(0.1), "0.1");
        assert_eq!(super::level_text(0.05), "0.05");
        assert_eq!(super::level_text(1e-300), "1.00e-300");
        assert_eq!(super::level_text(1.23456e-7), "1.23e-7");
    }
}
