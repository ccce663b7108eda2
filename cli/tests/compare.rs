//! `breakdown compare` as a user runs it: the built binary on a generated DI and plan.
//!
//! Outside references: EBU R128 (integrated loudness target, re-measured on the written files with the
//! `ebur128` crate, an implementation of ITU-R BS.1770-4; true-peak ceiling -1 dBTP), the WAVE format (read
//! back with hound), the PNG format (decoded with the png crate) and a real browser (Debian `chromium`).

mod common;

use common::{run, BIN};
use std::path::{Path, PathBuf};
use std::process::Command;

fn scratch(name: &str) -> PathBuf {
    common::scratch("compare", name)
}

/// A guitar-ish test DI: decaying plucked tones (sharp attack, harmonics), stereo, 48 kHz float.
fn write_di(path: &Path, seconds: f64, peak: f32) {
    let rate = 48_000u32;
    let frames = (seconds * rate as f64) as usize;
    let notes = [82.4, 110.0, 146.8, 98.0, 123.5, 164.8];
    let mut channels = vec![vec![0.0f32; frames]; 2];
    for (c, ch) in channels.iter_mut().enumerate() {
        for (n, s) in ch.iter_mut().enumerate() {
            let t = n as f64 / rate as f64;
            let k = (t / 0.5).floor() as usize;
            let since = t - k as f64 * 0.5;
            let f = notes[(k + c) % notes.len()];
            let env = (-since / 0.25).exp();
            let w = 2.0 * std::f64::consts::PI * f * t;
            *s = (env * (w.sin() + 0.4 * (2.0 * w).sin() + 0.2 * (3.0 * w).sin()) / 1.6) as f32;
        }
    }
    let max = channels
        .iter()
        .flatten()
        .fold(0.0f32, |m, x| m.max(x.abs()));
    let spec = hound::WavSpec {
        channels: 2,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    for n in 0..frames {
        for c in &channels {
            w.write_sample(c[n] / max * peak).unwrap();
        }
    }
    w.finalize().unwrap();
}

const PLAN: &str = r#"# test plan
di = ["take.wav"]
output = "out"
target_lufs = -18.0
gain = 1.0
quality = 2

[input]
volts_at_full_scale = 1.0
tone_peak_volts = 0.3

[ab]
segment_seconds = 1.0

[[variant]]
name = "off"
position = 0

[[variant]]
name = "asymmetric"
position = 2

[[variant]]
name = "explicit 8.2"
positive = 8.2
negative = 8.2
"#;

fn read_wav(path: &Path) -> (u32, Vec<Vec<f32>>) {
    let mut r = hound::WavReader::open(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let spec = r.spec();
    let count = spec.channels as usize;
    let samples: Vec<f32> = match spec.sample_format {
        hound::SampleFormat::Float => r.samples::<f32>().map(Result::unwrap).collect(),
        hound::SampleFormat::Int => {
            let full = (1u64 << (spec.bits_per_sample - 1)) as f32;
            r.samples::<i32>()
                .map(|s| s.unwrap() as f32 / full)
                .collect()
        }
    };
    let mut channels = vec![Vec::new(); count];
    for (i, s) in samples.into_iter().enumerate() {
        channels[i % count].push(s);
    }
    (spec.sample_rate, channels)
}

fn loudness(path: &Path) -> (f64, f64) {
    let (rate, channels) = read_wav(path);
    let mut m = ebur128::EbuR128::new(
        channels.len() as u32,
        rate,
        ebur128::Mode::I | ebur128::Mode::TRUE_PEAK,
    )
    .unwrap();
    let planes: Vec<&[f32]> = channels.iter().map(Vec::as_slice).collect();
    m.add_frames_planar_f32(&planes).unwrap();
    let peak = (0..channels.len() as u32)
        .map(|c| m.true_peak(c).unwrap())
        .fold(0.0, f64::max);
    (m.loudness_global().unwrap(), 20.0 * peak.log10())
}

fn leftovers(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with(".out") || n == "out")
        .collect()
}

/// Runs one full comparison and keeps its output for the checks below (shared to save render time).
fn full_run() -> PathBuf {
    static ONCE: std::sync::OnceLock<PathBuf> = std::sync::OnceLock::new();
    ONCE.get_or_init(|| {
        let dir = scratch("full");
        write_di(&dir.join("take.wav"), 6.0, 0.4);
        std::fs::write(dir.join("plan.toml"), PLAN).unwrap();
        let out = run(&[
            "compare",
            "--quiet",
            dir.join("plan.toml").to_str().unwrap(),
        ]);
        assert!(
            out.status.success(),
            "compare failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let stdout = String::from_utf8_lossy(&out.stdout);
        assert!(stdout.contains("Safety:"), "{stdout}");
        dir.join("out")
    })
    .clone()
}

#[test]
fn matched_files_meet_the_loudness_target_and_true_peak_ceiling() {
    let out = full_run();
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
    let results = json["di"][0]["results"].as_array().unwrap();
    assert_eq!(results.len(), 3);
    for r in results {
        let file = out.join(r["matched_file"].as_str().unwrap());
        let (lufs, tp) = loudness(&file);
        // EBU R128: every variant's integrated loudness within 0.2 LU of the -18 LUFS target (the target is
        // ours; the measurement is BS.1770-4 via ebur128), true peak at or below -1 dBTP.
        assert!(
            (lufs + 18.0).abs() <= 0.2,
            "{}: {lufs} LUFS",
            file.display()
        );
        assert!(tp <= -1.0 + 0.05, "{}: {tp} dBTP", file.display());
        // The unmatched file is the same render before gain: its loudness is the report's "before" figure.
        let (before, _) = loudness(&out.join(r["unmatched_file"].as_str().unwrap()));
        let reported = r["matching"]["loudness_before_lufs"].as_f64().unwrap();
        assert!((before - reported).abs() < 0.05, "{before} vs {reported}");
    }
    // The A/B clip lasts as long as the DI, and its key covers every variant.
    let (_, clip) = read_wav(&out.join("take_ab-blind.wav"));
    assert_eq!(clip[0].len(), 6 * 48_000);
    let key: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("take_ab-key.json")).unwrap())
            .unwrap();
    let names: std::collections::HashSet<&str> = key
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["variant"].as_str().unwrap())
        .collect();
    assert_eq!(names.len(), 3);
    assert!(out.join("take_ab-key.txt").is_file());
}

#[test]
fn report_json_and_csv_carry_the_same_numbers() {
    let out = full_run();
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
    let csv = std::fs::read_to_string(out.join("report.csv")).unwrap();
    let mut lines = csv.lines();
    let header = split_csv(lines.next().unwrap());
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    let rows: Vec<Vec<String>> = lines.map(split_csv).collect();
    assert_eq!(rows.len(), 3);
    for (row, r) in rows
        .iter()
        .zip(json["di"][0]["results"].as_array().unwrap())
    {
        assert_eq!(row[col("variant")], r["variant"].as_str().unwrap());
        let p2p: f64 = row[col("clamp_peak_to_peak_V")].parse().unwrap();
        assert!((p2p - r["clamp_peak_to_peak_volts"].as_f64().unwrap()).abs() < 1e-3);
    }
    // The safety text of docs/model.md section 8 is in every report.
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("filter capacitors stay charged after power-off"));
    assert!(json["safety"]
        .as_str()
        .unwrap()
        .contains("qualified technician"));
    // Physical sanity from the datasheet model: an 8.2 V pair at 1 mA clamps between 7 and 9.5 V each way
    // (Vz minus the knee drop plus a forward drop of about 0.6-0.8 V, docs/model.md section 2).
    let v = &json["variants"][2];
    let up = v["threshold_positive_volts"].as_f64().unwrap();
    let down = v["threshold_negative_volts"].as_f64().unwrap();
    assert!(
        (7.0..9.5).contains(&up) && (-9.5..-7.0).contains(&down),
        "{up} {down}"
    );
    // THD_F counts harmonics 2-10 everywhere (docs/model.md section 6), and the report says so.
    assert_eq!(v["tone"]["highest_harmonic"].as_u64(), Some(10));
    assert!(json["tone"]["method"]
        .as_str()
        .unwrap()
        .contains("harmonics 2 to 10"));
    assert!(row_has(&rows, col("thd_f_harmonics"), "2-10"));
}

fn row_has(rows: &[Vec<String>], col: usize, value: &str) -> bool {
    rows.iter().all(|r| r[col] == value)
}

/// Split one CSV line (RFC 4180 quoting).
fn split_csv(line: &str) -> Vec<String> {
    let mut fields = vec![String::new()];
    let mut quoted = false;
    let mut chars = line.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                chars.next();
                fields.last_mut().unwrap().push('"');
            }
            ('"', _) => quoted = !quoted,
            (',', false) => fields.push(String::new()),
            (c, _) => fields.last_mut().unwrap().push(c),
        }
    }
    fields
}

/// Chromium, when installed (Debian package `chromium`).
fn chromium() -> Option<PathBuf> {
    ["chromium", "chromium-browser"].iter().find_map(|name| {
        let ok = Command::new(name)
            .arg("--version")
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false);
        ok.then(|| PathBuf::from(name))
    })
}

/// Render a page to PNG with headless Chromium.
pub fn screenshot(browser: &Path, page: &Path, png: &Path, height: u32) {
    let profile = scratch(&format!(
        "chromium-profile-{}",
        png.file_stem().unwrap().to_string_lossy()
    ));
    let out = Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .arg(format!("--screenshot={}", png.display()))
        .arg(format!("--window-size=1200,{height}"))
        .arg(format!("file://{}", page.canonicalize().unwrap().display()))
        .output()
        .expect("run chromium");
    assert!(
        png.is_file(),
        "chromium wrote no PNG: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn report_renders_in_headless_chromium() {
    let Some(browser) = chromium() else {
        println!("SKIPPED: chromium is not installed (Debian package `chromium`), so the report is not rendered");
        return;
    };
    let out = full_run();
    let png_path = out.parent().unwrap().join("report.png");
    screenshot(&browser, &out.join("report.html"), &png_path, 2000);
    // Decode the PNG and check the page is not blank: many distinct colours, and a good share of pixels that
    // are not the page background.
    let decoder = png::Decoder::new(std::fs::File::open(&png_path).unwrap());
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    assert_eq!((info.width, info.height), (1200, 2000));
    let bytes = &buf[..info.buffer_size()];
    let step = info.color_type.samples();
    let mut colours = std::collections::HashMap::new();
    for px in bytes.chunks(step) {
        *colours.entry((px[0], px[1], px[2])).or_insert(0usize) += 1;
    }
    let total = (info.width * info.height) as usize;
    let background = colours.values().copied().max().unwrap();
    assert!(colours.len() > 200, "only {} colours", colours.len());
    assert!(total - background > total / 20, "page is mostly one colour");
}

fn expect_plan_error(name: &str, plan: &str, line: usize, words: &[&str]) {
    let dir = scratch(name);
    write_di(&dir.join("take.wav"), 2.0, 0.3);
    std::fs::write(dir.join("plan.toml"), plan).unwrap();
    let out = run(&[
        "compare",
        "--quiet",
        dir.join("plan.toml").to_str().unwrap(),
    ]);
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(
        stderr.trim().lines().count(),
        1,
        "one message expected: {stderr}"
    );
    assert!(!stderr.contains("panicked"), "{stderr}");
    assert!(
        stderr.contains(&format!("line {line}:")),
        "no line {line}: {stderr}"
    );
    for w in words {
        assert!(stderr.contains(w), "'{w}' missing: {stderr}");
    }
    assert!(
        leftovers(&dir).is_empty(),
        "left behind: {:?}",
        leftovers(&dir)
    );
}

#[test]
fn unknown_key_is_named_with_its_line() {
    expect_plan_error(
        "unknown",
        &PLAN.replace("gain = 1.0", "gian = 1.0"),
        5,
        &["gian"],
    );
}

#[test]
fn missing_di_is_named_with_its_line() {
    expect_plan_error(
        "missing",
        &PLAN.replace("take.wav", "nope.wav"),
        2,
        &["nope.wav", "not found"],
    );
}

#[test]
fn duplicate_variant_name_is_named_with_its_line() {
    expect_plan_error(
        "duplicate",
        &PLAN.replace("name = \"asymmetric\"", "name = \"off\""),
        20,
        &["off", "twice", "line 16"],
    );
}

#[test]
fn impossible_values_are_named_with_their_line() {
    expect_plan_error(
        "gain",
        &PLAN.replace("gain = 1.0", "gain = 1.7"),
        5,
        &["gain = 1.7", "must lie in 0 .. 1", "pot rotation"],
    );
    expect_plan_error(
        "quality",
        &PLAN.replace("quality = 2", "quality = 3"),
        6,
        &[
            "quality = 3",
            "expected an oversampling factor: 1, 2, 4, 8 or 16",
        ],
    );
    expect_plan_error(
        "zener",
        &PLAN.replace("negative = 8.2", "negative = 0.5"),
        26,
        &["variant 3 negative = 500 mV", "must lie in 2.4 V .. 200 V"],
    );
    expect_plan_error(
        "position",
        &PLAN.replace("position = 2", "position = 9"),
        21,
        &[
            "variant 2 position = 9",
            "expected a switch position counted from 0",
        ],
    );
}

#[test]
fn demo_runs_from_an_empty_folder() {
    // `breakdown demo` needs no files: it synthesises its DI and carries its plan. Short check of the pieces
    // (the full demo run is the README command).
    let dir = scratch("demo");
    let out = Command::new(BIN)
        .args(["demo", "--quiet"])
        .current_dir(&dir)
        .output()
        .expect("run demo");
    assert!(
        out.status.success(),
        "demo failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let demo = dir.join("breakdown-demo");
    for f in [
        "report.html",
        "report.json",
        "report.csv",
        "demo-di_ab-blind.wav",
        "input/demo-di.wav",
    ] {
        assert!(demo.join(f).is_file(), "{f} missing");
    }
    // The demo DI sits at a passive-pickup level: a few hundred mV peak at the jack (1 V = 0 dBFS in the
    // demo plan) [common practice].
    let (rate, di) = read_wav(&demo.join("input/demo-di.wav"));
    assert_eq!(rate, 48_000);
    let peak = di[0].iter().fold(0.0f32, |m, x| m.max(x.abs()));
    assert!((0.1..=0.8).contains(&peak), "{peak}");
    let seconds = di[0].len() as f64 / 48_000.0;
    assert!((20.0..=30.0).contains(&seconds), "{seconds}");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        stdout.contains("breakdown-demo") && stdout.contains("Safety:"),
        "{stdout}"
    );
    if std::env::var_os("BREAKDOWN_SAVE_REPORT_PICTURE").is_some() {
        if let Some(browser) = chromium() {
            let target = Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/report.png");
            std::fs::create_dir_all(target.parent().unwrap()).unwrap();
            screenshot(&browser, &demo.join("report.html"), &target, 2400);
        }
    }
}

#[test]
fn report_says_what_the_clips_were_heard_through() {
    let out = full_run();
    let json = std::fs::read_to_string(out.join("report.json")).unwrap();
    let v: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(v["listen"], "chain");
    assert_eq!(v["cabinet"], "builtin");
    let words = v["listening"].as_str().unwrap();
    assert!(
        words.contains("tone stack") && words.contains("built-in cabinet"),
        "{words}"
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(
        html.contains(words),
        "the HTML report names the listening point"
    );
}

/// A plan's `listen` and `cabinet` give the clips `render` gives with `--listen` and `--cabinet`.
#[test]
fn plan_listening_keys_match_render() {
    for (name, keys, render_args) in [
        ("wiper", "listen = \"wiper\"", vec!["--listen", "wiper"]),
        ("ir", "cabinet = \"ir.wav\"", vec!["--cabinet", "IR"]),
    ] {
        let dir = scratch(&format!("listen-{name}"));
        write_di(&dir.join("take.wav"), 1.5, 0.3);
        let ir = dir.join("ir.wav");
        let h: Vec<f32> = (0..64)
            .map(|n| ((-(n as f64) / 10.0).exp() * (0.7 * n as f64).cos()) as f32)
            .collect();
        common::write_float(&ir, 44_100, &h);
        let plan = format!(
            "di = [\"take.wav\"]\noutput = \"out\"\n{keys}\ngain = 0.7\nquality = 2\n\n[input]\nvolts_at_full_scale = 1.0\n\n\
             [[variant]]\nname = \"sym\"\nposition = 1\n"
        );
        std::fs::write(dir.join("plan.toml"), plan).unwrap();
        let out = run(&[
            "compare",
            "--quiet",
            dir.join("plan.toml").to_str().unwrap(),
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join("out/report.json")).unwrap())
                .unwrap();
        let rendered = dir.join("render.wav");
        let mut args: Vec<String> = [
            "render",
            "--input",
            dir.join("take.wav").to_str().unwrap(),
            "--output",
            rendered.to_str().unwrap(),
            "--set",
            "gain=0.7",
            "--set",
            "position=1",
            "--quality",
            "2",
            "--volts-at-full-scale",
            "1.0",
        ]
        .map(String::from)
        .to_vec();
        for a in &render_args {
            args.push(if *a == "IR" {
                ir.to_str().unwrap().into()
            } else {
                a.to_string()
            });
        }
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let r = run(&args);
        assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
        let (_, clip) = read_wav(&dir.join("out/unmatched/take_sym.wav"));
        let (_, direct) = read_wav(&rendered);
        assert_eq!(clip.len(), direct.len());
        let worst = clip
            .iter()
            .flatten()
            .zip(direct.iter().flatten())
            .map(|(a, b)| (a - b).abs())
            .fold(0.0f32, f32::max);
        assert!(
            worst < 1e-6,
            "{name}: the clip differs from render by {worst}"
        );
        match name {
            "wiper" => assert_eq!(json["listen"], "wiper"),
            _ => assert_eq!(json["cabinet"], "ir.wav"),
        }
    }
}

#[test]
fn bad_cabinet_key_is_named_with_its_line() {
    expect_plan_error(
        "cabinet",
        &PLAN.replace("gain = 1.0", "cabinet = \"nope.wav\""),
        5,
        &["cabinet", "nope.wav"],
    );
    expect_plan_error(
        "listen",
        &PLAN.replace("gain = 1.0", "listen = \"speaker\""),
        5,
        &["listen", "speaker"],
    );
}

/// "100 kohm", "2.7 kohm", "1 Mohm": a resistance as the report writes it, formatted here on its own.
fn ohms_text(r: f64) -> String {
    if r >= 1e6 {
        format!("{} Mohm", r / 1e6)
    } else if r >= 1e3 {
        format!("{} kohm", r / 1e3)
    } else {
        format!("{r} ohm")
    }
}

/// The HTML table row (`<tr>..</tr>`) whose first cell is `first`.
fn html_row<'a>(html: &'a str, first: &str) -> Option<&'a str> {
    let at = html.find(&format!("<tr><td class=\"l\">{first}</td>"))?;
    let end = html[at..].find("</tr>")? + at;
    Some(&html[at..end])
}

#[test]
fn report_lists_the_preamp_parts_of_the_circuit_file() {
    let dir = scratch("preamp-parts");
    let file = Path::new(env!("CARGO_MANIFEST_DIR")).join("../presets-demo/builtin-preamp.toml");
    let text = std::fs::read_to_string(&file).unwrap();
    std::fs::write(dir.join("circuit.toml"), &text).unwrap();
    write_di(&dir.join("take.wav"), 2.0, 0.3);
    std::fs::write(
        dir.join("plan.toml"),
        "di = [\"take.wav\"]\ncircuit = \"circuit.toml\"\noutput = \"out\"\nquality = 2\n\
         [ab]\nsegment_seconds = 1.0\n\
         [[variant]]\nname = \"off\"\nposition = 0\n\
         [[variant]]\nname = \"explicit 8.2\"\npositive = 8.2\nnegative = 8.2\n",
    )
    .unwrap();
    let run_out = run(&[
        "compare",
        "--quiet",
        dir.join("plan.toml").to_str().unwrap(),
    ]);
    assert!(
        run_out.status.success(),
        "compare failed: {}",
        String::from_utf8_lossy(&run_out.stderr)
    );
    let out = dir.join("out");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("report.json")).unwrap()).unwrap();
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();

    // The circuit file read here with the toml crate, not with the project's reader.
    let circuit: toml::Value = toml::from_str(&text).unwrap();
    let stages = circuit["preamp"].as_array().unwrap();
    assert!(!stages.is_empty());
    let top_supply = circuit["supply_volts"].as_float().unwrap();

    // One circuit for both variants (an explicit pair is only another switch position): one section.
    let sections = json["preamp_parts"].as_array().unwrap();
    assert_eq!(sections.len(), 1);
    let section = &sections[0];
    assert_eq!(section["variants"].as_array().unwrap().len(), 2);
    let listed = section["stages"].as_array().unwrap();
    let valves = section["valves"].as_array().unwrap();
    assert!(html.contains("<h2>Preamp parts</h2>"));

    for (k, stage) in stages.iter().enumerate() {
        let n = k + 1;
        for key in ["plate_resistor", "cathode_resistor"] {
            let want = stage[key].as_float().unwrap();
            let entry = listed
                .iter()
                .find(|e| e["stage"].as_u64() == Some(n as u64) && e["key"] == key)
                .unwrap_or_else(|| panic!("report.json lacks stage {n} {key}"));
            assert_eq!(entry["unit"], "ohm");
            let got = entry["amount"].as_f64().unwrap();
            assert!(
                (got - want).abs() <= 1e-9 * want,
                "stage {n} {key}: {got} vs {want}"
            );
            let item = format!("stage {n} {key}");
            let value = ohms_text(want);
            assert_eq!(entry["value"], value.as_str());
            let row = html_row(&html, &item).unwrap_or_else(|| panic!("report.html lacks {item}"));
            assert!(row.contains(&format!(">{value}<")), "{row}");
        }
    }

    // A valve line per valve: each [[preamp]] stage, the gain stage and the follower, in that order.
    let mut tubes: Vec<&str> = stages.iter().map(|s| s["tube"].as_str().unwrap()).collect();
    tubes.push(circuit["gain_stage"]["tube"].as_str().unwrap());
    tubes.push(circuit["follower"]["tube"].as_str().unwrap());
    assert_eq!(valves.len(), tubes.len());
    for (v, tube) in valves.iter().zip(&tubes) {
        assert_eq!(v["tube"], *tube);
        let item = v["item"].as_str().unwrap();
        let row = html_row(&html, item).unwrap_or_else(|| panic!("report.html lacks {item}"));
        assert!(row.contains(&format!(">{tube}<")), "{row}");
        assert!(row.contains("from memory of the datasheet"), "{row}");
        assert!(
            row.contains(v["dissipation_state"].as_str().unwrap()),
            "{row}"
        );
    }
    for (k, (stage, v)) in stages.iter().zip(valves).enumerate() {
        assert_eq!(v["item"], format!("valve, stage {}", k + 1).as_str());
        // A resistor-loaded plate sits below its supply, and its dissipation Vpk * I with
        // Vpk = Vs - I (Ra + Rk) is at most Vs^2 / (4 (Ra + Rk)) (maximum power transfer theorem).
        let vs = stage
            .get("supply_volts")
            .and_then(|s| s.as_float())
            .unwrap_or(top_supply);
        let r = stage["plate_resistor"].as_float().unwrap()
            + stage["cathode_resistor"].as_float().unwrap();
        let volts = v["idle_plate_volts"].as_f64().unwrap();
        let watts = v["idle_plate_watts"].as_f64().unwrap();
        assert!(
            volts > 0.0 && volts < vs,
            "stage {}: {volts} V of {vs}",
            k + 1
        );
        assert!(
            watts > 0.0 && watts <= vs * vs / (4.0 * r) * (1.0 + 1e-9),
            "stage {}: {watts} W",
            k + 1
        );
        // 12AX7 / ECC83: 1.2 W plate dissipation per section (from memory of the datasheet).
        if stage["tube"].as_str() == Some("12AX7") {
            assert_eq!(v["rating_plate_watts"].as_f64(), Some(1.2));
        }
    }

    // The safety text of docs/model.md section 8 sits with the section, before the next one.
    let at = html.find("<h2>Preamp parts</h2>").unwrap();
    let next = html[at + 5..].find("<h2>").unwrap() + at + 5;
    assert!(html[at..next].contains("filter capacitors stay charged after power-off"));
}
