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
//!
//! Compressed inputs are decompressed on the fly ([`Source::open`]): gzip (`.gz`, also
//! several concatenated members as bgzip writes) and Zstandard (`.zst`, several frames and
//! skippable frames included), recognised by their first bytes, so standard input and
//! misnamed files work too. Line numbers are those of the decompressed text (what `zcat
//! FILE | less` shows). Other binary formats a table is often saved in (ZIP and so .xlsx,
//! old .xls, Parquet, bzip2, xz, 7z, UTF-16 text) are refused with the format's name and
//! what to do ([`Format`]).

use std::collections::VecDeque;
use std::fs::File;
use std::io::{self, BufRead, BufReader, Read};
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
    inner: Box<dyn Read + Send>,
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
    /// How the bytes were stored.
    format: Format,
}

impl Source {
    /// Open `path` (`-` for standard input), decompressing gzip and Zstandard data. A
    /// directory is refused, and so is a binary format that is not a table (the error's
    /// message names the format and what to do; its kind is `InvalidData`).
    pub fn open(path: &Path) -> io::Result<Source> {
        let (raw, len): (Box<dyn Read + Send>, u64) = if is_stdin(path) {
            (Box::new(io::stdin()), 0)
        } else {
            let file = File::open(path)?;
            let metadata = file.metadata()?;
            if metadata.is_dir() {
                return Err(io::Error::other("it is a directory, not a file"));
            }
            let len = if metadata.is_file() {
                metadata.len()
            } else {
                0
            };
            (Box::new(file), len)
        };
        let (format, inner) = decompressed(raw)?;
        let mut source = Source::new(inner);
        // A compressed file's length says little about its text: assume the usual 5:1 of
        // CSV (the estimate only sizes buffers).
        source.len_hint = match format {
            Format::Text => len,
            _ => len.saturating_mul(5),
        };
        source.format = format;
        Ok(source)
    }

    /// What the input's first bytes showed: plain text, gzip or Zstandard.
    pub fn format(&self) -> Format {
        self.format
    }

    /// Wrap any reader (tests, in-memory data).
    pub fn new(inner: Box<dyn Read + Send>) -> Source {
        Source {
            inner,
            offset: 0,
            runs: VecDeque::new(),
            line_start: 0,
            prefix: Vec::with_capacity(3),
            len_hint: 0,
            format: Format::Text,
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

/// How an input's bytes are stored, from its first bytes.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Text (anything not recognised below is read as text).
    Text,
    /// gzip (`1f 8b`), decompressed.
    Gzip,
    /// Zstandard (`28 b5 2f fd`), decompressed.
    Zstd,
}

impl Format {
    /// "gzip", "Zstandard" or "plain text", for messages.
    pub fn name(self) -> &'static str {
        match self {
            Format::Text => "plain text",
            Format::Gzip => "gzip",
            Format::Zstd => "Zstandard",
        }
    }
}

/// Bytes looked at to recognise a format (the longest signature below is 6 bytes).
const SIGNATURE_BYTES: usize = 8;

/// Binary formats that are not tables, by signature: the name and what to do.
const REFUSED: &[(&[u8], &str, &str)] = &[
    (
        b"PK\x03\x04",
        "a ZIP archive (an Excel .xlsx or LibreOffice .ods workbook is one)",
        "save the sheet as CSV (in Excel: File > Save As > CSV UTF-8), or unzip the archive and give the CSV inside",
    ),
    (
        b"PK\x05\x06",
        "an empty ZIP archive",
        "give the CSV or TSV file itself",
    ),
    (
        b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1",
        "an old Excel .xls workbook (OLE2 compound file)",
        "save the sheet as CSV (in Excel: File > Save As > CSV UTF-8)",
    ),
    (
        b"PAR1",
        "a Parquet file, which weighbridge does not read",
        "write it as CSV first, e.g. in Python: pandas.read_parquet(\"in.parquet\").to_csv(\"out.csv\", index=False)",
    ),
    (
        b"ARROW1",
        "an Arrow IPC (Feather) file, which weighbridge does not read",
        "write it as CSV first, e.g. in Python: pandas.read_feather(\"in.feather\").to_csv(\"out.csv\", index=False)",
    ),
    (
        b"BZh",
        "bzip2-compressed data, which weighbridge does not decompress",
        "decompress it (bunzip2 -k FILE) or recompress it with gzip or zstd, which weighbridge reads directly",
    ),
    (
        b"\xfd7zXZ\x00",
        "xz-compressed data, which weighbridge does not decompress",
        "decompress it (unxz -k FILE) or recompress it with gzip or zstd, which weighbridge reads directly",
    ),
    (
        b"7z\xbc\xaf\x27\x1c",
        "a 7-Zip archive",
        "extract the CSV file and give it instead",
    ),
    (
        b"\x89HDF",
        "an HDF5 file, which weighbridge does not read",
        "export the table as CSV",
    ),
    (
        b"\xff\xfe",
        "UTF-16 text (little-endian byte order mark)",
        "save the file as UTF-8 (in Excel: CSV UTF-8; or iconv -f UTF-16 -t UTF-8 FILE)",
    ),
    (
        b"\xfe\xff",
        "UTF-16 text (big-endian byte order mark)",
        "save the file as UTF-8 (iconv -f UTF-16 -t UTF-8 FILE)",
    ),
];

/// Recognise the format from the first bytes of `raw` and return a reader of the text:
/// `raw` itself (its first bytes put back) or a decompressor over it.
///
/// # Errors
/// A read error, or an `InvalidData` error naming a refused binary format and what to do.
fn decompressed(mut raw: Box<dyn Read + Send>) -> io::Result<(Format, Box<dyn Read + Send>)> {
    // Read up to SIGNATURE_BYTES (a pipe may deliver them one at a time).
    let mut head = [0u8; SIGNATURE_BYTES];
    let mut have = 0;
    while have < SIGNATURE_BYTES {
        match raw.read(&mut head[have..]) {
            Ok(0) => break,
            Ok(n) => have += n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    let head = &head[..have];
    if let Some((_, name, todo)) = REFUSED.iter().find(|(magic, _, _)| head.starts_with(magic)) {
        return Err(io::Error::new(
            io::ErrorKind::InvalidData,
            format!("this is {name}, not a CSV/TSV table. Hint: {todo}."),
        ));
    }
    let whole: Box<dyn Read + Send> = Box::new(io::Cursor::new(head.to_vec()).chain(raw));
    if head.starts_with(b"\x1f\x8b") {
        let decoder = flate2::read::MultiGzDecoder::new(BufReader::with_capacity(1 << 16, whole));
        return Ok((Format::Gzip, Box::new(Damaged::new(decoder, Format::Gzip))));
    }
    if head.starts_with(b"\x28\xb5\x2f\xfd") {
        let frames = ZstdFrames::new(BufReader::with_capacity(1 << 16, whole));
        return Ok((Format::Zstd, Box::new(Damaged::new(frames, Format::Zstd))));
    }
    Ok((Format::Text, whole))
}

/// A decompressor whose errors say which format was damaged.
struct Damaged<R> {
    inner: R,
    format: Format,
}

impl<R> Damaged<R> {
    fn new(inner: R, format: Format) -> Self {
        Damaged { inner, format }
    }
}

impl<R: Read> Read for Damaged<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        self.inner.read(buf).map_err(|e| {
            if e.kind() == io::ErrorKind::Interrupted {
                e
            } else {
                io::Error::new(
                    e.kind(),
                    format!(
                        "the {} data is damaged or cut short ({e})",
                        self.format.name()
                    ),
                )
            }
        })
    }
}

/// Every Zstandard frame of a stream, one after another (ruzstd's streaming decoder reads
/// one frame); skippable frames are skipped.
struct ZstdFrames<R: BufRead> {
    source: R,
    decoder: ruzstd::decoding::FrameDecoder,
    /// A frame is being decoded (false before the first and between frames).
    in_frame: bool,
}

impl<R: BufRead> ZstdFrames<R> {
    fn new(source: R) -> Self {
        ZstdFrames {
            source,
            decoder: ruzstd::decoding::FrameDecoder::new(),
            in_frame: false,
        }
    }

    /// Start the next frame; `false` at the end of the input.
    fn next_frame(&mut self) -> io::Result<bool> {
        use ruzstd::decoding::errors::{FrameDecoderError, ReadFrameHeaderError};
        loop {
            if self.source.fill_buf()?.is_empty() {
                return Ok(false);
            }
            match self.decoder.reset(&mut self.source) {
                Ok(()) => return Ok(true),
                Err(FrameDecoderError::ReadFrameHeaderError(ReadFrameHeaderError::SkipFrame {
                    length,
                    ..
                })) => {
                    let skipped =
                        io::copy(&mut (&mut self.source).take(length.into()), &mut io::sink())?;
                    if skipped < u64::from(length) {
                        return Err(io::Error::new(
                            io::ErrorKind::UnexpectedEof,
                            "a skippable frame is cut short",
                        ));
                    }
                }
                Err(e) => return Err(io::Error::new(io::ErrorKind::InvalidData, e.to_string())),
            }
        }
    }
}

impl<R: BufRead> Read for ZstdFrames<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        use ruzstd::decoding::BlockDecodingStrategy;
        if buf.is_empty() {
            return Ok(0);
        }
        loop {
            if !self.in_frame {
                if !self.next_frame()? {
                    return Ok(0);
                }
                self.in_frame = true;
            }
            while self.decoder.can_collect() < buf.len() && !self.decoder.is_finished() {
                let wanted = buf.len() - self.decoder.can_collect();
                self.decoder
                    .decode_blocks(&mut self.source, BlockDecodingStrategy::UptoBytes(wanted))
                    .map_err(|e| io::Error::new(io::ErrorKind::InvalidData, e.to_string()))?;
            }
            let n = self.decoder.read(buf)?;
            if n > 0 {
                return Ok(n);
            }
            if self.decoder.is_finished() && self.decoder.can_collect() == 0 {
                if let (Some(stored), Some(computed)) = (
                    self.decoder.get_checksum_from_data(),
                    self.decoder.get_calculated_checksum(),
                ) {
                    if stored != computed {
                        return Err(io::Error::new(
                            io::ErrorKind::InvalidData,
                            "a frame's checksum does not match its content",
                        ));
                    }
                }
                self.in_frame = false;
            }
        }
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
