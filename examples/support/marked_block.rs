//! The `--ci` mode shared by the examples whose output is committed in docs/validation.md:
//! compare a freshly generated block with the one between two marker lines, and report the
//! first differences.

use std::path::Path;
use std::process::ExitCode;

/// The block between `begin` and `end` in docs/validation.md, without the marker lines.
pub fn committed_block(begin: &str, end: &str) -> Result<String, String> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/validation.md");
    let text = std::fs::read_to_string(&path).map_err(|e| format!("{}: {e}", path.display()))?;
    let start = text
        .find(begin)
        .ok_or_else(|| format!("{}: no {begin} marker", path.display()))?;
    let after = &text[start + begin.len()..];
    let stop = after
        .find(end)
        .ok_or_else(|| format!("{}: no {end} marker", path.display()))?;
    Ok(after[..stop].trim_start_matches('\n').to_string())
}

/// Print `generated` (without `--ci`), or compare it with the committed block and fail with
/// the first differing lines (with `--ci`). `rerun` is the command that regenerates it.
pub fn print_or_compare(generated: &str, begin: &str, end: &str, rerun: &str) -> ExitCode {
    if !std::env::args().any(|a| a == "--ci") {
        print!("{generated}");
        return ExitCode::SUCCESS;
    }
    match committed_block(begin, end) {
        Ok(committed) if committed == generated => {
            println!("docs/validation.md block {begin} reproduced exactly");
            ExitCode::SUCCESS
        }
        Ok(committed) => {
            eprintln!(
                "docs/validation.md block {begin} differs from a fresh run; first differences:"
            );
            let (old, new): (Vec<&str>, Vec<&str>) =
                (committed.lines().collect(), generated.lines().collect());
            for i in 0..old.len().max(new.len()) {
                let (a, b) = (old.get(i), new.get(i));
                if a != b {
                    eprintln!(
                        "line {}:\n- {}\n+ {}",
                        i + 1,
                        a.unwrap_or(&""),
                        b.unwrap_or(&"")
                    );
                }
            }
            eprintln!("regenerate with `{rerun}`");
            ExitCode::FAILURE
        }
        Err(e) => {
            eprintln!("{e}");
            ExitCode::FAILURE
        }
    }
}
