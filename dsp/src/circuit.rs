//! The builder's circuit: every part value of the stage, read from a TOML circuit file (BRIEF section 5).

use crate::devices::triode::TubeType;
use crate::devices::zener::{Zener, ZenerDatasheet};
use crate::parts::FAMILY_1N47XXA;
use crate::pot::PotLaw;
use serde::{Deserialize, Serialize};
use std::fmt;

/// Built-in reference circuit (BRIEF section 3), read from `presets-demo/reference-circuit.toml`.
pub const REFERENCE_TOML: &str = include_str!("../../presets-demo/reference-circuit.toml");

/// A problem with a circuit file or a setting, with a message a builder can act on.
#[derive(Clone, Debug, PartialEq)]
pub struct CircuitError(pub String);

impl fmt::Display for CircuitError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for CircuitError {}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Circuit {
    /// B+ (V).
    pub supply_volts: f64,
    pub drive: Drive,
    pub gain_stage: GainStage,
    pub follower: Follower,
    pub clamp: Clamp,
    #[serde(default)]
    pub listen: Listen,
}

/// Input calibration.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Drive {
    /// Peak volts at the input jack for a 0 dBFS sample.
    pub volts_at_full_scale: f64,
}

/// Common-cathode gain stage.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GainStage {
    pub tube: TubeType,
    pub gain_pot_law: PotLaw,
    pub grid_stopper: f64,
    pub plate_resistor: f64,
    pub cathode_resistor: f64,
    /// Cathode bypass capacitor (F); 0 = unbypassed.
    pub cathode_bypass: f64,
}

/// DC-coupled cathode follower (plate at B+).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
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

/// Coupling, feed resistor, level pot, load and the mode switch.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Clamp {
    pub coupling_cap: f64,
    pub feed_resistor: f64,
    pub level_pot: f64,
    pub level_pot_law: PotLaw,
    pub placement: Placement,
    pub load_resistor: f64,
    #[serde(default)]
    pub position: Vec<SwitchPosition>,
}

/// One position of the mode switch.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SwitchPosition {
    pub name: String,
    /// The part that sets the positive clamp (its cathode faces the clamp node).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub positive: Option<ZenerSpec>,
    /// The part that sets the negative clamp (its cathode faces ground).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub negative: Option<ZenerSpec>,
}

/// A Zener given by its nominal voltage, optionally with its own datasheet knee data.
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

/// Scaling of the listening output (our own optional section).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Listen {
    /// Wiper volts written as a full-scale (1.0) sample in the listening output.
    pub volts_at_full_scale: f64,
}

impl Default for Listen {
    fn default() -> Self {
        Listen {
            volts_at_full_scale: 20.0,
        }
    }
}

impl ZenerSpec {
    /// A part by voltage alone, knee data from the family table.
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

    fn validate(&self, what: &str) -> Result<(), CircuitError> {
        check_range(what, "volts", self.volts, 1.0, 200.0)?;
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
            check_range(what, "izt", izt, 1e-6, 1.0)?;
            check_range(what, "izk", izk, 1e-7, 1.0)?;
            check_range(what, "zzt", zzt, 0.01, 1e5)?;
            check_range(what, "zzk", zzk, 0.01, 1e6)?;
            if izk >= izt {
                return Err(CircuitError(format!(
                    "{what}: izk ({izk} A) must be below izt ({izt} A)"
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
}

fn check_range(what: &str, key: &str, value: f64, low: f64, high: f64) -> Result<(), CircuitError> {
    if !value.is_finite() || value < low || value > high {
        return Err(CircuitError(format!(
            "{what}.{key} = {value} is out of the physical range {low} .. {high}"
        )));
    }
    Ok(())
}

impl Default for Circuit {
    fn default() -> Self {
        Circuit::reference()
    }
}

impl Circuit {
    /// The built-in reference circuit of BRIEF section 3.
    pub fn reference() -> Circuit {
        Circuit::from_toml(REFERENCE_TOML).expect("built-in circuit parses")
    }

    /// Parse and validate a circuit file's text.
    pub fn from_toml(text: &str) -> Result<Circuit, CircuitError> {
        let circuit: Circuit =
            toml::from_str(text).map_err(|e| CircuitError(format!("circuit file: {e}")))?;
        circuit.validate()?;
        Ok(circuit)
    }

    /// Serialise to TOML text.
    pub fn to_toml(&self) -> String {
        toml::to_string_pretty(self).expect("circuit serialises")
    }

    /// Check every value against its physical range.
    pub fn validate(&self) -> Result<(), CircuitError> {
        check_range("circuit", "supply_volts", self.supply_volts, 20.0, 1000.0)?;
        check_range(
            "drive",
            "volts_at_full_scale",
            self.drive.volts_at_full_scale,
            1e-3,
            100.0,
        )?;
        let g = &self.gain_stage;
        check_range("gain_stage", "grid_stopper", g.grid_stopper, 1.0, 10e6)?;
        check_range("gain_stage", "plate_resistor", g.plate_resistor, 1e3, 10e6)?;
        check_range(
            "gain_stage",
            "cathode_resistor",
            g.cathode_resistor,
            10.0,
            1e6,
        )?;
        check_range("gain_stage", "cathode_bypass", g.cathode_bypass, 0.0, 0.1)?;
        check_range(
            "follower",
            "cathode_resistor",
            self.follower.cathode_resistor,
            1e3,
            10e6,
        )?;
        let c = &self.clamp;
        check_range("clamp", "coupling_cap", c.coupling_cap, 1e-12, 1e-3)?;
        check_range("clamp", "feed_resistor", c.feed_resistor, 1.0, 10e6)?;
        check_range("clamp", "level_pot", c.level_pot, 1e3, 10e6)?;
        check_range("clamp", "load_resistor", c.load_resistor, 1e3, 1e9)?;
        check_range(
            "listen",
            "volts_at_full_scale",
            self.listen.volts_at_full_scale,
            1e-3,
            1000.0,
        )?;
        if c.position.is_empty() {
            return Err(CircuitError(
                "clamp: the switch needs at least one [[clamp.position]]".into(),
            ));
        }
        let mut names: Vec<&str> = Vec::new();
        for (index, p) in c.position.iter().enumerate() {
            if p.name.trim().is_empty() {
                return Err(CircuitError(format!(
                    "clamp.position[{index}]: the name is empty"
                )));
            }
            if names.contains(&p.name.as_str()) {
                return Err(CircuitError(format!(
                    "clamp.position[{index}]: the name '{}' is used twice",
                    p.name
                )));
            }
            names.push(&p.name);
            if let Some(z) = &p.positive {
                z.validate(&format!("clamp.position[{index}].positive"))?;
            }
            if let Some(z) = &p.negative {
                z.validate(&format!("clamp.position[{index}].negative"))?;
            }
        }
        Ok(())
    }

    /// Index of a switch position, with a clear error past the end of the list.
    pub fn check_position(&self, index: usize) -> Result<(), CircuitError> {
        let count = self.clamp.position.len();
        if index >= count {
            return Err(CircuitError(format!(
                "position {index} is past the end of the switch list ({count} positions: {})",
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
}

/// Pot positions and switch position: what the builder turns while listening.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Gain pot rotation, 0..1.
    pub gain: f64,
    /// Level pot rotation, 0..1.
    pub level: f64,
    /// Index into the circuit's switch positions.
    pub position: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            gain: 0.8,
            level: 0.5,
            position: 1,
        }
    }
}

impl Settings {
    /// Apply `name=value` (gain, level, position), naming the problem on a bad key or value.
    pub fn set(&mut self, assignment: &str) -> Result<(), CircuitError> {
        let (key, value) = assignment.split_once('=').ok_or_else(|| {
            CircuitError(format!(
                "--set '{assignment}': expected name=value, e.g. gain=0.8"
            ))
        })?;
        let key = key.trim();
        let value = value.trim();
        match key {
            "gain" | "level" => {
                let v: f64 = value.parse().map_err(|_| {
                    CircuitError(format!("--set {key}={value}: '{value}' is not a number"))
                })?;
                if !(0.0..=1.0).contains(&v) {
                    return Err(CircuitError(format!(
                        "--set {key}={value}: a pot position runs from 0 to 1"
                    )));
                }
                if key == "gain" {
                    self.gain = v;
                } else {
                    self.level = v;
                }
            }
            "position" => {
                self.position = value.parse().map_err(|_| {
                    CircuitError(format!(
                        "--set position={value}: expected a switch index 0, 1, 2, ..."
                    ))
                })?;
            }
            other => {
                return Err(CircuitError(format!(
                    "--set {other}: unknown setting (known: gain, level, position)"
                )))
            }
        }
        Ok(())
    }
}
