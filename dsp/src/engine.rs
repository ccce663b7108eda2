//! The engine: input calibration, the gain pot, oversampling around the stage, smoothing of pot moves,
//! latency-compensated probes in real volts and the clamp meters. Real-time safe after `Engine::new`.

use crate::arith::{Arith, Separate};
use crate::circuit::{Circuit, CircuitError, Settings};
use crate::oversampling::{self, Downsampler, Quality, Upsampler};
use crate::pot::PotLaw;
use crate::solver::NewtonReport;
use crate::stage::{Stage, StageProbe};

/// Largest voltage at the input jack the model accepts; anything beyond (or not finite) is limited first.
pub const INPUT_LIMIT_VOLTS: f64 = 100.0;
/// Pair current above which the clamp counts as conducting, for "share of time clamped" (A).
pub const CLAMPED_CURRENT: f64 = 10e-6;
/// Pot moves glide over this time (s), so automation never clicks.
const SMOOTHING_SECONDS: f64 = 0.01;
/// The level pot's network is recomputed at most every this many base samples while it glides.
const LEVEL_UPDATE_INTERVAL: usize = 16;

/// Node voltages and currents the engine can write out, each at the base rate and aligned with the input.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Probe {
    /// Listening output: wiper volts scaled by `[listen] volts_at_full_scale`.
    Listen,
    /// Clamp node (V).
    Clamp,
    /// Level pot wiper (V).
    Wiper,
    /// Zener pair current, clamp node to ground (A).
    ZenerCurrent,
    /// Across the positive-clamp part, cathode to anode (V).
    PositivePartVolts,
    /// Across the negative-clamp part, anode to cathode (V).
    NegativePartVolts,
}

impl Probe {
    pub const ALL: [Probe; 6] = [
        Probe::Listen,
        Probe::Clamp,
        Probe::Wiper,
        Probe::ZenerCurrent,
        Probe::PositivePartVolts,
        Probe::NegativePartVolts,
    ];
    fn index(self) -> usize {
        self as usize
    }
}

/// One base-rate output sample of every probe.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Frame {
    pub listen: f64,
    pub clamp_volts: f64,
    pub wiper_volts: f64,
    pub zener_current: f64,
    pub positive_part_volts: f64,
    pub negative_part_volts: f64,
}

impl Frame {
    pub fn get(&self, probe: Probe) -> f64 {
        match probe {
            Probe::Listen => self.listen,
            Probe::Clamp => self.clamp_volts,
            Probe::Wiper => self.wiper_volts,
            Probe::ZenerCurrent => self.zener_current,
            Probe::PositivePartVolts => self.positive_part_volts,
            Probe::NegativePartVolts => self.negative_part_volts,
        }
    }
}

/// Running statistics at the internal rate, from the last `reset_meters`.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Meters {
    pub samples: u64,
    pub clamped_samples: u64,
    pub clamp_peak_positive: f64,
    pub clamp_peak_negative: f64,
    pub zener_peak_current: f64,
    pub zener_current_square_sum: f64,
    pub positive_part_peak_watts: f64,
    pub negative_part_peak_watts: f64,
    /// Sums of the parts' instantaneous power over the samples (W; times `period`, the energy in J).
    pub positive_part_watt_sum: f64,
    pub negative_part_watt_sum: f64,
    pub gain_grid_current_peak: f64,
    pub follower_grid_current_peak: f64,
    pub gain_plate_current_min: f64,
    pub follower_plate_current_min: f64,
    pub newton_iterations: u64,
    pub newton_failures: u64,
    /// Internal sample period (s).
    pub period: f64,
}

impl Meters {
    fn new(period: f64) -> Self {
        Meters {
            gain_plate_current_min: f64::INFINITY,
            follower_plate_current_min: f64::INFINITY,
            period,
            ..Default::default()
        }
    }
    /// Share of time the pair conducts more than CLAMPED_CURRENT (0..1).
    pub fn share_clamped(&self) -> f64 {
        if self.samples == 0 {
            0.0
        } else {
            self.clamped_samples as f64 / self.samples as f64
        }
    }
    /// RMS pair current (A).
    pub fn zener_rms_current(&self) -> f64 {
        if self.samples == 0 {
            0.0
        } else {
            (self.zener_current_square_sum / self.samples as f64).sqrt()
        }
    }
    /// Average power (W) in the positive-clamp and negative-clamp parts.
    pub fn average_watts(&self) -> (f64, f64) {
        if self.samples == 0 {
            (0.0, 0.0)
        } else {
            let samples = self.samples as f64;
            (
                self.positive_part_watt_sum / samples,
                self.negative_part_watt_sum / samples,
            )
        }
    }
    /// Peak-to-peak clamp node swing (V).
    pub fn clamp_peak_to_peak(&self) -> f64 {
        self.clamp_peak_positive - self.clamp_peak_negative
    }
    #[inline(always)]
    fn record(&mut self, p: &StageProbe, report: NewtonReport) {
        self.samples += 1;
        let i = p.zener_current;
        if i.abs() > CLAMPED_CURRENT {
            self.clamped_samples += 1;
        }
        // The same as larger(peak +, v) and smaller(peak -, v): peak - <= peak + always holds (both start at 0),
        // so a new sample can pass at most one of them, and a NaN passes neither.
        let v = p.clamp_volts;
        if v > self.clamp_peak_positive {
            self.clamp_peak_positive = v;
        } else if v < self.clamp_peak_negative {
            self.clamp_peak_negative = v;
        }
        self.zener_peak_current = larger(self.zener_peak_current, i.abs());
        self.zener_current_square_sum += i * i;
        let (wp, wn) = (p.positive_part_watts(), p.negative_part_watts());
        self.positive_part_peak_watts = larger(self.positive_part_peak_watts, wp);
        self.negative_part_peak_watts = larger(self.negative_part_peak_watts, wn);
        self.positive_part_watt_sum += wp;
        self.negative_part_watt_sum += wn;
        self.gain_grid_current_peak = larger(self.gain_grid_current_peak, p.gain_grid_current);
        self.follower_grid_current_peak =
            larger(self.follower_grid_current_peak, p.follower_grid_current);
        self.gain_plate_current_min = smaller(self.gain_plate_current_min, p.gain_plate_current);
        self.follower_plate_current_min =
            smaller(self.follower_plate_current_min, p.follower_plate_current);
        self.newton_iterations += report.iterations as u64;
        self.newton_failures += u64::from(!report.converged);
    }
    /// Fold in the meters of another render (the other channel of a stereo file, the next block of a long one):
    /// counts and sums add, peaks take the larger, minima the smaller, the clamp node's negative peak the more
    /// negative. The result is what one meter would have read over both renders (same internal rate).
    pub fn merge(&mut self, other: &Meters) {
        if self.samples == 0 {
            self.period = other.period;
        }
        self.samples += other.samples;
        self.clamped_samples += other.clamped_samples;
        self.clamp_peak_positive = larger(self.clamp_peak_positive, other.clamp_peak_positive);
        self.clamp_peak_negative = smaller(self.clamp_peak_negative, other.clamp_peak_negative);
        self.zener_peak_current = larger(self.zener_peak_current, other.zener_peak_current);
        self.zener_current_square_sum += other.zener_current_square_sum;
        self.positive_part_peak_watts = larger(
            self.positive_part_peak_watts,
            other.positive_part_peak_watts,
        );
        self.negative_part_peak_watts = larger(
            self.negative_part_peak_watts,
            other.negative_part_peak_watts,
        );
        self.positive_part_watt_sum += other.positive_part_watt_sum;
        self.negative_part_watt_sum += other.negative_part_watt_sum;
        self.gain_grid_current_peak =
            larger(self.gain_grid_current_peak, other.gain_grid_current_peak);
        self.follower_grid_current_peak = larger(
            self.follower_grid_current_peak,
            other.follower_grid_current_peak,
        );
        self.gain_plate_current_min =
            smaller(self.gain_plate_current_min, other.gain_plate_current_min);
        self.follower_plate_current_min = smaller(
            self.follower_plate_current_min,
            other.follower_plate_current_min,
        );
        self.newton_iterations += other.newton_iterations;
        self.newton_failures += other.newton_failures;
    }
}

/// The larger of a running extreme `a` and a new value `b` (a NaN `b` is ignored, as f64::max does), in
/// one comparison.
#[inline(always)]
fn larger(a: f64, b: f64) -> f64 {
    if b > a {
        b
    } else {
        a
    }
}

/// The smaller of a running extreme `a` and a new value `b` (a NaN `b` is ignored).
#[inline(always)]
fn smaller(a: f64, b: f64) -> f64 {
    if b < a {
        b
    } else {
        a
    }
}

/// One-pole glide toward a target.
#[derive(Clone, Copy, Debug)]
struct Glide {
    value: f64,
    target: f64,
    coeff: f64,
}

impl Glide {
    fn new(value: f64, rate: f64) -> Self {
        Glide {
            value,
            target: value,
            coeff: 1.0 - (-1.0 / (SMOOTHING_SECONDS * rate)).exp(),
        }
    }
    #[inline]
    fn next(&mut self) -> f64 {
        if self.value == self.target {
            // At rest: the step below would add zero and snap to the target, so return the target directly.
            return self.target;
        }
        self.value += (self.target - self.value) * self.coeff;
        if (self.target - self.value).abs() < 1e-9 {
            self.value = self.target;
        }
        self.value
    }
    fn moving(&self) -> bool {
        self.value != self.target
    }
}

/// Stage plus oversampling and controls, at one host sample rate.
#[derive(Clone, Debug)]
pub struct Engine {
    stage: Stage,
    quality: Quality,
    sample_rate: f64,
    up: Upsampler,
    down: [Downsampler; 6],
    high_in: [f64; 16],
    high_out: [[f64; 16]; 6],
    input_volts_per_unit: f64,
    listen_units_per_volt: f64,
    gain_law: PotLaw,
    gain: Glide,
    /// Gain pot position of the last computed attenuation, and that attenuation (the law needs a power).
    law_gain: f64,
    attenuation: f64,
    level: Glide,
    level_countdown: usize,
    active: [bool; 6],
    meters: Meters,
    frame: Frame,
    /// Run the model's fused multiply-add copy (this processor has FMA; see `arith`).
    fused: bool,
}

impl Engine {
    /// Prepare the model for `circuit` at host rate `sample_rate` (22.05 kHz .. 384 kHz). Allocates and solves
    /// the DC operating point: call outside the audio thread.
    pub fn new(
        circuit: &Circuit,
        sample_rate: f64,
        quality: Quality,
        settings: Settings,
    ) -> Result<Engine, CircuitError> {
        circuit.validate()?;
        circuit.check_position(settings.position)?;
        if !(22_050.0..=384_000.0).contains(&sample_rate) {
            return Err(CircuitError(format!(
                "sample rate {sample_rate} Hz is outside 22050 .. 384000 Hz"
            )));
        }
        for (name, v) in [("gain", settings.gain), ("level", settings.level)] {
            if !(0.0..=1.0).contains(&v) {
                return Err(CircuitError(format!(
                    "{name} = {v}: a pot position runs from 0 to 1"
                )));
            }
        }
        let factor = quality.factor();
        let stage = Stage::new(
            circuit,
            sample_rate * factor as f64,
            settings.level,
            settings.position,
        );
        let mut engine = Engine {
            stage,
            quality,
            sample_rate,
            up: Upsampler::new(quality),
            down: std::array::from_fn(|_| Downsampler::new(quality)),
            high_in: [0.0; 16],
            high_out: [[0.0; 16]; 6],
            input_volts_per_unit: circuit.input.volts_at_full_scale,
            listen_units_per_volt: 1.0 / circuit.listen.volts_at_full_scale,
            gain_law: match circuit.gain_control() {
                crate::circuit::GainControl::Attenuator(law) => law,
                crate::circuit::GainControl::PreampVolume(_) => PotLaw::Linear,
            },
            gain: Glide::new(settings.gain, sample_rate),
            law_gain: f64::NAN,
            attenuation: 0.0,
            level: Glide::new(settings.level, sample_rate),
            level_countdown: 0,
            active: [true; 6],
            meters: Meters::new(1.0 / (sample_rate * factor as f64)),
            frame: Frame::default(),
            fused: crate::arith::fused_available(),
        };
        engine.reset();
        Ok(engine)
    }

    /// Return to the DC operating point with silent history (no thump on the next sample).
    pub fn reset(&mut self) {
        self.gain.value = self.gain.target;
        self.level.value = self.level.target;
        self.stage.set_level(self.level.value);
        self.stage.reset();
        let p = *self.stage.probe();
        self.up.reset(0.0);
        let rest = Self::probe_values(&p, self.listen_units_per_volt);
        for (d, v) in self.down.iter_mut().zip(rest) {
            d.reset(v);
        }
        self.meters = Meters::new(self.meters.period);
    }

    fn probe_values(p: &StageProbe, listen_scale: f64) -> [f64; 6] {
        [
            p.wiper_volts * listen_scale,
            p.clamp_volts,
            p.wiper_volts,
            p.zener_current,
            p.positive_part_volts,
            p.negative_part_volts,
        ]
    }

    /// Decimate only these probes (each costs one anti-alias filter); the others read 0 in every `Frame`.
    /// All probes are active after `new`.
    pub fn set_active_probes(&mut self, probes: &[Probe]) {
        self.active = [false; 6];
        for p in probes {
            self.active[p.index()] = true;
        }
    }

    /// Latency in host samples added by oversampling (exact).
    pub fn latency(&self) -> usize {
        oversampling::latency(self.quality)
    }

    pub fn quality(&self) -> Quality {
        self.quality
    }

    pub fn sample_rate(&self) -> f64 {
        self.sample_rate
    }

    /// Gain pot rotation 0..1 (glides).
    pub fn set_gain(&mut self, gain: f64) {
        if gain.is_finite() {
            self.gain.target = gain.clamp(0.0, 1.0);
        }
    }

    /// Level pot rotation 0..1 (glides).
    pub fn set_level(&mut self, level: f64) {
        if level.is_finite() {
            self.level.target = level.clamp(0.0, 1.0);
        }
    }

    /// Switch position (index into the circuit's list; clamped). Instant, as the real switch is: crossfade
    /// between engines for click-free comparison.
    pub fn set_position(&mut self, position: usize) {
        self.stage.set_position(position);
    }

    /// Peak volts at the input jack for a full-scale sample.
    pub fn set_input_calibration(&mut self, volts_at_full_scale: f64) {
        if volts_at_full_scale.is_finite() && volts_at_full_scale > 0.0 {
            self.input_volts_per_unit = volts_at_full_scale;
        }
    }

    /// The stage (for pair data and readouts).
    pub fn stage(&self) -> &Stage {
        &self.stage
    }

    /// Mutable stage, for replacing a pair (not real-time safe: builds tables).
    pub fn stage_mut(&mut self) -> &mut Stage {
        &mut self.stage
    }

    pub fn meters(&self) -> &Meters {
        &self.meters
    }

    pub fn reset_meters(&mut self) {
        self.meters = Meters::new(self.meters.period);
    }

    /// Process one host sample (full-scale units) and return every probe at the host rate.
    #[inline]
    pub fn process_sample(&mut self, input: f32) -> &Frame {
        let mut out = if self.fused {
            // SAFETY: `fused` is set only where the processor has FMA.
            unsafe { self.advance_fused(input) }
        } else {
            self.advance::<Separate>(input)
        };
        for (o, active) in out.iter_mut().zip(self.active) {
            if !(active && o.is_finite()) {
                *o = 0.0;
            }
        }
        self.frame = Frame {
            listen: out[Probe::Listen.index()],
            clamp_volts: out[Probe::Clamp.index()],
            wiper_volts: out[Probe::Wiper.index()],
            zener_current: out[Probe::ZenerCurrent.index()],
            positive_part_volts: out[Probe::PositivePartVolts.index()],
            negative_part_volts: out[Probe::NegativePartVolts.index()],
        };
        &self.frame
    }

    /// One host sample through the model: the probes' values in `Probe` order, the active ones decimated (the
    /// others unspecified), not yet checked for finiteness.
    #[inline(always)]
    fn advance<A: Arith>(&mut self, input: f32) -> [f64; 6] {
        let mut x = input as f64;
        if !x.is_finite() {
            x = 0.0;
        }
        let volts = (x * self.input_volts_per_unit).clamp(-INPUT_LIMIT_VOLTS, INPUT_LIMIT_VOLTS);
        let gain = self.gain.next();
        let level = self.level.next();
        if self.level.moving() || self.level_countdown > 0 {
            if self.level_countdown == 0 {
                self.stage.set_level(level);
                self.level_countdown = if self.level.moving() {
                    LEVEL_UPDATE_INTERVAL
                } else {
                    0
                };
            } else {
                self.level_countdown -= 1;
                if self.level_countdown == 0 && !self.level.moving() {
                    self.stage.set_level(level);
                }
            }
        }
        if gain != self.law_gain {
            self.law_gain = gain;
            self.attenuation = self.gain_law.fraction(gain);
        }
        let drive = volts * self.attenuation;
        let mut out = [0.0; 6];
        if self.quality == Quality::X1 {
            // At the base rate there are no filters: the stage's readouts are the frame.
            self.stage.process_as::<A>(drive);
            let p = self.stage.probe();
            self.meters.record(p, self.stage.last_report());
            out = Self::probe_values(p, self.listen_units_per_volt);
        } else {
            let factor = self.quality.factor();
            self.up.process(drive, &mut self.high_in[..factor]);
            for k in 0..factor {
                self.stage.process_as::<A>(self.high_in[k]);
                // Read the stage's readouts in place (no copy of the whole probe).
                let p = self.stage.probe();
                self.meters.record(p, self.stage.last_report());
                let values = Self::probe_values(p, self.listen_units_per_volt);
                for (row, v) in self.high_out.iter_mut().zip(values) {
                    row[k] = v;
                }
            }
            for (probe, o) in out.iter_mut().enumerate() {
                if self.active[probe] {
                    *o = self.down[probe].process(&self.high_out[probe][..factor]);
                }
            }
        }
        out
    }

    /// Process a block, writing one probe. Output is delayed by `latency()` samples.
    /// Only `probe` stays active afterwards (see `set_active_probes`).
    pub fn process_block(&mut self, input: &[f32], output: &mut [f32], probe: Probe) {
        if !self.active[probe.index()] || self.active.iter().filter(|a| **a).count() > 1 {
            self.set_active_probes(&[probe]);
        }
        let _guard = crate::denormals::FlushGuard::new();
        let index = probe.index();
        if self.fused {
            // SAFETY: `fused` is set only where the processor has FMA.
            unsafe { self.block_fused(input, output, index) }
        } else {
            self.block::<Separate>(input, output, index);
        }
    }

    /// `advance` of the fused copy, compiled with the FMA instructions.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "fma")]
    unsafe fn advance_fused(&mut self, input: f32) -> [f64; 6] {
        self.advance::<crate::arith::Fused>(input)
    }

    #[cfg(not(target_arch = "x86_64"))]
    unsafe fn advance_fused(&mut self, input: f32) -> [f64; 6] {
        self.advance::<Separate>(input)
    }

    /// `block` of the fused copy, compiled with the FMA instructions.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "fma")]
    unsafe fn block_fused(&mut self, input: &[f32], output: &mut [f32], index: usize) {
        self.block::<crate::arith::Fused>(input, output, index);
    }

    #[cfg(not(target_arch = "x86_64"))]
    unsafe fn block_fused(&mut self, input: &[f32], output: &mut [f32], index: usize) {
        self.block::<Separate>(input, output, index);
    }

    /// The probe at `index` for each input sample, the only one active.
    #[inline(always)]
    fn block<A: Arith>(&mut self, input: &[f32], output: &mut [f32], index: usize) {
        for (x, y) in input.iter().zip(output.iter_mut()) {
            // The other probes are neither decimated nor read.
            let v = self.advance::<A>(*x)[index];
            *y = if v.is_finite() { v as f32 } else { 0.0 };
        }
    }

    /// Render a whole signal offline for one probe, latency removed (output[n] lines up with input[n]).
    /// Only `probe` stays active afterwards (see `set_active_probes`).
    pub fn render(&mut self, input: &[f32], probe: Probe) -> Vec<f32> {
        self.set_active_probes(&[probe]);
        let latency = self.latency();
        let mut out = Vec::with_capacity(input.len());
        let _guard = crate::denormals::FlushGuard::new();
        for n in 0..input.len() + latency {
            let x = input.get(n).copied().unwrap_or(0.0);
            let v = self.process_sample(x).get(probe) as f32;
            if n >= latency {
                out.push(v);
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::arith::Fused;

    /// Gain full up, level half way, at switch `position`.
    fn flat_out(position: usize) -> Settings {
        Settings {
            gain: 1.0,
            level: 0.5,
            position,
            ..Default::default()
        }
    }

    /// `samples` of a 220 Hz tone at 0.9 of full scale, 48 kHz: drives the reference stage into both clamps.
    fn hard_tone(samples: usize) -> Vec<f32> {
        (0..samples)
            .map(|n| {
                (0.9 * (2.0 * std::f64::consts::PI * 220.0 * n as f64 / 48_000.0).sin()) as f32
            })
            .collect()
    }

    /// The fused and separate multiply-add copies of the model are the same model: driven hard into both
    /// clamps, at 1x and 4x, their clamp-node and listening outputs differ by roundings only.
    #[test]
    fn fused_and_separate_copies_agree() {
        if !crate::arith::fused_available() {
            eprintln!(
                "this processor has no FMA: the fused copy never runs here, nothing to compare"
            );
            return;
        }
        let circuit = Circuit::reference();
        let (settings, input) = (flat_out(2), hard_tone(4800));
        for quality in [Quality::X1, Quality::X4] {
            let mut separate = Engine::new(&circuit, 48_000.0, quality, settings).unwrap();
            let mut fused = separate.clone();
            let (mut worst, mut peak) = ([0.0f64; 2], [0.0f64; 2]);
            for &x in &input {
                let a = separate.advance::<Separate>(x);
                // SAFETY: checked above that the processor has FMA.
                let b = unsafe { fused.advance_fused(x) };
                for (k, probe) in [Probe::Clamp, Probe::Listen].into_iter().enumerate() {
                    let (a, b) = (a[probe.index()], b[probe.index()]);
                    worst[k] = worst[k].max((a - b).abs());
                    peak[k] = peak[k].max(a.abs());
                }
            }
            assert!(
                peak[0] > 5.0,
                "{quality:?}: the pair should clamp, peak {} V",
                peak[0]
            );
            for k in 0..2 {
                assert!(
                    worst[k] <= 1e-9 * peak[k],
                    "{quality:?} probe {k}: fused and separate differ by {:e} (peak {})",
                    worst[k],
                    peak[k]
                );
            }
            eprintln!(
                "{quality:?}: largest difference {:e} V at the clamp node",
                worst[0]
            );
        }
    }

    /// A probe switched on mid-stream gives, from `decimator_memory` host samples after switching on, exactly
    /// the output it gives when on all along (the compare renders read the clamp node only around their scope
    /// passage); switching probes never touches the model, so the listening output is the same throughout.
    #[test]
    fn probe_switched_on_late_is_exact_after_decimator_memory() {
        let (settings, input) = (flat_out(1), hard_tone(3000));
        for quality in Quality::ALL {
            let mut always =
                Engine::new(&Circuit::reference(), 48_000.0, quality, settings).unwrap();
            always.set_active_probes(&[Probe::Listen, Probe::Clamp]);
            let mut late = always.clone();
            late.set_active_probes(&[Probe::Listen]);
            let switch_on = 1500;
            let exact_from = switch_on + oversampling::decimator_memory(quality) - 1;
            for (n, &x) in input.iter().enumerate() {
                if n == switch_on {
                    late.set_active_probes(&[Probe::Listen, Probe::Clamp]);
                }
                let a = *always.process_sample(x);
                let b = *late.process_sample(x);
                assert_eq!(
                    a.listen.to_bits(),
                    b.listen.to_bits(),
                    "{quality:?} listen at {n}"
                );
                if n >= exact_from {
                    assert_eq!(
                        a.clamp_volts.to_bits(),
                        b.clamp_volts.to_bits(),
                        "{quality:?} clamp at {n}"
                    );
                }
            }
        }
    }

    /// The meters against their definitions, recomputed directly from every internal-rate stage probe of an
    /// identical engine: counts, f64::max / f64::min of the readouts, sums of I^2 and of V I.
    #[test]
    fn meters_match_their_definitions() {
        let circuit = Circuit::reference();
        let settings = flat_out(2);
        let mut engine = Engine::new(&circuit, 48_000.0, Quality::X2, settings).unwrap();
        engine.set_active_probes(&[Probe::Listen]);
        let mut twin = engine.clone();
        // A hard-driven, decaying 220 Hz tone (both clamp directions conduct) with one NaN sample.
        let input: Vec<f32> = (0..4800)
            .map(|n| {
                let t = n as f64 / 48_000.0;
                if n == 1000 {
                    f32::NAN
                } else {
                    (0.9 * (-5.0 * t).exp() * (2.0 * std::f64::consts::PI * 220.0 * t).sin()) as f32
                }
            })
            .collect();
        for &x in &input {
            engine.process_sample(x);
        }

        let factor = twin.quality.factor();
        let period = 1.0 / (48_000.0 * factor as f64);
        let attenuation = twin.gain_law.fraction(settings.gain);
        let mut high = [0.0; 16];
        let mut expected = Meters {
            gain_plate_current_min: f64::INFINITY,
            follower_plate_current_min: f64::INFINITY,
            period,
            ..Default::default()
        };
        let mut probes = 0usize;
        for &x in &input {
            let x = if x.is_finite() { x as f64 } else { 0.0 };
            let volts =
                (x * twin.input_volts_per_unit).clamp(-INPUT_LIMIT_VOLTS, INPUT_LIMIT_VOLTS);
            twin.up.process(volts * attenuation, &mut high[..factor]);
            for &h in &high[..factor] {
                // The engine's copy of the model (f64::mul_add gives the fused result wherever it runs).
                let p = if twin.fused {
                    *twin.stage.process_as::<Fused>(h)
                } else {
                    *twin.stage.process(h)
                };
                let report = twin.stage.last_report();
                let m = &mut expected;
                let i = p.zener_current;
                m.samples += 1;
                m.clamped_samples += u64::from(i.abs() > CLAMPED_CURRENT);
                m.clamp_peak_positive = m.clamp_peak_positive.max(p.clamp_volts);
                m.clamp_peak_negative = m.clamp_peak_negative.min(p.clamp_volts);
                m.zener_peak_current = m.zener_peak_current.max(i.abs());
                m.zener_current_square_sum += i * i;
                let wp = p.positive_part_volts * i;
                let wn = p.negative_part_volts * i;
                m.positive_part_peak_watts = m.positive_part_peak_watts.max(wp);
                m.negative_part_peak_watts = m.negative_part_peak_watts.max(wn);
                m.positive_part_watt_sum += wp;
                m.negative_part_watt_sum += wn;
                m.gain_grid_current_peak = m.gain_grid_current_peak.max(p.gain_grid_current);
                m.follower_grid_current_peak =
                    m.follower_grid_current_peak.max(p.follower_grid_current);
                m.gain_plate_current_min = m.gain_plate_current_min.min(p.gain_plate_current);
                m.follower_plate_current_min =
                    m.follower_plate_current_min.min(p.follower_plate_current);
                m.newton_iterations += u64::from(report.iterations);
                m.newton_failures += u64::from(!report.converged);
                probes += 1;
            }
        }
        assert_eq!(probes, input.len() * factor);
        // Both directions clamped hard, so every peak and energy field is exercised.
        assert!(expected.clamp_peak_positive > 10.0 && expected.clamp_peak_negative < -3.0);
        assert!(expected.clamped_samples > 0 && expected.positive_part_watt_sum > 0.0);
        assert_eq!(*engine.meters(), expected);
    }
}
