//! Plugin presets in a TOML format of our own (`presets-demo/plugin/*.toml`), turned into the framework's state
//! object so the editor (or a host test) can load them. The keys under `[settings]` are the parameter ids
//! (plugin/README.md); every problem is reported with the key that has it. Format 1 presets (the four fixed
//! switch slots: `switch`, `pair1`, `pair2`, `candidate`, `input_calibration`, `trim_db`) still load, through
//! the same migration as a version 1 saved state, with notes saying what was read how.

use crate::params::{float_bounds, BreakdownParams, Kind};
use crate::session::{PersistedState, CANDIDATE, STATE_FIELD};
use crate::state::{default_param_values, migrate_v1};
use breakdown_dsp::units::clip;
use nice_plug::plugin::{ParamValue, PluginState};
use std::collections::BTreeMap;

/// Version of the preset file format.
pub const PRESET_FORMAT: u32 = 2;
/// Longest preset file read (bytes).
pub const MAX_PRESET_BYTES: usize = 64 * 1024;

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

/// A preset: its name and description, and the parameter values it sets (by parameter id).
#[derive(Clone, Debug)]
pub struct Preset {
    pub format: u32,
    pub name: String,
    pub description: String,
    pub values: BTreeMap<String, ParamValue>,
    /// How old keys were read (format 1), for the log.
    pub notes: Vec<String>,
}

/// Keys of a format 1 `[settings]` table.
const V1_KEYS: [&str; 14] = [
    "gain",
    "level",
    "switch",
    "compare_with",
    "pair1",
    "pair2",
    "candidate",
    "snap_e24",
    "input_calibration",
    "trim_db",
    "quality",
    "listen",
    "level_match",
    "run_all",
];

fn number(key: &str, v: &toml::Value) -> Result<f64, String> {
    match v {
        toml::Value::Float(f) => Ok(*f),
        toml::Value::Integer(i) => Ok(*i as f64),
        other => Err(format!(
            "settings.{key} = {}: expected a number",
            clip(&other.to_string(), 30)
        )),
    }
}

fn in_range(key: &str, v: f64, lo: f32, hi: f32) -> Result<ParamValue, String> {
    if !v.is_finite() || v < lo as f64 || v > hi as f64 {
        return Err(format!("settings.{key} = {v} is outside {lo} .. {hi}"));
    }
    Ok(ParamValue::F32(v as f32))
}

/// One `[settings]` value of format 2, checked against parameter `key`.
fn read_value(params: &BreakdownParams, key: &str, v: &toml::Value) -> Result<ParamValue, String> {
    let kind = params.kind(key).ok_or_else(|| {
        format!(
            "settings.{}: not a parameter id (see plugin/README.md for the list)",
            clip(key, 30)
        )
    })?;
    match kind {
        Kind::Float(p) => {
            let (lo, hi) = float_bounds(p);
            in_range(key, number(key, v)?, lo, hi)
        }
        Kind::Int(_) => match v {
            toml::Value::Integer(k) if (0..=CANDIDATE as i64).contains(k) => {
                Ok(ParamValue::I32(*k as i32))
            }
            toml::Value::String(s) if s.eq_ignore_ascii_case("candidate") => {
                Ok(ParamValue::I32(CANDIDATE as i32))
            }
            other => Err(format!(
                "settings.{key} = {}: expected a switch position counted from 0 (0 .. {}) or \"candidate\"",
                clip(&other.to_string(), 30),
                CANDIDATE - 1
            )),
        },
        Kind::Bool(_) => match v {
            toml::Value::Boolean(b) => Ok(ParamValue::Bool(*b)),
            other => Err(format!(
                "settings.{key} = {}: expected true or false",
                clip(&other.to_string(), 30)
            )),
        },
        Kind::Choice(ids, _) => match v {
            toml::Value::String(s) if ids.contains(&s.as_str()) => {
                Ok(ParamValue::String(s.clone()))
            }
            other => Err(format!(
                "settings.{key} = {}: expected one of \"{}\"",
                clip(&other.to_string(), 30),
                ids.join("\", \"")
            )),
        },
    }
}

/// Format 1 settings as version 1 parameter values (then migrated like a version 1 state).
fn read_v1(
    settings: &toml::Table,
    notes: &mut Vec<String>,
) -> Result<BTreeMap<String, ParamValue>, String> {
    let mut m = BTreeMap::new();
    for (key, v) in settings {
        if !V1_KEYS.contains(&key.as_str()) {
            return Err(format!(
                "settings.{}: not a key of preset format 1",
                clip(key, 30)
            ));
        }
        let value = match key.as_str() {
            "gain" | "level" => in_range(key, number(key, v)?, 0.0, 1.0)?,
            "input_calibration" => in_range(key, number(key, v)?, 0.05, 5.0)?,
            "trim_db" => in_range(key, number(key, v)?, -24.0, 24.0)?,
            "snap_e24" | "level_match" | "run_all" => match v {
                toml::Value::Boolean(b) => ParamValue::Bool(*b),
                _ => return Err(format!("settings.{key}: expected true or false")),
            },
            "switch" | "compare_with" => match v.as_str() {
                Some(s @ ("off" | "pair1" | "pair2" | "candidate")) => ParamValue::String(s.into()),
                _ => {
                    return Err(format!(
                        "settings.{key} = {}: expected one of off, pair1, pair2, candidate",
                        clip(&v.to_string(), 30)
                    ))
                }
            },
            "listen" => match v.as_str() {
                Some(s @ ("wiper" | "clamp")) => ParamValue::String(s.into()),
                _ => return Err(format!("settings.{key}: expected \"wiper\" or \"clamp\"")),
            },
            "quality" => match v.as_integer() {
                Some(q @ (1 | 2 | 4 | 8 | 16)) => ParamValue::String(format!("x{q}")),
                _ => {
                    return Err(format!(
                        "settings.quality = {}: expected 1, 2, 4, 8 or 16",
                        clip(&v.to_string(), 30)
                    ))
                }
            },
            pair => {
                let ids = match pair {
                    "pair1" => ("p1_pos", "p1_neg"),
                    "pair2" => ("p2_pos", "p2_neg"),
                    _ => ("cand_pos", "cand_neg"),
                };
                let values = v.as_array().filter(|a| a.len() == 2).ok_or_else(|| {
                    format!(
                        "settings.{pair}: expected [positive-clamp volts, negative-clamp volts]"
                    )
                })?;
                m.insert(
                    ids.0.into(),
                    in_range(pair, number(pair, &values[0])?, 2.4, 75.0)?,
                );
                m.insert(
                    ids.1.into(),
                    in_range(pair, number(pair, &values[1])?, 2.4, 75.0)?,
                );
                continue;
            }
        };
        let id = match key.as_str() {
            "input_calibration" => "input_cal",
            "trim_db" => "trim",
            k => k,
        };
        m.insert(id.to_string(), value);
    }
    notes.push(
        "preset format 1: its keys (switch, pair1, pair2, candidate, input_calibration, trim_db, quality as a \
         number) are read as their format 2 parameter ids"
            .into(),
    );
    migrate_v1(&mut m, notes);
    Ok(m)
}

impl Preset {
    /// Parse a preset file's text.
    pub fn from_toml(text: &str) -> Result<Preset, String> {
        if text.len() > MAX_PRESET_BYTES {
            return Err(format!(
                "preset: {} bytes is too long for a preset (at most {MAX_PRESET_BYTES})",
                text.len()
            ));
        }
        let table: toml::Table = toml::from_str(text)
            .map_err(|e| format!("preset is not valid TOML: {}", e.to_string().trim()))?;
        for key in table.keys() {
            if !["format", "name", "description", "settings"].contains(&key.as_str()) {
                return Err(format!(
                    "preset: unknown key '{}' (a preset has format, name, description and [settings])",
                    clip(key, 30)
                ));
            }
        }
        let format = table
            .get("format")
            .and_then(|v| v.as_integer())
            .ok_or("preset: format is missing (format = 2)")?;
        let name = table
            .get("name")
            .and_then(|v| v.as_str())
            .ok_or("preset: name is missing (name = \"...\")")?
            .to_string();
        let description = match table.get("description") {
            None => String::new(),
            Some(v) => v
                .as_str()
                .ok_or("preset: description must be text")?
                .to_string(),
        };
        let empty = toml::Table::new();
        let settings = match table.get("settings") {
            None => &empty,
            Some(v) => v
                .as_table()
                .ok_or("preset: settings must be a table ([settings])")?,
        };
        let mut notes = Vec::new();
        let values = match format {
            1 => read_v1(settings, &mut notes)?,
            2 => {
                let params = BreakdownParams::default();
                let mut m = BTreeMap::new();
                for (key, v) in settings {
                    m.insert(key.clone(), read_value(&params, key, v)?);
                }
                m
            }
            f => {
                return Err(format!(
                    "preset format {f} is not supported (this plugin reads formats 1 and {PRESET_FORMAT})"
                ))
            }
        };
        Ok(Preset {
            format: format as u32,
            name,
            description,
            values,
            notes,
        })
    }

    /// The framework state this preset stands for: parameters it does not name at their defaults, the
    /// session's circuit and scope window kept from `current`.
    pub fn to_state(&self, current: &PersistedState) -> PluginState {
        let mut params = default_param_values();
        for (id, v) in &self.values {
            params.insert(id.clone(), v.clone());
        }
        let mut fields = BTreeMap::new();
        fields.insert(
            STATE_FIELD.to_string(),
            serde_json::to_string(current).unwrap_or_default(),
        );
        PluginState {
            version: env!("CARGO_PKG_VERSION").to_string(),
            params,
            fields,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::state::same_value;

    #[test]
    fn demo_presets_load_without_notes() {
        for (file, text) in DEMO_PRESETS {
            let p = Preset::from_toml(text).unwrap_or_else(|e| panic!("{file}: {e}"));
            assert!(!p.name.is_empty());
            assert_eq!(p.format, PRESET_FORMAT, "{file}");
            assert!(p.notes.is_empty(), "{file}: {:?}", p.notes);
        }
    }

    #[test]
    fn format_1_presets_still_load_with_a_note() {
        let text =
            "format = 1\nname = \"x\"\n[settings]\nswitch = \"pair2\"\ninput_calibration = 0.5\n\
                    trim_db = -6.0\nquality = 2\n";
        let p = Preset::from_toml(text).unwrap();
        assert!(same_value(&p.values["position"], &ParamValue::I32(2)));
        assert!(same_value(
            &p.values["volts_at_full_scale"],
            &ParamValue::F32(0.5)
        ));
        assert!(same_value(&p.values["trim"], &ParamValue::F32(-6.0)));
        assert!(same_value(
            &p.values["quality"],
            &ParamValue::String("x2".into())
        ));
        assert!(p.notes.iter().any(|n| n.contains("format 1")));
    }

    #[test]
    fn bad_presets_name_the_problem() {
        let cases = [
            ("format = 3\nname = \"x\"\n[settings]\n", "format 3"),
            (
                "format = 2\nname = \"x\"\n[settings]\ngain = 1.5\n",
                "settings.gain",
            ),
            (
                "format = 2\nname = \"x\"\n[settings]\nposition = 13\n",
                "settings.position",
            ),
            (
                "format = 2\nname = \"x\"\n[settings]\nquality = 3\n",
                "settings.quality",
            ),
            (
                "format = 2\nname = \"x\"\n[settings]\ncandidate_positive = 1.0\n",
                "settings.candidate_positive",
            ),
            (
                "format = 2\nname = \"x\"\n[settings]\nvolume = 1\n",
                "volume",
            ),
            (
                "format = 1\nname = \"x\"\n[settings]\npair1 = [1.0, 20.0]\n",
                "settings.pair1",
            ),
            ("format = 2\n[settings]\n", "name is missing"),
        ];
        for (text, needle) in cases {
            let e = Preset::from_toml(text).unwrap_err();
            assert!(e.contains(needle), "{e}");
        }
    }
}
