//! One formatter per kind of number, shared by the terminal text, the verdict's reasons and
//! report.html, so that one figure reads the same wherever it appears. No formatter writes an
//! exponent: a reader of the report should never meet `1.36e-2` beside `0.0136`.

/// A dimensionless ratio or coefficient (B_k, B, the margin sqrt(d)·B, d, p): four
/// significant digits in plain decimals (`0.01358`, `0.8353`, `25.31`); `0` for zero and
/// for values under 1e-12 ("0" would then mislead only below any printed precision).
pub fn ratio(x: f64) -> String {
    if !x.is_finite() {
        return if x.is_nan() {
            "n/a".into()
        } else if x > 0.0 {
            "∞".into()
        } else {
            "−∞".into()
        };
    }
    if x.abs() < 1e-12 {
        return "0".into();
    }
    let magnitude = x.abs().log10().floor() as i32;
    let decimals = (3 - magnitude).clamp(0, 15) as usize;
    let s = format!("{x:.decimals$}");
    // Rounding can carry into a new digit (0.99996 -> 1.0000): keep four significant.
    if decimals > 0 && s.trim_start_matches('-').starts_with("1.") && x.abs() < 1.0 {
        return format!("{x:.3}");
    }
    s
}

/// Nats of separation: two decimals, with a true minus sign for negative values and `−∞`
/// for minus infinity ((1/2) ln d with d = 0).
pub fn nats(x: f64) -> String {
    if x == f64::NEG_INFINITY {
        return "−∞".into();
    }
    let s = format!("{x:.2}");
    match s.strip_prefix('-') {
        Some(rest) if rest.chars().any(|c| c.is_ascii_digit() && c != '0') => {
            format!("−{rest}")
        }
        Some(rest) => rest.to_string(),
        None => s,
    }
}

/// A share (precision, recall, a rate, a missing share) as a percentage with one decimal,
/// two for a share under 0.1% that is not zero, so that it does not print as 0.0%
/// (`99.8%`, `0.7%`, `0.04%`, `0.0%`).
pub fn percent(x: f64) -> String {
    if !x.is_finite() {
        return "n/a".into();
    }
    let p = 100.0 * x;
    if p != 0.0 && p.abs() < 0.095 {
        format!("{p:.2}%")
    } else {
        format!("{p:.1}%")
    }
}

/// A share with its interval: `99.8% (99.1%–100.0%)`.
pub fn percent_interval(x: f64, interval: [f64; 2]) -> String {
    format!(
        "{} ({}–{})",
        percent(x),
        percent(interval[0]),
        percent(interval[1])
    )
}

/// A setting from the config (a threshold, a band): as written, in plain decimals (`0.5`,
/// `0.94`).
pub fn setting(x: f64) -> String {
    // Rust's `Display` for f64 gives the shortest text that reads back the same, without an
    // exponent.
    format!("{x}")
}

/// A weight (log-likelihood ratio, nats): two decimals.
pub fn weight(x: f64) -> String {
    format!("{x:.2}")
}

/// A confidence cut-off: three decimals, or as many as it needs (up to nine) to be shown
/// exactly when it is not a multiple of 0.001.
pub fn cutoff(c: f64) -> String {
    for k in 3..=9 {
        let scale = 10f64.powi(k as i32);
        if ((c * scale).round() / scale - c).abs() < 1e-12 {
            return format!("{c:.k$}");
        }
    }
    format!("{c:.9}")
}

/// A confidence `p` beside the cut-off `c`, with at least `decimals` decimals, rounded down
/// (a confidence is never shown higher than it is) and never on the wrong side of the
/// cut-off: a value below it prints below it (0.4995 and 0.49999997 against 0.5 print
/// `0.499`), and a value at or above it takes more decimals until it prints at or above it
/// as [`cutoff`] prints it (0.873421 against 0.873421 prints `0.873421`, not `0.873`).
pub fn confidence(p: f64, c: f64, decimals: usize) -> String {
    for k in decimals..=12 {
        let scale = 10f64.powi(k as i32);
        // The small nudge keeps 0.57 from printing as 0.569 (0.57 x 100 = 56.999...).
        let mut shown = (p * scale + 1e-6).floor() / scale;
        if p < c {
            if shown >= c {
                shown -= 1.0 / scale;
            }
            return format!("{:.k$}", shown.max(0.0));
        }
        if shown >= c || (c - shown).abs() < 1e-12 {
            return format!("{shown:.k$}");
        }
    }
    format!("{p}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ratios_have_no_exponent() {
        // Four significant digits, plain decimals (common practice for tables of figures).
        assert_eq!(ratio(0.013_58), "0.01358");
        assert_eq!(ratio(0.018_36), "0.01836");
        assert_eq!(ratio(0.155_2), "0.1552");
        assert_eq!(ratio(25.314), "25.31");
        assert_eq!(ratio(0.0), "0");
        assert_eq!(ratio(1.2e-7), "0.0000001200");
        assert_eq!(ratio(0.999_96), "1.000");
        for x in [1e-9, 3.3e-5, 0.5, 7.0, 1234.5] {
            assert!(!ratio(x).contains('e'), "{x}");
        }
    }

    #[test]
    fn nats_keep_their_sign() {
        assert_eq!(nats(-0.3015), "−0.30");
        assert_eq!(nats(-0.001), "0.00");
        assert_eq!(nats(1.864), "1.86");
        assert_eq!(nats(f64::NEG_INFINITY), "−∞");
    }

    #[test]
    fn percents() {
        assert_eq!(percent(0.9987), "99.9%");
        assert_eq!(percent(0.0004), "0.04%");
        assert_eq!(percent(0.0), "0.0%");
        assert_eq!(percent(0.0067), "0.7%");
        assert_eq!(percent(0.00096), "0.1%");
        assert_eq!(percent_interval(0.5, [0.25, 1.0]), "50.0% (25.0%–100.0%)");
    }

    #[test]
    fn confidence_never_crosses_the_cut_off() {
        // The case: 0.4995 against 0.500 must not print 0.500.
        assert_eq!(confidence(0.4995, 0.5, 3), "0.499");
        assert_eq!(confidence(0.499_999_97, 0.5, 3), "0.499");
        assert_eq!(confidence(0.5, 0.5, 3), "0.500");
        assert_eq!(confidence(0.9996, 0.5, 3), "0.999");
        assert_eq!(confidence(0.57, 0.5, 2), "0.57");
        assert_eq!(confidence(0.123_456, 0.5, 6), "0.123456");
        // A cut-off off the 0.001 grid (from `target_precision`).
        assert_eq!(cutoff(0.873_421), "0.873421");
        assert_eq!(confidence(0.873_42, 0.873_421, 3), "0.873");
        assert_eq!(confidence(0.873_421, 0.873_421, 3), "0.873421");
        assert_eq!(cutoff(0.5), "0.500");
    }
}
