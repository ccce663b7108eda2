//! The comparison report: one data model written three ways (HTML with SVG plots, JSON, CSV), so every
//! number appears identically in each.

pub mod html;
pub mod plots;

use crate::compare::loudness::MatchReport;
use serde::Serialize;

/// Safety cautions carried by every report (docs/model.md section 8).
pub const SAFETY: &str = safety_text!();

/// The whole report.
#[derive(Clone, Debug, Serialize)]
pub struct Report {
    pub tool: String,
    pub plan: String,
    pub circuit: String,
    /// What every clip plays, in words (listening point and cabinet).
    pub listening: String,
    /// The listening point: "chain" or "wiper".
    pub listen: String,
    /// The chain's cabinet: "builtin", "none" or the impulse response's file name.
    pub cabinet: String,
    pub target_lufs: f64,
    pub true_peak_ceiling_dbtp: f64,
    pub loudness_method: String,
    /// Peak volts at the input jack for a 0 dBFS sample.
    pub input_volts_at_full_scale: f64,
    /// The same calibration as "0 dBFS = X dBu" (a full-scale sine; 0 dBu = 0.775 V rms).
    pub input_dbu_at_full_scale: f64,
    /// Where the calibration came from (the command line, the plan or the circuit file).
    pub input_calibration_source: String,
    pub tone: ToneSetup,
    /// Pair current at which the clamp thresholds are read (A).
    pub threshold_current_amps: f64,
    /// Pair current above which a sample counts as clamped (A).
    pub clamped_current_amps: f64,
    pub variants: Vec<VariantInfo>,
    /// The preamp's parts and valves, one entry per distinct circuit the variants use (usually one).
    pub preamp_parts: Vec<PreampParts>,
    pub di: Vec<DiInfo>,
    pub safety: String,
}

/// The preamp of one circuit: each stage's parts by their circuit-file keys and each valve at idle against its
/// ratings, as `breakdown parts` lists them (`crate::analysis::partslist`).
#[derive(Clone, Debug, Serialize)]
pub struct PreampParts {
    /// The variants that use this circuit.
    pub variants: Vec<String>,
    pub stages: Vec<StagePartInfo>,
    pub valves: Vec<ValveInfo>,
}

/// One part of a preamp stage.
#[derive(Clone, Debug, Serialize)]
pub struct StagePartInfo {
    /// Counted from 1 at the input jack.
    pub stage: usize,
    /// The circuit-file key: "plate_resistor", "volume.bright_cap", ...
    pub key: String,
    /// "stage 1 plate_resistor".
    pub item: String,
    /// The value in SI base units (`unit`).
    pub amount: f64,
    /// "ohm" or "F".
    pub unit: String,
    /// "100 kohm", "1 Mohm log".
    pub value: String,
}

/// One valve at the idle operating point against its type's ratings (from memory of the datasheets).
#[derive(Clone, Debug, Serialize)]
pub struct ValveInfo {
    /// "stage 1", "stage 3 (gain stage)", "cathode follower".
    pub name: String,
    /// "valve, stage 1".
    pub item: String,
    /// "12AX7".
    pub tube: String,
    /// Plate to cathode at idle (V).
    pub idle_plate_volts: f64,
    /// Plate dissipation at idle (W).
    pub idle_plate_watts: f64,
    /// Maximum plate voltage per section (V), from memory of the datasheet.
    pub rating_plate_volts: f64,
    /// Maximum plate dissipation per section (W), from memory of the datasheet.
    pub rating_plate_watts: f64,
    /// Rating / idle dissipation; None when no current flows.
    pub dissipation_margin: Option<f64>,
    /// "ok", "thin" or "over the rating" (`crate::analysis::ratings::Verdict`).
    pub dissipation_state: String,
    pub plate_volts_over_rating: bool,
    /// The load in words, as `breakdown parts` prints it.
    pub idle: String,
    /// The ratings and the verdict in words, as `breakdown parts` prints them.
    pub rating: String,
}

impl PreampParts {
    /// The preamp of `circuit` at the idle operating point `idle` (an engine's readout right after `Engine::new`).
    pub fn new(
        variants: Vec<String>,
        circuit: &breakdown_dsp::Circuit,
        idle: &breakdown_dsp::Readout,
    ) -> PreampParts {
        use crate::analysis::partslist::{stage_parts, valve_lines};
        PreampParts {
            variants,
            stages: stage_parts(circuit)
                .into_iter()
                .map(|p| StagePartInfo {
                    stage: p.stage,
                    key: p.key.clone(),
                    item: p.item(),
                    amount: p.amount,
                    unit: p.unit.into(),
                    value: p.value(),
                })
                .collect(),
            valves: valve_lines(circuit, idle)
                .into_iter()
                .map(|v| {
                    let r = &v.rating;
                    ValveInfo {
                        item: v.item(),
                        idle: v.idle_text(),
                        rating: v.rating_text(),
                        name: v.name.clone(),
                        tube: r.tube.into(),
                        idle_plate_volts: r.plate_volts,
                        idle_plate_watts: r.plate_watts,
                        rating_plate_volts: r.limits.plate_volts,
                        rating_plate_watts: r.limits.plate_watts,
                        dissipation_margin: r.watts_margin.is_finite().then_some(r.watts_margin),
                        dissipation_state: r.watts_verdict().label().into(),
                        plate_volts_over_rating: r.volts_over(),
                    }
                })
                .collect(),
        }
    }
}

/// How the THD readout is taken.
#[derive(Clone, Debug, Serialize)]
pub struct ToneSetup {
    pub frequency_hz: f64,
    pub peak_volts_at_jack: f64,
    pub sample_rate: f64,
    pub seconds: f64,
    pub analysed_seconds: f64,
    /// Highest harmonic counted (harmonics 2..=this; 10 everywhere, `breakdown_dsp::measure::THD_F_HARMONICS`).
    pub highest_harmonic: usize,
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
    /// Rating / average dissipation ("12.0x"); None when nothing flows.
    pub margin: Option<f64>,
    /// "ok", "thin" or "over the rating" (`crate::analysis::ratings::Verdict`).
    pub state: String,
}

impl PartLoad {
    pub fn new(average_watts: f64, peak_watts: f64, rating_watts: f64) -> PartLoad {
        use crate::analysis::ratings::Verdict;
        let margin = (average_watts > 1e-9).then(|| rating_watts / average_watts);
        PartLoad {
            average_watts,
            peak_watts,
            rating_watts,
            average_share_of_rating_percent: average_watts / rating_watts * 100.0,
            margin,
            state: Verdict::from_margin(margin.unwrap_or(f64::INFINITY))
                .label()
                .to_string(),
        }
    }

    /// "12.0x ok", "no load".
    pub fn margin_text(&self) -> String {
        match self.margin {
            Some(m) => format!(
                "{} {}",
                crate::analysis::ratings::margin_text(m),
                self.state
            ),
            None => "no load".into(),
        }
    }
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

/// One cell of a report table, before it is written as CSV or HTML.
#[derive(Clone, Debug, PartialEq)]
pub enum Cell {
    /// A number with this many decimals (not finite: empty in CSV, "n/a"/"-inf" in HTML).
    Number(f64, usize),
    /// A loudness measurement of a silent file: "silent", never a number.
    Silent,
    Text(String),
    /// Nothing to say (no part at this position).
    None,
}

impl Cell {
    pub fn csv(&self) -> String {
        match self {
            Cell::Number(x, d) if x.is_finite() => format!("{x:.d$}"),
            Cell::Number(..) | Cell::None => String::new(),
            Cell::Silent => "silent".into(),
            Cell::Text(t) => csv_field(t),
        }
    }
}

/// The report tables that share the column list.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Table {
    /// One row per variant: parts and settings.
    Variants,
    /// One row per variant: the test tone.
    Tone,
    /// One row per DI and variant: the clamp and the loudness matching.
    Di,
    /// One row per DI and variant: what the Zeners see.
    Zener,
    /// In the CSV only.
    CsvOnly,
}

/// What a column reads from: the variant, and for per-DI tables the DI's result.
pub struct Row<'a> {
    pub variant: &'a VariantInfo,
    pub di: Option<(&'a DiInfo, &'a DiResult)>,
}

/// One column of the report, written once for HTML and CSV.
pub struct Column {
    /// CSV header (snake case with the unit).
    pub csv: &'static str,
    /// HTML header (may hold entities).
    pub html: &'static str,
    pub table: Table,
    pub value: fn(&Row) -> Cell,
}

fn n(x: f64, d: usize) -> Cell {
    Cell::Number(x, d)
}
fn on_di(r: &Row, f: impl Fn(&DiInfo, &DiResult) -> Cell) -> Cell {
    r.di.map_or(Cell::None, |(d, x)| f(d, x))
}
/// A loudness figure of a matching: "silent" when the file was too quiet to measure.
fn loud(r: &Row, f: impl Fn(&MatchReport) -> f64) -> Cell {
    on_di(r, |_, x| {
        if x.matching.silent {
            Cell::Silent
        } else {
            n(f(&x.matching), 2)
        }
    })
}
fn zener(r: &Row, f: impl Fn(&ZenerLoad) -> Cell) -> Cell {
    on_di(r, |_, x| x.zener.as_ref().map_or(Cell::None, &f))
}
fn part(r: &Row, positive: bool, f: impl Fn(&PartLoad) -> Cell) -> Cell {
    zener(r, |z| {
        let p = if positive { &z.positive } else { &z.negative };
        p.as_ref().map_or(Cell::None, &f)
    })
}
fn opt_cell(v: Option<f64>, d: usize) -> Cell {
    v.map_or(Cell::None, |x| n(x, d))
}

/// Every column of the report, in CSV order; the HTML tables take theirs from the same list.
pub fn columns() -> Vec<Column> {
    use Table::*;
    vec![
        Column {
            csv: "di",
            html: "DI",
            table: CsvOnly,
            value: |r| on_di(r, |d, _| Cell::Text(d.name.clone())),
        },
        Column {
            csv: "variant",
            html: "variant",
            table: Variants,
            value: |r| Cell::Text(r.variant.name.clone()),
        },
        Column {
            csv: "parts",
            html: "parts",
            table: Variants,
            value: |r| Cell::Text(r.variant.parts.clone()),
        },
        Column {
            csv: "gain",
            html: "gain",
            table: Variants,
            value: |r| n(r.variant.gain, 3),
        },
        Column {
            csv: "level",
            html: "level",
            table: Variants,
            value: |r| n(r.variant.level, 3),
        },
        Column {
            csv: "quality",
            html: "oversampling",
            table: Variants,
            value: |r| Cell::Text(format!("{}x", r.variant.quality)),
        },
        Column {
            csv: "conducts_at_positive_V",
            html: "conducts at + (V)",
            table: Variants,
            value: |r| opt_cell(r.variant.threshold_positive_volts, 3),
        },
        Column {
            csv: "conducts_at_negative_V",
            html: "conducts at &minus; (V)",
            table: Variants,
            value: |r| opt_cell(r.variant.threshold_negative_volts, 3),
        },
        Column {
            csv: "thd_f_percent",
            html: "THD<sub>F</sub> (%)",
            table: Tone,
            value: |r| n(r.variant.tone.thd_f_percent, 3),
        },
        Column {
            csv: "thd_f_harmonics",
            html: "harmonics counted",
            table: Tone,
            value: |r| Cell::Text(format!("2-{}", r.variant.tone.highest_harmonic)),
        },
        Column {
            csv: "even_share_percent",
            html: "even share (%)",
            table: Tone,
            value: |r| n(r.variant.tone.even_share_percent, 2),
        },
        Column {
            csv: "tone_fundamental_wiper_V",
            html: "fundamental at wiper (V peak)",
            table: Tone,
            value: |r| n(r.variant.tone.fundamental_wiper_volts, 3),
        },
        Column {
            csv: "tone_clamp_level_positive_V",
            html: "clamp level + (V)",
            table: Tone,
            value: |r| n(r.variant.tone.clamp_peak_positive_volts, 3),
        },
        Column {
            csv: "tone_clamp_level_negative_V",
            html: "clamp level &minus; (V)",
            table: Tone,
            value: |r| n(r.variant.tone.clamp_peak_negative_volts, 3),
        },
        Column {
            csv: "clamp_level_positive_V",
            html: "clamp level + (V)",
            table: Di,
            value: |r| on_di(r, |_, x| n(x.clamp_peak_positive_volts, 3)),
        },
        Column {
            csv: "clamp_level_negative_V",
            html: "clamp level &minus; (V)",
            table: Di,
            value: |r| on_di(r, |_, x| n(x.clamp_peak_negative_volts, 3)),
        },
        Column {
            csv: "clamp_peak_to_peak_V",
            html: "peak-to-peak (V)",
            table: Di,
            value: |r| on_di(r, |_, x| n(x.clamp_peak_to_peak_volts, 3)),
        },
        Column {
            csv: "share_clamped_percent",
            html: "time clamped (%)",
            table: Di,
            value: |r| on_di(r, |_, x| n(x.share_clamped_percent, 3)),
        },
        Column {
            csv: "loudness_before_LUFS",
            html: "loudness before matching (LUFS)",
            table: Di,
            value: |r| loud(r, |m| m.loudness_before_lufs),
        },
        Column {
            csv: "true_peak_before_dBTP",
            html: "true peak before (dBTP)",
            table: Di,
            value: |r| loud(r, |m| m.true_peak_before_dbtp),
        },
        Column {
            csv: "crest_factor_dB",
            html: "crest factor (dB)",
            table: Di,
            value: |r| on_di(r, |_, x| n(x.crest_factor_db, 2)),
        },
        Column {
            csv: "match_gain_dB",
            html: "matching gain (dB)",
            table: Di,
            value: |r| loud(r, |m| m.gain_db),
        },
        Column {
            csv: "limited",
            html: "true-peak limiting",
            table: Di,
            value: |r| on_di(r, |_, x| Cell::Text(limiting_text(&x.matching))),
        },
        Column {
            csv: "limiter_max_reduction_dB",
            html: "limiter max reduction (dB)",
            table: CsvOnly,
            value: |r| loud(r, |m| m.limiter_max_reduction_db),
        },
        Column {
            csv: "loudness_after_LUFS",
            html: "after matching (LUFS)",
            table: Di,
            value: |r| loud(r, |m| m.loudness_after_lufs),
        },
        Column {
            csv: "true_peak_after_dBTP",
            html: "after matching (dBTP)",
            table: Di,
            value: |r| loud(r, |m| m.true_peak_after_dbtp),
        },
        Column {
            csv: "zener_peak_current_mA",
            html: "peak current (mA)",
            table: Zener,
            value: |r| zener(r, |z| n(z.peak_current_ma, 4)),
        },
        Column {
            csv: "zener_rms_current_mA",
            html: "RMS current (mA)",
            table: Zener,
            value: |r| zener(r, |z| n(z.rms_current_ma, 4)),
        },
        Column {
            csv: "positive_average_W",
            html: "+ part average (W)",
            table: Zener,
            value: |r| part(r, true, |p| n(p.average_watts, 6)),
        },
        Column {
            csv: "positive_peak_W",
            html: "+ part peak (W)",
            table: Zener,
            value: |r| part(r, true, |p| n(p.peak_watts, 6)),
        },
        Column {
            csv: "positive_margin",
            html: "+ part margin",
            table: Zener,
            value: |r| part(r, true, |p| Cell::Text(p.margin_text())),
        },
        Column {
            csv: "negative_average_W",
            html: "&minus; part average (W)",
            table: Zener,
            value: |r| part(r, false, |p| n(p.average_watts, 6)),
        },
        Column {
            csv: "negative_peak_W",
            html: "&minus; part peak (W)",
            table: Zener,
            value: |r| part(r, false, |p| n(p.peak_watts, 6)),
        },
        Column {
            csv: "negative_margin",
            html: "&minus; part margin",
            table: Zener,
            value: |r| part(r, false, |p| Cell::Text(p.margin_text())),
        },
        Column {
            csv: "rating_W",
            html: "rating (W)",
            table: Zener,
            value: |r| {
                zener(r, |z| {
                    opt_cell(
                        z.positive
                            .as_ref()
                            .or(z.negative.as_ref())
                            .map(|p| p.rating_watts),
                        2,
                    )
                })
            },
        },
        Column {
            csv: "matched_file",
            html: "matched clip",
            table: CsvOnly,
            value: |r| on_di(r, |_, x| Cell::Text(x.matched_file.clone())),
        },
        Column {
            csv: "unmatched_file",
            html: "unmatched render",
            table: CsvOnly,
            value: |r| on_di(r, |_, x| Cell::Text(x.unmatched_file.clone())),
        },
    ]
}

/// "no", "yes" (with how much), or "silent: not matched".
pub fn limiting_text(m: &MatchReport) -> String {
    if m.silent {
        "silent: not matched".into()
    } else if m.limited {
        format!(
            "yes: {:.1} dB max, {:.2}% of the time",
            m.limiter_max_reduction_db,
            m.limiter_active_share * 100.0
        )
    } else {
        "no".into()
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

    /// CSV text: one row per DI and variant, every column of [`columns`].
    pub fn to_csv(&self) -> String {
        let cols = columns();
        let mut out = cols.iter().map(|c| c.csv).collect::<Vec<_>>().join(",");
        out.push('\n');
        for di in &self.di {
            for r in &di.results {
                let Some(v) = self.variant(&r.variant) else {
                    continue;
                };
                let row = Row {
                    variant: v,
                    di: Some((di, r)),
                };
                let cells: Vec<String> = cols.iter().map(|c| (c.value)(&row).csv()).collect();
                out.push_str(&cells.join(","));
                out.push('\n');
            }
        }
        out
    }
}
