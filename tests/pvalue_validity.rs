//! Weighted conformal p-values (design.md 2.2) against outside references:
//!
//! * a numpy fixture computed straight from the formulas with masked sums
//!   (tests/scripts/make_pvalue_fixture.py -> tests/data/pvalue_{labeled,pool}.csv): ties,
//!   +inf (clipped) labeled scores, weights over six orders of magnitude;
//! * the structure of the randomized p-values (each between its strict and conservative
//!   value, with a recovered `U_j` that is uniform and drawn per unit in input order);
//! * seeded simulations of null validity: super-uniform conservative and exactly uniform
//!   randomized p-values without shift and under a known covariate shift with the true
//!   density ratio as weights (Tibshirani, Barber, Candes & Ramdas 2019, weighted
//!   exchangeability; Jin & Candes 2023) — and a demonstration that the same check fails
//!   for unweighted p-values under that shift.

use std::path::PathBuf;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use weighbridge::pvalue::{conservative_pvalues, randomized_pvalues, CalibrationSet};
use weighbridge::score::{labeled_scores, ScoreKind, Thresholds};

/// Relative tolerance against numpy: both sides sum at most 80 positive terms in different
/// orders (numpy pairwise, ours sorted prefix sums): a few 1e-16 apart. Common practice.
const RELATIVE_TOLERANCE: f64 = 1e-12;

/// Simulation tolerance: an estimated probability from R independent replicates has
/// binomial standard error sqrt(t (1 - t) / R); we allow 3 of them (a false alarm
/// probability of about 0.13% one-sided, 0.27% two-sided, per check). Common practice.
const BINOMIAL_SE_MULTIPLE: f64 = 3.0;

/// Levels at which P(p <= t) is estimated.
const LEVELS: [f64; 4] = [0.05, 0.1, 0.2, 0.5];

fn close(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= RELATIVE_TOLERANCE * a.abs().max(b.abs())
}

fn data_path(name: &str) -> PathBuf {
    [env!("CARGO_MANIFEST_DIR"), "tests", "data", name]
        .iter()
        .collect()
}

/// Read a fixture CSV ('#' comment lines, header row) into named float columns. Rust's
/// float parser is correctly rounded, so Python's repr() values come back bit for bit.
fn read_columns(name: &str) -> Vec<(String, Vec<f64>)> {
    let path = data_path(name);
    let mut reader = csv::ReaderBuilder::new()
        .comment(Some(b'#'))
        .from_path(&path)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let header: Vec<String> = reader
        .headers()
        .unwrap()
        .iter()
        .map(str::to_owned)
        .collect();
    let mut columns: Vec<(String, Vec<f64>)> =
        header.into_iter().map(|h| (h, Vec::new())).collect();
    for (line, record) in reader.records().enumerate() {
        let record = record.unwrap();
        for (column, cell) in columns.iter_mut().zip(record.iter()) {
            let value: f64 = cell
                .parse()
                .unwrap_or_else(|e| panic!("{name} row {line} `{cell}`: {e}"));
            column.1.push(value);
        }
    }
    columns
}

fn column<'a>(columns: &'a [(String, Vec<f64>)], name: &str) -> &'a [f64] {
    &columns
        .iter()
        .find(|(h, _)| h == name)
        .unwrap_or_else(|| panic!("no column {name}"))
        .1
}

struct NumpyFixture {
    labeled_scores: Vec<f64>,
    labeled_weights: Vec<f64>,
    pool: Vec<(String, Vec<f64>)>,
}

fn numpy_fixture() -> NumpyFixture {
    let labeled = read_columns("pvalue_labeled.csv");
    let fixture = NumpyFixture {
        labeled_scores: column(&labeled, "score").to_vec(),
        labeled_weights: column(&labeled, "weight").to_vec(),
        pool: read_columns("pvalue_pool.csv"),
    };
    // Guard the fixture's coverage: +inf scores, ties to labeled, a wide weight range.
    assert!(fixture.labeled_scores.iter().any(|v| v.is_infinite()));
    assert!(column(&fixture.pool, "weight_tied")
        .iter()
        .any(|&t| t > 0.0));
    let (lo, hi) = fixture
        .labeled_weights
        .iter()
        .fold((f64::INFINITY, 0.0f64), |(lo, hi), &w| {
            (lo.min(w), hi.max(w))
        });
    assert!(hi / lo > 1e4, "weights span only {lo}..{hi}");
    fixture
}

#[test]
fn conservative_matches_numpy_fixture() {
    // Source: numpy 2.2.6 masked sums of design.md 2.2 (tests/scripts/make_pvalue_fixture.py).
    let f = numpy_fixture();
    let cal = CalibrationSet::new(&f.labeled_scores, Some(&f.labeled_weights)).unwrap();
    let scores = column(&f.pool, "score");
    let weights = column(&f.pool, "weight");
    let ours = conservative_pvalues(&cal, scores, Some(weights)).unwrap();
    let expected = column(&f.pool, "conservative");
    let total: f64 = f.labeled_weights.iter().sum();
    for (j, (p, e)) in ours.values().iter().zip(expected).enumerate() {
        assert!(close(*p, *e), "unit {j}: ours {p:e}, numpy {e:e}");
        assert!(close(ours.denominator[j], total + weights[j]), "unit {j}");
        // The floor of design.md 2.2: p_j >= w_j / (W + w_j).
        assert!(*p >= weights[j] / (total + weights[j]) * (1.0 - RELATIVE_TOLERANCE));
    }

    // With every weight 1 they are ordinary split-conformal p-values.
    let unit_cal = CalibrationSet::new(&f.labeled_scores, None).unwrap();
    let ours = conservative_pvalues(&unit_cal, scores, None).unwrap();
    let expected = column(&f.pool, "conservative_unit_weights");
    for (j, (p, e)) in ours.values().iter().zip(expected).enumerate() {
        assert!(
            close(*p, *e),
            "unit weights, unit {j}: ours {p:e}, numpy {e:e}"
        );
    }
}

#[test]
fn randomized_formula_matches_numpy_for_given_draws() {
    // Our U stream is ChaCha20 and numpy's is PCG64, so the draws are taken from the
    // fixture and the randomized formula is recomputed here from our weight sums.
    let f = numpy_fixture();
    let cal = CalibrationSet::new(&f.labeled_scores, Some(&f.labeled_weights)).unwrap();
    let total = cal.total_weight();
    let scores = column(&f.pool, "score");
    let weights = column(&f.pool, "weight");
    let draws = column(&f.pool, "u");
    let expected_below = column(&f.pool, "weight_below");
    let expected_tied = column(&f.pool, "weight_tied");
    let expected = column(&f.pool, "randomized");
    for j in 0..scores.len() {
        let below = cal.weight_below(scores[j]);
        let tied = cal.weight_at_or_below(scores[j]) - below;
        let scale = total + weights[j];
        // Weight sums are compared on the scale of the p-value denominator: `tied` is a
        // difference of two prefix sums, so its own relative error can be large when it
        // is tiny next to W, but what matters is its effect on p.
        assert!((below - expected_below[j]).abs() <= RELATIVE_TOLERANCE * scale);
        assert!((tied - expected_tied[j]).abs() <= RELATIVE_TOLERANCE * scale);
        let p = (below + draws[j] * (weights[j] + tied)) / scale;
        assert!(
            close(p, expected[j]),
            "unit {j}: ours {p:e}, numpy {:e}",
            expected[j]
        );
    }
}

#[test]
fn randomized_pvalues_have_the_documented_structure() {
    let f = numpy_fixture();
    let cal = CalibrationSet::new(&f.labeled_scores, Some(&f.labeled_weights)).unwrap();
    let total = cal.total_weight();
    let scores = column(&f.pool, "score");
    let weights = column(&f.pool, "weight");
    let below = column(&f.pool, "weight_below");
    let tied = column(&f.pool, "weight_tied");
    let conservative = column(&f.pool, "conservative");
    let seed = 17;
    let randomized = randomized_pvalues(&cal, scores, Some(weights), seed).unwrap();
    let values = randomized.values();
    let mut recovered = Vec::new();
    for j in 0..scores.len() {
        let scale = total + weights[j];
        assert!(close(randomized.denominator[j], scale), "unit {j}");
        let strict = below[j] / scale;
        let slack = RELATIVE_TOLERANCE * conservative[j];
        assert!(
            values[j] >= strict - slack && values[j] <= conservative[j] + slack,
            "unit {j}: {} outside [{strict}, {}]",
            values[j],
            conservative[j]
        );
        // p = (below + U (w + tied)) / (W + w) for some U in [0, 1]: recover it.
        let u = (values[j] * scale - below[j]) / (weights[j] + tied[j]);
        assert!((-1e-9..=1.0 + 1e-9).contains(&u), "unit {j}: U = {u}");
        recovered.push(u);
    }
    // U_j is drawn per unit in input order, whatever the scores: the same seed with other
    // scores recovers the same draws.
    let shifted: Vec<f64> = scores.iter().map(|v| v + 0.3).collect();
    let other = randomized_pvalues(&cal, &shifted, Some(weights), seed).unwrap();
    for j in 0..scores.len() {
        let b = cal.weight_below(shifted[j]);
        let t = cal.weight_at_or_below(shifted[j]) - b;
        let u = (other.numerator[j] - b) / (weights[j] + t);
        assert!(
            (u - recovered[j]).abs() < 1e-6,
            "unit {j}: U {u} vs {}",
            recovered[j]
        );
    }
}

#[test]
fn randomized_tie_draws_are_uniform() {
    // All 20000 pool units tie with every labeled score, so p_j = U_j (w_j + W)/(W + w_j)
    // = U_j: the empirical CDF of the p-values must match Uniform(0, 1) within 3 binomial
    // standard errors at each level.
    let replicates = 20_000;
    let cal = CalibrationSet::new(&[0.0; 10], None).unwrap();
    let p = randomized_pvalues(&cal, &vec![0.0; replicates], None, 99)
        .unwrap()
        .values();
    for t in [0.01, 0.05, 0.1, 0.2, 0.5, 0.9] {
        let share = p.iter().filter(|&&x| x <= t).count() as f64 / replicates as f64;
        let se = (t * (1.0 - t) / replicates as f64).sqrt();
        assert!(
            (share - t).abs() <= BINOMIAL_SE_MULTIPLE * se,
            "P(U <= {t}) = {share}"
        );
    }
}

/// One simulated world: labeled X ~ N(0, 1), pool X ~ N(shift, 1), outcome
/// Y = X + 0.5 exp(X / 2) e (noise growing with X), prediction mu(x) = x, threshold c = 1,
/// clipped score. The density ratio of the pool to the labeled features is
/// w(x) = exp(shift x - shift^2 / 2).
struct World {
    shift: f64,
    weighted: bool,
}

/// Shares of replicates with p <= t, per level, for the four p-values of interest.
#[derive(Default)]
struct Shares {
    /// Conservative p-value at the pool unit's true score V(X_j, Y_j) (the "oracle").
    oracle_conservative: [f64; 4],
    /// Randomized p-value at the true score: exactly uniform by weighted exchangeability.
    oracle_randomized: [f64; 4],
    /// Conservative p-value at the imputed score c - mu(X_j), on the event Y_j <= c.
    imputed_conservative_null: [f64; 4],
    /// Randomized p-value at the imputed score, on the event Y_j <= c.
    imputed_randomized_null: [f64; 4],
}

const THRESHOLD: f64 = 1.0;
const N_LABELED: usize = 50;
const REPLICATES: usize = 20_000;

fn noise_scale(x: f64) -> f64 {
    0.5 * (x / 2.0).exp()
}

fn simulate(world: &World, seed: u64) -> Shares {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut counts = [[0usize; 4]; 4];
    let ratio = |x: f64| (world.shift * x - world.shift * world.shift / 2.0).exp();
    let mut x = vec![0.0; N_LABELED];
    let mut y = vec![0.0; N_LABELED];
    for replicate in 0..REPLICATES {
        for i in 0..N_LABELED {
            x[i] = rng.sample(StandardNormal);
            let e: f64 = rng.sample(StandardNormal);
            y[i] = x[i] + noise_scale(x[i]) * e;
        }
        let xj = world.shift + rng.sample::<f64, _>(StandardNormal);
        let yj = xj + noise_scale(xj) * rng.sample::<f64, _>(StandardNormal);
        let scores = labeled_scores(ScoreKind::Clipped, &y, &x, Thresholds::Constant(THRESHOLD));
        let (cal, wj) = if world.weighted {
            let w: Vec<f64> = x.iter().map(|&v| ratio(v)).collect();
            (CalibrationSet::new(&scores, Some(&w)).unwrap(), ratio(xj))
        } else {
            (CalibrationSet::new(&scores, None).unwrap(), 1.0)
        };
        let oracle = ScoreKind::Clipped.labeled_score(yj, THRESHOLD, xj);
        let imputed = ScoreKind::Clipped.pool_score(THRESHOLD, xj);
        let seed = replicate as u64;
        let p = [
            conservative_pvalues(&cal, &[oracle], Some(&[wj])).unwrap(),
            randomized_pvalues(&cal, &[oracle], Some(&[wj]), seed).unwrap(),
            conservative_pvalues(&cal, &[imputed], Some(&[wj])).unwrap(),
            randomized_pvalues(&cal, &[imputed], Some(&[wj]), seed).unwrap(),
        ]
        .map(|pv| pv.values()[0]);
        let null = yj <= THRESHOLD;
        for (which, &value) in p.iter().enumerate() {
            if which >= 2 && !null {
                continue;
            }
            for (level, &t) in LEVELS.iter().enumerate() {
                if value <= t {
                    counts[which][level] += 1;
                }
            }
        }
    }
    let share = |c: [usize; 4]| c.map(|k| k as f64 / REPLICATES as f64);
    Shares {
        oracle_conservative: share(counts[0]),
        oracle_randomized: share(counts[1]),
        imputed_conservative_null: share(counts[2]),
        imputed_randomized_null: share(counts[3]),
    }
}

/// Printed with `cargo test -- --nocapture`, for the record.
fn report(shares: &Shares, what: &str) {
    eprintln!(
        "{what} (R = {REPLICATES}, levels {LEVELS:?}):\n  oracle conservative {:?}\n  \
         oracle randomized {:?}\n  imputed conservative, null {:?}\n  \
         imputed randomized, null {:?}",
        shares.oracle_conservative,
        shares.oracle_randomized,
        shares.imputed_conservative_null,
        shares.imputed_randomized_null
    );
}

fn binomial_se(t: f64) -> f64 {
    (t * (1.0 - t) / REPLICATES as f64).sqrt()
}

/// Conservative p-values: P(p <= t) <= t + 3 SE. Randomized at the true score:
/// |P(p <= t) - t| <= 3 SE. Imputed scores on nulls: P(p <= t, null) <= t + 3 SE
/// (Jin & Candes 2023: the imputed score is at least the true score of a null unit).
fn assert_valid(shares: &Shares, what: &str) {
    report(shares, what);
    for (level, &t) in LEVELS.iter().enumerate() {
        let bound = t + BINOMIAL_SE_MULTIPLE * binomial_se(t);
        for (name, value) in [
            ("oracle conservative", shares.oracle_conservative[level]),
            (
                "imputed conservative, null",
                shares.imputed_conservative_null[level],
            ),
            (
                "imputed randomized, null",
                shares.imputed_randomized_null[level],
            ),
        ] {
            assert!(
                value <= bound,
                "{what}, {name}: P(p <= {t}) = {value} > {bound}"
            );
        }
        let value = shares.oracle_randomized[level];
        assert!(
            (value - t).abs() <= BINOMIAL_SE_MULTIPLE * binomial_se(t),
            "{what}, oracle randomized: P(p <= {t}) = {value}, not within 3 SE of {t}"
        );
    }
}

#[test]
fn null_pvalues_are_valid_without_shift() {
    let shares = simulate(
        &World {
            shift: 0.0,
            weighted: false,
        },
        1,
    );
    assert_valid(&shares, "no shift, unit weights");
}

#[test]
fn null_pvalues_are_valid_under_shift_with_true_weights() {
    let shares = simulate(
        &World {
            shift: 1.0,
            weighted: true,
        },
        2,
    );
    assert_valid(&shares, "shift 1, weights exp(x - 1/2)");
}

#[test]
fn unweighted_pvalues_fail_the_same_check_under_shift() {
    // The pool's outcomes are noisier than the labeled set's, so its nulls look unusually
    // promising against unweighted labeled scores. The check above must catch this.
    let shares = simulate(
        &World {
            shift: 1.0,
            weighted: false,
        },
        3,
    );
    report(&shares, "shift 1, unit weights");
    let worst = LEVELS
        .iter()
        .enumerate()
        .map(|(level, &t)| (shares.imputed_conservative_null[level] - t) / binomial_se(t))
        .fold(f64::NEG_INFINITY, f64::max);
    assert!(
        worst > 10.0,
        "unweighted p-values under shift exceed t by only {worst:.1} SE: {:?}",
        shares.imputed_conservative_null
    );
}
