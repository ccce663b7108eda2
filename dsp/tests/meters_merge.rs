//! `Meters::merge` against its definition: the meters of a render cut in two and merged read what one meter
//! read over the whole render (counts and sums add, peaks and minima are the extremes of both halves).

use breakdown_dsp::{Circuit, Engine, Quality, Settings};

#[test]
fn two_halves_merged_read_as_the_whole() {
    let settings = Settings {
        gain: 1.0,
        level: 0.5,
        position: 2,
        ..Default::default()
    };
    let mut whole = Engine::new(&Circuit::reference(), 48_000.0, Quality::X2, settings).unwrap();
    let mut halves = whole.clone();
    // A 1 kHz tone that swells from quiet to hard, so the two halves have different extremes.
    let input: Vec<f32> = (0..9600)
        .map(|n| {
            let t = n as f64 / 48_000.0;
            (0.9 * (t / 0.2) * (2.0 * std::f64::consts::PI * 1000.0 * t).sin()) as f32
        })
        .collect();
    let (first, second) = input.split_at(4000);
    for &x in &input {
        whole.process_sample(x);
    }
    for &x in first {
        halves.process_sample(x);
    }
    let mut merged = *halves.meters();
    halves.reset_meters();
    for &x in second {
        halves.process_sample(x);
    }
    let late = *halves.meters();
    assert!(late.clamp_peak_positive > merged.clamp_peak_positive);
    merged.merge(&late);
    let w = whole.meters();
    assert_eq!(merged.samples, w.samples);
    assert_eq!(merged.clamped_samples, w.clamped_samples);
    assert_eq!(merged.newton_iterations, w.newton_iterations);
    assert_eq!(merged.newton_failures, w.newton_failures);
    for (name, a, b) in [
        (
            "clamp + peak",
            merged.clamp_peak_positive,
            w.clamp_peak_positive,
        ),
        (
            "clamp - peak",
            merged.clamp_peak_negative,
            w.clamp_peak_negative,
        ),
        (
            "zener peak current",
            merged.zener_peak_current,
            w.zener_peak_current,
        ),
        (
            "+ part peak W",
            merged.positive_part_peak_watts,
            w.positive_part_peak_watts,
        ),
        (
            "- part peak W",
            merged.negative_part_peak_watts,
            w.negative_part_peak_watts,
        ),
        (
            "gain grid peak",
            merged.gain_grid_current_peak,
            w.gain_grid_current_peak,
        ),
        (
            "follower grid peak",
            merged.follower_grid_current_peak,
            w.follower_grid_current_peak,
        ),
        (
            "gain plate min",
            merged.gain_plate_current_min,
            w.gain_plate_current_min,
        ),
        (
            "follower plate min",
            merged.follower_plate_current_min,
            w.follower_plate_current_min,
        ),
        ("period", merged.period, w.period),
    ] {
        assert_eq!(a.to_bits(), b.to_bits(), "{name}: {a} against {b}");
    }
    for (name, a, b) in [
        (
            "I^2 sum",
            merged.zener_current_square_sum,
            w.zener_current_square_sum,
        ),
        (
            "+ part W sum",
            merged.positive_part_watt_sum,
            w.positive_part_watt_sum,
        ),
        (
            "- part W sum",
            merged.negative_part_watt_sum,
            w.negative_part_watt_sum,
        ),
    ] {
        // The same terms summed in another order: equal to rounding.
        assert!(
            (a - b).abs() <= 1e-12 * b.abs().max(1e-30),
            "{name}: {a} against {b}"
        );
    }
    // Merging a meter that has seen nothing changes nothing.
    let mut empty = whole.clone();
    empty.reset_meters();
    let mut again = merged;
    again.merge(empty.meters());
    assert_eq!(again, merged);
}
