//! End-to-end tests of the output contract (docs/outputs.md): shortlist.csv, the stable
//! columns of candidates.csv, the keys every JSON output carries (`schema_version`,
//! `command_line`, `columns`, `threshold_rule`, `warning_details`), changes.csv quoting,
//! rescreen reading a folder of the previous version, and that docs/outputs.md lists
//! every key written. Runs the real binary on the README fixtures (invented demo data,
//! fixtures/README.md) in temporary folders and parses its CSV and JSON structurally.

use std::collections::{BTreeSet, HashMap};
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;
use tempfile::TempDir;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn s(path: &Path) -> &str {
    path.to_str().unwrap()
}

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
        .args(args)
        .output()
        .expect("run weighbridge")
}

fn ok(args: &[&str]) -> Output {
    let output = run(args);
    assert!(
        output.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    output
}

/// `select` on the fixtures with `--threshold 6.5` and `extra`.
fn select_args<'a>(out: &'a Path, extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = vec![
        "select",
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--threshold",
        "6.5",
        "--out",
        s(out),
    ];
    args.extend_from_slice(extra);
    args
}

static FIXTURE_LABELED: std::sync::LazyLock<PathBuf> =
    std::sync::LazyLock::new(|| fixture("labeled.csv"));
static FIXTURE_POOL: std::sync::LazyLock<PathBuf> =
    std::sync::LazyLock::new(|| fixture("pool.csv"));

/// A CSV file as its header and rows of named cells (csv crate).
struct Table {
    header: Vec<String>,
    rows: Vec<HashMap<String, String>>,
}

impl Table {
    fn read(path: &Path) -> Table {
        let mut reader = csv::Reader::from_path(path)
            .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
        let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
        let rows = reader
            .records()
            .map(|r| {
                let r = r.unwrap();
                assert_eq!(r.len(), header.len(), "{}: ragged row", path.display());
                header
                    .iter()
                    .cloned()
                    .zip(r.iter().map(String::from))
                    .collect()
            })
            .collect();
        Table { header, rows }
    }

    fn column(&self, name: &str) -> Vec<&str> {
        self.rows.iter().map(|r| r[name].as_str()).collect()
    }

    fn numbers(&self, name: &str) -> Vec<f64> {
        self.column(name)
            .iter()
            .map(|c| c.parse().unwrap_or_else(|_| panic!("{name}: `{c}`")))
            .collect()
    }
}

fn json(path: &Path) -> Value {
    serde_json::from_slice(&fs::read(path).unwrap()).unwrap()
}

/// BH-adjusted p-values `min over k' >= k of p_(k') m / k'`, capped at 1 (Benjamini &
/// Hochberg 1995; the adjusted form as in Wright 1992, from memory), computed naively.
fn bh_adjusted(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut adjusted = vec![0.0; m];
    for (k, &j) in order.iter().enumerate() {
        adjusted[j] = order[k..]
            .iter()
            .enumerate()
            .map(|(offset, &i)| p[i] * m as f64 / (k + offset + 1) as f64)
            .fold(f64::INFINITY, f64::min)
            .min(1.0);
    }
    adjusted
}

const SHORTLIST_COLUMNS: [&str; 7] = [
    "rank",
    "id",
    "prediction",
    "p_value",
    "q_value",
    "selection_probability",
    "weight",
];

/// The twelve columns of earlier versions, in their order, then the ones added since.
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

/// Check shortlist.csv against candidates.csv and the pool file (read independently):
/// exactly the selected units, best predicted first (ties in pool order), the same values
/// as candidates.csv, and q-values equal to the naive BH adjustment. Returns its size.
fn check_shortlist(out: &Path) -> usize {
    let pool = Table::read(&fixture("pool.csv"));
    let candidates = Table::read(&out.join("candidates.csv"));
    let shortlist = Table::read(&out.join("shortlist.csv"));
    assert_eq!(shortlist.header, SHORTLIST_COLUMNS);
    assert_eq!(candidates.header, CANDIDATES_COLUMNS);
    assert_eq!(candidates.column("id"), pool.column("id"), "pool order");
    assert_eq!(
        candidates.numbers("prediction"),
        pool.numbers("pred"),
        "predictions as read"
    );
    let prediction = pool.numbers("pred");
    let mut expected: Vec<usize> = (0..pool.rows.len())
        .filter(|&j| candidates.rows[j]["selected"] == "true")
        .collect();
    // Higher prediction first; a stable sort keeps pool order among ties.
    expected.sort_by(|&a, &b| prediction[b].total_cmp(&prediction[a]));
    let ids: Vec<&str> = shortlist.column("id");
    let expected_ids: Vec<&str> = expected
        .iter()
        .map(|&j| pool.rows[j]["id"].as_str())
        .collect();
    assert_eq!(ids, expected_ids);
    let q = bh_adjusted(&candidates.numbers("p_value"));
    for (r, (row, &j)) in shortlist.rows.iter().zip(&expected).enumerate() {
        assert_eq!(row["rank"], (r + 1).to_string());
        let c = &candidates.rows[j];
        assert_eq!(c["shortlist_rank"], row["rank"]);
        for column in [
            "prediction",
            "p_value",
            "q_value",
            "selection_probability",
            "weight",
        ] {
            assert_eq!(
                row[column].parse::<f64>().unwrap(),
                c[column].parse::<f64>().unwrap(),
                "{column} of {}",
                row["id"]
            );
        }
        let ours: f64 = row["q_value"].parse().unwrap();
        assert!(
            (ours - q[j]).abs() <= 1e-12 * q[j].max(1e-300),
            "q_value of {}: {ours} vs naive {}",
            row["id"],
            q[j]
        );
    }
    let unranked = candidates
        .rows
        .iter()
        .filter(|c| c["selected"] == "false")
        .all(|c| c["shortlist_rank"].is_empty());
    assert!(unranked, "shortlist_rank is empty for units not selected");
    ids.len()
}

#[test]
fn shortlist_is_the_selection_best_predicted_first() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("conditional");
    let output = ok(&select_args(&out, &["--weight-column", "w"]));
    let size = check_shortlist(&out);
    // The README example selects 83 units (fixtures/README.md).
    assert_eq!(size, 83);
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(stdout.contains("shortlist.csv"), "{stdout}");
    assert!(
        stdout.contains("interesting units: outcome above 6.5"),
        "{stdout}"
    );

    // BY at a generous level selects without a draw: every selection probability is 1.
    let out = dir.path().join("by");
    ok(&select_args(
        &out,
        &[
            "--procedure",
            "by",
            "--pvalues",
            "conservative",
            "--fdr",
            "0.9",
        ],
    ));
    let size = check_shortlist(&out);
    assert!(size > 0, "BY at 0.9 selects on the fixtures");
    let shortlist = Table::read(&out.join("shortlist.csv"));
    assert!(shortlist
        .numbers("selection_probability")
        .iter()
        .all(|&p| p == 1.0));
    let candidates = Table::read(&out.join("candidates.csv"));
    assert!(candidates.column("first_step").iter().all(|c| c.is_empty()));
    assert!(candidates
        .column("q_value_by")
        .iter()
        .all(|c| !c.is_empty()));
}

#[test]
fn an_empty_shortlist_is_written_as_its_header() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    // BH on the weighted conservative p-values selects nothing at 0.1 on the fixtures (the
    // README run's bh_selected_count).
    ok(&select_args(
        &out,
        &[
            "--weight-column",
            "w",
            "--procedure",
            "bh",
            "--pvalues",
            "conservative",
        ],
    ));
    assert_eq!(json(&out.join("summary.json"))["selected_count"], 0);
    let text = fs::read_to_string(out.join("shortlist.csv")).unwrap();
    assert_eq!(text, format!("{}\n", SHORTLIST_COLUMNS.join(",")));
}

/// `warnings` and `warning_details` hold the same warnings in the same order, worst first,
/// each object with the documented fields and a consistent level.
fn check_warnings(file: &str, v: &Value, lines_are_strings: bool) {
    let details = v["warning_details"]
        .as_array()
        .unwrap_or_else(|| panic!("{file}: warning_details"));
    let mut previous_rank = u64::MAX;
    for w in details {
        let keys: BTreeSet<&str> = w.as_object().unwrap().keys().map(String::as_str).collect();
        assert_eq!(
            keys,
            BTreeSet::from([
                "code",
                "severity",
                "level",
                "level_rank",
                "diagnostic",
                "value",
                "threshold",
                "message"
            ]),
            "{file}: {w}"
        );
        let (severity, rank) = match w["level"].as_str().unwrap() {
            "low" => ("note", 1),
            "medium" => ("caution", 2),
            "high" => ("severe", 3),
            other => panic!("{file}: level `{other}`"),
        };
        assert_eq!(w["severity"], severity, "{file}: {w}");
        assert_eq!(w["level_rank"], rank, "{file}: {w}");
        assert!(
            rank <= previous_rank,
            "{file}: not worst first: {details:#?}"
        );
        previous_rank = rank;
        assert!(!w["message"].as_str().unwrap().is_empty());
        assert!(w["value"].is_null() || w["value"].is_number());
        assert!(w["threshold"].is_null() || w["threshold"].is_number());
    }
    if lines_are_strings {
        let lines = v["warnings"].as_array().unwrap();
        assert_eq!(lines.len(), details.len(), "{file}: warnings / details");
        for (line, w) in lines.iter().zip(details) {
            let line = line.as_str().expect("warnings are strings");
            assert!(
                line.contains(w["message"].as_str().unwrap()),
                "{file}: `{line}` vs {w}"
            );
            assert!(line.contains(&format!("concern: {}", w["level"].as_str().unwrap())));
        }
    }
}

/// `schema_version` 1 and the command line as run (program name first).
fn check_envelope(file: &str, v: &Value, args: &[&str]) {
    assert_eq!(v["schema_version"], 1, "{file}");
    let line: Vec<&str> = v["command_line"]
        .as_array()
        .unwrap_or_else(|| panic!("{file}: command_line"))
        .iter()
        .map(|a| a.as_str().unwrap())
        .collect();
    assert!(line[0].ends_with("weighbridge"), "{file}: {line:?}");
    assert_eq!(&line[1..], args, "{file}");
}

#[test]
fn every_json_output_carries_the_contract() {
    let dir = TempDir::new().unwrap();
    let root = dir.path();

    // summary.json of a fitted run (it has shift warnings and the draw warning).
    let fit = root.join("fit");
    let args = select_args(&fit, &["--fit-weights", "--features", "f1..f5"]);
    ok(&args);
    let summary = json(&fit.join("summary.json"));
    check_envelope("summary.json", &summary, &args);
    for key in [
        "selected_count",
        "first_step_count",
        "bh_selected_count",
        "unreachable_count",
        "n_labeled",
        "n_pool",
        "seed",
    ] {
        assert!(summary[key].is_u64(), "summary.json `{key}` is an integer");
    }
    for key in ["labeled_ess", "labeled_ess_fraction", "fdr"] {
        assert!(summary[key].is_f64(), "summary.json `{key}` is a number");
    }
    assert_eq!(summary["procedure"], "conditional");
    assert_eq!(summary["pruning"], "homogeneous");
    assert_eq!(
        summary["inputs"]["threshold"], "value 6.5",
        "earlier string kept"
    );
    assert_eq!(
        summary["threshold_rule"],
        serde_json::json!({"value": 6.5, "direction": "above"})
    );
    assert_eq!(
        summary["columns"],
        serde_json::json!({
            "id": "id", "outcome": "y", "prediction": "pred", "threshold_column": null,
            "weight_column": null, "features": ["f1", "f2", "f3", "f4", "f5"],
            "keep_columns": []
        })
    );
    assert_eq!(summary["draw_level"], "high", "the README draw: empty 0.55");
    check_warnings("summary.json", &summary, true);
    let codes: Vec<&str> = summary["warning_details"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["code"].as_str().unwrap())
        .collect();
    assert!(codes.contains(&"shortlist_from_draw"), "{codes:?}");

    // shift.json.
    let shift = root.join("shift");
    let args = [
        "shift",
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--features",
        "f1..f5",
        "--out",
        s(&shift),
        "--quiet",
    ];
    ok(&args);
    let report = json(&shift.join("shift.json"));
    check_envelope("shift.json", &report, &args);
    for key in ["auc", "permutation_p", "ess", "ess_fraction", "khat"] {
        assert!(report[key].is_number(), "shift.json `{key}`");
    }
    assert!(report["auc_ci"].as_array().unwrap().len() == 2);
    assert!(report["converged"].is_boolean() && report["iterations"].is_u64());
    assert!(report["unreachable_count"].is_u64());
    assert_eq!(report["columns"]["features"].as_array().unwrap().len(), 5);
    assert!(report["columns"]["prediction"].is_null());
    check_warnings("shift.json", &report, false);
    assert_eq!(
        report["warning_details"].as_array().unwrap().len(),
        report["warnings"].as_array().unwrap().len()
    );

    // audit.json: an earlier list of the first 20 pool ids.
    let list = root.join("list.csv");
    let pool = Table::read(&fixture("pool.csv"));
    let mut text = String::from("id\n");
    for id in pool.column("id").iter().take(20) {
        text.push_str(id);
        text.push('\n');
    }
    fs::write(&list, text).unwrap();
    let audit = root.join("audit");
    let args = [
        "audit",
        "--shortlist",
        s(&list),
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--out",
        s(&audit),
        "--quiet",
    ];
    ok(&args);
    let a = json(&audit.join("audit.json"));
    check_envelope("audit.json", &a, &args);
    assert_eq!(a["listed_count"], 20);
    for key in ["survivors_count", "poorly_covered_count"] {
        assert!(a[key].is_u64(), "audit.json `{key}`");
    }
    for key in ["fdr_level_unweighted", "fdr_level_weighted"] {
        assert!(a[key].is_number(), "audit.json `{key}`");
    }
    assert_eq!(a["columns"]["weight_column"], "w");
    assert_eq!(a["threshold_rule"]["value"], 6.5);
    check_warnings("audit.json", &a, true);

    // check.json.
    let check = root.join("check");
    let args = [
        "check",
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--threshold",
        "6.5",
        "--features",
        "f1..f5",
        "--replicates",
        "4",
        "--out",
        s(&check),
        "--quiet",
    ];
    ok(&args);
    let c = json(&check.join("check.json"));
    check_envelope("check.json", &c, &args);
    for procedure in ["conditional", "bh", "unweighted"] {
        for field in ["fdr", "fdr_se", "power", "power_se"] {
            assert!(
                c["results"][procedure][field].is_number(),
                "check.json results.{procedure}.{field}"
            );
        }
    }
    check_warnings("check.json", &c, false);

    // design.json.
    let batch = root.join("batch");
    let args = [
        "batch",
        "--pool",
        s(&FIXTURE_POOL),
        "--size",
        "40",
        "--out",
        s(&batch),
        "--quiet",
    ];
    ok(&args);
    let d = json(&batch.join("design.json"));
    check_envelope("design.json", &d, &args);
    assert_eq!(d["columns"]["id"], "id");
    assert_eq!(d["columns"]["prediction"], "pred");

    // changes.json: rescreen of the fitted run with given weights.
    let again = root.join("again");
    let args = [
        "rescreen",
        "--previous",
        s(&fit),
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--out",
        s(&again),
        "--quiet",
    ];
    ok(&args);
    let changes = json(&again.join("changes.json"));
    check_envelope("changes.json", &changes, &args);
    assert_eq!(changes["new_units_selected"], changes["new_selected"]);
    assert!(changes["newly_selected"].is_u64());
    check_warnings("changes.json", &changes, true);
    let rescreened = json(&again.join("summary.json"));
    check_envelope("summary.json of rescreen", &rescreened, &args);
    check_shortlist(&again);
}

/// Key paths of a JSON object: top-level keys and one level down (`a.b`, `a[].b` for
/// arrays of objects), skipping the children of `skip`.
fn key_paths(v: &Value, skip: &[&str]) -> BTreeSet<String> {
    let mut paths = BTreeSet::new();
    for (key, value) in v.as_object().unwrap() {
        paths.insert(key.clone());
        if skip.contains(&key.as_str()) {
            continue;
        }
        let child = match value {
            Value::Object(_) => Some((value, format!("{key}."))),
            Value::Array(items) => items
                .first()
                .filter(|i| i.is_object())
                .map(|i| (i, format!("{key}[]."))),
            _ => None,
        };
        if let Some((object, prefix)) = child {
            for inner in object.as_object().unwrap().keys() {
                paths.insert(format!("{prefix}{inner}"));
            }
        }
    }
    paths
}

/// The names a section of docs/outputs.md documents: every `backticked` token in the first
/// cell of its table rows, and every prefix of one (`a.b` documents `a`).
fn documented(doc: &str, heading: &str) -> BTreeSet<String> {
    let start = doc
        .find(&format!("\n## {heading}"))
        .unwrap_or_else(|| panic!("docs/outputs.md has no section `## {heading}`"));
    let section = &doc[start + 1..];
    let section = &section[..section[3..].find("\n## ").map_or(section.len(), |e| e + 3)];
    let mut names = BTreeSet::new();
    for line in section.lines().filter(|l| l.starts_with("| `")) {
        let cell = line.split('|').nth(1).unwrap_or_default();
        for token in cell.split('`').skip(1).step_by(2) {
            names.insert(token.to_string());
            for (i, c) in token.char_indices() {
                if c == '.' || c == '[' || c == '{' {
                    names.insert(token[..i].to_string());
                }
            }
        }
    }
    names
}

#[test]
fn docs_list_every_key_written() {
    let doc =
        fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/outputs.md")).unwrap();
    let dir = TempDir::new().unwrap();
    let fit = dir.path().join("fit");
    ok(&select_args(
        &fit,
        &["--fit-weights", "--features", "f1..f5", "--quiet"],
    ));
    let shift = dir.path().join("shift");
    ok(&[
        "shift",
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--features",
        "f1..f5",
        "--out",
        s(&shift),
        "--quiet",
    ]);
    // summary.json's `shift` holds shift.json's diagnostics, documented there.
    for (file, value, skip) in [
        (
            "summary.json",
            json(&fit.join("summary.json")),
            &["shift"][..],
        ),
        ("shift.json", json(&shift.join("shift.json")), &[][..]),
    ] {
        let names = documented(&doc, file);
        let missing: Vec<String> = key_paths(&value, skip)
            .into_iter()
            .filter(|p| !names.contains(p))
            .collect();
        assert!(
            missing.is_empty(),
            "docs/outputs.md `## {file}` does not list: {missing:?}"
        );
    }
    // The shift section of summary.json has exactly shift.json's diagnostics.
    let summary = json(&fit.join("summary.json"));
    let shift_names = documented(&doc, "shift.json");
    for key in summary["shift"].as_object().unwrap().keys() {
        assert!(shift_names.contains(key), "summary.json shift.{key}");
    }
    // And every CSV column written is in its file's table.
    for (file, path) in [
        ("shortlist.csv", fit.join("shortlist.csv")),
        ("candidates.csv", fit.join("candidates.csv")),
        ("weights.csv", shift.join("weights.csv")),
        ("balance.csv", shift.join("balance.csv")),
    ] {
        let names = documented(&doc, file);
        for column in Table::read(&path).header {
            assert!(
                names.contains(&column),
                "docs/outputs.md {file}: `{column}`"
            );
        }
    }
}

/// The fixture pool without its last 500 rows.
fn smaller_pool(dir: &Path) -> PathBuf {
    let text = fs::read_to_string(fixture("pool.csv")).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let path = dir.join("pool_small.csv");
    fs::write(&path, lines[..lines.len() - 500].join("\n") + "\n").unwrap();
    path
}

#[test]
fn rescreen_reads_a_folder_of_the_previous_version_and_quotes_changes() {
    let dir = TempDir::new().unwrap();
    let small = smaller_pool(dir.path());
    let current = dir.path().join("current");
    ok(&[
        "select",
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&small),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--out",
        s(&current),
        "--quiet",
    ]);
    // The previous version's folder: candidates.csv with its twelve columns, summary.json
    // without the keys added since, no manifest and no shortlist.csv.
    let old = dir.path().join("old");
    fs::create_dir(&old).unwrap();
    let mut reader = csv::Reader::from_path(current.join("candidates.csv")).unwrap();
    let mut writer = csv::Writer::from_path(old.join("candidates.csv")).unwrap();
    let header = reader.headers().unwrap().clone();
    writer
        .write_record(header.iter().take(12))
        .expect("write header");
    for record in reader.records() {
        writer
            .write_record(record.unwrap().iter().take(12))
            .unwrap();
    }
    writer.flush().unwrap();
    let mut summary = json(&current.join("summary.json"));
    let object = summary.as_object_mut().unwrap();
    for added in [
        "schema_version",
        "command_line",
        "threshold_rule",
        "columns",
        "warning_details",
        "draw_level",
    ] {
        assert!(object.remove(added).is_some(), "{added} is written now");
    }
    fs::write(
        old.join("summary.json"),
        serde_json::to_vec_pretty(&summary).unwrap(),
    )
    .unwrap();

    // Rescreen on the whole fixture pool with two settings changed.
    let next = dir.path().join("next");
    let output = ok(&[
        "rescreen",
        "--previous",
        s(&old),
        "--labeled",
        s(&FIXTURE_LABELED),
        "--pool",
        s(&FIXTURE_POOL),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--fdr",
        "0.2",
        "--pruning",
        "heterogeneous",
        "--out",
        s(&next),
    ]);
    let changes = json(&next.join("changes.json"));
    assert_eq!(changes["previous_pool"], 1500);
    assert_eq!(changes["current_pool"], 2000);
    assert_eq!(changes["new_units"], 500);
    let settings: Vec<&str> = changes["setting_changes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["setting"].as_str().unwrap())
        .collect();
    // The previous summary has no threshold_rule: the direction is not compared.
    assert_eq!(settings, ["fdr", "pruning"]);

    // changes.csv: cells with commas come back whole through a CSV reader, and the words
    // and codes agree.
    let table = Table::read(&next.join("changes.csv"));
    assert_eq!(table.rows.len(), 2000);
    let words = HashMap::from([
        ("new_selected", "new to the pool, selected"),
        ("new_not_selected", "new to the pool, not selected"),
        ("newly_selected", "newly selected"),
        ("dropped", "dropped"),
        ("kept", "kept"),
        ("not_selected", "not selected"),
        ("left_pool", "no longer in the pool"),
    ]);
    for row in &table.rows {
        assert_eq!(words[row["change_code"].as_str()], row["change"]);
    }
    let commas = table
        .rows
        .iter()
        .filter(|r| r["change"].contains(',') || r["why"].contains(','))
        .count();
    assert!(
        commas >= 500,
        "new units' change words hold a comma: {commas}"
    );
    let new_units = table
        .column("change_code")
        .iter()
        .filter(|c| c.starts_with("new_"))
        .count();
    assert_eq!(new_units, 500);
    assert_eq!(
        changes["new_units_selected"].as_u64().unwrap() as usize,
        table
            .column("change_code")
            .iter()
            .filter(|c| **c == "new_selected")
            .count()
    );

    // The console prints counts as integers (`83 -> 98`, not `83.0000 -> 98.0000`).
    let stdout = String::from_utf8_lossy(&output.stdout);
    let counts: Vec<&str> = stdout
        .lines()
        .filter(|l| l.trim_start().starts_with("selected_count"))
        .collect();
    assert_eq!(counts.len(), 1, "{stdout}");
    assert!(!counts[0].contains('.'), "{}", counts[0]);
    let previous = summary["selected_count"].as_u64().unwrap();
    let now = json(&next.join("summary.json"))["selected_count"]
        .as_u64()
        .unwrap();
    let numbers: Vec<u64> = counts[0]
        .split_whitespace()
        .filter_map(|t| t.parse().ok())
        .collect();
    assert_eq!(numbers, [previous, now], "{}", counts[0]);
    check_shortlist_of_current_pool(&next);
}

/// shortlist.csv of a run on the whole fixture pool.
fn check_shortlist_of_current_pool(out: &Path) {
    let n = check_shortlist(out);
    assert_eq!(
        n as u64,
        json(&out.join("summary.json"))["selected_count"]
            .as_u64()
            .unwrap()
    );
}
