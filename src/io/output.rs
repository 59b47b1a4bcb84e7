//! Writing output files atomically: one file ([`write_atomic`]) or a set of files that are
//! all written or none ([`OutputSet`]), through fsynced temporary files renamed into place.
//!
//! Every temporary file this process has open is recorded in a process-wide registry so
//! that an interrupted run (SIGINT/SIGTERM, see `cli::signals`) can remove them with
//! [`abandon_temporaries`] before it exits: a 10^6-unit candidates.csv is tens of MB, and
//! an interrupted write must not leave it behind. Temporary names are
//! `.NAME.PID-COUNT.tmp` ([`parse_temp_name`]), so a later run can tell a dead process's
//! leftovers from a live one's.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Mutex, MutexGuard};

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

/// Temporary files and folders this process created and has not yet renamed or kept.
struct Registry {
    temps: Vec<PathBuf>,
    /// Folders created for an output set whose files are not in place yet (removed, if
    /// still empty, when the run is interrupted).
    created_dirs: Vec<PathBuf>,
    /// Set by [`abandon_temporaries`]: no new temporary file may be created.
    terminating: bool,
}

static REGISTRY: Mutex<Registry> = Mutex::new(Registry {
    temps: Vec::new(),
    created_dirs: Vec::new(),
    terminating: false,
});

/// The registry, also after a panic in another thread (its data stay consistent: every
/// update is a single push or retain).
fn registry() -> MutexGuard<'static, Registry> {
    REGISTRY
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// Remove every temporary file of this process (and the empty folders it created for
/// outputs not yet in place), and keep any new one from being created or renamed. Called
/// by the signal handler right before the process exits; it never returns the registry
/// lock, so a commit in progress on another thread cannot rename half a set afterwards
/// (renames happen under the same lock, so a set is either wholly in place or not at all).
pub fn abandon_temporaries() {
    let mut registry = registry();
    registry.terminating = true;
    for temp in registry.temps.drain(..) {
        let _ = fs::remove_file(temp);
    }
    for dir in registry.created_dirs.drain(..).rev() {
        let _ = fs::remove_dir(dir);
    }
    std::mem::forget(registry);
}

/// Record a folder created for outputs that are not in place yet.
pub(crate) fn register_created_dir(dir: &Path) {
    registry().created_dirs.push(dir.to_path_buf());
}

/// The outputs are in place (or the run gave up and removed them): forget the folders.
pub(crate) fn forget_created_dirs() {
    registry().created_dirs.clear();
}

/// `(file name, pid)` of a temporary file name `.NAME.PID-COUNT.tmp` written by
/// [`write_atomic`] or [`OutputSet::commit`]; `None` for any other name.
pub fn parse_temp_name(name: &str) -> Option<(&str, u32)> {
    let inner = name.strip_prefix('.')?.strip_suffix(".tmp")?;
    let (file_name, tag) = inner.rsplit_once('.')?;
    let (pid, count) = tag.split_once('-')?;
    let digits = |s: &str| !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit());
    if file_name.is_empty() || !digits(pid) || !digits(count) {
        return None;
    }
    Some((file_name, pid.parse().ok()?))
}

/// Where a temporary file's contents come from.
enum WriteFrom<'a> {
    Bytes(&'a [u8]),
    /// Copied from its start.
    File(&'a mut fs::File),
}

/// Create a new hidden temporary file `.NAME.PID-COUNT.tmp` in `dir`, registered so that
/// an interruption removes it.
fn create_temp(dir: &Path, file_name: &str) -> io::Result<(PathBuf, fs::File)> {
    let process = std::process::id();
    loop {
        let count = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
        let temp = dir.join(format!(".{file_name}.{process}-{count}.tmp"));
        let mut registry = registry();
        if registry.terminating {
            return Err(io::Error::new(
                io::ErrorKind::Interrupted,
                "the run was interrupted",
            ));
        }
        match OpenOptions::new()
            .read(true)
            .write(true)
            .create_new(true)
            .open(&temp)
        {
            Ok(file) => {
                registry.temps.push(temp.clone());
                return Ok((temp, file));
            }
            Err(error) if error.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(error) => return Err(error),
        }
    }
}

/// Write `bytes` to a new hidden temporary file next to the target and fsync it.
fn write_temp(dir: &Path, file_name: &str, from: WriteFrom<'_>) -> io::Result<PathBuf> {
    let (temp, mut file) = create_temp(dir, file_name)?;
    let written = match from {
        WriteFrom::Bytes(bytes) => file.write_all(bytes),
        WriteFrom::File(source) => {
            use std::io::Seek;
            source
                .rewind()
                .and_then(|()| io::copy(source, &mut file))
                .map(|_| ())
        }
    }
    .and_then(|()| file.sync_all());
    match written {
        Ok(()) => Ok(temp),
        Err(error) => {
            discard_temps(std::slice::from_ref(&temp));
            Err(error)
        }
    }
}

/// An output file written in place, under the temporary name a commit into `dir` uses, so
/// that committing renames it instead of copying it (outputs too large to hold in memory:
/// no second copy on disk). Registered like the commit's own temporary files, so an
/// interruption removes it; removed when dropped uncommitted. On Linux, every 64 MiB
/// written are handed to the kernel's writeback at once (`sync_file_range`), so that the
/// commit's fsync of a 1 GB candidates.csv waits for the last piece only.
#[derive(Debug)]
pub struct StagedFile {
    dir: PathBuf,
    temp: PathBuf,
    file: fs::File,
    owned: bool,
    /// Bytes written, and how many of them were handed to writeback.
    written: u64,
    handed: u64,
}

/// Bytes written to a [`StagedFile`] between two hand-overs to writeback.
const WRITEBACK_STEP: u64 = 64 << 20;

impl StagedFile {
    /// A new empty file for `file_name` in the existing folder `dir`.
    ///
    /// # Errors
    /// I/O errors from creating the file; `Interrupted` when the run is being stopped.
    pub fn create(dir: &Path, file_name: &str) -> io::Result<StagedFile> {
        let (temp, file) = create_temp(dir, file_name)?;
        Ok(StagedFile {
            dir: dir.to_path_buf(),
            temp,
            file,
            owned: true,
            written: 0,
            handed: 0,
        })
    }

    /// Start writing back what was written since the last call (Linux; elsewhere the
    /// fsync at the commit does all of it). Best effort: an error here leaves it to fsync.
    fn hand_to_writeback(&mut self) {
        #[cfg(target_os = "linux")]
        {
            use std::os::fd::AsRawFd;
            let (from, len) = (self.handed, self.written - self.handed);
            // SAFETY: a plain system call on an open descriptor owned by `self.file`.
            unsafe {
                libc::sync_file_range(
                    self.file.as_raw_fd(),
                    from as libc::off64_t,
                    len as libc::off64_t,
                    libc::SYNC_FILE_RANGE_WRITE,
                );
            }
        }
        self.handed = self.written;
    }

    /// Where the file is while it is written.
    pub fn path(&self) -> &Path {
        &self.temp
    }
}

impl Write for StagedFile {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        let n = self.file.write(buf)?;
        self.written += n as u64;
        if self.written - self.handed >= WRITEBACK_STEP {
            self.hand_to_writeback();
        }
        Ok(n)
    }

    fn flush(&mut self) -> io::Result<()> {
        self.file.flush()
    }
}

impl Drop for StagedFile {
    fn drop(&mut self) {
        if self.owned {
            discard_temps(std::slice::from_ref(&self.temp));
        }
    }
}

/// Remove temporary files and forget them.
fn discard_temps(temps: &[PathBuf]) {
    let mut registry = registry();
    for temp in temps {
        let _ = fs::remove_file(temp);
    }
    registry.temps.retain(|t| !temps.contains(t));
}

/// Milliseconds to sleep after writing the temporary files and before renaming them, from
/// `WEIGHBRIDGE_TEST_HOLD_BEFORE_RENAME_MS`: for the tests that interrupt a run during its
/// final write (tests/cli_output_folder.rs) without racing a tiny window. Unset: 0.
fn test_hold_before_rename() {
    if let Some(ms) = std::env::var_os("WEIGHBRIDGE_TEST_HOLD_BEFORE_RENAME_MS")
        .and_then(|v| v.to_str().and_then(|v| v.parse::<u64>().ok()))
    {
        std::thread::sleep(std::time::Duration::from_millis(ms));
    }
}

/// Make renames in `dir` durable. Best effort: not every platform can fsync a directory.
fn sync_dir(dir: &Path) {
    if let Ok(handle) = File::open(dir) {
        let _ = handle.sync_all();
    }
}

fn parent_dir(path: &Path) -> &Path {
    match path.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent,
        _ => Path::new("."),
    }
}

/// Write a file atomically: write to a temporary file in the same directory, fsync, rename.
///
/// Readers see either the old file or the complete new one, never a partial write; on error
/// the temporary file is removed. The directory must exist.
///
/// # Errors
/// I/O errors from creating, writing or renaming; `InvalidInput` if `path` has no file name.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let file_name = path
        .file_name()
        .and_then(|name| name.to_str())
        .ok_or_else(|| {
            io::Error::new(
                io::ErrorKind::InvalidInput,
                format!("cannot write {}: no UTF-8 file name", path.display()),
            )
        })?;
    let dir = parent_dir(path);
    let temp = write_temp(dir, file_name, WriteFrom::Bytes(bytes))?;
    Staged {
        temps: vec![(temp, path.to_path_buf())],
    }
    .install(|| ())?;
    sync_dir(dir);
    Ok(())
}

/// Temporary files written and synced, each with its final path; dropping removes any not
/// yet renamed.
pub(crate) struct Staged {
    temps: Vec<(PathBuf, PathBuf)>,
}

impl Staged {
    /// Rename every temporary file into place, then run `then` (e.g. removing a previous
    /// run's stale files), all under the registry lock so an interruption comes before or
    /// after the whole step, never inside it. Returns the final paths and `then`'s result.
    pub(crate) fn install<R>(mut self, then: impl FnOnce() -> R) -> io::Result<(Vec<PathBuf>, R)> {
        test_hold_before_rename();
        let mut registry = registry();
        if registry.terminating {
            return Err(io::Error::new(
                io::ErrorKind::Interrupted,
                "the run was interrupted",
            ));
        }
        let mut finals = Vec::with_capacity(self.temps.len());
        let temps = std::mem::take(&mut self.temps);
        for (i, (temp, target)) in temps.iter().enumerate() {
            if let Err(error) = fs::rename(temp, target) {
                for (leftover, _) in &temps[i..] {
                    let _ = fs::remove_file(leftover);
                }
                registry
                    .temps
                    .retain(|t| !temps.iter().any(|(tmp, _)| tmp == t));
                return Err(error);
            }
            finals.push(target.clone());
        }
        registry
            .temps
            .retain(|t| !temps.iter().any(|(tmp, _)| tmp == t));
        let result = then();
        registry.created_dirs.clear();
        Ok((finals, result))
    }
}

impl Drop for Staged {
    fn drop(&mut self) {
        let temps: Vec<PathBuf> = self.temps.drain(..).map(|(temp, _)| temp).collect();
        if !temps.is_empty() {
            discard_temps(&temps);
        }
    }
}

/// A set of output files that are all written or none.
///
/// [`OutputSet::add`] collects files in memory; [`OutputSet::commit`] writes each to a
/// temporary name, and only when all are written and synced renames them into place. A
/// failure while writing leaves no file behind. (The renames themselves are separate
/// operations; within one directory they do not fail in practice.)
#[derive(Debug, Default)]
pub struct OutputSet {
    files: Vec<(String, Content)>,
}

/// What a staged file holds: bytes in memory, or a file already written in place
/// ([`StagedFile`], the streamed selection's large outputs).
#[derive(Debug)]
enum Content {
    Bytes(Vec<u8>),
    Staged(StagedFile),
}

impl OutputSet {
    pub fn new() -> Self {
        OutputSet::default()
    }

    /// Stage a file. A later `add` with the same name replaces the earlier bytes.
    pub fn add(&mut self, file_name: &str, bytes: Vec<u8>) {
        self.put(file_name, Content::Bytes(bytes));
    }

    /// Stage a file written in place ([`StagedFile`]): renamed when the set is committed
    /// into the folder it was created in, copied into any other.
    pub fn add_staged(&mut self, file_name: &str, file: StagedFile) {
        self.put(file_name, Content::Staged(file));
    }

    fn put(&mut self, file_name: &str, content: Content) {
        match self.files.iter_mut().find(|(name, _)| name == file_name) {
            Some(slot) => slot.1 = content,
            None => self.files.push((file_name.to_string(), content)),
        }
    }

    /// Names of the staged files, in the order first added.
    pub fn file_names(&self) -> impl Iterator<Item = &str> {
        self.files.iter().map(|(name, _)| name.as_str())
    }

    /// Create `dir` if needed, write every file to a temporary name, then rename them all.
    /// Returns the final paths in the order first added.
    ///
    /// # Errors
    /// `InvalidInput` for a file name that is empty, `.`/`..` or contains a path separator
    /// (checked before anything is written); I/O errors from writing or renaming.
    pub fn commit(self, dir: &Path) -> io::Result<Vec<PathBuf>> {
        self.check_names()?;
        fs::create_dir_all(dir)?;
        let staged = self.stage(dir)?;
        let (finals, ()) = staged.install(|| ())?;
        sync_dir(dir);
        Ok(finals)
    }

    /// `InvalidInput` for a file name that is empty, `.`/`..` or contains a path separator.
    pub(crate) fn check_names(&self) -> io::Result<()> {
        for (name, _) in &self.files {
            let bad =
                name.is_empty() || name == "." || name == ".." || name.contains(['/', '\\', '\0']);
            if bad {
                return Err(io::Error::new(
                    io::ErrorKind::InvalidInput,
                    format!("output file name `{name}` must be a plain file name"),
                ));
            }
        }
        Ok(())
    }

    /// Write every file to a temporary name in the existing folder `dir` (nothing is
    /// renamed yet). A directory in the way of a target is refused before anything is
    /// written, since its rename would fail after earlier files were renamed.
    pub(crate) fn stage(mut self, dir: &Path) -> io::Result<Staged> {
        for (name, _) in &self.files {
            let target = dir.join(name);
            if target.is_dir() {
                return Err(io::Error::other(format!(
                    "cannot write {}: a directory of that name exists",
                    target.display()
                )));
            }
        }
        let mut staged = Staged {
            temps: Vec::with_capacity(self.files.len()),
        };
        for (name, content) in &mut self.files {
            // On error `staged` is dropped, which removes the temporaries written so far.
            let temp = match content {
                Content::Bytes(bytes) => write_temp(dir, name, WriteFrom::Bytes(bytes))?,
                Content::Staged(staged_file) if staged_file.dir == dir => {
                    staged_file.file.sync_all()?;
                    // From here `staged` removes it on a failure.
                    staged_file.owned = false;
                    staged_file.temp.clone()
                }
                Content::Staged(staged_file) => {
                    write_temp(dir, name, WriteFrom::File(&mut staged_file.file))?
                }
            };
            staged.temps.push((temp, dir.join(name)));
        }
        Ok(staged)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tempfile::TempDir;

    fn leftovers(dir: &Path) -> Vec<String> {
        fs::read_dir(dir)
            .unwrap()
            .map(|entry| entry.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|name| name.ends_with(".tmp"))
            .collect()
    }

    #[test]
    fn a_staged_file_is_renamed_in_its_folder_copied_elsewhere_and_removed_if_dropped() {
        use std::os::unix::fs::MetadataExt;
        let dir = TempDir::new().unwrap();
        // Committed into its own folder: renamed (the same inode), nothing left over.
        let mut staged = StagedFile::create(dir.path(), "big.csv").unwrap();
        staged.write_all(b"a,b\n1,2\n").unwrap();
        let inode = fs::metadata(&staged.temp).unwrap().ino();
        let mut set = OutputSet::new();
        set.add_staged("big.csv", staged);
        set.add("small.json", b"{}".to_vec());
        set.commit(dir.path()).unwrap();
        let target = dir.path().join("big.csv");
        assert_eq!(fs::read(&target).unwrap(), b"a,b\n1,2\n");
        assert_eq!(fs::metadata(&target).unwrap().ino(), inode);
        assert!(leftovers(dir.path()).is_empty());
        // Committed into another folder: copied, and the original removed.
        let other = dir.path().join("other");
        let mut staged = StagedFile::create(dir.path(), "big.csv").unwrap();
        staged.write_all(b"x\n").unwrap();
        let mut set = OutputSet::new();
        set.add_staged("big.csv", staged);
        set.commit(&other).unwrap();
        assert_eq!(fs::read(other.join("big.csv")).unwrap(), b"x\n");
        assert!(leftovers(dir.path()).is_empty() && leftovers(&other).is_empty());
        // Dropped uncommitted: removed and forgotten.
        let staged = StagedFile::create(dir.path(), "gone.csv").unwrap();
        let temp = staged.temp.clone();
        assert!(temp.exists());
        drop(staged);
        assert!(!temp.exists());
        assert!(!registry().temps.contains(&temp));
    }

    #[test]
    fn write_atomic_replaces_and_leaves_no_temporary_file() {
        let dir = TempDir::new().unwrap();
        let path = dir.path().join("summary.json");
        write_atomic(&path, b"first").unwrap();
        write_atomic(&path, b"second").unwrap();
        assert_eq!(fs::read(&path).unwrap(), b"second");
        assert!(leftovers(dir.path()).is_empty());
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 1);

        let missing = dir.path().join("no_such_dir").join("x.csv");
        assert!(write_atomic(&missing, b"x").is_err());
        assert!(!missing.exists());

        // The target is a directory: the rename fails and the temporary file is removed.
        let blocked = dir.path().join("blocked");
        fs::create_dir(&blocked).unwrap();
        fs::write(blocked.join("inside"), b"x").unwrap();
        assert!(write_atomic(&blocked, b"x").is_err());
        assert!(leftovers(dir.path()).is_empty());
    }

    #[test]
    fn output_set_writes_every_file() {
        let dir = TempDir::new().unwrap();
        let out = dir.path().join("results").join("run1");
        let mut set = OutputSet::new();
        set.add("candidates.csv", b"id,p\n".to_vec());
        set.add("summary.json", b"{}".to_vec());
        set.add("candidates.csv", b"id,p\na,0.5\n".to_vec());
        assert_eq!(
            set.file_names().collect::<Vec<_>>(),
            ["candidates.csv", "summary.json"]
        );
        let written = set.commit(&out).unwrap();
        assert_eq!(
            written,
            [out.join("candidates.csv"), out.join("summary.json")]
        );
        assert_eq!(fs::read(&written[0]).unwrap(), b"id,p\na,0.5\n");
        assert_eq!(fs::read(&written[1]).unwrap(), b"{}");
        assert!(leftovers(&out).is_empty());
        assert_eq!(fs::read_dir(&out).unwrap().count(), 2);
    }

    #[test]
    fn output_set_writes_nothing_when_a_name_is_bad() {
        for bad in ["", "..", "sub/file.csv"] {
            let dir = TempDir::new().unwrap();
            let out = dir.path().join("out");
            let mut set = OutputSet::new();
            set.add("good.csv", b"x".to_vec());
            set.add(bad, b"y".to_vec());
            let error = set.commit(&out).unwrap_err();
            assert_eq!(error.kind(), io::ErrorKind::InvalidInput);
            assert!(!out.exists(), "nothing may be created for {bad:?}");
        }
    }

    #[test]
    fn output_set_writes_nothing_when_a_target_is_a_directory() {
        let dir = TempDir::new().unwrap();
        fs::create_dir(dir.path().join("report.html")).unwrap();
        let mut set = OutputSet::new();
        set.add("candidates.csv", b"x".to_vec());
        set.add("report.html", b"y".to_vec());
        assert!(set.commit(dir.path()).is_err());
        assert!(!dir.path().join("candidates.csv").exists());
        assert!(leftovers(dir.path()).is_empty());
    }
}
