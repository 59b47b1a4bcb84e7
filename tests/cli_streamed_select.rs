//! `select --memory-budget`: the streamed selection writes the same files as the in-memory
//! one. A tiny budget (1 KiB) forces the streamed path on small files, so every run here
//! is compared byte for byte with the same run held in memory: candidates.csv,
//! shortlist.csv, and summary.json apart from the keys only the in-memory run computes
//! (the level curve) or that describe the run itself (command_line, memory).
//!
//! The reference is the in-memory `select`, whose selection is checked against the naive
//! definition in tests/conditional_oracle.rs and whose p-values against the formulas in
//! tests/pvalue_validity.rs; the streamed selection's unit-by-unit equality with it is
//! tests/streaming_selection.rs. Inputs are the README's fixtures (invented demo data,
//! fixtures/README.md) and tables generated here.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use serde_json::Value;
use tempfile::TempDir;

fn weighbridge() -> Command {
    Command::new(env!("CARGO_BIN_EXE_weighbridge"))
}

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn run<S: AsRef<std::ffi::OsStr>>(args: &[S], out: &Path, stdin: Option<&[u8]>) -> Output {
    let mut command = weighbridge();
    command.arg("select").args(args).arg("--out").arg(out);
    let Some(data) = stdin else {
        return command.output().unwrap();
    };
    let mut child = command
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut pipe = child.stdin.take().unwrap();
    let data = data.to_vec();
    let writer = std::thread::spawn(move || {
        let _ = pipe.write_all(&data);
    });
    let output = child.wait_with_output().unwrap();
    writer.join().unwrap();
    output
}

fn summary(out: &Path) -> Value {
    serde_json::from_str(&fs::read_to_string(out.join("summary.json")).unwrap()).unwrap()
}

/// summary.json without the keys a streamed run leaves out or that describe the run.
/// (`resolution.stable_levels` is checked on its own in `streamed_stable_levels`.)
fn comparable(mut v: Value) -> Value {
    let map = v.as_object_mut().unwrap();
    for key in ["command_line", "level_curve", "level_curve_note", "memory"] {
        map.remove(key);
    }
    // Without the curve a streamed run knows only its own level to be stable or not.
    map["resolution"]
        .as_object_mut()
        .unwrap()
        .remove("stable_levels");
    v
}

/// Run `args` in memory and streamed (budget 1 KiB); both succeed with the same files.
/// Returns the streamed run's folder and output.
fn same_both_ways(
    dir: &Path,
    name: &str,
    args: &[String],
    stdin: Option<&[u8]>,
) -> (PathBuf, Output) {
    let in_memory = dir.join(format!("{name}-memory"));
    let streamed = dir.join(format!("{name}-streamed"));
    let a = run(args, &in_memory, stdin);
    assert!(a.status.success(), "{name} in memory: {a:?}");
    let mut streamed_args = args.to_vec();
    streamed_args.extend(["--memory-budget".to_string(), "1KiB".to_string()]);
    let b = run(&streamed_args, &streamed, stdin);
    assert!(b.status.success(), "{name} streamed: {b:?}");
    for file in ["candidates.csv", "shortlist.csv"] {
        let x = fs::read(in_memory.join(file)).unwrap();
        let y = fs::read(streamed.join(file)).unwrap();
        assert!(
            x == y,
            "{name}: {file} differs between in memory and streamed"
        );
    }
    assert_eq!(
        comparable(summary(&in_memory)),
        comparable(summary(&streamed)),
        "{name}: summary.json"
    );
    assert_eq!(summary(&in_memory)["memory"]["mode"], "in_memory");
    assert_eq!(summary(&streamed)["memory"]["mode"], "streamed");
    assert_eq!(summary(&streamed)["memory"]["memory_budget_bytes"], 1024);
    // Read once: the outputs are written from the temporary files of the first read.
    assert_eq!(summary(&streamed)["memory"]["pool_reads"], 1);
    streamed_stable_levels(&streamed);
    // The printed summary says that the pool was streamed and why.
    let text = String::from_utf8_lossy(&b.stdout);
    if !args.iter().any(|a| a == "--quiet") {
        assert!(text.contains("streamed selection ("), "{name}: {text}");
    }
    (streamed, b)
}

/// A streamed run's stable levels: its own level when the shortlist is fixed, else none.
fn streamed_stable_levels(out: &Path) {
    let s = summary(out);
    let expected: Vec<Value> = if s["draw"]["sizes"].as_array().unwrap().len() == 1 {
        vec![s["fdr"].clone()]
    } else {
        Vec::new()
    };
    assert_eq!(s["resolution"]["stable_levels"], Value::Array(expected));
}

fn selected_count(out: &Path) -> u64 {
    summary(out)["selected_count"].as_u64().unwrap()
}

fn strings(args: &[&str]) -> Vec<String> {
    args.iter().map(|a| a.to_string()).collect()
}

/// The fixtures' two files with the given extra flags.
fn fixture_args(extra: &[&str]) -> Vec<String> {
    let labeled = fixture("labeled.csv").display().to_string();
    let pool = fixture("pool.csv").display().to_string();
    let mut args = strings(&["--labeled", &labeled, "--pool", &pool, "--threshold", "6.5"]);
    args.extend(strings(extra));
    args
}

#[test]
fn fixtures_select_the_same_streamed_and_in_memory() {
    let dir = TempDir::new().unwrap();
    same_both_ways(dir.path(), "plain", &fixture_args(&[]), None);
    let (out, _) = same_both_ways(
        dir.path(),
        "weighted",
        &fixture_args(&["--weight-column", "w", "--fdr", "0.3"]),
        None,
    );
    assert!(selected_count(&out) > 100, "the weighted run selects");
    // Deterministic pruning selects nothing here (it does on the generated tables below).
    same_both_ways(
        dir.path(),
        "deterministic",
        &fixture_args(&[
            "--weight-column",
            "w",
            "--fdr",
            "0.3",
            "--pruning",
            "deterministic",
        ]),
        None,
    );
    same_both_ways(
        dir.path(),
        "seed",
        &fixture_args(&["--weight-column", "w", "--fdr", "0.25", "--seed", "5"]),
        None,
    );
    same_both_ways(
        dir.path(),
        "residual",
        &fixture_args(&[
            "--weight-column",
            "w",
            "--fdr",
            "0.3",
            "--score",
            "residual",
        ]),
        None,
    );
    same_both_ways(
        dir.path(),
        "lower",
        &fixture_args(&["--lower-is-better", "--fdr", "0.5", "--quiet"]),
        None,
    );
    let (out, _) = same_both_ways(
        dir.path(),
        "unweighted",
        &fixture_args(&["--fdr", "0.5"]),
        None,
    );
    assert!(selected_count(&out) > 0);
}

/// A pool with a per-unit threshold column and kept cells that need quoting.
fn write_tables(dir: &Path, m: usize) -> (PathBuf, PathBuf) {
    let labeled = dir.join("labeled.csv");
    let pool = dir.join("pool.csv");
    let mut l = String::from("id,y,pred,cut,w\n");
    for i in 0..400 {
        let x = (i as f64 * 0.618_034).fract();
        let y = 4.0 + 4.0 * x + 0.8 * ((i * 7919 % 101) as f64 / 101.0 - 0.5);
        let cut = if i % 3 == 0 { 6.0 } else { 6.5 };
        let w = 0.5 + (i % 5) as f64 * 0.25;
        l.push_str(&format!("L{i},{y:.4},{:.4},{cut},{w}\n", 4.0 + 4.0 * x));
    }
    fs::write(&labeled, l).unwrap();
    let mut p = String::from("id,pred,cut,w,note,series\n");
    for j in 0..m {
        let x = (j as f64 * 0.754_877_7).fract();
        let cut = if j % 4 == 0 { 6.0 } else { 6.5 };
        let w = 0.5 + (j % 7) as f64 * 0.2;
        let note = match j % 3 {
            0 => "\"a, b\"".to_string(),
            1 => "\"say \"\"hi\"\"\"".to_string(),
            _ => format!("plain{j}"),
        };
        p.push_str(&format!(
            "P{j},{:.4},{cut},{w},{note},S{}\n",
            4.0 + 4.2 * x,
            j % 9
        ));
    }
    fs::write(&pool, p).unwrap();
    (labeled, pool)
}

#[test]
fn thresholds_in_a_column_and_kept_cells_with_commas_and_quotes() {
    let dir = TempDir::new().unwrap();
    // More rows than one chunk of the streamed read (65536), so batches and pieces join.
    let (labeled, pool) = write_tables(dir.path(), 140_000);
    let (l, p) = (labeled.display().to_string(), pool.display().to_string());
    let args = strings(&[
        "--labeled",
        &l,
        "--pool",
        &p,
        "--threshold-column",
        "cut",
        "--weight-column",
        "w",
        "--fdr",
        "0.3",
        "--keep-columns",
        "note,series",
    ]);
    let (out, _) = same_both_ways(dir.path(), "column", &args, None);
    assert!(selected_count(&out) > 0, "the generated run selects");
    let shortlist = fs::read_to_string(out.join("shortlist.csv")).unwrap();
    assert!(shortlist.contains("\"a, b\"") && shortlist.contains("\"say \"\"hi\"\"\""));
    // Deterministic pruning selects nothing on the large table; on 5000 rows it does.
    let small = dir.path().join("small");
    fs::create_dir(&small).unwrap();
    let (labeled, pool) = write_tables(&small, 5000);
    let (l, p) = (labeled.display().to_string(), pool.display().to_string());
    let mut deterministic = args.clone();
    deterministic[1] = l;
    deterministic[3] = p;
    deterministic.extend(strings(&["--pruning", "deterministic"]));
    let (out, _) = same_both_ways(dir.path(), "column-deterministic", &deterministic, None);
    assert!(
        selected_count(&out) > 0,
        "deterministic pruning selects here"
    );
}

#[test]
fn compressed_standard_input_and_a_pipe_are_streamed_the_same() {
    let dir = TempDir::new().unwrap();
    let pool_bytes = fs::read(fixture("pool.csv")).unwrap();
    let gz = dir.path().join("pool.csv.gz");
    let mut encoder = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    encoder.write_all(&pool_bytes).unwrap();
    fs::write(&gz, encoder.finish().unwrap()).unwrap();
    let labeled = fixture("labeled.csv").display().to_string();
    let gz_text = gz.display().to_string();
    let weighted = ["--weight-column", "w", "--fdr", "0.3", "--threshold", "6.5"];

    let mut args = strings(&["--labeled", &labeled, "--pool", &gz_text]);
    args.extend(strings(&weighted));
    let (from_gz, _) = same_both_ways(dir.path(), "gz", &args, None);

    let mut args = strings(&["--labeled", &labeled, "--pool", "-"]);
    args.extend(strings(&weighted));
    let (from_stdin, _) = same_both_ways(dir.path(), "stdin", &args, Some(&pool_bytes));
    assert!(
        summary(&from_stdin)["memory"]["estimated_in_memory_bytes"].is_null(),
        "the size of standard input is not known in advance"
    );
    for file in ["candidates.csv", "shortlist.csv"] {
        assert_eq!(
            fs::read(from_gz.join(file)).unwrap(),
            fs::read(from_stdin.join(file)).unwrap()
        );
    }

    // A named pipe can be read once: not sampled for the estimate, copied when streamed.
    if !cfg!(unix) {
        return;
    }
    let fifo = dir.path().join("pool-pipe.csv");
    assert!(Command::new("mkfifo")
        .arg(&fifo)
        .status()
        .unwrap()
        .success());
    let fifo_text = fifo.display().to_string();
    let writer = {
        let fifo = fifo.clone();
        let bytes = pool_bytes.clone();
        std::thread::spawn(move || fs::write(fifo, bytes).unwrap())
    };
    let out = dir.path().join("from-pipe");
    let mut args = strings(&["--labeled", &labeled, "--pool", &fifo_text]);
    args.extend(strings(&weighted));
    args.extend(strings(&["--memory-budget", "1KiB", "--quiet"]));
    let mut child = weighbridge()
        .arg("select")
        .args(&args)
        .arg("--out")
        .arg(&out)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if std::time::Instant::now() > deadline {
            child.kill().unwrap();
            panic!("streamed select on a named pipe did not finish within 60 s");
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    };
    writer.join().unwrap();
    assert!(status.success());
    assert_eq!(summary(&out)["memory"]["mode"], "streamed");
    assert_eq!(
        fs::read(out.join("candidates.csv")).unwrap(),
        fs::read(from_gz.join("candidates.csv")).unwrap()
    );
}

#[test]
fn bad_input_gives_the_same_located_error_and_no_folder() {
    let dir = TempDir::new().unwrap();
    let mut pool = fs::read_to_string(fixture("pool.csv")).unwrap();
    let labeled = fixture("labeled.csv").display().to_string();
    // A bad prediction cell on line 1500, then (separately) an id repeated at line 1800.
    let mut lines: Vec<String> = pool.lines().map(str::to_string).collect();
    let bad_cell = {
        let mut l = lines.clone();
        let cells: Vec<&str> = l[1499].split(',').collect();
        let mut row: Vec<String> = cells.iter().map(|c| c.to_string()).collect();
        row[1] = "5.x".to_string();
        l[1499] = row.join(",");
        l.join("\n") + "\n"
    };
    let first_id = lines[1].split(',').next().unwrap().to_string();
    let mut row: Vec<String> = lines[1799].split(',').map(str::to_string).collect();
    row[0] = first_id;
    lines[1799] = row.join(",");
    let duplicate = lines.join("\n") + "\n";
    pool.clear();
    for (name, text, expected) in [
        ("bad-cell", bad_cell, "line 1500"),
        ("duplicate", duplicate, "line 1800"),
    ] {
        let path = dir.path().join(format!("{name}.csv"));
        fs::write(&path, text).unwrap();
        let p = path.display().to_string();
        let base = [
            "--labeled",
            labeled.as_str(),
            "--pool",
            p.as_str(),
            "--threshold",
            "6.5",
        ];
        let a = run(&base, &dir.path().join(format!("{name}-memory")), None);
        let mut streamed = base.to_vec();
        streamed.extend(["--memory-budget", "1KiB"]);
        let out = dir.path().join(format!("{name}-streamed"));
        let b = run(&streamed, &out, None);
        assert_eq!(a.status.code(), Some(2), "{name}: {a:?}");
        assert_eq!(b.status.code(), Some(2), "{name}: {b:?}");
        let (ea, eb) = (
            String::from_utf8_lossy(&a.stderr),
            String::from_utf8_lossy(&b.stderr),
        );
        assert_eq!(ea, eb, "{name}: the same message both ways");
        assert!(eb.contains(expected), "{name}: {eb}");
        assert!(!out.exists(), "{name}: nothing written");
    }
}

#[test]
fn runs_streaming_does_not_cover_stay_in_memory_with_a_note() {
    let dir = TempDir::new().unwrap();
    let args = fixture_args(&["--procedure", "bh", "--memory-budget", "1KiB"]);
    let out = dir.path().join("bh");
    let output = run(&args, &out, None);
    assert!(output.status.success(), "{output:?}");
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("does not cover --procedure bh") && stderr.contains("running in memory"),
        "{stderr}"
    );
    assert_eq!(summary(&out)["memory"]["mode"], "in_memory");
    // Below the budget nothing is said and the run is in memory.
    let out = dir.path().join("default");
    let output = run(&fixture_args(&[]), &out, None);
    assert!(output.status.success());
    assert!(!String::from_utf8_lossy(&output.stderr).contains("memory budget"));
    assert_eq!(summary(&out)["memory"]["mode"], "in_memory");
    assert_eq!(summary(&out)["memory"]["memory_budget_bytes"], 1u64 << 30);
    // A budget that is not a size is a usage error naming the option.
    let output = run(
        &fixture_args(&["--memory-budget", "lots"]),
        &dir.path().join("x"),
        None,
    );
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("--memory-budget lots"));
}
