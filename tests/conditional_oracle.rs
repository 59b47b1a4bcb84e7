//! Fast conditional calibration == the naive definition, on many seeded random cases
//! (design.md 2.4: ties in pool scores, ties between labeled and pool scores, weights from
//! 1e-12 to 1e12, q up to 1, m from 1 up). The oracle is tests/common/oracle.rs.

mod common;

use common::cases::{draw_case, draw_case_with, Case};
use common::oracle::{naive_conditional_counts, naive_selection, NaiveLabeled};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use weighbridge::fdr::{conditional_calibration, conditional_counts, Pruning};
use weighbridge::pvalue::{conservative_pvalues, CalibrationSet};

fn check_case(case: &Case, index: usize) {
    let cal = CalibrationSet::new(&case.labeled_scores, Some(&case.labeled_weights)).unwrap();
    let fast =
        conditional_counts(&cal, &case.pool_scores, Some(&case.pool_weights), case.q).unwrap();
    let naive_labeled = NaiveLabeled::new(&case.labeled_scores, &case.labeled_weights);
    let naive = naive_conditional_counts(
        &naive_labeled,
        &case.pool_scores,
        &case.pool_weights,
        case.q,
    );
    assert_eq!(fast, naive, "case {index}: K_j differ (q = {})", case.q);
    for (j, &k) in fast.iter().enumerate() {
        assert!(
            k >= 1 && k <= case.pool_scores.len(),
            "case {index} unit {j}: K = {k}"
        );
    }
}

#[test]
fn fast_equals_naive_on_small_random_cases() {
    let mut rng = ChaCha8Rng::seed_from_u64(20_261_202);
    for index in 0..3000 {
        let case = draw_case(&mut rng, 40);
        check_case(&case, index);
    }
}

#[test]
fn fast_equals_naive_with_one_pool_unit() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for index in 0..300 {
        let case = draw_case(&mut rng, 1);
        assert_eq!(case.pool_scores.len(), 1);
        check_case(&case, index);
    }
}

#[test]
fn fast_equals_naive_on_larger_cases() {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    for index in 0..24 {
        let case = draw_case_with(&mut rng, 200 + 40 * index);
        check_case(&case, index);
    }
}

#[test]
fn full_selection_matches_definition_for_every_pruning() {
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    for index in 0..600 {
        let case = draw_case(&mut rng, 30);
        let cal = CalibrationSet::new(&case.labeled_scores, Some(&case.labeled_weights)).unwrap();
        let p = conservative_pvalues(&cal, &case.pool_scores, Some(&case.pool_weights)).unwrap();
        let naive_labeled = NaiveLabeled::new(&case.labeled_scores, &case.labeled_weights);
        for pruning in [
            Pruning::Deterministic,
            Pruning::Homogeneous,
            Pruning::Heterogeneous,
        ] {
            let seed = index as u64;
            let fast = conditional_calibration(
                &cal,
                &case.pool_scores,
                Some(&case.pool_weights),
                &p,
                case.q,
                pruning,
                seed,
            )
            .unwrap();
            let m = case.pool_scores.len();
            // The xi the fast run used, reconstructed from the documented stream.
            let xi: Vec<f64> = match pruning {
                Pruning::Deterministic => vec![1.0; m],
                Pruning::Homogeneous => vec![fast.pruning_draw.unwrap(); m],
                Pruning::Heterogeneous => {
                    let mut r =
                        weighbridge::random::stream(seed, weighbridge::random::Stream::Pruning);
                    (0..m).map(|_| r.gen::<f64>()).collect()
                }
            };
            let (first, selected) = naive_selection(
                &naive_labeled,
                &case.pool_scores,
                &case.pool_weights,
                &fast.conditional_count,
                case.q,
                &xi,
            );
            assert_eq!(
                fast.first_step, first,
                "case {index} {pruning:?}: first step"
            );
            assert_eq!(
                fast.selected, selected,
                "case {index} {pruning:?}: selection"
            );
            assert_eq!(fast.selected_count, selected.iter().filter(|&&x| x).count());
        }
    }
}

/// With every weight 1 and no ties between scores, deterministic pruning equals BH on the
/// conservative p-values (design.md 2.4, "with equal weights it equals BH"). With ties
/// between labeled and pool scores it need not: `p^(j)` counts labeled scores with `<`,
/// `p_j` with `<=`, so tied units get large `K_j` and deterministic pruning drops them.
#[test]
fn equal_weights_deterministic_pruning_is_bh() {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for index in 0..400 {
        let n = rng.gen_range(1..=60);
        let m = rng.gen_range(1..=60);
        let labeled: Vec<f64> = (0..n).map(|_| rng.gen_range(-1.0..3.0)).collect();
        let pool: Vec<f64> = (0..m).map(|_| rng.gen_range(-1.5..2.0)).collect();
        let q = [0.05, 0.1, 0.2, 0.5, 1.0][index % 5];
        let cal = CalibrationSet::new(&labeled, None).unwrap();
        let p = conservative_pvalues(&cal, &pool, None).unwrap();
        let cc =
            conditional_calibration(&cal, &pool, None, &p, q, Pruning::Deterministic, 1).unwrap();
        let bh = weighbridge::fdr::benjamini_hochberg(&p.values(), q).unwrap();
        assert_eq!(cc.selected, bh.selected, "case {index}");
    }
}

/// The one comparison rule (relative tie tolerance) against exact rational arithmetic:
/// with integer weights and q = a / b every p-value and BH line is rational, so
/// `num / den <= q k / m` can be decided exactly in integers as `num * m * b <= a * k * den`.
/// design.md 2.4 reports that naive float forms disagree with exact arithmetic on such data.
#[test]
fn comparison_rule_agrees_with_exact_arithmetic_on_integer_weights() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let levels = [(1u64, 10u64), (1, 5), (1, 2), (1, 1), (3, 10)];
    let mut boundary_ties = 0;
    let mut above_one = 0;
    for index in 0..1500 {
        let m = rng.gen_range(1..=30);
        let n = rng.gen_range(1..=30);
        let labeled: Vec<f64> = (0..n).map(|_| rng.gen_range(0..6) as f64).collect();
        let lw: Vec<u64> = (0..n).map(|_| rng.gen_range(1..=4)).collect();
        let pool: Vec<f64> = (0..m).map(|_| rng.gen_range(0..6) as f64).collect();
        let pw: Vec<u64> = (0..m).map(|_| rng.gen_range(1..=4)).collect();
        let (a, b) = levels[index % levels.len()];
        let q = a as f64 / b as f64;
        let lwf: Vec<f64> = lw.iter().map(|&x| x as f64).collect();
        let pwf: Vec<f64> = pw.iter().map(|&x| x as f64).collect();
        let cal = CalibrationSet::new(&labeled, Some(&lwf)).unwrap();
        let fast = conditional_counts(&cal, &pool, Some(&pwf), q).unwrap();
        let total: u64 = lw.iter().sum();
        let below = |v: f64| -> u64 {
            labeled
                .iter()
                .zip(&lw)
                .filter(|(s, _)| **s < v)
                .map(|(_, w)| *w)
                .sum()
        };
        for j in 0..m {
            let den = total + pw[j];
            let mut nums: Vec<u64> = (0..m)
                .map(|l| {
                    if l == j {
                        0
                    } else if pool[j] < pool[l] {
                        below(pool[l]) + pw[j]
                    } else {
                        below(pool[l])
                    }
                })
                .collect();
            nums.sort_unstable();
            let mut exact = 0;
            for k in 1..=m as u64 {
                let lhs = nums[k as usize - 1] * m as u64 * b;
                let rhs = a * k * den;
                if lhs <= rhs {
                    exact = k as usize;
                }
                if lhs == rhs {
                    boundary_ties += 1;
                }
            }
            if exact > 1 {
                above_one += 1;
            }
            assert_eq!(fast[j], exact, "case {index} unit {j} q = {a}/{b}");
        }
    }
    // The data must actually exercise exact ties and non-trivial counts.
    assert!(boundary_ties > 100, "only {boundary_ties} exact ties");
    assert!(above_one > 1000, "only {above_one} counts above 1");
}
