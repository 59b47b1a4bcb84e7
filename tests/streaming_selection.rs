//! The streamed selection (weighbridge::selection::streaming) == the in-memory path, unit
//! by unit: `K_j`, first step, selection, the pruning draw, the BH count and its selection,
//! the unreachable and floor counts. On the seeded property cases of
//! tests/conditional_oracle.rs (ties, tiny and huge weights, q up to 1, m from 1), with a
//! budget that holds everything and with one so small that every spill and refinement path
//! runs; and on 10^6 units. The reference is the in-memory path, itself checked against
//! the naive definition in tests/conditional_oracle.rs ("fast equals naive").

mod common;

use common::cases::{draw_case, draw_case_with, Case};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use weighbridge::conformal::pvalue::{pool_pvalues, CalibrationSet, PValueKind};
use weighbridge::selection::bh::{benjamini_hochberg, unreachable};
use weighbridge::selection::conditional::conditional_calibration;
use weighbridge::selection::pruning::Pruning;
use weighbridge::selection::resolution::at_floor;
use weighbridge::selection::streaming::{
    run_streaming_visiting, run_streaming_with_histogram, EarlyUnit, PoolBuckets, PoolHistogram,
    PoolSource, SlicePool, SpillWriter, StreamingOptions, StreamingSummary, UnitResult,
};

const PRUNINGS: [Pruning; 3] = [
    Pruning::Homogeneous,
    Pruning::Heterogeneous,
    Pruning::Deterministic,
];

/// Compare one case and return the streamed summary.
fn check(
    case: &Case,
    pruning: Pruning,
    bh_pvalues: PValueKind,
    budget: usize,
    spill: bool,
    seed: u64,
    label: &str,
) -> StreamingSummary {
    let cal = CalibrationSet::new(&case.labeled_scores, Some(&case.labeled_weights)).unwrap();
    let weights = Some(&case.pool_weights[..]);
    let m = case.pool_scores.len();
    let conservative = pool_pvalues(
        PValueKind::Conservative,
        &cal,
        &case.pool_scores,
        weights,
        seed,
    )
    .unwrap();
    let memory = conditional_calibration(
        &cal,
        &case.pool_scores,
        weights,
        &conservative,
        case.q,
        pruning,
        seed,
    )
    .unwrap();
    let bh_p = pool_pvalues(bh_pvalues, &cal, &case.pool_scores, weights, seed).unwrap();
    let bh = benjamini_hochberg(&bh_p.values(), case.q).unwrap();
    let unreachable_count = unreachable(cal.total_weight(), weights, m, case.q)
        .iter()
        .filter(|&&u| u)
        .count();
    let floor_count = case
        .pool_scores
        .iter()
        .filter(|&&v| at_floor(&cal, v))
        .count();

    let options = StreamingOptions {
        q: case.q,
        pruning,
        seed,
        bh_pvalues,
        memory_budget: budget,
    };
    let mut slices = SlicePool {
        scores: &case.pool_scores,
        weights,
    };
    let mut spilled;
    let pool: &mut dyn PoolSource = if spill {
        let mut writer = SpillWriter::new(None, true).unwrap();
        for (&s, &w) in case.pool_scores.iter().zip(&case.pool_weights) {
            writer.push(s, w).unwrap();
        }
        spilled = writer.finish().unwrap();
        &mut spilled
    } else {
        &mut slices
    };
    let mut early: Vec<EarlyUnit> = Vec::with_capacity(m);
    let mut streamed = run_streaming_visiting(&cal, pool, options, |j, units| {
        assert_eq!(
            j as usize,
            early.len(),
            "{label}: input order of the decide pass"
        );
        early.extend_from_slice(units);
    })
    .unwrap();
    // The decide pass's results, settled by the ranked units, without the last pass.
    let mut settled: Vec<Option<(usize, bool)>> = early
        .iter()
        .map(|e| e.conditional_count.map(|k| (k, e.first_step)))
        .collect();
    let mut last_ranked = None;
    let mut ranked_seen = 0usize;
    streamed
        .for_each_ranked(|j, k, first_step| {
            assert!(
                last_ranked < Some(j),
                "{label}: ranked units in input order"
            );
            last_ranked = Some(j);
            let slot = &mut settled[j as usize];
            assert_eq!(
                *slot, None,
                "{label} unit {j}: ranked but K_j already known"
            );
            *slot = Some((k, first_step));
            ranked_seen += 1;
        })
        .unwrap();
    assert_eq!(
        ranked_seen, streamed.counts.ranked_units,
        "{label}: ranked units"
    );
    if pruning != Pruning::Heterogeneous {
        assert!(streamed.shared_xi().is_some(), "{label}");
    }
    for (j, (e, s)) in early.iter().zip(&settled).enumerate() {
        let (k, first_step) = s.unwrap_or_else(|| panic!("{label} unit {j}: K_j never settled"));
        assert_eq!(
            k, memory.conditional_count[j],
            "{label} unit {j}: early K_j"
        );
        assert_eq!(
            first_step, memory.first_step[j],
            "{label} unit {j}: early first step"
        );
        assert_eq!(
            streamed.selects(first_step, k, streamed.shared_xi().unwrap_or(e.xi)),
            memory.selected[j],
            "{label} unit {j}: selected from the early results"
        );
        assert_eq!(e.numerator, conservative.numerator[j], "{label} unit {j}");
        assert_eq!(
            e.denominator, conservative.denominator[j],
            "{label} unit {j}"
        );
    }
    let mut units: Vec<UnitResult> = Vec::with_capacity(m);
    streamed
        .for_each_unit(pool, |j, unit| {
            assert_eq!(j as usize, units.len(), "{label}: input order");
            units.push(unit);
        })
        .unwrap();
    assert_eq!(units.len(), m, "{label}");
    for (j, unit) in units.iter().enumerate() {
        assert_eq!(
            unit.conditional_count, memory.conditional_count[j],
            "{label} unit {j}: K_j (q = {})",
            case.q
        );
        assert_eq!(
            unit.first_step, memory.first_step[j],
            "{label} unit {j}: first step"
        );
        assert_eq!(
            unit.selected, memory.selected[j],
            "{label} unit {j}: selected"
        );
        assert_eq!(unit.bh_selected, bh.selected[j], "{label} unit {j}: BH");
        assert_eq!(
            unit.numerator, conservative.numerator[j],
            "{label} unit {j}"
        );
        assert_eq!(
            unit.denominator, conservative.denominator[j],
            "{label} unit {j}"
        );
    }
    let c = &streamed.counts;
    assert_eq!(c.m, m, "{label}");
    assert_eq!(c.first_step_count, memory.first_step_count, "{label}: |R1|");
    assert_eq!(c.selected_count, memory.selected_count, "{label}: r*");
    assert_eq!(c.pruning_draw, memory.pruning_draw, "{label}: draw");
    assert_eq!(c.bh_selected_count, bh.count, "{label}: BH count");
    assert_eq!(
        c.unreachable_count, unreachable_count,
        "{label}: unreachable"
    );
    assert_eq!(c.floor_count, floor_count, "{label}: floor");

    // The histogram built by the caller, in uneven pieces, gives the same selection with
    // one pass over the pool fewer.
    let buckets = PoolBuckets::new(&cal);
    let mut histogram = PoolHistogram::new(&cal);
    let mut at = 0;
    for (i, piece) in [1usize, 999, 7, 4096].iter().cycle().enumerate() {
        if at >= m {
            break;
        }
        let to = (at + piece + i % 3).min(m);
        let scores = &case.pool_scores[at..to];
        histogram.add(
            scores,
            Some(&case.pool_weights[at..to]),
            &buckets.of(scores),
        );
        at = to;
    }
    let mut given =
        run_streaming_with_histogram(&cal, histogram, pool, options, |_, _| {}).unwrap();
    let mut again: Vec<UnitResult> = Vec::with_capacity(m);
    given
        .for_each_unit(pool, |_, unit| again.push(unit))
        .unwrap();
    assert!(again == units, "{label}: the caller's histogram");
    let mut expected = c.clone();
    expected.passes -= 1;
    assert_eq!(given.counts, expected, "{label}: the caller's histogram");
    c.clone()
}

#[test]
fn streamed_equals_in_memory_on_small_random_cases() {
    let mut rng = ChaCha8Rng::seed_from_u64(20_261_202);
    let (mut ranked, mut multi_round, mut spilled, mut refined) = (0, 0, 0, 0);
    for index in 0..3000 {
        let case = draw_case(&mut rng, 40);
        let pruning = PRUNINGS[index % 3];
        let kind = if index % 2 == 0 {
            PValueKind::Conservative
        } else {
            PValueKind::Randomized
        };
        let seed = index as u64;
        let roomy = check(
            &case,
            pruning,
            kind,
            1 << 30,
            false,
            seed,
            &format!("case {index}"),
        );
        ranked += roomy.ranked_units;
        // The smallest budget: 10 queued units per round, 16 ranked counts in memory, 32
        // histogram blocks (so BH is refined whenever m > 32).
        let tight = check(
            &case,
            pruning,
            kind,
            0,
            index % 5 == 0,
            seed,
            &format!("case {index} tight"),
        );
        assert_eq!(tight.ranked_units, roomy.ranked_units);
        multi_round += usize::from(tight.ranked_units > 10);
        spilled += usize::from(tight.spilled);
        refined += usize::from(tight.passes > roomy.passes + usize::from(tight.ranked_units > 10));
    }
    // The data must exercise the exact-rank path, several rounds, the spill and the BH
    // refinement.
    assert!(ranked > 1000, "only {ranked} ranked units");
    assert!(
        multi_round > 20,
        "only {multi_round} cases with several rounds"
    );
    assert!(spilled > 20, "only {spilled} spilled cases");
    assert!(
        refined > 20,
        "only {refined} cases with BH refinement passes"
    );
}

#[test]
fn streamed_equals_in_memory_with_one_pool_unit_and_larger_pools() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for index in 0..300 {
        let case = draw_case(&mut rng, 1);
        check(
            &case,
            PRUNINGS[index % 3],
            PValueKind::Conservative,
            0,
            false,
            1,
            &format!("m = 1 case {index}"),
        );
    }
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    for index in 0..24 {
        let case = draw_case_with(&mut rng, 200 + 40 * index);
        for pruning in PRUNINGS {
            for budget in [0, 1 << 30] {
                check(
                    &case,
                    pruning,
                    PValueKind::Randomized,
                    budget,
                    index % 4 == 0,
                    3,
                    &format!("larger case {index}"),
                );
            }
        }
    }
}

/// 10^6 units shaped like bench_select's data (lognormal weights, predictions on a grid so
/// that pool scores tie, a floor bucket), plus a tenth of the units with weights large
/// enough that the high region fails and the exact rank decides.
#[test]
fn streamed_equals_in_memory_on_a_million_units() {
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    let n = 5_000;
    let m = 1_000_000;
    let labeled_scores: Vec<f64> = (0..n)
        .map(|_| {
            if rng.gen_bool(0.3) {
                f64::INFINITY
            } else {
                -(rng.gen_range(-2000..2000) as f64) / 1000.0
            }
        })
        .collect();
    let labeled_weights: Vec<f64> = (0..n)
        .map(|_| (rng.gen_range(-1.0..1.0f64)).exp())
        .collect();
    let pool_scores: Vec<f64> = (0..m)
        .map(|_| -(rng.gen_range(-2500..2500) as f64) / 1000.0)
        .collect();
    let pool_weights: Vec<f64> = (0..m)
        .map(|_| {
            if rng.gen_bool(0.1) {
                rng.gen_range(50.0..500.0)
            } else {
                (rng.gen_range(-1.0..1.0f64)).exp()
            }
        })
        .collect();
    let case = Case {
        labeled_scores,
        labeled_weights,
        pool_scores,
        pool_weights,
        q: 0.1,
    };
    let roomy = check(
        &case,
        Pruning::Homogeneous,
        PValueKind::Conservative,
        1 << 30,
        false,
        7,
        "10^6",
    );
    assert!(
        roomy.ranked_units > 1000,
        "only {} ranked",
        roomy.ranked_units
    );
    assert!(roomy.selected_count > 0);
    // A budget of 512 KB: several rank rounds, the ranked counts spilled, BH refined.
    let tight = check(
        &case,
        Pruning::Heterogeneous,
        PValueKind::Randomized,
        1 << 19,
        true,
        7,
        "10^6 tight",
    );
    println!("10^6: {roomy:?}\n10^6 tight: {tight:?}");
    assert!(tight.spilled, "{tight:?}");
    assert!(tight.passes > 3, "{tight:?}");
}
