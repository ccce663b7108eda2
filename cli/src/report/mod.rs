//! The comparison report: one data model written three ways (HTML with SVG plots, JSON, CSV), so every
//! number appears identically in each.

pub mod html;
pub mod plots;

use crate::compare::loudness::MatchReport;
use serde::Serialize;

/// Safety cautions carried by every report (BRIEF section 8).
pub const SAFETY: &str = "Valve amplifiers run at several hundred volts and their filter capacitors stay \
charged after power-off; the numbers this tool prints are a simulation, not a measurement of a live chassis. \
Work on a live amp only with the training to do so; drain and verify capacitors; follow local electrical \
codes; when in doubt, have a qualified technician do the work. Check part voltage and power ratings against \
the values the tool reports with margin.";

/// The whole report.
#[derive(Clone, Debug, Serialize)]
pub struct Report {
    pub tool: String,
    pub plan: String,
    pub circuit: String,
    pub target_lufs: f64,
    pub true_peak_ceiling_dbtp: f64,
    pub loudness_method: String,
    /// Peak volts at the input jack for a 0 dBFS sample.
    pub input_volts_at_full_scale: f64,
    pub tone: ToneSetup,
    /// Pair current at which the clamp thresholds are read (A).
    pub threshold_current_amps: f64,
    /// Pair current above which a sample counts as clamped (A).
    pub clamped_current_amps: f64,
    pub variants: Vec<VariantInfo>,
    pub di: Vec<DiInfo>,
    pub safety: String,
}

/// How the THD readout is taken.
#[derive(Clone, Debug, Serialize)]
pub struct ToneSetup {
    pub frequency_hz: f64,
    pub peak_volts_at_jack: f64,
    pub sample_rate: f64,
    pub seconds: f64,
    pub analysed_seconds: f64,
    /// Highest harmonic counted (harmonics 2..=this).
    pub highest_harmonic: usize,
    pub band_hz: f64,
    pub method: String,
}

/// One variant: its parts, settings and the test-tone readout.
#[derive(Clone, Debug, Serialize)]
pub struct VariantInfo {
    pub name: String,
    pub parts: String,
    pub gain: f64,
    pub level: f64,
    pub quality: usize,
    /// Clamp thresholds at `threshold_current_amps` (V); `None` when the position holds no parts.
    pub threshold_positive_volts: Option<f64>,
    pub threshold_negative_volts: Option<f64>,
    pub positive_part: Option<PartInfo>,
    pub negative_part: Option<PartInfo>,
    pub tone: ToneResult,
}

/// A Zener of a variant.
#[derive(Clone, Debug, Serialize)]
pub struct PartInfo {
    pub volts: f64,
    /// 1N47xxA part number when the voltage is a row of the family table.
    pub part_number: Option<String>,
    pub rating_watts: f64,
}

/// THD_F of the 1 kHz test tone at the wiper.
#[derive(Clone, Debug, Serialize)]
pub struct ToneResult {
    pub thd_f_percent: f64,
    pub highest_harmonic: usize,
    pub band_hz: f64,
    /// Share of harmonic energy in even harmonics (%); 50 = balanced.
    pub even_share_percent: f64,
    pub fundamental_wiper_volts: f64,
    /// Harmonics 1..=highest relative to the fundamental (dB).
    pub harmonics_db: Vec<f64>,
    pub clamp_peak_positive_volts: f64,
    pub clamp_peak_negative_volts: f64,
}

/// One DI file and its results per variant.
#[derive(Clone, Debug, Serialize)]
pub struct DiInfo {
    pub name: String,
    pub file: String,
    pub seconds: f64,
    pub sample_rate: u32,
    pub channels: usize,
    pub input_peak_volts: f64,
    /// Loudest 20 ms of the input: where the scope plots look (s from the start, channel).
    pub scope_start_seconds: f64,
    pub scope_seconds: f64,
    pub scope_channel: usize,
    pub results: Vec<DiResult>,
    pub ab_clip: String,
    pub ab_key: Vec<AbSegment>,
}

/// One DI through one variant.
#[derive(Clone, Debug, Serialize)]
pub struct DiResult {
    pub variant: String,
    pub clamp_peak_positive_volts: f64,
    pub clamp_peak_negative_volts: f64,
    pub clamp_peak_to_peak_volts: f64,
    pub share_clamped_percent: f64,
    /// Crest factor of the listening output before matching (dB).
    pub crest_factor_db: f64,
    pub matching: MatchReport,
    pub zener: Option<ZenerLoad>,
    pub matched_file: String,
    pub unmatched_file: String,
    /// Clamp node volts over the scope window (not written to JSON/CSV; plotted).
    #[serde(skip)]
    pub scope: Vec<f32>,
}

/// What the Zeners see on this DI.
#[derive(Clone, Debug, Serialize)]
pub struct ZenerLoad {
    pub peak_current_ma: f64,
    pub rms_current_ma: f64,
    pub positive: Option<PartLoad>,
    pub negative: Option<PartLoad>,
}

/// Dissipation of one part against its rating.
#[derive(Clone, Debug, Serialize)]
pub struct PartLoad {
    pub average_watts: f64,
    pub peak_watts: f64,
    pub rating_watts: f64,
    /// Average dissipation as a share of the rating (%).
    pub average_share_of_rating_percent: f64,
}

/// One segment of an A/B clip.
#[derive(Clone, Debug, Serialize)]
pub struct AbSegment {
    pub index: usize,
    pub variant: String,
    /// Audible span, seconds from the start of the clip.
    pub start_seconds: f64,
    pub end_seconds: f64,
}

fn opt(v: Option<f64>, digits: usize) -> String {
    v.map(|x| format!("{x:.digits$}")).unwrap_or_default()
}

fn num(x: f64, digits: usize) -> String {
    if x.is_finite() {
        format!("{x:.digits$}")
    } else {
        String::new()
    }
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

impl Report {
    pub fn variant(&self, name: &str) -> Option<&VariantInfo> {
        self.variants.iter().find(|v| v.name == name)
    }

    /// JSON text.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
    }

    /// CSV text: one row per DI and variant, every number of the report.
    pub fn to_csv(&self) -> String {
        let header = [
            "di",
            "variant",
            "parts",
            "gain",
            "level",
            "quality",
            "threshold_positive_V",
            "threshold_negative_V",
            "clamp_peak_positive_V",
            "clamp_peak_negative_V",
            "clamp_peak_to_peak_V",
            "share_clamped_percent",
            "loudness_before_LUFS",
            "true_peak_before_dBTP",
            "crest_factor_dB",
            "match_gain_dB",
            "limited",
            "limiter_max_reduction_dB",
            "loudness_after_LUFS",
            "true_peak_after_dBTP",
            "thd_f_percent",
            "thd_highest_harmonic",
            "thd_band_Hz",
            "even_share_percent",
            "zener_peak_current_mA",
            "zener_rms_current_mA",
            "positive_average_W",
            "positive_peak_W",
            "negative_average_W",
            "negative_peak_W",
            "rating_W",
            "matched_file",
            "unmatched_file",
        ];
        let mut out = header.join(",");
        out.push('\n');
        for di in &self.di {
            for r in &di.results {
                let Some(v) = self.variant(&r.variant) else {
                    continue;
                };
                let z = r.zener.as_ref();
                let part = |p: Option<&PartLoad>, peak: bool| {
                    p.map(|p| num(if peak { p.peak_watts } else { p.average_watts }, 6))
                        .unwrap_or_default()
                };
                let rating = z
                    .and_then(|z| z.positive.as_ref().or(z.negative.as_ref()))
                    .map(|p| num(p.rating_watts, 2))
                    .unwrap_or_default();
                let m = &r.matching;
                let row = [
                    csv_field(&di.name),
                    csv_field(&v.name),
                    csv_field(&v.parts),
                    num(v.gain, 3),
                    num(v.level, 3),
                    v.quality.to_string(),
                    opt(v.threshold_positive_volts, 3),
                    opt(v.threshold_negative_volts, 3),
                    num(r.clamp_peak_positive_volts, 3),
                    num(r.clamp_peak_negative_volts, 3),
                    num(r.clamp_peak_to_peak_volts, 3),
                    num(r.share_clamped_percent, 3),
                    num(m.loudness_before_lufs, 2),
                    num(m.true_peak_before_dbtp, 2),
                    num(r.crest_factor_db, 2),
                    num(m.gain_db, 2),
                    m.limited.to_string(),
                    num(m.limiter_max_reduction_db, 2),
                    num(m.loudness_after_lufs, 2),
                    num(m.true_peak_after_dbtp, 2),
                    num(v.tone.thd_f_percent, 3),
                    v.tone.highest_harmonic.to_string(),
                    num(v.tone.band_hz, 0),
                    num(v.tone.even_share_percent, 2),
                    z.map(|z| num(z.peak_current_ma, 4)).unwrap_or_default(),
                    z.map(|z| num(z.rms_current_ma, 4)).unwrap_or_default(),
                    part(z.and_then(|z| z.positive.as_ref()), false),
                    part(z.and_then(|z| z.positive.as_ref()), true),
                    part(z.and_then(|z| z.negative.as_ref()), false),
                    part(z.and_then(|z| z.negative.as_ref()), true),
                    rating,
                    csv_field(&r.matched_file),
                    csv_field(&r.unmatched_file),
                ];
                out.push_str(&row.join(","));
                out.push('\n');
            }
        }
        out
    }
}
