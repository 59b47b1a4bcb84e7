//! Whole jobs built on the selection pipeline, one file each: the audit of an earlier
//! shortlist ([`audit`]), the comparison of a re-screen with a previous run ([`rescreen`]),
//! the calibration check by simulation on the labeled set ([`check`]), and the invented demo
//! scenario with the truth known ([`demo`]). No I/O: the commands in `crate::cli` read the
//! inputs and write the outputs.

pub mod audit;
pub mod batch;
pub mod check;
pub mod demo;
pub mod rescreen;
