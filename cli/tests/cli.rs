//! The `breakdown render` command as a user runs it: the built binary on generated WAV files.
//!
//! Expected values come from outside the code under test: the device equations and datasheet figures of
//! docs/model.md section 4 (solved here independently), docs/model.md section 3 small-signal gain (computed there with
//! ngspice), the pot law of docs/model.md section 3, and the WAVE format conventions (checked with hound).

mod common;

use common::run;
use std::path::{Path, PathBuf};
use std::process::Output;

/// A fresh folder per test under cargo's scratch space.
fn scratch(name: &str) -> PathBuf {
    common::scratch("cli", name)
}

fn render(args: &[&str]) -> Output {
    let mut all = vec!["render"];
    all.extend_from_slice(args);
    run(&all)
}

fn ok(out: &Output) {
    assert!(
        out.status.success(),
        "breakdown failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

fn spec(channels: u16, rate: u32, bits: u16, float: bool) -> hound::WavSpec {
    hound::WavSpec {
        channels,
        sample_rate: rate,
        bits_per_sample: bits,
        sample_format: if float {
            hound::SampleFormat::Float
        } else {
            hound::SampleFormat::Int
        },
    }
}

/// Write interleaved channels with hound in the given format (values in full-scale units).
fn write_wav(path: &Path, rate: u32, bits: u16, float: bool, channels: &[Vec<f32>]) {
    let mut w =
        hound::WavWriter::create(path, spec(channels.len() as u16, rate, bits, float)).unwrap();
    for n in 0..channels[0].len() {
        for c in channels {
            if float {
                w.write_sample(c[n]).unwrap();
            } else {
                let full = (1i64 << (bits - 1)) as f64;
                let v = (c[n] as f64 * full).round().clamp(-full, full - 1.0) as i32;
                w.write_sample(v).unwrap();
            }
        }
    }
    w.finalize().unwrap();
}

/// Read a WAV written by breakdown: it must be 32-bit float. Returns (spec, channels).
fn read_float(path: &Path) -> (hound::WavSpec, Vec<Vec<f32>>) {
    let mut r = hound::WavReader::open(path).unwrap();
    let s = r.spec();
    assert_eq!(
        s.sample_format,
        hound::SampleFormat::Float,
        "output must be float"
    );
    assert_eq!(s.bits_per_sample, 32, "output must be 32-bit");
    let all: Vec<f32> = r.samples::<f32>().map(Result::unwrap).collect();
    let c = s.channels as usize;
    let channels = (0..c)
        .map(|k| all.iter().skip(k).step_by(c).copied().collect())
        .collect();
    (s, channels)
}

fn sine(rate: u32, seconds: f64, freq: f64, amp: f64) -> Vec<f32> {
    let n = (rate as f64 * seconds) as usize;
    (0..n)
        .map(|i| (amp * (std::f64::consts::TAU * freq * i as f64 / rate as f64).sin()) as f32)
        .collect()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

// ---------------------------------------------------------------------------------------------------------
// Zener equations of docs/model.md section 4, solved here on their own (not with the model's code).

const VT: f64 = 0.025852;
const IS: f64 = 1e-14;

struct Part {
    izt: f64,
    nbv: f64,
    rs: f64,
    vzj: f64,
}

/// Datasheet fit of docs/model.md section 4 from (Vz, Izt, Zzt, Izk, Zzk).
fn fit(vz: f64, izt: f64, zzt: f64, izk: f64, zzk: f64) -> Part {
    let mut nbv = (zzk - zzt) / (VT * (1.0 / izk - 1.0 / izt));
    let mut rs = zzt - nbv * VT / izt;
    if rs < 0.0 {
        rs = 0.0;
        nbv = zzk * izk / VT;
    }
    Part {
        izt,
        nbv,
        rs,
        vzj: vz - izt * rs,
    }
}

impl Part {
    fn junction_current(&self, vj: f64) -> f64 {
        IS * ((vj / VT).exp() - 1.0)
            - self.izt
                * ((-(vj + self.vzj) / (self.nbv * VT)).exp() - (-self.vzj / (self.nbv * VT)).exp())
    }
    /// Anode-to-cathode voltage at anode-to-cathode current `i` (bisection on the monotonic Ij).
    fn volts_at(&self, i: f64) -> f64 {
        let (mut lo, mut hi) = (-self.vzj - 50.0, 2.0);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if self.junction_current(mid) < i {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        0.5 * (lo + hi) + self.rs * i
    }
    /// Reverse (breakdown) drop at current `i` > 0 flowing cathode to anode, as a positive number.
    fn breakdown(&self, i: f64) -> f64 {
        -self.volts_at(-i)
    }
    /// Forward drop at current `i` > 0.
    fn forward(&self, i: f64) -> f64 {
        self.volts_at(i)
    }
}

/// Magnitude of the antiseries pair's drop when `i` flows through it: one part in breakdown, one forward.
fn pair_drop(breaking: &Part, forward: &Part, i: f64) -> f64 {
    breaking.breakdown(i) + forward.forward(i)
}

/// 1N4747A (20 V), 1N4749A (24 V), 1N4733A (5.1 V): docs/model.md section 4 datasheet limits.
fn n4747a() -> Part {
    fit(20.0, 12.5e-3, 22.0, 0.25e-3, 750.0)
}
fn n4749a() -> Part {
    fit(24.0, 10.5e-3, 25.0, 0.25e-3, 750.0)
}
fn n4733a() -> Part {
    fit(5.1, 49e-3, 7.0, 1e-3, 550.0)
}

/// A circuit file with the reference values of docs/model.md section 3 and parts given by full datasheet figures.
fn circuit_file(dir: &Path, volts_at_full_scale: f64) -> PathBuf {
    let text = format!(
        r#"supply_volts = 300.0

[drive]
volts_at_full_scale = {volts_at_full_scale}

[gain_stage]
tube = "12AX7"
gain_pot_law = "log"
grid_stopper = 68e3
plate_resistor = 100e3
cathode_resistor = 1.5e3
cathode_bypass = 22e-6

[follower]
tube = "12AX7"
cathode_resistor = 100e3

[clamp]
coupling_cap = 100e-9
feed_resistor = 4.7e3
level_pot = 1e6
level_pot_law = "log"
placement = "across-pot"
load_resistor = 1e6

[[clamp.position]]
name = "off"

[[clamp.position]]
name = "1N4747A pair"
positive = {{ volts = 20.0, izt = 12.5e-3, zzt = 22.0, izk = 0.25e-3, zzk = 750.0 }}
negative = {{ volts = 20.0, izt = 12.5e-3, zzt = 22.0, izk = 0.25e-3, zzk = 750.0 }}

[[clamp.position]]
name = "1N4749A up, 1N4733A down"
positive = {{ volts = 24.0, izt = 10.5e-3, zzt = 25.0, izk = 0.25e-3, zzk = 750.0 }}
negative = {{ volts = 5.1, izt = 49e-3, zzt = 7.0, izk = 1e-3, zzk = 550.0 }}
"#
    );
    let path = dir.join("circuit.toml");
    std::fs::write(&path, text).unwrap();
    path
}

// ---------------------------------------------------------------------------------------------------------

/// Driven hard, the clamp node's peaks sit at the pair's drop (docs/model.md section 4 equations and 1N47xxA
/// datasheet figures). The pair's current at the peak is not known from outside, so the check is against the
/// drop over the currents this stage can push: from 0.1 mA up to 40 mA (about the most the follower can
/// source into 4.7 k from a 300 V supply), with 0.5 V allowed for the anti-alias filter's ringing.
#[test]
fn clamp_probe_peaks_at_the_pair_drop() {
    let dir = scratch("clamp-peaks");
    let circuit = circuit_file(&dir, 5.0);
    let input = dir.join("in.wav");
    // 100 Hz at 4.5 V peak at the jack: the gain stage swings far past 20 V at the clamp node.
    write_wav(&input, 48_000, 32, true, &[sine(48_000, 0.4, 100.0, 0.9)]);
    let skip = 4_800; // let the coupling capacitor settle for 0.1 s
    let peaks = |position: &str| {
        let out = dir.join(format!("clamp-{position}.wav"));
        let set = format!("position={position}");
        ok(&render(&[
            "--circuit",
            s(&circuit),
            "--input",
            s(&input),
            "--output",
            s(&out),
            "--set",
            "gain=1",
            "--set",
            &set,
            "--probe",
            "clamp",
        ]));
        let (_, ch) = read_float(&out);
        let tail = &ch[0][skip..];
        let hi = tail.iter().fold(f32::MIN, |m, &v| m.max(v)) as f64;
        let lo = tail.iter().fold(f32::MAX, |m, &v| m.min(v)) as f64;
        (hi, lo)
    };

    // Symmetric 1N4747A pair.
    let z = n4747a();
    let (low, high) = (pair_drop(&z, &z, 0.1e-3), pair_drop(&z, &z, 40e-3));
    // Sanity of the independent solution: at the test current the pair drops Vz plus one forward drop,
    // about 21 V [common practice: "Vz plus a diode drop"].
    assert!((pair_drop(&z, &z, 12.5e-3) - 21.0).abs() < 0.5);
    let (hi, lo) = peaks("1");
    assert!(
        hi > low - 0.5 && hi < high + 0.5,
        "positive peak {hi} V outside {low}..{high} V"
    );
    assert!(
        -lo > low - 0.5 && -lo < high + 0.5,
        "negative peak {lo} V outside -{high}..-{low} V"
    );

    // Asymmetric: 24 V part sets the positive clamp, 5.1 V part the negative one.
    let (up, down) = (n4749a(), n4733a());
    let (hi, lo) = peaks("2");
    let (low, high) = (pair_drop(&up, &down, 0.1e-3), pair_drop(&up, &down, 40e-3));
    assert!(
        hi > low - 0.5 && hi < high + 0.5,
        "positive peak {hi} V outside {low}..{high} V"
    );
    // The 1N4733A's knee is soft (Zzk 550 ohm at 1 mA): bound the negative peak by its drop at 40 mA.
    let most = pair_drop(&down, &up, 40e-3);
    assert!(
        -lo < most + 0.5 && -lo > 1.0,
        "negative peak {lo} V, the 5.1 V pair drops at most {most} V"
    );

    // Off: nothing limits the swing, it goes far past the pair's drop.
    let (hi, lo) = peaks("0");
    assert!(hi - lo > 2.0 * 30.0, "unclamped swing only {hi} .. {lo} V");
}

/// Small signal, switch off: the clamp probe is the input times the gain-pot fraction (log law of docs/model.md
/// section 3), the stage gain (about 55 grid to plate at 1 kHz, docs/model.md section 3, computed with ngspice), the
/// follower (close to 1) and the feed-resistor divider; the wiper probe is the clamp probe times the level pot
/// fraction. The common-cathode stage inverts: the probe is in antiphase with the input.
#[test]
fn probes_are_in_volts_and_follow_the_circuit() {
    let dir = scratch("small-signal");
    let input = dir.join("in.wav");
    let rate = 48_000;
    // 1 kHz at 10 mV peak through the one-stage preset (volts_at_full_scale = 1 V there).
    let x = sine(rate, 0.3, 1000.0, 0.01);
    write_wav(&input, rate, 32, true, std::slice::from_ref(&x));
    let probe = |name: &str| {
        let out = dir.join(format!("{name}.wav"));
        ok(&render(&[
            "--input",
            s(&input),
            "--output",
            s(&out),
            "--set",
            "gain=0.8",
            "--set",
            "level=0.5",
            "--set",
            "position=0",
            "--circuit",
            concat!(
                env!("CARGO_MANIFEST_DIR"),
                "/../presets-demo/one-stage.toml"
            ),
            "--probe",
            name,
        ]));
        read_float(&out).1.remove(0)
    };
    let clamp = probe("clamp");
    let wiper = probe("wiper");
    assert_eq!(clamp.len(), x.len());
    // Least-squares gain over the last 0.2 s (in phase and in quadrature).
    let from = (rate as usize) / 10;
    let fit = |y: &[f32]| {
        let (mut xy, mut xx) = (0.0, 0.0);
        for n in from..x.len() {
            xy += x[n] as f64 * y[n] as f64;
            xx += x[n] as f64 * x[n] as f64;
        }
        xy / xx
    };
    // Pot law y = (81^x - 1)/80 (docs/model.md section 3).
    let law = |p: f64| (81f64.powf(p) - 1.0) / 80.0;
    let gain_fraction = law(0.8);
    // Across-pot: clamp node to ground is the 1 M pot with the 1 M load across its lower part; 4.7 k feed.
    let y = law(0.5);
    let lower = 1.0 / (1.0 / (1e6 * y) + 1.0 / 1e6);
    let to_ground = 1e6 * (1.0 - y) + lower;
    let divider = to_ground / (to_ground + 4.7e3);
    let expected = -55.0 * gain_fraction * divider;
    let measured = fit(&clamp) / 1.0; // input volts = sample value (1 V full scale)
    assert!(
        (measured / expected - 1.0).abs() < 0.10,
        "clamp gain {measured}, expected about {expected} (docs/model.md section 3: 'about 55', 10% allowed)"
    );
    let ratio = fit(&wiper) / fit(&clamp);
    let expected_ratio = lower / to_ground;
    assert!(
        (ratio / expected_ratio - 1.0).abs() < 0.01,
        "wiper/clamp {ratio}, pot divider {expected_ratio}"
    );
}

/// A one-sample click: the stage is broadband here (bypassed cathode, coupling corner near 1.6 Hz), so the
/// probe's largest deviation must land on the click's sample (within 1), at every rate and quality, and be
/// inverted (common-cathode stage).
#[test]
fn probe_is_sample_aligned_with_the_input() {
    let dir = scratch("aligned");
    for (rate, quality) in [
        (48_000u32, "4"),
        (44_100, "1"),
        (96_000, "16"),
        (48_000, "2"),
    ] {
        let input = dir.join(format!("click-{rate}-{quality}.wav"));
        let out = dir.join(format!("out-{rate}-{quality}.wav"));
        let n = rate as usize / 10;
        let at = 1_237;
        let mut x = vec![0.0f32; n];
        x[at] = 0.01;
        write_wav(&input, rate, 32, true, &[x]);
        ok(&render(&[
            "--input",
            s(&input),
            "--output",
            s(&out),
            "--set",
            "position=0",
            "--quality",
            quality,
            "--probe",
            "clamp",
        ]));
        let (spec, ch) = read_float(&out);
        assert_eq!(spec.sample_rate, rate);
        let y = &ch[0];
        assert_eq!(y.len(), n, "output length equals input length");
        let rest = y[0] as f64;
        let (peak_at, peak) = y
            .iter()
            .enumerate()
            .map(|(i, &v)| (i, v as f64 - rest))
            .fold(
                (0, 0.0f64),
                |b, (i, d)| if d.abs() > b.1.abs() { (i, d) } else { b },
            );
        assert!(
            peak_at.abs_diff(at) <= 1,
            "{rate} Hz, {quality}x: click at {at}, probe peak at {peak_at}"
        );
        assert!(
            peak < 0.0,
            "common-cathode stage inverts; peak deviation {peak}"
        );
        // Silence before the click stays at the operating point (docs/model.md section 3: no thump).
        let early = y[..at - 100]
            .iter()
            .fold(0.0f64, |m, &v| m.max((v as f64 - rest).abs()));
        assert!(
            early < 1e-3 * peak.abs(),
            "{rate} Hz, {quality}x: output moves {early} V before the click"
        );
    }
}

/// Every usual input format renders to 32-bit float at the input's rate and length; a stereo file is two
/// independent amps (the same as rendering each side as mono); a silent side stays silent.
#[test]
fn reads_every_usual_format() {
    let dir = scratch("formats");
    for (rate, bits, float) in [
        (44_100u32, 16u16, false),
        (96_000, 24, false),
        (48_000, 32, false),
        (48_000, 32, true),
    ] {
        let tone = sine(rate, 0.15, 220.0, 0.5);
        let silent = vec![0.0f32; tone.len()];
        let tag = format!("{rate}-{bits}-{}", if float { "f" } else { "i" });
        let mono_in = dir.join(format!("mono-{tag}.wav"));
        let stereo_in = dir.join(format!("stereo-{tag}.wav"));
        write_wav(&mono_in, rate, bits, float, std::slice::from_ref(&tone));
        write_wav(&stereo_in, rate, bits, float, &[tone.clone(), silent]);
        let mono_out = dir.join(format!("mono-{tag}-out.wav"));
        let stereo_out = dir.join(format!("stereo-{tag}-out.wav"));
        ok(&render(&["--input", s(&mono_in), "--output", s(&mono_out)]));
        ok(&render(&[
            "--input",
            s(&stereo_in),
            "--output",
            s(&stereo_out),
        ]));
        let (ms, m) = read_float(&mono_out);
        let (ss, st) = read_float(&stereo_out);
        assert_eq!((ms.channels, ms.sample_rate), (1, rate), "{tag}");
        assert_eq!((ss.channels, ss.sample_rate), (2, rate), "{tag}");
        assert_eq!(m[0].len(), tone.len(), "{tag}");
        assert_eq!(st[0].len(), tone.len(), "{tag}");
        assert_eq!(m[0], st[0], "{tag}: left of stereo equals the mono render");
        let loud = m[0].iter().fold(0.0f32, |a, v| a.max(v.abs()));
        let quiet = st[1].iter().fold(0.0f32, |a, v| a.max(v.abs()));
        assert!(loud > 1e-3, "{tag}: output silent");
        assert!(quiet < 1e-6, "{tag}: silent side carries {quiet}");
    }
}

/// Each bad input: non-zero exit, one line on stderr naming the problem, and no output file.
#[test]
fn bad_input_gives_one_clear_line_and_no_file() {
    let dir = scratch("errors");
    let good = dir.join("good.wav");
    write_wav(&good, 48_000, 16, false, &[sine(48_000, 0.05, 220.0, 0.5)]);
    let low_rate = dir.join("8k.wav");
    write_wav(
        &low_rate,
        8_000,
        16,
        false,
        &[sine(8_000, 0.05, 220.0, 0.5)],
    );
    let six = dir.join("six.wav");
    write_wav(&six, 48_000, 16, false, &vec![vec![0.0; 100]; 6]);
    let text = dir.join("text.wav");
    std::fs::write(&text, "this is not a WAV file").unwrap();
    let circuit = std::fs::read_to_string(circuit_file(&dir, 1.0)).unwrap();
    let unknown_key = dir.join("unknown-key.toml");
    std::fs::write(
        &unknown_key,
        circuit.replace("plate_resistor", "plate_resistr"),
    )
    .unwrap();
    let out_of_range = dir.join("out-of-range.toml");
    std::fs::write(
        &out_of_range,
        circuit.replace("feed_resistor = 4.7e3", "feed_resistor = -4.7e3"),
    )
    .unwrap();
    let missing = dir.join("missing.wav");

    let g = s(&good);
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["--input", s(&missing)], "missing.wav"),
        (vec!["--input", s(&text)], "not a WAV file"),
        (vec!["--input", s(&six)], "6 channels"),
        (vec!["--input", s(&low_rate)], "8000 Hz"),
        (
            vec!["--input", g, "--circuit", s(&unknown_key)],
            "plate_resistr",
        ),
        (
            vec!["--input", g, "--circuit", s(&out_of_range)],
            "feed_resistor",
        ),
        (
            vec!["--input", g, "--circuit", "no-such-circuit.toml"],
            "no-such-circuit.toml",
        ),
        (vec!["--input", g, "--set", "position=3"], "position 3"),
        (vec!["--input", g, "--set", "gain"], "name=value"),
        (vec!["--input", g, "--set", "bias=2"], "bias"),
        (vec!["--input", g, "--set", "gain=1.5"], "must be at most 1"),
        (vec!["--input", g, "--set", "level=loud"], "not a number"),
        (vec!["--input", g, "--quality", "3"], "--quality"),
        (vec!["--input", g, "--probe", "plate"], "plate"),
    ];
    for (args, needle) in cases {
        let out = dir.join("out.wav");
        let mut all = args.clone();
        all.extend_from_slice(&["--output", s(&out)]);
        let result = render(&all);
        let err = String::from_utf8_lossy(&result.stderr).to_string();
        assert!(!result.status.success(), "{args:?} should fail");
        let lines: Vec<&str> = err.lines().filter(|l| !l.trim().is_empty()).collect();
        assert_eq!(lines.len(), 1, "{args:?}: expected one line, got {err:?}");
        assert!(
            err.contains(needle),
            "{args:?}: message {err:?} should name {needle:?}"
        );
        assert!(!err.contains("panicked"), "{args:?}: panic {err:?}");
        assert!(!out.exists(), "{args:?}: output file created");
        let leftovers: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .filter_map(|e| e.ok())
            .filter(|e| e.file_name().to_string_lossy().contains("partial"))
            .collect();
        assert!(leftovers.is_empty(), "{args:?}: partial files left");
    }
    // An output folder that does not exist.
    let nowhere = dir.join("no-folder").join("out.wav");
    let result = render(&["--input", g, "--output", s(&nowhere)]);
    assert!(!result.status.success());
    assert!(String::from_utf8_lossy(&result.stderr).contains("does not exist"));
}

/// `breakdown bench --quick` prints the machine, one table row per quality, and every figure in it (costs,
/// real-time factors, ratios) finite and positive. Speed itself is not asserted: it is a benchmark, and its
/// ratios are read by people, not by tests.
#[test]
fn bench_quick_prints_a_finite_table() {
    let out = run(&["bench", "--quick"]);
    ok(&out);
    let text = String::from_utf8_lossy(&out.stdout);
    let first = text.lines().next().unwrap_or("");
    assert!(first.contains("cores"), "no machine line:\n{text}");
    let header: Vec<&str> = text
        .lines()
        .find(|l| l.trim_start().starts_with("quality"))
        .unwrap_or_else(|| panic!("no table header:\n{text}"))
        .split_whitespace()
        .collect();
    for column in [
        "preamp/1stage",
        "cab/off",
        "stereo/mono",
        "1stage-xRT",
        "preamp-xRT",
    ] {
        assert!(header.contains(&column), "no {column} column:\n{text}");
    }
    for q in ["1x", "2x", "4x", "8x", "16x"] {
        let row: Vec<&str> = text
            .lines()
            .find(|l| l.split_whitespace().next() == Some(q))
            .unwrap_or_else(|| panic!("no row for {q}:\n{text}"))
            .split_whitespace()
            .collect();
        assert_eq!(
            row.len(),
            header.len(),
            "{q} row and header differ:\n{text}"
        );
        for (name, cell) in header.iter().zip(&row).skip(1) {
            let value: f64 = cell
                .parse()
                .unwrap_or_else(|_| panic!("{q} {name}: {cell:?} is not a number"));
            assert!(value.is_finite() && value > 0.0, "{q} {name}: {value}");
        }
    }
    // ngspice is either measured or the reason it was not is printed.
    assert!(text.contains("ngspice:"), "no ngspice line:\n{text}");
}
