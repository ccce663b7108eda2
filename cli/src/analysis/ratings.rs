//! Ratings: current and dissipation of each Zener against its family's power rating, the coupling
//! capacitor's DC voltage against its rating, and the spread of clamp levels over the parts' tolerance.
//!
//! Margins: the margin of a part is its rating over its load, printed as "12.0x". Its state (common practice,
//! no single source; defined here once for the command line and the report): "ok" when the rating is at least
//! [`THIN_BELOW`] times the average dissipation it sees, "thin" below that, "over the rating" below 1x. The 2x covers the derating of
//! glass Zener ratings above about 50 C lead temperature and a hot chassis. Average (not peak) power sets
//! the junction temperature here: a glass Zener's thermal time constant (around a second) is far longer than
//! an audio cycle, so the peak figure is shown for information only.

use super::common::{run, Outcome, Rig, Stimulus};
use breakdown_dsp::circuit::ZenerSpec;
use breakdown_dsp::parts::{Family, FAMILY_1N47XXA, FAMILY_1N52XXB};
use breakdown_dsp::{Circuit, Meters, Readout};

/// A margin (rating / load) below this is "thin" (common practice: it covers the derating of glass Zeners
/// above about 50 C lead temperature and a hot chassis).
pub const THIN_BELOW: f64 = 2.0;

/// "12.0x"; "no load" when nothing flows; ">1000x" above a thousand.
pub fn margin_text(margin: f64) -> String {
    if !margin.is_finite() {
        "no load".to_string()
    } else if margin > 1000.0 {
        ">1000x".to_string()
    } else {
        format!("{margin:.1}x")
    }
}

/// The margin states in one sentence, for the tables' headings.
pub fn margin_legend() -> String {
    format!(
        "margin = rating / load: ok at {THIN_BELOW}x or more, thin below {THIN_BELOW}x, over the rating below 1x (common practice)"
    )
}

/// Margin verdict.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verdict {
    Ok,
    Thin,
    Over,
}

impl Verdict {
    /// From a margin (rating / load): ok at THIN_BELOW or more, thin below, over the rating below 1.
    pub fn from_margin(margin: f64) -> Verdict {
        if margin >= THIN_BELOW {
            Verdict::Ok
        } else if margin >= 1.0 {
            Verdict::Thin
        } else {
            Verdict::Over
        }
    }
    pub fn label(self) -> &'static str {
        match self {
            Verdict::Ok => "ok",
            Verdict::Thin => "thin",
            Verdict::Over => "over the rating",
        }
    }
}

/// Where a part's power rating comes from.
#[derive(Clone, Copy, Debug)]
pub enum RatingSource {
    Family(&'static Family),
    Watts(f64),
}

impl RatingSource {
    pub fn watts(&self) -> f64 {
        match self {
            RatingSource::Family(f) => f.power_rating_watts,
            RatingSource::Watts(w) => *w,
        }
    }
    pub fn describe(&self) -> String {
        match self {
            RatingSource::Family(f) => f.name.to_string(),
            RatingSource::Watts(w) => format!("user-set {w} W"),
        }
    }
    pub fn part_number(&self, volts: f64) -> Option<&'static str> {
        match self {
            RatingSource::Family(f) => f.part_number(volts),
            RatingSource::Watts(_) => None,
        }
    }
}

/// The family named on the command line: "1n47xxa" (1 W) or "1n52xxb" (1/2 W).
pub fn family_by_name(name: &str) -> Result<&'static Family, String> {
    match name.to_ascii_lowercase().as_str() {
        "1n47xxa" | "1n47" | "1w" => Ok(&FAMILY_1N47XXA),
        "1n52xxb" | "1n52" | "0.5w" | "half-watt" => Ok(&FAMILY_1N52XXB),
        other => Err(format!(
            "--family {other}: known families are 1n47xxa (1 W glass) and 1n52xxb (1/2 W glass)"
        )),
    }
}

/// One Zener's load and verdict.
#[derive(Clone, Debug)]
pub struct PartRating {
    /// "positive" (sets the positive clamp) or "negative".
    pub role: &'static str,
    pub volts: f64,
    pub part_number: Option<&'static str>,
    pub peak_current: f64,
    pub rms_current: f64,
    pub peak_watts: f64,
    pub average_watts: f64,
    pub rating_watts: f64,
    pub rating_source: String,
    /// rating / average dissipation.
    pub margin: f64,
    pub verdict: Verdict,
}

/// The coupling capacitor's DC load.
#[derive(Clone, Copy, Debug)]
pub struct CapRating {
    pub farads: f64,
    /// DC across the cap at the operating point: follower cathode minus clamp node (V).
    pub dc_volts: f64,
    /// B+: the most the cap can see while the valves warm up (V).
    pub supply_volts: f64,
    pub rating_volts: f64,
    pub verdict: Verdict,
}

impl CapRating {
    /// Verdict: over below the DC voltage; thin below 1.5x DC or below B+ (warm-up: the follower can conduct
    /// with the gain valve still cold, its cathode rising toward B+; common practice); ok otherwise.
    pub fn new(farads: f64, idle: &Readout, supply_volts: f64, rating_volts: f64) -> CapRating {
        let dc_volts = (idle.follower().cathode_volts - idle.clamp_volts).abs();
        let verdict = if rating_volts < dc_volts {
            Verdict::Over
        } else if rating_volts < 1.5 * dc_volts || rating_volts < supply_volts {
            Verdict::Thin
        } else {
            Verdict::Ok
        };
        CapRating {
            farads,
            dc_volts,
            supply_volts,
            rating_volts,
            verdict,
        }
    }
}

/// All ratings of one render.
#[derive(Clone, Debug)]
pub struct Ratings {
    pub parts: Vec<PartRating>,
    pub cap: CapRating,
    /// Upper bound on the feed resistor's average dissipation (W).
    pub feed_resistor_watts: f64,
    /// Length of the measured window (s).
    pub seconds: f64,
}

/// Ratings from the meters of any render (the report code calls this with its own engine's meters):
/// `idle` is the engine's operating point (`engine.readout()` right after `Engine::new` or `reset`).
pub fn ratings_from_meters(
    meters: &Meters,
    idle: &Readout,
    circuit: &Circuit,
    position: usize,
    source: RatingSource,
    cap_rating_volts: f64,
) -> Ratings {
    let spec = &circuit.clamp.position[position.min(circuit.clamp.position.len() - 1)];
    let (avg_pos, avg_neg) = meters.average_watts();
    let mut parts = Vec::new();
    for (role, part, peak, avg) in [
        (
            "positive",
            spec.positive,
            meters.positive_part_peak_watts,
            avg_pos,
        ),
        (
            "negative",
            spec.negative,
            meters.negative_part_peak_watts,
            avg_neg,
        ),
    ] {
        if let Some(z) = part {
            let rating = source.watts();
            let margin = if avg > 0.0 {
                rating / avg
            } else {
                f64::INFINITY
            };
            parts.push(PartRating {
                role,
                volts: z.volts,
                part_number: source.part_number(z.volts),
                // Both parts of the string carry the same current.
                peak_current: meters.zener_peak_current,
                rms_current: meters.zener_rms_current(),
                peak_watts: peak,
                average_watts: avg,
                rating_watts: rating,
                rating_source: source.describe(),
                margin,
                verdict: Verdict::from_margin(margin),
            });
        }
    }
    Ratings {
        parts,
        cap: CapRating::new(
            circuit.clamp.coupling_cap,
            idle,
            circuit.supply_volts,
            cap_rating_volts,
        ),
        feed_resistor_watts: 0.0,
        seconds: meters.samples as f64 * meters.period,
    }
}

/// Resistance from the clamp node to ground through the level pot network (ohm), pair excluded.
pub fn clamp_network_resistance(circuit: &Circuit, level: f64) -> f64 {
    let c = &circuit.clamp;
    let (top, bottom) = c.level_pot_law.legs(c.level_pot, level);
    let lower = match c.load_resistor {
        Some(load) => bottom * load / (bottom + load),
        None => bottom,
    };
    match c.placement {
        breakdown_dsp::Placement::AcrossPot => top + lower,
        breakdown_dsp::Placement::AtWiper => lower,
    }
}

/// Ratings of `rig` on `stimulus` (one render).
pub fn ratings(
    rig: &Rig,
    stimulus: &Stimulus,
    source: RatingSource,
    cap_rating_volts: f64,
) -> Result<(Ratings, Outcome), String> {
    let o = run(rig, stimulus)?;
    let mut r = ratings_from_meters(
        &o.meters,
        &o.idle,
        &rig.circuit,
        rig.settings.position,
        source,
        cap_rating_volts,
    );
    // Feed current = pair current + clamp volts / network; RMS of a sum <= sum of RMS (Minkowski), so this
    // bounds the feed resistor's average power from above.
    let network = clamp_network_resistance(&rig.circuit, rig.settings.level);
    let feed_rms = o.meters.zener_rms_current() + o.clamp_rms / network;
    r.feed_resistor_watts = feed_rms * feed_rms * rig.circuit.clamp.feed_resistor;
    Ok((r, o))
}

/// Clamp levels of one tolerance corner.
#[derive(Clone, Copy, Debug)]
pub struct Corner {
    /// Scale applied to the positive and negative part voltages.
    pub scale: (f64, f64),
    /// Peak clamp-node volts, positive and negative magnitude.
    pub peaks: (f64, f64),
}

/// Spread of clamp levels over the parts' voltage tolerance.
#[derive(Clone, Debug)]
pub struct Spread {
    pub tolerance: f64,
    pub nominal: (f64, f64),
    pub corners: Vec<Corner>,
}

impl Spread {
    /// (min, max) of the positive and of the negative peak over nominal and corners.
    pub fn ranges(&self) -> ((f64, f64), (f64, f64)) {
        let all = std::iter::once(self.nominal).chain(self.corners.iter().map(|c| c.peaks));
        let mut p = (f64::INFINITY, f64::NEG_INFINITY);
        let mut n = p;
        for (a, b) in all {
            p = (p.0.min(a), p.1.max(a));
            n = (n.0.min(b), n.1.max(b));
        }
        (p, n)
    }
}

fn scaled(spec: Option<ZenerSpec>, s: f64) -> Option<ZenerSpec> {
    spec.map(|mut z| {
        // Keep the part's own knee data; the voltage moves within its tolerance band.
        let sheet = z.datasheet();
        z.volts *= s;
        z.izt = Some(sheet.izt);
        z.zzt = Some(sheet.zzt);
        z.izk = Some(sheet.izk);
        z.zzk = Some(sheet.zzk);
        z
    })
}

/// Render the four +/-`tolerance` corners of the two Zener voltages (two threads) and the nominal parts.
pub fn tolerance_spread(rig: &Rig, stimulus: &Stimulus, tolerance: f64) -> Result<Spread, String> {
    let (pos, neg) = rig.pair_specs();
    let (lo, hi) = (1.0 - tolerance, 1.0 + tolerance);
    let mut jobs = vec![(1.0, 1.0)];
    for a in [lo, hi] {
        for b in [lo, hi] {
            jobs.push((a, b));
        }
    }
    let results = super::common::parallel(jobs.clone(), |(a, b)| {
        run(&rig.with_pair(scaled(pos, a), scaled(neg, b)), stimulus).map(|o| o.clamp_peaks())
    });
    let mut peaks = Vec::new();
    for r in results {
        peaks.push(r?);
    }
    Ok(Spread {
        tolerance,
        nominal: peaks[0],
        corners: jobs[1..]
            .iter()
            .zip(&peaks[1..])
            .map(|(s, p)| Corner {
                scale: *s,
                peaks: *p,
            })
            .collect(),
    })
}

/// Plain-text table of ratings.
pub fn ratings_text(r: &Ratings) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "Zener load over {:.2} s (average power sets the temperature; {}):\n",
        r.seconds,
        margin_legend()
    ));
    for p in &r.parts {
        s.push_str(&format!(
            "  {:<8} Vz {:>5.1} V {:<8} peak {:>7.3} mA  rms {:>7.3} mA  peak {:>7.1} mW  average {:>7.2} mW  rating {} ({})  margin {}  {}\n",
            p.role,
            p.volts,
            p.part_number.unwrap_or("-"),
            p.peak_current * 1e3,
            p.rms_current * 1e3,
            p.peak_watts * 1e3,
            p.average_watts * 1e3,
            format_watts(p.rating_watts),
            p.rating_source,
            if p.average_watts < 1e-6 {
                margin_text(f64::INFINITY)
            } else {
                margin_text(p.margin)
            },
            p.verdict.label()
        ));
    }
    if r.parts.is_empty() {
        s.push_str("  no Zeners at this position\n");
    }
    s.push_str(&format!(
        "Coupling capacitor {}: {:.1} V DC at the operating point, up to B+ {:.0} V while the valves warm up; rating {:.0} V: {}\n",
        breakdown_dsp::units::si(r.cap.farads, "F"),
        r.cap.dc_volts,
        r.cap.supply_volts,
        r.cap.rating_volts,
        r.cap.verdict.label()
    ));
    s.push_str(&format!(
        "Feed resistor: at most {:.2} mW average\n",
        r.feed_resistor_watts * 1e3
    ));
    s
}

fn format_watts(w: f64) -> String {
    breakdown_dsp::units::si(w, "W")
}

/// Plain-text spread line.
pub fn spread_text(s: &Spread) -> String {
    let ((p0, p1), (n0, n1)) = s.ranges();
    let corners: Vec<String> = s
        .corners
        .iter()
        .map(|c| {
            format!(
                "{:+.0}%/{:+.0}%: +{:.2}/-{:.2} V",
                (c.scale.0 - 1.0) * 100.0,
                (c.scale.1 - 1.0) * 100.0,
                c.peaks.0,
                c.peaks.1
            )
        })
        .collect();
    format!(
        "Part tolerance +/-{:.0}% (corners of both parts' Vz): clamp level + {:.2} .. {:.2} V, clamp level - -{:.2} .. -{:.2} V (nominal +{:.2} / -{:.2} V)\n  corners (+ part/- part): {}",
        s.tolerance * 100.0,
        p0,
        p1,
        n0,
        n1,
        s.nominal.0,
        s.nominal.1,
        corners.join("; ")
    )
}

/// Maximum ratings of one triode section (design-centre, from memory of the common datasheets: 12AX7 / ECC83
/// 330 V plate, 1.2 W; 12AT7 / ECC81 300 V, 2.5 W; 12AU7 / ECC82 330 V, 2.75 W).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ValveRatingLimits {
    pub plate_volts: f64,
    pub plate_watts: f64,
}

/// The ratings of a valve type the model knows (from memory of the common datasheets, per triode section).
pub fn valve_limits(tube: breakdown_dsp::devices::triode::TubeType) -> ValveRatingLimits {
    use breakdown_dsp::devices::triode::TubeType;
    match tube {
        TubeType::Ax7 => ValveRatingLimits {
            plate_volts: 330.0,
            plate_watts: 1.2,
        },
        TubeType::At7 => ValveRatingLimits {
            plate_volts: 300.0,
            plate_watts: 2.5,
        },
        TubeType::Au7 => ValveRatingLimits {
            plate_volts: 330.0,
            plate_watts: 2.75,
        },
    }
}

/// One valve at idle against its type's ratings: margins (rating / load) of plate voltage (plate to cathode)
/// and plate dissipation, with the verdict of the worse one.
#[derive(Clone, Debug, PartialEq)]
pub struct ValveRating {
    pub tube: &'static str,
    pub plate_volts: f64,
    pub plate_watts: f64,
    pub limits: ValveRatingLimits,
    pub volts_margin: f64,
    pub watts_margin: f64,
}

impl ValveRating {
    pub fn new(
        tube: breakdown_dsp::devices::triode::TubeType,
        idle: &breakdown_dsp::engine::ValveReadout,
    ) -> ValveRating {
        let limits = valve_limits(tube);
        let plate_volts = idle.plate_volts - idle.cathode_volts;
        let plate_watts = idle.plate_watts();
        let margin = |rating: f64, load: f64| {
            if load > 0.0 {
                rating / load
            } else {
                f64::INFINITY
            }
        };
        ValveRating {
            tube: tube.name(),
            plate_volts,
            plate_watts,
            limits,
            volts_margin: margin(limits.plate_volts, plate_volts),
            watts_margin: margin(limits.plate_watts, plate_watts),
        }
    }
    /// Plate voltage above its rating (a plate voltage rating is a limit, not a derated figure: no "thin").
    pub fn volts_over(&self) -> bool {
        self.volts_margin < 1.0
    }
    /// Verdict on plate dissipation, as for the Zeners.
    pub fn watts_verdict(&self) -> Verdict {
        Verdict::from_margin(self.watts_margin)
    }
}

#[cfg(test)]
mod valve_rating_tests {
    use super::*;
    use breakdown_dsp::devices::triode::TubeType;
    use breakdown_dsp::engine::ValveReadout;

    #[test]
    fn follower_with_1k_cathode_at_400_v_is_over_its_dissipation() {
        // Hand calculation: plate at 400 V, cathode at 200 V, 10 mA -> 200 V * 10 mA = 2 W against the
        // 12AX7's 1.2 W (from memory of the datasheet): margin 0.6x, over the rating.
        let idle = ValveReadout {
            plate_volts: 400.0,
            grid_volts: 198.0,
            cathode_volts: 200.0,
            plate_current: 10e-3,
            grid_current: 0.0,
        };
        let r = ValveRating::new(TubeType::Ax7, &idle);
        assert!((r.plate_watts - 2.0).abs() < 1e-12);
        assert!((r.watts_margin - 0.6).abs() < 1e-12);
        assert_eq!(r.watts_verdict(), Verdict::Over);
        assert!(!r.volts_over());
        // A 12AX7 plate at 350 V above its cathode exceeds the 330 V rating.
        let hot = ValveReadout {
            plate_volts: 351.0,
            cathode_volts: 1.0,
            plate_current: 0.5e-3,
            ..idle
        };
        assert!(ValveRating::new(TubeType::Ax7, &hot).volts_over());
        assert!(!ValveRating::new(TubeType::At7, &idle).volts_over());
    }
}
