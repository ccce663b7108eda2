//! The command line under abuse: nothing lost, nothing absurd accepted, one clear line per refusal.
//! WAV files are written here with hound (an outside writer) in the WAVE PCM/float layout.

mod common;

use common::{run, write_float};
use std::path::{Path, PathBuf};

fn scratch(name: &str) -> PathBuf {
    common::scratch("abuse", name)
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Two seconds of a plucked-like 110 Hz tone at `peak` full scale.
fn tone(seconds: f64, peak: f32) -> Vec<f32> {
    (0..(seconds * 48_000.0) as usize)
        .map(|n| {
            let t = n as f64 / 48_000.0;
            (peak as f64
                * (-(t % 0.5) / 0.2).exp()
                * (2.0 * std::f64::consts::PI * 110.0 * t).sin()) as f32
        })
        .collect()
}

/// A refusal: failed, one line on stderr, holding every needle, no panic.
fn refused(args: &[&str], needles: &[&str]) -> String {
    let out = run(args);
    let err = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(!out.status.success(), "{args:?} should fail; stderr: {err}");
    assert!(!err.contains("panicked"), "{args:?}: {err}");
    let lines: Vec<&str> = err.lines().filter(|l| !l.starts_with("note: ")).collect();
    assert_eq!(lines.len(), 1, "{args:?}: {err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: '{n}' missing in: {err}");
    }
    err
}

#[test]
fn render_to_a_device_node_writes_in_place() {
    let dir = scratch("device");
    let di = dir.join("di.wav");
    write_float(&di, 48_000, &tone(0.3, 0.3));
    let out = run(&[
        "render",
        "--input",
        s(&di),
        "--output",
        "/dev/null",
        "--quality",
        "1",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let meta = std::fs::metadata("/dev/null").unwrap();
    assert!(!meta.is_file(), "/dev/null was replaced by a regular file");
    refused(
        &[
            "render",
            "--input",
            s(&di),
            "--output",
            "/dev/full",
            "--quality",
            "1",
        ],
        &["/dev/full", "No space left"],
    );
    assert!(!std::fs::metadata("/dev/full").unwrap().is_file());
}

#[test]
fn an_output_equal_to_an_input_is_refused_before_writing() {
    let dir = scratch("same");
    let di = dir.join("di.wav");
    write_float(&di, 48_000, &tone(0.3, 0.3));
    let before = std::fs::read(&di).unwrap();
    let circuit = dir.join("circuit.toml");
    std::fs::write(&circuit, breakdown_dsp::circuit::ONE_STAGE_TOML).unwrap();
    let circuit_before = std::fs::read(&circuit).unwrap();
    // The DI itself, by another spelling of its path, and the circuit file.
    let other_spelling = dir.join(".").join("di.wav");
    for (output, what) in [
        (&di, "input"),
        (&other_spelling, "input"),
        (&circuit, "circuit"),
    ] {
        refused(
            &[
                "render",
                "--input",
                s(&di),
                "--circuit",
                s(&circuit),
                "--output",
                s(output),
            ],
            &["never writes over an input", what],
        );
    }
    assert_eq!(std::fs::read(&di).unwrap(), before);
    assert_eq!(std::fs::read(&circuit).unwrap(), circuit_before);
    // An analysis's output folder may not be the circuit file either.
    refused(
        &["parts", "--circuit", s(&circuit), "--output", s(&circuit)],
        &["circuit"],
    );
    assert_eq!(std::fs::read(&circuit).unwrap(), circuit_before);
}

const PLAN: &str =
    "di = [\"take.wav\"]\noutput = \"out\"\nquality = 1\n\n[ab]\nsegment_seconds = 1.0\n\n\
[[variant]]\nname = \"off\"\nposition = 0\n\n[[variant]]\nname = \"switch at 2\"\nposition = 2\n";

#[test]
fn compare_never_deletes_a_folder_with_user_files() {
    let dir = scratch("userfiles");
    write_float(&dir.join("take.wav"), 48_000, &tone(1.5, 0.4));
    let plan = dir.join("plan.toml");
    std::fs::write(&plan, PLAN).unwrap();
    // A folder holding the user's own file.
    let out = dir.join("out");
    std::fs::create_dir_all(&out).unwrap();
    std::fs::write(out.join("my-notes.txt"), "keep me").unwrap();
    refused(
        &["compare", s(&plan), "--quiet"],
        &["out", "did not", "my-notes.txt"],
    );
    assert_eq!(
        std::fs::read_to_string(out.join("my-notes.txt")).unwrap(),
        "keep me"
    );
    // A plan whose output is its own folder: the plan and its DI must survive.
    let own = PLAN.replace("output = \"out\"", "output = \".\"");
    std::fs::write(&plan, &own).unwrap();
    refused(&["compare", s(&plan), "--quiet"], &["holds the plan"]);
    assert!(plan.exists() && dir.join("take.wav").exists());
    // An empty folder is filled, and Breakdown's own output (listed in its manifest) is replaced.
    std::fs::write(
        &plan,
        PLAN.replace("output = \"out\"", "output = \"fresh\""),
    )
    .unwrap();
    for _ in 0..2 {
        let r = run(&["compare", s(&plan), "--quiet"]);
        assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    }
    let manifest =
        std::fs::read_to_string(dir.join("fresh").join("breakdown-output.json")).unwrap();
    assert!(manifest.contains("report.html") && manifest.contains("unmatched/take_off.wav"));
    // Nothing hidden is left beside the output.
    let hidden: Vec<String> = std::fs::read_dir(&dir)
        .unwrap()
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with('.'))
        .collect();
    assert!(hidden.is_empty(), "{hidden:?}");
}

#[test]
fn stale_partial_folder_of_a_dead_run_is_removed() {
    let dir = scratch("stale");
    write_float(&dir.join("take.wav"), 48_000, &tone(1.5, 0.4));
    let plan = dir.join("plan.toml");
    std::fs::write(&plan, PLAN).unwrap();
    // Left by a run that was killed (its process number is above any system's).
    let stale = dir.join(".out.partial-4000000000");
    std::fs::create_dir_all(stale.join("unmatched")).unwrap();
    let r = run(&["compare", s(&plan), "--quiet"]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    assert!(!stale.exists());
}

#[test]
fn absurd_audio_is_refused_naming_the_file() {
    let dir = scratch("absurd");
    let nan = dir.join("nan.wav");
    write_float(&nan, 48_000, &[f32::NAN; 4800]);
    refused(
        &[
            "render",
            "--input",
            s(&nan),
            "--output",
            s(&dir.join("o.wav")),
        ],
        &["nan.wav", "4800 non-finite", "every sample"],
    );
    let hot = dir.join("hot.wav");
    let mut v = tone(0.2, 0.3);
    v[4800] = 1e30;
    write_float(&hot, 48_000, &v);
    refused(
        &[
            "render",
            "--input",
            s(&hot),
            "--output",
            s(&dir.join("o.wav")),
        ],
        &[
            "hot.wav",
            "0:00.100",
            "1.000e30",
            "at the input jack with 1 V at full scale",
        ],
    );
    // Silence is fine to render but meaningless to calibrate.
    let silent = dir.join("silent.wav");
    write_float(&silent, 48_000, &[0.0; 4800]);
    refused(
        &["calibrate", "--input", s(&silent)],
        &["silent.wav", "is silent"],
    );
    assert!(!dir.join("o.wav").exists());
}

#[test]
fn silent_plan_variant_is_refused_with_the_reason() {
    let dir = scratch("silentplan");
    write_float(&dir.join("take.wav"), 48_000, &tone(1.5, 0.4));
    let plan = dir.join("plan.toml");
    std::fs::write(
        &plan,
        PLAN.replace("position = 2\n", "position = 2\ngain = 0\n"),
    )
    .unwrap();
    refused(
        &["compare", s(&plan), "--quiet"],
        &["line 15", "variant 2 gain = 0", "silent", "-inf LUFS"],
    );
    // A value of the wrong type names the key and what was expected.
    std::fs::write(
        &plan,
        PLAN.replace("position = 2\n", "positive = \"abc\"\n"),
    )
    .unwrap();
    refused(
        &["compare", s(&plan), "--quiet"],
        &[
            "variant 2 positive = \"abc\"",
            "expected a Vz in volts (2.4 V .. 200 V) or a part table",
        ],
    );
}

#[test]
fn long_names_are_clipped_when_echoed() {
    let long = "x".repeat(5000);
    let err = refused(
        &[
            "render", "--input", "a.wav", "--output", "b.wav", "--probe", &long,
        ],
        &["--probe"],
    );
    assert!(err.len() < 300, "{} characters", err.len());
    let err = refused(
        &["suggest", "--goal", &long, "--input-volts", "1"],
        &["--goal"],
    );
    assert!(err.len() < 500, "{} characters", err.len());
    let dir = scratch("longplan");
    write_float(&dir.join("take.wav"), 48_000, &tone(1.5, 0.4));
    let plan = dir.join("plan.toml");
    std::fs::write(
        &plan,
        PLAN.replace("name = \"off\"", &format!("name = \"{long}\"")),
    )
    .unwrap();
    let err = refused(
        &["compare", s(&plan), "--quiet"],
        &["at most 80 characters"],
    );
    assert!(err.len() < 400, "{} characters", err.len());
}

#[test]
fn help_carries_the_whole_safety_text_and_the_calibration_rule() {
    let out = run(&["--help"]);
    let text = String::from_utf8_lossy(&out.stdout);
    // docs/model.md section 8, the ratings sentence included.
    for needle in [
        "filter capacitors stay charged after",
        "qualified technician",
        "Check part voltage and power ratings against the values the tool reports, with margin.",
        "overrides the circuit file's [input] volts_at_full_scale",
    ] {
        let flat = text.split_whitespace().collect::<Vec<_>>().join(" ");
        assert!(flat.contains(needle), "'{needle}' missing in: {text}");
    }
    let out = run(&["onset", "--help"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("default 2") && text.contains("[default: breakdown-onset]"),
        "{text}"
    );
}
