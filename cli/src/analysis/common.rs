//! Shared pieces of the analysis commands: a circuit with a candidate pair in place, test tones in volts at
//! the jack, and one render that returns the meters over a measuring window plus the wiper level.

use breakdown_dsp::circuit::{SwitchPosition, ZenerSpec};
use breakdown_dsp::{Circuit, Engine, Meters, Quality, Readout, Settings};
use std::f64::consts::PI;

/// Host sample rate of every analysis render (Hz).
pub const RATE: f64 = 48_000.0;

/// One valve of a circuit as the analyses name it.
#[derive(Clone, Debug, PartialEq)]
pub struct ValveSocket {
    /// "stage 1", .., "stage N (gain stage)", "cathode follower".
    pub name: String,
    pub tube: breakdown_dsp::devices::TubeType,
    /// The series resistor into its grid (ohm); None for the follower (DC coupled to the gain plate).
    pub grid_stopper: Option<f64>,
}

/// Every valve of `circuit` in signal order from the jack (the order of the engine's meters and readouts).
pub fn valves_of(circuit: &Circuit) -> Vec<ValveSocket> {
    let mut v: Vec<ValveSocket> = circuit
        .preamp
        .iter()
        .enumerate()
        .map(|(k, p)| ValveSocket {
            name: format!("stage {}", k + 1),
            tube: p.tube,
            grid_stopper: Some(p.grid_stopper),
        })
        .collect();
    v.push(ValveSocket {
        name: format!("stage {} (gain stage)", circuit.preamp.len() + 1),
        tube: circuit.gain_stage.tube,
        grid_stopper: Some(circuit.gain_stage.grid_stopper),
    });
    v.push(ValveSocket {
        name: "cathode follower".into(),
        tube: circuit.follower.tube,
        grid_stopper: None,
    });
    v
}

/// What the analysis renders: a circuit, the pot and switch settings and the oversampling.
#[derive(Clone, Debug)]
pub struct Rig {
    pub circuit: Circuit,
    pub settings: Settings,
    pub quality: Quality,
}

impl Rig {
    pub fn new(circuit: Circuit, settings: Settings, quality: Quality) -> Result<Rig, String> {
        circuit
            .check_position(settings.position)
            .map_err(|e| e.to_string())?;
        Ok(Rig {
            circuit,
            settings,
            quality,
        })
    }

    /// The same rig with the switch at a new last position holding `positive`/`negative` (None = no part),
    /// selected. The original positions stay as they are.
    pub fn with_pair(&self, positive: Option<ZenerSpec>, negative: Option<ZenerSpec>) -> Rig {
        let mut rig = self.clone();
        let index = rig.circuit.clamp.position.len();
        rig.circuit.clamp.position.push(SwitchPosition {
            name: format!("analysis candidate {index}"),
            positive,
            negative,
        });
        rig.settings.position = rig.circuit.clamp.position.len() - 1;
        rig
    }

    /// The same rig with the clamp off (no parts at the selected position).
    pub fn off(&self) -> Rig {
        self.with_pair(None, None)
    }

    pub fn with_gain(&self, gain: f64) -> Rig {
        let mut rig = self.clone();
        rig.settings.gain = gain;
        rig
    }

    /// The parts at the selected position.
    pub fn pair_specs(&self) -> (Option<ZenerSpec>, Option<ZenerSpec>) {
        let p = &self.circuit.clamp.position[self.settings.position];
        (p.positive, p.negative)
    }

    pub fn position_name(&self) -> &str {
        &self.circuit.clamp.position[self.settings.position].name
    }

    /// A prepared engine at the analysis rate, its input calibrated so one sample unit is one volt at the jack.
    pub fn engine(&self) -> Result<Engine, String> {
        self.engine_at(RATE)
    }

    /// The same at host rate `rate` (Hz).
    pub fn engine_at(&self, rate: f64) -> Result<Engine, String> {
        let mut e = Engine::new(&self.circuit, rate, self.quality, self.settings)
            .map_err(|e| e.to_string())?;
        e.set_input_calibration(1.0);
        Ok(e)
    }
}

/// A test signal in volts at the jack with the index where measuring starts.
#[derive(Clone, Debug)]
pub struct Stimulus {
    pub volts: Vec<f32>,
    /// Meters are reset at this sample: everything before it is lead-in (fade-in, coupling cap settling).
    pub measure_from: usize,
    /// Sample rate (Hz).
    pub rate: f64,
}

impl Stimulus {
    /// A sine of `peak_volts` at `freq` Hz: raised-cosine fade-in over `fade` s, then `steady` s at full level.
    /// Measuring starts `settle` s into the steady part (settle <= steady).
    pub fn tone(peak_volts: f64, freq: f64, fade: f64, settle: f64, steady: f64) -> Stimulus {
        let n_fade = (fade * RATE).round() as usize;
        let n_total = n_fade + (steady * RATE).round() as usize;
        let volts = (0..n_total)
            .map(|n| {
                let env = if n < n_fade {
                    0.5 - 0.5 * (PI * n as f64 / n_fade as f64).cos()
                } else {
                    1.0
                };
                (peak_volts * env * (2.0 * PI * freq * n as f64 / RATE).sin()) as f32
            })
            .collect();
        Stimulus {
            volts,
            measure_from: (n_fade + (settle * RATE).round() as usize).min(n_total),
            rate: RATE,
        }
    }

    /// Short burst for map cells: 5 ms fade, 25 ms steady, measured over the last 20 ms.
    pub fn burst(peak_volts: f64, freq: f64) -> Stimulus {
        Stimulus::tone(peak_volts, freq, 0.005, 0.005, 0.025)
    }

    /// Longer tone for clamp levels and ratings: 10 ms fade, 290 ms steady, measured over the last 150 ms so
    /// the coupling capacitor (about 0.1 s with the reference values) has settled its DC shift.
    pub fn sustained(peak_volts: f64, freq: f64) -> Stimulus {
        Stimulus::tone(peak_volts, freq, 0.01, 0.14, 0.29)
    }

    /// A recorded DI already in volts at the jack, at `rate` Hz; measured from the start.
    pub fn recording(volts: Vec<f32>, rate: f64) -> Stimulus {
        Stimulus {
            volts,
            measure_from: 0,
            rate,
        }
    }
}

/// What one render tells: meters over the measuring window, the idle operating point and RMS levels.
#[derive(Clone, Copy, Debug)]
pub struct Outcome {
    pub meters: Meters,
    pub idle: Readout,
    /// RMS of the level pot wiper over the measuring window (V).
    pub wiper_rms: f64,
    /// RMS of the clamp node over the measuring window (V).
    pub clamp_rms: f64,
}

impl Outcome {
    /// Peak clamp-node volts, positive (>= 0) and negative as a magnitude (>= 0).
    pub fn clamp_peaks(&self) -> (f64, f64) {
        (
            self.meters.clamp_peak_positive.max(0.0),
            (-self.meters.clamp_peak_negative).max(0.0),
        )
    }
}

/// Render `stimulus` through `rig` and measure the window. `engine` is reused when given (reset first).
pub fn run_with(engine: &mut Engine, stimulus: &Stimulus) -> Outcome {
    run_into(engine, stimulus, None)
}

/// The same, also keeping the wiper volts over the measuring window in `wiper`.
pub fn run_into(
    engine: &mut Engine,
    stimulus: &Stimulus,
    mut wiper: Option<&mut Vec<f32>>,
) -> Outcome {
    engine.reset();
    let idle = engine.readout();
    let latency = engine.latency();
    let total = stimulus.volts.len() + latency;
    let mut sum_sq = 0.0;
    let mut clamp_sq = 0.0;
    let mut counted = 0usize;
    let mut meters = None;
    for n in 0..total {
        if n == stimulus.measure_from {
            engine.reset_meters();
        }
        if n == stimulus.volts.len() {
            // The meters stop with the signal; the tail only flushes the probes' latency.
            meters = Some(*engine.meters());
        }
        let x = if n < stimulus.volts.len() {
            stimulus.volts[n]
        } else {
            0.0
        };
        let frame = engine.process_sample(x);
        // The frame lags the input by `latency` samples.
        if n >= stimulus.measure_from + latency {
            if let Some(w) = wiper.as_deref_mut() {
                w.push(frame.wiper_volts as f32);
            }
            sum_sq += frame.wiper_volts * frame.wiper_volts;
            clamp_sq += frame.clamp_volts * frame.clamp_volts;
            counted += 1;
        }
    }
    let c = counted.max(1) as f64;
    Outcome {
        meters: meters.unwrap_or(*engine.meters()),
        idle,
        wiper_rms: (sum_sq / c).sqrt(),
        clamp_rms: (clamp_sq / c).sqrt(),
    }
}

/// Render once on a fresh engine at the stimulus's rate.
pub fn run(rig: &Rig, stimulus: &Stimulus) -> Result<Outcome, String> {
    let mut engine = rig.engine_at(stimulus.rate)?;
    checked(rig, run_with(&mut engine, stimulus))
}

/// Render once on a fresh engine, with the wiper's integrated loudness over the measuring window (LUFS, EBU
/// R128 via ebur128; a window shorter than the 400 ms gating block is repeated to 1.2 s first, which for a
/// steady tone measures the same level). -inf when silent.
pub fn run_with_loudness(rig: &Rig, stimulus: &Stimulus) -> Result<(Outcome, f64), String> {
    let mut engine = rig.engine_at(stimulus.rate)?;
    let mut wiper = Vec::new();
    let o = checked(rig, run_into(&mut engine, stimulus, Some(&mut wiper)))?;
    Ok((o, loudness_lufs(&wiper, stimulus.rate)?))
}

/// Integrated loudness of a mono signal (LUFS), repeated to at least 1.2 s when shorter.
pub fn loudness_lufs(signal: &[f32], rate: f64) -> Result<f64, String> {
    if signal.is_empty() {
        return Ok(f64::NEG_INFINITY);
    }
    let want = (1.2 * rate) as usize;
    let mut tiled = signal.to_vec();
    while tiled.len() < want {
        tiled.extend_from_slice(signal);
    }
    let (lufs, _) = crate::compare::loudness::measure(&[tiled], rate as u32)?;
    Ok(lufs)
}

/// The outcome, or a clear error when the model's readouts are not finite (the solver diverged).
pub fn checked(rig: &Rig, o: Outcome) -> Result<Outcome, String> {
    let m = &o.meters;
    let finite = [
        m.clamp_peak_positive,
        m.clamp_peak_negative,
        m.zener_peak_current,
        m.positive_part_watt_sum,
        m.negative_part_watt_sum,
        o.wiper_rms,
    ]
    .iter()
    .all(|v| v.is_finite() && v.abs() < 1e6);
    if finite {
        Ok(o)
    } else {
        let (p, n) = rig.pair_specs();
        let part = |z: Option<breakdown_dsp::circuit::ZenerSpec>| {
            z.map_or("none".to_string(), |z| format!("{} V", z.volts))
        };
        Err(format!(
            "the model did not settle (non-finite readings) at gain {}, position '{}' (parts {} / {}); \
             this is a model fault, please report it with the command line",
            rig.settings.gain,
            rig.position_name(),
            part(p),
            part(n)
        ))
    }
}

/// A progress bar is on screen (only the outermost `parallel` shows one).
static SHOWING: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Run `jobs` over two worker threads (the machine has two cores), keeping the order of results. When the
/// work takes longer than two seconds and stderr is a terminal, a progress bar counts the jobs.
pub fn parallel<T: Send, R: Send>(jobs: Vec<T>, work: impl Fn(T) -> R + Sync) -> Vec<R> {
    use std::sync::atomic::Ordering;
    let threads = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(2)
        .clamp(1, 2);
    let count = jobs.len();
    let outermost = !SHOWING.swap(true, Ordering::SeqCst);
    let terminal = std::io::IsTerminal::is_terminal(&std::io::stderr());
    let bar = indicatif::ProgressBar::with_draw_target(
        Some(count as u64),
        indicatif::ProgressDrawTarget::hidden(),
    );
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "analysing {wide_bar} {pos}/{len} renders  {elapsed} (eta {eta})",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let started = std::time::Instant::now();
    let shown = std::sync::atomic::AtomicBool::new(false);
    let queue = std::sync::Mutex::new(jobs.into_iter().enumerate().collect::<Vec<_>>());
    let results = std::sync::Mutex::new((0..count).map(|_| None).collect::<Vec<Option<R>>>());
    std::thread::scope(|s| {
        for _ in 0..threads {
            s.spawn(|| loop {
                let job = queue.lock().map(|mut q| q.pop()).unwrap_or(None);
                let Some((index, job)) = job else { break };
                let r = work(job);
                if let Ok(mut out) = results.lock() {
                    out[index] = Some(r);
                }
                bar.inc(1);
                if outermost
                    && terminal
                    && started.elapsed() > crate::compare::PROGRESS_AFTER
                    && !shown.swap(true, Ordering::Relaxed)
                {
                    bar.set_draw_target(indicatif::ProgressDrawTarget::stderr());
                }
            });
        }
    });
    bar.finish_and_clear();
    if outermost {
        SHOWING.store(false, Ordering::SeqCst);
    }
    results
        .into_inner()
        .unwrap_or_default()
        .into_iter()
        .map(|r| r.expect("every job ran"))
        .collect()
}

/// Log-spaced values from `low` to `high` inclusive.
pub fn log_space(low: f64, high: f64, count: usize) -> Vec<f64> {
    if count <= 1 {
        return vec![low];
    }
    (0..count)
        .map(|k| low * (high / low).powf(k as f64 / (count - 1) as f64))
        .collect()
}

/// Evenly spaced values from `low` to `high` inclusive.
pub fn lin_space(low: f64, high: f64, count: usize) -> Vec<f64> {
    if count <= 1 {
        return vec![high];
    }
    (0..count)
        .map(|k| low + (high - low) * k as f64 / (count - 1) as f64)
        .collect()
}

/// Settings from `--set name=value` assignments over the defaults.
pub fn parse_settings(sets: &[String]) -> Result<Settings, String> {
    let mut s = Settings::default();
    for a in sets {
        s.set(a).map_err(|e| e.to_string())?;
    }
    Ok(s)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parallel_keeps_order() {
        let out = parallel((0..20).collect(), |x: i32| x * 2);
        assert_eq!(out, (0..20).map(|x| x * 2).collect::<Vec<_>>());
    }

    #[test]
    fn log_space_ends() {
        let v = log_space(0.02, 2.0, 5);
        assert!((v[0] - 0.02).abs() < 1e-12 && (v[4] - 2.0).abs() < 1e-12);
        // Equal ratios: 100^(1/4) (general reference maths).
        assert!((v[1] / v[0] - 100f64.powf(0.25)).abs() < 1e-9);
    }
}
