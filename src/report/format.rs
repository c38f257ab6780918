//! Numbers for people: a few significant digits, scientific notation only
//! where plain digits would mislead (tiny or huge magnitudes), p-values in
//! scientific notation once they are small. Pure functions.

/// `v` to `digits` significant digits: plain decimals when
/// 0.001 ≤ |v| < 10⁶, otherwise `1.235e-5`. Zero is `0`; a non-finite
/// value is `—` (it never comes from the store, but a report must not
/// print `NaN`).
pub fn sig(v: f64, digits: usize) -> String {
    if !v.is_finite() {
        return "—".into();
    }
    if v == 0.0 {
        return "0".into();
    }
    let digits = digits.max(1);
    // Rust's exponent formatting rounds correctly; its exponent is the
    // one after rounding (9.9996 to 4 digits is 1.000e1).
    let sci = format!("{:.*e}", digits - 1, v);
    let exp: i32 = sci
        .rsplit_once('e')
        .and_then(|(_, e)| e.parse().ok())
        .unwrap_or(0);
    if (-3..6).contains(&exp) {
        let places = (digits as i32 - 1 - exp).max(0) as usize;
        let plain = format!("{v:.places$}");
        // -0.0000 after rounding is zero.
        if plain
            .trim_start_matches('-')
            .trim_matches(['0', '.'])
            .is_empty()
        {
            return "0".into();
        }
        plain
    } else {
        sci
    }
}

/// As [`sig`] without trailing zeros after the decimal point: for values
/// as recorded and positions on an axis (`75`, not `75.0000`).
pub fn trimmed(v: f64, digits: usize) -> String {
    let text = sig(v, digits);
    if text.contains('.') && !text.contains('e') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    }
}

/// An optional number, `—` when absent.
pub fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or_else(|| "—".into(), |v| sig(v, digits))
}

/// A two-sided p-value: three significant digits down to 0.001, then two
/// in scientific notation; a p-value that underflowed to zero is
/// `< 1e-300`.
pub fn p_value(p: f64) -> String {
    if !p.is_finite() {
        return "—".into();
    }
    if p <= 0.0 {
        return "< 1e-300".into();
    }
    if p >= 0.001 {
        sig(p, 3)
    } else {
        format!("{p:.1e}")
    }
}

/// An optional p-value, `—` when absent.
pub fn opt_p(p: Option<f64>) -> String {
    p.map_or_else(|| "—".into(), p_value)
}

/// A number as produced by [`sig`] or [`p_value`], for HTML: `1.2e-5`
/// becomes `1.2×10<sup>−5</sup>`; anything else is escaped unchanged.
pub fn html_number(text: &str) -> String {
    if let Some((mantissa, exp)) = text.split_once('e')
        && let Ok(e) = exp.parse::<i32>()
        && mantissa
            .trim_start_matches(['-', '<', ' '])
            .chars()
            .all(|c| c.is_ascii_digit() || c == '.')
    {
        let sign = if e < 0 { "\u{2212}" } else { "" };
        let mantissa = super::escape::html(mantissa);
        if mantissa.trim_start_matches("&lt; ") == "1" {
            let prefix = mantissa.strip_suffix('1').unwrap_or("");
            return format!("{prefix}10<sup>{sign}{}</sup>", e.abs());
        }
        return format!("{mantissa}×10<sup>{sign}{}</sup>", e.abs());
    }
    super::escape::html(text)
}

/// A confidence level as a percentage: 0.95 → `95 %`, 0.975 → `97.5 %`.
pub fn level(level: f64) -> String {
    let pct = level * 100.0;
    let text = if (pct - pct.round()).abs() < 1e-9 {
        format!("{}", pct.round() as i64)
    } else {
        let t = format!("{pct:.2}");
        t.trim_end_matches('0').trim_end_matches('.').to_string()
    };
    format!("{text}\u{a0}%")
}

/// Round tick values covering `[lo, hi]`, about `target` of them, and
/// their step: steps are 1, 2 or 5 times a power of ten, at least
/// `min_step` (1 for integer axes such as fit versions).
pub fn nice_ticks(lo: f64, hi: f64, target: usize, min_step: f64) -> (Vec<f64>, f64) {
    if !(lo.is_finite() && hi.is_finite()) || hi < lo {
        return (Vec::new(), 1.0);
    }
    let span = hi - lo;
    let raw = if span > 0.0 {
        span / target.max(1) as f64
    } else {
        lo.abs().max(1.0) / 10.0
    };
    let power = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * power)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * power)
        .max(min_step);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    let ticks = (first..=last.max(first - 1))
        .take(1000)
        .map(|k| {
            let v = k as f64 * step;
            // -0 prints as "-0".
            if v == 0.0 { 0.0 } else { v }
        })
        .collect();
    (ticks, step)
}

/// A tick label with the decimals the step needs (0.25 → two, 0.5 →
/// one), the same for every tick of an axis.
pub fn tick_label(v: f64, step: f64) -> String {
    let a = v.abs();
    if a != 0.0 && !(1e-4..1e7).contains(&a) {
        return format!("{v:.1e}");
    }
    let places = (0..10)
        .find(|d| {
            let scaled = step * 10f64.powi(*d);
            (scaled - scaled.round()).abs() < 1e-6 * scaled.abs().max(1.0)
        })
        .unwrap_or(10) as usize;
    let text = format!("{v:.places$}");
    if text
        .trim_start_matches('-')
        .trim_matches(['0', '.'])
        .is_empty()
    {
        return "0".into();
    }
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn significant_digits_plain_in_the_readable_range() {
        assert_eq!(sig(0.20476190476190487, 4), "0.2048");
        assert_eq!(sig(-0.19523809523809496, 4), "-0.1952");
        assert_eq!(sig(3.020779220779221, 4), "3.021");
        assert_eq!(sig(-433.31353383458594, 4), "-433.3");
        assert_eq!(sig(123_456.7, 4), "123457");
        assert_eq!(sig(0.001234567, 4), "0.001235");
        assert_eq!(sig(0.0, 4), "0");
        // Rounding that carries into the next power of ten.
        assert_eq!(sig(9.9996, 4), "10.00");
        assert_eq!(sig(-0.000_000_1, 4), "-1.000e-7");
    }

    #[test]
    fn trimmed_drops_trailing_zeros_only() {
        assert_eq!(trimmed(75.0, 6), "75");
        assert_eq!(trimmed(2012.375, 6), "2012.38");
        assert_eq!(trimmed(4.0, 4), "4");
        assert_eq!(trimmed(100.0, 4), "100");
        assert_eq!(trimmed(-3e-5, 4), "-3.000e-5");
    }

    #[test]
    fn scientific_outside_the_readable_range() {
        assert_eq!(sig(-3e-5, 4), "-3.000e-5");
        assert_eq!(sig(2.5e7, 3), "2.50e7");
        assert_eq!(sig(f64::NAN, 4), "—");
    }

    #[test]
    fn p_values_go_scientific_below_a_thousandth() {
        assert_eq!(p_value(0.07748981795171085), "0.0775");
        assert_eq!(p_value(0.5), "0.500");
        assert_eq!(p_value(0.001), "0.00100");
        assert_eq!(p_value(5.724091541124749e-6), "5.7e-6");
        assert_eq!(p_value(0.0), "< 1e-300");
        assert_eq!(opt_p(None), "—");
    }

    #[test]
    fn html_numbers_use_a_superscript_exponent() {
        assert_eq!(html_number("5.7e-6"), "5.7×10<sup>\u{2212}6</sup>");
        assert_eq!(html_number("2.50e7"), "2.50×10<sup>7</sup>");
        assert_eq!(html_number("0.2048"), "0.2048");
        assert_eq!(html_number("< 1e-300"), "&lt; 10<sup>\u{2212}300</sup>");
        // Text that merely contains an e is left alone.
        assert_eq!(html_number("none"), "none");
    }

    #[test]
    fn levels_print_as_percentages() {
        assert_eq!(level(0.95), "95\u{a0}%");
        assert_eq!(level(0.975), "97.5\u{a0}%");
        assert_eq!(level(0.9), "90\u{a0}%");
    }

    #[test]
    fn ticks_are_round_and_inside_the_range() {
        let (t, step) = nice_ticks(2009.8, 2015.2, 6, 0.0);
        assert_eq!(step, 1.0);
        assert_eq!(t, vec![2010.0, 2011.0, 2012.0, 2013.0, 2014.0, 2015.0]);
        let (t, step) = nice_ticks(-0.37, 6.41, 6, 0.0);
        assert_eq!(step, 2.0);
        assert_eq!(t, vec![0.0, 2.0, 4.0, 6.0]);
        let (t, step) = nice_ticks(0.5, 3.5, 6, 1.0);
        assert_eq!(step, 1.0);
        assert_eq!(t, vec![1.0, 2.0, 3.0]);
        let (t, _) = nice_ticks(1.0, 1.0, 6, 0.0);
        assert_eq!(t, vec![1.0]);
        assert!(nice_ticks(f64::NAN, 1.0, 6, 0.0).0.is_empty());
    }

    #[test]
    fn tick_labels_carry_the_decimals_of_the_step() {
        assert_eq!(tick_label(2012.0, 1.0), "2012");
        assert_eq!(tick_label(2012.5, 0.5), "2012.5");
        assert_eq!(tick_label(0.25, 0.05), "0.25");
        assert_eq!(tick_label(0.3, 0.05), "0.30");
        assert_eq!(tick_label(-0.0, 0.1), "0");
        assert_eq!(tick_label(0.00002, 0.00001), "2.0e-5");
    }
}
