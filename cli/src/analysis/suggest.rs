//! Part suggestions: buyable E24 Zener pairs for a goal, found by estimating from the device equations and
//! then rendering a handful of candidates around the estimate.
//!
//! Goals: a clamp level per polarity (peak clamp-node volts), a share of time clamped, or "clamp before the
//! valve clips" (the pair starts to conduct at a lower input level than any valve criterion of
//! [`super::onset`] fires, with the pair in place). Loudness change is the integrated loudness (LUFS, EBU R128 via
//! ebur128, as the rest of the command line) of the wiper voltage over the measured window against the same
//! render with the clamp off, in LU; "silent" when either render is too quiet to measure.

use super::common::{parallel, run, run_with_loudness, Outcome, Rig, Stimulus};
use super::onset::{onset_level, Flags};
use breakdown_dsp::circuit::ZenerSpec;
use breakdown_dsp::devices::Zener;
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::parts::{nearest_e24, Family, FamilyRow, FAMILY_1N47XXA};
use breakdown_dsp::units::clip;
use breakdown_dsp::Placement;

/// What the builder asks for.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Goal {
    /// Peak clamp-node volts, positive and negative (both as magnitudes).
    Clamp { positive: f64, negative: f64 },
    /// Share of time clamped, 0..1.
    Share(f64),
    /// The pair conducts at a lower input level than any valve starts to limit.
    BeforeValve,
}

const GOAL_FORMS: &str =
    "clamp-level=+V,-V (the clamp node's peak volts, e.g. clamp-level=+12,-6), clamp-level=V (both sides), \
share=FRACTION or share=PERCENT% (of time clamped), or before-valve";

/// A clamp level pair: each value's sign names its side ("+12,-6" or "-6,+12"); one unsigned value is both.
fn parse_levels(goal: &str, value: &str) -> Result<(f64, f64), String> {
    let ambiguous = || {
        format!(
            "--goal {goal}: ambiguous; write the positive level with + and the negative with -, e.g. \
             clamp-level=+12,-6 (or one unsigned level for both sides, clamp-level=12)"
        )
    };
    let token = |t: &str| -> Result<(Option<char>, f64), String> {
        let t = t.trim();
        let (sign, digits) = match t.chars().next() {
            Some(c @ ('+' | '-')) => (Some(c), &t[1..]),
            _ => (None, t),
        };
        let v = digits
            .trim()
            .parse::<f64>()
            .map_err(|_| format!("--goal {goal}: '{}' is not a level in volts", clip(t, 20)))?;
        if !(v.is_finite() && v > 0.0 && v <= 1000.0) {
            return Err(format!(
                "--goal {goal}: a clamp level must be above 0 V, up to 1000 V (the clamp node's peak volts)"
            ));
        }
        Ok((sign, v))
    };
    let parts: Vec<&str> = value.split(',').collect();
    match parts.as_slice() {
        [one] => match token(one)? {
            (None, v) => Ok((v, v)),
            (Some(_), _) => Err(format!(
                "--goal {goal}: one signed level names one side only; give both, e.g. clamp-level=+12,-6, or \
                 one unsigned level for both sides"
            )),
        },
        [a, b] => match (token(a)?, token(b)?) {
            ((Some('+'), p), (Some('-'), n)) | ((Some('-'), n), (Some('+'), p)) => Ok((p, n)),
            _ => Err(ambiguous()),
        },
        _ => Err(format!("--goal {goal}: give one level or two ({GOAL_FORMS})")),
    }
}

/// Parse `clamp-level=+21,-8` (each sign names its side), `clamp-level=20` (both), `share=0.2` / `share=20%`,
/// or `before-valve`. `clamp=` is the old name of `clamp-level=` (still read, with a note).
pub fn parse_goal(text: &str) -> Result<Goal, String> {
    let t = text.trim();
    let goal = clip(t, 40);
    if t == "before-valve" {
        return Ok(Goal::BeforeValve);
    }
    let (key, value) = t
        .split_once('=')
        .ok_or_else(|| format!("--goal {goal}: expected {GOAL_FORMS}"))?;
    match key.trim() {
        "clamp-level" | "clamp" => {
            if key.trim() == "clamp" {
                crate::options::renamed("--goal clamp=", "--goal clamp-level=");
            }
            let (positive, negative) = parse_levels(&goal, value)?;
            Ok(Goal::Clamp { positive, negative })
        }
        "share" => {
            let v = value.trim();
            let number = |s: &str| {
                s.trim()
                    .parse::<f64>()
                    .map_err(|_| format!("--goal {goal}: '{}' is not a number", clip(s, 20)))
            };
            let share = if let Some(pct) = v.strip_suffix('%') {
                number(pct)? / 100.0
            } else {
                number(v)?
            };
            if !(share > 0.0 && share < 1.0) {
                return Err(format!(
                    "--goal {goal}: a share of time clamped lies between 0 and 1 (or 0% and 100%), exclusive"
                ));
            }
            Ok(Goal::Share(share))
        }
        other => Err(format!(
            "--goal {}=...: unknown goal (known: {GOAL_FORMS})",
            clip(other, 20)
        )),
    }
}

/// One buyable part.
#[derive(Clone, Copy, Debug)]
pub struct Part {
    pub volts: f64,
    pub part_number: &'static str,
    pub spec: ZenerSpec,
}

impl Part {
    fn of(family: &Family, row: &FamilyRow) -> Part {
        let spec = if family.name == FAMILY_1N47XXA.name {
            // Volts alone: the circuit file then takes the same 1N47xxA row.
            ZenerSpec::volts(row.sheet.volts)
        } else {
            ZenerSpec {
                volts: row.sheet.volts,
                izt: Some(row.sheet.izt),
                zzt: Some(row.sheet.zzt),
                izk: Some(row.sheet.izk),
                zzk: Some(row.sheet.zzk),
            }
        };
        Part {
            volts: row.sheet.volts,
            part_number: row.part_number,
            spec,
        }
    }

    /// The part as a circuit-file inline table.
    pub fn toml(&self) -> String {
        match (self.spec.izt, self.spec.zzt, self.spec.izk, self.spec.zzk) {
            (Some(izt), Some(zzt), Some(izk), Some(zzk)) => format!(
                "{{ volts = {:?}, izt = {izt:e}, zzt = {zzt:?}, izk = {izk:e}, zzk = {zzk:?} }}",
                self.volts
            ),
            _ => format!("{{ volts = {:?} }}", self.volts),
        }
    }
}

/// Buyable E24 parts of a family, lowest first.
pub fn e24_parts(family: &Family) -> Vec<Part> {
    family
        .rows
        .iter()
        .filter(|r| (nearest_e24(r.sheet.volts) - r.sheet.volts).abs() < 1e-6)
        .map(|r| Part::of(family, r))
        .collect()
}

/// A rendered candidate pair.
#[derive(Clone, Debug)]
pub struct Candidate {
    pub positive: Part,
    pub negative: Part,
    /// Peak clamp-node volts, positive and negative magnitude.
    pub peaks: (f64, f64),
    /// Share of time clamped (engine meter, 0..1).
    pub share: f64,
    /// Against the clamp-off render (LU); None when either is silent (no ratio of a silent measurement).
    pub loudness_change: Option<f64>,
    /// Miss against the goal: volts (clamp), share points as a fraction (share) or -margin dB (before-valve).
    pub miss: f64,
    pub meets: bool,
    /// Extra words (before-valve: the onset levels).
    pub note: String,
}

impl Candidate {
    pub fn name(&self) -> String {
        format!(
            "{} / {}",
            self.positive.part_number, self.negative.part_number
        )
    }
}

/// The answer to one `suggest` question.
#[derive(Clone, Debug)]
pub struct Suggestion {
    pub goal: Goal,
    /// Peaks with the clamp off.
    pub off_peaks: (f64, f64),
    /// Best first.
    pub candidates: Vec<Candidate>,
    pub notes: Vec<String>,
}

/// Resistance between the follower and the clamp node (ohm): the feed resistor, plus the pot's top leg when
/// the Zeners sit at the wiper.
fn source_resistance(rig: &Rig) -> f64 {
    let c = &rig.circuit.clamp;
    let top = c.level_pot_law.legs(c.level_pot, rig.settings.level).0;
    c.feed_resistor
        + match c.placement {
            Placement::AcrossPot => 0.0,
            Placement::AtWiper => top,
        }
}

/// Clamp level of `part` reverse-biased in series with `part` forward at `current` (A), from the device
/// equation (docs/model.md section 4): the estimate before rendering.
pub fn threshold(part: &Part, current: f64) -> f64 {
    let z: Zener = part.spec.model();
    -z.voltage_at(-current) + z.voltage_at(current)
}

/// The renders of `pairs` with the wiper's loudness, in order.
fn evaluate(
    rig: &Rig,
    stimulus: &Stimulus,
    pairs: Vec<(Part, Part)>,
) -> Result<Vec<(Part, Part, Outcome, f64)>, String> {
    let outs = parallel(pairs.clone(), |(p, n)| {
        run_with_loudness(&rig.with_pair(Some(p.spec), Some(n.spec)), stimulus)
    });
    pairs
        .into_iter()
        .zip(outs)
        .map(|((p, n), o)| o.map(|(o, l)| (p, n, o, l)))
        .collect()
}

/// The clamp-off render and its loudness, the reference every candidate is heard against.
pub struct Reference {
    pub outcome: Outcome,
    pub lufs: f64,
}

fn candidate(p: Part, n: Part, o: &Outcome, lufs: f64, off: &Reference) -> Candidate {
    Candidate {
        positive: p,
        negative: n,
        peaks: o.clamp_peaks(),
        share: o.meters.share_clamped(),
        loudness_change: (lufs.is_finite() && off.lufs.is_finite()).then_some(lufs - off.lufs),
        miss: 0.0,
        meets: false,
        note: String::new(),
    }
}

/// The `count` parts nearest (log scale) to `volts`.
fn nearest_parts(parts: &[Part], volts: f64, count: usize) -> Vec<Part> {
    let mut v: Vec<Part> = parts.to_vec();
    v.sort_by(|a, b| {
        (a.volts / volts)
            .ln()
            .abs()
            .total_cmp(&(b.volts / volts).ln().abs())
    });
    v.truncate(count);
    v.sort_by(|a, b| a.volts.total_cmp(&b.volts));
    v
}

/// Suggest pairs of `family` for `goal` on `stimulus`, with `tone_hz` bursts for the onset checks.
pub fn suggest(
    rig: &Rig,
    stimulus: &Stimulus,
    family: &Family,
    goal: Goal,
    tone_hz: f64,
) -> Result<Suggestion, String> {
    let parts = e24_parts(family);
    if parts.is_empty() {
        return Err(format!("family {} has no E24 rows", family.name));
    }
    let (outcome, lufs) = run_with_loudness(&rig.off(), stimulus)?;
    let off = Reference { outcome, lufs };
    let off_peaks = off.outcome.clamp_peaks();
    let mut notes = Vec::new();
    let gain = rig.settings.gain;
    let mut candidates = match goal {
        Goal::Clamp { positive, negative } => {
            for (sign, want, have) in [("+", positive, off_peaks.0), ("-", negative, off_peaks.1)] {
                if want >= have {
                    return Err(format!(
                        "a clamp level of {sign}{want} V cannot act: with the clamp off the stage swings only \
                         {sign}{have:.2} V at the clamp node at gain {gain} on this input, so the limit is \
                         {sign}{have:.2} V; lower the goal, or raise the gain or the input level"
                    ));
                }
            }
            let r = source_resistance(rig);
            let lowest = parts[0];
            let mut picks = Vec::new();
            for (sign, want, have) in [("+", positive, off_peaks.0), ("-", negative, off_peaks.1)] {
                let current = ((have - want) / r).clamp(CLAMPED_CURRENT, 0.05);
                let floor = threshold(&lowest, current);
                if want < floor - 0.5 {
                    return Err(format!(
                        "a clamp level of {sign}{want} V is below the family's reach: the lowest E24 part, {} \
                         (Vz {} V), conducts at {sign}{floor:.2} V here (at {}, reverse plus the other part's \
                         forward drop); the limit is {sign}{floor:.2} V",
                        lowest.part_number,
                        lowest.volts,
                        breakdown_dsp::units::si(current, "A")
                    ));
                }
                // The part whose estimated clamp is nearest the goal, and its neighbours.
                let best = parts
                    .iter()
                    .min_by(|a, b| {
                        (threshold(a, current) - want)
                            .abs()
                            .total_cmp(&(threshold(b, current) - want).abs())
                    })
                    .copied()
                    .unwrap_or(lowest);
                picks.push(nearest_parts(&parts, best.volts, 3));
            }
            let mut pairs = Vec::new();
            for p in &picks[0] {
                for n in &picks[1] {
                    pairs.push((*p, *n));
                }
            }
            let mut out: Vec<Candidate> = evaluate(rig, stimulus, pairs)?
                .into_iter()
                .map(|(p, n, o, l)| {
                    let mut c = candidate(p, n, &o, l, &off);
                    c.miss = (c.peaks.0 - positive)
                        .abs()
                        .max((c.peaks.1 - negative).abs());
                    c.meets = c.miss <= 0.5;
                    c
                })
                .collect();
            out.sort_by(|a, b| a.miss.total_cmp(&b.miss));
            if out.first().is_some_and(|c| !c.meets) {
                notes.push(format!(
                    "no E24 pair lands within 0.5 V of +{positive} / -{negative} V here: the nearest misses by {:.2} V \
                     (E24 steps are 5-10% apart)",
                    out[0].miss
                ));
            }
            out
        }
        Goal::Share(want) => {
            let share_of = |volts: f64| -> Result<f64, String> {
                let sheet = family.sheet_for(volts);
                let spec = ZenerSpec {
                    volts,
                    izt: Some(sheet.izt),
                    zzt: Some(sheet.zzt),
                    izk: Some(sheet.izk),
                    zzk: Some(sheet.zzk),
                };
                Ok(run(&rig.with_pair(Some(spec), Some(spec)), stimulus)?
                    .meters
                    .share_clamped())
            };
            let (lo_part, hi_part) = (parts[0], parts[parts.len() - 1]);
            let s_lo = share_of(lo_part.volts)?;
            if want > s_lo + 0.02 {
                return Err(format!(
                    "a share of {:.1}% cannot be reached: even the lowest E24 pair, {} ({} V) both ways, clamps only \
                     {:.1}% of the time at gain {gain} on this input (the limit); raise the gain or the input level",
                    want * 100.0,
                    lo_part.part_number,
                    lo_part.volts,
                    s_lo * 100.0
                ));
            }
            let s_hi = share_of(hi_part.volts)?;
            if want < s_hi - 0.02 {
                return Err(format!(
                    "a share of {:.1}% cannot be reached: even the highest E24 pair, {} ({} V), clamps {:.1}% of the \
                     time here (the limit); lower the gain or the input level",
                    want * 100.0,
                    hi_part.part_number,
                    hi_part.volts,
                    s_hi * 100.0
                ));
            }
            // Share falls as the voltage rises: bisect on a log scale for the symmetric voltage.
            let (mut lo, mut hi) = (lo_part.volts, hi_part.volts);
            for _ in 0..9 {
                let mid = (lo * hi).sqrt();
                if share_of(mid)? > want {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            let v = (lo * hi).sqrt();
            notes.push(format!(
                "a symmetric pair of {v:.2} V parts (not buyable) would clamp {:.1}% of the time",
                want * 100.0
            ));
            let near = nearest_parts(&parts, v, 4);
            let mut pairs = Vec::new();
            for p in &near {
                for n in &near {
                    pairs.push((*p, *n));
                }
            }
            let mut out: Vec<Candidate> = evaluate(rig, stimulus, pairs)?
                .into_iter()
                .map(|(p, n, o, l)| {
                    let mut c = candidate(p, n, &o, l, &off);
                    c.miss = (c.share - want).abs();
                    c.meets = c.miss <= 0.02;
                    c
                })
                .collect();
            out.sort_by(|a, b| a.miss.total_cmp(&b.miss));
            if out.first().is_some_and(|c| !c.meets) {
                notes.push(format!(
                    "no E24 pair lands within 2 percentage points of {:.1}% here: the nearest misses by {:.1} points",
                    want * 100.0,
                    out[0].miss * 100.0
                ));
            }
            out
        }
        Goal::BeforeValve => before_valve(rig, stimulus, &parts, &off, tone_hz, &mut notes)?,
    };
    candidates.truncate(6);
    Ok(Suggestion {
        goal,
        off_peaks,
        candidates,
        notes,
    })
}

fn before_valve(
    rig: &Rig,
    stimulus: &Stimulus,
    parts: &[Part],
    off: &Reference,
    tone_hz: f64,
    notes: &mut Vec<String>,
) -> Result<Vec<Candidate>, String> {
    let gain = rig.settings.gain;
    let off_rig = rig.off();
    let Some(valve_level) = onset_level(&off_rig, tone_hz, 1e-3, 100.0, |f: &Flags| f.any_valve())?
    else {
        return Err(format!(
            "nothing to clamp before: with the clamp off no valve limits up to 100 V peak at the jack at gain {gain}"
        ));
    };
    let at_valve = super::onset::measure_cell(&off_rig, gain, valve_level, tone_hz)?;
    let (vp, vn) = at_valve.clamp_peaks();
    notes.push(format!(
        "with the clamp off a valve starts to limit at {valve_level:.3} V peak at the jack ({:.0} Hz bursts), \
         when the clamp node swings +{vp:.2} / -{vn:.2} V",
        tone_hz
    ));
    // Parts that conduct CLAMPED_CURRENT below those swings (device equation), the three highest each way.
    let under = |limit: f64| -> Vec<Part> {
        let mut v: Vec<Part> = parts
            .iter()
            .copied()
            .filter(|p| threshold(p, CLAMPED_CURRENT) < limit)
            .collect();
        v.sort_by(|a, b| b.volts.total_cmp(&a.volts));
        v.truncate(3);
        v
    };
    let (pp, nn) = (under(vp), under(vn));
    if pp.is_empty() || nn.is_empty() {
        let t = threshold(&parts[0], CLAMPED_CURRENT);
        return Err(format!(
            "no part clamps before the valves here: a valve limits when the clamp node swings only +{vp:.2} / -{vn:.2} V \
             (the limit), and the lowest E24 part, {} ({} V), starts to conduct near {t:.2} V",
            parts[0].part_number, parts[0].volts
        ));
    }
    let mut pairs = Vec::new();
    for p in &pp {
        for n in &nn {
            pairs.push((*p, *n));
        }
    }
    let checks = parallel(
        pairs.clone(),
        |(p, n)| -> Result<(Option<f64>, Option<f64>), String> {
            let with = rig.with_pair(Some(p.spec), Some(n.spec));
            let z = onset_level(&with, tone_hz, 1e-3, 100.0, |f: &Flags| f.zener)?;
            let v = onset_level(&with, tone_hz, 1e-3, 100.0, |f: &Flags| f.any_valve())?;
            Ok((z, v))
        },
    );
    let rendered = evaluate(rig, stimulus, pairs)?;
    let mut out = Vec::new();
    for ((p, n, o, l), check) in rendered.into_iter().zip(checks) {
        let (z, v) = check?;
        let mut c = candidate(p, n, &o, l, off);
        match (z, v) {
            (Some(z), Some(v)) => {
                let margin = breakdown_dsp::units::gain_to_db(v / z);
                c.meets = margin > 0.0;
                c.miss = -margin;
                c.note = format!(
                    "Zeners from {z:.3} V, valve from {v:.3} V at the jack: {margin:+.1} dB"
                );
            }
            (Some(z), None) => {
                c.meets = true;
                c.miss = -40.0;
                c.note = format!("Zeners from {z:.3} V; no valve limit up to 100 V");
            }
            (None, _) => {
                c.meets = false;
                c.miss = 40.0;
                c.note = "Zeners never conduct up to 100 V".into();
            }
        }
        out.push(c);
    }
    // Meeting pairs with at least 1 dB of margin first, highest clamp (smallest margin) first; then the rest.
    out.sort_by(|a, b| {
        let rank = |c: &Candidate| {
            if c.meets && c.miss <= -1.0 {
                0
            } else if c.meets {
                1
            } else {
                2
            }
        };
        rank(a).cmp(&rank(b)).then(b.miss.total_cmp(&a.miss)).then(
            (b.positive.volts + b.negative.volts).total_cmp(&(a.positive.volts + a.negative.volts)),
        )
    });
    Ok(out)
}

/// A candidate as a `compare` plan variant, ready to paste.
pub fn variant_toml(c: &Candidate) -> String {
    format!(
        "[[variant]]\nname = \"{}\"\npositive = {}\nnegative = {}\n",
        c.name(),
        c.positive.toml(),
        c.negative.toml()
    )
}

/// Plain-text table of a suggestion.
pub fn suggestion_text(s: &Suggestion) -> String {
    let mut t = String::new();
    let goal = match s.goal {
        Goal::Clamp { positive, negative } => {
            format!("clamp level +{positive} / -{negative} V peak")
        }
        Goal::Share(x) => format!("clamped {:.1}% of the time", x * 100.0),
        Goal::BeforeValve => "Zeners conduct before any valve limits".into(),
    };
    t.push_str(&format!(
        "Goal: {goal}. Clamp off: the clamp node swings +{:.2} / -{:.2} V (the clamp level without parts).\n",
        s.off_peaks.0, s.off_peaks.1
    ));
    for n in &s.notes {
        t.push_str(&format!("Note: {n}\n"));
    }
    t.push_str(
        "rank  positive            negative            level +V  level -V  clamped  loudness    goal\n",
    );
    for (i, c) in s.candidates.iter().enumerate() {
        let verdict = if c.meets { "meets" } else { "misses" };
        t.push_str(&format!(
            "{:>4}  {:<8} {:>5.1} V    {:<8} {:>5.1} V    {:>8.2}  {:>8.2}  {:>6.1}%  {:>9}  {verdict}{}\n",
            i + 1,
            c.positive.part_number,
            c.positive.volts,
            c.negative.part_number,
            c.negative.volts,
            c.peaks.0,
            c.peaks.1,
            c.share * 100.0,
            match c.loudness_change {
                Some(d) => format!("{d:+.2} LU"),
                None => "silent".to_string(),
            },
            if c.note.is_empty() { String::new() } else { format!(" ({})", c.note) }
        ));
    }
    t.push_str(
        "(level: the clamp node's peak volts; loudness: integrated loudness of the level pot wiper, EBU R128 / \
         ITU-R BS.1770 via ebur128, against the clamp off, in LU; \"silent\" when a render is too quiet to measure)\n",
    );
    t
}
