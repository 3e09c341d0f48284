//! Number formatting shared by both fronts: a value with a chosen number of significant
//! digits, for tables people read (the CSV and JSON writers keep every digit instead).

/// Formats `x` with `digits` significant digits (at least 1), like C's `%#.{digits}g`
/// (ISO C 7.21.6.1: trailing zeros kept, so a column's values show their precision) with
/// two departures meant for tables: whole numbers below one million keep every integer
/// digit (`sig(1234.6, 3)` is `"1235"`, not `"1.23e+03"`), and the exponent of the
/// scientific form, used below 0.001, has no padding (`"1.23e-5"`). Zero is `"0"`;
/// NaN and the infinities are `"NaN"`, `"inf"` and `"-inf"`.
pub fn sig(x: f64, digits: usize) -> String {
    let digits = digits.max(1);
    if x == 0.0 {
        return "0".to_owned();
    }
    if x.is_nan() {
        return "NaN".to_owned();
    }
    if x.is_infinite() {
        return if x > 0.0 { "inf" } else { "-inf" }.to_owned();
    }
    let m = x.abs();
    if !(1e-3..1e6).contains(&m) {
        let text = format!("{x:.prec$e}", prec = digits - 1);
        return text;
    }
    let e = m.log10().floor() as i32;
    let mut decimals = (digits as i32 - 1 - e).max(0) as usize;
    let mut text = format!("{x:.decimals$}");
    // Rounding may carry into a new leading digit (9.996 -> "10.00"): one decimal fewer
    // keeps the count of significant digits.
    let rounded: f64 = text.parse().unwrap_or(x);
    if decimals > 0 && rounded.abs() >= 10f64.powi(e + 1) {
        decimals -= 1;
        text = format!("{x:.decimals$}");
    }
    text
}

#[cfg(test)]
mod tests {
    use super::sig;

    #[test]
    fn matches_c_alternate_g_inside_the_fixed_range() {
        // Expected strings are what C's printf("%#.3g") prints (ISO C 7.21.6.1).
        for (x, want) in [
            (0.5, "0.500"),
            (0.012345, "0.0123"),
            (123.456, "123."),
            (-2.0, "-2.00"),
            (9.996, "10.0"),
            (0.0019996, "0.00200"),
            (99.95, "100."),
        ] {
            // Our table form drops the lone trailing point that %#g keeps.
            assert_eq!(sig(x, 3), want.trim_end_matches('.'), "sig({x}, 3)");
        }
    }

    #[test]
    fn large_whole_numbers_keep_their_digits_and_tiny_ones_go_scientific() {
        assert_eq!(sig(1234.6, 3), "1235");
        assert_eq!(sig(-98765.4, 2), "-98765");
        // C's %.3e is "1.23e-05"; the table form has no exponent padding.
        assert_eq!(sig(1.2345e-5, 3), "1.23e-5");
        assert_eq!(sig(2.5e7, 2), "2.5e7");
    }

    #[test]
    fn edge_values() {
        assert_eq!(sig(0.0, 3), "0");
        assert_eq!(sig(-0.0, 3), "0");
        assert_eq!(sig(f64::NAN, 3), "NaN");
        assert_eq!(sig(f64::INFINITY, 3), "inf");
        assert_eq!(sig(f64::NEG_INFINITY, 3), "-inf");
        // digits 0 counts as 1.
        assert_eq!(sig(0.37, 0), "0.4");
    }
}
