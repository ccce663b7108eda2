//! The builder's circuit: every part value from the input jack to the tone stack, read from a TOML circuit file
//! (docs/model.md section 5 lists the keys, section 3 the circuit they describe).
//!
//! Reading goes key by key (`read.rs`), so that every refused value is named with its section, key, value,
//! allowed range and the reason for the range.

mod read;

use crate::devices::triode::TubeType;
use crate::devices::zener::{Zener, ZenerDatasheet};
use crate::parts::{FAMILY_1N47XXA, ZENER_VOLTS_RANGE};
use crate::pot::PotLaw;
pub use read::Range;
use read::Section;
use serde::{Deserialize, Serialize};
use std::fmt;

/// The built-in circuit: a preamp of our own with two stages before the gain stage (docs/model.md section 7).
pub const BUILTIN_TOML: &str = include_str!("../../../presets-demo/builtin-preamp.toml");
/// The one-stage circuit of the original mod: gain stage, follower, clamp (a demo preset).
pub const ONE_STAGE_TOML: &str = include_str!("../../../presets-demo/one-stage.toml");

/// Most stages before the gain stage.
pub const MAX_PREAMP_STAGES: usize = 4;
/// Most switch positions (a rotary switch has at most 12 ways).
pub const MAX_POSITIONS: usize = 12;
/// Longest circuit file read (bytes).
pub const MAX_FILE_BYTES: usize = 1 << 20;

/// A problem with a circuit file or a setting, with a message a builder can act on.
#[derive(Clone, Debug, PartialEq)]
pub struct CircuitError(pub String);

impl fmt::Display for CircuitError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for CircuitError {}

/// The whole circuit.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Circuit {
    /// Shown in the plugin and the report.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub name: Option<String>,
    /// B+ (V) of the follower's plate and of every stage that gives none.
    pub supply_volts: f64,
    pub input: Input,
    /// Stages before the gain stage, from the jack; empty for the one-stage circuit.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub preamp: Vec<PreampStage>,
    pub gain_stage: GainStage,
    pub follower: Follower,
    pub clamp: Clamp,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub tone_stack: Option<ToneStack>,
    pub listen: Listen,
}

/// Input calibration and the jack.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Input {
    /// Peak volts at the input jack for a 0 dBFS sample.
    pub volts_at_full_scale: f64,
    /// Jack to ground (ohm); in the circuit only when preamp stages exist.
    pub input_resistor: f64,
}

/// A common-cathode stage before the gain stage, with the network its coupling cap feeds.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PreampStage {
    pub tube: TubeType,
    /// B+ at this stage's plate resistor (V); None = the top-level supply.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub supply_volts: Option<f64>,
    pub grid_stopper: f64,
    pub plate_resistor: f64,
    pub cathode_resistor: f64,
    /// 0 = unbypassed.
    pub cathode_bypass: f64,
    pub coupling_cap: f64,
    #[serde(flatten)]
    pub network: Network,
}

/// What the coupling cap of a preamp stage feeds; the next stage's grid stopper hangs from its output.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Network {
    /// A resistor to ground (ohm).
    GridLeak(f64),
    /// A pot to ground, the next stage on its wiper.
    Volume(Volume),
    /// A series resistor (optionally bridged by a cap) then a shunt resistor to ground.
    Divider(Divider),
}

/// A volume pot between stages.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Volume {
    pub resistance: f64,
    pub law: PotLaw,
    /// From the top lug to the wiper (F); 0 = none.
    #[serde(skip_serializing_if = "is_zero")]
    pub bright_cap: f64,
    /// The setting that turns this pot; None = it stays at `rotation`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub control: Option<Control>,
    /// Where the pot stays when no setting turns it (0..1).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rotation: Option<f64>,
}

/// The settings a pot can be given to.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Control {
    Gain,
}

/// A fixed divider between stages.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Divider {
    pub series: f64,
    /// Across the series resistor (F); 0 = none.
    #[serde(skip_serializing_if = "is_zero")]
    pub series_cap: f64,
    pub shunt: f64,
}

fn is_zero(v: &f64) -> bool {
    *v == 0.0
}

/// The stage that drives the follower.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct GainStage {
    pub tube: TubeType,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub supply_volts: Option<f64>,
    /// Law of the ideal attenuator at the jack (None when a preamp volume is the gain control).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub gain_pot_law: Option<PotLaw>,
    pub grid_stopper: f64,
    pub plate_resistor: f64,
    pub cathode_resistor: f64,
    /// 0 = unbypassed.
    pub cathode_bypass: f64,
}

/// DC-coupled cathode follower (plate at the top-level B+).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Follower {
    pub tube: TubeType,
    pub cathode_resistor: f64,
}

/// Where the Zeners sit relative to the level pot.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Placement {
    /// Zeners across the whole level pot (at its top).
    #[serde(rename = "across-pot")]
    AcrossPot,
    /// Zeners from the level pot's wiper to ground.
    #[serde(rename = "at-wiper")]
    AtWiper,
}

/// Coupling cap, feed resistor, level pot, load and the mode switch.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Clamp {
    pub coupling_cap: f64,
    pub feed_resistor: f64,
    pub level_pot: f64,
    pub level_pot_law: PotLaw,
    pub placement: Placement,
    /// At the wiper (ohm); None = nothing but the tone stack there.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub load_resistor: Option<f64>,
    pub position: Vec<SwitchPosition>,
}

/// One position of the mode switch.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SwitchPosition {
    pub name: String,
    /// The part that sets the positive clamp level (its cathode faces the clamp node).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub positive: Option<ZenerSpec>,
    /// The part that sets the negative clamp level (its cathode faces ground).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub negative: Option<ZenerSpec>,
}

/// A Zener given by its Vz, optionally with its own datasheet knee data.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ZenerSpec {
    pub volts: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub izt: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub zzt: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub izk: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub zzk: Option<f64>,
}

/// A pot of the tone stack.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct PotSpec {
    pub resistance: f64,
    pub law: PotLaw,
}

/// The passive three-knob tone stack the level pot drives (docs/model.md section 3.1).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ToneStack {
    pub slope_resistor: f64,
    pub treble_cap: f64,
    pub bass_cap: f64,
    pub middle_cap: f64,
    pub treble_pot: PotSpec,
    pub bass_pot: PotSpec,
    pub middle_pot: PotSpec,
    /// What the stack's output drives (ohm).
    pub load_resistor: f64,
}

/// Scaling of the listening output.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Listen {
    /// Volts at the listening point written as a full-scale (1.0) sample.
    pub volts_at_full_scale: f64,
}

impl Default for Listen {
    fn default() -> Self {
        Listen {
            volts_at_full_scale: 20.0,
        }
    }
}

/// Where the gain setting acts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum GainControl {
    /// An ideal attenuator at the jack with this law.
    Attenuator(PotLaw),
    /// The volume pot of this preamp stage (index from 0).
    PreampVolume(usize),
}

// Allowed ranges, each with its reason.
const SUPPLY: Range = Range::new(
    50.0,
    500.0,
    "V",
    "preamp valves are rated 300-330 V at the plate and the valve models are fitted below about 500 V",
);
const CALIBRATION: Range = Range::new(
    1e-3,
    20.0,
    "V",
    "peak volts at the jack for 0 dBFS; more than 20 V (about +25 dBu) is not a guitar input and would put \
     tens of volts on the first grid",
);
const INPUT_RESISTOR: Range = Range::new(10e3, 10e6, "ohm", "an input jack's resistor to ground");
const GRID_STOPPER: Range = Range::new(1.0, 10e6, "ohm", "a series resistor into a grid");
const PLATE_RESISTOR: Range = Range::new(
    1e3,
    10e6,
    "ohm",
    "below 1 kohm a small-signal triode's plate sees nearly the whole supply",
);
const CATHODE_RESISTOR: Range = Range::new(
    10.0,
    1e6,
    "ohm",
    "below 10 ohm the cathode is shorted and the valve runs without bias",
);
const BYPASS: Range = Range::new(1e-12, 0.1, "F", "0 = unbypassed");
const COUPLING_CAP: Range = Range::new(1e-12, 1e-3, "F", "a coupling capacitor");
const GRID_LEAK: Range = Range::new(10e3, 10e6, "ohm", "a grid-leak resistor");
const POT: Range = Range::new(1e3, 10e6, "ohm", "a pot's whole track");
const SMALL_CAP: Range = Range::new(1e-12, 1e-6, "F", "0 = none");
const ROTATION: Range = Range::new(0.0, 1.0, "", "a pot rotation, 0 = fully down, 1 = fully up");
const DIVIDER_LEG: Range = Range::new(1e3, 10e6, "ohm", "a divider leg");
const FOLLOWER_CATHODE: Range = Range::new(
    1e3,
    10e6,
    "ohm",
    "below 1 kohm a DC-coupled follower draws tens of milliamps, far past a small-signal triode's rating",
);
const FEED: Range = Range::new(1.0, 10e6, "ohm", "the resistor feeding the clamp node");
const LOAD: Range = Range::new(1e3, 1e9, "ohm", "the input resistance of what follows");
const SLOPE: Range = Range::new(1e3, 1e6, "ohm", "a tone stack's slope resistor");
const STACK_CAP: Range = Range::new(1e-12, 1e-5, "F", "a tone stack capacitor");
const LISTEN: Range = Range::new(
    1e-3,
    1000.0,
    "V",
    "volts at the listening point written as full scale",
);
const KNEE_IZT: Range = Range::new(1e-6, 1.0, "A", "a datasheet test current");
const KNEE_IZK: Range = Range::new(1e-7, 1.0, "A", "a datasheet knee current");
const KNEE_ZZT: Range = Range::new(
    0.01,
    1e5,
    "ohm",
    "a datasheet impedance at the test current",
);
const KNEE_ZZK: Range = Range::new(0.01, 1e6, "ohm", "a datasheet impedance at the knee");

/// The Zener Vz range (V), for messages everywhere.
pub const ZENER_VOLTS: Range = Range::new(
    ZENER_VOLTS_RANGE.0,
    ZENER_VOLTS_RANGE.1,
    "V",
    "the span of the Zener families Breakdown carries (1N52xxB and 1N47xxA)",
);

const TUBES: [(&str, TubeType); 3] = [
    ("12AX7", TubeType::Ax7),
    ("12AT7", TubeType::At7),
    ("12AU7", TubeType::Au7),
];
const LAWS: [(&str, PotLaw); 2] = [("log", PotLaw::Log), ("linear", PotLaw::Linear)];
const PLACEMENTS: [(&str, Placement); 2] = [
    ("across-pot", Placement::AcrossPot),
    ("at-wiper", Placement::AtWiper),
];

impl ZenerSpec {
    /// A part by Vz alone, knee data from the family table.
    pub fn volts(volts: f64) -> Self {
        ZenerSpec {
            volts,
            izt: None,
            zzt: None,
            izk: None,
            zzk: None,
        }
    }

    /// Datasheet figures: the spec's own, or the 1N47xxA family row (interpolated between rows if needed).
    pub fn datasheet(&self) -> ZenerDatasheet {
        match (self.izt, self.zzt, self.izk, self.zzk) {
            (Some(izt), Some(zzt), Some(izk), Some(zzk)) => ZenerDatasheet {
                volts: self.volts,
                izt,
                zzt,
                izk,
                zzk,
            },
            _ => FAMILY_1N47XXA.sheet_for(self.volts),
        }
    }

    /// Fitted device model.
    pub fn model(&self) -> Zener {
        Zener::fit(&self.datasheet())
    }

    /// Check the values against their ranges; `what` names the part in messages.
    pub fn validate(&self, what: &str) -> Result<(), CircuitError> {
        ZENER_VOLTS.check(what, "volts", self.volts)?;
        let given = [self.izt, self.zzt, self.izk, self.zzk];
        let count = given.iter().filter(|v| v.is_some()).count();
        if count != 0 && count != 4 {
            return Err(CircuitError(format!(
                "{what}: give all four knee figures (izt, zzt, izk, zzk) or none (then the 1N47xxA table is used)"
            )));
        }
        if let (Some(izt), Some(zzt), Some(izk), Some(zzk)) =
            (self.izt, self.zzt, self.izk, self.zzk)
        {
            KNEE_IZT.check(what, "izt", izt)?;
            KNEE_IZK.check(what, "izk", izk)?;
            KNEE_ZZT.check(what, "zzt", zzt)?;
            KNEE_ZZK.check(what, "zzk", zzk)?;
            if izk >= izt {
                return Err(CircuitError(format!(
                    "{what}: izk ({}) must be below izt ({}): the knee current is the smaller one",
                    crate::units::si(izk, "A"),
                    crate::units::si(izt, "A")
                )));
            }
            if zzk <= zzt {
                return Err(CircuitError(format!(
                    "{what}: zzk ({zzk} ohm) must exceed zzt ({zzt} ohm): the knee is softer than the test point"
                )));
            }
        }
        Ok(())
    }

    fn read(section: &Section) -> Result<ZenerSpec, CircuitError> {
        let spec = ZenerSpec {
            volts: section.number("volts", ZENER_VOLTS)?,
            izt: section.optional_number("izt", KNEE_IZT)?,
            zzt: section.optional_number("zzt", KNEE_ZZT)?,
            izk: section.optional_number("izk", KNEE_IZK)?,
            zzk: section.optional_number("zzk", KNEE_ZZK)?,
        };
        section.finish()?;
        spec.validate(&section.name)?;
        Ok(spec)
    }
}

impl Default for Circuit {
    fn default() -> Self {
        Circuit::builtin()
    }
}

impl Circuit {
    /// The built-in circuit (`presets-demo/builtin-preamp.toml`).
    pub fn builtin() -> Circuit {
        Circuit::from_toml(BUILTIN_TOML).expect("built-in circuit parses")
    }

    /// The one-stage circuit (`presets-demo/one-stage.toml`).
    pub fn one_stage() -> Circuit {
        Circuit::from_toml(ONE_STAGE_TOML).expect("one-stage circuit parses")
    }

    /// Parse and validate a circuit file's text.
    pub fn from_toml(text: &str) -> Result<Circuit, CircuitError> {
        Circuit::parse(text).map(|(c, _)| c)
    }

    /// Parse and validate a circuit file's text, with notes for the user (renamed sections and the like).
    pub fn parse(text: &str) -> Result<(Circuit, Vec<String>), CircuitError> {
        if text.len() > MAX_FILE_BYTES {
            return Err(CircuitError(format!(
                "circuit file: {} bytes is too long for a circuit file (at most {MAX_FILE_BYTES})",
                text.len()
            )));
        }
        let table: toml::Table = toml::from_str(text).map_err(|e| {
            CircuitError(format!(
                "circuit file is not valid TOML: {}",
                clip_lines(e.to_string().trim(), 160)
            ))
        })?;
        if table.is_empty() {
            return Err(CircuitError(
                "circuit file is empty: it needs supply_volts, [input], [gain_stage], [follower], [clamp] \
                 and at least one [[clamp.position]] (docs/model.md section 5)"
                    .into(),
            ));
        }
        let mut notes = Vec::new();
        let top = Section::new("circuit", &table);
        let name = top.optional_text("name")?.map(str::to_string);
        let supply_volts = top.number("supply_volts", SUPPLY)?;
        let input = if top.has("drive") && !top.has("input") {
            notes.push("the [drive] section is now called [input]; read as [input]".to_string());
            Input::read(&top.table("drive", "the input calibration")?, false)?
        } else {
            if top.has("drive") {
                return Err(CircuitError(
                    "circuit file has both [input] and [drive]: [drive] is the old name of [input]; keep one"
                        .into(),
                ));
            }
            Input::read(
                &top.table("input", "volts_at_full_scale, the input calibration")?,
                true,
            )?
        };
        let stages = top.tables(
            "preamp",
            MAX_PREAMP_STAGES,
            "Breakdown models up to four stages before the gain stage",
        )?;
        let mut preamp = Vec::with_capacity(stages.len());
        for (index, table) in stages.iter().enumerate() {
            preamp.push(PreampStage::read(&Section::new(
                format!("preamp stage {}", index + 1),
                table,
            ))?);
        }
        let gain_stage =
            GainStage::read(&top.table("gain_stage", "the valve that drives the follower")?)?;
        let follower = Follower::read(&top.table(
            "follower",
            "the cathode follower's valve and cathode resistor",
        )?)?;
        let has_stack = top.has("tone_stack");
        let clamp = Clamp::read(
            &top.table(
                "clamp",
                "the coupling cap, feed resistor, level pot and switch positions",
            )?,
            has_stack,
        )?;
        let tone_stack = match top.optional_table("tone_stack", "tone_stack")? {
            Some(s) => Some(ToneStack::read(&s)?),
            None => None,
        };
        let listen = match top.optional_table("listen", "listen")? {
            Some(s) => {
                let l = Listen {
                    volts_at_full_scale: s.number("volts_at_full_scale", LISTEN)?,
                };
                s.finish()?;
                l
            }
            None => Listen::default(),
        };
        top.finish()?;
        let circuit = Circuit {
            name,
            supply_volts,
            input,
            preamp,
            gain_stage,
            follower,
            clamp,
            tone_stack,
            listen,
        };
        circuit.check_controls(&mut notes)?;
        Ok((circuit, notes))
    }

    /// Check the cross-section rules: at most one gain control, and a law for the attenuator when no pot is it.
    fn check_controls(&self, notes: &mut Vec<String>) -> Result<(), CircuitError> {
        let controls: Vec<usize> = self
            .preamp
            .iter()
            .enumerate()
            .filter(|(_, s)| matches!(&s.network, Network::Volume(v) if v.control == Some(Control::Gain)))
            .map(|(i, _)| i + 1)
            .collect();
        if controls.len() > 1 {
            return Err(CircuitError(format!(
                "preamp stages {controls:?} all say control = \"gain\": at most one pot can be the gain control"
            )));
        }
        match (controls.first(), self.gain_stage.gain_pot_law) {
            (None, None) => Err(CircuitError(
                "gain_stage: gain_pot_law is missing: with no preamp volume marked control = \"gain\", the gain \
                 setting is an ideal attenuator at the jack and needs a law (\"log\" or \"linear\")"
                    .into(),
            )),
            (Some(stage), Some(_)) => {
                notes.push(format!(
                    "gain_stage.gain_pot_law is not used: the gain setting turns preamp stage {stage}'s volume pot"
                ));
                Ok(())
            }
            _ => Ok(()),
        }
    }

    /// Serialise to TOML text (the same keys `parse` reads).
    pub fn to_toml(&self) -> String {
        toml::to_string_pretty(self).expect("circuit serialises")
    }

    /// Check every value against its range (a circuit built in code, not read from a file).
    pub fn validate(&self) -> Result<(), CircuitError> {
        Circuit::from_toml(&self.to_toml()).map(|_| ())
    }

    /// Where the gain setting acts.
    pub fn gain_control(&self) -> GainControl {
        self.preamp
            .iter()
            .position(
                |s| matches!(&s.network, Network::Volume(v) if v.control == Some(Control::Gain)),
            )
            .map(GainControl::PreampVolume)
            .unwrap_or(GainControl::Attenuator(
                self.gain_stage.gain_pot_law.unwrap_or(PotLaw::Log),
            ))
    }

    /// B+ of preamp stage `index` (V).
    pub fn preamp_supply(&self, index: usize) -> f64 {
        self.preamp[index].supply_volts.unwrap_or(self.supply_volts)
    }

    /// B+ of the gain stage (V).
    pub fn gain_stage_supply(&self) -> f64 {
        self.gain_stage.supply_volts.unwrap_or(self.supply_volts)
    }

    /// Index of a switch position, with a clear error past the end of the list.
    pub fn check_position(&self, index: usize) -> Result<(), CircuitError> {
        let count = self.clamp.position.len();
        if index >= count {
            return Err(CircuitError(format!(
                "position {index} is past the end of the switch list (counted from 0; {count} positions: {})",
                self.position_list()
            )));
        }
        Ok(())
    }

    /// The switch positions as "0 = name, 1 = name, ...", for messages.
    pub fn position_list(&self) -> String {
        let names: Vec<String> = self
            .clamp
            .position
            .iter()
            .enumerate()
            .map(|(i, p)| format!("{i} = {}", p.name))
            .collect();
        names.join(", ")
    }

    /// The settings a render without `--set` uses: gain 0.8, level 0.5, tone knobs 0.5, and the first switch
    /// position that holds parts (position 0 when none does).
    pub fn default_settings(&self) -> Settings {
        let position = self
            .clamp
            .position
            .iter()
            .position(|p| p.positive.is_some() || p.negative.is_some())
            .unwrap_or(0);
        Settings {
            position,
            ..Settings::default()
        }
    }

    /// Check settings against this circuit (switch position in the list, tone knobs only with a tone stack).
    pub fn check_settings(&self, settings: &Settings) -> Result<(), CircuitError> {
        self.check_position(settings.position)?;
        for (name, v) in settings.pots() {
            ROTATION.check("settings", name, v)?;
        }
        Ok(())
    }

    /// A short description for messages and reports: "2 preamp stages, gain stage, follower, clamp, tone stack".
    pub fn summary(&self) -> String {
        let mut parts = Vec::new();
        match self.preamp.len() {
            0 => {}
            1 => parts.push("1 preamp stage".to_string()),
            n => parts.push(format!("{n} preamp stages")),
        }
        parts.push("gain stage, follower, clamp".into());
        if self.tone_stack.is_some() {
            parts.push("tone stack".into());
        }
        parts.join(", ")
    }
}

impl Input {
    fn read(s: &Section, new_name: bool) -> Result<Input, CircuitError> {
        let input = Input {
            volts_at_full_scale: s.number("volts_at_full_scale", CALIBRATION)?,
            input_resistor: if new_name {
                s.optional_number("input_resistor", INPUT_RESISTOR)?
                    .unwrap_or(1e6)
            } else {
                1e6
            },
        };
        s.finish()?;
        Ok(input)
    }
}

fn read_tube(s: &Section) -> Result<TubeType, CircuitError> {
    s.choice("tube", &TUBES)
}

impl PreampStage {
    fn read(s: &Section) -> Result<PreampStage, CircuitError> {
        let stage = PreampStage {
            tube: read_tube(s)?,
            supply_volts: s.optional_number("supply_volts", SUPPLY)?,
            grid_stopper: s.number("grid_stopper", GRID_STOPPER)?,
            plate_resistor: s.number("plate_resistor", PLATE_RESISTOR)?,
            cathode_resistor: s.number("cathode_resistor", CATHODE_RESISTOR)?,
            cathode_bypass: s.number_or_zero("cathode_bypass", BYPASS)?,
            coupling_cap: s.number("coupling_cap", COUPLING_CAP)?,
            network: Network::read(s)?,
        };
        s.finish()?;
        Ok(stage)
    }
}

impl Network {
    fn read(s: &Section) -> Result<Network, CircuitError> {
        let given: Vec<&str> = ["grid_leak", "volume", "divider"]
            .into_iter()
            .filter(|k| s.has(k))
            .collect();
        if given.len() != 1 {
            return Err(CircuitError(format!(
                "{}: give exactly one of grid_leak, volume, divider after the coupling cap (found {})",
                s.name,
                if given.is_empty() {
                    "none".to_string()
                } else {
                    given.join(" and ")
                }
            )));
        }
        if s.has("grid_leak") {
            return Ok(Network::GridLeak(s.number("grid_leak", GRID_LEAK)?));
        }
        if let Some(v) = s.optional_table("volume", format!("{} volume", s.name))? {
            let volume = Volume {
                resistance: v.number("resistance", POT)?,
                law: v.choice("law", &LAWS)?,
                bright_cap: v.number_or_zero("bright_cap", SMALL_CAP)?,
                control: v.optional_choice("control", &[("gain", Control::Gain)])?,
                rotation: v.optional_number("rotation", ROTATION)?,
            };
            v.finish()?;
            match (volume.control, volume.rotation) {
                (None, None) => {
                    return Err(CircuitError(format!(
                        "{}: give control = \"gain\" (the gain setting turns it) or rotation = 0..1 (where it stays)",
                        v.name
                    )))
                }
                (Some(_), Some(_)) => {
                    return Err(CircuitError(format!(
                        "{}: control = \"gain\" and rotation both given: the gain setting turns this pot, so \
                         drop rotation",
                        v.name
                    )))
                }
                _ => {}
            }
            return Ok(Network::Volume(volume));
        }
        let d = s
            .optional_table("divider", format!("{} divider", s.name))?
            .expect("checked above");
        let divider = Divider {
            series: d.number("series", DIVIDER_LEG)?,
            series_cap: d.number_or_zero("series_cap", SMALL_CAP)?,
            shunt: d.number("shunt", DIVIDER_LEG)?,
        };
        d.finish()?;
        Ok(Network::Divider(divider))
    }
}

impl GainStage {
    fn read(s: &Section) -> Result<GainStage, CircuitError> {
        let stage = GainStage {
            tube: read_tube(s)?,
            supply_volts: s.optional_number("supply_volts", SUPPLY)?,
            gain_pot_law: s.optional_choice("gain_pot_law", &LAWS)?,
            grid_stopper: s.number("grid_stopper", GRID_STOPPER)?,
            plate_resistor: s.number("plate_resistor", PLATE_RESISTOR)?,
            cathode_resistor: s.number("cathode_resistor", CATHODE_RESISTOR)?,
            cathode_bypass: s.number_or_zero("cathode_bypass", BYPASS)?,
        };
        s.finish()?;
        Ok(stage)
    }
}

impl Follower {
    fn read(s: &Section) -> Result<Follower, CircuitError> {
        let follower = Follower {
            tube: read_tube(s)?,
            cathode_resistor: s.number("cathode_resistor", FOLLOWER_CATHODE)?,
        };
        s.finish()?;
        Ok(follower)
    }
}

impl Clamp {
    fn read(s: &Section, has_stack: bool) -> Result<Clamp, CircuitError> {
        let load_resistor = s.optional_number("load_resistor", LOAD)?;
        if load_resistor.is_none() && !has_stack {
            return Err(CircuitError(
                "clamp: load_resistor is missing: without a [tone_stack] something must load the level pot's \
                 wiper (the input resistance of what follows, 1 kohm .. 1 Gohm)"
                    .into(),
            ));
        }
        let mut clamp = Clamp {
            coupling_cap: s.number("coupling_cap", COUPLING_CAP)?,
            feed_resistor: s.number("feed_resistor", FEED)?,
            level_pot: s.number("level_pot", POT)?,
            level_pot_law: s.choice("level_pot_law", &LAWS)?,
            placement: s.choice("placement", &PLACEMENTS)?,
            load_resistor,
            position: Vec::new(),
        };
        let positions = s.tables(
            "position",
            MAX_POSITIONS,
            "a rotary switch has at most 12 ways",
        )?;
        s.finish()?;
        if positions.is_empty() {
            return Err(CircuitError(
                "clamp: the switch needs at least one [[clamp.position]] (a name, and optional positive and \
                 negative parts)"
                    .into(),
            ));
        }
        for (index, table) in positions.iter().enumerate() {
            let p = Section::new(format!("clamp position {index}"), table);
            let name = p
                .optional_text("name")?
                .map(str::trim)
                .filter(|n| !n.is_empty())
                .ok_or_else(|| CircuitError(format!("{}: give it a name", p.name)))?;
            if name.chars().count() > 60 {
                return Err(CircuitError(format!(
                    "{}: the name '{}' is longer than 60 characters",
                    p.name,
                    crate::units::clip(name, 40)
                )));
            }
            if clamp.position.iter().any(|q| q.name == name) {
                return Err(CircuitError(format!(
                    "{}: the name '{name}' is used twice",
                    p.name
                )));
            }
            let label = format!("clamp position {index} (\"{name}\")");
            let part = |key: &'static str| -> Result<Option<ZenerSpec>, CircuitError> {
                match p.optional_table(key, format!("{label} {key}"))? {
                    Some(t) => Ok(Some(ZenerSpec::read(&t)?)),
                    None => Ok(None),
                }
            };
            let position = SwitchPosition {
                name: name.to_string(),
                positive: part("positive")?,
                negative: part("negative")?,
            };
            p.finish()?;
            clamp.position.push(position);
        }
        Ok(clamp)
    }
}

impl ToneStack {
    fn read(s: &Section) -> Result<ToneStack, CircuitError> {
        let pot = |key: &'static str| -> Result<PotSpec, CircuitError> {
            let t = s
                .optional_table(key, format!("tone_stack {key}"))?
                .ok_or_else(|| {
                    CircuitError(format!(
                        "tone_stack: {key} is missing: give {key} = {{ resistance = ..., law = \"log\" }}"
                    ))
                })?;
            let spec = PotSpec {
                resistance: t.number("resistance", POT)?,
                law: t.choice("law", &LAWS)?,
            };
            t.finish()?;
            Ok(spec)
        };
        let stack = ToneStack {
            slope_resistor: s.number("slope_resistor", SLOPE)?,
            treble_cap: s.number("treble_cap", STACK_CAP)?,
            bass_cap: s.number("bass_cap", STACK_CAP)?,
            middle_cap: s.number("middle_cap", STACK_CAP)?,
            treble_pot: pot("treble_pot")?,
            bass_pot: pot("bass_pot")?,
            middle_pot: pot("middle_pot")?,
            load_resistor: s.number("load_resistor", LOAD)?,
        };
        s.finish()?;
        Ok(stack)
    }
}

/// Pot positions and switch position: what the builder turns while listening.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Gain control rotation, 0..1.
    pub gain: f64,
    /// Level pot rotation, 0..1.
    pub level: f64,
    /// Index into the circuit's switch positions, counted from 0.
    pub position: usize,
    /// Tone stack knobs, 0..1 (read only when the circuit has a tone stack).
    #[serde(default = "half")]
    pub treble: f64,
    #[serde(default = "half")]
    pub middle: f64,
    #[serde(default = "half")]
    pub bass: f64,
}

fn half() -> f64 {
    0.5
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            gain: 0.8,
            level: 0.5,
            position: 1,
            treble: 0.5,
            middle: 0.5,
            bass: 0.5,
        }
    }
}

/// Names of the settings, for help texts and messages.
pub const SETTING_NAMES: &str =
    "gain, level, treble, middle, bass (pot rotations 0..1), position (switch, from 0)";

impl Settings {
    /// The pot settings by name.
    pub fn pots(&self) -> [(&'static str, f64); 5] {
        [
            ("gain", self.gain),
            ("level", self.level),
            ("treble", self.treble),
            ("middle", self.middle),
            ("bass", self.bass),
        ]
    }

    /// Apply `name=value`, naming the problem on a bad key or value.
    pub fn set(&mut self, assignment: &str) -> Result<(), CircuitError> {
        let shown = crate::units::clip(assignment, 40);
        let (key, value) = assignment.split_once('=').ok_or_else(|| {
            CircuitError(format!(
                "--set '{shown}': expected name=value, e.g. gain=0.8 (settings: {SETTING_NAMES})"
            ))
        })?;
        let key = key.trim();
        let value = value.trim();
        let short = crate::units::clip(value, 20);
        let slot = match key {
            "gain" => &mut self.gain,
            "level" => &mut self.level,
            "treble" => &mut self.treble,
            "middle" => &mut self.middle,
            "bass" => &mut self.bass,
            "position" => {
                self.position = value.parse().map_err(|_| {
                    CircuitError(format!(
                        "--set position={short}: expected a switch index counted from 0 (0, 1, 2, ...)"
                    ))
                })?;
                return Ok(());
            }
            other => {
                return Err(CircuitError(format!(
                    "--set {}: unknown setting (settings: {SETTING_NAMES})",
                    crate::units::clip(other, 20)
                )))
            }
        };
        let v: f64 = value
            .parse()
            .map_err(|_| CircuitError(format!("--set {key}={short}: '{short}' is not a number")))?;
        *slot = ROTATION.check("--set", key, v)?;
        Ok(())
    }
}

/// `text` with every line cut to at most `width` characters (marked with "..."), so a parser's message that
/// quotes the offending line never echoes a huge line of the file back whole.
fn clip_lines(text: &str, width: usize) -> String {
    text.lines()
        .map(|line| match line.char_indices().nth(width) {
            Some((cut, _)) => format!("{}...", &line[..cut]),
            None => line.to_string(),
        })
        .collect::<Vec<_>>()
        .join("\n")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shipped_circuits_parse_and_round_trip() {
        for text in [BUILTIN_TOML, ONE_STAGE_TOML] {
            let c = Circuit::from_toml(text).unwrap();
            assert_eq!(Circuit::from_toml(&c.to_toml()).unwrap(), c);
        }
        assert_eq!(Circuit::one_stage().preamp.len(), 0);
        assert!(!Circuit::builtin().preamp.is_empty());
    }

    #[test]
    fn old_drive_section_loads_with_a_note() {
        let text = ONE_STAGE_TOML.replace("[input]", "[drive]");
        let (c, notes) = Circuit::parse(&text).unwrap();
        assert_eq!(c, Circuit::one_stage());
        assert!(notes.iter().any(|n| n.contains("[drive]")), "{notes:?}");
    }

    /// Each refusal names the section, key, value, range and reason.
    #[test]
    fn bad_values_are_named() {
        let builtin = BUILTIN_TOML;
        let cases = [
            (
                builtin.replacen("cathode_resistor = 10e3", "cathode_resistor = 0", 1),
                "preamp stage 2: cathode_resistor = 0 ohm: must be at least 10 ohm",
            ),
            (
                ONE_STAGE_TOML.replace("supply_volts = 300.0", "supply_volts = \"abc\""),
                "circuit: supply_volts = \"abc\": expected a number in V",
            ),
            (
                ONE_STAGE_TOML.replace("supply_volts = 300.0", "supply_volts = 1000.0"),
                "circuit: supply_volts = 1 kV: must be at most 500 V",
            ),
            (
                ONE_STAGE_TOML.replace("tube = \"12AX7\"", "tube = \"EL34\""),
                "gain_stage: tube = \"EL34\": expected one of \"12AX7\", \"12AT7\", \"12AU7\"",
            ),
            (
                ONE_STAGE_TOML.replace("feed_resistor", "feed_resistr"),
                "clamp: feed_resistor is missing",
            ),
            (String::new(), "circuit file is empty"),
        ];
        for (text, expected) in cases {
            let e = Circuit::from_toml(&text).unwrap_err().0;
            assert!(e.contains(expected), "expected '{expected}' in '{e}'");
        }
    }

    #[test]
    fn unknown_key_is_refused() {
        let text = ONE_STAGE_TOML.replace("[follower]", "[follower]\ncathode_bypas = 1e-6");
        let e = Circuit::from_toml(&text).unwrap_err().0;
        assert!(e.contains("unknown key 'cathode_bypas'"), "{e}");
    }

    #[test]
    fn only_off_position_defaults_to_it() {
        let mut c = Circuit::one_stage();
        c.clamp.position.truncate(1);
        assert_eq!(c.default_settings().position, 0);
        assert!(c.check_settings(&c.default_settings()).is_ok());
    }

    #[test]
    fn settings_name_their_problem() {
        let mut s = Settings::default();
        assert!(s.set("treble=0.25").is_ok());
        assert_eq!(s.treble, 0.25);
        let e = s.set("gain=2").unwrap_err().0;
        assert!(e.contains("gain = 2"), "{e}");
        let e = s.set("position=-1").unwrap_err().0;
        assert!(e.contains("counted from 0"), "{e}");
    }
}
