//! The HTML report: one self-contained page (inline CSS and SVG) that opens in any browser.

// Rows are written as format strings ending in a line break, which reads better than writeln! here.
#![allow(clippy::write_with_newline)]

use super::plots::{self, Span, Trace};
use super::{Report, SAFETY};
use std::fmt::Write;

/// Escape text for HTML.
pub fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn f(x: f64, digits: usize) -> String {
    if x.is_finite() {
        format!("{x:.digits$}")
    } else if x.is_nan() {
        "n/a".into()
    } else if x < 0.0 {
        "-inf".into()
    } else {
        "inf".into()
    }
}

fn fo(x: Option<f64>, digits: usize, unit: &str) -> String {
    match x {
        Some(v) => format!("{}{unit}", f(v, digits)),
        None => "none".into(),
    }
}

/// Power with a unit that keeps three significant figures.
fn watts(w: f64) -> String {
    let a = w.abs();
    if !a.is_finite() {
        return f(w, 3);
    }
    let (scale, unit) = if a >= 1.0 {
        (1.0, "W")
    } else if a >= 1e-3 {
        (1e3, "mW")
    } else if a >= 1e-6 {
        (1e6, "&micro;W")
    } else if a > 0.0 {
        (1e9, "nW")
    } else {
        return "0 W".into();
    };
    let v = w * scale;
    let digits = if v.abs() >= 100.0 {
        0
    } else if v.abs() >= 10.0 {
        1
    } else {
        2
    };
    format!("{v:.digits$} {unit}")
}

/// A percentage small or large, with sensible digits.
fn share(percent: f64) -> String {
    if percent == 0.0 {
        "0%".into()
    } else if percent < 0.01 {
        format!("{percent:.1e}%")
    } else {
        format!("{percent:.2}%")
    }
}

fn time(seconds: f64) -> String {
    let m = (seconds / 60.0).floor();
    format!("{}:{:06.3}", m as u64, seconds - 60.0 * m)
}

const STYLE: &str = r#"
body { font-family: "DejaVu Sans", Arial, Helvetica, sans-serif; margin: 0 auto; max-width: 1100px; padding: 16px 28px;
       color: #1d1d1d; background: #fafaf7; }
h1 { font-size: 26px; margin-bottom: 4px; }
h2 { font-size: 20px; margin-top: 30px; border-bottom: 2px solid #ccc; padding-bottom: 4px; }
h3 { font-size: 16px; margin-top: 20px; }
.meta { color: #555; font-size: 14px; }
.safety { border: 3px solid #c62828; background: #fff3f0; padding: 10px 16px; margin: 14px 0; font-size: 14px; }
.safety b { color: #b71c1c; }
table { border-collapse: collapse; margin: 8px 0 14px; font-size: 13px; }
th, td { border: 1px solid #c8c8c8; padding: 4px 7px; text-align: right; }
th { background: #ecece6; }
td.l, th.l { text-align: left; }
.swatch { display: inline-block; width: 12px; height: 12px; margin-right: 6px; vertical-align: -1px; }
.warn { color: #b71c1c; font-weight: bold; }
.ok { color: #2e7d32; }
.scopes { display: flex; flex-wrap: wrap; gap: 8px; }
.note { font-size: 13px; color: #444; }
svg { max-width: 100%; height: auto; }
audio { vertical-align: middle; height: 30px; }
"#;

/// Render the whole report page.
pub fn render(report: &Report) -> Result<String, String> {
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <title>Breakdown comparison report</title><style>{STYLE}</style></head><body>\n"
    );
    let _ = write!(
        h,
        "<h1>Breakdown comparison report</h1>\n<p class=\"meta\">{} &middot; plan <code>{}</code> &middot; circuit: {} \
         &middot; input calibration {} V peak at the jack for 0 dBFS</p>\n",
        esc(&report.tool),
        esc(&report.plan),
        esc(&report.circuit),
        f(report.input_volts_at_full_scale, 3)
    );
    let _ = write!(
        h,
        "<div class=\"safety\"><b>Safety.</b> {}</div>\n",
        esc(SAFETY)
    );

    // Variants.
    let _ = write!(
        h,
        "<h2>Variants</h2>\n<table><tr><th class=\"l\">variant</th><th class=\"l\">parts</th><th>gain</th>\
         <th>level</th><th>oversampling</th><th>clamp + at {ma} mA (V)</th><th>clamp &minus; at {ma} mA (V)</th></tr>\n",
        ma = f(report.threshold_current_amps * 1e3, 1)
    );
    for (i, v) in report.variants.iter().enumerate() {
        let _ = write!(
            h,
            "<tr><td class=\"l\"><span class=\"swatch\" style=\"background:{}\"></span>{}</td><td class=\"l\">{}</td>\
             <td>{}</td><td>{}</td><td>{}x</td><td>{}</td><td>{}</td></tr>\n",
            plots::css_colour(i),
            esc(&v.name),
            esc(&v.parts),
            f(v.gain, 2),
            f(v.level, 2),
            v.quality,
            fo(v.threshold_positive_volts, 2, ""),
            fo(v.threshold_negative_volts, 2, "")
        );
    }
    h.push_str("</table>\n");

    // Test tone.
    let t = &report.tone;
    let _ = write!(
        h,
        "<h2>Test tone: {} Hz at {} V peak at the jack</h2>\n<p class=\"note\">{}</p>\n\
         <table><tr><th class=\"l\">variant</th><th>THD<sub>F</sub> (%)</th><th>harmonics counted</th><th>band (Hz)</th>\
         <th>even share (%)</th><th>odd share (%)</th><th>fundamental at wiper (V peak)</th><th>clamp node peak + / &minus; (V)</th></tr>\n",
        f(t.frequency_hz, 0),
        f(t.peak_volts_at_jack, 3),
        esc(&t.method)
    );
    for v in &report.variants {
        let r = &v.tone;
        let _ = write!(
            h,
            "<tr><td class=\"l\">{}</td><td>{}</td><td>2&ndash;{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{} / {}</td></tr>\n",
            esc(&v.name),
            f(r.thd_f_percent, 2),
            r.highest_harmonic,
            f(r.band_hz, 0),
            f(r.even_share_percent, 1),
            f(100.0 - r.even_share_percent, 1),
            f(r.fundamental_wiper_volts, 3),
            f(r.clamp_peak_positive_volts, 2),
            f(r.clamp_peak_negative_volts, 2)
        );
    }
    h.push_str("</table>\n");
    let series: Vec<(&str, usize, &[f64])> = report
        .variants
        .iter()
        .enumerate()
        .map(|(i, v)| (v.name.as_str(), i, v.tone.harmonics_db.as_slice()))
        .collect();
    h.push_str(&plots::harmonics(
        "Test-tone harmonics at the wiper",
        &series,
    )?);

    // Per DI.
    for di in &report.di {
        let _ = write!(
            h,
            "<h2>DI: {}</h2>\n<p class=\"meta\">{} &middot; {} s &middot; {} Hz &middot; {} channel(s) &middot; input peak {} V at the jack</p>\n",
            esc(&di.name),
            esc(&di.file),
            f(di.seconds, 1),
            di.sample_rate,
            di.channels,
            f(di.input_peak_volts, 3)
        );
        let _ = write!(
            h,
            "<table><tr><th class=\"l\">variant</th><th>clamp peak + (V)</th><th>clamp peak &minus; (V)</th>\
             <th>peak-to-peak (V)</th><th>time clamped (%)</th><th>loudness before matching (LUFS)</th>\
             <th>true peak before (dBTP)</th><th>crest factor (dB)</th><th>matching gain (dB)</th><th>true-peak limiting</th>\
             <th>after matching (LUFS / dBTP)</th></tr>\n"
        );
        for r in &di.results {
            let m = &r.matching;
            let limiting = if m.silent {
                "<span class=\"warn\">silent: not matched</span>".to_string()
            } else if m.limited {
                format!(
                    "<span class=\"warn\">yes: {}&nbsp;dB max, {}% of the time</span>",
                    f(m.limiter_max_reduction_db, 1),
                    f(m.limiter_active_share * 100.0, 2)
                )
            } else {
                "<span class=\"ok\">no</span>".into()
            };
            let _ = write!(
                h,
                "<tr><td class=\"l\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>\
                 <td>{}</td><td class=\"l\">{}</td><td>{} / {}</td></tr>\n",
                esc(&r.variant),
                f(r.clamp_peak_positive_volts, 2),
                f(r.clamp_peak_negative_volts, 2),
                f(r.clamp_peak_to_peak_volts, 2),
                f(r.share_clamped_percent, 2),
                f(m.loudness_before_lufs, 1),
                f(m.true_peak_before_dbtp, 1),
                f(r.crest_factor_db, 1),
                f(m.gain_db, 1),
                limiting,
                f(m.loudness_after_lufs, 1),
                f(m.true_peak_after_dbtp, 1)
            );
        }
        h.push_str("</table>\n<p class=\"note\">Loudness-matched clips (the unmatched renders are in <code>unmatched/</code>):</p>\n<table>");
        for r in &di.results {
            let _ = write!(
                h,
                "<tr><td class=\"l\">{}</td><td class=\"l\"><audio controls preload=\"none\" src=\"{}\"></audio></td>\
                 <td class=\"l\"><code>{}</code></td></tr>\n",
                esc(&r.variant),
                esc(&r.matched_file),
                esc(&r.matched_file)
            );
        }
        h.push_str("</table>\n");

        let spans: Vec<Span> = di
            .results
            .iter()
            .enumerate()
            .filter_map(|(i, r)| {
                let v = report.variant(&r.variant)?;
                Some(Span {
                    name: &r.variant,
                    colour: i,
                    negative_peak: r.clamp_peak_negative_volts,
                    positive_peak: r.clamp_peak_positive_volts,
                    thresholds: (v.threshold_positive_volts, v.threshold_negative_volts),
                })
            })
            .collect();
        h.push_str(&plots::spans(
            &format!(
                "Clamp node swing on {} (bars: peaks; dashes: thresholds)",
                di.name
            ),
            &spans,
        )?);

        let rate = di.sample_rate as f64;
        let traces: Vec<Trace> = di
            .results
            .iter()
            .enumerate()
            .map(|(i, r)| Trace {
                name: &r.variant,
                samples: &r.scope,
                colour: i,
            })
            .collect();
        let _ = write!(
            h,
            "<h3>Clamp node on the loudest {} ms (from {} s, channel {})</h3>\n",
            f(di.scope_seconds * 1e3, 0),
            f(di.scope_start_seconds, 3),
            di.scope_channel + 1
        );
        h.push_str(&plots::overlay(
            &format!("All variants overlaid: {}", di.name),
            rate,
            &traces,
        )?);
        let all: Vec<&[f32]> = di.results.iter().map(|r| r.scope.as_slice()).collect();
        let full = plots::shared_scope_range(&all);
        h.push_str("<div class=\"scopes\">\n");
        for r in &di.results {
            let thresholds = report
                .variant(&r.variant)
                .map(|v| (v.threshold_positive_volts, v.threshold_negative_volts))
                .unwrap_or((None, None));
            h.push_str(&plots::scope(
                &format!("{} ({} V/div)", r.variant, f(full / 4.0, 2)),
                rate,
                &r.scope,
                thresholds,
                full,
            )?);
        }
        h.push_str("</div>\n");

        // Zener loads.
        let _ = write!(
            h,
            "<h3>What the Zeners see on this DI</h3>\n<table><tr><th class=\"l\">variant</th><th>peak current (mA)</th>\
             <th>RMS current (mA)</th><th>positive part: average / peak power</th><th>negative part: average / peak power</th>\
             <th>rating (W)</th><th>worst average vs rating</th></tr>\n"
        );
        for r in &di.results {
            match &r.zener {
                None => {
                    let _ = write!(
                        h,
                        "<tr><td class=\"l\">{}</td><td colspan=\"6\" class=\"l\">no parts in this position</td></tr>\n",
                        esc(&r.variant)
                    );
                }
                Some(z) => {
                    let part = |p: &Option<super::PartLoad>| match p {
                        Some(p) => format!("{} / {}", watts(p.average_watts), watts(p.peak_watts)),
                        None => "none".into(),
                    };
                    let rating = z
                        .positive
                        .as_ref()
                        .or(z.negative.as_ref())
                        .map(|p| p.rating_watts)
                        .unwrap_or(0.0);
                    let worst = [&z.positive, &z.negative]
                        .iter()
                        .filter_map(|p| p.as_ref().map(|p| p.average_share_of_rating_percent))
                        .fold(0.0f64, f64::max);
                    let verdict = if worst > 50.0 {
                        format!("<span class=\"warn\">{}% of rating</span>", f(worst, 2))
                    } else {
                        format!("<span class=\"ok\">{} of rating</span>", share(worst))
                    };
                    let _ = write!(
                        h,
                        "<tr><td class=\"l\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>\n",
                        esc(&r.variant),
                        f(z.peak_current_ma, 4),
                        f(z.rms_current_ma, 4),
                        part(&z.positive),
                        part(&z.negative),
                        f(rating, 1),
                        verdict
                    );
                }
            }
        }
        h.push_str("</table>\n");

        // A/B clip.
        let _ = write!(
            h,
            "<h3>Blind A/B clip</h3>\n<p class=\"note\">The clip switches variant every segment, with a short fade \
             and a marker between segments; listen first, note what you hear, then open the key.</p>\n\
             <p><audio controls preload=\"none\" src=\"{}\"></audio> <code>{}</code></p>\n\
             <details><summary>Key: which variant plays when</summary><table><tr><th>segment</th><th>from</th><th>to</th><th class=\"l\">variant</th></tr>\n",
            esc(&di.ab_clip),
            esc(&di.ab_clip)
        );
        for s in &di.ab_key {
            let _ = write!(
                h,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"l\">{}</td></tr>\n",
                s.index + 1,
                time(s.start_seconds),
                time(s.end_seconds),
                esc(&s.variant)
            );
        }
        h.push_str("</table></details>\n");
    }

    let _ = write!(
        h,
        "<h2>How these numbers are made</h2>\n<ul class=\"note\">\
         <li>Loudness: {}. Matched clips are set to {} LUFS integrated; true-peak limiting (look-ahead, linked channels) \
         runs only when a matched clip would exceed {} dBTP, and the tables say when it did.</li>\
         <li>Clamp thresholds: the pair voltage at {} mA each way, from the fitted Zener model (1N47xxA knee data).</li>\
         <li>Time clamped: share of internal samples with more than {} &micro;A through the pair. Peaks and dissipation \
         come from the model at its internal (oversampled) rate.</li>\
         <li>{}</li>\
         <li>Crest factor: peak over RMS of the listening output before matching.</li>\
         <li>Same numbers: <a href=\"report.json\">report.json</a>, <a href=\"report.csv\">report.csv</a>.</li></ul>\n",
        esc(&report.loudness_method),
        f(report.target_lufs, 1),
        f(report.true_peak_ceiling_dbtp, 1),
        f(report.threshold_current_amps * 1e3, 1),
        f(report.clamped_current_amps * 1e6, 0),
        esc(&report.tone.method)
    );
    let _ = write!(
        h,
        "<div class=\"safety\"><b>Safety.</b> {}</div>\n</body></html>\n",
        esc(SAFETY)
    );
    Ok(h)
}
