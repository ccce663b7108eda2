//! Property tests (proptest): any bytes or JSON as a saved plugin state, and any text as a preset, give a
//! valid state or an error message; never a panic. "Valid" means: our field is of the current version, every
//! parameter is present with a value its parameter accepts unchanged, and a circuit in the field parses.

use breakdown::params::BreakdownParams;
use breakdown::presets::Preset;
use breakdown::session::{PersistedState, STATE_FIELD, STATE_VERSION};
use breakdown::state::{check_state, check_value, default_param_values, repair_state, same_value};
use breakdown_dsp::circuit::ONE_STAGE_TOML;
use breakdown_dsp::Circuit;
use nice_plug::plugin::{ParamValue, PluginState};
use proptest::prelude::*;
use std::collections::BTreeMap;

fn assert_valid(state: &PluginState) {
    assert_eq!(check_state(&state.fields), Ok(STATE_VERSION));
    let persisted: PersistedState = serde_json::from_str(&state.fields[STATE_FIELD]).unwrap();
    if let Some(text) = &persisted.circuit {
        assert!(Circuit::parse(text).is_ok());
    }
    let params = BreakdownParams::default();
    let defaults = default_param_values();
    assert_eq!(state.params.len(), defaults.len());
    for (id, v) in &state.params {
        let checked = check_value(&params, id, v).expect("a value the parameter accepts");
        assert!(same_value(&checked, v), "{id}: {v:?} became {checked:?}");
    }
}

const IDS: [&str; 25] = [
    "gain",
    "level",
    "treble",
    "middle",
    "bass",
    "position",
    "compare_with",
    "ab",
    "candidate_positive",
    "candidate_negative",
    "candidate_family",
    "snap_e24",
    "volts_at_full_scale",
    "trim",
    "quality",
    "listen",
    "cabinet",
    "level_match",
    "run_all",
    // version 1 ids and one of nobody's
    "switch",
    "p1_pos",
    "cand_neg",
    "input_cal",
    "p2_neg",
    "nonsense",
];

fn value() -> impl Strategy<Value = ParamValue> {
    prop_oneof![
        any::<f32>().prop_map(ParamValue::F32),
        prop_oneof![
            Just(f32::NAN),
            Just(f32::INFINITY),
            Just(-1e30f32),
            Just(0.5f32)
        ]
        .prop_map(ParamValue::F32),
        any::<i32>().prop_map(ParamValue::I32),
        (-2i32..16).prop_map(ParamValue::I32),
        any::<bool>().prop_map(ParamValue::Bool),
        prop_oneof![
            Just("x4".to_string()),
            Just("pair1".to_string()),
            Just("candidate".to_string()),
            Just("1n52xxb".to_string()),
            Just("clamp".to_string()),
            Just("chain".to_string()),
            Just("none".to_string()),
            ".{0,12}",
        ]
        .prop_map(ParamValue::String),
    ]
}

/// Our field: random text, or JSON shaped like it with random members.
fn field() -> impl Strategy<Value = String> {
    let version = prop_oneof![
        (0u64..4).prop_map(|v| v.to_string()),
        any::<i64>().prop_map(|v| v.to_string()),
        Just("\"2\"".to_string()),
        Just("2.5".to_string()),
    ];
    let scope = prop_oneof![
        any::<f32>().prop_map(|v| if v.is_finite() {
            v.to_string()
        } else {
            "1e999".into()
        }),
        Just("\"wide\"".to_string()),
        Just("20.0".to_string()),
    ];
    let circuit = prop_oneof![
        Just("null".to_string()),
        Just(serde_json::to_string(ONE_STAGE_TOML).unwrap()),
        ".{0,40}".prop_map(|t| serde_json::to_string(&t).unwrap()),
        Just("17".to_string()),
    ];
    prop_oneof![
        ".{0,60}",
        (version, scope, circuit).prop_map(|(v, s, c)| {
            format!(r#"{{"version": {v}, "scope_ms": {s}, "circuit": {c}}}"#)
        }),
    ]
}

fn plugin_state() -> impl Strategy<Value = PluginState> {
    (
        proptest::collection::btree_map(proptest::sample::select(IDS.to_vec()), value(), 0..24),
        proptest::option::of(field()),
        proptest::collection::btree_map(".{0,8}", ".{0,8}", 0..2),
    )
        .prop_map(|(params, ours, others)| {
            let mut fields: BTreeMap<String, String> = others;
            if let Some(f) = ours {
                fields.insert(STATE_FIELD.into(), f);
            }
            PluginState {
                version: "0.1.0".into(),
                params: params
                    .into_iter()
                    .map(|(k, v)| (k.to_string(), v))
                    .collect(),
                fields,
            }
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn any_state_object_repairs_to_a_valid_state(mut state in plugin_state()) {
        repair_state(&mut state);
        assert_valid(&state);
    }

    /// What a host hands the plugin is bytes: whatever of them reads as the framework's JSON state repairs
    /// to a valid state; the rest is refused by the framework before it reaches us.
    #[test]
    fn any_bytes_repair_to_a_valid_state_or_are_refused(bytes in proptest::collection::vec(any::<u8>(), 0..200)) {
        if let Ok(mut state) = serde_json::from_slice::<PluginState>(&bytes) {
            repair_state(&mut state);
            assert_valid(&state);
        }
    }

    /// A saved state, serialised, with bytes flipped: valid after repair when it still reads.
    #[test]
    fn a_damaged_saved_state_repairs_or_is_refused(flips in proptest::collection::vec((any::<prop::sample::Index>(), any::<u8>()), 1..6)) {
        let state = PluginState {
            version: "0.1.0".into(),
            params: default_param_values(),
            fields: [(STATE_FIELD.to_string(), serde_json::to_string(&PersistedState::default()).unwrap())].into(),
        };
        let mut bytes = serde_json::to_vec(&state).unwrap();
        for (at, b) in flips {
            let i = at.index(bytes.len());
            bytes[i] = b;
        }
        if let Ok(mut state) = serde_json::from_slice::<PluginState>(&bytes) {
            repair_state(&mut state);
            assert_valid(&state);
        }
    }

    #[test]
    fn any_text_as_a_preset_is_read_or_refused_with_a_message(text in ".{0,200}") {
        match Preset::from_toml(&text) {
            Ok(p) => {
                let mut state = p.to_state(&PersistedState::default());
                repair_state(&mut state);
                assert_valid(&state);
            }
            Err(e) => prop_assert!(!e.is_empty()),
        }
    }

    /// Preset-shaped text with any key and value: read (then a valid state) or refused naming the problem.
    #[test]
    fn preset_shaped_text_is_read_or_refused(
        format in 0i64..4,
        key in proptest::sample::select(IDS.to_vec()),
        value in prop_oneof![
            any::<f64>().prop_map(|v| format!("{v:?}")),
            any::<i64>().prop_map(|v| v.to_string()),
            Just("\"candidate\"".to_string()),
            Just("\"x4\"".to_string()),
            Just("true".to_string()),
            Just("[20.0, 5.6]".to_string()),
            "\"[a-z0-9]{0,8}\"",
        ],
    ) {
        let text = format!("format = {format}\nname = \"p\"\n[settings]\n{key} = {value}\n");
        match Preset::from_toml(&text) {
            Ok(p) => {
                let mut state = p.to_state(&PersistedState::default());
                let repair = repair_state(&mut state);
                prop_assert!(repair.problem.is_none());
                assert_valid(&state);
            }
            Err(e) => prop_assert!(!e.is_empty()),
        }
    }
}
