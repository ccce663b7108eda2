//! Models run as lanes of one packed solver give each lane the one-model solver's result (issue: lane results
//! within 1e-9 of the peak of the scalar model's). Each lane has its own input and switch position; a lane fed
//! NaN and infinities must not move the others.

use breakdown_dsp::elements::Knob;
use breakdown_dsp::lane::Lane;
use breakdown_dsp::nodal::Nodal;
use breakdown_dsp::Circuit;
use wide::{f64x2, f64x4};

const RATE: f64 = 192_000.0;

/// Lane k's input at sample n: a 220 Hz tone whose level differs per lane, hot enough to clamp; `poisoned`
/// lanes get NaN and infinite bursts.
fn input(k: usize, n: usize, poisoned: Option<usize>) -> f64 {
    if poisoned == Some(k) && (n / 500) % 3 == 1 {
        return if n.is_multiple_of(2) {
            f64::NAN
        } else {
            f64::INFINITY
        };
    }
    let t = n as f64 / RATE;
    (0.2 + 0.3 * k as f64) * (2.0 * std::f64::consts::PI * 220.0 * t).sin()
}

fn run_scalar(c: &Circuit, position: usize, lane: usize, samples: usize) -> Vec<f64> {
    let mut m: Nodal<f64> = Nodal::new(c, RATE, position).unwrap();
    m.set_knob(Knob::Gain, 0.8);
    let clamp = m.netlist().clamp_node;
    (0..samples)
        .map(|n| {
            m.process(input(lane, n, None));
            m.node_volts(clamp)
        })
        .collect()
}

fn run_packed<L: Lane>(
    c: &Circuit,
    positions: &[usize],
    samples: usize,
    poisoned: Option<usize>,
) -> Vec<Vec<f64>> {
    let mut m: Nodal<L> = Nodal::new(c, RATE, 0).unwrap();
    for (lane, &p) in positions.iter().enumerate() {
        m.set_position(lane, p);
    }
    m.reset();
    m.set_knob(Knob::Gain, 0.8);
    let clamp = m.netlist().clamp_node;
    let mut out = vec![Vec::with_capacity(samples); L::WIDTH];
    for n in 0..samples {
        let mut x = L::splat(0.0);
        for lane in 0..L::WIDTH {
            x.set(lane, input(lane, n, poisoned));
        }
        m.process(x);
        let v = m.node_volts(clamp);
        for (lane, o) in out.iter_mut().enumerate() {
            o.push(v.get(lane));
        }
    }
    out
}

fn assert_lanes_match<L: Lane>(c: &Circuit, positions: &[usize], poisoned: Option<usize>) {
    let samples = 9_600;
    let packed = run_packed::<L>(c, positions, samples, poisoned);
    for (lane, &p) in positions.iter().enumerate() {
        if poisoned == Some(lane) {
            assert!(
                packed[lane].iter().all(|v| v.is_finite()),
                "lane {lane}: a non-finite output"
            );
            continue;
        }
        let scalar = run_scalar(c, p, lane, samples);
        let peak = scalar.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let worst = scalar
            .iter()
            .zip(&packed[lane])
            .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
        assert!(
            peak > 1.0,
            "lane {lane}: the test tone must swing the clamp node"
        );
        assert!(
            worst <= 1e-9 * peak,
            "lane {lane} (position {p}): packed differs from scalar by {worst:e} V (peak {peak} V)"
        );
    }
}

#[test]
fn two_lanes_equal_two_scalar_models() {
    assert_lanes_match::<f64x2>(&Circuit::builtin(), &[1, 2], None);
    assert_lanes_match::<f64x2>(&Circuit::one_stage(), &[0, 1], None);
}

#[test]
fn four_lanes_equal_four_scalar_models() {
    assert_lanes_match::<f64x4>(&Circuit::builtin(), &[0, 1, 2, 1], None);
}

#[test]
fn a_poisoned_lane_leaves_the_others_as_they_were() {
    assert_lanes_match::<f64x2>(&Circuit::builtin(), &[1, 2], Some(1));
    assert_lanes_match::<f64x4>(&Circuit::builtin(), &[1, 2, 0, 1], Some(2));
}

/// The engine with two packed lanes (the channels of a stereo DI) renders each channel as a one-model engine
/// does: oversampling, knob glides and probes included, at the default quality.
#[test]
fn a_two_lane_engine_renders_each_channel_as_one_model_does() {
    use breakdown_dsp::engine::{Engine, Probe};
    use breakdown_dsp::oversampling::Quality;
    let c = Circuit::builtin();
    let settings = breakdown_dsp::Settings {
        gain: 0.8,
        level: 0.5,
        position: 1,
        ..Default::default()
    };
    let left: Vec<f32> = (0..4800)
        .map(|n| (0.4 * (2.0 * std::f64::consts::PI * 110.0 * n as f64 / 48_000.0).sin()) as f32)
        .collect();
    let right: Vec<f32> = (0..4000)
        .map(|n| (0.7 * (2.0 * std::f64::consts::PI * 165.0 * n as f64 / 48_000.0).sin()) as f32)
        .collect();
    for probe in [Probe::Listen, Probe::Clamp] {
        let mut packed: Engine<f64x2> =
            Engine::with_lanes(&c, 48_000.0, Quality::X4, settings).unwrap();
        let both = packed.render_lanes(&[&left, &right], probe);
        for (lane, input) in [&left, &right].into_iter().enumerate() {
            let mut one = Engine::new(&c, 48_000.0, Quality::X4, settings).unwrap();
            let mut padded = input.clone();
            padded.resize(left.len(), 0.0);
            let alone = one.render(&padded, probe);
            assert_eq!(both[lane].len(), alone.len());
            let peak = alone.iter().fold(0.0f32, |m, v| m.max(v.abs()));
            let worst = alone
                .iter()
                .zip(&both[lane])
                .fold(0.0f32, |m, (a, b)| m.max((a - b).abs()));
            assert!(
                peak > 0.05,
                "{probe:?} lane {lane}: the tone must reach the output"
            );
            assert!(
                worst <= 1e-6 * peak,
                "{probe:?} lane {lane}: packed engine differs by {worst:e} (peak {peak})"
            );
        }
    }
}
