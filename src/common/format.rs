//! Number and table formatting for everything Kiln prints: reports, notes, warnings, verdicts
//! and error hints.
//!
//! Owns: [`num`] (short numbers), [`decimals4`] (log Z values), [`pm`] (value ± error),
//! [`share`] (a share as a percentage), [`rough`] (a factor in two significant digits),
//! [`table`] (aligned text columns).
//! Must not: decide what to say (callers do), or know about any stage's types.

use std::fmt::Write;

/// A number in at most about six significant digits, in plain or scientific notation.
pub fn num(v: f64) -> String {
    if v.is_nan() {
        return "NaN".into();
    }
    if v.is_infinite() {
        return if v > 0.0 { "inf".into() } else { "-inf".into() };
    }
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if (1e-4..1e6).contains(&a) {
        let decimals = (5 - libm::floor(libm::log10(a)) as i32).clamp(0, 9) as usize;
        let s = format!("{v:.decimals$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        format!("{v:.4e}")
    }
}

/// A rough factor, in two significant digits ("about 7.1 times", "about 150 times",
/// "about 5.2e21 times"): what the words around a Bayes factor can honestly claim.
pub fn rough(v: f64) -> String {
    if !v.is_finite() || v == 0.0 {
        return num(v);
    }
    let a = v.abs();
    if a >= 1e6 {
        return format!("{v:.1e}");
    }
    let scale = libm::pow(10.0, libm::floor(libm::log10(a)) - 1.0);
    num(libm::round(v / scale) * scale)
}

/// A log Z value with four decimals.
pub fn decimals4(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        num(v)
    }
}

/// Pads every column of `rows` to its widest cell.
pub fn table(rows: &[Vec<String>]) -> String {
    let cols = rows.iter().map(|r| r.len()).max().unwrap_or(0);
    let widths: Vec<usize> = (0..cols)
        .map(|c| {
            rows.iter()
                .filter_map(|r| r.get(c))
                .map(|s| s.chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut out = String::new();
    for r in rows {
        let line: Vec<String> = r
            .iter()
            .enumerate()
            .map(|(c, s)| format!("{s:>w$}", w = widths[c]))
            .collect();
        let _ = writeln!(out, "  {}", line.join("  ").trim_end());
    }
    out
}

/// A share in [0, 1] as a percentage with two significant digits ("34 %", "0.042 %"); a
/// share below 0.001 % is "< 0.001 %", never a rounded zero, and only 0 is "0 %".
pub fn share(v: f64) -> String {
    if !v.is_finite() {
        return num(v);
    }
    let p = 100.0 * v;
    if p == 0.0 {
        return "0 %".into();
    }
    if p.abs() < 1e-3 {
        return "< 0.001 %".into();
    }
    let digits = (1 - libm::floor(libm::log10(p.abs())) as i32).clamp(0, 4) as usize;
    let t = format!("{p:.digits$}");
    format!("{t} %")
}

/// Standard errors below this are printed as "< 1e-10", never as zero.
pub const SE_FLOOR: f64 = 1e-10;

/// A standard error alone: never printed as zero.
pub fn se_text(e: f64) -> String {
    if !e.is_finite() {
        num(e)
    } else if e < SE_FLOOR {
        "< 1e-10".into()
    } else if e < 5e-5 {
        format!("{e:.1e}")
    } else {
        let digits = (-libm::floor(libm::log10(e)) as i32 + 1).clamp(1, 8) as usize;
        format!("{e:.digits$}")
    }
}

/// `x ± e` with the error's precision; an error below [`SE_FLOOR`] (or zero) is written
/// "± < 1e-10", never as zero.
pub fn pm(v: f64, e: f64) -> String {
    if !v.is_finite() {
        return num(v);
    }
    if !e.is_finite() {
        return format!("{v:.4} ± {}", num(e));
    }
    if e < SE_FLOOR {
        return format!("{v:.10} ± < 1e-10");
    }
    if e < 5e-5 {
        return format!("{v:.4} ± {e:.1e}");
    }
    let digits = (-libm::floor(libm::log10(e)) as i32 + 1).clamp(1, 8) as usize;
    format!("{v:.digits$} ± {e:.digits$}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_are_short_and_readable() {
        assert_eq!(num(1.23456789), "1.23457");
        assert_eq!(num(-0.5), "-0.5");
        assert_eq!(num(235.856), "235.856");
        assert_eq!(num(1e-9), "1.0000e-9");
        assert_eq!(num(31.4), "31.4");
        assert_eq!(num(2.0), "2");
    }

    #[test]
    fn rough_factors_keep_two_significant_digits() {
        assert_eq!(rough(7.12675), "7.1");
        assert_eq!(rough(20.0855), "20");
        assert_eq!(rough(148.413), "150");
        assert_eq!(rough(1.0), "1");
        assert_eq!(rough(5.18470553e21), "5.2e21");
    }

    #[test]
    fn shares_keep_two_digits_and_never_round_to_zero() {
        assert_eq!(share(0.34), "34 %");
        assert_eq!(share(0.00042), "0.042 %");
        assert_eq!(share(0.0012345), "0.12 %");
        assert_eq!(share(1e-9), "< 0.001 %");
        assert_eq!(share(0.0), "0 %");
        assert_eq!(share(1.0), "100 %");
    }
}
