//! Shortest round-trip text of a float, byte for byte what `ryu` writes, with a quicker
//! path for values that are short decimals (at most 15 significant digits, such as
//! predictions and weights exported rounded to a few decimals).
//!
//! Why the quick path gives ryu's bytes: if `a` is the double nearest to a decimal `D` of at
//! most 15 significant digits, no other decimal of at most 15 significant digits has the
//! same nearest double (IEEE 754 binary64 carries 15 decimal digits without loss: C's
//! `DBL_DIG`). Ryu writes the shortest decimal whose nearest double is `a`, so it writes the
//! digits of `D`, without trailing zeros, and between 1e-5 and 1e16 it writes them without
//! an exponent: `123.0`, `1.5`, `0.00012`. The quick path finds `D` by scaling `a` to 15
//! integer digits `y`, and accepts only if `y / 10^j` (both exact doubles, one correctly
//! rounded division) gives back `a`; otherwise it hands the value to ryu. The scaled
//! product is within 0.22 of `y` when `D` exists (`y < 10^15`, two roundings of 2^-53
//! each), so rounding it finds `y`.

/// 10^0 ..= 10^22, each exact in binary64.
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// 10^TENS_FROM ..= 10^15, each the double nearest to it.
const TENS: [f64; 21] = [
    1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11,
    1e12, 1e13, 1e14, 1e15,
];
const TENS_FROM: i32 = -5;

/// The 8 decimal digits of `n < 10^8` (leading zeros included) as ASCII, the first digit
/// in the lowest byte: split into halves, quarters and digits in parallel lanes of one
/// word (common practice: "SWAR"; the multipliers 10486 / 2^20 and 103 / 2^10 divide by 100
/// and by 10 exactly below 10^4 and below 100 respectively; the test checks every n
/// below 10^5 and spread samples to 10^8 against the standard library).
fn eight_digits(n: u32) -> u64 {
    let n = u64::from(n);
    let halves = (n / 10_000) | ((n % 10_000) << 32);
    let hundreds = ((halves * 10_486) >> 20) & 0x0000_007F_0000_007F;
    let quarters = hundreds | ((halves - hundreds * 100) << 16);
    let tens = ((quarters * 103) >> 10) & 0x000F_000F_000F_000F;
    let digits = tens | ((quarters - tens * 10) << 8);
    digits | 0x3030_3030_3030_3030
}

/// How a column's recent values fared on the quick path ([`FloatText::format_column`]).
#[derive(Debug, Default, Clone, Copy)]
pub struct ColumnHint {
    misses: u8,
}

/// Reusable buffers for [`FloatText::format_column`] and [`FloatText::format_long`].
pub struct FloatText {
    ryu: ryu::Buffer,
    short: [u8; 48],
}

impl Default for FloatText {
    fn default() -> Self {
        FloatText::new()
    }
}

impl FloatText {
    pub fn new() -> Self {
        FloatText {
            ryu: ryu::Buffer::new(),
            short: [0; 48],
        }
    }

    /// `v` as `ryu::Buffer::format` writes it (`NaN`, `inf` and `-inf` included), for one
    /// column's values in turn, trying the short-decimal path first. After 8 values in a row
    /// that were not short decimals, the column goes straight to ryu, trying the quick path
    /// again every 256 values (full-precision columns then pay almost nothing for the
    /// attempt). The bytes are the same either way. For values that are rarely short
    /// decimals (a ratio such as a p-value), [`FloatText::format_long`] skips the attempt.
    pub fn format_column(&mut self, v: f64, column: &mut ColumnHint) -> &[u8] {
        let try_short = column.misses < 8 || column.misses == u8::MAX;
        if try_short {
            if let Some(len) = short_decimal(v, &mut self.short) {
                column.misses = 0;
                return &self.short[..len];
            }
            column.misses = if column.misses == u8::MAX {
                8
            } else {
                column.misses + 1
            };
        } else {
            column.misses += 1;
        }
        self.ryu.format(v).as_bytes()
    }

    /// `v` as `ryu::Buffer::format` writes it, through ryu directly.
    pub fn format_long(&mut self, v: f64) -> &[u8] {
        self.ryu.format(v).as_bytes()
    }
}

/// Write `v` into `out` in ryu's form when `v` is a short decimal (at most 15 significant
/// digits) with 1e-5 <= |v| < 1e15, returning the length; `None` otherwise (zero, ±inf, NaN,
/// values outside that range, and values needing 16 or 17 digits).
fn short_decimal(v: f64, out: &mut [u8; 48]) -> Option<usize> {
    let a = v.abs();
    // Also false for NaN.
    if !(1e-5..1e15).contains(&a) {
        return None;
    }
    // floor(log10 a) is `estimate` or `estimate + 1`: a lies in [2^e2, 2^(e2+1)), and
    // floor(e2 log10 2) is 78913 e2 / 2^18 rounded down (exact for |e2| < 2^12; common
    // practice, the constant is round(2^18 log10 2)). Which of the two: a >= 10^(estimate+1).
    let e2 = ((a.to_bits() >> 52) as i32) - 1023;
    let estimate = (e2 * 78913) >> 18;
    let next_power = TENS[(estimate + 1 - TENS_FROM) as usize];
    let exponent = estimate + i32::from(a >= next_power);
    // Decimals so that a * 10^j has 15 integer digits, in 0..=19. Rounded by truncating
    // x + 0.5 (exact below 2^52, and only values below 10^15 are kept): f64::round is a
    // library call on baseline x86-64.
    let j = (14 - exponent) as usize;
    let y = (a * POW10[j] + 0.5) as u64;
    if !(100_000_000_000_000..1_000_000_000_000_000).contains(&y) || y as f64 / POW10[j] != a {
        return None;
    }
    // The 15 digits of y as bytes 0..15 of a register (byte 15 zero), built in registers:
    // small stores read back as one wide load stall the processor.
    let high = eight_digits((y / 100_000_000) as u32) >> 8;
    let digits = u128::from(high) | (u128::from(eight_digits((y % 100_000_000) as u32)) << 56);
    // Trailing zeros among the 15 digits: zero bytes at the top after removing '0' from each.
    let word = digits ^ (u128::from_le_bytes([b'0'; 16]) >> 8);
    let significant = 16 - (word.leading_zeros() / 8) as usize;
    // Digits before the decimal point: 15 - j (<= 0 below 1).
    let before = 15 - j as isize;
    out[0] = b'-';
    let at = usize::from(v < 0.0);
    let len = if before > 0 {
        let before = before as usize;
        out[at..at + 16].copy_from_slice(&digits.to_le_bytes());
        out[at + before] = b'.';
        if significant > before {
            out[at + before + 1..at + before + 17]
                .copy_from_slice(&(digits >> (8 * before)).to_le_bytes());
            at + significant + 1
        } else {
            out[at + before + 1] = b'0';
            at + before + 2
        }
    } else {
        let zeros = (-before) as usize;
        out[at..at + 8].copy_from_slice(b"0.000000");
        out[at + 2 + zeros..at + 18 + zeros].copy_from_slice(&digits.to_le_bytes());
        at + 2 + zeros + significant
    };
    Some(len)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// The reference: ryu itself (crates.io `ryu`, the formatter the outputs always used).
    fn check(v: f64) {
        let mut text = FloatText::new();
        let expected = ryu::Buffer::new().format(v).to_string();
        assert_eq!(
            std::str::from_utf8(text.format_column(v, &mut ColumnHint::default())).unwrap(),
            expected,
            "value bits {:#x}",
            v.to_bits()
        );
        assert_eq!(std::str::from_utf8(text.format_long(v)).unwrap(), expected);
    }

    #[test]
    fn eight_digits_match_the_standard_library() {
        let values = (0..100_000)
            .chain((0..100_000_000).step_by(997))
            .chain([99_999_999]);
        for n in values {
            let text = format!("{n:08}");
            assert_eq!(eight_digits(n).to_le_bytes(), text.as_bytes(), "{n}");
        }
    }

    #[test]
    fn edge_values_match_ryu() {
        let mut values = vec![
            0.0,
            -0.0,
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::MIN_POSITIVE,
            5e-324,
            f64::MAX,
            f64::EPSILON,
            1e-5,
            9.99999e-6,
            0.00001000000000000001,
            1e15,
            999999999999999.0,
            999999999999999.9,
            99999999999999.98,
            1e14,
            123456789012345.6,
            0.1,
            0.2,
            0.3,
            0.1 + 0.2,
            1.0 / 3.0,
            2.0 / 3.0,
            1.0,
            10.0,
            100.0,
            1.5,
            -1.932,
            1.116552,
            0.986,
            9007199254740993.0,
            4503599627370497.5,
            0.000123,
            0.00999999999999999,
            0.009999999999999998,
        ];
        for p in -6..=16 {
            let t = 10f64.powi(p);
            let (up, down) = (
                f64::from_bits(t.to_bits() + 1),
                f64::from_bits(t.to_bits() - 1),
            );
            values.extend([t, up, down, 9.0 * t, 9.5 * t]);
        }
        for v in values {
            check(v);
            check(-v);
        }
    }

    #[test]
    fn short_decimals_match_ryu() {
        // Decimals of 1 to 17 significant digits at every scale that reaches the quick
        // path's range and beyond it, parsed by the standard library.
        let mut rng = ChaCha8Rng::seed_from_u64(13);
        let mut accepted = 0;
        for _ in 0..400_000 {
            let digits = rng.gen_range(1..=17u32);
            let mantissa: u64 = rng.gen_range(0..10u64.pow(digits));
            let exponent: i32 = rng.gen_range(-26..=18);
            let v: f64 = format!("{mantissa}e{exponent}").parse().unwrap();
            check(v);
            check(-v);
            // The argument in the module docs: every decimal of at most 15 significant
            // digits in range takes the quick path.
            if digits <= 15 && (1e-5..1e15).contains(&v) {
                assert!(
                    short_decimal(v, &mut [0; 48]).is_some(),
                    "{mantissa}e{exponent}"
                );
                accepted += 1;
            }
        }
        assert!(accepted > 100_000, "{accepted} took the quick path");
    }

    #[test]
    fn arbitrary_doubles_match_ryu() {
        let mut rng = ChaCha8Rng::seed_from_u64(14);
        for _ in 0..200_000 {
            check(f64::from_bits(rng.gen()));
            let unit: f64 = rng.gen();
            check(unit);
            check(unit * 1000.0 - 500.0);
            // Full-precision values rounded to 15 and 16 significant digits.
            check(format!("{unit:.14e}").parse().unwrap());
            check(format!("{unit:.15e}").parse().unwrap());
        }
    }

    #[test]
    fn columns_give_ryu_bytes_whatever_their_mix() {
        // Runs of short decimals and of full-precision values, in and out of the skipping.
        let mut rng = ChaCha8Rng::seed_from_u64(15);
        let mut text = FloatText::new();
        let mut column = ColumnHint::default();
        let mut skipped = 0;
        for run in 0..400 {
            let short = run % 3 == 0;
            for _ in 0..rng.gen_range(1..700) {
                let unit: f64 = rng.gen();
                let v = if short {
                    (unit * 1e4).round() / 1e3
                } else {
                    unit
                };
                let before = column.misses;
                let got = text.format_column(v, &mut column).to_vec();
                assert_eq!(got, ryu::Buffer::new().format(v).as_bytes());
                if (8..u8::MAX).contains(&before) {
                    skipped += 1;
                }
            }
        }
        assert!(skipped > 10_000, "{skipped} values skipped the quick path");
    }

    #[test]
    fn the_quick_path_is_taken_for_short_decimals() {
        let mut out = [0u8; 48];
        for (v, text) in [
            (1.116552, "1.116552"),
            (-1.932, "-1.932"),
            (100.0, "100.0"),
            (0.00012, "0.00012"),
            (123456789012345.0, "123456789012345.0"),
        ] {
            let len = short_decimal(v, &mut out).expect("a short decimal");
            assert_eq!(std::str::from_utf8(&out[..len]).unwrap(), text);
        }
        assert_eq!(short_decimal(1.0 / 3.0, &mut out), None);
        assert_eq!(short_decimal(0.0, &mut out), None);
        assert_eq!(short_decimal(1e15, &mut out), None);
    }
}
