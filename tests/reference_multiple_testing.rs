//! Benjamini–Hochberg and Benjamini–Yekutieli against outside references (design.md 2.3):
//! the worked example of Benjamini & Hochberg (1995), section 4; a fixture made by
//! statsmodels' `multipletests` (tests/scripts/make_multiple_testing_fixture.py); and
//! seeded property checks (selection grows with q, permutation equivariance, BY within BH).

use std::path::PathBuf;

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Deserialize;
use weighbridge::fdr::{
    benjamini_hochberg, benjamini_yekutieli, bh_adjusted, bh_count, harmonic_number,
};

/// Adjusted p-values: statsmodels computes `m p / k` (BY: `m p H_m / k`) in a different
/// order of operations; a few roundings apart, far below any meaningful difference.
const ADJUSTED_TOLERANCE: f64 = 1e-12;

/// The 15 p-values of Benjamini & Hochberg (1995), section 4 (values from memory; the
/// statsmodels fixture below contains the same vector and agrees: 4 rejected at q = 0.05).
const BH1995: [f64; 15] = [
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
    0.6528, 0.7590, 1.000,
];

#[test]
fn benjamini_hochberg_1995_section_4() {
    // Source: Benjamini & Hochberg (1995), section 4, from memory: at q = 0.05 BH rejects
    // the four smallest p-values (p_(4) = 0.0095 <= 0.05 * 4 / 15 = 0.0133, while
    // p_(5) = 0.0201 > 0.0167 and no larger k passes).
    let selection = benjamini_hochberg(&BH1995, 0.05).unwrap();
    assert_eq!(selection.count, 4);
    let expected: Vec<bool> = (0..15).map(|i| i < 4).collect();
    assert_eq!(selection.selected, expected);
    assert_eq!(bh_count(&BH1995, 0.05).unwrap(), 4);

    // Same source: Bonferroni at 0.05 / 15 = 0.00333 rejects only three (0.0001, 0.0004,
    // 0.0019) — the paper's point that BH gains power. Plain count, no library function.
    let bonferroni = BH1995.iter().filter(|&&p| p <= 0.05 / 15.0).count();
    assert_eq!(bonferroni, 3);

    // The same order of input does not matter (reversed input, same p-values selected).
    let mut reversed = BH1995;
    reversed.reverse();
    let selection = benjamini_hochberg(&reversed, 0.05).unwrap();
    let expected: Vec<bool> = (0..15).map(|i| i >= 11).collect();
    assert_eq!(selection.selected, expected);
}

#[derive(Deserialize)]
struct Fixture {
    statsmodels_version: String,
    numpy_version: String,
    seed: u64,
    cases: Vec<FixtureCase>,
}

#[derive(Deserialize)]
struct FixtureCase {
    name: String,
    p: Vec<f64>,
    bh_adjusted: Vec<f64>,
    by_adjusted: Vec<f64>,
    levels: Vec<FixtureLevel>,
}

#[derive(Deserialize)]
struct FixtureLevel {
    q: f64,
    bh_rejected: Vec<usize>,
    by_rejected: Vec<usize>,
}

fn load_fixture() -> Fixture {
    let path: PathBuf = [
        env!("CARGO_MANIFEST_DIR"),
        "tests",
        "data",
        "multiple_testing_statsmodels.json",
    ]
    .iter()
    .collect();
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn indices(mask: &[bool]) -> Vec<usize> {
    mask.iter()
        .enumerate()
        .filter(|(_, &s)| s)
        .map(|(i, _)| i)
        .collect()
}

fn assert_close(ours: &[f64], reference: &[f64], what: &str) {
    assert_eq!(ours.len(), reference.len(), "{what}: lengths");
    for (i, (a, b)) in ours.iter().zip(reference).enumerate() {
        assert!(
            (a - b).abs() <= ADJUSTED_TOLERANCE,
            "{what}[{i}]: ours {a:e}, statsmodels {b:e}"
        );
    }
}

#[test]
fn matches_statsmodels_multipletests() {
    let fixture = load_fixture();
    // Source: statsmodels multipletests(method="fdr_bh" / "fdr_by"), versions recorded in
    // the fixture (made by tests/scripts/make_multiple_testing_fixture.py).
    let source = format!(
        "statsmodels {} (numpy {}, seed {})",
        fixture.statsmodels_version, fixture.numpy_version, fixture.seed
    );
    let sizes: Vec<usize> = fixture.cases.iter().map(|c| c.p.len()).collect();
    for m in [1, 7, 50, 1000] {
        assert!(sizes.contains(&m), "fixture lacks a vector with m = {m}");
    }
    let mut compared = 0;
    for case in &fixture.cases {
        let m = case.p.len();
        let what = format!("{} ({source})", case.name);
        assert_close(
            &bh_adjusted(&case.p, 1.0).unwrap(),
            &case.bh_adjusted,
            &format!("{what} BH-adjusted"),
        );
        assert_close(
            &bh_adjusted(&case.p, harmonic_number(m)).unwrap(),
            &case.by_adjusted,
            &format!("{what} BY-adjusted"),
        );
        for level in &case.levels {
            let bh = benjamini_hochberg(&case.p, level.q).unwrap();
            assert_eq!(
                indices(&bh.selected),
                level.bh_rejected,
                "{what}: BH at q = {}",
                level.q
            );
            assert_eq!(bh.count, level.bh_rejected.len());
            assert_eq!(bh_count(&case.p, level.q).unwrap(), bh.count);
            let by = benjamini_yekutieli(&case.p, level.q).unwrap();
            assert_eq!(
                indices(&by.selected),
                level.by_rejected,
                "{what}: BY at q = {}",
                level.q
            );
            compared += 1;
        }
    }
    assert!(compared >= 50, "only {compared} comparisons");
}

#[test]
fn statsmodels_fixture_covers_ties_zeros_and_ones() {
    // Guards the fixture itself: the brief asks for exact ties and values 0 and 1.
    let fixture = load_fixture();
    let all: Vec<f64> = fixture.cases.iter().flat_map(|c| c.p.clone()).collect();
    assert!(all.contains(&0.0) && all.contains(&1.0));
    let has_ties = fixture.cases.iter().any(|c| {
        let mut p = c.p.clone();
        p.sort_by(f64::total_cmp);
        p.windows(2)
            .any(|w| w[0] == w[1] && w[0] > 0.0 && w[0] < 1.0)
    });
    assert!(has_ties);
    let levels: Vec<f64> = fixture.cases[0].levels.iter().map(|l| l.q).collect();
    assert_eq!(levels, vec![0.05, 0.1, 0.2, 0.5, 1.0]);
}

/// Seeded p-value vectors: uniform nulls, some small signals, ties, zeros and ones.
fn random_pvalues(rng: &mut ChaCha8Rng) -> Vec<f64> {
    let m = rng.gen_range(1..=120);
    let mut p: Vec<f64> = (0..m)
        .map(|_| match rng.gen_range(0..10) {
            0 => 0.0,
            1 => 1.0,
            2..=4 => rng.gen::<f64>().powi(6),
            _ => rng.gen::<f64>(),
        })
        .collect();
    for _ in 0..m / 5 {
        let a = rng.gen_range(0..m);
        let b = rng.gen_range(0..m);
        p[b] = p[a];
    }
    p
}

#[test]
fn bh_selection_grows_with_q() {
    // Property of the step-up rule (Benjamini & Hochberg 1995): the BH line q k / m rises
    // with q, so the selection at a smaller q is contained in the one at a larger q.
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    let levels = [0.01, 0.05, 0.1, 0.2, 0.35, 0.5, 0.8, 1.0];
    for case in 0..500 {
        let p = random_pvalues(&mut rng);
        let selections: Vec<Vec<bool>> = levels
            .iter()
            .map(|&q| benjamini_hochberg(&p, q).unwrap().selected)
            .collect();
        for pair in selections.windows(2) {
            for (j, (&smaller, &larger)) in pair[0].iter().zip(&pair[1]).enumerate() {
                assert!(!smaller || larger, "case {case}: unit {j} dropped");
            }
        }
        // At q = 1 every p-value passes at k = m.
        assert!(selections.last().unwrap().iter().all(|&s| s));
    }
}

#[test]
fn permuting_pvalues_permutes_the_selection() {
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    for case in 0..500 {
        let p = random_pvalues(&mut rng);
        let q = [0.05, 0.1, 0.2, 0.5][case % 4];
        let mut perm: Vec<usize> = (0..p.len()).collect();
        perm.shuffle(&mut rng);
        let permuted: Vec<f64> = perm.iter().map(|&i| p[i]).collect();
        for (name, select) in [
            ("BH", benjamini_hochberg as fn(&[f64], f64) -> _),
            ("BY", benjamini_yekutieli),
        ] {
            let base = select(&p, q).unwrap().selected;
            let moved = select(&permuted, q).unwrap().selected;
            for (k, &i) in perm.iter().enumerate() {
                assert_eq!(moved[k], base[i], "case {case} {name}: position {k}");
            }
        }
        let base = bh_adjusted(&p, 1.0).unwrap();
        let moved = bh_adjusted(&permuted, 1.0).unwrap();
        for (k, &i) in perm.iter().enumerate() {
            assert_eq!(moved[k], base[i], "case {case}: adjusted p at {k}");
        }
    }
}

#[test]
fn by_selects_a_subset_of_bh() {
    // BY is BH at q / H_m with H_m >= 1 (Benjamini & Yekutieli 2001).
    let mut rng = ChaCha8Rng::seed_from_u64(43);
    let mut strict_subsets = 0;
    for case in 0..500 {
        let p = random_pvalues(&mut rng);
        let q = [0.05, 0.1, 0.2, 0.5, 1.0][case % 5];
        let bh = benjamini_hochberg(&p, q).unwrap();
        let by = benjamini_yekutieli(&p, q).unwrap();
        for j in 0..p.len() {
            assert!(!by.selected[j] || bh.selected[j], "case {case}: unit {j}");
        }
        if by.count < bh.count {
            strict_subsets += 1;
        }
    }
    // The check has teeth only if BY is often strictly smaller.
    assert!(
        strict_subsets > 50,
        "BY < BH in only {strict_subsets} cases"
    );
}

#[test]
fn adjusted_pvalues_decide_the_selection() {
    // Definition of BH-adjusted p-values (e.g. statsmodels' fdr_bh "pvals_corrected"):
    // unit j is selected at level q exactly when its adjusted p-value is <= q. Levels are
    // chosen off the grid of ratios m p / k so that no comparison is a rounding tie.
    let mut rng = ChaCha8Rng::seed_from_u64(44);
    for case in 0..300 {
        let p = random_pvalues(&mut rng);
        let q = rng.gen_range(0.01..0.9);
        let adjusted = bh_adjusted(&p, 1.0).unwrap();
        let bh = benjamini_hochberg(&p, q).unwrap();
        for (j, (&a, &selected)) in adjusted.iter().zip(&bh.selected).enumerate() {
            if (a - q).abs() > 1e-9 {
                assert_eq!(selected, a <= q, "case {case} unit {j}");
            }
        }
    }
}
