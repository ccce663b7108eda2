//! Saved states: a current state loads as saved; a version 1 state (four fixed switch slots) is migrated with
//! notes; an older, newer, damaged or foreign state is replaced by the defaults (with a logged reason) instead
//! of failing; single values are clamped to their parameter's range, and values that are not numbers, of the
//! wrong type or of unknown parameters are replaced or dropped with a note.

use breakdown::session::{PersistedState, CANDIDATE, STATE_FIELD, STATE_VERSION};
use breakdown::state::{check_state, default_param_values, repair_state, same_value, StateProblem};
use breakdown_dsp::circuit::ONE_STAGE_TOML;
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

fn current() -> String {
    serde_json::to_string(&PersistedState::default()).unwrap()
}

fn gain(state: &PluginState) -> f32 {
    match state.params.get("gain") {
        Some(ParamValue::F32(v)) => *v,
        other => panic!("gain is {other:?}"),
    }
}

fn persisted(state: &PluginState) -> PersistedState {
    serde_json::from_str(&state.fields[STATE_FIELD]).unwrap()
}

#[test]
fn current_state_loads_unchanged() {
    let mut s = state_with(Some(&current()));
    assert_eq!(check_state(&s.fields), Ok(STATE_VERSION));
    let repair = repair_state(&mut s);
    assert_eq!(repair.problem, None);
    assert!(repair.notes.is_empty(), "{:?}", repair.notes);
    assert_eq!(gain(&s), 0.25);
}

#[test]
fn a_circuit_in_the_state_is_kept_and_a_bad_one_is_dropped_with_a_note() {
    let good = PersistedState {
        circuit: Some(ONE_STAGE_TOML.into()),
        circuit_file: Some("one-stage.toml".into()),
        ..PersistedState::default()
    };
    let mut s = state_with(Some(&serde_json::to_string(&good).unwrap()));
    assert!(repair_state(&mut s).notes.is_empty());
    assert_eq!(persisted(&s), good);
    let bad = PersistedState {
        circuit: Some("supply_volts = 1000.0".into()),
        ..PersistedState::default()
    };
    let mut s = state_with(Some(&serde_json::to_string(&bad).unwrap()));
    let repair = repair_state(&mut s);
    assert!(
        repair
            .notes
            .iter()
            .any(|n| n.contains("circuit is refused")),
        "{:?}",
        repair.notes
    );
    assert_eq!(persisted(&s).circuit, None);
    assert_eq!(gain(&s), 0.25, "the rest of the state is kept");
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
        assert_eq!(repair_state(&mut s).problem, Some(expected));
        assert_eq!(gain(&s), 0.8, "default gain restored");
        assert_eq!(
            check_state(&s.fields),
            Ok(STATE_VERSION),
            "repaired state is current"
        );
    }
    for damaged in [
        "{not json",
        r#"{"version":"one"}"#,
        r#"{"version":2,"scope_ms":"wide"}"#,
    ] {
        let mut s = state_with(Some(damaged));
        assert!(
            matches!(repair_state(&mut s).problem, Some(StateProblem::Damaged(_))),
            "{damaged}"
        );
        assert_eq!(gain(&s), 0.8);
    }
}

/// A version 1 state as that plugin saved it: enum ids as strings, the pairs as p1_pos... and input_cal.
#[test]
fn a_version_1_state_loads_with_everything_it_still_understands() {
    let mut params = BTreeMap::new();
    for (id, v) in [
        ("gain", ParamValue::F32(0.6)),
        ("level", ParamValue::F32(0.7)),
        ("switch", ParamValue::String("pair2".into())),
        ("ab", ParamValue::Bool(true)),
        ("compare_with", ParamValue::String("candidate".into())),
        ("p1_pos", ParamValue::F32(20.0)),
        ("p1_neg", ParamValue::F32(20.0)),
        ("p2_pos", ParamValue::F32(18.0)),
        ("p2_neg", ParamValue::F32(5.6)),
        ("cand_pos", ParamValue::F32(13.0)),
        ("cand_neg", ParamValue::F32(8.2)),
        ("snap_e24", ParamValue::Bool(true)),
        ("input_cal", ParamValue::F32(0.4)),
        ("trim", ParamValue::F32(-3.0)),
        ("quality", ParamValue::String("x2".into())),
        ("listen", ParamValue::String("clamp".into())),
        ("level_match", ParamValue::Bool(true)),
        ("run_all", ParamValue::Bool(false)),
    ] {
        params.insert(id.to_string(), v);
    }
    let mut fields = BTreeMap::new();
    fields.insert(
        STATE_FIELD.into(),
        r#"{"version":1,"scope_ms":35.0}"#.into(),
    );
    let mut s = PluginState {
        version: "0.1.0".into(),
        params,
        fields,
    };
    let repair = repair_state(&mut s);
    assert_eq!(repair.problem, None);
    assert!(
        repair.notes.iter().any(|n| n.contains("version 1")),
        "{:?}",
        repair.notes
    );
    let expect = [
        ("gain", ParamValue::F32(0.6)),
        ("level", ParamValue::F32(0.7)),
        // Pair 2 (18 V / 5.6 V) is the built-in circuit's position 2.
        ("position", ParamValue::I32(2)),
        ("ab", ParamValue::Bool(true)),
        ("compare_with", ParamValue::I32(CANDIDATE as i32)),
        ("candidate_positive", ParamValue::F32(13.0)),
        ("candidate_negative", ParamValue::F32(8.2)),
        ("candidate_family", ParamValue::String("1n47xxa".into())),
        ("volts_at_full_scale", ParamValue::F32(0.4)),
        ("trim", ParamValue::F32(-3.0)),
        ("quality", ParamValue::String("x2".into())),
        ("listen", ParamValue::String("clamp".into())),
        ("level_match", ParamValue::Bool(true)),
        ("run_all", ParamValue::Bool(false)),
    ];
    for (id, v) in expect {
        assert!(same_value(&s.params[id], &v), "{id}: {:?}", s.params[id]);
    }
    for old in ["switch", "p1_pos", "cand_pos", "input_cal"] {
        assert!(!s.params.contains_key(old), "{old} left in the state");
    }
    let p = persisted(&s);
    assert_eq!(
        (p.version, p.scope_ms, p.circuit),
        (STATE_VERSION, 35.0, None)
    );
}

#[test]
fn single_values_are_clamped_or_replaced_with_a_note() {
    let mut s = state_with(Some(&current()));
    s.params.insert("level".into(), ParamValue::F32(f32::NAN));
    s.params.insert("trim".into(), ParamValue::F32(99.0));
    s.params.insert("position".into(), ParamValue::I32(-4));
    s.params
        .insert("quality".into(), ParamValue::String("x3".into()));
    s.params.insert("run_all".into(), ParamValue::F32(1.0));
    s.params.insert("volume".into(), ParamValue::F32(1.0));
    let repair = repair_state(&mut s);
    assert_eq!(repair.problem, None);
    assert!(same_value(&s.params["level"], &ParamValue::F32(0.5)));
    assert!(same_value(&s.params["trim"], &ParamValue::F32(24.0)));
    assert!(same_value(&s.params["position"], &ParamValue::I32(0)));
    assert!(same_value(
        &s.params["quality"],
        &ParamValue::String("x4".into())
    ));
    assert!(same_value(&s.params["run_all"], &ParamValue::Bool(true)));
    assert!(!s.params.contains_key("volume"));
    assert_eq!(gain(&s), 0.25, "other values kept");
    for needle in [
        "'level'",
        "'trim'",
        "'position'",
        "'quality'",
        "'run_all'",
        "'volume'",
    ] {
        assert!(
            repair.notes.iter().any(|n| n.contains(needle)),
            "{needle}: {:?}",
            repair.notes
        );
    }
}

/// States saved before the listening chain existed hold `listen = "wiper"` and no `cabinet`: they load with
/// the wiper (now the bare wiper, as they meant) and the default cabinet, without notes; a state that leaves
/// `listen` out gets the new default, the chain.
#[test]
fn a_state_from_before_the_chain_keeps_the_wiper() {
    let mut s = state_with(Some(&current()));
    s.params
        .insert("listen".into(), ParamValue::String("wiper".into()));
    s.params.remove("cabinet");
    let repair = repair_state(&mut s);
    assert!(repair.notes.is_empty(), "{:?}", repair.notes);
    assert!(same_value(
        &s.params["listen"],
        &ParamValue::String("wiper".into())
    ));
    assert!(same_value(
        &s.params["cabinet"],
        &ParamValue::String("builtin".into())
    ));
    let mut s = state_with(Some(&current()));
    s.params.remove("listen");
    repair_state(&mut s);
    assert!(same_value(
        &s.params["listen"],
        &ParamValue::String("chain".into())
    ));
}
