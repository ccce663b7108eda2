//! Saved states: the check every state gets before the framework loads it (`repair_state`), and the migration
//! of older layouts. Nothing in a state is trusted: every parameter value is checked against its parameter
//! (clamped to its range, a value that is not a number or of the wrong type replaced by the default), unknown
//! keys are dropped, a circuit text that does not parse is dropped, and every change is logged with its
//! reason. A state that cannot be read at all loads as the defaults, with the reason logged.

use crate::params::{float_bounds, model_vz, BreakdownParams, Kind};
use crate::session::{
    builtin, PersistedState, CANDIDATE, SCOPE_MS_RANGE, STATE_FIELD, STATE_VERSION,
};
use breakdown_dsp::Circuit;
use nice_plug::plugin::{ParamValue, PluginState};
use nice_plug::prelude::*;
use std::collections::BTreeMap;

/// Why a saved state is not used as it stands.
#[derive(Clone, Debug, PartialEq)]
pub enum StateProblem {
    MissingVersion,
    Damaged(String),
    /// A layout older than any this plugin reads (version 0).
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
                "the saved state has version {v}, older than any this plugin reads (1 .. {STATE_VERSION})"
            ),
            StateProblem::Newer(v) => write!(
                f,
                "the saved state has version {v}, newer than this plugin's {STATE_VERSION}"
            ),
        }
    }
}

/// What `repair_state` did.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Repair {
    /// Set when the whole state was replaced by the defaults.
    pub problem: Option<StateProblem>,
    /// Every value changed, dropped or moved, with the reason (all of it is logged too).
    pub notes: Vec<String>,
}

/// The version of our persisted field, or why it has none.
fn field_version(
    fields: &BTreeMap<String, String>,
) -> Result<(u32, serde_json::Value), StateProblem> {
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
    Ok((version, value))
}

/// Check our persisted field; Ok(version) when this plugin reads that layout (1 is migrated on load).
pub fn check_state(fields: &BTreeMap<String, String>) -> Result<u32, StateProblem> {
    let (version, value) = field_version(fields)?;
    if version == 0 {
        return Err(StateProblem::Older(version));
    }
    if version > STATE_VERSION {
        return Err(StateProblem::Newer(version));
    }
    serde_json::from_value::<PersistedState>(value)
        .map_err(|e| StateProblem::Damaged(e.to_string()))?;
    Ok(version)
}

/// Every parameter at its default, as the framework's state map holds them.
pub fn default_param_values() -> BTreeMap<String, ParamValue> {
    let params = BreakdownParams::default();
    params
        .param_map()
        .into_iter()
        .filter_map(|(id, _, _)| default_value(&params, &id).map(|v| (id, v)))
        .collect()
}

fn default_value(params: &BreakdownParams, id: &str) -> Option<ParamValue> {
    Some(match params.kind(id)? {
        Kind::Float(p) => ParamValue::F32(p.default_plain_value()),
        Kind::Int(p) => ParamValue::I32(p.default_plain_value()),
        Kind::Bool(p) => ParamValue::Bool(p.default_plain_value()),
        Kind::Choice(_, default) => ParamValue::String(default.to_string()),
    })
}

/// Check one value against parameter `id`: Ok with the value to load (clamped into range), or Err with the
/// reason it cannot be used (the caller substitutes the default).
pub fn check_value(
    params: &BreakdownParams,
    id: &str,
    value: &ParamValue,
) -> Result<ParamValue, String> {
    let kind = params
        .kind(id)
        .ok_or_else(|| format!("'{id}' is not a parameter of this plugin"))?;
    match (kind, value) {
        (Kind::Float(p), ParamValue::F32(v)) => {
            if !v.is_finite() {
                return Err(format!("'{id}' = {v} is not a number"));
            }
            let (lo, hi) = float_bounds(p);
            Ok(ParamValue::F32(v.clamp(lo, hi)))
        }
        (Kind::Int(p), ParamValue::I32(v)) => {
            let (lo, hi) = (p.preview_plain(0.0), p.preview_plain(1.0));
            Ok(ParamValue::I32((*v).clamp(lo.min(hi), lo.max(hi))))
        }
        (Kind::Bool(_), ParamValue::Bool(v)) => Ok(ParamValue::Bool(*v)),
        (Kind::Choice(ids, _), ParamValue::String(s)) => {
            if ids.contains(&s.as_str()) {
                Ok(ParamValue::String(s.clone()))
            } else {
                Err(format!(
                    "'{id}' = \"{}\" is none of {}",
                    breakdown_dsp::units::clip(s, 30),
                    ids.join(", ")
                ))
            }
        }
        (Kind::Choice(ids, _), ParamValue::I32(k)) => match ids.get(*k as usize) {
            Some(s) if *k >= 0 => Ok(ParamValue::String(s.to_string())),
            _ => Err(format!(
                "'{id}' = {k} is not a choice index (0 .. {})",
                ids.len().saturating_sub(1)
            )),
        },
        (_, other) => Err(format!(
            "'{id}' holds {other:?}, not a value of this parameter's type"
        )),
    }
}

/// Two saved values are the same (`ParamValue` has no `PartialEq`).
pub fn same_value(a: &ParamValue, b: &ParamValue) -> bool {
    match (a, b) {
        (ParamValue::F32(x), ParamValue::F32(y)) => x.to_bits() == y.to_bits(),
        (ParamValue::I32(x), ParamValue::I32(y)) => x == y,
        (ParamValue::Bool(x), ParamValue::Bool(y)) => x == y,
        (ParamValue::String(x), ParamValue::String(y)) => x == y,
        _ => false,
    }
}

fn note(notes: &mut Vec<String>, text: String) {
    nice_warn!("Breakdown: {text}");
    notes.push(text);
}

/// Repair a state before the framework loads it (see the module text). Older layouts are migrated.
pub fn repair_state(state: &mut PluginState) -> Repair {
    let mut repair = Repair::default();
    let version = match check_state(&state.fields) {
        Ok(v) => v,
        Err(problem) => {
            nice_warn!("Breakdown: {problem}; loading the default settings instead");
            state.params = default_param_values();
            state.fields.clear();
            state.fields.insert(
                STATE_FIELD.to_string(),
                serde_json::to_string(&PersistedState::default()).unwrap_or_default(),
            );
            repair.problem = Some(problem);
            return repair;
        }
    };
    let mut persisted: PersistedState = state
        .fields
        .get(STATE_FIELD)
        .and_then(|t| serde_json::from_str(t).ok())
        .unwrap_or_default();
    if version == 1 {
        migrate_v1(&mut state.params, &mut repair.notes);
        persisted.version = STATE_VERSION;
    }
    check_persisted(&mut persisted, &mut repair.notes);
    check_params(&mut state.params, &mut repair.notes);
    state.fields.insert(
        STATE_FIELD.to_string(),
        serde_json::to_string(&persisted).unwrap_or_default(),
    );
    repair
}

fn check_persisted(p: &mut PersistedState, notes: &mut Vec<String>) {
    if !(p.scope_ms.is_finite() && (SCOPE_MS_RANGE.0..=SCOPE_MS_RANGE.1).contains(&p.scope_ms)) {
        note(
            notes,
            format!(
                "the saved scope window {} ms is outside {} .. {} ms; using {} ms",
                p.scope_ms,
                SCOPE_MS_RANGE.0,
                SCOPE_MS_RANGE.1,
                crate::session::default_scope_ms()
            ),
        );
        p.scope_ms = crate::session::default_scope_ms();
    }
    if let Some(text) = &p.circuit {
        if let Err(e) = Circuit::parse(text) {
            note(
                notes,
                format!(
                    "the saved circuit is refused ({e}); the session runs the built-in circuit"
                ),
            );
            p.circuit = None;
            p.circuit_file = None;
        }
    }
}

fn check_params(values: &mut BTreeMap<String, ParamValue>, notes: &mut Vec<String>) {
    let params = BreakdownParams::default();
    let mut checked = BTreeMap::new();
    for (id, value) in std::mem::take(values) {
        if params.kind(&id).is_none() {
            note(
                notes,
                format!(
                    "dropped the saved value of '{}': no such parameter",
                    breakdown_dsp::units::clip(&id, 40)
                ),
            );
            continue;
        }
        let v = match check_value(&params, &id, &value) {
            Ok(v) => {
                if !same_value(&v, &value) {
                    note(
                        notes,
                        format!("'{id}' = {value:?} is outside its range; loaded as {v:?}"),
                    );
                }
                v
            }
            Err(reason) => {
                note(notes, format!("{reason}; using its default"));
                match default_value(&params, &id) {
                    Some(d) => d,
                    None => continue,
                }
            }
        };
        checked.insert(id, v);
    }
    // Parameters the state leaves out load at their defaults (so a loaded state is the whole session).
    for (id, d) in default_param_values() {
        checked.entry(id).or_insert(d);
    }
    *values = checked;
}

// ---------------------------------------------------------------------------------------------------------
// Version 1: four fixed switch slots (off, pair 1, pair 2, candidate) on the one-stage circuit.

/// Parameter ids of version 1 that no longer exist.
pub const V1_IDS: [&str; 8] = [
    "switch",
    "p1_pos",
    "p1_neg",
    "p2_pos",
    "p2_neg",
    "cand_pos",
    "cand_neg",
    "input_cal",
];
/// Version 1 defaults of the pair values (V), for pairs a state or preset leaves out.
const V1_PAIRS: [(&str, &str, f32, f32); 3] = [
    ("p1_pos", "p1_neg", 20.0, 20.0),
    ("p2_pos", "p2_neg", 18.0, 5.6),
    ("cand_pos", "cand_neg", 15.0, 9.1),
];
/// The old Zener range (V).
const V1_VZ: (f32, f32) = (2.4, 75.0);

/// An old switch slot: 0 off, 1 pair 1, 2 pair 2, 3 candidate.
fn v1_slot(value: Option<&ParamValue>, default: usize) -> usize {
    match value {
        Some(ParamValue::String(s)) => ["off", "pair1", "pair2", "candidate"]
            .iter()
            .position(|x| x == s)
            .unwrap_or(default),
        Some(ParamValue::I32(k)) if (0..4).contains(k) => *k as usize,
        _ => default,
    }
}

fn v1_float(values: &BTreeMap<String, ParamValue>, id: &str, default: f32) -> f32 {
    match values.get(id) {
        Some(ParamValue::F32(v)) if v.is_finite() => *v,
        _ => default,
    }
}

/// Move version 1 parameters onto today's: the old pair slots onto the built-in circuit's positions with the
/// same parts, the old candidate onto the candidate; a heard or compared pair that matches no position becomes
/// the candidate when the old candidate was not in use; everything else that cannot be kept is dropped, each
/// with a note.
pub fn migrate_v1(values: &mut BTreeMap<String, ParamValue>, notes: &mut Vec<String>) {
    note(
        notes,
        "the saved state is of version 1 (four fixed switch slots on the one-stage circuit); moving it onto \
         the built-in circuit's switch"
            .into(),
    );
    let snap = !matches!(values.get("snap_e24"), Some(ParamValue::Bool(false)));
    let old_vz = |v: f32| model_vz(v.clamp(V1_VZ.0, V1_VZ.1), snap);
    let pairs: Vec<(f64, f64)> = V1_PAIRS
        .iter()
        .map(|(p, n, dp, dn)| {
            (
                old_vz(v1_float(values, p, *dp)),
                old_vz(v1_float(values, n, *dn)),
            )
        })
        .collect();
    let heard = v1_slot(values.get("switch"), 1);
    let compared = v1_slot(values.get("compare_with"), 2);
    let circuit = builtin();
    let matching = |pair: (f64, f64)| {
        circuit
            .clamp
            .position
            .iter()
            .position(|p| match (&p.positive, &p.negative) {
                (Some(a), Some(b)) => {
                    a.izt.is_none()
                        && b.izt.is_none()
                        && (a.volts - pair.0).abs() < 1e-6
                        && (b.volts - pair.1).abs() < 1e-6
                }
                _ => false,
            })
    };
    let off = circuit
        .clamp
        .position
        .iter()
        .position(|p| p.positive.is_none() && p.negative.is_none());
    let candidate_used = heard == 3 || compared == 3;
    let mut candidate = pairs[2];
    let mut candidate_taken_by: Option<usize> = None;
    let mut place = |slot: usize, role: &str, notes: &mut Vec<String>| -> i32 {
        match slot {
            0 => match off {
                Some(k) => k as i32,
                None => {
                    note(notes, format!("the {role} position 'off' has no counterpart in the built-in circuit; using position 0"));
                    0
                }
            },
            3 => CANDIDATE as i32,
            pair => {
                let volts = pairs[pair - 1];
                if let Some(k) = matching(volts) {
                    return k as i32;
                }
                let describe = format!("pair {pair} ({} V / {} V)", volts.0, volts.1);
                if !candidate_used && candidate_taken_by.is_none_or(|p| p == pair) {
                    candidate_taken_by = Some(pair);
                    candidate = volts;
                    note(notes, format!("the {role} {describe} is no position of the built-in circuit; it becomes the candidate"));
                    CANDIDATE as i32
                } else {
                    note(notes, format!("the {role} {describe} is no position of the built-in circuit and the candidate is taken; dropped, the {role} position is the default"));
                    if role == "heard" {
                        1
                    } else {
                        2
                    }
                }
            }
        }
    };
    let position = place(heard, "heard", notes);
    let compare_with = place(compared, "compare-with", notes);
    for (pair, volts) in pairs.iter().enumerate().take(2) {
        let used = heard == pair + 1 || compared == pair + 1;
        if !used && matching(*volts).is_none() {
            note(
                notes,
                format!(
                    "pair {} ({} V / {} V) was neither heard nor compared and is no position of the built-in \
                     circuit; dropped",
                    pair + 1,
                    volts.0,
                    volts.1
                ),
            );
        }
    }
    let calibration = values.get("input_cal").cloned();
    for id in V1_IDS {
        values.remove(id);
    }
    values.insert("position".into(), ParamValue::I32(position));
    values.insert("compare_with".into(), ParamValue::I32(compare_with));
    values.insert(
        "candidate_positive".into(),
        ParamValue::F32(candidate.0 as f32),
    );
    values.insert(
        "candidate_negative".into(),
        ParamValue::F32(candidate.1 as f32),
    );
    values.insert(
        "candidate_family".into(),
        ParamValue::String("1n47xxa".into()),
    );
    if let Some(v) = calibration {
        values.insert("volts_at_full_scale".into(), v);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn v1(pairs: [(f32, f32); 3], switch: &str, compare: &str) -> BTreeMap<String, ParamValue> {
        let mut m = BTreeMap::new();
        for ((p, n, _, _), (vp, vn)) in V1_PAIRS.iter().zip(pairs) {
            m.insert(p.to_string(), ParamValue::F32(vp));
            m.insert(n.to_string(), ParamValue::F32(vn));
        }
        m.insert("switch".into(), ParamValue::String(switch.into()));
        m.insert("compare_with".into(), ParamValue::String(compare.into()));
        m.insert("input_cal".into(), ParamValue::F32(0.5));
        m.insert("gain".into(), ParamValue::F32(0.3));
        m
    }

    #[test]
    fn version_1_pairs_map_onto_the_builtin_positions() {
        // The built-in circuit (presets-demo/builtin-preamp.toml): 0 off, 1 symmetric 20 V, 2 asymmetric 18/5.6 V.
        let mut m = v1(
            [(20.0, 20.0), (18.0, 5.6), (15.0, 9.1)],
            "pair2",
            "candidate",
        );
        let mut notes = Vec::new();
        migrate_v1(&mut m, &mut notes);
        assert!(same_value(&m["position"], &ParamValue::I32(2)));
        assert!(same_value(
            &m["compare_with"],
            &ParamValue::I32(CANDIDATE as i32)
        ));
        assert!(same_value(&m["candidate_positive"], &ParamValue::F32(15.0)));
        assert!(same_value(&m["volts_at_full_scale"], &ParamValue::F32(0.5)));
        assert!(same_value(&m["gain"], &ParamValue::F32(0.3)));
        assert!(V1_IDS.iter().all(|id| !m.contains_key(*id)));
    }

    #[test]
    fn an_unmatched_heard_pair_becomes_the_candidate_and_the_rest_is_noted() {
        let mut m = v1([(24.0, 24.0), (12.0, 12.0), (15.0, 9.1)], "pair1", "pair2");
        let mut notes = Vec::new();
        migrate_v1(&mut m, &mut notes);
        assert!(same_value(
            &m["position"],
            &ParamValue::I32(CANDIDATE as i32)
        ));
        assert!(same_value(&m["candidate_positive"], &ParamValue::F32(24.0)));
        // Pair 2 cannot go anywhere: dropped, compare-with falls back to its default, with a note.
        assert!(same_value(&m["compare_with"], &ParamValue::I32(2)));
        assert!(
            notes
                .iter()
                .any(|n| n.contains("pair 2 (12 V / 12 V)") && n.contains("dropped")),
            "{notes:?}"
        );
    }
}
