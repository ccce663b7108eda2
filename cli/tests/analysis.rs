//! The analysis commands as a builder runs them: outputs written, one clear error and a non-zero exit on bad
//! input, never a panic.

mod common;

fn breakdown(args: &[&str]) -> (bool, String, String) {
    let out = common::run(args);
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn temp_dir(name: &str) -> std::path::PathBuf {
    common::scratch("analysis", name)
}

#[test]
fn onset_writes_map_and_summary() {
    let dir = temp_dir("onset");
    let (ok, out, err) = breakdown(&[
        "onset",
        "--out",
        dir.to_str().unwrap(),
        "--gain-steps",
        "3",
        "--level-steps",
        "4",
        "--quality",
        "1",
    ]);
    assert!(ok, "{err}");
    // The old option names still work and say what they are called now.
    assert!(err.contains("note: --out is now --output"), "{err}");
    assert!(
        err.contains("note: --level-steps is now --input-volts-steps"),
        "{err}"
    );
    assert!(out.contains("cleans up below"), "{out}");
    assert!(out.contains("Safety"));
    let csv = std::fs::read_to_string(dir.join("onset.csv")).unwrap();
    assert_eq!(csv.lines().count(), 1 + 3 * 4);
    let svg = std::fs::read_to_string(dir.join("onset.svg")).unwrap();
    assert!(svg.starts_with("<svg") && svg.contains("</svg>"));
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn parts_writes_text_and_csv_with_cautions() {
    let dir = temp_dir("parts");
    let (ok, out, err) = breakdown(&[
        "parts",
        "--set",
        "position=2",
        "--output",
        dir.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    assert!(out.contains("1N4746A") && out.contains("1N4734A"), "{out}");
    assert!(out.contains("drain and verify capacitors"));
    assert!(dir.join("parts.csv").exists() && dir.join("parts.txt").exists());
    // One line per valve, each inside its type's ratings at idle (12AX7: 330 V plate, 1.2 W per section, from
    // memory of the common datasheets; a built-in preamp stage idles near 1 mA at under 200 V, ~0.2 W).
    // The built-in preamp's stage parts by their circuit-file keys (values as in presets-demo/builtin-preamp.toml).
    assert!(
        out.contains("* stage 1 plate_resistor [all]: 100 kohm"),
        "{out}"
    );
    assert!(
        out.contains("* stage 1 volume.bright_cap [all]: 470 pF"),
        "{out}"
    );
    assert!(
        out.contains("* stage 2 divider.series [all]: 470 kohm"),
        "{out}"
    );
    let valves: Vec<&str> = out.lines().filter(|l| l.starts_with("* valve, ")).collect();
    assert!(valves.len() >= 2, "{out}");
    assert!(
        out.contains("* valve, stage 1 ") && out.contains("* valve, cathode follower "),
        "{out}"
    );
    assert!(valves.iter().all(|l| l.contains("12AX7")), "{out}");
    let verdicts: Vec<&str> = out
        .lines()
        .filter(|l| l.contains("per section (from memory of the datasheet)"))
        .collect();
    assert_eq!(verdicts.len(), valves.len(), "{out}");
    assert!(verdicts.iter().all(|l| l.ends_with(" ok")), "{out}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn bad_inputs_get_one_clear_error() {
    let cases: &[(&[&str], &str)] = &[
        (
            &["suggest", "--goal", "clamp-level=+20,-20"],
            "--input DI.wav or --input-volts",
        ),
        (
            &["suggest", "--goal", "loud", "--input-volts", "1"],
            "expected clamp-level=",
        ),
        (
            &["suggest", "--goal", "share=2", "--input-volts", "1"],
            "between 0 and 1",
        ),
        (
            &[
                "suggest",
                "--goal",
                "clamp-level=+190,-190",
                "--input-volts",
                "1",
                "--set",
                "gain=0.8",
            ],
            "swings only",
        ),
        (
            &[
                "suggest",
                "--goal",
                "share=0.2",
                "--input",
                "/nonexistent/di.wav",
            ],
            "cannot open",
        ),
        (
            &[
                "suggest",
                "--goal",
                "share=0.2",
                "--input-volts",
                "1",
                "--family",
                "x",
            ],
            "known families",
        ),
        (&["onset", "--quality", "3"], "--quality 3"),
        (&["onset", "--set", "position=9"], "past the end"),
        (&["parts", "--input-volts=-1"], "--input-volts"),
        (&["parts", "--rating-watts", "0"], "--rating-watts"),
        // A negative value reaches the range check, which names the option, the value and the range.
        (
            &["parts", "--rating-watts", "-1"],
            "--rating-watts -1: a power rating must be above 0 W, up to 100 W",
        ),
        (
            &["parts", "--input-volts", "-2"],
            "--input-volts -2: give a value above 0",
        ),
        (
            &[
                "suggest",
                "--goal",
                "clamp-level=12,6",
                "--input-volts",
                "1",
            ],
            "clamp-level=+12,-6",
        ),
        (
            &["onset", "--input-volts-steps", "1000"],
            "--input-volts-steps 1000: give 2 .. 64",
        ),
        (
            &["calibrate", "--input", "/nonexistent/di.wav"],
            "cannot open",
        ),
        (
            &["calibrate", "--input", "x.wav", "--input-dbu", "90"],
            "--input-dbu = 90 dBu",
        ),
    ];
    for (args, needle) in cases {
        let (ok, _, err) = breakdown(args);
        assert!(!ok, "{args:?} should fail");
        assert!(err.contains(needle), "{args:?}: {err}");
        assert!(!err.contains("panicked"), "{args:?}: {err}");
        assert_eq!(err.trim().lines().count(), 1, "{args:?}: {err}");
    }
}

#[test]
fn parts_flags_a_follower_over_its_dissipation() {
    // The one-stage circuit with B+ 400 V and a 1 k follower cathode resistor. Hand calculation: with the
    // follower's cathode at Vk its current is Vk / 1 k and its plate-to-cathode voltage 400 - Vk, so it
    // dissipates (400 - Vk) Vk / 1 k, above the 12AX7's 1.2 W per section (from memory of the datasheet) for
    // every Vk between 3.0 V and 397 V (roots of Vk^2 - 400 Vk + 1200 = 0): any working bias is over.
    let dir = temp_dir("parts-hot-follower");
    std::fs::create_dir_all(&dir).unwrap();
    let src = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../presets-demo/one-stage.toml"
    ))
    .unwrap()
    .replace("supply_volts = 300.0", "supply_volts = 400.0")
    .replace("cathode_resistor = 100e3", "cathode_resistor = 1e3");
    let file = dir.join("hot.toml");
    std::fs::write(&file, src).unwrap();
    let out_dir = dir.join("out");
    let (ok, out, err) = breakdown(&[
        "parts",
        "--circuit",
        file.to_str().unwrap(),
        "--output",
        out_dir.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    let follower = out
        .lines()
        .skip_while(|l| !l.starts_with("* valve, cathode follower "))
        .take(3)
        .collect::<Vec<_>>()
        .join("\n");
    assert!(
        follower.contains("dissipation")
            && follower.contains("dissipation 0.")
            && follower.contains("x over the rating"),
        "{out}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}
