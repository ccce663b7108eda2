//! `breakdown parts`: a parts list for the switch layout with the minimum ratings the worst-case render asks
//! for, the orientation of each Zener in the antiseries string and the safety cautions.

use super::common::{valves_of, Rig, Stimulus};
use super::ratings::{margin_text, ratings, RatingSource, Ratings, ValveRating};
use breakdown_dsp::{Circuit, Readout};

/// Standard power ratings of glass and plastic Zeners (W), smallest first.
const ZENER_WATTS: [f64; 6] = [0.5, 1.0, 1.3, 2.0, 3.0, 5.0];
/// Standard resistor power ratings (W).
const RESISTOR_WATTS: [f64; 6] = [0.125, 0.25, 0.5, 1.0, 2.0, 3.0];
/// Common film capacitor voltage ratings (V).
const CAP_VOLTS: [f64; 8] = [63.0, 100.0, 160.0, 250.0, 400.0, 450.0, 630.0, 1000.0];

/// The smallest standard value at or above `need`, or None above the list.
pub fn standard_at_least(list: &[f64], need: f64) -> Option<f64> {
    list.iter().copied().find(|v| *v >= need)
}

/// One line of the list.
#[derive(Clone, Debug)]
pub struct Line {
    pub item: String,
    pub position: String,
    pub value: String,
    pub part_number: String,
    pub orientation: String,
    pub worst_case: String,
    pub minimum_rating: String,
}

/// The worst case the ratings come from.
#[derive(Clone, Copy, Debug)]
pub struct WorstCase {
    pub gain: f64,
    pub input_volts: f64,
    pub tone_hz: f64,
}

fn watts(w: f64) -> String {
    if w >= 1.0 {
        format!("{w} W")
    } else {
        format!("{:.0} mW", w * 1e3)
    }
}

/// Ratings per listed switch position.
pub type PositionRatings = Vec<(usize, Ratings)>;

/// Build the list for `positions` of `rig`'s circuit.
pub fn parts_list(
    rig: &Rig,
    positions: &[usize],
    worst: WorstCase,
    source: RatingSource,
    cap_rating_volts: f64,
) -> Result<(Vec<Line>, PositionRatings), String> {
    let stimulus = Stimulus::sustained(worst.input_volts, worst.tone_hz);
    let mut lines = Vec::new();
    let mut all = Vec::new();
    let mut worst_feed: f64 = 0.0;
    let mut cap = None;
    let mut idle = None;
    for &pos in positions {
        let mut r = rig.with_gain(worst.gain);
        r.settings.position = pos;
        let name = r.position_name().to_string();
        let (rat, outcome) = ratings(&r, &stimulus, source, cap_rating_volts)?;
        idle.get_or_insert(outcome.idle);
        worst_feed = worst_feed.max(rat.feed_resistor_watts);
        cap = Some(rat.cap);
        for p in &rat.parts {
            let need = 2.0 * p.average_watts;
            let min = standard_at_least(&ZENER_WATTS, need)
                .map(watts)
                .unwrap_or_else(|| format!("above 5 W ({} needed)", watts(need)));
            let orientation = if p.role == "positive" {
                "sets the + clamp: cathode (band) to the clamp node, anode to the middle joint"
            } else {
                "sets the - clamp: anode to the middle joint, cathode (band) to ground"
            };
            lines.push(Line {
                item: format!("Zener ({})", p.role),
                position: format!("{pos} {name}"),
                value: format!("{} V", p.volts),
                part_number: p.part_number.unwrap_or("-").to_string(),
                orientation: orientation.into(),
                worst_case: format!(
                    "{:.2} mW average, {:.1} mW peak, {:.2} mA peak",
                    p.average_watts * 1e3,
                    p.peak_watts * 1e3,
                    p.peak_current * 1e3
                ),
                minimum_rating: format!(
                    "{min} (2x average, common practice); chosen {}: {}",
                    p.rating_source,
                    p.verdict.label()
                ),
            });
        }
        all.push((pos, rat));
    }
    let c = &rig.circuit.clamp;
    if let Some(cap) = cap {
        let need = cap.supply_volts.max(1.5 * cap.dc_volts);
        lines.push(Line {
            item: "coupling capacitor".into(),
            position: "all".into(),
            value: format!("{} film", breakdown_dsp::units::si(c.coupling_cap, "F")),
            part_number: "-".into(),
            orientation: "non-polarised".into(),
            worst_case: format!(
                "{:.1} V DC at the operating point, B+ {:.0} V at warm-up",
                cap.dc_volts, cap.supply_volts
            ),
            minimum_rating: format!(
                "{} (B+ and 1.5x DC, common practice); stated rating {:.0} V: {}",
                standard_at_least(&CAP_VOLTS, need)
                    .map(|v| format!("{v:.0} V"))
                    .unwrap_or_else(|| format!("{need:.0} V")),
                cap.rating_volts,
                cap.verdict.label()
            ),
        });
    }
    lines.push(Line {
        item: "feed resistor".into(),
        position: "all".into(),
        value: format!("{:.1} kohm", c.feed_resistor / 1e3),
        part_number: "-".into(),
        orientation: "-".into(),
        worst_case: format!("at most {:.2} mW average", worst_feed * 1e3),
        minimum_rating: standard_at_least(&RESISTOR_WATTS, 2.0 * worst_feed)
            .map(|w| format!("{} (2x, common practice)", watts(w)))
            .unwrap_or_else(|| format!("{} needed", watts(2.0 * worst_feed))),
    });
    lines.push(Line {
        item: "level pot".into(),
        position: "all".into(),
        value: format!("{:.0} kohm {:?}", c.level_pot / 1e3, c.level_pot_law).to_lowercase(),
        part_number: "-".into(),
        orientation: match c.placement {
            breakdown_dsp::Placement::AcrossPot => {
                "Zeners across the whole track (clamp node = pot top)".into()
            }
            breakdown_dsp::Placement::AtWiper => "Zeners from the wiper to ground".into(),
        },
        worst_case: "-".into(),
        minimum_rating: "-".into(),
    });
    lines.extend(preamp_lines(&rig.circuit, idle.as_ref()));
    Ok((lines, all))
}

/// One part of a preamp stage by its circuit-file key, in SI units.
#[derive(Clone, Debug, PartialEq)]
pub struct StagePart {
    /// Stage number, counted from 1 at the input jack.
    pub stage: usize,
    /// The circuit-file key ("plate_resistor", "volume.bright_cap", ...).
    pub key: String,
    /// The value in SI base units (ohm or F).
    pub amount: f64,
    /// "ohm" or "F".
    pub unit: &'static str,
    /// What the number alone does not say (a pot's taper), if anything.
    pub note: Option<String>,
}

impl StagePart {
    /// "stage 1 plate_resistor".
    pub fn item(&self) -> String {
        format!("stage {} {}", self.stage, self.key)
    }
    /// "100 kohm", "1 Mohm log".
    pub fn value(&self) -> String {
        let v = breakdown_dsp::units::si(self.amount, self.unit);
        match &self.note {
            Some(n) => format!("{v} {n}"),
            None => v,
        }
    }
}

/// Every preamp stage's parts, by their circuit-file keys, in signal order from the jack.
pub fn stage_parts(circuit: &Circuit) -> Vec<StagePart> {
    use breakdown_dsp::circuit::Network;
    let mut out = Vec::new();
    for (k, st) in circuit.preamp.iter().enumerate() {
        let mut add = |key: &str, amount: f64, unit: &'static str, note: Option<String>| {
            out.push(StagePart {
                stage: k + 1,
                key: key.into(),
                amount,
                unit,
                note,
            })
        };
        add("grid_stopper", st.grid_stopper, "ohm", None);
        add("plate_resistor", st.plate_resistor, "ohm", None);
        add("cathode_resistor", st.cathode_resistor, "ohm", None);
        if st.cathode_bypass > 0.0 {
            add("cathode_bypass", st.cathode_bypass, "F", None);
        }
        add("coupling_cap", st.coupling_cap, "F", None);
        match &st.network {
            Network::GridLeak(r) => add("grid_leak", *r, "ohm", None),
            Network::Volume(v) => {
                add(
                    "volume.resistance",
                    v.resistance,
                    "ohm",
                    Some(format!("{:?}", v.law).to_lowercase()),
                );
                if v.bright_cap > 0.0 {
                    add("volume.bright_cap", v.bright_cap, "F", None);
                }
            }
            Network::Divider(d) => {
                add("divider.series", d.series, "ohm", None);
                if d.series_cap > 0.0 {
                    add("divider.series_cap", d.series_cap, "F", None);
                }
                add("divider.shunt", d.shunt, "ohm", None);
            }
        }
    }
    out
}

/// One valve of the circuit at idle against its type's ratings.
#[derive(Clone, Debug, PartialEq)]
pub struct ValveLine {
    /// "stage 1", "stage 3 (gain stage)", "cathode follower".
    pub name: String,
    pub rating: ValveRating,
}

impl ValveLine {
    /// "valve, stage 1".
    pub fn item(&self) -> String {
        format!("valve, {}", self.name)
    }
    /// "idle: 180.2 V plate to cathode, 0.123 W plate dissipation".
    pub fn idle_text(&self) -> String {
        format!(
            "idle: {:.1} V plate to cathode, {:.3} W plate dissipation",
            self.rating.plate_volts, self.rating.plate_watts
        )
    }
    /// The ratings (from memory of the datasheet) and the verdict.
    pub fn rating_text(&self) -> String {
        let vr = &self.rating;
        format!(
            "{} V, {} W per section (from memory of the datasheet): dissipation {} {}{}",
            vr.limits.plate_volts,
            vr.limits.plate_watts,
            margin_text(vr.watts_margin),
            vr.watts_verdict().label(),
            if vr.volts_over() {
                "; plate voltage over the rating"
            } else {
                ""
            }
        )
    }
}

/// Every valve in signal order (the preamp stages, the gain stage, the cathode follower) at the idle operating
/// point `idle` of an engine built on `circuit`.
pub fn valve_lines(circuit: &Circuit, idle: &Readout) -> Vec<ValveLine> {
    valves_of(circuit)
        .into_iter()
        .zip(idle.valves())
        .map(|(valve, v)| ValveLine {
            name: valve.name,
            rating: ValveRating::new(valve.tube, v),
        })
        .collect()
}

/// The preamp's lines of the list: each stage's parts, then (with an operating point) each valve at idle
/// against its ratings.
pub fn preamp_lines(circuit: &Circuit, idle: Option<&Readout>) -> Vec<Line> {
    let blank = |item: String, value: String| Line {
        item,
        position: "all".into(),
        value,
        part_number: "-".into(),
        orientation: "-".into(),
        worst_case: "-".into(),
        minimum_rating: "-".into(),
    };
    let mut lines: Vec<Line> = stage_parts(circuit)
        .iter()
        .map(|p| blank(p.item(), p.value()))
        .collect();
    for v in idle.map(|i| valve_lines(circuit, i)).unwrap_or_default() {
        lines.push(Line {
            worst_case: v.idle_text(),
            minimum_rating: v.rating_text(),
            ..blank(v.item(), v.rating.tube.into())
        });
    }
    lines
}

fn csv_field(s: &str) -> String {
    if s.contains(',') || s.contains('"') {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

pub fn to_csv(lines: &[Line]) -> String {
    let mut s = String::from(
        "item,position,value,part_number,orientation,worst_case_load,minimum_rating\n",
    );
    for l in lines {
        let f = [
            &l.item,
            &l.position,
            &l.value,
            &l.part_number,
            &l.orientation,
            &l.worst_case,
            &l.minimum_rating,
        ];
        s.push_str(&f.iter().map(|x| csv_field(x)).collect::<Vec<_>>().join(","));
        s.push('\n');
    }
    s
}

pub fn to_text(lines: &[Line], worst: WorstCase) -> String {
    let mut s = format!(
        "Parts list. Loads from a worst-case render: {:.1} V peak {:.0} Hz tone at the jack, gain {:.2}.\n\
         Antiseries string: clamp node -> [+ part: band to node] -> middle joint <- [- part: band to ground] -> ground\n\
         (the two anodes meet in the middle).\n\n",
        worst.input_volts, worst.tone_hz, worst.gain
    );
    for l in lines {
        s.push_str(&format!("* {} [{}]: {}", l.item, l.position, l.value));
        if l.part_number != "-" {
            s.push_str(&format!(" ({})", l.part_number));
        }
        s.push('\n');
        if l.orientation != "-" {
            s.push_str(&format!("    orientation: {}\n", l.orientation));
        }
        if l.worst_case != "-" {
            s.push_str(&format!("    worst case: {}\n", l.worst_case));
        }
        if l.minimum_rating != "-" {
            s.push_str(&format!("    minimum rating: {}\n", l.minimum_rating));
        }
    }
    s
}
