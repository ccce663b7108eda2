//! Plugin presets in a TOML format of our own (`presets-demo/plugin/*.toml`), turned into the framework's state
//! object so the editor (or a host test) can load them. Every problem is reported with the key that has it.

use crate::params::{
    default_param_values, PersistedState, STATE_FIELD, ZENER_MAX_VOLTS, ZENER_MIN_VOLTS,
};
use nice_plug::plugin::{ParamValue, PluginState};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Version of the preset file format.
pub const PRESET_FORMAT: u32 = 1;

/// The demo presets shipped with the plugin (file name, text).
pub const DEMO_PRESETS: [(&str, &str); 3] = [
    (
        "rhythm-edge-check.toml",
        include_str!("../../presets-demo/plugin/rhythm-edge-check.toml"),
    ),
    (
        "asymmetric-lead.toml",
        include_str!("../../presets-demo/plugin/asymmetric-lead.toml"),
    ),
    (
        "hot-pickup-headroom.toml",
        include_str!("../../presets-demo/plugin/hot-pickup-headroom.toml"),
    ),
];

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Preset {
    pub format: u32,
    pub name: String,
    #[serde(default)]
    pub description: String,
    pub settings: PresetSettings,
}

/// Every field is optional: what is left out keeps its default.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PresetSettings {
    pub gain: Option<f32>,
    pub level: Option<f32>,
    /// "off", "pair1", "pair2" or "candidate".
    pub switch: Option<String>,
    pub compare_with: Option<String>,
    /// [positive-clamp volts, negative-clamp volts].
    pub pair1: Option<[f32; 2]>,
    pub pair2: Option<[f32; 2]>,
    pub candidate: Option<[f32; 2]>,
    pub snap_e24: Option<bool>,
    /// Peak volts at the input jack for 0 dBFS.
    pub input_calibration: Option<f32>,
    pub trim_db: Option<f32>,
    /// Oversampling factor: 1, 2, 4, 8 or 16.
    pub quality: Option<u32>,
    /// "wiper" or "clamp".
    pub listen: Option<String>,
    pub level_match: Option<bool>,
    pub run_all: Option<bool>,
}

fn range(key: &str, v: f32, lo: f32, hi: f32) -> Result<ParamValue, String> {
    if !v.is_finite() || v < lo || v > hi {
        return Err(format!("settings.{key} = {v} is outside {lo} .. {hi}"));
    }
    Ok(ParamValue::F32(v))
}

fn choice(key: &str, v: &str, allowed: &[&str]) -> Result<ParamValue, String> {
    if allowed.contains(&v) {
        Ok(ParamValue::String(v.to_string()))
    } else {
        Err(format!(
            "settings.{key} = \"{v}\": expected one of {}",
            allowed.join(", ")
        ))
    }
}

impl Preset {
    /// Parse a preset file's text.
    pub fn from_toml(text: &str) -> Result<Preset, String> {
        let preset: Preset = toml::from_str(text).map_err(|e| format!("preset: {e}"))?;
        if preset.format != PRESET_FORMAT {
            return Err(format!(
                "preset format {} is not supported (this plugin reads format {PRESET_FORMAT})",
                preset.format
            ));
        }
        preset.to_state()?;
        Ok(preset)
    }

    /// The framework state this preset stands for (parameters not named keep their defaults).
    pub fn to_state(&self) -> Result<PluginState, String> {
        let s = &self.settings;
        let mut params = default_param_values();
        let mut set = |id: &str, v: ParamValue| {
            params.insert(id.to_string(), v);
        };
        const POSITIONS: [&str; 4] = ["off", "pair1", "pair2", "candidate"];
        if let Some(v) = s.gain {
            set("gain", range("gain", v, 0.0, 1.0)?);
        }
        if let Some(v) = s.level {
            set("level", range("level", v, 0.0, 1.0)?);
        }
        if let Some(v) = &s.switch {
            set("switch", choice("switch", v, &POSITIONS)?);
        }
        if let Some(v) = &s.compare_with {
            set("compare_with", choice("compare_with", v, &POSITIONS)?);
        }
        for (key, ids, value) in [
            ("pair1", ["p1_pos", "p1_neg"], s.pair1),
            ("pair2", ["p2_pos", "p2_neg"], s.pair2),
            ("candidate", ["cand_pos", "cand_neg"], s.candidate),
        ] {
            if let Some([p, n]) = value {
                set(ids[0], range(key, p, ZENER_MIN_VOLTS, ZENER_MAX_VOLTS)?);
                set(ids[1], range(key, n, ZENER_MIN_VOLTS, ZENER_MAX_VOLTS)?);
            }
        }
        if let Some(v) = s.snap_e24 {
            set("snap_e24", ParamValue::Bool(v));
        }
        if let Some(v) = s.input_calibration {
            set("input_cal", range("input_calibration", v, 0.05, 5.0)?);
        }
        if let Some(v) = s.trim_db {
            set("trim", range("trim_db", v, -24.0, 24.0)?);
        }
        if let Some(q) = s.quality {
            let id = match q {
                1 => "x1",
                2 => "x2",
                4 => "x4",
                8 => "x8",
                16 => "x16",
                _ => return Err(format!("settings.quality = {q}: expected 1, 2, 4, 8 or 16")),
            };
            set("quality", ParamValue::String(id.into()));
        }
        if let Some(v) = &s.listen {
            set("listen", choice("listen", v, &["wiper", "clamp"])?);
        }
        if let Some(v) = s.level_match {
            set("level_match", ParamValue::Bool(v));
        }
        if let Some(v) = s.run_all {
            set("run_all", ParamValue::Bool(v));
        }
        let mut fields = BTreeMap::new();
        fields.insert(
            STATE_FIELD.to_string(),
            serde_json::to_string(&PersistedState::default()).map_err(|e| e.to_string())?,
        );
        Ok(PluginState {
            version: env!("CARGO_PKG_VERSION").to_string(),
            params,
            fields,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_presets_load() {
        for (file, text) in DEMO_PRESETS {
            let p = Preset::from_toml(text).unwrap_or_else(|e| panic!("{file}: {e}"));
            assert!(!p.name.is_empty());
        }
    }

    #[test]
    fn bad_presets_name_the_problem() {
        let cases = [
            ("format = 2\nname = \"x\"\n[settings]\n", "format 2"),
            (
                "format = 1\nname = \"x\"\n[settings]\ngain = 1.5\n",
                "settings.gain",
            ),
            (
                "format = 1\nname = \"x\"\n[settings]\nswitch = \"pair3\"\n",
                "settings.switch",
            ),
            (
                "format = 1\nname = \"x\"\n[settings]\nquality = 3\n",
                "settings.quality",
            ),
            (
                "format = 1\nname = \"x\"\n[settings]\npair1 = [1.0, 20.0]\n",
                "settings.pair1",
            ),
            (
                "format = 1\nname = \"x\"\n[settings]\nvolume = 1\n",
                "volume",
            ),
        ];
        for (text, needle) in cases {
            let e = Preset::from_toml(text).unwrap_err();
            assert!(e.contains(needle), "{e}");
        }
    }
}
