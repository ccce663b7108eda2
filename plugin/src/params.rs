//! The plugin's parameters. Their ids are the names the circuit file, the command line and the report use
//! (`gain`, `level`, `treble`, `middle`, `bass`, `position`, `volts_at_full_scale`...), and the preset keys
//! (plugin/README.md lists them). Values a host sends are never trusted: `controls_from` clamps every one to
//! its range and replaces a value that is not a number by the default.

use crate::runtime::{Candidate, Controls, Pots};
use crate::session::{Session, CANDIDATE};
use breakdown_dsp::circuit::ZENER_VOLTS;
use breakdown_dsp::parts::{nearest_e24, Family, FAMILY_1N47XXA, FAMILY_1N52XXB};
use breakdown_dsp::units::{dbu_to_peak_volts, peak_volts_to_dbu};
use breakdown_dsp::Quality;
use nice_plug::prelude::*;
use std::sync::Arc;

/// Lowest and highest volts at full scale offered (peak volts at the input jack for a 0 dBFS sample).
pub const VOLTS_AT_FULL_SCALE_RANGE: (f32, f32) = (0.01, 20.0);

/// Oversampling factor.
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum QualityChoice {
    #[id = "x1"]
    #[name = "1x"]
    X1,
    #[id = "x2"]
    #[name = "2x"]
    X2,
    #[id = "x4"]
    #[name = "4x"]
    X4,
    #[id = "x8"]
    #[name = "8x"]
    X8,
    #[id = "x16"]
    #[name = "16x"]
    X16,
}

impl QualityChoice {
    pub const ALL: [QualityChoice; 5] = [
        QualityChoice::X1,
        QualityChoice::X2,
        QualityChoice::X4,
        QualityChoice::X8,
        QualityChoice::X16,
    ];
    pub fn quality(self) -> Quality {
        match self {
            QualityChoice::X1 => Quality::X1,
            QualityChoice::X2 => Quality::X2,
            QualityChoice::X4 => Quality::X4,
            QualityChoice::X8 => Quality::X8,
            QualityChoice::X16 => Quality::X16,
        }
    }
}

/// Which node the output carries. Saved states and presets hold the ids ("chain", "wiper", "clamp"), so the
/// order here (the host's 0..1 steps) can change without changing what a saved session means.
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum ListenPoint {
    /// The listening chain: the engine's listening output (the tone stack's output when the circuit has a
    /// `[tone_stack]`, else the level pot's wiper, over `[listen] volts_at_full_scale`) through the cabinet.
    #[id = "chain"]
    #[name = "Tone stack + cabinet"]
    Chain,
    /// The bare level pot wiper (over `[listen] volts_at_full_scale`): what the next stage of the amp
    /// receives, before any tone stack and cabinet.
    #[id = "wiper"]
    #[name = "Wiper"]
    Wiper,
    /// The node the Zeners connect to.
    #[id = "clamp"]
    #[name = "Clamp node"]
    ClampNode,
}

impl ListenPoint {
    pub const ALL: [ListenPoint; 3] = [
        ListenPoint::Chain,
        ListenPoint::Wiper,
        ListenPoint::ClampNode,
    ];
}

/// The speaker cabinet of the listening chain.
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum CabinetChoice {
    /// The dsp crate's built-in response (`Cabinet::builtin`).
    #[id = "builtin"]
    #[name = "Built-in"]
    BuiltIn,
    /// The impulse response loaded into the session (the built-in one while none is loaded).
    #[id = "loaded"]
    #[name = "Loaded IR"]
    Loaded,
    /// No cabinet: the chain ends at the tone stack's output.
    #[id = "none"]
    #[name = "None"]
    None,
}

/// The Zener family the candidate's knee data and rating come from (the command line's `--family` names).
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum FamilyChoice {
    #[id = "1n47xxa"]
    #[name = "1N47xxA (1 W)"]
    OneWatt,
    #[id = "1n52xxb"]
    #[name = "1N52xxB (1/2 W)"]
    HalfWatt,
}

impl FamilyChoice {
    pub fn family(self) -> &'static Family {
        match self {
            FamilyChoice::OneWatt => &FAMILY_1N47XXA,
            FamilyChoice::HalfWatt => &FAMILY_1N52XXB,
        }
    }
}

#[derive(Params)]
pub struct BreakdownParams {
    /// The circuit file's text and the scope window (persisted field "breakdown").
    #[persist = "breakdown"]
    pub session: Arc<Session>,

    /// Gain control rotation (0..1).
    #[id = "gain"]
    pub gain: FloatParam,
    /// Level pot rotation (0..1).
    #[id = "level"]
    pub level: FloatParam,
    /// Tone stack knobs (0..1), read when the circuit has a tone stack.
    #[id = "treble"]
    pub treble: FloatParam,
    #[id = "middle"]
    pub middle: FloatParam,
    #[id = "bass"]
    pub bass: FloatParam,
    /// Switch position heard: 0.. the circuit's positions, CANDIDATE the freely set pair.
    #[id = "position"]
    pub position: IntParam,
    /// The position A/B switches to.
    #[id = "compare_with"]
    pub compare_with: IntParam,
    /// A/B: while on, the compare-with position is heard instead.
    #[id = "ab"]
    pub ab: BoolParam,

    /// The candidate's positive-clamp and negative-clamp Vz.
    #[id = "candidate_positive"]
    pub candidate_positive: FloatParam,
    #[id = "candidate_negative"]
    pub candidate_negative: FloatParam,
    #[id = "candidate_family"]
    pub candidate_family: EnumParam<FamilyChoice>,
    /// Snap the candidate's Vz to the buyable E24 series.
    #[id = "snap_e24"]
    pub snap_e24: BoolParam,

    /// Peak volts at the input jack for a 0 dBFS sample: the session's input calibration, overriding the
    /// circuit file's `[input] volts_at_full_scale`.
    #[id = "volts_at_full_scale"]
    pub volts_at_full_scale: FloatParam,
    /// Output trim (dB).
    #[id = "trim"]
    pub trim: FloatParam,
    #[id = "quality"]
    pub quality: EnumParam<QualityChoice>,
    #[id = "listen"]
    pub listen: EnumParam<ListenPoint>,
    /// The cabinet after the tone stack (heard at the `chain` listening point).
    #[id = "cabinet"]
    pub cabinet: EnumParam<CabinetChoice>,
    /// Keep every position at the same K-weighted short-term loudness.
    #[id = "level_match"]
    pub level_match: BoolParam,
    /// Run every position all the time; off runs only the heard and compare-with ones.
    #[id = "run_all"]
    pub run_all: BoolParam,
}

/// Help text for the input calibration.
pub const VOLTS_AT_FULL_SCALE_HELP: &str = "Volts at full scale: the peak volts at the amp's input jack that a \
full-scale (0 dBFS) sample stands for (dBu of a sine of that peak beside it; 0 dBu = 0.775 V rms). Typical, \
common practice: passive single-coil and humbucking pickups give roughly 0.1-1 V peak when strummed hard, hot \
pickups up to about 2 V, active pickups more. Measure your own guitar with a scope for a real figure. This \
setting is the session's calibration: it overrides the circuit file's [input] volts_at_full_scale.";

fn pot_param(name: &str, default: f32) -> FloatParam {
    // Pot positions glide inside the model (the framework's smoother stays off for them).
    FloatParam::new(name, default, FloatRange::Linear { min: 0.0, max: 1.0 })
        .with_value_to_string(formatters::v2s_f32_rounded(3))
}

fn vz_param(name: &str, default: f32) -> FloatParam {
    FloatParam::new(
        name,
        default,
        FloatRange::Skewed {
            min: ZENER_VOLTS.low as f32,
            max: ZENER_VOLTS.high as f32,
            factor: FloatRange::skew_factor(-2.0),
        },
    )
    .with_unit(" V")
    .with_value_to_string(formatters::v2s_f32_rounded(2))
}

fn position_param(name: &str, default: i32, session: &Arc<Session>) -> IntParam {
    let show = session.clone();
    let read = session.clone();
    IntParam::new(
        name,
        default,
        IntRange::Linear {
            min: 0,
            max: CANDIDATE as i32,
        },
    )
    .with_value_to_string(Arc::new(move |v| show.position_label(v)))
    .with_string_to_value(Arc::new(move |t| read.parse_position(t)))
}

fn toggle(name: &str, default: bool) -> BoolParam {
    BoolParam::new(name, default)
}

/// "1.000 V (-0.8 dBu)": peak volts, and the dBu of a sine with that peak.
pub fn volts_text(v: f32) -> String {
    format!("{v:.3} V ({:+.1} dBu)", peak_volts_to_dbu(v as f64))
}

/// Reads "1.2", "1.2 V", "1.2 V peak" or "+4 dBu" (a sine's level).
pub fn parse_volts(text: &str) -> Option<f32> {
    let t = text.trim().to_ascii_lowercase();
    if let Some(dbu) = t.strip_suffix("dbu") {
        let v = dbu_to_peak_volts(dbu.trim().parse::<f64>().ok()?);
        return Some(v as f32);
    }
    let number = t.split_whitespace().next()?.trim_end_matches('v');
    number.parse().ok()
}

impl Default for BreakdownParams {
    fn default() -> Self {
        let session = Arc::new(Session::default());
        BreakdownParams {
            gain: pot_param("Gain", 0.8),
            level: pot_param("Level", 0.5),
            treble: pot_param("Treble", 0.5),
            middle: pot_param("Middle", 0.5),
            bass: pot_param("Bass", 0.5),
            position: position_param("Switch position", 1, &session),
            compare_with: position_param("Compare with", 2, &session),
            ab: toggle("A/B: hear compare-with", false),
            candidate_positive: vz_param("Candidate positive Vz", 15.0),
            candidate_negative: vz_param("Candidate negative Vz", 9.1),
            candidate_family: EnumParam::new("Candidate family", FamilyChoice::OneWatt),
            snap_e24: toggle("Snap to E24", true),
            volts_at_full_scale: FloatParam::new(
                "Volts at full scale",
                1.0,
                FloatRange::Skewed {
                    min: VOLTS_AT_FULL_SCALE_RANGE.0,
                    max: VOLTS_AT_FULL_SCALE_RANGE.1,
                    factor: FloatRange::skew_factor(-2.1),
                },
            )
            .with_value_to_string(Arc::new(volts_text))
            .with_string_to_value(Arc::new(parse_volts)),
            trim: FloatParam::new(
                "Output trim",
                0.0,
                FloatRange::Linear {
                    min: -24.0,
                    max: 24.0,
                },
            )
            .with_unit(" dB")
            .with_value_to_string(formatters::v2s_f32_rounded(1)),
            quality: EnumParam::new("Quality", QualityChoice::X4),
            listen: EnumParam::new("Listening point", ListenPoint::Chain),
            cabinet: EnumParam::new("Cabinet", CabinetChoice::BuiltIn),
            level_match: toggle("Level match", false),
            run_all: toggle("Run all positions", true),
            session,
        }
    }
}

/// A float parameter's value limited to its range (a value inside it is returned as it is), the default when
/// it is not a number.
pub fn safe_float(p: &FloatParam) -> f32 {
    let v = p.value();
    if v.is_finite() {
        let (lo, hi) = float_bounds(p);
        v.clamp(lo, hi)
    } else {
        p.default_plain_value()
    }
}

/// An integer parameter's value limited to its range.
pub fn safe_int(p: &IntParam) -> i32 {
    let (a, b) = (p.preview_plain(0.0), p.preview_plain(1.0));
    p.value().clamp(a.min(b), a.max(b))
}

/// Candidate Vz the model uses: limited to the Vz range, snapped to E24 if asked.
pub fn model_vz(value: f32, snap: bool) -> f64 {
    let v = (value as f64).clamp(ZENER_VOLTS.low, ZENER_VOLTS.high);
    if snap {
        nearest_e24(v).clamp(ZENER_VOLTS.low, ZENER_VOLTS.high)
    } else {
        v
    }
}

/// Read the parameters into the control values of one block (no allocation, no lock).
pub fn controls_from(params: &BreakdownParams) -> Controls {
    let snap = params.snap_e24.value();
    let pot = |p: &FloatParam| safe_float(p) as f64;
    Controls {
        pots: Pots {
            gain: pot(&params.gain),
            level: pot(&params.level),
            treble: pot(&params.treble),
            middle: pot(&params.middle),
            bass: pot(&params.bass),
        },
        calibration: pot(&params.volts_at_full_scale),
        trim_db: pot(&params.trim),
        position: safe_int(&params.position) as usize,
        compare_with: safe_int(&params.compare_with) as usize,
        ab: params.ab.value(),
        candidate: Candidate {
            positive: model_vz(safe_float(&params.candidate_positive), snap),
            negative: model_vz(safe_float(&params.candidate_negative), snap),
            family: params.candidate_family.value(),
        },
        quality: params.quality.value().quality(),
        listen: params.listen.value(),
        cabinet: params.cabinet.value(),
        level_match: params.level_match.value(),
        run_all: params.run_all.value(),
    }
}

/// What a parameter id holds, for checking saved states and presets against the parameters themselves.
pub enum Kind<'a> {
    Float(&'a FloatParam),
    Int(&'a IntParam),
    Bool(&'a BoolParam),
    /// The choice's stable ids and its default id.
    Choice(&'static [&'static str], &'static str),
}

fn choice<T: Enum + PartialEq + Copy + 'static>(p: &EnumParam<T>) -> Kind<'static> {
    let ids = T::ids().unwrap_or(&[]);
    let default = ids
        .get(p.default_plain_value().to_index())
        .copied()
        .unwrap_or("");
    Kind::Choice(ids, default)
}

impl BreakdownParams {
    /// The parameter with id `id`, if there is one.
    pub fn kind(&self, id: &str) -> Option<Kind<'_>> {
        Some(match id {
            "gain" => Kind::Float(&self.gain),
            "level" => Kind::Float(&self.level),
            "treble" => Kind::Float(&self.treble),
            "middle" => Kind::Float(&self.middle),
            "bass" => Kind::Float(&self.bass),
            "position" => Kind::Int(&self.position),
            "compare_with" => Kind::Int(&self.compare_with),
            "ab" => Kind::Bool(&self.ab),
            "candidate_positive" => Kind::Float(&self.candidate_positive),
            "candidate_negative" => Kind::Float(&self.candidate_negative),
            "candidate_family" => choice(&self.candidate_family),
            "snap_e24" => Kind::Bool(&self.snap_e24),
            "volts_at_full_scale" => Kind::Float(&self.volts_at_full_scale),
            "trim" => Kind::Float(&self.trim),
            "quality" => choice(&self.quality),
            "listen" => choice(&self.listen),
            "cabinet" => choice(&self.cabinet),
            "level_match" => Kind::Bool(&self.level_match),
            "run_all" => Kind::Bool(&self.run_all),
            _ => return None,
        })
    }

    /// The heard switch position as a parameter value (A/B swaps in compare-with).
    pub fn heard_value(&self) -> usize {
        if self.ab.value() {
            safe_int(&self.compare_with) as usize
        } else {
            safe_int(&self.position) as usize
        }
    }
}

/// Lowest and highest plain value of a float parameter.
pub fn float_bounds(p: &FloatParam) -> (f32, f32) {
    let (a, b) = (p.preview_plain(0.0), p.preview_plain(1.0));
    (a.min(b), a.max(b))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_parameter_id_has_a_kind() {
        let p = BreakdownParams::default();
        let ids: Vec<String> = p.param_map().into_iter().map(|(id, _, _)| id).collect();
        assert_eq!(ids.len(), 19);
        for id in &ids {
            assert!(p.kind(id).is_some(), "{id}");
        }
    }

    #[test]
    fn volts_read_as_volts_or_dbu() {
        // 0 dBu = 0.775 V rms (the dBu definition): a sine at +4 dBu peaks at 1.736 V.
        assert!((parse_volts("+4 dBu").unwrap() - 1.736).abs() < 1e-3);
        assert_eq!(parse_volts("1.5 V"), Some(1.5));
        assert_eq!(parse_volts("0.5"), Some(0.5));
        // 1 V peak is 0.7071 V rms: 20 log10(0.7071 / 0.7746) = -0.79 dBu.
        assert_eq!(volts_text(1.0), "1.000 V (-0.8 dBu)");
    }

    #[test]
    fn host_values_are_clamped_and_nans_become_defaults() {
        let p = BreakdownParams::default();
        assert_eq!(safe_float(&p.gain), 0.8);
        // A value inside a skewed range comes back unchanged (no round trip through the normalised value).
        assert_eq!(safe_float(&p.volts_at_full_scale), 1.0);
        assert_eq!(model_vz(500.0, false), ZENER_VOLTS.high);
        assert_eq!(model_vz(19.3, true), 20.0);
        let (lo, hi) = float_bounds(&p.volts_at_full_scale);
        assert!(
            (lo - 0.01).abs() < 1e-6 && (hi - 20.0).abs() < 1e-4,
            "{lo} {hi}"
        );
    }
}
