//! Seeded random cases for the property tests of conditional calibration (design.md 2.4:
//! ties in pool scores, ties between labeled and pool scores, weights from 1e-12 to 1e12,
//! q up to 1, m from 1 up), shared by tests/conditional_oracle.rs and
//! tests/streaming_selection.rs.

#![allow(dead_code)]

use rand::Rng;
use rand_chacha::ChaCha8Rng;

#[derive(Debug, Clone, Copy)]
pub enum WeightStyle {
    Ones,
    SmallIntegers,
    LogUniformWide,
    FewHuge,
}

pub struct Case {
    pub labeled_scores: Vec<f64>,
    pub labeled_weights: Vec<f64>,
    pub pool_scores: Vec<f64>,
    pub pool_weights: Vec<f64>,
    pub q: f64,
}

pub fn draw_weight(rng: &mut ChaCha8Rng, style: WeightStyle) -> f64 {
    match style {
        WeightStyle::Ones => 1.0,
        WeightStyle::SmallIntegers => rng.gen_range(1..=4) as f64,
        WeightStyle::LogUniformWide => 10f64.powf(rng.gen_range(-12.0..=12.0)),
        WeightStyle::FewHuge => {
            if rng.gen_bool(0.1) {
                10f64.powf(rng.gen_range(6.0..=12.0))
            } else {
                rng.gen_range(0.5..2.0)
            }
        }
    }
}

pub fn draw_case(rng: &mut ChaCha8Rng, max_m: usize) -> Case {
    let m = rng.gen_range(1..=max_m);
    draw_case_with(rng, m)
}

pub fn draw_case_with(rng: &mut ChaCha8Rng, m: usize) -> Case {
    let n = rng.gen_range(1..=40);
    // A coarse grid makes ties within the pool and between labeled and pool scores common.
    let grid = rng.gen_range(2..=12);
    let tie_heavy = rng.gen_bool(0.7);
    let score = |rng: &mut ChaCha8Rng| {
        if tie_heavy {
            rng.gen_range(0..grid) as f64 * 0.25
        } else {
            rng.gen_range(-1.0..3.0)
        }
    };
    let clipped = rng.gen_bool(0.4);
    let labeled_scores: Vec<f64> = (0..n)
        .map(|_| {
            if clipped && rng.gen_bool(0.3) {
                f64::INFINITY
            } else {
                score(rng)
            }
        })
        .collect();
    let pool_scores: Vec<f64> = (0..m).map(|_| score(rng)).collect();
    let style = [
        WeightStyle::Ones,
        WeightStyle::SmallIntegers,
        WeightStyle::LogUniformWide,
        WeightStyle::FewHuge,
    ][rng.gen_range(0..4)];
    let labeled_weights = (0..n).map(|_| draw_weight(rng, style)).collect();
    let pool_weights = (0..m).map(|_| draw_weight(rng, style)).collect();
    let q = match rng.gen_range(0..6) {
        0 => 0.1,
        1 => 0.2,
        2 => 0.5,
        3 => 1.0,
        4 => 0.05,
        _ => rng.gen_range(0.01..=1.0),
    };
    Case {
        labeled_scores,
        labeled_weights,
        pool_scores,
        pool_weights,
        q,
    }
}
