//! Property tests for the circuit-file parser: any text gives either a circuit the engine can run or a
//! clear refusal, never a panic, a hang or an oversized message. Two generators: arbitrary text (including
//! TOML-looking fragments), and the built-in preamp's own file with one value, line or key damaged (the way
//! a hand edit goes wrong). The outside reference for the file's syntax is the TOML 1.0 specification
//! (toml.io); for the ranges, each refusal must name what it refused, which the assertions check by shape.

use breakdown_dsp::circuit::BUILTIN_TOML;
use breakdown_dsp::{Circuit, Engine, Quality, Settings};
use proptest::prelude::*;

/// Longest refusal accepted: a message names a key, a value, a range and a reason, never the whole input
/// echoed back (a 100 kB tube name would otherwise come back whole).
const MESSAGE_LIMIT: usize = 2_000;

fn check(text: &str) {
    match Circuit::parse(text) {
        Ok((circuit, _notes)) => {
            match Engine::new(&circuit, 48_000.0, Quality::X1, Settings::default()) {
                Ok(mut engine) => {
                    // A circuit the parser accepted plays: a few loud samples stay finite.
                    for n in 0..64 {
                        let x = if n % 2 == 0 { 1.0 } else { -1.0 };
                        let f = engine.process_sample(x);
                        assert!(
                            f.listen.is_finite() && f.wiper_volts.is_finite(),
                            "non-finite output from an accepted file"
                        );
                    }
                }
                Err(e) => {
                    let m = e.to_string();
                    assert!(
                        !m.trim().is_empty() && m.len() <= MESSAGE_LIMIT,
                        "engine refusal: {m:?}"
                    );
                }
            }
        }
        Err(e) => {
            let m = e.to_string();
            assert!(!m.trim().is_empty(), "an empty refusal");
            assert!(m.len() <= MESSAGE_LIMIT, "a refusal of {} bytes", m.len());
        }
    }
}

/// Values a hand edit or a hostile file puts where a number was.
fn hostile_value() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("0".to_string()),
        Just("-1".to_string()),
        Just("1e308".to_string()),
        Just("-1e308".to_string()),
        Just("nan".to_string()),
        Just("inf".to_string()),
        Just("\"abc\"".to_string()),
        Just("[]".to_string()),
        Just("{}".to_string()),
        Just("true".to_string()),
        (-1e6f64..1e6).prop_map(|v| format!("{v}")),
        (0u32..100_000).prop_map(|v| v.to_string()),
        "[a-z]{0,40}".prop_map(|s| format!("\"{s}\"")),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn arbitrary_text_is_parsed_or_refused_with_a_message(bytes in proptest::collection::vec(any::<u8>(), 0..2048)) {
        check(&String::from_utf8_lossy(&bytes));
    }

    #[test]
    fn toml_like_fragments_are_parsed_or_refused_with_a_message(text in "(\\[\\[?[a-z_]{1,12}\\]\\]?\n|[a-z_]{1,16} = [-0-9.e\"a-z\\[\\]]{0,12}\n){0,40}") {
        check(&text);
    }

    #[test]
    fn the_builtin_file_with_one_value_damaged_is_parsed_or_refused(which in any::<prop::sample::Index>(), value in hostile_value()) {
        let lines: Vec<&str> = BUILTIN_TOML.lines().collect();
        let assignments: Vec<usize> = (0..lines.len())
            .filter(|&i| lines[i].contains('=') && !lines[i].trim_start().starts_with('#'))
            .collect();
        let at = assignments[which.index(assignments.len())];
        let key = lines[at].split('=').next().unwrap_or("").trim().to_string();
        let mut damaged: Vec<String> = lines.iter().map(|s| s.to_string()).collect();
        damaged[at] = format!("{key} = {value}");
        let text = damaged.join("\n");
        check(&text);
        if let Err(e) = Circuit::parse(&text) {
            // A refused value is named: its key (or, for a TOML syntax error, the line and column).
            let m = e.to_string();
            prop_assert!(m.contains(&key) || m.contains("TOML"), "{key} = {value}: {m}");
        }
    }

    #[test]
    fn the_builtin_file_with_a_line_lost_or_doubled_is_parsed_or_refused(which in any::<prop::sample::Index>(), double in any::<bool>()) {
        let mut lines: Vec<&str> = BUILTIN_TOML.lines().collect();
        let at = which.index(lines.len());
        if double {
            lines.insert(at, lines[at]);
        } else {
            lines.remove(at);
        }
        check(&lines.join("\n"));
    }
}

#[test]
fn a_huge_name_is_not_echoed_back_whole() {
    // A 100 kB string where a valve type goes: refused (no valve of that name), the message short.
    let start = BUILTIN_TOML
        .find("tube = \"")
        .expect("the built-in file names its valves");
    let end = start + BUILTIN_TOML[start..].find('\n').expect("a line end");
    let mut text = BUILTIN_TOML.to_string();
    text.replace_range(start..end, &format!("tube = \"{}\"", "x".repeat(100_000)));
    let e = Circuit::parse(&text).expect_err("an unknown valve type is refused");
    let m = e.to_string();
    assert!(m.contains("tube"), "the message names the key: {m:.200}");
    assert!(m.len() <= MESSAGE_LIMIT, "a refusal of {} bytes", m.len());
}
