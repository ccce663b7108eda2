//! Cross-check of the model against ngspice (the Debian `ngspice` package, an independent circuit simulator).
//!
//! For every case under `references/` (see references/README.md) the committed `reference.csv` holds the clamp
//! node, wiper, every preamp plate (and the tone stack's output) that ngspice computed for the same circuit
//! (`circuit.toml` of docs/model.md section 5, turned into `netlist.cir` by `references/gen.py` with the circuit
//! of docs/model.md section 3 and the device equations of section 4 as behavioural sources), at a fine step and
//! band-limited onto the 48 kHz grid. This test feeds the same sine (`case.toml`) to `breakdown_dsp::Engine` at
//! 48 kHz and the default quality (4x), band-limits both signals to 15 kHz, aligns them by the best fractional lag
//! and requires a normalised RMS error (RMS of the difference / RMS of the ngspice signal) of at most 1% at every
//! probe. At a plate, which sits at a DC level of a hundred volts or more, the error is that of the signal swing
//! (the DC bin left out of both the difference and the norm); the DC levels are printed beside it.
//!
//! The data is committed, so this runs without ngspice. With `BREAKDOWN_REGENERATE=1` and ngspice on PATH, the
//! second test reruns gen.py into a temporary directory and checks the fresh ngspice output matches the
//! committed data.

use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use realfft::num_complex::Complex;
use realfft::RealFftPlanner;
use serde::Deserialize;
use std::path::{Path, PathBuf};

const SAMPLE_RATE: f64 = 48_000.0;
/// Both signals are compared below this frequency (issue 2: "band-limiting both signals to 15 kHz").
const BAND_LIMIT_HZ: f64 = 15_000.0;
/// Largest accepted normalised RMS error against ngspice (issue 2: "at most 1%").
const MAX_ERROR: f64 = 0.01;
/// Lags searched for the alignment (base-rate samples either way).
const MAX_LAG: f64 = 3.0;
/// Largest accepted lag: the model's probes are latency-compensated, so they must line up with ngspice's time
/// axis (0.05 sample is about 1 us at 48 kHz).
const MAX_ACCEPTED_LAG: f64 = 0.05;

#[derive(Deserialize)]
struct CaseFile {
    description: String,
    signal: Signal,
    settings: Settings,
    compare: Compare,
}

#[derive(Deserialize)]
struct Signal {
    /// Peak volts at the input jack.
    amplitude_volts: f64,
    /// Hz.
    frequency: f64,
    /// s.
    duration: f64,
}

#[derive(Deserialize)]
struct Compare {
    /// Start-up time left out of the comparison (s).
    skip: f64,
}

struct Case {
    name: String,
    dir: PathBuf,
    file: CaseFile,
    circuit: Circuit,
}

fn references_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../references")
}

fn load_cases() -> Vec<Case> {
    let root = references_dir();
    let mut cases = Vec::new();
    let mut entries: Vec<PathBuf> = std::fs::read_dir(&root)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", root.display()))
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.join("case.toml").is_file())
        .collect();
    entries.sort();
    for dir in entries {
        let name = dir.file_name().unwrap().to_string_lossy().into_owned();
        let read = |file: &str| {
            std::fs::read_to_string(dir.join(file)).unwrap_or_else(|e| panic!("{name}/{file}: {e}"))
        };
        let file: CaseFile =
            toml::from_str(&read("case.toml")).unwrap_or_else(|e| panic!("{name}/case.toml: {e}"));
        let circuit = Circuit::from_toml(&read("circuit.toml"))
            .unwrap_or_else(|e| panic!("{name}/circuit.toml: {e}"));
        cases.push(Case {
            name,
            dir,
            file,
            circuit,
        });
    }
    cases
}

/// The columns of a reference.csv by name (clamp, wiper, plate1, ..., gain_plate, tone), one row per 48 kHz
/// sample.
struct Reference {
    names: Vec<String>,
    columns: Vec<Vec<f64>>,
}

impl Reference {
    fn column(&self, name: &str) -> &[f64] {
        let index = self
            .names
            .iter()
            .position(|n| n == name)
            .unwrap_or_else(|| {
                panic!("reference.csv has no column '{name}' (rerun references/gen.py)")
            });
        &self.columns[index]
    }
    fn len(&self) -> usize {
        self.columns.first().map_or(0, Vec::len)
    }
}

fn read_reference(path: &Path) -> Reference {
    let text = std::fs::read_to_string(path)
        .unwrap_or_else(|e| panic!("{}: {e} (run python3 references/gen.py)", path.display()));
    let mut names: Vec<String> = Vec::new();
    let mut columns: Vec<Vec<f64>> = Vec::new();
    let mut rows = 0usize;
    for (index, line) in text.lines().enumerate() {
        if line.starts_with('#') || line.trim().is_empty() {
            continue;
        }
        if let Some(header) = line.strip_prefix("time,") {
            names = header.split(',').map(|n| n.trim().to_string()).collect();
            columns = vec![Vec::new(); names.len()];
            continue;
        }
        assert!(
            !names.is_empty(),
            "{} line {}: data before the header line",
            path.display(),
            index + 1
        );
        let fields: Vec<f64> = line
            .split(',')
            .map(|f| {
                f.trim().parse().unwrap_or_else(|_| {
                    panic!("{} line {}: bad number '{f}'", path.display(), index + 1)
                })
            })
            .collect();
        assert_eq!(
            fields.len(),
            1 + names.len(),
            "{} line {}",
            path.display(),
            index + 1
        );
        let expected_time = rows as f64 / SAMPLE_RATE;
        assert!(
            (fields[0] - expected_time).abs() < 1e-9,
            "{} line {}: time {} is not on the 48 kHz grid",
            path.display(),
            index + 1,
            fields[0]
        );
        for (column, value) in columns.iter_mut().zip(&fields[1..]) {
            column.push(*value);
        }
        rows += 1;
    }
    Reference { names, columns }
}

/// The probes compared in a case: clamp and wiper, every preamp plate, the tone stack's output when there is one.
fn probes_of(case: &Case) -> Vec<(String, Probe)> {
    let mut probes = vec![
        ("clamp".to_string(), Probe::Clamp),
        ("wiper".to_string(), Probe::Wiper),
    ];
    for k in 1..=case.circuit.preamp.len() {
        probes.push((format!("plate{k}"), Probe::Plate(k)));
    }
    if case.circuit.tone_stack.is_some() {
        probes.push(("tone".to_string(), Probe::Tone));
    }
    probes
}

/// The case's sine at the jack as 48 kHz samples in full-scale units.
fn input_signal(case: &Case, samples: usize) -> Vec<f32> {
    let s = &case.file.signal;
    let scale = s.amplitude_volts / case.circuit.input.volts_at_full_scale;
    (0..samples)
        .map(|n| {
            let t = n as f64 / SAMPLE_RATE;
            (scale * (2.0 * std::f64::consts::PI * s.frequency * t).sin()) as f32
        })
        .collect()
}

fn render(case: &Case, input: &[f32], probe: Probe, quality: Quality) -> Vec<f64> {
    let mut engine = Engine::new(&case.circuit, SAMPLE_RATE, quality, case.file.settings)
        .unwrap_or_else(|e| panic!("{}: {e}", case.name));
    engine
        .render(input, probe)
        .into_iter()
        .map(f64::from)
        .collect()
}

/// Outcome of one comparison.
struct Comparison {
    /// Normalised RMS error after band-limiting and alignment.
    error: f64,
    /// Normalised RMS error with no lag.
    error_unaligned: f64,
    /// Best lag of the model against the reference (samples; positive = model late).
    lag: f64,
    reference_peak: (f64, f64),
    model_peak: (f64, f64),
    /// Mean over the compared segment (V): the DC level.
    reference_mean: f64,
    model_mean: f64,
}

/// Band-limit both signals to BAND_LIMIT_HZ (brick wall on the FFT of a segment of whole signal periods),
/// then find the fractional lag that minimises the RMS difference, searched on the spectra (Parseval).
/// With `swing_only`, the DC bin is left out of both the difference and the norm (a plate's swing around its
/// operating point).
fn compare(
    model: &[f64],
    reference: &[f64],
    start: usize,
    period: usize,
    swing_only: bool,
) -> Comparison {
    let available = reference.len().min(model.len()) - start;
    let len = if period > 0 && available >= period {
        available / period * period
    } else {
        available
    };
    let segment = |x: &[f64]| x[start..start + len].to_vec();
    let mut planner = RealFftPlanner::<f64>::new();
    let fft = planner.plan_fft_forward(len);
    let spectrum = |mut x: Vec<f64>| {
        let mut out = fft.make_output_vec();
        fft.process(&mut x, &mut out).expect("fft");
        out
    };
    let m = spectrum(segment(model));
    let r = spectrum(segment(reference));
    let top_bin = ((BAND_LIMIT_HZ * len as f64 / SAMPLE_RATE).floor() as usize).min(m.len() - 1);
    // Parseval weight of each real-FFT bin: DC (and Nyquist, if kept) once, the others twice.
    let weight = |k: usize| if k == 0 || 2 * k == len { 1.0 } else { 2.0 };
    let first_bin = usize::from(swing_only);
    let reference_energy: f64 = (first_bin..=top_bin)
        .map(|k| weight(k) * r[k].norm_sqr())
        .sum();
    let error_at = |lag: f64| -> f64 {
        let mut sum = 0.0;
        for k in first_bin..=top_bin {
            let phase = -2.0 * std::f64::consts::PI * k as f64 * -lag / len as f64;
            let shifted = m[k] * Complex::from_polar(1.0, phase);
            sum += weight(k) * (shifted - r[k]).norm_sqr();
        }
        (sum / reference_energy).sqrt()
    };
    // Coarse grid, then golden-section refinement around the best point.
    let mut best = 0.0;
    let mut best_error = error_at(0.0);
    let steps = (MAX_LAG * 100.0) as i32;
    for i in -steps..=steps {
        let lag = i as f64 / 100.0;
        let e = error_at(lag);
        if e < best_error {
            best = lag;
            best_error = e;
        }
    }
    let (mut a, mut b) = (best - 0.01, best + 0.01);
    let g = (5f64.sqrt() - 1.0) / 2.0;
    for _ in 0..40 {
        let c = b - g * (b - a);
        let d = a + g * (b - a);
        if error_at(c) < error_at(d) {
            b = d;
        } else {
            a = c;
        }
    }
    let lag = 0.5 * (a + b);
    let peaks = |x: &[f64]| {
        let s = &x[start..start + len];
        (
            s.iter().cloned().fold(f64::NEG_INFINITY, f64::max),
            s.iter().cloned().fold(f64::INFINITY, f64::min),
        )
    };
    let mean = |x: &[f64]| x[start..start + len].iter().sum::<f64>() / len as f64;
    Comparison {
        error: error_at(lag).min(best_error),
        reference_mean: mean(reference),
        model_mean: mean(model),
        error_unaligned: error_at(0.0),
        lag,
        reference_peak: peaks(reference),
        model_peak: peaks(model),
    }
}

/// Seven one-stage cases and at least five with two or three preamp stages.
const MIN_CASES: usize = 12;

/// The whole segment compared, from `skip` to the end, cut to whole periods of the case's sine.
fn segment_of(case: &Case) -> (usize, usize) {
    let start = (case.file.compare.skip * SAMPLE_RATE).round() as usize;
    let period_samples = SAMPLE_RATE / case.file.signal.frequency;
    let period = if (period_samples - period_samples.round()).abs() < 1e-9 {
        period_samples.round() as usize
    } else {
        0
    };
    (start, period)
}

#[test]
fn model_matches_ngspice_at_default_quality() {
    let cases = load_cases();
    assert!(
        cases.len() >= MIN_CASES,
        "references/README.md lists at least {MIN_CASES} ngspice cases, found {}",
        cases.len()
    );
    let multi_stage = cases.iter().filter(|c| c.circuit.preamp.len() >= 2).count();
    assert!(
        multi_stage >= 5,
        "at least five cases with two or three preamp stages, found {multi_stage}"
    );
    println!(
        "model (48 kHz, quality 4x) against ngspice, both band-limited to {} kHz; at a plate the error is that of \
         the swing (DC left out), the DC levels are shown as 'mean'",
        BAND_LIMIT_HZ / 1e3
    );
    println!(
        "{:<16} {:>6} {:>9} {:>9} {:>9}   {:>17} {:>17}   {:>17}",
        "case",
        "probe",
        "error %",
        "no-lag %",
        "lag smp",
        "ngspice peaks V",
        "model peaks V",
        "mean V ngspice/model"
    );
    let mut failures = Vec::new();
    for case in &cases {
        let reference = read_reference(&case.dir.join("reference.csv"));
        let samples = (case.file.signal.duration * SAMPLE_RATE).round() as usize;
        assert_eq!(
            reference.len(),
            samples,
            "{}: reference.csv length does not match case.toml's duration (rerun references/gen.py)",
            case.name
        );
        let input = input_signal(case, samples);
        let (start, period) = segment_of(case);
        println!("{}: {}", case.name, case.file.description);
        for (label, probe) in probes_of(case) {
            let model = render(case, &input, probe, Quality::X4);
            let swing_only = matches!(probe, Probe::Plate(_));
            let c = compare(&model, reference.column(&label), start, period, swing_only);
            println!(
                "{:<16} {:>6} {:>9.4} {:>9.4} {:>+9.3}   {:>+8.3}/{:>+8.3} {:>+8.3}/{:>+8.3}   {:>+8.3}/{:>+8.3}",
                case.name,
                label,
                100.0 * c.error,
                100.0 * c.error_unaligned,
                c.lag,
                c.reference_peak.0,
                c.reference_peak.1,
                c.model_peak.0,
                c.model_peak.1,
                c.reference_mean,
                c.model_mean,
            );
            // Normalised RMS error against ngspice at most 1% at the default quality, every case, every probe.
            if c.error.is_nan() || c.error > MAX_ERROR {
                failures.push(format!("{} {label}: {:.3}%", case.name, 100.0 * c.error));
            }
            // The engine removes its oversampling latency: the best lag against ngspice must be (nearly) zero.
            if c.lag.abs() > MAX_ACCEPTED_LAG {
                failures.push(format!("{} {label}: lag {:+.3} samples", case.name, c.lag));
            }
        }
    }
    if std::env::var("BREAKDOWN_CROSSCHECK_QUALITIES").as_deref() == Ok("1") {
        // Information only: the clamp-node error at every quality setting.
        println!("clamp-node error (%) per quality:");
        for case in &cases {
            let reference = read_reference(&case.dir.join("reference.csv"));
            let input = input_signal(case, reference.len());
            let (start, period) = segment_of(case);
            let row: Vec<String> = Quality::ALL
                .iter()
                .map(|&q| {
                    let c = compare(
                        &render(case, &input, Probe::Clamp, q),
                        reference.column("clamp"),
                        start,
                        period,
                        false,
                    );
                    format!("{}x {:.4}", q.factor(), 100.0 * c.error)
                })
                .collect();
            println!("{:<16} {}", case.name, row.join("  "));
        }
    }
    assert!(
        failures.is_empty(),
        "model differs from ngspice by more than {}% (or lags by more than {} sample): {}",
        100.0 * MAX_ERROR,
        MAX_ACCEPTED_LAG,
        failures.join(", ")
    );
}

fn ngspice_on_path() -> bool {
    std::process::Command::new("ngspice")
        .arg("--version")
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false)
}

#[test]
fn committed_reference_data_matches_a_fresh_ngspice_run() {
    if std::env::var("BREAKDOWN_REGENERATE").as_deref() != Ok("1") {
        println!("BREAKDOWN_REGENERATE is not 1: the committed ngspice data is used as it is");
        return;
    }
    assert!(
        ngspice_on_path(),
        "BREAKDOWN_REGENERATE=1 but ngspice is not on PATH (Debian: apt-get install ngspice)"
    );
    let out = std::env::temp_dir().join(format!("breakdown-ngspice-{}", std::process::id()));
    std::fs::create_dir_all(&out).expect("temporary directory");
    let status = std::process::Command::new("python3")
        .arg(references_dir().join("gen.py"))
        .arg("--out")
        .arg(&out)
        .status()
        .expect("python3 runs gen.py");
    assert!(status.success(), "references/gen.py failed");
    let mut failures = Vec::new();
    for case in load_cases() {
        // gen.py writes the netlist from circuit.toml and case.toml: a committed netlist that differs was not
        // regenerated after an edit.
        let netlist =
            |dir: &Path| std::fs::read_to_string(dir.join("netlist.cir")).unwrap_or_default();
        if netlist(&case.dir) != netlist(&out.join(&case.name)) {
            failures.push(format!(
                "{}: committed netlist.cir is stale (rerun python3 references/gen.py)",
                case.name
            ));
        }
        let committed = read_reference(&case.dir.join("reference.csv"));
        let fresh = read_reference(&out.join(&case.name).join("reference.csv"));
        assert_eq!(
            committed.names, fresh.names,
            "{}: the columns differ (rerun python3 references/gen.py)",
            case.name
        );
        for (label, a) in committed.names.iter().zip(&committed.columns) {
            let b = fresh.column(label);
            assert_eq!(a.len(), b.len(), "{} {label}: lengths differ", case.name);
            // Against the signal's swing (a plate's DC level would hide a difference in it).
            let mean = a.iter().sum::<f64>() / a.len() as f64;
            let energy: f64 = a.iter().map(|v| (v - mean) * (v - mean)).sum();
            let diff: f64 = a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum();
            let relative = (diff / energy).sqrt();
            let worst = a
                .iter()
                .zip(b)
                .map(|(x, y)| (x - y).abs())
                .fold(0.0, f64::max);
            println!(
                "{:<16} {label}: fresh ngspice run against committed data: rms {:.2e}, worst {:.2e} V",
                case.name, relative, worst
            );
            // The same netlist on another ngspice build may round differently; 1e-4 of the signal is far below
            // the 1% the model is held to.
            if relative > 1e-4 {
                failures.push(format!("{} {label}: {relative:.2e}", case.name));
            }
        }
    }
    let _ = std::fs::remove_dir_all(&out);
    assert!(
        failures.is_empty(),
        "committed reference data differs from a fresh ngspice run: {}",
        failures.join(", ")
    );
}
