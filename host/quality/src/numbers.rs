//! Numbers in files: one rule per column, so that every CSV the host writes
//! carries each value with the precision it was measured or computed to,
//! and nothing else (no `19.049999237060547` from an `f32` widened to
//! `f64`, no `NaN`, no `-0.00`).
//!
//! | column (by name) | written as | why |
//! |---|---|---|
//! | `lab_moisture_pct`, and the lab value of a reference-sample table or `cal predict` file (`moisture_pct` there) | as entered: the shortest text that reads back as the stored value (14.60 entered reads 14.6; 0.0035 stays 0.0035) | a lab value carries what the lab's method resolves (Karl Fischer on polymer pellets gives 0.045 % or 35 ppm; common practice, no source): rounding it as a device reading would lose digits the lab measured |
//! | `*moisture_pct`, `uncertainty_pct`, `interval_*_pct` | 2 decimals (0.01 %) | the device's standard uncertainty is 0.1 % or more, and its log keeps moisture as a half float (steps of 0.008 % below 16 %, 0.016 % to 32 %): a third decimal carries nothing |
//! | `temperature_c` | 2 decimals (0.01 C) | the RTD chain resolves about 0.01 C; its accuracy is coarser |
//! | `eps*_re`, `eps*_im` | 4 significant digits | the permittivity noise is about 0.02 at eps' of 3 to 30 (1 part in 10^3) |
//! | `g*_s`, `b*_s` (cell conductance, susceptance) | 4 significant digits | as the permittivity they give |
//! | `*_hz` | whole hertz | the synthesiser's frequencies are set in whole hertz |
//! | `leverage` | 4 decimals | leverages run from 0 to 1; the gate compares them at 10^-3 |
//! | anything else | shortest text that reads back as the same `f32` when the value is one widened to `f64`, else as the same `f64` | lossless, without the noise of widening |
//!
//! Every file uses `.` as the decimal point and no thousands separator
//! (Rust's formatting, independent of the locale), and the `csv` crate
//! writes RFC 4180 (comma separator, quotes where needed). A value that is
//! not finite (or absent) is an empty cell.

/// How a column's numbers are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Rule {
    /// A fixed number of decimals.
    Decimals(u8),
    /// A number of significant digits (scientific notation outside
    /// 10^-6 .. 10^9).
    Significant(u8),
    /// The shortest text that reads back as the same value (as `f32` when
    /// the value is exactly an `f32`).
    Shortest,
}

/// The rule of a column, by its name (see the module's table).
pub fn rule_for(column: &str) -> Rule {
    let c = column;
    let eps = c.starts_with("eps") && (c.ends_with("_re") || c.ends_with("_im"));
    let cell_channel = (c.starts_with('g') || c.starts_with('b'))
        && c.ends_with("_s")
        && c.len() <= 5
        && c[1..c.len() - 2].chars().all(|ch| ch.is_ascii_digit());
    if c == "lab_moisture_pct" {
        Rule::Shortest
    } else if c.ends_with("_pct") || c == "temperature_c" {
        Rule::Decimals(2)
    } else if eps || cell_channel {
        Rule::Significant(4)
    } else if c.ends_with("_hz") {
        Rule::Decimals(0)
    } else if c == "leverage" {
        Rule::Decimals(4)
    } else {
        Rule::Shortest
    }
}

/// `x` written by `rule`; empty when `x` is not finite. Never `-0`.
pub fn fmt(x: f64, rule: Rule) -> String {
    if !x.is_finite() {
        return String::new();
    }
    let s = match rule {
        Rule::Decimals(d) => format!("{x:.*}", usize::from(d)),
        Rule::Significant(n) => significant(x, n.max(1)),
        Rule::Shortest => {
            let f = x as f32;
            if f64::from(f) == x {
                format!("{f}")
            } else {
                format!("{x}")
            }
        }
    };
    // -0.00 is 0.00: a sign on a zero is noise to a reader.
    match s.strip_prefix('-') {
        Some(rest) if rest.chars().all(|c| matches!(c, '0' | '.')) => rest.to_string(),
        _ => s,
    }
}

fn significant(x: f64, n: u8) -> String {
    if x == 0.0 {
        return "0".to_string();
    }
    let n = i32::from(n);
    // Round first, so that 9.9996 at 4 digits becomes 10.00, not 9.9996 -> "10.000".
    let e = x.abs().log10().floor() as i32;
    let rounded: f64 = format!("{x:.*e}", (n - 1) as usize).parse().unwrap_or(x);
    let e = if rounded.abs() >= 10f64.powi(e + 1) {
        e + 1
    } else {
        e
    };
    if (-6..9).contains(&e) {
        let decimals = (n - 1 - e).max(0) as usize;
        format!("{rounded:.decimals$}")
    } else {
        format!("{x:.*e}", (n - 1) as usize)
    }
}

/// `x` with `decimals` decimals and its sign (`+0.152`, `-0.278`), but no
/// sign on a value that rounds to zero (`0.000`, never `-0.000`), for
/// messages.
pub fn signed(x: f64, decimals: usize) -> String {
    let s = format!("{x:+.decimals$}");
    match s.strip_prefix(['-', '+']) {
        Some(rest) if rest.chars().all(|c| matches!(c, '0' | '.')) => rest.to_string(),
        _ => s,
    }
}

/// A cell of column `column`: `v` by the column's rule, empty for `None`
/// or a value that is not finite.
pub fn cell(column: &str, v: Option<f64>) -> String {
    v.map(|x| fmt(x, rule_for(column))).unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn widened_f32_has_no_noise() {
        // 19.05_f32 widened is 19.049999237060547.
        let x = f64::from(19.05_f32);
        assert_eq!(
            format!("{x}"),
            "19.049999237060547",
            "the noise this module removes"
        );
        assert_eq!(fmt(x, Rule::Shortest), "19.05");
        assert_eq!(cell("temperature_c", Some(x)), "19.05");
        assert_eq!(cell("moisture_pct", Some(f64::from(15.34_f32))), "15.34");
        assert_eq!(cell("ratio_low", Some(0.1)), "0.1");
        assert_eq!(cell("ratio_low", Some(1.0 / 3.0)), "0.3333333333333333");
    }

    #[test]
    fn columns_have_their_rules() {
        assert_eq!(rule_for("moisture_pct"), Rule::Decimals(2));
        assert_eq!(rule_for("lab_moisture_pct"), Rule::Shortest);
        assert_eq!(cell("lab_moisture_pct", Some(0.045)), "0.045");
        assert_eq!(cell("lab_moisture_pct", Some(0.0035)), "0.0035");
        assert_eq!(cell("lab_moisture_pct", Some(14.6)), "14.6");
        assert_eq!(cell("lab_moisture_pct", Some(14.60)), "14.6");
        assert_eq!(cell("lab_moisture_pct", Some(20.0)), "20");
        assert_eq!(rule_for("predicted_moisture_pct"), Rule::Decimals(2));
        assert_eq!(rule_for("interval_low_pct"), Rule::Decimals(2));
        assert_eq!(rule_for("eps1_re"), Rule::Significant(4));
        assert_eq!(rule_for("eps2_im"), Rule::Significant(4));
        assert_eq!(rule_for("g1_s"), Rule::Significant(4));
        assert_eq!(rule_for("b2_s"), Rule::Significant(4));
        assert_eq!(rule_for("freq1_hz"), Rule::Decimals(0));
        assert_eq!(rule_for("boot"), Rule::Shortest);
        assert_eq!(rule_for("baseline"), Rule::Shortest);
    }

    #[test]
    fn significant_digits() {
        let s = |x| fmt(x, Rule::Significant(4));
        assert_eq!(s(12.3456), "12.35");
        assert_eq!(s(0.081234), "0.08123");
        assert_eq!(s(9.99996), "10.00");
        assert_eq!(s(-3.0), "-3.000");
        assert_eq!(s(123456.0), "123500");
        assert_eq!(s(3.3351e-8), "3.335e-8");
        assert_eq!(s(0.0), "0");
        assert_eq!(s(f64::from(6.3_f32)), "6.300");
    }

    #[test]
    fn no_nan_no_negative_zero() {
        assert_eq!(cell("moisture_pct", Some(f64::NAN)), "");
        assert_eq!(cell("moisture_pct", Some(f64::INFINITY)), "");
        assert_eq!(cell("moisture_pct", None), "");
        assert_eq!(cell("moisture_pct", Some(-0.001)), "0.00");
        assert_eq!(cell("moisture_pct", Some(-0.0)), "0.00");
        assert_eq!(cell("moisture_pct", Some(-0.01)), "-0.01");
        assert_eq!(fmt(-0.0, Rule::Shortest), "0");
        assert_eq!(cell("freq1_hz", Some(1e6)), "1000000");
    }

    #[test]
    fn signed_zero_has_no_sign_regression_minus_zero_in_cell_verification() {
        assert_eq!(signed(-0.0004, 3), "0.000");
        assert_eq!(signed(-0.00004, 2), "0.00");
        assert_eq!(signed(0.0, 2), "0.00");
        assert_eq!(signed(-0.001, 3), "-0.001");
        assert_eq!(signed(0.152, 3), "+0.152");
    }
}
