//! The HTML report: one self-contained page (inline CSS and SVG) that opens in any browser.

// Rows are written as format strings ending in a line break, which reads better than writeln! here.
#![allow(clippy::write_with_newline)]

use super::plots::{self, Span, Trace};
use super::{columns, Cell, Column, DiInfo, Report, Row, Table, SAFETY};
use breakdown_dsp::units::si;
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

/// A cell as HTML.
fn cell_html(c: &Cell) -> String {
    match c {
        Cell::Number(x, d) => f(*x, (*d).min(3)),
        Cell::Silent => "<span class=\"warn\">silent</span>".into(),
        Cell::Text(t) if t.starts_with("yes") => format!("<span class=\"warn\">{}</span>", esc(t)),
        Cell::Text(t) if t.starts_with("silent") => {
            format!("<span class=\"warn\">{}</span>", esc(t))
        }
        Cell::Text(t) if t.ends_with("over the rating") => {
            format!("<span class=\"warn\">{}</span>", esc(t))
        }
        Cell::Text(t) => esc(t),
        Cell::None => "none".into(),
    }
}

/// One table of the report from the shared column list: `rows` in order, the first column left-aligned.
fn table(h: &mut String, which: Table, rows: &[Row], first: Option<&dyn Fn(&Row) -> String>) {
    let cols: Vec<Column> = columns().into_iter().filter(|c| c.table == which).collect();
    h.push_str("<table><tr>");
    if first.is_some() {
        h.push_str("<th class=\"l\">variant</th>");
    }
    for c in &cols {
        let _ = write!(h, "<th>{}</th>", c.html);
    }
    h.push_str("</tr>\n");
    for r in rows {
        h.push_str("<tr>");
        if let Some(first) = first {
            let _ = write!(h, "<td class=\"l\">{}</td>", first(r));
        }
        for c in &cols {
            let v = (c.value)(r);
            let class = if matches!(v, Cell::Text(_)) {
                " class=\"l\""
            } else {
                ""
            };
            let _ = write!(h, "<td{class}>{}</td>", cell_html(&v));
        }
        h.push_str("</tr>\n");
    }
    h.push_str("</table>\n");
}

fn head(h: &mut String, report: &Report) {
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <title>Breakdown comparison report</title><style>{STYLE}</style></head><body>\n"
    );
    let _ = write!(
        h,
        "<h1>Breakdown comparison report</h1>\n<p class=\"meta\">{} &middot; plan <code>{}</code> &middot; circuit: {} \
         &middot; clips heard at: {} &middot; input calibration {} peak at the jack for 0 dBFS (0 dBFS = {:+.1} dBu), from {}</p>\n",
        esc(&report.tool),
        esc(&report.plan),
        esc(&report.circuit),
        esc(&report.listening),
        esc(&si(report.input_volts_at_full_scale, "V")),
        report.input_dbu_at_full_scale,
        esc(&report.input_calibration_source)
    );
    let _ = write!(
        h,
        "<div class=\"safety\"><b>Safety.</b> {}</div>\n",
        esc(SAFETY)
    );
}

fn variants_section(h: &mut String, report: &Report) {
    let _ = write!(
        h,
        "<h2>Variants</h2>\n<p class=\"note\">Vz: a part's Zener voltage. \"Conducts at\": the clamp node voltage \
         at which the pair passes {} each way (from the fitted Zener model).</p>\n",
        esc(&si(report.threshold_current_amps, "A"))
    );
    let rows: Vec<Row> = report
        .variants
        .iter()
        .map(|v| Row {
            variant: v,
            di: None,
        })
        .collect();
    let swatch = |r: &Row| {
        let i = report
            .variants
            .iter()
            .position(|v| v.name == r.variant.name)
            .unwrap_or(0);
        format!(
            "<span class=\"swatch\" style=\"background:{}\"></span>{}",
            plots::css_colour(i),
            esc(&r.variant.name)
        )
    };
    // The variants table names the variant itself (its first column is the variant).
    let cols: Vec<Column> = columns()
        .into_iter()
        .filter(|c| c.table == Table::Variants && c.csv != "variant")
        .collect();
    h.push_str("<table><tr><th class=\"l\">variant</th>");
    for c in &cols {
        let _ = write!(h, "<th>{}</th>", c.html);
    }
    h.push_str("</tr>\n");
    for r in &rows {
        let _ = write!(h, "<tr><td class=\"l\">{}</td>", swatch(r));
        for c in &cols {
            let v = (c.value)(r);
            let class = if matches!(v, Cell::Text(_)) {
                " class=\"l\""
            } else {
                ""
            };
            let _ = write!(h, "<td{class}>{}</td>", cell_html(&v));
        }
        h.push_str("</tr>\n");
    }
    h.push_str("</table>\n");
}

fn preamp_section(h: &mut String, report: &Report) {
    for parts in &report.preamp_parts {
        if report.preamp_parts.len() > 1 {
            let _ = write!(
                h,
                "<h2>Preamp parts: {}</h2>\n",
                esc(&parts.variants.join(", "))
            );
        } else {
            h.push_str("<h2>Preamp parts</h2>\n");
        }
        h.push_str(
            "<p class=\"note\">Each stage before the gain stage by its circuit-file keys, in signal order from the \
             input jack (SI units), as <code>breakdown parts</code> lists them.</p>\n",
        );
        if parts.stages.is_empty() {
            h.push_str("<p class=\"note\">No preamp stages before the gain stage.</p>\n");
        } else {
            h.push_str("<table><tr><th class=\"l\">part</th><th class=\"l\">value</th></tr>\n");
            for p in &parts.stages {
                let _ = write!(
                    h,
                    "<tr><td class=\"l\">{}</td><td class=\"l\">{}</td></tr>\n",
                    esc(&p.item),
                    esc(&p.value)
                );
            }
            h.push_str("</table>\n");
        }
        let _ = write!(
            h,
            "<p class=\"note\">Each valve at the idle operating point (no signal) against its type's maximum ratings \
             per triode section (from memory of the datasheets); {}.</p>\n\
             <table><tr><th class=\"l\">valve</th><th class=\"l\">type</th><th class=\"l\">idle load</th>\
             <th class=\"l\">rating and verdict</th></tr>\n",
            esc(&crate::analysis::ratings::margin_legend())
        );
        for v in &parts.valves {
            let warn = v.dissipation_state != "ok" || v.plate_volts_over_rating;
            let _ = write!(
                h,
                "<tr><td class=\"l\">{}</td><td class=\"l\">{}</td><td class=\"l\">{}</td><td class=\"l\">{}</td></tr>\n",
                esc(&v.item),
                esc(&v.tube),
                esc(&v.idle),
                if warn {
                    format!("<span class=\"warn\">{}</span>", esc(&v.rating))
                } else {
                    esc(&v.rating)
                }
            );
        }
        h.push_str("</table>\n");
    }
    if !report.preamp_parts.is_empty() {
        let _ = write!(
            h,
            "<div class=\"safety\"><b>Safety.</b> {}</div>\n",
            esc(SAFETY)
        );
    }
}

fn tone_section(h: &mut String, report: &Report) -> Result<(), String> {
    let t = &report.tone;
    // THD_F is explained here, where the reader first meets it.
    let _ = write!(
        h,
        "<h2>Test tone: {} Hz at {} peak at the jack</h2>\n<p class=\"note\">{}</p>\n",
        f(t.frequency_hz, 0),
        esc(&si(t.peak_volts_at_jack, "V")),
        esc(&t.method)
    );
    let rows: Vec<Row> = report
        .variants
        .iter()
        .map(|v| Row {
            variant: v,
            di: None,
        })
        .collect();
    table(h, Table::Tone, &rows, Some(&|r: &Row| esc(&r.variant.name)));
    let series: Vec<(&str, usize, &[f64])> = report
        .variants
        .iter()
        .enumerate()
        .map(|(i, v)| (v.name.as_str(), i, v.tone.harmonics_db.as_slice()))
        .collect();
    h.push_str(&plots::harmonics(
        "Test-tone harmonics at the wiper (1 to 10)",
        &series,
    )?);
    Ok(())
}

fn di_rows<'a>(report: &'a Report, di: &'a DiInfo) -> Vec<Row<'a>> {
    di.results
        .iter()
        .filter_map(|r| {
            report.variant(&r.variant).map(|v| Row {
                variant: v,
                di: Some((di, r)),
            })
        })
        .collect()
}

fn clips_list(h: &mut String, di: &DiInfo) {
    h.push_str("<p class=\"note\">Loudness-matched clips (the unmatched renders are in <code>unmatched/</code>):</p>\n<table>");
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
}

fn scopes_section(h: &mut String, report: &Report, di: &DiInfo) -> Result<(), String> {
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
            "Clamp level on {} (bars: the node's peaks; dashes: where the pair conducts {})",
            di.name,
            si(report.threshold_current_amps, "A")
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
    Ok(())
}

fn ab_section(h: &mut String, di: &DiInfo) {
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

fn di_section(h: &mut String, report: &Report, di: &DiInfo) -> Result<(), String> {
    let _ = write!(
        h,
        "<h2>DI: {}</h2>\n<p class=\"meta\">{} &middot; {} s &middot; {} Hz &middot; {} channel(s) &middot; input peak {} at the jack</p>\n",
        esc(&di.name),
        esc(&di.file),
        f(di.seconds, 1),
        di.sample_rate,
        di.channels,
        esc(&si(di.input_peak_volts, "V"))
    );
    let rows = di_rows(report, di);
    let name = |r: &Row| esc(&r.variant.name);
    table(h, Table::Di, &rows, Some(&name));
    clips_list(h, di);
    scopes_section(h, report, di)?;
    let _ = write!(
        h,
        "<h3>What the Zeners see on this DI</h3>\n<p class=\"note\">{}; the average power sets a glass Zener's \
         temperature.</p>\n",
        esc(&crate::analysis::ratings::margin_legend())
    );
    table(h, Table::Zener, &rows, Some(&name));
    ab_section(h, di);
    Ok(())
}

fn method_section(h: &mut String, report: &Report) {
    let _ = write!(
        h,
        "<h2>How these numbers are made</h2>\n<ul class=\"note\">\
         <li>Loudness: {}. Matched clips are set to {} LUFS integrated; true-peak limiting (look-ahead, linked channels) \
         runs only when a matched clip would exceed {} dBTP, and the tables say when it did. A silent clip reads \
         \"silent\" and is not matched.</li>\
         <li>Conducts at: the clamp node voltage at which the pair passes {} each way, from the fitted Zener model.</li>\
         <li>Clamp level: the clamp node's peak volts on the DI. Time clamped: share of internal samples with more than \
         {} through the pair. Peaks and dissipation come from the model at its internal (oversampled) rate.</li>\
         <li>THD<sub>F</sub>: see the test tone section.</li>\
         <li>Crest factor: peak over RMS of the listening output before matching.</li>\
         <li>Same numbers: <a href=\"report.json\">report.json</a>, <a href=\"report.csv\">report.csv</a>.</li></ul>\n",
        esc(&report.loudness_method),
        f(report.target_lufs, 1),
        f(report.true_peak_ceiling_dbtp, 1),
        esc(&si(report.threshold_current_amps, "A")),
        esc(&si(report.clamped_current_amps, "A"))
    );
}

/// Render the whole report page.
pub fn render(report: &Report) -> Result<String, String> {
    let mut h = String::new();
    head(&mut h, report);
    variants_section(&mut h, report);
    preamp_section(&mut h, report);
    tone_section(&mut h, report)?;
    for di in &report.di {
        di_section(&mut h, report, di)?;
    }
    method_section(&mut h, report);
    let _ = write!(
        h,
        "<div class=\"safety\"><b>Safety.</b> {}</div>\n</body></html>\n",
        esc(SAFETY)
    );
    Ok(h)
}
