//! Numbers as messages show them: short enough to read, never a 300-digit expansion of a huge
//! float (Rust's `Display` of `1e300` writes every digit).

/// `x` with at most 6 significant digits, in scientific notation when it is very large or very
/// small: `0.1`, `1234.5`, `1e300`, `-2.5e-7`, `NaN`, `inf`.
pub fn short(x: f64) -> String {
    if !x.is_finite() {
        return x.to_string();
    }
    let magnitude = x.abs();
    if magnitude != 0.0 && !(1e-4..1e6).contains(&magnitude) {
        let text = format!("{x:.5e}");
        // Trim trailing zeros of the mantissa: 1.50000e3 -> 1.5e3.
        let (mantissa, exponent) = text.split_once('e').expect("scientific notation");
        let mantissa = mantissa.trim_end_matches('0').trim_end_matches('.');
        return format!("{mantissa}e{exponent}");
    }
    let text = format!("{x:.6}");
    let trimmed = text.trim_end_matches('0').trim_end_matches('.');
    if trimmed.is_empty() || trimmed == "-" || trimmed == "-0" {
        "0".to_owned()
    } else {
        trimmed.to_owned()
    }
}

#[cfg(test)]
mod tests {
    use super::short;

    #[test]
    fn huge_and_tiny_numbers_stay_short() {
        assert_eq!(short(1e300), "1e300");
        assert_eq!(short(-2.5e-7), "-2.5e-7");
        assert_eq!(short(f64::MAX), "1.79769e308");
        assert_eq!(short(0.1 + 0.2), "0.3");
        assert_eq!(short(1234.5), "1234.5");
        assert_eq!(short(0.0), "0");
        assert_eq!(short(-0.0), "0");
        assert_eq!(short(f64::NAN), "NaN");
        assert_eq!(short(f64::INFINITY), "inf");
        assert_eq!(short(101.0), "101");
    }
}
