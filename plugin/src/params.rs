//! The plugin's parameters, its persisted (versioned) state and the check that turns an older or damaged state
//! into defaults with a logged reason.

use breakdown_dsp::parts::nearest_e24;
use breakdown_dsp::Quality;
use nice_plug::plugin::ParamValue;
use nice_plug::prelude::*;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::sync::{Arc, RwLock};

/// Version of the persisted state layout. Bump when a parameter's meaning changes.
pub const STATE_VERSION: u32 = 1;
/// Key of our own persisted field in the framework's state object.
pub const STATE_FIELD: &str = "breakdown";

/// Lowest and highest Zener voltage offered (V).
pub const ZENER_MIN_VOLTS: f32 = 2.4;
pub const ZENER_MAX_VOLTS: f32 = 75.0;

/// Number of compared switch positions (off, pair 1, pair 2, candidate).
pub const SLOTS: usize = 4;

/// The switch position being heard. "Candidate" is a freely set extra pair that the real switch does not have.
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum Position {
    #[id = "off"]
    #[name = "Off"]
    Off,
    #[id = "pair1"]
    #[name = "Pair 1"]
    Pair1,
    #[id = "pair2"]
    #[name = "Pair 2"]
    Pair2,
    #[id = "candidate"]
    #[name = "Candidate"]
    Candidate,
}

impl Position {
    pub const ALL: [Position; SLOTS] = [
        Position::Off,
        Position::Pair1,
        Position::Pair2,
        Position::Candidate,
    ];
    pub fn index(self) -> usize {
        self as usize
    }
    pub fn label(self) -> &'static str {
        ["Off", "Pair 1", "Pair 2", "Candidate"][self.index()]
    }
}

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

/// Which node the output carries.
#[derive(Enum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum ListenPoint {
    /// The level pot's wiper: what the next stage of the amp receives.
    #[id = "wiper"]
    #[name = "Wiper"]
    Wiper,
    /// The node the Zeners connect to.
    #[id = "clamp"]
    #[name = "Clamp node"]
    ClampNode,
}

/// Non-parameter state we persist ourselves, with its layout version.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PersistedState {
    pub version: u32,
    /// Scope time window (ms) chosen in the editor.
    #[serde(default = "default_scope_ms")]
    pub scope_ms: f32,
}

fn default_scope_ms() -> f32 {
    20.0
}

impl Default for PersistedState {
    fn default() -> Self {
        PersistedState {
            version: STATE_VERSION,
            scope_ms: default_scope_ms(),
        }
    }
}

#[derive(Params)]
pub struct BreakdownParams {
    #[persist = "breakdown"]
    pub state: Arc<RwLock<PersistedState>>,

    /// Gain pot rotation (0..1).
    #[id = "gain"]
    pub gain: FloatParam,
    /// Level pot rotation (0..1).
    #[id = "level"]
    pub level: FloatParam,
    /// Switch position heard.
    #[id = "switch"]
    pub switch: EnumParam<Position>,
    /// Compare key: while on, the "compare with" position is heard instead.
    #[id = "ab"]
    pub ab: BoolParam,
    /// The position the compare key switches to.
    #[id = "compare_with"]
    pub compare_with: EnumParam<Position>,

    #[id = "p1_pos"]
    pub pair1_positive: FloatParam,
    #[id = "p1_neg"]
    pub pair1_negative: FloatParam,
    #[id = "p2_pos"]
    pub pair2_positive: FloatParam,
    #[id = "p2_neg"]
    pub pair2_negative: FloatParam,
    #[id = "cand_pos"]
    pub candidate_positive: FloatParam,
    #[id = "cand_neg"]
    pub candidate_negative: FloatParam,
    /// Snap Zener voltages to the buyable E24 series.
    #[id = "snap_e24"]
    pub snap_e24: BoolParam,

    /// Peak volts at the input jack for a 0 dBFS sample.
    #[id = "input_cal"]
    pub input_calibration: FloatParam,
    /// Output trim (dB).
    #[id = "trim"]
    pub trim: FloatParam,
    #[id = "quality"]
    pub quality: EnumParam<QualityChoice>,
    #[id = "listen"]
    pub listen: EnumParam<ListenPoint>,
    /// Keep every position at the same K-weighted short-term loudness.
    #[id = "level_match"]
    pub level_match: BoolParam,
    /// Run every position all the time (instant comparison); off runs only the heard and "compare with" ones.
    #[id = "run_all"]
    pub run_all: BoolParam,
}

/// Tooltip text for the input calibration.
pub const INPUT_CALIBRATION_HELP: &str = "Peak volts at the amp's input jack that a full-scale (0 dBFS) sample \
stands for. Typical, common practice: passive single-coil and humbucking pickups give roughly 0.1-1 V peak when \
strummed hard; hot pickups up to about 2 V; active pickups more. Measure your own guitar with a scope for a \
real figure. Default 1 V.";

fn zener_param(name: &str, default: f32) -> FloatParam {
    FloatParam::new(
        name,
        default,
        FloatRange::Skewed {
            min: ZENER_MIN_VOLTS,
            max: ZENER_MAX_VOLTS,
            factor: FloatRange::skew_factor(-1.5),
        },
    )
    .with_unit(" V")
    .with_value_to_string(formatters::v2s_f32_rounded(1))
}

fn pot_param(name: &str, default: f32) -> FloatParam {
    FloatParam::new(name, default, FloatRange::Linear { min: 0.0, max: 1.0 })
        .with_value_to_string(formatters::v2s_f32_rounded(3))
}

impl Default for BreakdownParams {
    fn default() -> Self {
        BreakdownParams {
            state: Arc::new(RwLock::new(PersistedState::default())),
            // Pot positions glide inside the model (10 ms), so the framework's smoother stays off for them.
            gain: pot_param("Gain", 0.8),
            level: pot_param("Level", 0.5),
            switch: EnumParam::new("Switch", Position::Pair1),
            ab: BoolParam::new("Compare key", false),
            compare_with: EnumParam::new("Compare with", Position::Pair2),
            pair1_positive: zener_param("Pair 1 positive clamp", 20.0),
            pair1_negative: zener_param("Pair 1 negative clamp", 20.0),
            pair2_positive: zener_param("Pair 2 positive clamp", 18.0),
            pair2_negative: zener_param("Pair 2 negative clamp", 5.6),
            candidate_positive: zener_param("Candidate positive clamp", 15.0),
            candidate_negative: zener_param("Candidate negative clamp", 9.1),
            snap_e24: BoolParam::new("Snap to E24", true),
            input_calibration: FloatParam::new(
                "Input calibration",
                1.0,
                FloatRange::Skewed {
                    min: 0.05,
                    max: 5.0,
                    factor: FloatRange::skew_factor(-2.0),
                },
            )
            .with_unit(" Vpk")
            .with_value_to_string(formatters::v2s_f32_rounded(2))
            .with_smoother(SmoothingStyle::Logarithmic(20.0)),
            trim: FloatParam::new(
                "Output trim",
                0.0,
                FloatRange::Linear {
                    min: -24.0,
                    max: 24.0,
                },
            )
            .with_unit(" dB")
            .with_value_to_string(formatters::v2s_f32_rounded(1))
            .with_smoother(SmoothingStyle::Linear(20.0)),
            quality: EnumParam::new("Quality", QualityChoice::X4),
            listen: EnumParam::new("Listening point", ListenPoint::Wiper),
            level_match: BoolParam::new("Level match", false),
            run_all: BoolParam::new("Run all positions", true),
        }
    }
}

/// Zener voltage the model uses for a parameter value: limited to the offered range, snapped to E24 if asked.
pub fn model_volts(value: f32, snap: bool) -> f64 {
    let v = if value.is_finite() {
        value.clamp(ZENER_MIN_VOLTS, ZENER_MAX_VOLTS) as f64
    } else {
        20.0
    };
    if snap {
        nearest_e24(v).clamp(ZENER_MIN_VOLTS as f64, ZENER_MAX_VOLTS as f64)
    } else {
        v
    }
}

impl BreakdownParams {
    /// (positive, negative) Zener volts of a compared position as the model uses them; None for "off".
    pub fn pair_volts(&self, position: Position) -> Option<(f64, f64)> {
        let snap = self.snap_e24.value();
        let (p, n) = match position {
            Position::Off => return None,
            Position::Pair1 => (&self.pair1_positive, &self.pair1_negative),
            Position::Pair2 => (&self.pair2_positive, &self.pair2_negative),
            Position::Candidate => (&self.candidate_positive, &self.candidate_negative),
        };
        Some((model_volts(p.value(), snap), model_volts(n.value(), snap)))
    }

    /// The position heard now (the compare key swaps in "compare with").
    pub fn heard(&self) -> Position {
        if self.ab.value() {
            self.compare_with.value()
        } else {
            self.switch.value()
        }
    }
}

/// Why a saved state is not used as it stands.
#[derive(Clone, Debug, PartialEq)]
pub enum StateProblem {
    MissingVersion,
    Damaged(String),
    Older(u32),
    Newer(u32),
}

impl std::fmt::Display for StateProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            StateProblem::MissingVersion => {
                write!(
                    f,
                    "the saved state has no '{STATE_FIELD}' field with a version"
                )
            }
            StateProblem::Damaged(e) => {
                write!(f, "the saved '{STATE_FIELD}' field is damaged: {e}")
            }
            StateProblem::Older(v) => write!(
                f,
                "the saved state has version {v}, older than this plugin's {STATE_VERSION}"
            ),
            StateProblem::Newer(v) => write!(
                f,
                "the saved state has version {v}, newer than this plugin's {STATE_VERSION}"
            ),
        }
    }
}

/// Check our persisted field; Ok(()) when the state can be used as it stands.
pub fn check_state(fields: &BTreeMap<String, String>) -> Result<(), StateProblem> {
    let text = fields
        .get(STATE_FIELD)
        .ok_or(StateProblem::MissingVersion)?;
    let value: serde_json::Value =
        serde_json::from_str(text).map_err(|e| StateProblem::Damaged(e.to_string()))?;
    let version = value
        .get("version")
        .ok_or(StateProblem::MissingVersion)?
        .as_u64()
        .ok_or_else(|| StateProblem::Damaged("'version' is not a whole number".into()))?;
    let version = u32::try_from(version).map_err(|_| StateProblem::Newer(u32::MAX))?;
    if version < STATE_VERSION {
        return Err(StateProblem::Older(version));
    }
    if version > STATE_VERSION {
        return Err(StateProblem::Newer(version));
    }
    serde_json::from_value::<PersistedState>(value)
        .map_err(|e| StateProblem::Damaged(e.to_string()))?;
    Ok(())
}

/// Every parameter at its default, as the framework's state map holds them.
pub fn default_param_values() -> BTreeMap<String, ParamValue> {
    let params = BreakdownParams::default();
    params
        .param_map()
        .into_iter()
        .map(|(id, ptr, _)| {
            // SAFETY: the pointers point into `params`, which lives until the end of this function.
            let value = unsafe {
                match ptr {
                    ParamPtr::FloatParam(p) => ParamValue::F32((*p).default_plain_value()),
                    ParamPtr::IntParam(p) => ParamValue::I32((*p).default_plain_value()),
                    ParamPtr::BoolParam(p) => ParamValue::Bool((*p).default_plain_value()),
                    ParamPtr::EnumParam(p) => ParamValue::I32((*p).default_plain_value()),
                }
            };
            (id, value)
        })
        .collect()
}

/// Repair a state before the framework loads it: an older, newer or damaged state becomes the defaults (with
/// the reason logged); single parameter values that are not finite numbers are replaced by their defaults.
/// Returns the reason when the whole state was replaced.
pub fn repair_state(state: &mut PluginState) -> Option<StateProblem> {
    let defaults = default_param_values();
    match check_state(&state.fields) {
        Err(problem) => {
            nice_warn!("Breakdown: {problem}; loading the default settings instead");
            state.params = defaults;
            state.fields.clear();
            state.fields.insert(
                STATE_FIELD.to_string(),
                serde_json::to_string(&PersistedState::default()).unwrap_or_default(),
            );
            Some(problem)
        }
        Ok(()) => {
            for (id, value) in state.params.iter_mut() {
                let bad = match value {
                    ParamValue::F32(v) => !v.is_finite(),
                    _ => false,
                };
                if bad {
                    if let Some(d) = defaults.get(id) {
                        nice_warn!(
                            "Breakdown: saved value of '{id}' is not a number; using its default"
                        );
                        *value = d.clone();
                    }
                }
            }
            None
        }
    }
}
