//! Reading a shared prior vector in the signal's own units, for display.
//!
//! The aggregator treats parameters as opaque named numbers; this module only
//! knows the naming convention the device's layout declares (see
//! `proto/plimsoll/v1/aggregator.proto`, `SignalLayout.param_names`):
//! `mean_z` is a mean in standardised units and every `log_*_var` is the
//! natural log of a variance in standardised units, with `z = (y − centre) / scale`.
//! So, with `c` = reference centre and `s` = reference scale (signal units):
//!
//! ```text
//! population mean   μ0 = c + s · mean_z
//! SD of component    σ = s · exp(log_var / 2)
//! length (days)      ℓ = exp(log_len_days)
//! ```
//!
//! It never builds a model: no kernel, no GP code.

use crate::study::SignalLayout;

/// A signal's shared prior in plain units; `None` where the layout does not
/// carry the parameter.
#[derive(Debug, Clone, PartialEq)]
pub struct PlainPrior {
    pub signal: String,
    /// Population mean μ0 (signal units).
    pub population_mean: Option<f64>,
    /// Between-person SD τ (signal units).
    pub between_sd: Option<f64>,
    /// SD of the slow personal trend (signal units).
    pub trend_sd: Option<f64>,
    /// Trend length scale (days).
    pub trend_len_days: Option<f64>,
    /// SD of the weekly rhythm (signal units).
    pub weekly_sd: Option<f64>,
    /// Day-to-day noise SD (signal units).
    pub noise_sd: Option<f64>,
}

/// Reads `values` (in `layout.param_names` order) in plain units.
pub fn plain_prior(layout: &SignalLayout, values: &[f64]) -> PlainPrior {
    let get = |name: &str| {
        layout
            .param_names
            .iter()
            .position(|n| n == name)
            .and_then(|i| values.get(i).copied())
            .filter(|v| v.is_finite())
    };
    let c = layout.reference_center;
    let s = layout.reference_scale;
    let sd = |name: &str| get(name).map(|log_var| s * (0.5 * log_var).exp());
    PlainPrior {
        signal: layout.signal.clone(),
        population_mean: get("mean_z").map(|m| c + s * m),
        between_sd: sd("log_between_var"),
        trend_sd: sd("log_trend_var"),
        trend_len_days: get("log_trend_len_days").map(f64::exp),
        weekly_sd: sd("log_weekly_var"),
        noise_sd: sd("log_noise_var"),
    }
}

/// Unit of a signal column for display (the suffix convention of the cohort
/// data format: `_bpm`, `_ms`, `_h`, `_c`, `_brpm`, `steps`).
pub fn unit_of(signal: &str) -> &'static str {
    match signal.rsplit('_').next().unwrap_or("") {
        "bpm" => "bpm",
        "ms" => "ms",
        "h" => "h",
        "c" => "°C",
        "brpm" => "breaths/min",
        "steps" => "steps",
        _ => "",
    }
}

/// The smallest value a signal can take, where one exists: counts, durations,
/// rates and HRV cannot go below zero; a skin-temperature *deviation* can.
/// The models are Gaussian on the measured scale, so their bands can reach
/// below it; displays cut bands there and say so.
pub fn floor_of(signal: &str) -> Option<f64> {
    match unit_of(signal) {
        "bpm" | "ms" | "h" | "breaths/min" | "steps" => Some(0.0),
        _ => None,
    }
}

/// Decimal places a value of a signal is shown with, everywhere a person
/// reads one (review pages, device reports, reasons): whole steps, hours and
/// degrees to hundredths, the rest to tenths.
pub fn decimals_of(signal: &str) -> usize {
    match unit_of(signal) {
        "steps" => 0,
        "h" | "°C" => 2,
        _ => 1,
    }
}

/// `1234567` → `"1,234,567"`.
pub fn group_thousands(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// A value of a signal at its precision ([`decimals_of`]), thousands grouped
/// when shown whole ("7,688"); never "-0"; "–" when not finite.
pub fn fmt_signal_value(signal: &str, v: f64) -> String {
    if !v.is_finite() {
        return "–".into();
    }
    let decimals = decimals_of(signal);
    let text = format!("{:.decimals$}", v.abs());
    let (int, frac) = text.split_once('.').unwrap_or((&text, ""));
    let mut out = match int.parse::<u64>() {
        Ok(n) => group_thousands(n),
        Err(_) => int.to_owned(),
    };
    if !frac.is_empty() {
        out.push('.');
        out.push_str(frac);
    }
    if v < 0.0 && out.bytes().any(|b| (b'1'..=b'9').contains(&b)) {
        out.insert(0, '-');
    }
    out
}

/// Plain-language name of a signal column for display.
pub fn label_of(signal: &str) -> String {
    match signal {
        "resting_hr_bpm" => "Resting heart rate".into(),
        "hrv_rmssd_ms" => "Overnight HRV (RMSSD)".into(),
        "sleep_h" => "Sleep duration".into(),
        "skin_temp_delta_c" => "Skin temperature deviation".into(),
        "steps" => "Daily steps".into(),
        "resp_rate_brpm" => "Overnight respiratory rate".into(),
        other => other.replace('_', " "),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_at_the_signals_precision_with_thousands_grouped() {
        assert_eq!(group_thousands(1_234_567), "1,234,567");
        assert_eq!(group_thousands(999), "999");
        assert_eq!(fmt_signal_value("steps", 29481.6), "29,482");
        assert_eq!(fmt_signal_value("steps", -2519.86), "-2,520");
        assert_eq!(fmt_signal_value("hrv_rmssd_ms", 96.54), "96.5");
        assert_eq!(fmt_signal_value("resting_hr_bpm", 1234.56), "1,234.6");
        assert_eq!(fmt_signal_value("sleep_h", 6.987), "6.99");
        assert_eq!(fmt_signal_value("skin_temp_delta_c", -0.001), "0.00");
        assert_eq!(fmt_signal_value("skin_temp_delta_c", -0.26), "-0.26");
        assert_eq!(fmt_signal_value("steps", f64::NAN), "–");
    }

    #[test]
    fn only_the_temperature_deviation_may_go_below_zero() {
        for s in [
            "resting_hr_bpm",
            "hrv_rmssd_ms",
            "sleep_h",
            "steps",
            "resp_rate_brpm",
        ] {
            assert_eq!(floor_of(s), Some(0.0), "{s}");
        }
        assert_eq!(floor_of("skin_temp_delta_c"), None);
    }

    #[test]
    fn reads_plain_units_from_names() {
        // Hand computation: centre 65, scale 10; mean_z 0.5 → 70 bpm;
        // log τ² = ln 0.25 → τ = 0.5 · 10 = 5 bpm; ℓ = exp(ln 14) = 14 days.
        let layout = SignalLayout {
            signal: "resting_hr_bpm".into(),
            param_names: vec![
                "mean_z".into(),
                "log_between_var".into(),
                "log_trend_len_days".into(),
            ],
            reference_center: 65.0,
            reference_scale: 10.0,
            initial: vec![0.0; 3],
        };
        let p = plain_prior(&layout, &[0.5, 0.25f64.ln(), 14f64.ln()]);
        assert!((p.population_mean.unwrap() - 70.0).abs() < 1e-12);
        assert!((p.between_sd.unwrap() - 5.0).abs() < 1e-12);
        assert!((p.trend_len_days.unwrap() - 14.0).abs() < 1e-9);
        assert_eq!(p.noise_sd, None);
        assert_eq!(unit_of("resting_hr_bpm"), "bpm");
        assert_eq!(unit_of("steps"), "steps");
    }
}
