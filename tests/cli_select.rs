//! End-to-end tests of `weighbridge select`: the real binary runs in a temporary folder and
//! its outputs are parsed structurally (csv, serde_json); floats are compared as numbers.
//!
//! Expected values are never typed in. They are recomputed here, by brute force, from the
//! input files, with the definitions of design.md section 2:
//! * scores (2.1): clipped `V = +inf if y > c else c - mu`, residual `V = y - mu`, pool
//!   `Vh = c - mu`;
//! * conservative weighted conformal p-values (2.2; Tibshirani, Barber, Candes & Ramdas 2019,
//!   Jin & Candes 2023): `p_j = (sum_i w_i 1{V_i <= Vh_j} + w_j) / (W + w_j)`, one plain loop
//!   over the labeled units per pool unit;
//! * Benjamini & Hochberg (1995) step-up `k* = max{k : p_(k) <= q k / m}` and Benjamini &
//!   Yekutieli (2001) with `q / sum_{k<=m} 1/k` (2.3);
//! * conditional calibration (2.4; Jin & Candes 2023): `K_j` by one full BH run on the
//!   modified p-values per pool unit, first step `p_j <= q K_j / m`, pruning
//!   `r* = max{r : #{j in R1 : xi K_j <= r} >= r}`;
//! * Kish (1965) effective sample size `(sum w)^2 / sum w^2`.
//!
//! The bad-input tests check the contract of design.md section 4 and style.md item 6: exit
//! code 2, a message naming the file, the line and the column with a hint, and no output.
//!
//! Inputs: the README's worked example in fixtures/ (invented demo data, see
//! fixtures/README.md) and small files written by the tests.

use std::collections::HashMap;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use serde_json::Value;
use tempfile::TempDir;

/// Every tolerance of this file, in one place.
mod tolerance {
    /// p-values and scores against the brute-force recomputation: the two sides add the
    /// same few hundred positive weights in different orders, so they differ by a few
    /// 1e-16 (common practice).
    pub const ABSOLUTE: f64 = 1e-12;
    /// The one-sided relative tolerance with which every `p <= level` decision is made, so
    /// that exact ties pass (design.md 2.4, "floating point").
    pub const TIE: f64 = 1e-12;
}

const DEFAULT_FDR: f64 = 0.1;
/// The README example's threshold on the demo activity scale.
const FIXTURE_THRESHOLD: f64 = 6.5;

// ---------------------------------------------------------------------------------------
// Running the binary
// ---------------------------------------------------------------------------------------

fn weighbridge() -> Command {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
}

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

/// Run `weighbridge select` with `args` (paths given as strings).
fn select(args: &[&str]) -> Output {
    weighbridge()
        .arg("select")
        .args(args)
        .output()
        .expect("run the weighbridge binary")
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

fn assert_success(output: &Output) {
    assert!(
        output.status.success(),
        "exit {:?}\nstdout:\n{}\nstderr:\n{}",
        output.status.code(),
        text(&output.stdout),
        text(&output.stderr)
    );
}

fn path_str(path: &Path) -> &str {
    path.to_str().expect("temporary paths are UTF-8")
}

/// Run `weighbridge select --labeled L --pool P --out O` plus `flags` (split on spaces).
fn select_files(labeled: &Path, pool: &Path, out: &Path, flags: &str) -> Output {
    let mut args = vec![
        "--labeled",
        path_str(labeled),
        "--pool",
        path_str(pool),
        "--out",
        path_str(out),
    ];
    args.extend(flags.split_whitespace());
    select(&args)
}

/// The README's fixture run (`--threshold 6.5 --weight-column w`) plus `flags`; must succeed.
fn select_fixtures(out: &Path, flags: &str) -> Output {
    let flags = format!("--threshold 6.5 --weight-column w {flags}");
    let output = select_files(&fixture("labeled.csv"), &fixture("pool.csv"), out, &flags);
    assert_success(&output);
    output
}

// ---------------------------------------------------------------------------------------
// Reading inputs and outputs
// ---------------------------------------------------------------------------------------

fn number(cell: &str) -> f64 {
    cell.trim()
        .parse::<f64>()
        .unwrap_or_else(|e| panic!("`{cell}` is not a number: {e}"))
}

fn boolean(cell: &str) -> bool {
    match cell {
        "true" => true,
        "false" => false,
        other => panic!("`{other}` is not true/false"),
    }
}

/// A CSV file as its header and rows of strings (parsed with the csv crate).
struct Table {
    header: Vec<String>,
    rows: Vec<csv::StringRecord>,
}

impl Table {
    fn read(path: &Path) -> Table {
        let mut reader = csv::Reader::from_path(path)
            .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
        let header = reader
            .headers()
            .unwrap()
            .iter()
            .map(str::to_string)
            .collect();
        let rows = reader.records().map(Result::unwrap).collect();
        Table { header, rows }
    }

    fn index(&self, name: &str) -> Option<usize> {
        self.header.iter().position(|h| h == name)
    }

    fn strings(&self, name: &str) -> Vec<String> {
        let i = self
            .index(name)
            .unwrap_or_else(|| panic!("no column `{name}` in {:?}", self.header));
        self.rows.iter().map(|r| r[i].to_string()).collect()
    }

    fn numbers(&self, name: &str) -> Vec<f64> {
        self.strings(name).iter().map(|s| number(s)).collect()
    }

    fn booleans(&self, name: &str) -> Vec<bool> {
        self.strings(name).iter().map(|s| boolean(s)).collect()
    }
}

/// One input file's columns, read independently of the tool.
struct Units {
    ids: Vec<String>,
    outcome: Option<Vec<f64>>,
    prediction: Vec<f64>,
    threshold: Option<Vec<f64>>,
    weight: Option<Vec<f64>>,
}

impl Units {
    fn read(path: &Path) -> Units {
        let t = Table::read(path);
        Units {
            ids: t.strings("id"),
            outcome: t.index("y").map(|_| t.numbers("y")),
            prediction: t.numbers("pred"),
            threshold: t.index("c").map(|_| t.numbers("c")),
            weight: t.index("w").map(|_| t.numbers("w")),
        }
    }

    fn len(&self) -> usize {
        self.ids.len()
    }

    fn threshold_of(&self, i: usize, constant: Option<f64>) -> f64 {
        match (&self.threshold, constant) {
            (Some(c), None) => c[i],
            (None, Some(c)) => c,
            _ => panic!("give exactly one of a constant threshold or a c column"),
        }
    }

    fn weights(&self, use_weights: bool) -> Vec<f64> {
        match (&self.weight, use_weights) {
            (Some(w), true) => w.clone(),
            _ => vec![1.0; self.len()],
        }
    }
}

/// `Some(())` when column `name` exists and has a non-empty cell.
fn non_empty(t: &Table, name: &str) -> Option<()> {
    t.index(name)?;
    t.strings(name).iter().any(|c| !c.is_empty()).then_some(())
}

/// `candidates.csv`, parsed.
struct Candidates {
    header: Vec<String>,
    ids: Vec<String>,
    score: Vec<f64>,
    weight: Vec<f64>,
    p_value: Vec<f64>,
    selected: Vec<bool>,
    first_step: Option<Vec<bool>>,
    conditional_count: Option<Vec<usize>>,
    never_selectable_because: Vec<String>,
}

impl Candidates {
    fn read(out: &Path) -> Candidates {
        let t = Table::read(&out.join("candidates.csv"));
        Candidates {
            ids: t.strings("id"),
            score: t.numbers("score"),
            weight: t.numbers("weight"),
            p_value: t.numbers("p_value"),
            selected: t.booleans("selected"),
            // Present for every procedure; empty cells where it does not apply (BH, BY).
            first_step: non_empty(&t, "first_step").map(|_| t.booleans("first_step")),
            conditional_count: non_empty(&t, "conditional_count").map(|_| {
                t.strings("conditional_count")
                    .iter()
                    .map(|s| s.parse::<usize>().expect("conditional_count is a count"))
                    .collect()
            }),
            never_selectable_because: t.strings("never_selectable_because"),
            header: t.header,
        }
    }

    fn count(flags: &[bool]) -> u64 {
        flags.iter().filter(|&&f| f).count() as u64
    }
}

fn read_summary(out: &Path) -> Value {
    let bytes = fs::read(out.join("summary.json")).expect("summary.json is written");
    serde_json::from_slice(&bytes).expect("summary.json is JSON")
}

fn field<'a>(summary: &'a Value, key: &str) -> &'a Value {
    summary
        .get(key)
        .unwrap_or_else(|| panic!("summary.json has no `{key}`: {summary:#}"))
}

fn count_field(summary: &Value, key: &str) -> u64 {
    field(summary, key)
        .as_u64()
        .unwrap_or_else(|| panic!("`{key}` is not a count: {summary:#}"))
}

// ---------------------------------------------------------------------------------------
// Brute-force references (design.md section 2)
// ---------------------------------------------------------------------------------------

#[derive(Clone, Copy, Debug)]
enum Score {
    Clipped,
    Residual,
}

/// Labeled scores V_i (design.md 2.1).
fn labeled_scores(labeled: &Units, constant: Option<f64>, score: Score) -> Vec<f64> {
    let y = labeled.outcome.as_ref().expect("labeled file has y");
    (0..labeled.len())
        .map(|i| {
            let c = labeled.threshold_of(i, constant);
            match score {
                Score::Clipped if y[i] > c => f64::INFINITY,
                Score::Clipped => c - labeled.prediction[i],
                Score::Residual => y[i] - labeled.prediction[i],
            }
        })
        .collect()
}

/// Imputed pool scores Vh_j = c_j - mu_j (design.md 2.1, both scores).
fn pool_scores(pool: &Units, constant: Option<f64>) -> Vec<f64> {
    (0..pool.len())
        .map(|j| pool.threshold_of(j, constant) - pool.prediction[j])
        .collect()
}

/// Conservative weighted conformal p-values, one plain loop per pool unit (design.md 2.2).
fn conservative_pvalues(v: &[f64], w: &[f64], vh: &[f64], wh: &[f64]) -> Vec<f64> {
    let total: f64 = w.iter().sum();
    vh.iter()
        .zip(wh)
        .map(|(&s, &wj)| {
            let at_or_below: f64 = v
                .iter()
                .zip(w)
                .filter(|(&vi, _)| vi <= s)
                .map(|(_, &wi)| wi)
                .sum();
            (at_or_below + wj) / (total + wj)
        })
        .collect()
}

/// Lower ends of the randomized p-values: `sum_i w_i 1{V_i < Vh_j} / (W + w_j)` (U_j = 0).
fn strict_pvalues(v: &[f64], w: &[f64], vh: &[f64], wh: &[f64]) -> Vec<f64> {
    let total: f64 = w.iter().sum();
    vh.iter()
        .zip(wh)
        .map(|(&s, &wj)| {
            let below: f64 = v
                .iter()
                .zip(w)
                .filter(|(&vi, _)| vi < s)
                .map(|(_, &wi)| wi)
                .sum();
            below / (total + wj)
        })
        .collect()
}

/// `numerator / denominator <= level`, with the one-sided tie tolerance.
fn passes(numerator: f64, denominator: f64, level: f64) -> bool {
    numerator <= level * denominator * (1.0 + tolerance::TIE)
}

/// BH count on numerators over one common denominator (Benjamini & Hochberg 1995).
fn bh_count_over(mut numerators: Vec<f64>, denominator: f64, q: f64) -> usize {
    let m = numerators.len();
    numerators.sort_by(f64::total_cmp);
    (1..=m)
        .filter(|&k| passes(numerators[k - 1], denominator, q * k as f64 / m as f64))
        .max()
        .unwrap_or(0)
}

/// BH selection: the k* smallest p-values, i.e. every p <= q k* / m.
fn bh_selection(p: &[f64], q: f64) -> Vec<bool> {
    let m = p.len();
    let k = bh_count_over(p.to_vec(), 1.0, q);
    p.iter()
        .map(|&x| k > 0 && passes(x, 1.0, q * k as f64 / m as f64))
        .collect()
}

/// Benjamini & Yekutieli (2001): BH at `q / sum_{k<=m} 1/k`.
fn by_selection(p: &[f64], q: f64) -> Vec<bool> {
    let harmonic: f64 = (1..=p.len()).map(|k| 1.0 / k as f64).sum();
    bh_selection(p, q / harmonic)
}

/// K_j by the definition of design.md 2.4: one BH run per pool unit on
/// `p_l^(j) = (sum_i w_i 1{V_i < Vh_l} + w_j 1{Vh_j < Vh_l}) / (W + w_j)`, `p_j^(j) = 0`.
fn conditional_counts(v: &[f64], w: &[f64], vh: &[f64], wh: &[f64], q: f64) -> Vec<usize> {
    let total: f64 = w.iter().sum();
    let below: Vec<f64> = vh
        .iter()
        .map(|&s| {
            v.iter()
                .zip(w)
                .filter(|(&vi, _)| vi < s)
                .map(|(_, &wi)| wi)
                .sum()
        })
        .collect();
    (0..vh.len())
        .map(|j| {
            let numerators: Vec<f64> = (0..vh.len())
                .map(|l| {
                    if l == j {
                        0.0
                    } else if vh[j] < vh[l] {
                        below[l] + wh[j]
                    } else {
                        below[l]
                    }
                })
                .collect();
            bh_count_over(numerators, total + wh[j], q)
        })
        .collect()
}

/// Pruning (design.md 2.4): `R = {j in R1 : xi_j K_j <= r*}`.
fn prune(first_step: &[bool], counts: &[usize], xi: impl Fn(usize) -> f64) -> Vec<bool> {
    let candidates: Vec<f64> = (0..counts.len())
        .filter(|&j| first_step[j])
        .map(|j| xi(j) * counts[j] as f64)
        .collect();
    let r_star = (1..=candidates.len())
        .filter(|&r| candidates.iter().filter(|&&x| x <= r as f64).count() >= r)
        .max()
        .unwrap_or(0);
    (0..counts.len())
        .map(|j| first_step[j] && xi(j) * counts[j] as f64 <= r_star as f64)
        .collect()
}

fn assert_close(what: &str, ours: &[f64], reference: &[f64]) {
    assert_eq!(ours.len(), reference.len(), "{what}: lengths");
    for (j, (a, b)) in ours.iter().zip(reference).enumerate() {
        assert!(
            (a - b).abs() <= tolerance::ABSOLUTE,
            "{what}[{j}]: binary {a}, brute force {b}"
        );
    }
}

fn assert_pvalue_range(p: &[f64]) {
    for (j, &x) in p.iter().enumerate() {
        assert!(x > 0.0 && x <= 1.0, "p_value[{j}] = {x} is outside (0, 1]");
    }
}

// ---------------------------------------------------------------------------------------
// The good path on the README fixtures
// ---------------------------------------------------------------------------------------

/// The columns of candidates.csv, the same for every procedure: the twelve of earlier
/// versions in their order, then the ones added since.
const CANDIDATES_COLUMNS: [&str; 14] = [
    "id",
    "score",
    "weight",
    "p_value",
    "selected",
    "first_step",
    "conditional_count",
    "never_selectable_because",
    "selection_probability",
    "q_value",
    "q_value_by",
    "unreliable_weights",
    "prediction",
    "shortlist_rank",
];

const SUMMARY_KEYS: [&str; 15] = [
    "n_labeled",
    "n_pool",
    "fdr",
    "procedure",
    "pruning",
    "pvalues",
    "score",
    "seed",
    "pruning_draw",
    "selected_count",
    "first_step_count",
    "bh_selected_count",
    "unreachable_count",
    "warnings",
    "tool",
];

#[test]
fn readme_example_conditional_calibration_on_the_fixtures() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("shortlist");
    let output = select_fixtures(&out, "--fdr 0.1");

    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let candidates = Candidates::read(&out);
    let summary = read_summary(&out);
    let m = pool.len();
    let q = DEFAULT_FDR;

    // candidates.csv: the documented columns, one row per pool unit, in input order.
    assert_eq!(candidates.header, CANDIDATES_COLUMNS);
    assert_eq!(candidates.ids, pool.ids);

    // summary.json: every documented field, settings as asked.
    for key in SUMMARY_KEYS {
        field(&summary, key);
    }
    assert_eq!(
        summary["tool"]["version"].as_str(),
        Some(env!("CARGO_PKG_VERSION"))
    );
    assert_eq!(count_field(&summary, "n_labeled"), labeled.len() as u64);
    assert_eq!(count_field(&summary, "n_pool"), m as u64);
    assert_eq!(summary["fdr"].as_f64(), Some(q));
    assert_eq!(summary["procedure"], "conditional");
    assert_eq!(summary["pruning"], "homogeneous");
    assert_eq!(summary["pvalues"], "conservative");
    assert_eq!(summary["score"], "clipped");
    let seed = count_field(&summary, "seed");
    assert!(
        text(&output.stdout).contains(&format!("seed: {seed}")),
        "stdout prints the seed of the summary:\n{}",
        text(&output.stdout)
    );
    let xi = summary["pruning_draw"]
        .as_f64()
        .expect("homogeneous pruning reports its draw");
    assert!(xi > 0.0 && xi < 1.0, "pruning_draw {xi}");
    let warnings = summary["warnings"].as_array().expect("warnings is a list");
    assert!(warnings.iter().all(Value::is_string));

    // Scores, weights and p-values against the brute-force formulas.
    let w = labeled.weights(true);
    let wh = pool.weights(true);
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    assert_close("score", &candidates.score, &vh);
    assert_close("weight", &candidates.weight, &wh);
    assert_pvalue_range(&candidates.p_value);
    let p = conservative_pvalues(&v, &w, &vh, &wh);
    assert_close("p_value", &candidates.p_value, &p);

    // Counts in the summary agree with the CSV.
    let first_step = candidates.first_step.as_ref().expect("first_step column");
    let counts = candidates
        .conditional_count
        .as_ref()
        .expect("conditional_count column");
    assert_eq!(
        count_field(&summary, "selected_count"),
        Candidates::count(&candidates.selected)
    );
    assert_eq!(
        count_field(&summary, "first_step_count"),
        Candidates::count(first_step)
    );
    let unreachable: Vec<bool> = candidates
        .never_selectable_because
        .iter()
        .map(|r| !r.is_empty())
        .collect();
    assert_eq!(
        count_field(&summary, "unreachable_count"),
        Candidates::count(&unreachable)
    );
    assert!(
        count_field(&summary, "selected_count") > 0,
        "the README example must select a non-empty shortlist"
    );

    // Selected units are a subset of the first-step units.
    for (j, (&chosen, &first)) in candidates.selected.iter().zip(first_step).enumerate() {
        assert!(
            !chosen || first,
            "unit {j} is selected but not in the first step"
        );
    }

    // K_j by m separate BH runs; first step p_j <= q K_j / m; homogeneous pruning with the
    // reported draw reproduces the shortlist.
    let expected_counts = conditional_counts(&v, &w, &vh, &wh, q);
    assert_eq!(counts, &expected_counts, "conditional_count (K_j)");
    for j in 0..m {
        assert!(counts[j] >= 1 && counts[j] <= m);
        let expected = passes(p[j], 1.0, q * counts[j] as f64 / m as f64);
        assert_eq!(first_step[j], expected, "first_step of unit {j}");
    }
    assert_eq!(
        candidates.selected,
        prune(first_step, counts, |_| xi),
        "homogeneous pruning with xi = {xi}"
    );

    // Unreachable: exactly the units whose p-value floor w_j / (W + w_j) exceeds q
    // (design.md 2.2); none of them is selected.
    let total: f64 = w.iter().sum();
    for j in 0..m {
        let floor = wh[j] / (total + wh[j]);
        assert_eq!(unreachable[j], floor > q, "unit {j}: floor {floor}");
        assert!(!(unreachable[j] && candidates.selected[j]));
    }

    // BH on the same p-values (summary field bh_pvalues names them), and the labeled
    // weights' totals.
    assert_eq!(summary["bh_pvalues"].as_str(), Some("conservative"));
    assert_eq!(
        count_field(&summary, "bh_selected_count"),
        Candidates::count(&bh_selection(&p, q))
    );
    let total_reported = summary["total_labeled_weight"].as_f64().unwrap();
    assert!((total_reported - total).abs() <= tolerance::ABSOLUTE * total);
    let kish = total * total / w.iter().map(|x| x * x).sum::<f64>();
    let ess = summary["labeled_ess"].as_f64().unwrap();
    assert!(
        (ess - kish).abs() <= tolerance::ABSOLUTE * kish,
        "ESS {ess} vs {kish}"
    );
}

#[test]
fn deterministic_pruning_and_heterogeneous_pruning_follow_the_definition() {
    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let q = 0.3;
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    let expected_counts =
        conditional_counts(&v, &labeled.weights(true), &vh, &pool.weights(true), q);
    for pruning in ["deterministic", "heterogeneous"] {
        let dir = TempDir::new().unwrap();
        let out = dir.path().join("out");
        select_fixtures(&out, &format!("--fdr 0.3 --pruning {pruning}"));
        let candidates = Candidates::read(&out);
        let summary = read_summary(&out);
        assert_eq!(summary["pruning"], pruning);
        assert!(
            summary["pruning_draw"].is_null(),
            "{pruning}: no shared draw"
        );
        let first_step = candidates.first_step.as_ref().unwrap();
        let counts = candidates.conditional_count.as_ref().unwrap();
        assert_eq!(counts, &expected_counts, "{pruning}: K_j");
        for (&chosen, &first) in candidates.selected.iter().zip(first_step) {
            assert!(
                !chosen || first,
                "{pruning}: selected outside the first step"
            );
        }
        if pruning == "deterministic" {
            // xi_j = 1 (design.md 2.4).
            assert_eq!(candidates.selected, prune(first_step, counts, |_| 1.0));
        }
        assert_eq!(
            count_field(&summary, "selected_count"),
            Candidates::count(&candidates.selected)
        );
    }
}

// ---------------------------------------------------------------------------------------
// BH and BY
// ---------------------------------------------------------------------------------------

/// Checks shared by every BH/BY run: no conditional columns or counts, and the selection
/// equals the step-up procedure recomputed from the CSV's own p-values.
fn check_step_up_run(out: &Path, procedure: &str, pvalues: &str, q: f64) -> Candidates {
    let candidates = Candidates::read(out);
    let summary = read_summary(out);
    assert_eq!(
        candidates.header, CANDIDATES_COLUMNS,
        "{procedure}: the same columns as conditional calibration"
    );
    let table = Table::read(&out.join("candidates.csv"));
    for column in ["first_step", "conditional_count"] {
        assert!(
            table.strings(column).iter().all(String::is_empty),
            "{procedure}: `{column}` does not apply, its cells are empty"
        );
    }
    assert_eq!(summary["procedure"], procedure);
    assert_eq!(summary["pvalues"], pvalues);
    assert!(summary["pruning"].is_null());
    assert!(summary["pruning_draw"].is_null());
    assert!(summary["first_step_count"].is_null());
    assert_pvalue_range(&candidates.p_value);
    let expected = match procedure {
        "bh" => bh_selection(&candidates.p_value, q),
        "by" => by_selection(&candidates.p_value, q),
        other => panic!("unknown procedure {other}"),
    };
    assert_eq!(candidates.selected, expected, "{procedure} selection");
    assert_eq!(
        count_field(&summary, "selected_count"),
        Candidates::count(&expected)
    );
    assert_eq!(
        count_field(&summary, "bh_selected_count"),
        Candidates::count(&bh_selection(&candidates.p_value, q))
    );
    candidates
}

#[test]
fn bh_with_randomized_pvalues_by_default() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    select_fixtures(&out, "--procedure bh");
    let candidates = check_step_up_run(&out, "bh", "randomized", DEFAULT_FDR);
    assert!(Candidates::count(&candidates.selected) > 0);

    // Each randomized p-value lies between its U = 0 and U = 1 ends (design.md 2.2).
    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let (w, wh) = (labeled.weights(true), pool.weights(true));
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    let low = strict_pvalues(&v, &w, &vh, &wh);
    let high = conservative_pvalues(&v, &w, &vh, &wh);
    for j in 0..vh.len() {
        let p = candidates.p_value[j];
        assert!(
            p >= low[j] - tolerance::ABSOLUTE && p <= high[j] + tolerance::ABSOLUTE,
            "unit {j}: randomized {p} outside [{}, {}]",
            low[j],
            high[j]
        );
    }
}

#[test]
fn bh_with_conservative_pvalues_on_request() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    // At q = 0.1 BH on the conservative fixture p-values selects nothing; 0.3 exercises it.
    select_fixtures(&out, "--procedure bh --pvalues conservative --fdr 0.3");
    let candidates = check_step_up_run(&out, "bh", "conservative", 0.3);
    assert!(Candidates::count(&candidates.selected) > 0);
    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    let p = conservative_pvalues(&v, &labeled.weights(true), &vh, &pool.weights(true));
    assert_close("p_value", &candidates.p_value, &p);
}

#[test]
fn by_on_the_fixtures() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    select_fixtures(&out, "--procedure by");
    let candidates = check_step_up_run(&out, "by", "randomized", DEFAULT_FDR);
    // BY is never larger than BH on the same p-values.
    let bh = bh_selection(&candidates.p_value, DEFAULT_FDR);
    for (&by, &bh) in candidates.selected.iter().zip(&bh) {
        assert!(!by || bh, "BY selected a unit BH did not");
    }
}

/// A labeled set of 499 inactive units (y = 0 < c = 1, predictions spread over [0, 0.9])
/// and a pool of 40 of which the first 15 are predicted far above the threshold: their
/// conservative p-value is 1/500, small enough for BY at q = 0.2 to select them.
fn write_by_case(dir: &Path) -> (PathBuf, PathBuf) {
    let mut labeled = String::from("id,y,pred\n");
    for i in 0..499 {
        labeled.push_str(&format!("L{i},0,{}\n", 0.9 * i as f64 / 498.0));
    }
    let mut pool = String::from("id,pred\n");
    for j in 0..40 {
        let prediction = if j < 15 { 5.0 } else { 0.2 + 0.01 * j as f64 };
        pool.push_str(&format!("P{j},{prediction}\n"));
    }
    let labeled_path = dir.join("labeled.csv");
    let pool_path = dir.join("pool.csv");
    fs::write(&labeled_path, labeled).unwrap();
    fs::write(&pool_path, pool).unwrap();
    (labeled_path, pool_path)
}

#[test]
fn by_selects_when_the_evidence_is_strong() {
    let dir = TempDir::new().unwrap();
    let (labeled, pool) = write_by_case(dir.path());
    let out = dir.path().join("out");
    for pvalues in ["randomized", "conservative"] {
        let output = select_files(
            &labeled,
            &pool,
            &out,
            &format!("--threshold 1 --procedure by --pvalues {pvalues} --fdr 0.2"),
        );
        assert_success(&output);
        let candidates = check_step_up_run(&out, "by", pvalues, 0.2);
        let expected: Vec<bool> = (0..40).map(|j| j < 15).collect();
        assert_eq!(candidates.selected, expected, "{pvalues}");
    }
}

// ---------------------------------------------------------------------------------------
// Determinism
// ---------------------------------------------------------------------------------------

/// candidates.csv and shortlist.csv as bytes, summary.json without the command line
/// (which names the run's own --out).
fn output_bytes(out: &Path) -> (Vec<u8>, Vec<u8>, Value) {
    let mut summary = read_summary(out);
    summary["command_line"] = Value::Null;
    (
        fs::read(out.join("candidates.csv")).unwrap(),
        fs::read(out.join("shortlist.csv")).unwrap(),
        summary,
    )
}

#[test]
fn same_seed_same_bytes_other_seed_other_randomized_pvalues() {
    let dir = TempDir::new().unwrap();
    for flags in [
        "--seed 11",
        "--seed 11 --procedure bh",
        "--seed 11 --pruning heterogeneous",
    ] {
        let first = dir.path().join("first");
        let second = dir.path().join("second");
        select_fixtures(&first, flags);
        select_fixtures(&second, flags);
        assert!(
            output_bytes(&first) == output_bytes(&second),
            "{flags:?}: two runs with one seed differ"
        );
        assert_eq!(count_field(&read_summary(&first), "seed"), 11);
        fs::remove_dir_all(&first).unwrap();
        fs::remove_dir_all(&second).unwrap();
    }

    // Randomized p-values (BH's default) move with the seed: U_j multiplies w_j > 0.
    let a = dir.path().join("a");
    let b = dir.path().join("b");
    select_fixtures(&a, "--procedure bh --seed 11");
    select_fixtures(&b, "--procedure bh --seed 12");
    let (pa, pb) = (Candidates::read(&a).p_value, Candidates::read(&b).p_value);
    let changed = pa.iter().zip(&pb).filter(|(x, y)| x != y).count();
    assert!(
        changed > pa.len() / 2,
        "only {changed} of {} randomized p-values changed with the seed",
        pa.len()
    );
    assert_eq!(count_field(&read_summary(&b), "seed"), 12);
}

// ---------------------------------------------------------------------------------------
// Per-unit thresholds, the residual score, binary outcomes, unreachable units
// ---------------------------------------------------------------------------------------

/// A small deterministic stream (xorshift64) to vary test inputs; expected values never
/// come from it, they are recomputed from the files written.
struct Stream(u64);

impl Stream {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Rounded to 3 decimals so that ties between scores occur.
    fn rounded(&mut self, low: f64, high: f64) -> f64 {
        ((low + (high - low) * self.uniform()) * 1000.0).round() / 1000.0
    }
}

/// Labeled (id,y,pred,c,w) and pool (id,pred,c,w) files with per-unit thresholds.
fn write_threshold_column_case(dir: &Path) -> (PathBuf, PathBuf) {
    let mut stream = Stream(0x5EED_0001);
    let mut labeled = String::from("id,y,pred,c,w\n");
    for i in 0..120 {
        let c = stream.rounded(0.5, 1.5);
        let pred = stream.rounded(0.0, 2.0);
        let y = pred + stream.rounded(-0.6, 0.6);
        let w = stream.rounded(0.2, 3.0);
        labeled.push_str(&format!("L{i},{y},{pred},{c},{w}\n"));
    }
    let mut pool = String::from("id,pred,c,w\n");
    for j in 0..60 {
        let c = stream.rounded(0.5, 1.5);
        let pred = stream.rounded(0.0, 3.5);
        let w = stream.rounded(0.2, 3.0);
        pool.push_str(&format!("P{j},{pred},{c},{w}\n"));
    }
    let labeled_path = dir.join("labeled.csv");
    let pool_path = dir.join("pool.csv");
    fs::write(&labeled_path, labeled).unwrap();
    fs::write(&pool_path, pool).unwrap();
    (labeled_path, pool_path)
}

#[test]
fn per_unit_thresholds_with_clipped_and_residual_scores() {
    let dir = TempDir::new().unwrap();
    let (labeled_path, pool_path) = write_threshold_column_case(dir.path());
    let labeled = Units::read(&labeled_path);
    let pool = Units::read(&pool_path);
    let (w, wh) = (labeled.weights(true), pool.weights(true));
    let vh = pool_scores(&pool, None);
    for (score, name) in [(Score::Clipped, "clipped"), (Score::Residual, "residual")] {
        let out = dir.path().join(name);
        let output = select_files(
            &labeled_path,
            &pool_path,
            &out,
            &format!("--threshold-column c --weight-column w --score {name} --fdr 0.2"),
        );
        assert_success(&output);
        let candidates = Candidates::read(&out);
        let summary = read_summary(&out);
        assert_eq!(summary["score"], name);
        assert_eq!(candidates.ids, pool.ids);
        assert_close("score", &candidates.score, &vh);
        let v = labeled_scores(&labeled, None, score);
        let p = conservative_pvalues(&v, &w, &vh, &wh);
        assert_close(&format!("{name} p_value"), &candidates.p_value, &p);
        let counts = conditional_counts(&v, &w, &vh, &wh, 0.2);
        assert_eq!(candidates.conditional_count.as_ref().unwrap(), &counts);
    }
}

#[test]
fn binary_outcomes_with_probabilities_and_the_clipped_score() {
    // 0/1 outcomes, predictions are probabilities of 1, threshold 0.5 (design.md 2.1).
    let dir = TempDir::new().unwrap();
    let mut stream = Stream(0xB1_0A5E);
    let mut labeled = String::from("id,y,pred\n");
    for i in 0..200 {
        let (y, pred) = if i % 2 == 0 {
            (0, stream.rounded(0.02, 0.6))
        } else {
            (1, stream.rounded(0.4, 0.95))
        };
        labeled.push_str(&format!("L{i},{y},{pred}\n"));
    }
    let mut pool = String::from("id,pred\n");
    for j in 0..40 {
        let pred = if j < 20 {
            stream.rounded(0.97, 0.999)
        } else {
            // Below 0.45, every score 0.5 - pred is above a quarter of the inactive
            // labeled scores, so p > 0.1: never selectable at q = 0.1.
            stream.rounded(0.02, 0.45)
        };
        pool.push_str(&format!("P{j},{pred}\n"));
    }
    let labeled_path = dir.path().join("labeled.csv");
    let pool_path = dir.path().join("pool.csv");
    fs::write(&labeled_path, labeled).unwrap();
    fs::write(&pool_path, pool).unwrap();
    let out = dir.path().join("out");
    let output = select_files(&labeled_path, &pool_path, &out, "--threshold 0.5");
    assert_success(&output);
    let candidates = Candidates::read(&out);
    let labeled = Units::read(&labeled_path);
    let pool = Units::read(&pool_path);
    let v = labeled_scores(&labeled, Some(0.5), Score::Clipped);
    assert_eq!(v.iter().filter(|x| x.is_infinite()).count(), 100);
    let vh = pool_scores(&pool, Some(0.5));
    let ones = vec![1.0; 200];
    let p = conservative_pvalues(&v, &ones, &vh, &[1.0; 40]);
    assert_close("p_value", &candidates.p_value, &p);
    // The confident pool units sit below every inactive labeled score: p = 1 / 201.
    for j in 0..20 {
        assert!((candidates.p_value[j] - 1.0 / 201.0).abs() <= tolerance::ABSOLUTE);
    }
    let selected = Candidates::count(&candidates.selected);
    assert!(selected > 0, "nothing selected on a clear binary case");
    for j in 20..40 {
        assert!(
            !candidates.selected[j],
            "unit {j} (p = {}) should not be selected",
            candidates.p_value[j]
        );
    }
}

#[test]
fn a_unit_with_a_huge_weight_is_reported_unreachable() {
    let dir = TempDir::new().unwrap();
    let mut labeled = String::from("id,y,pred,w\n");
    for i in 0..50 {
        labeled.push_str(&format!("L{i},{},{},1\n", i % 3, 0.02 * i as f64));
    }
    let mut pool = String::from("id,pred,w\n");
    for j in 0..30 {
        let w = if j == 7 { "1e6" } else { "1" };
        pool.push_str(&format!("P{j},{},{w}\n", 0.1 * j as f64));
    }
    let labeled_path = dir.path().join("labeled.csv");
    let pool_path = dir.path().join("pool.csv");
    fs::write(&labeled_path, labeled).unwrap();
    fs::write(&pool_path, pool).unwrap();
    let out = dir.path().join("out");
    let output = select_files(
        &labeled_path,
        &pool_path,
        &out,
        "--threshold 1.5 --weight-column w",
    );
    assert_success(&output);
    let candidates = Candidates::read(&out);
    let summary = read_summary(&out);
    // Floor w_j / (W + w_j) = 1e6 / (50 + 1e6) > 0.1 for unit 7 only; 1/51 < 0.1 elsewhere.
    for j in 0..30 {
        let reason = &candidates.never_selectable_because[j];
        assert_eq!(!reason.is_empty(), j == 7, "unit {j}: `{reason}`");
    }
    assert!(!candidates.selected[7]);
    assert!(!candidates.first_step.as_ref().unwrap()[7]);
    assert!(candidates.p_value[7] >= 1e6 / (50.0 + 1e6) - tolerance::ABSOLUTE);
    assert_eq!(count_field(&summary, "unreachable_count"), 1);
    let warnings = summary["warnings"].as_array().unwrap();
    assert!(
        warnings
            .iter()
            .any(|w| w.as_str().unwrap().contains("unreachable")),
        "a warning names the unreachable units: {warnings:?}"
    );
}

// ---------------------------------------------------------------------------------------
// Bad inputs: exit 2, file / line / column / hint in the message, nothing written
// ---------------------------------------------------------------------------------------

/// A valid labeled file (30 rows, so q = 0.1 is reachable) and pool file (10 rows), as
/// lines that the bad-input tests edit one at a time.
fn good_labeled_lines() -> Vec<String> {
    let mut lines = vec!["id,y,pred,c,w".to_string()];
    for i in 0..30 {
        lines.push(format!(
            "L{i},{},{},1,{}",
            (i % 4) as f64 * 0.5,
            0.05 * i as f64,
            1.0 + (i % 3) as f64
        ));
    }
    lines
}

fn good_pool_lines() -> Vec<String> {
    let mut lines = vec!["id,pred,c,w".to_string()];
    for j in 0..10 {
        lines.push(format!(
            "P{j},{},1,{}",
            0.3 * j as f64,
            1.0 + (j % 2) as f64
        ));
    }
    lines
}

/// A temporary folder with a labeled and a pool file and an output path that must stay
/// absent.
struct BadCase {
    dir: TempDir,
    labeled: PathBuf,
    pool: PathBuf,
    out: PathBuf,
}

impl BadCase {
    fn new(labeled: &[String], pool: &[String]) -> BadCase {
        let dir = TempDir::new().unwrap();
        let labeled_path = dir.path().join("labeled.csv");
        let pool_path = dir.path().join("pool.csv");
        fs::write(&labeled_path, labeled.join("\n") + "\n").unwrap();
        fs::write(&pool_path, pool.join("\n") + "\n").unwrap();
        let out = dir.path().join("out");
        BadCase {
            dir,
            labeled: labeled_path,
            pool: pool_path,
            out,
        }
    }

    fn good() -> BadCase {
        BadCase::new(&good_labeled_lines(), &good_pool_lines())
    }

    /// Labeled data row `row` (1-based; file line row + 1) replaced.
    fn labeled_row(row: usize, replacement: &str) -> BadCase {
        let mut lines = good_labeled_lines();
        lines[row] = replacement.to_string();
        BadCase::new(&lines, &good_pool_lines())
    }

    fn pool_row(row: usize, replacement: &str) -> BadCase {
        let mut lines = good_pool_lines();
        lines[row] = replacement.to_string();
        BadCase::new(&good_labeled_lines(), &lines)
    }

    /// Run select on the case's files with `flags`; it must fail with exit code 2, print
    /// nothing on stdout and write no output folder.
    fn run(&self, flags: &str) -> Failed {
        let output = select_files(&self.labeled, &self.pool, &self.out, flags);
        let stderr = text(&output.stderr);
        assert_eq!(
            output.status.code(),
            Some(2),
            "{flags:?}: expected exit code 2\nstdout:\n{}\nstderr:\n{stderr}",
            text(&output.stdout)
        );
        assert!(
            !self.out.exists(),
            "{flags:?}: the output folder was created although the input is bad"
        );
        assert!(
            output.stdout.is_empty(),
            "{flags:?}: nothing on stdout: {}",
            text(&output.stdout)
        );
        Failed { stderr }
    }
}

/// The stderr of a failed run, with assertions on its parts.
struct Failed {
    stderr: String,
}

impl Failed {
    fn names(&self, needle: &str) -> &Self {
        assert!(
            self.stderr.contains(needle),
            "stderr should contain `{needle}`:\n{}",
            self.stderr
        );
        self
    }

    fn file(&self, path: &Path) -> &Self {
        self.names(path_str(path))
    }

    fn line(&self, line: u64) -> &Self {
        self.names(&format!("line {line}"))
    }

    fn column(&self, column: &str) -> &Self {
        self.names(&format!("column `{column}`"))
    }

    fn hint(&self) -> &Self {
        self.names("Hint:")
    }
}

#[test]
fn bad_missing_file() {
    let case = BadCase::good();
    let missing = case.dir.path().join("no_such_labeled.csv");
    let output = select_files(&missing, &case.pool, &case.out, "--threshold 1");
    assert_eq!(output.status.code(), Some(2));
    assert!(!case.out.exists());
    let failed = Failed {
        stderr: text(&output.stderr),
    };
    failed.file(&missing).names("cannot open").hint();
}

#[test]
fn bad_empty_file() {
    let case = BadCase::good();
    fs::write(&case.pool, b"").unwrap();
    case.run("--threshold 1")
        .file(&case.pool)
        .line(1)
        .names("empty")
        .hint();
}

#[test]
fn bad_header_only() {
    let case = BadCase::new(&good_labeled_lines()[..1], &good_pool_lines());
    case.run("--threshold 1")
        .file(&case.labeled)
        .line(1)
        .names("no data rows")
        .hint();
}

#[test]
fn bad_missing_prediction_column() {
    let case = BadCase::good();
    case.run("--threshold 1 --prediction nope")
        .file(&case.labeled)
        .line(1)
        .names("`nope`")
        .names("--prediction")
        .hint();
}

#[test]
fn bad_non_numeric_cell() {
    let case = BadCase::labeled_row(3, "L2,abc,0.1,1,1");
    case.run("--threshold 1")
        .file(&case.labeled)
        .line(4)
        .column("y")
        .names("`abc`")
        .hint();
}

#[test]
fn bad_nan_cell() {
    let case = BadCase::labeled_row(5, "L4,1,NaN,1,1");
    case.run("--threshold 1")
        .file(&case.labeled)
        .line(6)
        .column("pred")
        .names("NaN")
        .hint();
}

#[test]
fn bad_infinite_cell() {
    let case = BadCase::pool_row(2, "P1,inf,1,1");
    case.run("--threshold 1")
        .file(&case.pool)
        .line(3)
        .column("pred")
        .names("finite")
        .hint();
}

#[test]
fn bad_empty_cell() {
    let case = BadCase::pool_row(4, "P3,,1,1");
    case.run("--threshold 1")
        .file(&case.pool)
        .line(5)
        .column("pred")
        .names("empty")
        .hint();
}

#[test]
fn bad_empty_id() {
    let case = BadCase::labeled_row(7, ",1,0.3,1,1");
    case.run("--threshold 1")
        .file(&case.labeled)
        .line(8)
        .column("id")
        .names("empty")
        .hint();
}

#[test]
fn bad_duplicate_id() {
    // Row 9 repeats the id of row 2 (file lines 10 and 3).
    let case = BadCase::labeled_row(9, "L1,1,0.3,1,1");
    case.run("--threshold 1")
        .file(&case.labeled)
        .line(10)
        .column("id")
        .names("`L1`")
        .names("line 3")
        .hint();
}

#[test]
fn bad_zero_weight() {
    let case = BadCase::pool_row(6, "P5,0.3,1,0");
    case.run("--threshold 1 --weight-column w")
        .file(&case.pool)
        .line(7)
        .column("w")
        .names("not positive")
        .hint();
}

#[test]
fn bad_negative_weight() {
    let case = BadCase::labeled_row(2, "L1,1,0.3,1,-0.5");
    case.run("--threshold 1 --weight-column w")
        .file(&case.labeled)
        .line(3)
        .column("w")
        .names("`-0.5`")
        .hint();
}

#[test]
fn bad_field_count() {
    let case = BadCase::pool_row(8, "P7,0.3,1,1,extra");
    case.run("--threshold 1")
        .file(&case.pool)
        .line(9)
        .names("5 fields")
        .names("header has 4")
        .hint();
}

#[test]
fn bad_fdr_zero() {
    BadCase::good()
        .run("--threshold 1 --fdr 0")
        .names("--fdr")
        .names("(0, 1]")
        .hint();
}

#[test]
fn bad_fdr_above_one() {
    BadCase::good()
        .run("--threshold 1 --fdr 1.5")
        .names("--fdr")
        .names("1.5")
        .hint();
}

#[test]
fn bad_fdr_negative() {
    BadCase::good()
        .run("--threshold 1 --fdr -0.1")
        .names("--fdr")
        .names("-0.1")
        .hint();
}

#[test]
fn bad_conditional_with_randomized_pvalues() {
    BadCase::good()
        .run("--threshold 1 --procedure conditional --pvalues randomized")
        .names("conservative p-values")
        .names("guarantee rests on")
        .names("--procedure bh");
}

#[test]
fn bad_no_threshold() {
    BadCase::good()
        .run("")
        .names("--threshold")
        .names("--threshold-column")
        .names("--help");
}

#[test]
fn bad_labeled_set_too_small_for_q() {
    // 5 equally weighted labeled units: every p-value is at least 1/6 > 0.1.
    let case = BadCase::new(&good_labeled_lines()[..6], &good_pool_lines());
    case.run("--threshold 1 --fdr 0.1")
        .names("0.1")
        .names("n = 5")
        .names("Use a larger labeled set or a higher --fdr");
}

#[test]
fn bad_threshold_column_missing_from_the_pool() {
    let pool: Vec<String> = good_pool_lines()
        .iter()
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            format!("{},{},{}", f[0], f[1], f[3])
        })
        .collect();
    let case = BadCase::new(&good_labeled_lines(), &pool);
    case.run("--threshold-column c")
        .file(&case.pool)
        .line(1)
        .names("`c`")
        .names("--threshold-column")
        .hint();
}

#[test]
fn bad_weight_column_missing_from_one_file() {
    let labeled: Vec<String> = good_labeled_lines()
        .iter()
        .map(|l| l.rsplit_once(',').unwrap().0.to_string())
        .collect();
    let case = BadCase::new(&labeled, &good_pool_lines());
    case.run("--threshold 1 --weight-column w")
        .file(&case.labeled)
        .line(1)
        .names("`w`")
        .names("--weight-column")
        .hint();
}

#[test]
fn a_bad_input_leaves_an_existing_output_folder_untouched() {
    let case = BadCase::pool_row(2, "P1,oops,1,1");
    fs::create_dir(&case.out).unwrap();
    fs::write(case.out.join("candidates.csv"), b"earlier results\n").unwrap();
    let output = select_files(&case.labeled, &case.pool, &case.out, "--threshold 1");
    assert_eq!(output.status.code(), Some(2));
    let names: HashMap<String, Vec<u8>> = fs::read_dir(&case.out)
        .unwrap()
        .map(|e| {
            let e = e.unwrap();
            (
                e.file_name().to_string_lossy().into_owned(),
                fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    assert_eq!(names.len(), 1, "only the earlier file: {:?}", names.keys());
    assert_eq!(names["candidates.csv"], b"earlier results\n");
}

#[test]
fn the_good_bad_case_files_are_accepted() {
    // The base of every bad-input case is itself valid, so each failure above is caused by
    // the one edit it makes.
    let case = BadCase::good();
    for flags in [
        "--threshold 1 --weight-column w",
        "--threshold-column c --weight-column w",
        "--threshold 1 --procedure bh",
    ] {
        assert_success(&select_files(&case.labeled, &case.pool, &case.out, flags));
    }
}

// ---------------------------------------------------------------------------------------
// Help and pipes
// ---------------------------------------------------------------------------------------

#[test]
fn help_exits_zero_and_shows_an_example() {
    for args in [&["select", "--help"][..], &["--help"][..]] {
        let output = weighbridge().args(args).output().unwrap();
        assert_success(&output);
        let stdout = text(&output.stdout);
        assert!(stdout.contains("Example"), "{args:?}:\n{stdout}");
        assert!(
            stdout.contains("weighbridge select --labeled"),
            "{args:?}:\n{stdout}"
        );
    }
}

#[test]
fn a_closed_stdout_pipe_is_not_an_error() {
    // The read end of stdout is closed right after the process starts, long before it has
    // read its inputs and printed the summary, so its write meets a closed pipe (EPIPE; Rust
    // programs ignore SIGPIPE). Unix pipes behave this way; so do Windows anonymous pipes.
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let mut child = weighbridge()
        .args([
            "select",
            "--labeled",
            path_str(&labeled),
            "--pool",
            path_str(&pool),
            "--threshold",
            "6.5",
            "--weight-column",
            "w",
            "--out",
            path_str(&out),
        ])
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let output = child.wait_with_output().unwrap();
    assert_success(&output);
    let stderr = text(&output.stderr);
    for complaint in ["stdout", "pipe", "error"] {
        assert!(
            !stderr.to_lowercase().contains(complaint),
            "no complaint about the closed pipe: {stderr}"
        );
    }
    assert!(out.join("candidates.csv").is_file() && out.join("summary.json").is_file());
}

// ---------------------------------------------------------------------------------------
// Fitted weights: `select --fit-weights --features LIST`
// ---------------------------------------------------------------------------------------
//
// References: tests/data/shift_cli_reference.json (scikit-learn 1.6.1 LogisticRegression
// C = 1 on the README fixtures' f1..f5, made by tests/scripts/make_shift_cli_fixture.py) for
// the fitted weights; the brute-force definitions above for everything computed from them;
// and the `shift` command's weights.csv (same fit, same seed) for the exact weights the
// selection used, including which labeled rows calibrate.

mod fitted_tolerance {
    /// Pool weights against scikit-learn: our Newton fit stops at gradient norm 1e-8, lbfgs
    /// at tol 1e-12; coefficients agree to about 3e-8 (see tests/cli_shift.rs).
    pub const SKLEARN_RELATIVE: f64 = 1e-6;
    /// p-values computed with scikit-learn's weights instead of ours: the weights' relative
    /// difference carries over.
    pub const PVALUE_FROM_SKLEARN: f64 = 1e-6;
}

/// The `shift` command's weights.csv for the fixtures with `flags` (default seed):
/// (labeled weights, labeled calibrates, pool weights).
fn shift_weights(flags: &str) -> (Vec<f64>, Vec<bool>, Vec<f64>) {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("shift");
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let mut args = vec![
        "shift",
        "--labeled",
        path_str(&labeled),
        "--pool",
        path_str(&pool),
        "--out",
        path_str(&out),
        "--quiet",
    ];
    args.extend(flags.split_whitespace());
    let output = weighbridge().args(&args).output().unwrap();
    assert_success(&output);
    let t = Table::read(&out.join("weights.csv"));
    let set = t.strings("set");
    let w = t.numbers("weight");
    let calibrates = t.booleans("calibrates");
    let of = |name: &str| -> Vec<usize> { (0..set.len()).filter(|&i| set[i] == name).collect() };
    let (lab, pool_rows) = (of("labeled"), of("pool"));
    (
        lab.iter().map(|&i| w[i]).collect(),
        lab.iter().map(|&i| calibrates[i]).collect(),
        pool_rows.iter().map(|&i| w[i]).collect(),
    )
}

fn sklearn_reference() -> Value {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/shift_cli_reference.json");
    serde_json::from_slice(&fs::read(path).unwrap()).unwrap()
}

fn json_floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

/// `select` on the fixtures with fitted weights plus `flags`; must succeed.
fn select_fitted(out: &Path, flags: &str) -> Output {
    let flags = format!("--threshold 6.5 --fit-weights --features f1..f5 {flags}");
    let output = select_files(&fixture("labeled.csv"), &fixture("pool.csv"), out, &flags);
    assert_success(&output);
    output
}

#[test]
fn fitted_weights_are_scikit_learns_and_the_selection_follows_the_definition() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("shortlist");
    let output = select_fitted(&out, "");
    let candidates = Candidates::read(&out);
    let summary = read_summary(&out);
    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let q = DEFAULT_FDR;
    let m = pool.len();

    // The pool weights are scikit-learn's fit (n/m) exp(eta), not column w.
    let reference = sklearn_reference();
    let sklearn_pool = json_floats(&reference["pool_weight"]);
    let sklearn_labeled = json_floats(&reference["labeled_weight"]);
    for (j, (a, b)) in candidates.weight.iter().zip(&sklearn_pool).enumerate() {
        assert!(
            (a - b).abs() <= fitted_tolerance::SKLEARN_RELATIVE * b,
            "weight[{j}]: {a} vs scikit-learn {b}"
        );
    }
    // p-values by brute force with scikit-learn's weights (design.md 2.2).
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    let p_sklearn = conservative_pvalues(&v, &sklearn_labeled, &vh, &sklearn_pool);
    for (j, (a, b)) in candidates.p_value.iter().zip(&p_sklearn).enumerate() {
        assert!(
            (a - b).abs() <= fitted_tolerance::PVALUE_FROM_SKLEARN,
            "p_value[{j}]: {a} vs {b}"
        );
    }

    // With the exact weights the selection used (the `shift` command's weights.csv, same
    // fit and seed) the brute-force definitions reproduce every column exactly.
    let (w, calibrates, wh) = shift_weights("--features f1..f5");
    assert!(
        calibrates.iter().all(|&c| c),
        "fit on all rows: every row calibrates"
    );
    assert_close("weight", &candidates.weight, &wh);
    let p = conservative_pvalues(&v, &w, &vh, &wh);
    assert_close("p_value", &candidates.p_value, &p);
    let counts = candidates.conditional_count.as_ref().unwrap();
    assert_eq!(counts, &conditional_counts(&v, &w, &vh, &wh, q));
    let first_step = candidates.first_step.as_ref().unwrap();
    for j in 0..m {
        assert_eq!(
            first_step[j],
            passes(p[j], 1.0, q * counts[j] as f64 / m as f64),
            "first_step of unit {j}"
        );
    }
    let xi = summary["pruning_draw"].as_f64().unwrap();
    assert_eq!(candidates.selected, prune(first_step, counts, |_| xi));

    // summary.json: the shift diagnostics as an object, the weights named as fitted, the
    // ESS of the fitted weights (Kish 1965) in both places.
    let shift = field(&summary, "shift");
    for key in [
        "auc",
        "auc_ci",
        "permutation_p",
        "ess",
        "ess_fraction",
        "khat",
        "unreachable_count",
        "converged",
        "iterations",
        "warnings",
        "settings",
        "fit_rows_note",
        "calibration_rows",
    ] {
        assert!(shift.get(key).is_some(), "summary.json shift lacks `{key}`");
    }
    assert!(summary["inputs"]["weights"]
        .as_str()
        .unwrap()
        .starts_with("fitted"));
    let total: f64 = w.iter().sum();
    let kish = total * total / w.iter().map(|x| x * x).sum::<f64>();
    for ess in [
        summary["labeled_ess"].as_f64().unwrap(),
        shift["ess"].as_f64().unwrap(),
    ] {
        assert!(
            (ess - kish).abs() <= tolerance::ABSOLUTE * kish,
            "{ess} vs {kish}"
        );
    }
    assert_eq!(summary["unreachable_count"], shift["unreachable_count"]);

    // The output states the fitting mode and why it is the default.
    let stdout = text(&output.stdout);
    for phrase in [
        "fitted on all rows (the default)",
        "no worse than a held-out fit",
        "weighbridge check",
        "domain-classifier AUC",
    ] {
        assert!(
            stdout.contains(phrase),
            "stdout lacks `{phrase}`:\n{stdout}"
        );
    }
}

#[test]
fn held_out_fitting_rows_do_not_calibrate() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("shortlist");
    let flags = "--fit-rows held-out --fit-fraction 0.3";
    let output = select_fitted(&out, flags);
    let summary = read_summary(&out);
    let candidates = Candidates::read(&out);
    // 90 of 300 labeled rows fit the classifier; the other 210 calibrate.
    assert_eq!(count_field(&summary, "n_labeled"), 210);
    assert_eq!(summary["shift"]["calibration_rows"].as_u64(), Some(210));
    assert_eq!(summary["shift"]["labeled_rows"].as_u64(), Some(300));
    assert!(text(&output.stdout).contains("210 of 300 labeled rows calibrate"));

    // The p-values use exactly the calibrating rows (the `shift` command's split with the
    // same seed), by brute force.
    let (w, calibrates, wh) = shift_weights(&format!("--features f1..f5 {flags}"));
    let labeled = Units::read(&fixture("labeled.csv"));
    let pool = Units::read(&fixture("pool.csv"));
    let v = labeled_scores(&labeled, Some(FIXTURE_THRESHOLD), Score::Clipped);
    let keep = |x: &[f64]| -> Vec<f64> {
        x.iter()
            .zip(&calibrates)
            .filter(|(_, &c)| c)
            .map(|(&a, _)| a)
            .collect()
    };
    let vh = pool_scores(&pool, Some(FIXTURE_THRESHOLD));
    assert_close("weight", &candidates.weight, &wh);
    let p = conservative_pvalues(&keep(&v), &keep(&w), &vh, &wh);
    assert_close("p_value", &candidates.p_value, &p);
}

#[test]
fn shift_warnings_come_first_in_the_summary() {
    // A pool far from the labeled set (fixture pool units with f1 > 1; the labeled f1 is
    // centred at -0.7): the shift warnings fire (see tests/cli_shift.rs) and lead the
    // summary's warnings, worst first; the selection's own effective-sample-size warning,
    // which would repeat the shift's, is dropped.
    let dir = TempDir::new().unwrap();
    let far = dir.path().join("far.csv");
    let t = Table::read(&fixture("pool.csv"));
    let f1 = t.index("f1").unwrap();
    let mut writer = csv::Writer::from_path(&far).unwrap();
    writer.write_record(&t.header).unwrap();
    for row in t.rows.iter().filter(|r| number(&r[f1]) > 1.0) {
        writer.write_record(row).unwrap();
    }
    writer.flush().unwrap();
    let out = dir.path().join("out");
    let output = select_files(
        &fixture("labeled.csv"),
        &far,
        &out,
        "--threshold 6.5 --fit-weights --features f1..f5 --allow-unreliable-weights",
    );
    assert_success(&output);
    let summary = read_summary(&out);
    // So far from the labeled set the weights are refused without the flag (exit 3).
    assert!(summary["unreliable_weights"].is_object());
    let shift_warnings: Vec<&str> = summary["shift"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["diagnostic"].as_str().unwrap())
        .collect();
    assert!(
        shift_warnings.contains(&"ess_fraction"),
        "{shift_warnings:?}"
    );
    let warnings: Vec<&str> = summary["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .collect();
    // Worst first by level (high, medium, low); among warnings of one level the shift's
    // come first, in their documented order. So the shift's high-concern warnings lead.
    let levels: Vec<&str> = summary["shift"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["level"].as_str().unwrap())
        .collect();
    let high_shift: Vec<&&str> = shift_warnings
        .iter()
        .zip(&levels)
        .filter(|(_, level)| **level == "high")
        .map(|(d, _)| d)
        .collect();
    assert!(!high_shift.is_empty(), "{levels:?}");
    for (i, diagnostic) in high_shift.iter().enumerate() {
        assert!(
            warnings[i].starts_with(&format!("{diagnostic} (")),
            "warning {i} should be the shift's `{diagnostic}`: {warnings:#?}"
        );
    }
    let details = summary["warning_details"].as_array().unwrap();
    let ranks: Vec<u64> = details
        .iter()
        .map(|w| w["level_rank"].as_u64().unwrap())
        .collect();
    assert!(ranks.windows(2).all(|p| p[0] >= p[1]), "{ranks:?}");
    // Within each level, every shift warning comes before any selection warning.
    for level in ["high", "medium", "low"] {
        let from_shift: Vec<bool> = details
            .iter()
            .filter(|w| w["level"] == level)
            .map(|w| shift_warnings.contains(&w["code"].as_str().unwrap()))
            .collect();
        assert!(
            from_shift.windows(2).all(|p| p[0] || !p[1]),
            "{level}: {details:#?}"
        );
    }
    // The selection's own effective-sample-size warning repeats the shift's and is dropped
    // (from the lines and from the objects alike).
    assert!(
        !warnings
            .iter()
            .any(|w| w.starts_with("effective sample size")),
        "{warnings:#?}"
    );
    let codes: Vec<&str> = summary["warning_details"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["code"].as_str().unwrap())
        .collect();
    assert_eq!(codes.len(), warnings.len());
    assert!(codes.contains(&"ess_fraction"), "{codes:?}");
    assert!(!codes.contains(&"labeled_ess_low"), "{codes:?}");
    let stdout = text(&output.stdout);
    assert!(stdout.contains("warnings (most serious first)"), "{stdout}");
    // The run's mark comes on the second line, then the severe shift warnings, before
    // any count.
    let mut lines = stdout.lines().skip(1);
    assert!(
        lines
            .next()
            .unwrap_or_default()
            .starts_with("UNRELIABLE WEIGHTS"),
        "{stdout}"
    );
    let third = lines.next().unwrap_or_default();
    assert!(
        third.contains("WARNING") && third.contains("ess_fraction"),
        "{stdout}"
    );
}

#[test]
fn bad_fit_weights_with_a_weight_column() {
    let case = BadCase::good();
    case.run("--threshold 1 --weight-column w --fit-weights --features x")
        .names("--fit-weights")
        .names("--weight-column");
}

#[test]
fn bad_fit_weights_without_features() {
    BadCase::good()
        .run("--threshold 1 --fit-weights")
        .names("--features");
}

#[test]
fn bad_fit_option_without_fit_weights() {
    BadCase::good()
        .run("--threshold 1 --expand squares")
        .names("--expand")
        .names("--fit-weights")
        .hint();
    BadCase::good()
        .run("--threshold 1 --features x")
        .names("--fit-weights");
}

#[test]
fn bad_fit_weights_on_a_missing_feature() {
    let case = BadCase::good();
    case.run("--threshold 1 --fit-weights --features nope")
        .file(&case.labeled)
        .names("`nope`")
        .names("--features");
}

#[test]
fn tiny_levels_print_briefly_and_blame_the_level() {
    // `--fdr 1e-300` is valid but no unit can reach it: the message prints the level in a
    // few digits (not 300 zeros) and names the level, not the weights, as the cause.
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    let output = select_files(
        &fixture("labeled.csv"),
        &fixture("pool.csv"),
        &out,
        "--threshold 6.5 --weight-column w --fdr 1e-300",
    );
    assert_eq!(output.status.code(), Some(2));
    let stderr = text(&output.stderr);
    assert!(stderr.contains("FDR level 1.00e-300"), "{stderr}");
    assert!(stderr.len() < 600, "{stderr}");
    assert!(stderr.contains("higher --fdr"), "{stderr}");
}
