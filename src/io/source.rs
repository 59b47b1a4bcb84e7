//! Where an input table's bytes come from ([`Source`]): a file, a named pipe or standard
//! input (`-`), read once from start to end.
//!
//! Why a wrapper: messages give the line a text editor shows, and csv's positions point
//! before the blank lines (and, in CRLF files, the `\n`) that precede a record. Earlier
//! versions reopened the file to count those newlines, which hangs on a named pipe and is
//! impossible for standard input. The source instead remembers the recent runs of line-end
//! bytes (`\r`, `\n`) as they pass through, so the count is a lookup; the reader drops runs
//! it has passed ([`Source::forget_before`]), keeping the memory to the read-ahead.
//!
//! It also bounds a line's length ([`MAX_LINE_BYTES`]): a file of gigabytes without a line
//! end (a sparse file, a dump of NUL bytes) would otherwise grow one csv record until memory
//! runs out. The cap is an I/O error, which the reader reports at the line it reached.

use std::collections::VecDeque;
use std::fs::File;
use std::io::{self, Read};
use std::path::Path;

/// The path that means standard input.
pub const STDIN_NAME: &str = "-";

/// Longest line (bytes between line ends) a table may have: 256 MiB, far beyond any real
/// row (a 10 MB cell passes) and well below what one record buffer can take in memory.
pub const MAX_LINE_BYTES: u64 = 1 << 28;

/// Bytes of a run kept to count newlines from a position inside it (csv starts at most two
/// bytes into a run: after a `\r`, or after the `\n` ending the previous row).
const RUN_HEAD: usize = 8;

/// A maximal run of `\r`/`\n` bytes at byte offsets `start..end`.
#[derive(Clone, Copy, Debug)]
struct Run {
    start: u64,
    end: u64,
    newlines: u64,
    head: [u8; RUN_HEAD],
}

/// An input table read once, front to back, with the bookkeeping described in the module
/// documentation.
pub struct Source {
    inner: Box<dyn Read>,
    /// Bytes delivered so far.
    offset: u64,
    /// Recent runs of line-end bytes, in file order.
    runs: VecDeque<Run>,
    /// Offset just after the last line-end byte.
    line_start: u64,
    /// The first bytes of the input (up to 3), to recognise a UTF-8 byte order mark.
    prefix: Vec<u8>,
    /// Length of a regular file; 0 for pipes and standard input.
    len_hint: u64,
}

impl Source {
    /// Open `path` (`-` for standard input). A directory is refused.
    pub fn open(path: &Path) -> io::Result<Source> {
        if is_stdin(path) {
            return Ok(Source::new(Box::new(io::stdin().lock())));
        }
        let file = File::open(path)?;
        let metadata = file.metadata()?;
        if metadata.is_dir() {
            return Err(io::Error::other("it is a directory, not a file"));
        }
        let mut source = Source::new(Box::new(file));
        if metadata.is_file() {
            source.len_hint = metadata.len();
        }
        Ok(source)
    }

    /// Wrap any reader (tests, in-memory data).
    pub fn new(inner: Box<dyn Read>) -> Source {
        Source {
            inner,
            offset: 0,
            runs: VecDeque::new(),
            line_start: 0,
            prefix: Vec::with_capacity(3),
            len_hint: 0,
        }
    }

    /// Length of the input when it is a regular file, else 0 (used only to size buffers).
    pub fn len_hint(&self) -> u64 {
        self.len_hint
    }

    /// Number of `\n` between byte `position` and the first byte at or after it that is not
    /// a line end (a UTF-8 byte order mark at the start of the input is skipped, as csv does).
    pub fn newlines_from(&self, position: u64) -> u64 {
        let position = if position == 0 && self.prefix.starts_with(b"\xef\xbb\xbf") {
            3
        } else {
            position
        };
        let index = self.runs.partition_point(|run| run.end <= position);
        let Some(run) = self.runs.get(index) else {
            return 0;
        };
        if run.start > position {
            return 0;
        }
        let skipped = (position - run.start) as usize;
        let before = run.head[..skipped.min(RUN_HEAD)]
            .iter()
            .filter(|&&b| b == b'\n')
            .count() as u64;
        run.newlines - before.min(run.newlines)
    }

    /// Drop what is known about bytes before `position`; later lookups are at or after it.
    pub fn forget_before(&mut self, position: u64) {
        while self.runs.front().is_some_and(|run| run.end <= position) {
            self.runs.pop_front();
        }
    }

    fn add_run(&mut self, start: u64, bytes: &[u8]) {
        let newlines = bytes.iter().filter(|&&b| b == b'\n').count() as u64;
        let end = start + bytes.len() as u64;
        if let Some(last) = self.runs.back_mut() {
            if last.end == start {
                let have = (last.end - last.start) as usize;
                for (slot, &byte) in last.head.iter_mut().skip(have).zip(bytes) {
                    *slot = byte;
                }
                last.end = end;
                last.newlines += newlines;
                return;
            }
        }
        let mut head = [0u8; RUN_HEAD];
        for (slot, &byte) in head.iter_mut().zip(bytes) {
            *slot = byte;
        }
        self.runs.push_back(Run {
            start,
            end,
            newlines,
            head,
        });
    }

    fn too_long(&self) -> io::Error {
        io::Error::other(format!(
            "a line is longer than {} MiB without a line end (is this a table? a sparse or binary file ends up here)",
            MAX_LINE_BYTES >> 20
        ))
    }
}

/// How an input path is named in messages: `standard input` for `-`, else the path.
pub fn display_path(path: &Path) -> std::path::PathBuf {
    if is_stdin(path) {
        std::path::PathBuf::from("standard input")
    } else {
        path.to_path_buf()
    }
}

/// At most one of a run's inputs may be `-`: standard input can be read only once.
/// `inputs` are `(flag, path)` pairs such as `("--labeled", path)`.
///
/// # Errors
/// [`InputError::StdinTwice`] naming the first two flags given `-`.
pub fn check_one_stdin(inputs: &[(&str, &Path)]) -> Result<(), super::InputError> {
    let mut stdin = inputs.iter().filter(|(_, path)| is_stdin(path));
    if let (Some(first), Some(second)) = (stdin.next(), stdin.next()) {
        return Err(super::InputError::StdinTwice {
            first: first.0.to_string(),
            second: second.0.to_string(),
        });
    }
    Ok(())
}

/// Whether `path` means standard input.
pub fn is_stdin(path: &Path) -> bool {
    path.as_os_str() == STDIN_NAME
}

fn is_line_end(byte: u8) -> bool {
    byte == b'\n' || byte == b'\r'
}

impl Read for Source {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        let chunk = &buf[..n];
        if self.prefix.len() < 3 {
            let take = (3 - self.prefix.len()).min(n);
            self.prefix.extend_from_slice(&chunk[..take]);
        }
        let base = self.offset;
        let mut i = 0;
        while let Some(found) = memchr::memchr2(b'\n', b'\r', &chunk[i..]) {
            let at = i + found;
            if base + at as u64 - self.line_start > MAX_LINE_BYTES {
                return Err(self.too_long());
            }
            let mut j = at;
            while j < n && is_line_end(chunk[j]) {
                j += 1;
            }
            self.add_run(base + at as u64, &chunk[at..j]);
            self.line_start = base + j as u64;
            i = j;
        }
        if base + n as u64 - self.line_start > MAX_LINE_BYTES {
            return Err(self.too_long());
        }
        self.offset += n as u64;
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    //! Expected counts are counted by hand in the literal inputs.
    use super::*;

    /// Feed `bytes` through a source in chunks of `chunk` bytes.
    fn drained(bytes: &'static [u8], chunk: usize) -> Source {
        let mut source = Source::new(Box::new(bytes));
        let mut buf = vec![0u8; chunk];
        while source.read(&mut buf).unwrap() > 0 {}
        source
    }

    #[test]
    fn counts_newlines_up_to_the_next_content_byte() {
        let input: &[u8] = b"id,x\r\n\r\n\na,1\nb,2";
        for chunk in [1, 2, 3, 64] {
            let source = drained(input, chunk);
            // After "id,x": \r\n\r\n\n holds three newlines.
            assert_eq!(source.newlines_from(4), 3, "chunk {chunk}");
            // csv's CRLF position points at the first \n.
            assert_eq!(source.newlines_from(5), 3, "chunk {chunk}");
            assert_eq!(source.newlines_from(6), 2, "chunk {chunk}");
            // Inside a row and after the last line end: none.
            assert_eq!(source.newlines_from(1), 0);
            assert_eq!(source.newlines_from(13), 0);
            assert_eq!(source.newlines_from(12), 1);
            assert_eq!(source.newlines_from(16), 0);
        }
    }

    #[test]
    fn skips_a_byte_order_mark_at_the_start_only() {
        let source = drained(b"\xef\xbb\xbf\n\nid\n", 2);
        assert_eq!(source.newlines_from(0), 2);
        let source = drained(b"\n\nid\n", 64);
        assert_eq!(source.newlines_from(0), 2);
    }

    #[test]
    fn forgetting_keeps_later_runs() {
        let mut source = drained(b"a\nb\n\nc\n", 64);
        source.forget_before(3);
        assert_eq!(source.newlines_from(3), 2);
        assert_eq!(source.newlines_from(6), 1);
        source.forget_before(7);
        assert_eq!(source.newlines_from(3), 0);
    }

    #[test]
    fn a_line_longer_than_the_cap_is_an_error() {
        // A reader of zeros without line ends: the cap stops it after 256 MiB.
        let mut source = Source::new(Box::new(io::repeat(0).take(MAX_LINE_BYTES + 10)));
        let mut buf = vec![0u8; 1 << 20];
        let error = loop {
            match source.read(&mut buf) {
                Ok(0) => panic!("the cap did not trigger"),
                Ok(_) => {}
                Err(error) => break error,
            }
        };
        assert!(error.to_string().contains("256 MiB"), "{error}");
        // Exactly at the cap is fine.
        let mut source = Source::new(Box::new(io::repeat(b'x').take(MAX_LINE_BYTES)));
        while source.read(&mut buf).unwrap() > 0 {}
    }
}
