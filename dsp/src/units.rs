//! Numbers as a builder reads them: SI prefixes, a few significant digits, and text cut to a readable length.
//! One place for the whole project (messages, the report, the editor), so "1 pF" never prints as "0 nF".

/// `value` with an SI prefix and `unit`, about four significant digits: 4.7e3 ohm -> "4.7 kohm",
/// 1e-12 F -> "1 pF", 0 -> "0 ohm". Values beyond the prefixes (or not finite) print in exponent form.
pub fn si(value: f64, unit: &str) -> String {
    if value == 0.0 {
        return format!("0 {unit}");
    }
    if !value.is_finite() {
        return format!("{value} {unit}");
    }
    const PREFIXES: [(f64, &str); 9] = [
        (1e9, "G"),
        (1e6, "M"),
        (1e3, "k"),
        (1.0, ""),
        (1e-3, "m"),
        (1e-6, "u"),
        (1e-9, "n"),
        (1e-12, "p"),
        (1e-15, "f"),
    ];
    let magnitude = value.abs();
    if !(1e-15..1e12).contains(&magnitude) {
        return format!("{value:.3e} {unit}");
    }
    let (scale, prefix) = PREFIXES
        .iter()
        .copied()
        .find(|(scale, _)| magnitude >= *scale * 0.99995)
        .unwrap_or(PREFIXES[PREFIXES.len() - 1]);
    format!("{} {prefix}{unit}", significant(value / scale, 4))
}

/// `value` with at most `digits` significant digits, trailing zeros dropped (1.50 -> "1.5", 1e308 -> "1.000e308").
pub fn significant(value: f64, digits: usize) -> String {
    if value == 0.0 || !value.is_finite() {
        return format!("{value}");
    }
    let magnitude = value.abs().log10().floor() as i32;
    if !(-6..=9).contains(&magnitude) {
        return format!("{value:.*e}", digits.saturating_sub(1));
    }
    let decimals = (digits as i32 - 1 - magnitude).max(0) as usize;
    let text = format!("{value:.decimals$}");
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    }
}

/// `text` cut to at most `max` characters (with "..." when cut), for echoing user input in a message.
pub fn clip(text: &str, max: usize) -> String {
    if text.chars().count() <= max {
        text.to_string()
    } else {
        let head: String = text.chars().take(max.saturating_sub(3)).collect();
        format!("{head}...")
    }
}

/// Decibels of an amplitude ratio; -inf for 0 and below.
pub fn gain_to_db(gain: f64) -> f64 {
    if gain > 0.0 {
        20.0 * gain.log10()
    } else {
        f64::NEG_INFINITY
    }
}

/// Amplitude ratio of `db` decibels; a non-finite `db` gives 1 (no change).
pub fn db_to_gain(db: f64) -> f64 {
    if db.is_finite() {
        10f64.powf(db / 20.0)
    } else {
        1.0
    }
}

/// Peak volts of a sine at `dbu` (0 dBu = 0.775 V rms, the dBu definition: sqrt(0.6) V).
pub fn dbu_to_peak_volts(dbu: f64) -> f64 {
    0.6f64.sqrt() * 10f64.powf(dbu / 20.0) * std::f64::consts::SQRT_2
}

/// dBu of a sine with `peak_volts` peak (inverse of `dbu_to_peak_volts`).
pub fn peak_volts_to_dbu(peak_volts: f64) -> f64 {
    20.0 * (peak_volts / std::f64::consts::SQRT_2 / 0.6f64.sqrt()).log10()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn prefixes_and_digits() {
        assert_eq!(si(1e-12, "F"), "1 pF");
        assert_eq!(si(22e-9, "F"), "22 nF");
        assert_eq!(si(4.7e3, "ohm"), "4.7 kohm");
        assert_eq!(si(0.0, "ohm"), "0 ohm");
        assert_eq!(si(1e6, "ohm"), "1 Mohm");
        assert_eq!(si(-0.25, "V"), "-250 mV");
        assert_eq!(si(1e308, "V"), "1.000e308 V");
        assert_eq!(significant(1e308, 4), "1.000e308");
        assert_eq!(clip(&"x".repeat(100), 10), "xxxxxxx...");
    }

    /// 0 dBu is 0.775 V rms by definition (0.6^0.5 V: 1 mW into 600 ohm), so +4 dBu is 1.228 V rms, 1.736 V
    /// peak (values from the definition).
    #[test]
    fn dbu_definition() {
        assert!((dbu_to_peak_volts(0.0) - 0.7746 * 2f64.sqrt()).abs() < 1e-3);
        assert!((dbu_to_peak_volts(4.0) - 1.736).abs() < 1e-3);
        assert!((peak_volts_to_dbu(dbu_to_peak_volts(18.0)) - 18.0).abs() < 1e-12);
    }
}
