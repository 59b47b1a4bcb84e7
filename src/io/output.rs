//! Writing output files atomically: one file ([`write_atomic`]) or a set of files that are
//! all written or none ([`OutputSet`]), through fsynced temporary files renamed into place.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

static TEMP_COUNTER: AtomicU64 = AtomicU64::new(0);

/// Write `bytes` to a new hidden temporary file next to the target and fsync it.
fn write_temp(dir: &Path, file_name: &str, bytes: &[u8]) -> io::Result<PathBuf> {
    let process = std::process::id();
    loop {
        let count = TEMP_COUNTER.fetch_add(1, Ordering::Relaxed);
        let temp = dir.join(format!(".{file_name}.{process}-{count}.tmp"));
        let mut file = match OpenOptions::new().write(true).create_new(true).open(&temp) {
            Ok(file) => file,
            Err(error) if error.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(error) => return Err(error),
        };
        let written = file.write_all(bytes).and_then(|()| file.sync_all());
        return match written {
            Ok(()) => Ok(temp),
            Err(error) => {
                let _ = fs::remove_file(&temp);
                Err(error)
            }
        };
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
    let temp = write_temp(dir, file_name, bytes)?;
    if let Err(error) = fs::rename(&temp, path) {
        let _ = fs::remove_file(&temp);
        return Err(error);
    }
    sync_dir(dir);
    Ok(())
}

/// A set of output files that are all written or none.
///
/// [`OutputSet::add`] collects files in memory; [`OutputSet::commit`] writes each to a
/// temporary name, and only when all are written and synced renames them into place. A
/// failure while writing leaves no file behind. (The renames themselves are separate
/// operations; within one directory they do not fail in practice.)
#[derive(Debug, Default)]
pub struct OutputSet {
    files: Vec<(String, Vec<u8>)>,
}

impl OutputSet {
    pub fn new() -> Self {
        OutputSet::default()
    }

    /// Stage a file. A later `add` with the same name replaces the earlier bytes.
    pub fn add(&mut self, file_name: &str, bytes: Vec<u8>) {
        match self.files.iter_mut().find(|(name, _)| name == file_name) {
            Some(slot) => slot.1 = bytes,
            None => self.files.push((file_name.to_string(), bytes)),
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
        fs::create_dir_all(dir)?;
        // A directory in the way would make its rename fail after earlier files were
        // renamed; refuse before writing anything.
        for (name, _) in &self.files {
            let target = dir.join(name);
            if target.is_dir() {
                return Err(io::Error::other(format!(
                    "cannot write {}: a directory of that name exists",
                    target.display()
                )));
            }
        }
        let mut temps: Vec<PathBuf> = Vec::with_capacity(self.files.len());
        for (name, bytes) in &self.files {
            match write_temp(dir, name, bytes) {
                Ok(temp) => temps.push(temp),
                Err(error) => {
                    for temp in &temps {
                        let _ = fs::remove_file(temp);
                    }
                    return Err(error);
                }
            }
        }
        let mut finals = Vec::with_capacity(self.files.len());
        for (i, ((name, _), temp)) in self.files.iter().zip(&temps).enumerate() {
            let target = dir.join(name);
            if let Err(error) = fs::rename(temp, &target) {
                for leftover in &temps[i..] {
                    let _ = fs::remove_file(leftover);
                }
                return Err(error);
            }
            finals.push(target);
        }
        sync_dir(dir);
        Ok(finals)
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
