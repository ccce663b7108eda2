//! Saved state: a state of this version loads as saved; an older, newer, damaged or foreign state is replaced by
//! the defaults (with a logged reason) instead of failing; non-numbers in single values fall back to defaults.

use breakdown::params::{
    check_state, default_param_values, repair_state, PersistedState, StateProblem, STATE_FIELD,
    STATE_VERSION,
};
use nice_plug::plugin::{ParamValue, PluginState};
use std::collections::BTreeMap;

fn state_with(field: Option<&str>) -> PluginState {
    let mut params = default_param_values();
    params.insert("gain".into(), ParamValue::F32(0.25));
    let mut fields = BTreeMap::new();
    if let Some(f) = field {
        fields.insert(STATE_FIELD.to_string(), f.to_string());
    }
    PluginState {
        version: "0.1.0".into(),
        params,
        fields,
    }
}

fn gain(state: &PluginState) -> f32 {
    match state.params.get("gain") {
        Some(ParamValue::F32(v)) => *v,
        other => panic!("gain is {other:?}"),
    }
}

#[test]
fn current_state_loads_unchanged() {
    let text = serde_json::to_string(&PersistedState::default()).unwrap();
    let mut s = state_with(Some(&text));
    assert_eq!(check_state(&s.fields), Ok(()));
    assert_eq!(repair_state(&mut s), None);
    assert_eq!(gain(&s), 0.25);
}

#[test]
fn older_newer_damaged_and_missing_states_become_defaults() {
    let cases = [
        (
            Some(r#"{"version":0,"scope_ms":20.0}"#.to_string()),
            StateProblem::Older(0),
        ),
        (
            Some(format!(
                r#"{{"version":{},"scope_ms":20.0}}"#,
                STATE_VERSION + 1
            )),
            StateProblem::Newer(STATE_VERSION + 1),
        ),
        (None, StateProblem::MissingVersion),
        (
            Some(r#"{"scope_ms":20.0}"#.to_string()),
            StateProblem::MissingVersion,
        ),
    ];
    for (field, expected) in cases {
        let mut s = state_with(field.as_deref());
        assert_eq!(repair_state(&mut s), Some(expected));
        assert_eq!(gain(&s), 0.8, "default gain restored");
        assert_eq!(check_state(&s.fields), Ok(()), "repaired state is current");
    }
    for damaged in [
        "{not json",
        r#"{"version":"one"}"#,
        r#"{"version":1,"scope_ms":"wide"}"#,
    ] {
        let mut s = state_with(Some(damaged));
        assert!(
            matches!(repair_state(&mut s), Some(StateProblem::Damaged(_))),
            "{damaged}"
        );
        assert_eq!(gain(&s), 0.8);
    }
}

#[test]
fn a_value_that_is_not_a_number_falls_back_to_its_default() {
    let text = serde_json::to_string(&PersistedState::default()).unwrap();
    let mut s = state_with(Some(&text));
    s.params.insert("level".into(), ParamValue::F32(f32::NAN));
    assert_eq!(repair_state(&mut s), None);
    assert!(matches!(s.params.get("level"), Some(ParamValue::F32(v)) if *v == 0.5));
    assert_eq!(gain(&s), 0.25, "other values kept");
}
