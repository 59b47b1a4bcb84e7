//! Assay conventions in a labeled outcome cell ([`OutcomeCells`]): missing-value tokens
//! (`NA`, `N/A`, an empty cell), censored values (`>x`, `<x`, `>=x`, `<=x`) and, in a
//! one-table input, the cells that mean "not tested" (an empty cell, `--untested-marker`).
//!
//! A censored value is accepted where its bound alone decides the side of the threshold,
//! which is all the clipped score uses (design.md 2.1: `V = +inf` when the outcome is on the
//! interesting side of `c`, else a value that does not depend on the outcome). With the
//! default direction (interesting = above `c`):
//!
//! | cell | decided when | side |
//! |---|---|---|
//! | `>x` | `x >= c` | above (interesting) |
//! | `>=x` | `x > c` | above |
//! | `<x` | `x <= c` | not above |
//! | `<=x` | `x <= c` | not above |
//!
//! With `--lower-is-better` (interesting = below `c`) the mirror: `<x` when `x <= c`, `<=x`
//! when `x < c` (below); `>x` and `>=x` when `x >= c` (not below). A decided cell is stored as
//! its bound, or, where the bound is the threshold itself (`>6.5` at 6.5), as the nearest
//! number on the decided side, so that every later step sees an ordinary number on the right
//! side. A score that uses the value itself (`--score residual`) cannot take a censored cell.

use crate::conformal::score::Direction;

/// What to do with a labeled row whose outcome is a missing-value token.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum MissingOutcome {
    /// Stop with a located error that says how to choose (the default).
    #[default]
    Error,
    /// Leave the row out and count it (`UnitTable::dropped_missing_outcome`).
    Drop,
}

/// How censored outcome cells are decided: the side that is interesting, the constant
/// threshold (`None` when thresholds come from a column of the same row), and whether the
/// score needs the value itself.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CensoredRule {
    pub direction: Direction,
    pub threshold: Option<f64>,
    /// True for scores that use the outcome's value (residual): every censored cell is then
    /// an error.
    pub score_needs_value: bool,
}

/// How labeled outcome cells that are not plain numbers are read.
#[derive(Clone, Debug, PartialEq)]
pub struct OutcomeCells {
    /// Tokens meaning "assayed, but no value" (trimmed, compared ignoring ASCII case; the
    /// empty string is an empty cell). In a one-table input an empty cell means untested
    /// instead, whatever this list says.
    pub missing_values: Vec<String>,
    pub missing: MissingOutcome,
    /// `None`: censored cells are refused (they need a threshold and a direction).
    pub censored: Option<CensoredRule>,
    /// Only whether a row was tested matters (`shift --table`): every outcome cell that does
    /// not mark an untested row makes a labeled row, whatever it holds, and no outcome value
    /// is read (the outcome is NaN).
    pub tested_only: bool,
}

/// The missing-value tokens used when none are given: `NA`, `N/A` and the empty cell.
pub const DEFAULT_MISSING_VALUES: [&str; 3] = ["NA", "N/A", ""];

impl Default for OutcomeCells {
    fn default() -> Self {
        OutcomeCells {
            missing_values: DEFAULT_MISSING_VALUES.map(String::from).to_vec(),
            missing: MissingOutcome::Error,
            censored: None,
            tested_only: false,
        }
    }
}

/// A censoring comparison as written in a cell.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Bound {
    Greater,
    GreaterOrEqual,
    Less,
    LessOrEqual,
}

impl Bound {
    pub fn symbol(self) -> &'static str {
        match self {
            Bound::Greater => ">",
            Bound::GreaterOrEqual => ">=",
            Bound::Less => "<",
            Bound::LessOrEqual => "<=",
        }
    }
}

/// What an outcome cell holds, before the threshold is known.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum OutcomeCell {
    Value(f64),
    /// A missing-value token.
    Missing,
    /// One-table input: not tested (a pool row).
    Untested,
    Censored(Bound, f64),
    /// Anything else (reported with the cell's text).
    Unreadable,
}

/// ASCII-case-insensitive equality of a trimmed cell and a token.
fn is_token(cell: &[u8], token: &str) -> bool {
    cell.eq_ignore_ascii_case(token.trim().as_bytes())
}

/// Classify one outcome cell. `untested`: `Some(markers)` in a one-table input, where the
/// empty cell and every marker mean "not tested".
pub(crate) fn classify(
    raw: &[u8],
    cells: &OutcomeCells,
    untested: Option<&[String]>,
) -> OutcomeCell {
    let cell = raw.trim_ascii();
    if let Some(value) = super::read::parse_finite(cell) {
        return OutcomeCell::Value(value);
    }
    if let Some(markers) = untested {
        if cell.is_empty() || markers.iter().any(|m| is_token(cell, m)) {
            return OutcomeCell::Untested;
        }
    }
    if cells
        .missing_values
        .iter()
        .any(|token| is_token(cell, token))
    {
        return OutcomeCell::Missing;
    }
    let (bound, rest) = if let Some(rest) = cell.strip_prefix(b">=") {
        (Bound::GreaterOrEqual, rest)
    } else if let Some(rest) = cell.strip_prefix(b"<=") {
        (Bound::LessOrEqual, rest)
    } else if let Some(rest) = cell.strip_prefix(b">") {
        (Bound::Greater, rest)
    } else if let Some(rest) = cell.strip_prefix(b"<") {
        (Bound::Less, rest)
    } else {
        return OutcomeCell::Unreadable;
    };
    match super::read::parse_finite(rest) {
        Some(x) => OutcomeCell::Censored(bound, x),
        None => OutcomeCell::Unreadable,
    }
}

/// The next f64 above `x` (finite `x`); `f64::next_up` needs a newer Rust than the crate's
/// minimum.
fn next_up(x: f64) -> f64 {
    if x == 0.0 {
        return f64::from_bits(1);
    }
    let bits = x.to_bits();
    f64::from_bits(if x > 0.0 { bits + 1 } else { bits - 1 })
}

fn next_down(x: f64) -> f64 {
    -next_up(-x)
}

/// Decide a censored cell `bound x` against threshold `c`: the value to store (on the
/// decided side of `c`), or why it cannot be decided (a sentence in the user's units and
/// words, for the error message).
///
/// # Errors
/// The bound does not decide the side (`>5` with threshold 6.5 above; `>=6.5` at 6.5,
/// since equal is not above).
pub fn decide_censored(bound: Bound, x: f64, c: f64, direction: Direction) -> Result<f64, String> {
    use Bound::*;
    let decided = match (direction, bound) {
        // Interesting: y > c.
        (Direction::Above, Greater) if x >= c => Some(if x > c { x } else { next_up(c) }),
        (Direction::Above, GreaterOrEqual) if x > c => Some(x),
        (Direction::Above, Less | LessOrEqual) if x <= c => Some(x),
        // Interesting: y < c.
        (Direction::Below, Less) if x <= c => Some(if x < c { x } else { next_down(c) }),
        (Direction::Below, LessOrEqual) if x < c => Some(x),
        (Direction::Below, Greater | GreaterOrEqual) if x >= c => Some(x),
        _ => None,
    };
    decided.ok_or_else(|| {
        let word = direction.word();
        let says = match bound {
            Greater => format!("above {x}"),
            GreaterOrEqual => format!("at least {x}"),
            Less => format!("below {x}"),
            LessOrEqual => format!("at most {x}"),
        };
        let equal = if x == c {
            format!("; equal is not {word}")
        } else {
            String::new()
        };
        format!(
            "it says only that the outcome is {says}, which does not tell whether it is {word} \
             the threshold {c} (a unit is interesting when its outcome is {word} {c}{equal})"
        )
    })
}

#[cfg(test)]
mod tests {
    //! Expected sides are worked out by hand from the definitions in the module table
    //! (design.md 2.1: interesting means y > c; with --lower-is-better y < c).
    use super::*;

    fn cells() -> OutcomeCells {
        OutcomeCells::default()
    }

    #[test]
    fn classifies_numbers_tokens_censored_and_junk() {
        let c = cells();
        assert_eq!(classify(b" 6.5 ", &c, None), OutcomeCell::Value(6.5));
        assert_eq!(classify(b"na", &c, None), OutcomeCell::Missing);
        assert_eq!(classify(b" N/A", &c, None), OutcomeCell::Missing);
        assert_eq!(classify(b"", &c, None), OutcomeCell::Missing);
        assert_eq!(
            classify(b">10000", &c, None),
            OutcomeCell::Censored(Bound::Greater, 10000.0)
        );
        assert_eq!(
            classify(b"<= 1e-3", &c, None),
            OutcomeCell::Censored(Bound::LessOrEqual, 1e-3)
        );
        assert_eq!(
            classify(b">=7", &c, None),
            OutcomeCell::Censored(Bound::GreaterOrEqual, 7.0)
        );
        assert_eq!(
            classify(b"<1", &c, None),
            OutcomeCell::Censored(Bound::Less, 1.0)
        );
        for junk in [&b"abc"[..], b">", b">>3", b"<nan", b"~5", b"nan", b"inf"] {
            assert_eq!(
                classify(junk, &c, None),
                OutcomeCell::Unreadable,
                "{junk:?}"
            );
        }
        // One-table input: empty and the markers mean untested; NA still means missing.
        let markers = vec!["untested".to_string(), "-".to_string()];
        assert_eq!(classify(b"", &c, Some(&markers)), OutcomeCell::Untested);
        assert_eq!(
            classify(b"UNTESTED", &c, Some(&markers)),
            OutcomeCell::Untested
        );
        assert_eq!(classify(b"-", &c, Some(&markers)), OutcomeCell::Untested);
        assert_eq!(classify(b"NA", &c, Some(&markers)), OutcomeCell::Missing);
        // `-5` is a number, not the marker `-`.
        assert_eq!(
            classify(b"-5", &c, Some(&markers)),
            OutcomeCell::Value(-5.0)
        );
    }

    #[test]
    fn censored_cells_decided_by_their_bound() {
        use Bound::*;
        let above = Direction::Above;
        // The examples: >8 at 6.5 is interesting, <5 is not, >5 is undecided.
        assert_eq!(decide_censored(Greater, 8.0, 6.5, above), Ok(8.0));
        assert_eq!(decide_censored(Less, 5.0, 6.5, above), Ok(5.0));
        let message = decide_censored(Greater, 5.0, 6.5, above).unwrap_err();
        assert!(
            message.contains("above 5") && message.contains("6.5"),
            "{message}"
        );
        // Equal is not above: >=6.5 is undecided, >6.5 is above, <=6.5 is not above.
        let message = decide_censored(GreaterOrEqual, 6.5, 6.5, above).unwrap_err();
        assert!(message.contains("equal is not above"), "{message}");
        let stored = decide_censored(Greater, 6.5, 6.5, above).unwrap();
        assert!(stored > 6.5 && stored - 6.5 < 1e-15, "{stored}");
        assert_eq!(decide_censored(LessOrEqual, 6.5, 6.5, above), Ok(6.5));
        assert_eq!(decide_censored(Less, 6.5, 6.5, above), Ok(6.5));
        assert!(decide_censored(Less, 7.0, 6.5, above).is_err());
        assert!(decide_censored(LessOrEqual, 7.0, 6.5, above).is_err());
        assert_eq!(decide_censored(GreaterOrEqual, 7.0, 6.5, above), Ok(7.0));

        let below = Direction::Below;
        // <1 nM with threshold 100 below: interesting; >10000: not; <1000: undecided.
        assert_eq!(decide_censored(Less, 1.0, 100.0, below), Ok(1.0));
        assert_eq!(decide_censored(Greater, 10000.0, 100.0, below), Ok(10000.0));
        let message = decide_censored(Less, 1000.0, 100.0, below).unwrap_err();
        assert!(message.contains("below 100"), "{message}");
        let stored = decide_censored(Less, 100.0, 100.0, below).unwrap();
        assert!(stored < 100.0 && 100.0 - stored < 1e-12, "{stored}");
        assert!(decide_censored(LessOrEqual, 100.0, 100.0, below).is_err());
        assert_eq!(
            decide_censored(GreaterOrEqual, 100.0, 100.0, below),
            Ok(100.0)
        );
        assert!(decide_censored(Greater, 50.0, 100.0, below).is_err());
    }

    #[test]
    fn stored_values_fall_on_the_decided_side() {
        // Every decided cell, stored, is on the side its bound proves (checked against the
        // definition of "interesting" for both directions over a grid, zero included).
        use Bound::*;
        for &c in &[-2.0, 0.0, 6.5] {
            for step in -8..=8 {
                let x = c + step as f64 * 0.25;
                for bound in [Greater, GreaterOrEqual, Less, LessOrEqual] {
                    for direction in [Direction::Above, Direction::Below] {
                        let Ok(y) = decide_censored(bound, x, c, direction) else {
                            continue;
                        };
                        // The side the bound proves...
                        let bound_side_is_interesting = match direction {
                            Direction::Above => matches!(bound, Greater | GreaterOrEqual),
                            Direction::Below => matches!(bound, Less | LessOrEqual),
                        };
                        // ...is the side of the stored value.
                        let stored_is_interesting = match direction {
                            Direction::Above => y > c,
                            Direction::Below => y < c,
                        };
                        assert_eq!(
                            stored_is_interesting, bound_side_is_interesting,
                            "{bound:?} {x} at {c} {direction:?} stored {y}"
                        );
                    }
                }
            }
        }
        assert_eq!(next_up(0.0), f64::from_bits(1));
        assert!(next_up(-1.0) > -1.0 && next_down(1.0) < 1.0);
    }
}
