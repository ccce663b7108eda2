//! Which element limits first: a map over gain (pot rotation) and input level (peak volts at the jack).
//!
//! Each cell renders a short tone burst and reads the engine's meters over its steady part. An element
//! "limits" when it takes away a noticeable part of the small-signal gain at the signal's peak. Every valve is
//! checked, from the first stage at the jack to the follower, so the map answers "which part of my amp clips
//! first at this gain": stage k's grid current or cut-off, the follower, or the Zeners. The criteria, each
//! from the device equations the model uses (docs/model.md section 4):
//!
//! * **Zener clamp**: the pair carries more than [`CLAMPED_CURRENT`] (10 uA) at any instant, the same test the
//!   engine's "share of time clamped" meter uses. Physically: a Zener in its knee has an incremental
//!   resistance near nbv Vt / I; for the fitted 1N4747A (20 V, nbv about 7.2) that is about 19 kohm at 10 uA,
//!   some 3.5 times the source resistance feeding the clamp node (4.7 kohm feed plus the follower's output
//!   resistance), so the pair already takes about a fifth of the incremental gain at the peak.
//! * **Stage k (any common-cathode stage, the gain stage included), grid current**: the peak grid current
//!   exceeds its idle value by the current at which the grid's incremental resistance 1 / (dIg/dVgk)
//!   (Dempwolf-Zoelzer grid law) falls to four times that stage's grid stopper. The stopper and grid then
//!   form a divider that takes a fifth of the incremental gain at the peak, matching the Zener test above.
//!   For the 68 kohm reference stopper this is about 0.28 uA above idle, with the grid near 0.35 V below its
//!   cathode ([`grid_current_threshold`] solves it for any stopper).
//!   For a stage fed through a coupling cap the source seen by the grid is the stopper plus the previous plate
//!   and grid leak, larger than the stopper alone, so the test is on the early side for those stages.
//! * **Stage k, cut-off**: the plate current falls below 2% of its idle value at some instant. With the
//!   Koren law Ip ~ E1^ex the transconductance scales as Ip^((ex-1)/ex); at 2% of idle it is about a third of
//!   its idle value (12AX7, ex = 1.4) and collapses to zero within a fraction of a volt more grid drive.
//! * **Cathode follower, cut-off**: the follower's plate current falls below 2% of its idle value: it can no
//!   longer sink the load current on the down-swing (docs/model.md section 2), the same 2% edge as above.
//!
//! Which element limits "first" in a cell: of the elements active in that cell, the one that became active
//! at the lowest input level at that gain (scanning the row from the quietest cell up); ties in the same cell
//! go to the Zeners, then to the valve nearer the jack (its grid before its cut-off).

use super::common::{
    checked, lin_space, log_space, parallel, run_with, valves_of, Outcome, Rig, Stimulus,
    ValveSocket,
};
use breakdown_dsp::devices::Triode;
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::engine::MAX_VALVES;
use breakdown_dsp::Readout;

/// The quietest input level (peak V at the jack) the onset search tries: a high-gain preamp's later stages
/// limit at a few millivolts.
pub const ONSET_LOW: f64 = 1e-4;
/// Fraction of idle plate current below which a valve counts as cut off.
pub const CUTOFF_FRACTION: f64 = 0.02;
/// The grid's incremental resistance at the grid-current limit, as a multiple of the grid stopper.
pub const GRID_RESISTANCE_RATIO: f64 = 4.0;

/// Grid current (A) at which the Dempwolf-Zoelzer grid's incremental resistance falls to
/// `GRID_RESISTANCE_RATIO` times `stopper` ohms, and the grid-to-cathode voltage there. Solved by bisection on
/// Vgk (the slope rises monotonically with Vgk).
pub fn grid_current_threshold(stopper: f64) -> (f64, f64) {
    let target_slope = 1.0 / (GRID_RESISTANCE_RATIO * stopper);
    let (mut lo, mut hi) = (-5.0, 2.0);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if Triode::grid_current(mid).1 < target_slope {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let v = 0.5 * (lo + hi);
    (Triode::grid_current(v).0, v)
}

/// The element that limits in a cell. Valves are numbered in signal order from the jack (the order of the
/// engine's meters): `Grid(0)` is the first stage's grid, `Cutoff(n - 1)` the cathode follower's cut-off.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Limiter {
    Clean,
    Zener,
    Grid(usize),
    Cutoff(usize),
}

/// Thresholds of the criteria for one circuit at its operating point, and the valves' names.
#[derive(Clone, Debug, PartialEq)]
pub struct Criteria {
    /// Pair current (A).
    pub zener_current: f64,
    /// Per valve: absolute grid current (A) above which its grid limits (idle plus the stopper-derived rise);
    /// None for the follower, which has no stopper of its own.
    pub grid_current: Vec<Option<f64>>,
    /// Per valve: plate current (A) below which it is cut off.
    pub cutoff_current: Vec<f64>,
    /// Per valve: the name the reports print ("stage 1", "stage 2 (gain stage)", "cathode follower").
    pub names: Vec<String>,
}

impl Criteria {
    pub fn new(valves: &[ValveSocket], idle: &Readout) -> Criteria {
        let mut grid_current = Vec::new();
        let mut cutoff_current = Vec::new();
        for (info, v) in valves.iter().zip(idle.valves()) {
            grid_current.push(info.grid_stopper.map(|stopper| {
                let (at_threshold, _) = grid_current_threshold(stopper);
                let (at_idle, _) = Triode::grid_current(v.grid_volts - v.cathode_volts);
                v.grid_current + (at_threshold - at_idle).max(0.0)
            }));
            cutoff_current.push(CUTOFF_FRACTION * v.plate_current);
        }
        Criteria {
            zener_current: CLAMPED_CURRENT,
            grid_current,
            cutoff_current,
            names: valves.iter().map(|v| v.name.clone()).collect(),
        }
    }

    /// Every element that can limit, in the order ties go (`tie_order`; a valve without a grid-current
    /// criterion has no grid entry).
    pub fn elements(&self) -> Vec<Limiter> {
        tie_order(self.grid_current.len())
            .filter(|l| !matches!(l, Limiter::Grid(i) if self.grid_current[*i].is_none()))
            .collect()
    }

    fn is_follower(&self, i: usize) -> bool {
        i + 1 == self.names.len()
    }
    fn is_gain_stage(&self, i: usize) -> bool {
        i + 2 == self.names.len()
    }

    /// "Zener clamp", "stage 1 grid current", "stage 3 (gain stage) cut-off", "cathode follower cut-off".
    pub fn label(&self, l: Limiter) -> String {
        let name = |i: usize| self.names.get(i).map(String::as_str).unwrap_or("valve");
        match l {
            Limiter::Clean => "clean".into(),
            Limiter::Zener => "Zener clamp".into(),
            Limiter::Grid(i) => format!("{} grid current", name(i)),
            Limiter::Cutoff(i) => format!("{} cut-off", name(i)),
        }
    }

    /// Machine-readable code: "zener", "stage1-grid", "stage1-cutoff", .., "gain-grid", "gain-cutoff",
    /// "follower-cutoff" (the one-stage circuit's codes are the gain stage's and the follower's).
    pub fn code(&self, l: Limiter) -> String {
        match l {
            Limiter::Clean => "clean".into(),
            Limiter::Zener => "zener".into(),
            Limiter::Grid(i) if self.is_gain_stage(i) => "gain-grid".into(),
            Limiter::Cutoff(i) if self.is_gain_stage(i) => "gain-cutoff".into(),
            Limiter::Grid(i) if self.is_follower(i) => "follower-grid".into(),
            Limiter::Cutoff(i) if self.is_follower(i) => "follower-cutoff".into(),
            Limiter::Grid(i) => format!("stage{}-grid", i + 1),
            Limiter::Cutoff(i) => format!("stage{}-cutoff", i + 1),
        }
    }

    /// The map's letters: Z, G1/C1 for stage 1 .., G/C for the gain stage, F for the follower.
    fn letter(&self, l: Limiter) -> String {
        match l {
            Limiter::Clean => String::new(),
            Limiter::Zener => "Z".into(),
            Limiter::Grid(i) if self.is_gain_stage(i) => "G".into(),
            Limiter::Cutoff(i) if self.is_gain_stage(i) => "C".into(),
            Limiter::Cutoff(i) if self.is_follower(i) => "F".into(),
            Limiter::Grid(i) => format!("G{}", i + 1),
            Limiter::Cutoff(i) => format!("C{}", i + 1),
        }
    }
}

/// Which elements are active in one render.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Flags {
    pub zener: bool,
    /// Per valve in signal order (unused slots false).
    pub grid: [bool; MAX_VALVES],
    pub cutoff: [bool; MAX_VALVES],
}

impl Flags {
    pub fn of(outcome: &Outcome, criteria: &Criteria) -> Flags {
        let m = &outcome.meters;
        let mut f = Flags {
            zener: m.zener_peak_current > criteria.zener_current,
            ..Flags::default()
        };
        for (i, v) in m.valves().iter().enumerate().take(criteria.names.len()) {
            f.grid[i] = criteria.grid_current[i].is_some_and(|g| v.grid_current_peak > g);
            f.cutoff[i] = v.plate_current_min < criteria.cutoff_current[i];
        }
        f
    }
    pub fn has(&self, l: Limiter) -> bool {
        match l {
            Limiter::Clean => !self.any(),
            Limiter::Zener => self.zener,
            Limiter::Grid(i) => self.grid.get(i).copied().unwrap_or(false),
            Limiter::Cutoff(i) => self.cutoff.get(i).copied().unwrap_or(false),
        }
    }
    pub fn any(&self) -> bool {
        self.zener || self.any_valve()
    }
    pub fn any_valve(&self) -> bool {
        self.grid.iter().chain(&self.cutoff).any(|b| *b)
    }
    /// Active elements in the order ties go (`tie_order`).
    pub fn active(&self) -> Vec<Limiter> {
        tie_order(MAX_VALVES)
            .filter(|l| match *l {
                Limiter::Clean => false,
                Limiter::Zener => self.zener,
                Limiter::Grid(i) => self.grid[i],
                Limiter::Cutoff(i) => self.cutoff[i],
            })
            .collect()
    }
}

/// Every limiter of `valves` valves in the order ties are broken: the Zeners, then from the jack each valve's
/// grid current and its cut-off.
fn tie_order(valves: usize) -> impl Iterator<Item = Limiter> {
    std::iter::once(Limiter::Zener)
        .chain((0..valves).flat_map(|i| [Limiter::Grid(i), Limiter::Cutoff(i)]))
}

/// One cell of the map.
#[derive(Clone, Debug)]
pub struct Cell {
    pub gain: f64,
    pub input_volts: f64,
    pub flags: Flags,
    pub limiter: Limiter,
    pub clamp_peak_positive: f64,
    pub clamp_peak_negative: f64,
    pub share_clamped: f64,
    pub zener_peak_current: f64,
    /// Per valve in signal order.
    pub grid_current_peak: Vec<f64>,
    pub plate_current_min: Vec<f64>,
}

/// The onset map: `cells[g][l]` for gains[g] and levels[l].
#[derive(Clone, Debug)]
pub struct OnsetMap {
    pub gains: Vec<f64>,
    pub levels: Vec<f64>,
    pub cells: Vec<Vec<Cell>>,
    pub criteria: Criteria,
    pub tone_hz: f64,
}

/// Sweep parameters.
#[derive(Clone, Debug)]
pub struct Sweep {
    pub gains: Vec<f64>,
    pub levels: Vec<f64>,
    pub tone_hz: f64,
}

impl Sweep {
    /// Gain 0.1..1 in `gain_steps`, input 0.02..2 V peak log-spaced in `level_steps`.
    pub fn standard(gain_steps: usize, level_steps: usize, tone_hz: f64) -> Sweep {
        Sweep {
            gains: lin_space(0.1, 1.0, gain_steps),
            levels: log_space(0.02, 2.0, level_steps),
            tone_hz,
        }
    }
}

/// The criteria for `rig` (from its idle operating point).
pub fn criteria_for(rig: &Rig) -> Result<Criteria, String> {
    let engine = rig.engine()?;
    Ok(Criteria::new(&valves_of(&rig.circuit), &engine.readout()))
}

/// Render one cell: `rig` at `gain` with a burst of `input_volts` peak.
pub fn measure_cell(
    rig: &Rig,
    gain: f64,
    input_volts: f64,
    tone_hz: f64,
) -> Result<Outcome, String> {
    let mut engine = rig.with_gain(gain).engine()?;
    Ok(run_with(
        &mut engine,
        &Stimulus::burst(input_volts, tone_hz),
    ))
}

fn cell_of(gain: f64, input_volts: f64, o: &Outcome, c: &Criteria) -> Cell {
    let m = &o.meters;
    Cell {
        gain,
        input_volts,
        flags: Flags::of(o, c),
        limiter: Limiter::Clean,
        clamp_peak_positive: m.clamp_peak_positive,
        clamp_peak_negative: m.clamp_peak_negative,
        share_clamped: m.share_clamped(),
        zener_peak_current: m.zener_peak_current,
        grid_current_peak: m.valves().iter().map(|v| v.grid_current_peak).collect(),
        plate_current_min: m.valves().iter().map(|v| v.plate_current_min).collect(),
    }
}

/// Name the first limiter along each gain row (see the module text).
fn assign_first(row: &mut [Cell], criteria: &Criteria) {
    let order = criteria.elements();
    let mut onset: Vec<(Limiter, usize)> = Vec::new();
    for (i, cell) in row.iter().enumerate() {
        for l in cell.flags.active() {
            if !onset.iter().any(|(k, _)| *k == l) {
                onset.push((l, i));
            }
        }
    }
    for cell in row.iter_mut() {
        cell.limiter = onset
            .iter()
            .filter(|(l, _)| cell.flags.has(*l))
            .min_by_key(|(l, i)| (*i, order.iter().position(|k| k == l)))
            .map(|(l, _)| *l)
            .unwrap_or(Limiter::Clean);
    }
}

/// Sweep the map over two threads (one engine per gain row, reset between cells).
pub fn map(rig: &Rig, sweep: &Sweep) -> Result<OnsetMap, String> {
    let criteria = criteria_for(rig)?;
    let rows = parallel(sweep.gains.clone(), |gain| -> Result<Vec<Cell>, String> {
        let row_rig = rig.with_gain(gain);
        let mut engine = row_rig.engine()?;
        sweep
            .levels
            .iter()
            .map(|&v| {
                let o = checked(
                    &row_rig,
                    run_with(&mut engine, &Stimulus::burst(v, sweep.tone_hz)),
                )?;
                Ok(cell_of(gain, v, &o, &criteria))
            })
            .collect()
    });
    let mut cells = Vec::with_capacity(rows.len());
    for r in rows {
        let mut row = r?;
        assign_first(&mut row, &criteria);
        cells.push(row);
    }
    Ok(OnsetMap {
        gains: sweep.gains.clone(),
        levels: sweep.levels.clone(),
        cells,
        criteria,
        tone_hz: sweep.tone_hz,
    })
}

/// Lowest input level (peak V at the jack, between `low` and `high`) at which `test` holds, by bisection on
/// a log scale to 0.5%; None when it does not hold even at `high`. Assumes `test` turns on once with level.
pub fn onset_level(
    rig: &Rig,
    tone_hz: f64,
    low: f64,
    high: f64,
    test: impl Fn(&Flags) -> bool,
) -> Result<Option<f64>, String> {
    let criteria = criteria_for(rig)?;
    let mut engine = rig.engine()?;
    let mut holds = |v: f64| {
        test(&Flags::of(
            &run_with(&mut engine, &Stimulus::burst(v, tone_hz)),
            &criteria,
        ))
    };
    if !holds(high) {
        return Ok(None);
    }
    if holds(low) {
        return Ok(Some(low));
    }
    let (mut lo, mut hi) = (low, high);
    while hi / lo > 1.005 {
        let mid = (lo * hi).sqrt();
        if holds(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    Ok(Some(hi))
}

/// Onset level of each element at the rig's own gain (None: not reached up to `high`).
pub fn onsets_at_gain(
    rig: &Rig,
    tone_hz: f64,
    high: f64,
) -> Result<Vec<(Limiter, Option<f64>)>, String> {
    let elements = criteria_for(rig)?.elements();
    let results = parallel(elements.clone(), |l| {
        onset_level(rig, tone_hz, ONSET_LOW, high, move |f| f.has(l))
    });
    elements
        .into_iter()
        .zip(results)
        .map(|(l, r)| r.map(|v| (l, v)))
        .collect()
}

/// CSV of the map: one line per cell with every readout. The gain stage's and the follower's columns come
/// first (the one-stage circuit's layout), then each earlier stage's.
pub fn to_csv(m: &OnsetMap) -> String {
    let c = &m.criteria;
    let n = c.names.len();
    let earlier = n.saturating_sub(2);
    let mut s = String::from(
        "gain,input_peak_volts,limiter,active,clamp_peak_positive_volts,clamp_peak_negative_volts,\
share_clamped,zener_peak_current_amps,gain_grid_current_peak_amps,gain_plate_current_min_amps,\
follower_plate_current_min_amps",
    );
    for k in 1..=earlier {
        s.push_str(&format!(
            ",stage{k}_grid_current_peak_amps,stage{k}_plate_current_min_amps"
        ));
    }
    s.push('\n');
    let at = |v: &[f64], i: usize| v.get(i).copied().unwrap_or(f64::NAN);
    for row in &m.cells {
        for cell in row {
            let active: Vec<String> = cell.flags.active().iter().map(|l| c.code(*l)).collect();
            s.push_str(&format!(
                "{:.3},{:.5},{},{},{:.4},{:.4},{:.5},{:.4e},{:.4e},{:.4e},{:.4e}",
                cell.gain,
                cell.input_volts,
                c.code(cell.limiter),
                active.join("+"),
                cell.clamp_peak_positive,
                cell.clamp_peak_negative,
                cell.share_clamped,
                cell.zener_peak_current,
                at(&cell.grid_current_peak, n.saturating_sub(2)),
                at(&cell.plate_current_min, n.saturating_sub(2)),
                at(&cell.plate_current_min, n.saturating_sub(1)),
            ));
            for i in 0..earlier {
                s.push_str(&format!(
                    ",{:.4e},{:.4e}",
                    at(&cell.grid_current_peak, i),
                    at(&cell.plate_current_min, i)
                ));
            }
            s.push('\n');
        }
    }
    s
}

/// The cell colour of each limiter: blue for the Zeners, oranges for grid current and reds for cut-off
/// (darker further from the jack), purple for the follower.
fn colour(c: &Criteria, l: Limiter) -> plotters::style::RGBColor {
    use plotters::style::RGBColor;
    let shade = |i: usize, base: (u8, u8, u8)| {
        let steps = c.names.len().max(2) as f64 - 1.0;
        let k = 1.0 - 0.45 * (i as f64 / steps);
        RGBColor(
            (base.0 as f64 * k) as u8,
            (base.1 as f64 * k) as u8,
            (base.2 as f64 * k) as u8,
        )
    };
    match l {
        Limiter::Clean => RGBColor(236, 236, 236),
        Limiter::Zener => RGBColor(66, 133, 214),
        Limiter::Cutoff(i) if c.is_follower(i) => RGBColor(130, 70, 170),
        Limiter::Grid(i) => shade(i, (250, 170, 50)),
        Limiter::Cutoff(i) => shade(i, (225, 60, 45)),
    }
}

/// Heat map as SVG text: colour = first limiter, letters = every active element.
pub fn to_svg(m: &OnsetMap, title: &str) -> Result<String, String> {
    use plotters::prelude::*;
    let mut text = String::new();
    {
        let root = SVGBackend::with_string(&mut text, (980, 600)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let (plot_area, legend_area) = root.split_horizontally(700);
        let nx = m.levels.len();
        let ny = m.gains.len();
        let levels = m.levels.clone();
        let gains = m.gains.clone();
        let mut chart = ChartBuilder::on(&plot_area)
            .caption(title, ("sans-serif", 16))
            .margin(10)
            .x_label_area_size(45)
            .y_label_area_size(55)
            .build_cartesian_2d(-0.5f64..nx as f64 - 0.5, -0.5f64..ny as f64 - 0.5)
            .map_err(|e| e.to_string())?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc("input level, peak volts at the jack")
            .y_desc("gain pot rotation")
            .x_labels(nx + 1)
            .y_labels(ny + 1)
            // Cells are centred on whole numbers, so each tick names the cell under it.
            .x_label_formatter(&|x| {
                if (x - x.round()).abs() > 1e-6 || *x < -0.01 {
                    return String::new();
                }
                let i = (x.round() as usize).min(levels.len() - 1);
                format!("{:.3}", levels[i])
            })
            .y_label_formatter(&|y| {
                if (y - y.round()).abs() > 1e-6 || *y < -0.01 {
                    return String::new();
                }
                let i = (y.round() as usize).min(gains.len() - 1);
                format!("{:.2}", gains[i])
            })
            .draw()
            .map_err(|e| e.to_string())?;
        for (gi, row) in m.cells.iter().enumerate() {
            for (li, c) in row.iter().enumerate() {
                let (x0, y0) = (li as f64 - 0.5, gi as f64 - 0.5);
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(x0, y0), (x0 + 1.0, y0 + 1.0)],
                        colour(&m.criteria, c.limiter).filled(),
                    )))
                    .map_err(|e| e.to_string())?;
                let letters: String = c
                    .flags
                    .active()
                    .iter()
                    .map(|l| m.criteria.letter(*l))
                    .collect();
                if !letters.is_empty() {
                    chart
                        .draw_series(std::iter::once(Text::new(
                            letters,
                            (x0 + 0.3, y0 + 0.65),
                            ("sans-serif", 11).into_font().color(&WHITE),
                        )))
                        .map_err(|e| e.to_string())?;
                }
            }
        }
        let mut legend = vec![Limiter::Clean];
        legend.extend(m.criteria.elements());
        let spacing = (440 / legend.len().max(1) as i32).min(30);
        for (k, l) in legend.iter().enumerate() {
            let y = 60 + spacing * k as i32;
            legend_area
                .draw(&Rectangle::new(
                    [(10, y), (30, y + 20)],
                    colour(&m.criteria, *l).filled(),
                ))
                .map_err(|e| e.to_string())?;
            legend_area
                .draw(&Text::new(
                    format!("{} {}", m.criteria.letter(*l), m.criteria.label(*l)),
                    (36, y + 4),
                    ("sans-serif", 12),
                ))
                .map_err(|e| e.to_string())?;
        }
        legend_area
            .draw(&Text::new(
                format!("{:.0} Hz tone bursts", m.tone_hz),
                (10, 70 + spacing * legend.len() as i32),
                ("sans-serif", 12),
            ))
            .map_err(|e| e.to_string())?;
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(text)
}

/// A peak level for the summary: millivolts below 0.1 V.
pub fn volts_text(v: f64) -> String {
    if v < 0.1 {
        format!("{:.2} mV", v * 1e3)
    } else {
        format!("{v:.3} V")
    }
}

/// One-line summary: where the Zeners start to conduct at the rig's gain, and what limits first.
pub fn summary(rig: &Rig, criteria: &Criteria, onsets: &[(Limiter, Option<f64>)]) -> String {
    let first = onsets
        .iter()
        .filter_map(|(l, v)| v.map(|v| (*l, v)))
        .min_by(|a, b| a.1.total_cmp(&b.1));
    let zener = onsets
        .iter()
        .find(|(l, _)| *l == Limiter::Zener)
        .and_then(|(_, v)| *v);
    let (positive, negative) = rig.pair_specs();
    let head = if positive.is_none() && negative.is_none() {
        "No Zeners at this switch position".to_string()
    } else {
        match zener {
            Some(v) => format!(
                "The Zeners start to conduct at {v:.3} V peak at the jack: the clamp cleans up below {v:.3} V"
            ),
            None => "The Zeners do not conduct up to 100 V peak at the jack".to_string(),
        }
    };
    match first {
        Some((l, v)) if v <= ONSET_LOW => format!(
            "{head}; first to limit as the level rises: {} (already at {:.1} mV, the quietest level tried).",
            criteria.label(l),
            ONSET_LOW * 1e3
        ),
        Some((l, v)) => format!(
            "{head}; first to limit as the level rises: {} (at {}).",
            criteria.label(l),
            volts_text(v)
        ),
        None => format!("{head}; nothing limits up to 100 V peak."),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_threshold_slope_matches_stopper_ratio() {
        // Dempwolf and Zoelzer, DAFx-11 grid law: check the solved point by a finite difference of Ig.
        let (ig, v) = grid_current_threshold(68e3);
        let h = 1e-6;
        let slope = (Triode::grid_current(v + h).0 - Triode::grid_current(v - h).0) / (2.0 * h);
        assert!((slope * 4.0 * 68e3 - 1.0).abs() < 1e-3, "slope {slope}");
        // In the exponential region Ig - Ig0 ~ slope / (xi Cg) with xi 1.314, Cg 9.901 (same paper).
        let approx = 1.0 / (4.0 * 68e3 * 1.314 * 9.901) + 8.025e-8;
        assert!(
            (ig - approx).abs() / approx < 0.1,
            "ig {ig} approx {approx}"
        );
        assert!(v < 0.0);
    }
}
