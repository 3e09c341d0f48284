//! Numbers as people read them: a fixed count of significant digits instead of a fixed count
//! of decimals (a fixed `{:.4}` turns a weight of 3e-4 into "0.0000" and hides it), and
//! fractions as percentages. Both fronts show numbers through these functions, so a value
//! reads the same in the app, the legend of a PNG and the command line's messages.
//!
//! The rule: `digits` significant digits (at least 1), trailing zeros after the decimal point
//! dropped; plain notation for magnitudes in `[1e-3, 1e5)`, scientific ("3e-4", "1.23e6")
//! outside it; "0" for zero; "NaN", "inf" and "-inf" for the non-finite values.

/// Smallest magnitude written in plain notation by [`sig`].
const PLAIN_FROM: f64 = 1e-3;
/// Magnitudes from here up are written in scientific notation by [`sig`].
const PLAIN_BELOW: f64 = 1e5;

/// `v` with `digits` significant digits (see the module's rule): `sig(0.000_312_5, 3)` is
/// "3.13e-4", `sig(0.4237, 3)` is "0.424", `sig(3.0, 3)` is "3", `sig(-1234.5, 3)` is "-1230",
/// `sig(2.5e6, 2)` is "2.5e6". `digits` of 0 counts as 1.
pub fn sig(v: f64, digits: usize) -> String {
    sig_between(v, digits, PLAIN_FROM, PLAIN_BELOW)
}

/// [`sig`] with an explicit sign: "+0.42", "-3e-4", and "0" for zero (the legend's ticks).
pub fn signed_sig(v: f64, digits: usize) -> String {
    let body = sig(v, digits);
    if v > 0.0 { format!("+{body}") } else { body }
}

/// [`sig`] for an `f32`, widened exactly.
pub fn sig32(v: f32, digits: usize) -> String {
    sig(f64::from(v), digits)
}

/// A fraction (0.25) as a percentage with `digits` significant digits ("25%"); values below
/// 0.1 % keep their significant digits too ("0.05%", "3e-4%").
pub fn percent(fraction: f64, digits: usize) -> String {
    format!("{}%", sig_between(100.0 * fraction, digits, 1e-4, 1e6))
}

/// An accuracy (a fraction from 0 to 1) as a percentage with one decimal ("97.8%", "98.0%"):
/// accuracies are read to a tenth of a point and compared down a column, so here a fixed
/// decimal (trailing zero kept) lines them up, and no accuracy is small enough to vanish.
pub fn accuracy(fraction: f64) -> String {
    if fraction.is_finite() {
        format!("{:.1}%", 100.0 * fraction)
    } else {
        sig(fraction, 3)
    }
}

/// The one implementation: plain notation for `from <= |v| < below`, else scientific.
pub(crate) fn sig_between(v: f64, digits: usize, from: f64, below: f64) -> String {
    if v == 0.0 {
        return "0".to_owned();
    }
    if v.is_nan() {
        return "NaN".to_owned();
    }
    if v.is_infinite() {
        return if v > 0.0 { "inf" } else { "-inf" }.to_owned();
    }
    let digits = digits.max(1);
    let sign = if v < 0.0 { "-" } else { "" };
    let m = v.abs();
    // Round to the digits first, in scientific form, so that 9.996 at 3 digits becomes 10.0
    // before the notation is chosen and the decimals are counted.
    let sci = format!("{m:.prec$e}", prec = digits - 1);
    let (mantissa, exponent) = match sci.split_once('e') {
        Some((mant, exp)) => (mant.to_owned(), exp.parse::<i32>().unwrap_or(0)),
        None => (sci.clone(), 0),
    };
    let rounded: f64 = sci.parse().unwrap_or(m);
    if (from..below).contains(&rounded) {
        let decimals = (digits as i32 - 1 - exponent).max(0) as usize;
        format!("{sign}{}", trim_zeros(&format!("{rounded:.decimals$}")))
    } else {
        format!("{sign}{}e{exponent}", trim_zeros(&mantissa))
    }
}

/// "0.420" -> "0.42", "3.00" -> "3", "250" -> "250".
fn trim_zeros(text: &str) -> &str {
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.')
    } else {
        text
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Reads a formatted number back and checks it lies within half a unit of its last
    /// significant digit of the value (the definition of rounding to `digits` significant
    /// digits), so every case below is checked against arithmetic, not only a string.
    fn close(v: f64, digits: usize) {
        let text = sig(v, digits);
        let back: f64 = text.parse().unwrap_or(f64::NAN);
        let unit = 10f64.powi(v.abs().log10().floor() as i32 + 1 - digits as i32);
        assert!(
            (back - v).abs() <= 0.5 * unit * (1.0 + 1e-9),
            "{v} at {digits} digits gave {text}"
        );
    }

    #[test]
    fn small_values_keep_their_digits() {
        // The case of the issue: a fixed four decimals shows 3e-4 as 0.0000.
        assert_eq!(format!("{:.4}", 3e-4_f64), "0.0003");
        assert_eq!(format!("{:.4}", 3e-5_f64), "0.0000");
        assert_eq!(sig(3e-5, 3), "3e-5");
        assert_eq!(sig(0.000_312_5, 3), "3.13e-4");
        assert_eq!(sig(-0.000_312_5, 2), "-3.1e-4");
        assert_eq!(sig(0.001, 3), "0.001");
    }

    #[test]
    fn plain_range_and_trailing_zeros() {
        assert_eq!(sig(0.4237, 3), "0.424");
        assert_eq!(sig(0.42, 3), "0.42");
        assert_eq!(sig(3.0, 3), "3");
        assert_eq!(sig(-1234.5, 3), "-1230");
        assert_eq!(sig(12.0, 1), "10");
        assert_eq!(sig(99_999.0, 5), "99999");
        assert_eq!(sig(2.5e6, 2), "2.5e6");
        assert_eq!(sig(1e5, 3), "1e5");
        // Rounding across a power of ten: 9.996 -> 10.0 -> "10"; 99999.6 -> 1.00e5.
        assert_eq!(sig(9.996, 3), "10");
        assert_eq!(sig(99_999.6, 3), "1e5");
        assert_eq!(sig(0.000_999_96, 3), "0.001");
        assert_eq!(sig(1.5, 0), "2");
    }

    #[test]
    fn special_values() {
        assert_eq!(sig(0.0, 3), "0");
        assert_eq!(sig(-0.0, 3), "0");
        assert_eq!(sig(f64::NAN, 3), "NaN");
        assert_eq!(sig(f64::INFINITY, 3), "inf");
        assert_eq!(sig(f64::NEG_INFINITY, 3), "-inf");
        assert_eq!(signed_sig(0.42, 2), "+0.42");
        assert_eq!(signed_sig(-3e-4, 2), "-3e-4");
        assert_eq!(signed_sig(0.0, 2), "0");
        assert_eq!(sig32(0.1_f32, 3), "0.1");
    }

    #[test]
    fn rounding_is_within_half_a_unit_of_the_last_digit() {
        for v in [
            std::f64::consts::PI,
            -std::f64::consts::E,
            0.000_123_456,
            123_456.789,
            6.022e23,
            1.6e-19,
            0.049_95,
            777.7,
        ] {
            for digits in 1..=6 {
                close(v, digits);
            }
        }
    }

    #[test]
    fn percentages() {
        assert_eq!(percent(0.25, 3), "25%");
        assert_eq!(percent(0.9, 3), "90%");
        assert_eq!(percent(0.123_45, 3), "12.3%");
        assert_eq!(percent(0.0005, 2), "0.05%");
        assert_eq!(percent(1.0, 3), "100%");
        assert_eq!(percent(0.0, 3), "0%");
        assert_eq!(accuracy(0.98), "98.0%");
        assert_eq!(accuracy(0.9784), "97.8%");
        assert_eq!(accuracy(1.0), "100.0%");
        assert_eq!(accuracy(f64::NAN), "NaN");
    }
}
