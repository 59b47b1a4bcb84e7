//! The output folder holds exactly one run's outputs.
//!
//! [`RunFolder::open`] is called when a command starts and [`RunFolder::commit`] when its
//! outputs are ready. Together they:
//!
//! - **lock** the folder for the whole run with `flock(2)` on the folder itself, so the lock
//!   leaves no file behind and dies with the process (also on kill -9). A folder that does
//!   not exist yet is not created early (a run that fails before committing leaves no
//!   folder): its parent is locked just long enough to create it, then the folder itself.
//!   A second run waits up to [`LOCK_WAIT`], then fails naming the holder's pid, read from
//!   `/proc/locks` on Linux (so no pid file is needed);
//! - **refuse** a non-empty folder that no run of the tool made, unless `--force`: it holds
//!   the manifest [`MANIFEST`], or only the tool's known output names and temporary files
//!   (folders of earlier versions, which wrote no manifest). `labeled.csv`/`pool.csv` count
//!   as the tool's only beside the demo's `pool_truth.csv`, so a user's own data files are
//!   never overwritten silently by `demo`;
//! - **record** what the run wrote in the manifest, and after the new set is in place
//!   **remove** the files the previous run wrote that this run does not write, except the
//!   files this run reads (e.g. the demo's labeled.csv/pool.csv used as inputs of a later
//!   `select`; they are carried into the new manifest as `kept`);
//! - **remove leftovers** of killed runs: temporary files `.NAME.PID-COUNT.tmp` of another
//!   process that is not alive, or that date from before this run took the lock (every
//!   run writes its temporaries under the lock, so these cannot belong to a live writer).

use std::fs::{self, File};
use std::io;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use serde::{Deserialize, Serialize};

use super::output::{forget_created_dirs, parse_temp_name, register_created_dir, OutputSet};

/// File name of the manifest: hidden, because it describes the outputs rather than being
/// one (like `.git`), so listings of a shortlist folder show the results.
pub const MANIFEST: &str = ".weighbridge-manifest.json";

/// How long a run waits for another run holding the same output folder.
pub const LOCK_WAIT: Duration = Duration::from_secs(10);

/// Output names of every command of this and earlier versions (a folder holding only
/// these, `*.svg` and temporary files counts as the tool's). `labeled.csv` and `pool.csv`
/// are in [`DEMO_INPUTS`] instead.
const KNOWN_OUTPUTS: &[&str] = &[
    "candidates.csv",
    "shortlist.csv",
    "summary.json",
    "report.html",
    "shift.json",
    "weights.csv",
    "balance.csv",
    "audit.csv",
    "audit.json",
    "check.json",
    "changes.csv",
    "changes.json",
    "pool_truth.csv",
    "batch.csv",
    "design.csv",
    "design.json",
    "batch_assayed.csv",
    "batch_pool.csv",
    "batch_candidates.csv",
    "batch_shortlist.csv",
    "batch_summary.json",
];

/// The demo's generated inputs: the tool's only where the demo's `pool_truth.csv` is too.
const DEMO_INPUTS: &[&str] = &["labeled.csv", "pool.csv"];

/// What a run wrote into its output folder (`.weighbridge-manifest.json`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Manifest {
    pub tool: String,
    pub version: String,
    /// The subcommand (`select`, `demo`, ...).
    pub command: String,
    /// UTC time the outputs were committed, `YYYY-MM-DDTHH:MM:SSZ`.
    pub written_at: String,
    /// File names this run wrote (the manifest itself not included).
    pub files: Vec<String>,
    /// Files of an earlier run that this run read as inputs and therefore kept.
    #[serde(default)]
    pub kept: Vec<String>,
}

/// Why the output folder cannot be used; each message names the folder and what to do.
#[derive(Debug)]
pub enum FolderError {
    /// Non-empty, and no run of the tool made it.
    NotTheTools { dir: PathBuf, example: String },
    /// The run would overwrite a file in a tool folder that no run of the tool wrote.
    WouldOverwrite { dir: PathBuf, file: String },
    /// Another process holds the lock.
    Busy { dir: PathBuf, pid: Option<u32> },
    /// `--out` exists and is not a folder.
    NotAFolder { dir: PathBuf },
    /// I/O failure.
    Io { dir: PathBuf, error: io::Error },
}

impl std::fmt::Display for FolderError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FolderError::NotTheTools { dir, example } => write!(
                f,
                "the output folder {} is not empty and no weighbridge run made it (it holds {}). \
                 Hint: choose a new or empty --out folder, or pass --force to write into it \
                 anyway (files of other names are left alone).",
                dir.display(),
                example
            ),
            FolderError::WouldOverwrite { dir, file } => write!(
                f,
                "the output folder {} holds {file}, which no weighbridge run wrote, and this run \
                 would overwrite it. Hint: move {file} elsewhere, choose another --out folder, \
                 or pass --force to overwrite it.",
                dir.display()
            ),
            FolderError::Busy { dir, pid } => write!(
                f,
                "the output folder {} is in use by another weighbridge run{} (waited {} s). \
                 Hint: wait for it to finish, or choose another --out folder.",
                dir.display(),
                match pid {
                    Some(pid) => format!(" (process {pid})"),
                    None => String::new(),
                },
                LOCK_WAIT.as_secs()
            ),
            FolderError::NotAFolder { dir } => write!(
                f,
                "--out {} exists and is not a folder. Hint: choose another --out folder.",
                dir.display()
            ),
            FolderError::Io { dir, error } => write!(
                f,
                "cannot write the output folder {}: {error}. Hint: choose another --out folder \
                 or check its permissions.",
                dir.display()
            ),
        }
    }
}

impl std::error::Error for FolderError {}

/// Who made a folder, judged from its entries.
#[derive(Debug)]
enum Ownership {
    /// Missing or empty.
    Empty,
    /// A run of this version: its manifest.
    Manifest(Manifest),
    /// Only known output names and temporary files (earlier versions): those names.
    Legacy(Vec<String>),
    /// Something else; an example entry.
    Foreign(String),
}

fn inspect(dir: &Path) -> io::Result<Ownership> {
    let mut names = Vec::new();
    match fs::read_dir(dir) {
        Ok(entries) => {
            for entry in entries {
                names.push(entry?.file_name().to_string_lossy().into_owned());
            }
        }
        Err(error) if error.kind() == io::ErrorKind::NotFound => return Ok(Ownership::Empty),
        Err(error) => return Err(error),
    }
    if names.iter().any(|n| n == MANIFEST) {
        // A manifest that does not parse (hand-edited, or truncated by a full disk) is
        // still the tool's mark; without its list nothing is removed as stale.
        let manifest = fs::read(dir.join(MANIFEST))
            .ok()
            .and_then(|bytes| serde_json::from_slice::<Manifest>(&bytes).ok())
            .unwrap_or(Manifest {
                tool: String::new(),
                version: String::new(),
                command: String::new(),
                written_at: String::new(),
                files: Vec::new(),
                kept: Vec::new(),
            });
        return Ok(Ownership::Manifest(manifest));
    }
    let outputs: Vec<String> = names
        .iter()
        .filter(|n| parse_temp_name(n).is_none())
        .cloned()
        .collect();
    if names.is_empty() {
        return Ok(Ownership::Empty);
    }
    let demo = outputs.iter().any(|n| n == "pool_truth.csv");
    let known = |n: &str| {
        KNOWN_OUTPUTS.contains(&n)
            || (demo && DEMO_INPUTS.contains(&n))
            || (n.ends_with(".svg") && n.len() > 4 && !n.starts_with('.'))
    };
    match outputs.iter().find(|n| !known(n)) {
        Some(foreign) => Ok(Ownership::Foreign(foreign.clone())),
        None => Ok(Ownership::Legacy(outputs)),
    }
}

/// An exclusive `flock` on a directory, released when dropped (or when the process dies).
#[derive(Debug)]
struct DirLock {
    _handle: File,
}

impl DirLock {
    /// Lock `dir`, waiting up to [`LOCK_WAIT`].
    fn acquire(dir: &Path, out: &Path) -> Result<DirLock, FolderError> {
        let io_error = |error| FolderError::Io {
            dir: out.to_path_buf(),
            error,
        };
        let handle = File::open(dir).map_err(io_error)?;
        let started = Instant::now();
        let mut told = false;
        loop {
            match try_lock(&handle) {
                Ok(true) => return Ok(DirLock { _handle: handle }),
                Ok(false) if started.elapsed() < LOCK_WAIT => {
                    // Say once why nothing happens (stderr, so outputs stay clean).
                    if !told {
                        told = true;
                        eprintln!(
                            "weighbridge: waiting up to {} s for another run{} using {}",
                            LOCK_WAIT.as_secs(),
                            lock_holder(&handle)
                                .map_or_else(String::new, |pid| format!(" (process {pid})")),
                            out.display()
                        );
                    }
                    std::thread::sleep(Duration::from_millis(25));
                }
                Ok(false) => {
                    return Err(FolderError::Busy {
                        dir: out.to_path_buf(),
                        pid: lock_holder(&handle),
                    })
                }
                Err(error) => return Err(io_error(error)),
            }
        }
    }
}

/// Non-blocking exclusive flock: `Ok(false)` when another process holds it.
#[cfg(unix)]
fn try_lock(handle: &File) -> io::Result<bool> {
    use std::os::unix::io::AsRawFd;
    // SAFETY: flock on a file descriptor we own; no memory is passed.
    let rc = unsafe { libc::flock(handle.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
    if rc == 0 {
        return Ok(true);
    }
    let error = io::Error::last_os_error();
    match error.raw_os_error() {
        Some(libc::EWOULDBLOCK) => Ok(false),
        Some(libc::EINTR) => Ok(false),
        _ => Err(error),
    }
}

/// Without flock the folder is not locked (the other guarantees still hold).
#[cfg(not(unix))]
fn try_lock(_handle: &File) -> io::Result<bool> {
    Ok(true)
}

/// The pid holding a flock on `handle`'s inode, from `/proc/locks` (Linux; lines like
/// `1: FLOCK  ADVISORY  WRITE 4242 08:01:1234567 0 EOF`, device as hex major:minor).
/// `None` elsewhere or when not found.
#[cfg(unix)]
fn lock_holder(handle: &File) -> Option<u32> {
    use std::os::unix::fs::MetadataExt;
    let meta = handle.metadata().ok()?;
    let dev = meta.dev();
    // glibc's encoding of dev_t (gnu_dev_major / gnu_dev_minor).
    let major = ((dev >> 8) & 0xfff) | ((dev >> 32) & !0xfff);
    let minor = (dev & 0xff) | ((dev >> 12) & !0xff);
    let table = fs::read_to_string("/proc/locks").ok()?;
    parse_lock_holder(&table, major, minor, meta.ino())
}

#[cfg(not(unix))]
fn lock_holder(_handle: &File) -> Option<u32> {
    None
}

/// The pid of the FLOCK line for device `major:minor` and inode `ino` in a `/proc/locks`
/// table, other than this process.
fn parse_lock_holder(table: &str, major: u64, minor: u64, ino: u64) -> Option<u32> {
    let own = std::process::id();
    table.lines().find_map(|line| {
        let fields: Vec<&str> = line.split_whitespace().collect();
        // Waiters are listed as "1: -> FLOCK ..."; only holders count.
        if fields.len() < 6 || fields[1] != "FLOCK" {
            return None;
        }
        let pid: u32 = fields[4].parse().ok()?;
        let mut parts = fields[5].split(':');
        let line_major = u64::from_str_radix(parts.next()?, 16).ok()?;
        let line_minor = u64::from_str_radix(parts.next()?, 16).ok()?;
        let line_ino: u64 = parts.next()?.parse().ok()?;
        (line_major == major && line_minor == minor && line_ino == ino && pid != own).then_some(pid)
    })
}

/// Whether process `pid` exists (EPERM: it exists but belongs to someone else).
#[cfg(unix)]
fn process_alive(pid: u32) -> bool {
    let Ok(pid) = i32::try_from(pid) else {
        return false;
    };
    if pid <= 0 {
        return false;
    }
    // SAFETY: signal 0 only checks for existence; nothing is sent.
    let rc = unsafe { libc::kill(pid, 0) };
    rc == 0 || io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

#[cfg(not(unix))]
fn process_alive(_pid: u32) -> bool {
    true
}

/// Remove temporary files of killed runs; returns the names removed. Call under the lock.
fn remove_leftovers(dir: &Path, locked_at: SystemTime) -> Vec<String> {
    let own = std::process::id();
    let mut removed = Vec::new();
    let Ok(entries) = fs::read_dir(dir) else {
        return removed;
    };
    for entry in entries.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        let Some((_, pid)) = parse_temp_name(&name) else {
            continue;
        };
        if pid == own {
            continue;
        }
        let older = entry
            .metadata()
            .and_then(|m| m.modified())
            .map(|modified| modified < locked_at)
            .unwrap_or(false);
        if (older || !process_alive(pid)) && fs::remove_file(entry.path()).is_ok() {
            removed.push(name);
        }
    }
    removed
}

/// `YYYY-MM-DDTHH:MM:SSZ` for a time after 1970 (civil-from-days, H. Hinnant's
/// "chrono-compatible low-level date algorithms").
fn utc_timestamp(time: SystemTime) -> String {
    let secs = time
        .duration_since(SystemTime::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    let days = (secs / 86_400) as i64;
    let rem = secs % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        (rem / 60) % 60,
        rem % 60
    )
}

/// An output folder held for one run (see the module documentation).
#[derive(Debug)]
pub struct RunFolder {
    dir: PathBuf,
    force: bool,
    /// Canonical paths of the files this run reads.
    reads: Vec<PathBuf>,
    lock: Option<DirLock>,
    locked_at: SystemTime,
    /// Folders created by [`RunFolder::create_now`], outermost first: removed (when empty)
    /// if the run ends without committing.
    created: Vec<PathBuf>,
}

impl Drop for RunFolder {
    fn drop(&mut self) {
        if !self.created.is_empty() {
            remove_created(&self.created);
            forget_created_dirs();
        }
    }
}

impl RunFolder {
    /// Start a run into `dir`: lock it if it exists, refuse it if it is not the tool's
    /// (unless `force`), remove killed runs' leftovers. `reads` are the run's input files;
    /// none of them is ever removed. Creates nothing.
    ///
    /// # Errors
    /// [`FolderError`] naming the folder.
    pub fn open(dir: &Path, force: bool, reads: &[&Path]) -> Result<RunFolder, FolderError> {
        let reads = reads
            .iter()
            .filter_map(|path| fs::canonicalize(path).ok())
            .collect();
        let mut folder = RunFolder {
            dir: dir.to_path_buf(),
            force,
            reads,
            lock: None,
            locked_at: SystemTime::now(),
            created: Vec::new(),
        };
        if dir.exists() {
            if !dir.is_dir() {
                return Err(FolderError::NotAFolder {
                    dir: dir.to_path_buf(),
                });
            }
            folder.lock = Some(DirLock::acquire(dir, dir)?);
            folder.locked_at = SystemTime::now();
            folder.check_ownership()?;
            remove_leftovers(dir, folder.locked_at);
        }
        Ok(folder)
    }

    fn io_error(&self, error: io::Error) -> FolderError {
        FolderError::Io {
            dir: self.dir.clone(),
            error,
        }
    }

    /// The folder's ownership, refusing a foreign folder unless `--force`.
    fn check_ownership(&self) -> Result<Ownership, FolderError> {
        let ownership = inspect(&self.dir).map_err(|e| self.io_error(e))?;
        match ownership {
            Ownership::Foreign(example) if !self.force => Err(FolderError::NotTheTools {
                dir: self.dir.clone(),
                example,
            }),
            other => Ok(other),
        }
    }

    /// Whether `name` in the folder is one of the files this run reads.
    fn is_read(&self, name: &str) -> bool {
        fs::canonicalize(self.dir.join(name))
            .map(|path| self.reads.contains(&path))
            .unwrap_or(false)
    }

    /// Create the folder (and missing parents) if needed and lock it; returns the folders
    /// created, outermost first.
    fn create_and_lock(&mut self) -> Result<Vec<PathBuf>, FolderError> {
        let mut created = Vec::new();
        let parent = match self.dir.parent() {
            Some(parent) if !parent.as_os_str().is_empty() => parent.to_path_buf(),
            _ => PathBuf::from("."),
        };
        let mut missing = Vec::new();
        let mut cursor = Some(parent.as_path());
        while let Some(path) = cursor {
            if path.as_os_str().is_empty() || path.exists() {
                break;
            }
            missing.push(path.to_path_buf());
            cursor = path.parent();
        }
        for path in missing.into_iter().rev() {
            match fs::create_dir(&path) {
                Ok(()) => {
                    register_created_dir(&path);
                    created.push(path);
                }
                Err(error) if error.kind() == io::ErrorKind::AlreadyExists => {}
                Err(error) => {
                    remove_created(&created);
                    return Err(self.io_error(error));
                }
            }
        }
        // The parent's lock only orders runs creating the folder; the folder's lock is the
        // one held from here on.
        let parent_lock = match DirLock::acquire(&parent, &self.dir) {
            Ok(lock) => lock,
            Err(error) => {
                remove_created(&created);
                return Err(error);
            }
        };
        match fs::create_dir(&self.dir) {
            Ok(()) => {
                register_created_dir(&self.dir);
                created.push(self.dir.clone());
            }
            Err(error) if error.kind() == io::ErrorKind::AlreadyExists && self.dir.is_dir() => {}
            Err(error) => {
                remove_created(&created);
                return Err(self.io_error(error));
            }
        }
        let lock = DirLock::acquire(&self.dir, &self.dir);
        drop(parent_lock);
        match lock {
            Ok(lock) => {
                self.lock = Some(lock);
                self.locked_at = SystemTime::now();
                Ok(created)
            }
            Err(error) => {
                remove_created(&created);
                Err(error)
            }
        }
    }

    /// Create the folder now (and missing parents) and lock it, for outputs written in
    /// place before the commit ([`crate::io::StagedFile`]). The folders created are removed
    /// (when empty) if the run ends without committing. Nothing happens when the folder
    /// exists.
    ///
    /// # Errors
    /// [`FolderError`] naming the folder.
    pub fn create_now(&mut self) -> Result<(), FolderError> {
        if self.lock.is_none() {
            self.created = self.create_and_lock()?;
        }
        Ok(())
    }

    /// Write `set` into the folder as one run of `command`: all files and the manifest, or
    /// nothing; then remove the previous run's files that this run did not write and does
    /// not read. Returns the paths written (the manifest not included).
    ///
    /// # Errors
    /// [`FolderError`] naming the folder; on error nothing new is left in it, and folders
    /// created for it are removed.
    pub fn commit(mut self, set: OutputSet, command: &str) -> Result<Vec<PathBuf>, FolderError> {
        set.check_names().map_err(|e| self.io_error(e))?;
        if set.file_names().any(|name| name == MANIFEST) {
            return Err(self.io_error(io::Error::new(
                io::ErrorKind::InvalidInput,
                format!("output file name {MANIFEST} is reserved"),
            )));
        }
        let mut created = std::mem::take(&mut self.created);
        if self.lock.is_none() {
            created = self.create_and_lock()?;
        }
        let result = self.commit_locked(set, command);
        if result.is_err() {
            remove_created(&created);
        }
        forget_created_dirs();
        result
    }

    fn commit_locked(
        &self,
        mut set: OutputSet,
        command: &str,
    ) -> Result<Vec<PathBuf>, FolderError> {
        let ownership = self.check_ownership()?;
        remove_leftovers(&self.dir, self.locked_at);
        let (previous, manifest_folder) = match &ownership {
            Ownership::Manifest(manifest) => {
                let mut names = manifest.files.clone();
                names.extend(manifest.kept.iter().cloned());
                (names, true)
            }
            Ownership::Legacy(names) => (names.clone(), false),
            Ownership::Empty | Ownership::Foreign(_) => (Vec::new(), false),
        };
        let new_names: Vec<String> = set.file_names().map(str::to_string).collect();
        if manifest_folder && !self.force {
            if let Some(file) = new_names
                .iter()
                .find(|name| !previous.contains(name) && self.dir.join(name).exists())
            {
                return Err(FolderError::WouldOverwrite {
                    dir: self.dir.clone(),
                    file: file.clone(),
                });
            }
        }
        let mut kept = Vec::new();
        let mut stale = Vec::new();
        for name in previous {
            if new_names.contains(&name) || name == MANIFEST || kept.contains(&name) {
                continue;
            }
            if parse_temp_name(&name).is_some() || name.contains(['/', '\\']) || name == ".." {
                continue;
            }
            if self.is_read(&name) {
                kept.push(name);
            } else {
                stale.push(name);
            }
        }
        let manifest = Manifest {
            tool: env!("CARGO_PKG_NAME").to_string(),
            version: env!("CARGO_PKG_VERSION").to_string(),
            command: command.to_string(),
            written_at: utc_timestamp(SystemTime::now()),
            files: new_names,
            kept,
        };
        let mut json =
            serde_json::to_vec_pretty(&manifest).map_err(|e| self.io_error(io::Error::other(e)))?;
        json.push(b'\n');
        // Renamed last: while the data files are renamed the old manifest still describes
        // the folder's previous contents.
        set.add(MANIFEST, json);
        let staged = set.stage(&self.dir).map_err(|e| self.io_error(e))?;
        let dir = self.dir.clone();
        let (mut finals, ()) = staged
            .install(|| {
                for name in &stale {
                    let _ = fs::remove_file(dir.join(name));
                }
            })
            .map_err(|e| self.io_error(e))?;
        if let Ok(handle) = File::open(&self.dir) {
            let _ = handle.sync_all();
        }
        finals.pop();
        Ok(finals)
    }
}

/// Remove folders created for a commit that failed (innermost first; only if empty).
fn remove_created(created: &[PathBuf]) {
    for dir in created.iter().rev() {
        let _ = fs::remove_dir(dir);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tempfile::TempDir;

    fn names(dir: &Path) -> Vec<String> {
        let mut names: Vec<String> = fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    }

    fn set(files: &[(&str, &str)]) -> OutputSet {
        let mut set = OutputSet::new();
        for (name, bytes) in files {
            set.add(name, bytes.as_bytes().to_vec());
        }
        set
    }

    #[test]
    fn a_folder_created_early_is_removed_unless_committed() {
        let dir = TempDir::new().unwrap();
        let out = dir.path().join("new").join("out");
        let mut folder = RunFolder::open(&out, false, &[]).unwrap();
        assert!(!out.exists(), "open creates nothing");
        folder.create_now().unwrap();
        assert!(out.is_dir());
        drop(folder);
        assert!(!out.exists() && !dir.path().join("new").exists());

        let mut folder = RunFolder::open(&out, false, &[]).unwrap();
        folder.create_now().unwrap();
        folder.commit(set(&[("a.csv", "1")]), "select").unwrap();
        assert_eq!(names(&out), vec![MANIFEST.to_string(), "a.csv".to_string()]);
        // An existing folder is neither created nor removed.
        let mut folder = RunFolder::open(&out, false, &[]).unwrap();
        folder.create_now().unwrap();
        drop(folder);
        assert!(out.join("a.csv").exists());
    }

    #[test]
    fn second_run_removes_what_the_first_wrote_and_it_does_not() {
        let tmp = TempDir::new().unwrap();
        let out = tmp.path().join("nested").join("out");
        let folder = RunFolder::open(&out, false, &[]).unwrap();
        assert!(!out.exists(), "open must not create the folder");
        folder
            .commit(
                set(&[
                    ("candidates.csv", "a"),
                    ("summary.json", "{}"),
                    ("report.html", "r"),
                ]),
                "select",
            )
            .unwrap();
        assert_eq!(
            names(&out),
            [MANIFEST, "candidates.csv", "report.html", "summary.json"]
        );
        let folder = RunFolder::open(&out, false, &[]).unwrap();
        let written = folder
            .commit(
                set(&[("candidates.csv", "b"), ("summary.json", "{}")]),
                "select",
            )
            .unwrap();
        assert_eq!(
            written,
            [out.join("candidates.csv"), out.join("summary.json")]
        );
        assert_eq!(names(&out), [MANIFEST, "candidates.csv", "summary.json"]);
        let manifest: Manifest =
            serde_json::from_slice(&fs::read(out.join(MANIFEST)).unwrap()).unwrap();
        assert_eq!(manifest.command, "select");
        assert_eq!(manifest.files, ["candidates.csv", "summary.json"]);
        assert!(manifest.kept.is_empty());
        assert_eq!(manifest.written_at.len(), 20);
    }

    #[test]
    fn files_the_run_reads_are_kept_and_carried_into_the_manifest() {
        let tmp = TempDir::new().unwrap();
        let out = tmp.path().join("demo");
        RunFolder::open(&out, false, &[])
            .unwrap()
            .commit(
                set(&[
                    ("labeled.csv", "l"),
                    ("pool.csv", "p"),
                    ("pool_truth.csv", "t"),
                ]),
                "demo",
            )
            .unwrap();
        let labeled = out.join("labeled.csv");
        let pool = out.join("pool.csv");
        RunFolder::open(&out, false, &[&labeled, &pool])
            .unwrap()
            .commit(set(&[("candidates.csv", "c")]), "select")
            .unwrap();
        assert_eq!(
            names(&out),
            [MANIFEST, "candidates.csv", "labeled.csv", "pool.csv"]
        );
        let manifest: Manifest =
            serde_json::from_slice(&fs::read(out.join(MANIFEST)).unwrap()).unwrap();
        assert_eq!(manifest.kept, ["labeled.csv", "pool.csv"]);
        // The demo may overwrite its own kept inputs again.
        RunFolder::open(&out, false, &[])
            .unwrap()
            .commit(set(&[("labeled.csv", "l2"), ("pool.csv", "p2")]), "demo")
            .unwrap();
        assert_eq!(fs::read(&labeled).unwrap(), b"l2");
        assert_eq!(names(&out), [MANIFEST, "labeled.csv", "pool.csv"]);
    }

    #[test]
    fn foreign_folders_are_refused_unless_forced() {
        let tmp = TempDir::new().unwrap();
        // A fresh empty folder is writable.
        RunFolder::open(tmp.path(), false, &[])
            .unwrap()
            .commit(set(&[("candidates.csv", "c")]), "select")
            .unwrap();

        let user = TempDir::new().unwrap();
        fs::write(user.path().join("labeled.csv"), "mine").unwrap();
        fs::write(user.path().join("pool.csv"), "mine").unwrap();
        let error = RunFolder::open(user.path(), false, &[]).unwrap_err();
        let message = error.to_string();
        assert!(matches!(error, FolderError::NotTheTools { .. }));
        assert!(
            message.contains(&user.path().display().to_string()),
            "{message}"
        );
        assert!(message.contains("--force"), "{message}");
        // Forced: written, and the user's files of other names are left alone.
        RunFolder::open(user.path(), true, &[])
            .unwrap()
            .commit(set(&[("candidates.csv", "c")]), "select")
            .unwrap();
        assert_eq!(
            names(user.path()),
            [MANIFEST, "candidates.csv", "labeled.csv", "pool.csv"]
        );
        assert_eq!(fs::read(user.path().join("labeled.csv")).unwrap(), b"mine");
        // Now the folder has a manifest, but labeled.csv is still not the tool's.
        let error = RunFolder::open(user.path(), false, &[])
            .unwrap()
            .commit(set(&[("labeled.csv", "demo")]), "demo")
            .unwrap_err();
        assert!(
            matches!(error, FolderError::WouldOverwrite { .. }),
            "{error}"
        );
        assert_eq!(fs::read(user.path().join("labeled.csv")).unwrap(), b"mine");
    }

    #[test]
    fn legacy_folders_without_manifest_count_as_the_tools() {
        let tmp = TempDir::new().unwrap();
        for name in [
            "candidates.csv",
            "summary.json",
            "report.html",
            "overlap.svg",
        ] {
            fs::write(tmp.path().join(name), "old").unwrap();
        }
        fs::write(tmp.path().join(".candidates.csv.4000000000-0.tmp"), "x").unwrap();
        RunFolder::open(tmp.path(), false, &[])
            .unwrap()
            .commit(
                set(&[("candidates.csv", "c"), ("summary.json", "s")]),
                "select",
            )
            .unwrap();
        assert_eq!(
            names(tmp.path()),
            [MANIFEST, "candidates.csv", "summary.json"]
        );

        // The demo's labeled.csv counts as the tool's only beside pool_truth.csv.
        let demo = TempDir::new().unwrap();
        for name in ["labeled.csv", "pool.csv", "pool_truth.csv", "summary.json"] {
            fs::write(demo.path().join(name), "old").unwrap();
        }
        assert!(RunFolder::open(demo.path(), false, &[]).is_ok());
    }

    #[test]
    fn dead_processes_temporaries_are_removed_live_ones_kept() {
        let tmp = TempDir::new().unwrap();
        let dead = ".candidates.csv.4000000000-3.tmp";
        fs::write(tmp.path().join(dead), "x").unwrap();
        fs::write(tmp.path().join("candidates.csv"), "x").unwrap();
        let folder = RunFolder::open(tmp.path(), false, &[]).unwrap();
        assert_eq!(names(tmp.path()), ["candidates.csv"]);
        // A temporary of a live process written after the lock was taken stays.
        let parent = std::os::unix::process::parent_id();
        let live = format!(".summary.json.{parent}-0.tmp");
        std::thread::sleep(Duration::from_millis(20));
        fs::write(tmp.path().join(&live), "x").unwrap();
        assert!(remove_leftovers(tmp.path(), folder.locked_at).is_empty());
        // Dated before the lock: a leftover even if the pid is alive (reused).
        assert_eq!(
            remove_leftovers(tmp.path(), SystemTime::now() + Duration::from_secs(1)),
            [live]
        );
    }

    #[test]
    fn a_held_folder_names_the_holder_pid() {
        let table = "1: FLOCK  ADVISORY  WRITE 4242 08:01:1234567 0 EOF\n\
                     1: -> FLOCK  ADVISORY  WRITE 4343 08:01:1234567 0 EOF\n\
                     2: POSIX  ADVISORY  WRITE 99 08:01:7 0 EOF\n";
        assert_eq!(parse_lock_holder(table, 8, 1, 1_234_567), Some(4242));
        assert_eq!(parse_lock_holder(table, 8, 1, 7), None);
        assert_eq!(parse_lock_holder(table, 8, 2, 1_234_567), None);
        // Our own lock, read back from the real /proc/locks.
        let tmp = TempDir::new().unwrap();
        let handle = File::open(tmp.path()).unwrap();
        assert!(try_lock(&handle).unwrap());
        if Path::new("/proc/locks").exists() {
            // Not another process: None; the line exists though.
            assert_eq!(lock_holder(&handle), None);
        }
    }

    #[test]
    fn timestamps_are_utc_calendar_dates() {
        let at = |secs| utc_timestamp(SystemTime::UNIX_EPOCH + Duration::from_secs(secs));
        assert_eq!(at(0), "1970-01-01T00:00:00Z");
        assert_eq!(at(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(at(1_798_761_599), "2026-12-31T23:59:59Z");
    }
}
