//! End-to-end tests of the output folder (issue 11): it holds exactly one run's outputs
//! (a manifest, stale files of the previous run removed, the run's own inputs kept), a
//! folder the tool did not make is refused unless `--force`, two runs into one folder never
//! mix (flock for the whole run; a blocked run names the holder), and no temporary file
//! survives SIGINT/SIGTERM, while kill -9 leftovers are removed by the next run.
//!
//! Runs on the README fixtures (invented demo data, fixtures/README.md). The interruption
//! tests use `WEIGHBRIDGE_TEST_HOLD_BEFORE_RENAME_MS`, which makes the binary wait after
//! writing its temporary files and before renaming them, so the signal lands during the
//! final write every time instead of racing a window of milliseconds.

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;
use tempfile::TempDir;

const MANIFEST: &str = ".weighbridge-manifest.json";

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(name)
}

fn s(path: &Path) -> &str {
    path.to_str().unwrap()
}

fn command<A: AsRef<std::ffi::OsStr>>(args: &[A]) -> Command {
    let mut command = Command::new(env!("CARGO_BIN_EXE_weighbridge"));
    command.args(args);
    command
}

fn run<A: AsRef<std::ffi::OsStr>>(args: &[A]) -> Output {
    command(args).output().expect("run weighbridge")
}

fn ok(output: &Output) {
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
}

fn stderr(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

/// `select` on the fixtures with the given-weight column, into `out`, plus `extra` flags.
fn select_args(out: &Path, extra: &[&str]) -> Vec<String> {
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let mut args = vec![
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--quiet",
        "--out",
        s(out),
    ];
    args.extend_from_slice(extra);
    args.into_iter().map(String::from).collect()
}

fn names(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

fn temporaries(dir: &Path) -> Vec<String> {
    names(dir)
        .into_iter()
        .filter(|n| n.ends_with(".tmp"))
        .collect()
}

fn manifest(dir: &Path) -> Value {
    serde_json::from_slice(&fs::read(dir.join(MANIFEST)).unwrap()).unwrap()
}

fn manifest_files(dir: &Path, key: &str) -> Vec<String> {
    manifest(dir)[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect()
}

#[test]
fn a_second_select_removes_the_first_ones_report() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    ok(&run(&select_args(&out, &["--report", "--fdr", "0.3"])));
    assert!(out.join("report.html").exists());
    assert_eq!(
        manifest_files(&out, "files"),
        [
            "candidates.csv",
            "shortlist.csv",
            "summary.json",
            "report.html"
        ]
    );
    assert_eq!(manifest(&out)["command"], "select");
    assert_eq!(manifest(&out)["version"], env!("CARGO_PKG_VERSION"));
    ok(&run(&select_args(&out, &["--fdr", "0.1"])));
    assert_eq!(
        names(&out),
        [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
    );
    assert_eq!(
        manifest_files(&out, "files"),
        ["candidates.csv", "shortlist.csv", "summary.json"]
    );
}

#[test]
fn select_after_rescreen_removes_changes_and_rescreen_refuses_its_previous_folder() {
    let dir = TempDir::new().unwrap();
    let round1 = dir.path().join("round1");
    let round2 = dir.path().join("round2");
    ok(&run(&select_args(&round1, &[])));
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let rescreen = |out: &Path, previous: &Path| {
        run(&[
            "rescreen",
            "--previous",
            s(previous),
            "--labeled",
            s(&labeled),
            "--pool",
            s(&pool),
            "--threshold",
            "6.5",
            "--weight-column",
            "w",
            "--quiet",
            "--out",
            s(out),
        ])
    };
    // --out equal to --previous, also spelled differently: exit 2, round 1 untouched.
    let before = fs::read(round1.join("candidates.csv")).unwrap();
    let spelled = format!("{}/./", s(&round1));
    for same in [round1.clone(), PathBuf::from(&spelled)] {
        let refused = rescreen(&same, &round1);
        assert_eq!(refused.status.code(), Some(2), "{}", stderr(&refused));
        assert!(
            stderr(&refused).contains("--previous"),
            "{}",
            stderr(&refused)
        );
        assert_eq!(
            names(&round1),
            [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
        );
        assert_eq!(fs::read(round1.join("candidates.csv")).unwrap(), before);
    }

    ok(&rescreen(&round2, &round1));
    assert!(round2.join("changes.csv").exists());
    assert!(round2.join("changes.json").exists());
    ok(&run(&select_args(&round2, &[])));
    assert_eq!(
        names(&round2),
        [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
    );
}

#[test]
fn rescreen_and_audit_default_folders_differ_from_selects() {
    let dir = TempDir::new().unwrap();
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let inputs = [
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--quiet",
    ];
    let in_dir = |args: &[&str]| {
        let output = command(args).current_dir(dir.path()).output().unwrap();
        ok(&output);
    };
    let mut select = vec!["select"];
    select.extend(inputs);
    in_dir(&select);
    let round1 = fs::read(dir.path().join("weighbridge-out/candidates.csv")).unwrap();
    let mut rescreen = vec!["rescreen", "--previous", "weighbridge-out"];
    rescreen.extend(inputs);
    in_dir(&rescreen);
    assert!(dir.path().join("weighbridge-rescreen/changes.csv").exists());
    let mut audit = vec!["audit", "--shortlist", "weighbridge-out/candidates.csv"];
    audit.extend(inputs);
    in_dir(&audit);
    assert!(dir.path().join("weighbridge-audit/audit.json").exists());
    // select's folder is as select left it.
    assert_eq!(
        names(&dir.path().join("weighbridge-out")),
        [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
    );
    assert_eq!(
        fs::read(dir.path().join("weighbridge-out/candidates.csv")).unwrap(),
        round1
    );
}

#[test]
fn the_demos_inputs_are_kept_when_a_run_reads_them() {
    let dir = TempDir::new().unwrap();
    let demo = dir.path().join("demo");
    ok(&run(&[
        "demo",
        "--out",
        s(&demo),
        "--labeled",
        "400",
        "--pool",
        "400",
        "--screens",
        "2",
    ]));
    let labeled = demo.join("labeled.csv");
    let pool = demo.join("pool.csv");
    let labeled_bytes = fs::read(&labeled).unwrap();
    ok(&run(&[
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--quiet",
        "--report",
        "--out",
        s(&demo),
    ]));
    assert_eq!(
        names(&demo),
        [
            MANIFEST,
            "candidates.csv",
            "labeled.csv",
            "pool.csv",
            "report.html",
            "shortlist.csv",
            "summary.json"
        ]
    );
    assert_eq!(fs::read(&labeled).unwrap(), labeled_bytes);
    assert_eq!(manifest_files(&demo, "kept"), ["labeled.csv", "pool.csv"]);
    // Again (the inputs are now "kept" files of the previous run): still kept.
    ok(&run(&[
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&pool),
        "--threshold",
        "6.5",
        "--weight-column",
        "w",
        "--quiet",
        "--out",
        s(&demo),
    ]));
    assert_eq!(
        names(&demo),
        [
            MANIFEST,
            "candidates.csv",
            "labeled.csv",
            "pool.csv",
            "shortlist.csv",
            "summary.json"
        ]
    );
}

#[test]
fn a_folder_the_tool_did_not_make_is_refused_unless_forced() {
    let dir = TempDir::new().unwrap();
    // A fresh empty folder (e.g. a TempDir) is writable.
    ok(&run(&select_args(dir.path(), &[])));

    // A user's own labeled.csv: demo refuses to overwrite it.
    let user = TempDir::new().unwrap();
    fs::write(user.path().join("labeled.csv"), "my data\n").unwrap();
    let demo = |force: bool| {
        let mut args = vec![
            "demo",
            "--out",
            s(user.path()),
            "--labeled",
            "300",
            "--pool",
            "300",
            "--screens",
            "2",
        ];
        if force {
            args.push("--force");
        }
        run(&args)
    };
    let refused = demo(false);
    assert_eq!(refused.status.code(), Some(2));
    let message = stderr(&refused);
    assert!(message.contains(s(user.path())), "{message}");
    assert!(message.contains("--force"), "{message}");
    assert!(refused.stdout.is_empty());
    assert_eq!(names(user.path()), ["labeled.csv"]);
    assert_eq!(
        fs::read(user.path().join("labeled.csv")).unwrap(),
        b"my data\n"
    );
    ok(&demo(true));
    assert!(user.path().join("pool_truth.csv").exists());

    // Notes beside the outputs survive a forced run and every later one.
    let notes = TempDir::new().unwrap();
    fs::write(notes.path().join("notes.txt"), "keep me").unwrap();
    let refused = run(&select_args(notes.path(), &[]));
    assert_eq!(refused.status.code(), Some(2), "{}", stderr(&refused));
    assert_eq!(names(notes.path()), ["notes.txt"]);
    ok(&run(&select_args(notes.path(), &["--force"])));
    ok(&run(&select_args(notes.path(), &["--report"])));
    ok(&run(&select_args(notes.path(), &[])));
    assert_eq!(
        names(notes.path()),
        [
            MANIFEST,
            "candidates.csv",
            "notes.txt",
            "shortlist.csv",
            "summary.json"
        ]
    );

    // --out naming a file.
    let file = dir.path().join("candidates.csv");
    let refused = run(&select_args(&file, &[]));
    assert_eq!(refused.status.code(), Some(2));
    assert!(
        stderr(&refused).contains("not a folder"),
        "{}",
        stderr(&refused)
    );
}

#[test]
fn a_folder_of_an_earlier_version_counts_as_the_tools() {
    let dir = TempDir::new().unwrap();
    let out = dir.path();
    for name in [
        "candidates.csv",
        "summary.json",
        "report.html",
        "shift.json",
        "overlap.svg",
    ] {
        fs::write(out.join(name), "old").unwrap();
    }
    // An earlier version's leftover of a killed run (pid above any pid_max).
    fs::write(out.join(".candidates.csv.4194999-0.tmp"), "partial").unwrap();
    ok(&run(&select_args(out, &[])));
    assert_eq!(
        names(out),
        [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
    );
}

/// Reference outputs of each configuration run alone: name -> bytes (the manifest's time
/// left out).
fn contents(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    names(dir)
        .into_iter()
        .map(|name| {
            let bytes = if name == MANIFEST {
                let mut m = manifest(dir);
                m["written_at"] = Value::Null;
                serde_json::to_vec(&m).unwrap()
            } else if name == "summary.json" {
                // The recorded command line names the run's own --out.
                let mut v: Value =
                    serde_json::from_slice(&fs::read(dir.join(&name)).unwrap()).unwrap();
                v["command_line"] = Value::Null;
                serde_json::to_vec(&v).unwrap()
            } else {
                fs::read(dir.join(&name)).unwrap()
            };
            (name, bytes)
        })
        .collect()
}

#[test]
fn paired_concurrent_runs_never_leave_a_mixed_folder() {
    let dir = TempDir::new().unwrap();
    let configs: [&[&str]; 2] = [
        &["--fdr", "0.1", "--seed", "1", "--report"],
        &["--fdr", "0.3", "--seed", "2"],
    ];
    let references: Vec<BTreeMap<String, Vec<u8>>> = configs
        .iter()
        .enumerate()
        .map(|(i, extra)| {
            let out = dir.path().join(format!("reference{i}"));
            ok(&run(&select_args(&out, extra)));
            contents(&out)
        })
        .collect();
    assert_ne!(references[0], references[1]);
    let shared = dir.path().join("shared");
    let mut seen = [0usize; 2];
    for pair in 0..20 {
        if pair % 2 == 0 {
            // Half the pairs start with no folder: both create it.
            let _ = fs::remove_dir_all(&shared);
        }
        let children: Vec<Child> = [pair % 2, 1 - pair % 2]
            .iter()
            .map(|&i| {
                command(&select_args(&shared, configs[i]))
                    .stdout(Stdio::null())
                    .stderr(Stdio::piped())
                    .spawn()
                    .unwrap()
            })
            .collect();
        for child in children {
            ok(&child.wait_with_output().unwrap());
        }
        let found = contents(&shared);
        let which = references
            .iter()
            .position(|reference| *reference == found)
            .unwrap_or_else(|| {
                panic!(
                    "pair {pair}: the folder matches neither run alone: {:?}",
                    found.keys().collect::<Vec<_>>()
                )
            });
        seen[which] += 1;
        assert!(temporaries(&shared).is_empty());
    }
    assert_eq!(seen[0] + seen[1], 20);
}

#[cfg(target_os = "linux")]
#[test]
fn a_held_folder_makes_the_second_run_wait_then_name_the_holder() {
    use std::os::unix::io::AsRawFd;
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    ok(&run(&select_args(&out, &[])));
    let before = contents(&out);
    // This test process holds the folder's lock, as a running weighbridge would.
    let handle = fs::File::open(&out).unwrap();
    // SAFETY: flock on a descriptor this test owns.
    assert_eq!(
        unsafe { libc::flock(handle.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) },
        0
    );
    let started = Instant::now();
    let blocked = run(&select_args(&out, &["--report"]));
    let waited = started.elapsed();
    assert_eq!(blocked.status.code(), Some(2), "{}", stderr(&blocked));
    let message = stderr(&blocked);
    assert!(message.contains(s(&out)), "{message}");
    assert!(
        message.contains(&format!("process {}", std::process::id())),
        "{message}"
    );
    assert!(message.contains("waiting up to 10 s"), "{message}");
    assert!(waited >= Duration::from_secs(10), "{waited:?}");
    assert!(waited < Duration::from_secs(30), "{waited:?}");
    assert_eq!(contents(&out), before);

    // Released within the wait: the second run goes ahead.
    let child = command(&select_args(&out, &["--report"]))
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_millis(1500));
    drop(handle);
    ok(&child.wait_with_output().unwrap());
    assert!(out.join("report.html").exists());
}

/// Start `select` into `out` holding its temporary files before the rename, and wait until
/// they exist. (The lint cannot see that every caller waits for the returned child.)
#[allow(clippy::zombie_processes)]
fn start_held(out: &Path, extra: &[&str]) -> Child {
    let mut child = command(&select_args(out, extra))
        .env("WEIGHBRIDGE_TEST_HOLD_BEFORE_RENAME_MS", "30000")
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let started = Instant::now();
    loop {
        let staged = out.is_dir()
            && temporaries(out)
                .iter()
                .any(|n| n.starts_with(".summary.json."));
        if staged {
            return child;
        }
        if started.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("no temporary files appeared in {}", out.display());
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

#[cfg(unix)]
fn signal(child: &Child, signal: i32) {
    // SAFETY: kill on the pid of a child this test started and has not reaped.
    assert_eq!(unsafe { libc::kill(child.id() as i32, signal) }, 0);
}

#[cfg(unix)]
#[test]
fn sigterm_and_sigint_during_the_final_write_leave_no_temporary_file() {
    let dir = TempDir::new().unwrap();
    // Into a new folder: the folder the run created goes too.
    let fresh = dir.path().join("fresh").join("out");
    let child = start_held(&fresh, &[]);
    signal(&child, libc::SIGTERM);
    let output = child.wait_with_output().unwrap();
    assert_eq!(output.status.code(), Some(143), "{}", stderr(&output));
    assert!(!fresh.exists(), "{:?}", names(&fresh));
    assert!(!dir.path().join("fresh").exists());

    // Into an earlier run's folder: the earlier set stays whole.
    let out = dir.path().join("out");
    ok(&run(&select_args(&out, &[])));
    let before = contents(&out);
    let child = start_held(&out, &["--report", "--fdr", "0.3"]);
    signal(&child, libc::SIGINT);
    let output = child.wait_with_output().unwrap();
    assert_eq!(output.status.code(), Some(130), "{}", stderr(&output));
    assert_eq!(contents(&out), before);
}

#[cfg(unix)]
#[test]
fn leftovers_of_a_killed_run_are_removed_by_the_next_run() {
    let dir = TempDir::new().unwrap();
    let out = dir.path().join("out");
    ok(&run(&select_args(&out, &[])));
    let mut child = start_held(&out, &["--report"]);
    signal(&child, libc::SIGKILL);
    child.wait().unwrap();
    assert!(
        !temporaries(&out).is_empty(),
        "kill -9 leaves its temporaries"
    );
    // A fake leftover too: another run's name pattern with a pid that cannot be alive.
    fs::write(out.join(".candidates.csv.4194999-7.tmp"), "partial").unwrap();
    // Even a run that fails on its input cleans up (the folder is locked at the start).
    let labeled = fixture("labeled.csv");
    let failed = run(&[
        "select",
        "--labeled",
        s(&labeled),
        "--pool",
        s(&dir.path().join("missing.csv")),
        "--threshold",
        "6.5",
        "--out",
        s(&out),
    ]);
    assert_eq!(failed.status.code(), Some(2));
    assert!(temporaries(&out).is_empty(), "{:?}", names(&out));
    ok(&run(&select_args(&out, &[])));
    assert_eq!(
        names(&out),
        [MANIFEST, "candidates.csv", "shortlist.csv", "summary.json"]
    );
}

#[test]
fn rescreen_validates_the_previous_folder_with_located_errors() {
    let dir = TempDir::new().unwrap();
    let round1 = dir.path().join("round1");
    ok(&run(&select_args(&round1, &[])));
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let out = dir.path().join("round2");
    let rescreen = || {
        run(&[
            "rescreen",
            "--previous",
            s(&round1),
            "--labeled",
            s(&labeled),
            "--pool",
            s(&pool),
            "--threshold",
            "6.5",
            "--weight-column",
            "w",
            "--quiet",
            "--out",
            s(&out),
        ])
    };
    let candidates = fs::read_to_string(round1.join("candidates.csv")).unwrap();
    let summary = fs::read(round1.join("summary.json")).unwrap();
    let lines: Vec<&str> = candidates.lines().collect();
    let refused = |expected: &[&str]| {
        let output = rescreen();
        assert_eq!(output.status.code(), Some(2), "{}", stderr(&output));
        let message = stderr(&output);
        for part in expected {
            assert!(message.contains(part), "{part:?} not in {message}");
        }
        assert!(!out.exists(), "nothing may be written");
    };

    // A duplicated id: both lines named (line 2 is the first data row).
    let mut duplicated = lines.clone();
    duplicated.push(lines[1]);
    fs::write(round1.join("candidates.csv"), duplicated.join("\n") + "\n").unwrap();
    let last = duplicated.len();
    refused(&["candidates.csv", &format!("line {last}"), "also on line 2"]);

    // `selected` neither true nor false.
    let header: Vec<&str> = lines[0].split(',').collect();
    let column = header.iter().position(|h| *h == "selected").unwrap();
    let mut cells: Vec<String> = lines[1].split(',').map(String::from).collect();
    cells[column] = "yes".to_string();
    let mut odd = lines.clone();
    let row = cells.join(",");
    odd[1] = &row;
    fs::write(round1.join("candidates.csv"), odd.join("\n") + "\n").unwrap();
    refused(&["candidates.csv", "line 2", "`yes`"]);

    // A summary.json that is valid JSON but no run's summary.
    fs::write(round1.join("candidates.csv"), &candidates).unwrap();
    fs::write(round1.join("summary.json"), r#"{"hello":1}"#).unwrap();
    refused(&["summary.json", "`fdr`"]);

    // Restored: works.
    fs::write(round1.join("summary.json"), &summary).unwrap();
    ok(&rescreen());
}

#[test]
fn rescreen_names_each_setting_that_differs_from_the_previous_run() {
    let dir = TempDir::new().unwrap();
    let round1 = dir.path().join("round1");
    ok(&run(&select_args(&round1, &["--fdr", "0.1"])));
    let labeled = fixture("labeled.csv");
    let pool = fixture("pool.csv");
    let rescreen = |out: &Path, fdr: &str| {
        let output = run(&[
            "rescreen",
            "--previous",
            s(&round1),
            "--labeled",
            s(&labeled),
            "--pool",
            s(&pool),
            "--threshold",
            "6.5",
            "--weight-column",
            "w",
            "--fdr",
            fdr,
            "--out",
            s(out),
        ]);
        ok(&output);
        let changes: Value =
            serde_json::from_slice(&fs::read(out.join("changes.json")).unwrap()).unwrap();
        (
            changes,
            String::from_utf8_lossy(&output.stdout).into_owned(),
        )
    };
    let (same, _) = rescreen(&dir.path().join("same"), "0.1");
    assert_eq!(same["setting_changes"], serde_json::json!([]));
    let (changed, stdout) = rescreen(&dir.path().join("changed"), "0.3");
    assert_eq!(
        changed["setting_changes"],
        serde_json::json!([{"setting": "fdr", "previous": "0.1", "current": "0.3"}])
    );
    let first = changed["warnings"][0].as_str().unwrap();
    assert!(first.contains("fdr 0.1 -> 0.3"), "{first}");
    assert!(stdout.contains("fdr 0.1 -> 0.3"), "{stdout}");
    // Each unit whose selection changed names the changed setting in changes.csv too.
    let csv = fs::read_to_string(dir.path().join("changed").join("changes.csv")).unwrap();
    let newly: Vec<&str> = csv
        .lines()
        .filter(|l| l.contains(",newly selected,"))
        .collect();
    assert!(!newly.is_empty());
    assert!(
        newly.iter().all(|l| l.contains("settings changed (fdr)")),
        "{newly:?}"
    );
    let same_csv = fs::read_to_string(dir.path().join("same").join("changes.csv")).unwrap();
    assert!(!same_csv.contains("settings changed"));
}
