//! The controls column: the switch (heard position, A/B, compare-with, each position's loudness and match),
//! the pots, the candidate pair, and input calibration, trim and quality (the listening point is in the
//! listening chain panel).

use super::widgets::{choice_buttons, dim, heading, panel, set, toggle, ACCENT, TEXT_DIM, WARN};
use crate::params::{
    model_vz, safe_float, safe_int, BreakdownParams, FamilyChoice, QualityChoice,
    VOLTS_AT_FULL_SCALE_HELP,
};
use crate::session::{CircuitView, CANDIDATE};
use crate::shared::Shared;
use breakdown_dsp::circuit::ZENER_VOLTS;
use breakdown_dsp::units::peak_volts_to_dbu;
use nice_plug::prelude::*;
use nice_plug_egui::widgets::ParamSlider;
use std::sync::atomic::Ordering;

const SLIDER: f32 = 120.0;

/// The slots shown: every position of the running circuit, then the candidate.
fn shown_slots(view: &CircuitView) -> impl Iterator<Item = usize> {
    (0..view.positions.len()).chain(std::iter::once(CANDIDATE))
}

/// "1 symmetric 20 V" or "Candidate".
pub fn slot_name(view: &CircuitView, slot: usize) -> String {
    if slot == CANDIDATE {
        "Candidate".into()
    } else {
        match view.positions.get(slot) {
            Some(n) => format!("{slot} {n}"),
            None => format!("{slot}"),
        }
    }
}

fn position_buttons(ui: &mut egui::Ui, setter: &ParamSetter, param: &IntParam, view: &CircuitView) {
    let current = view_slot(view, safe_int(param) as usize);
    ui.horizontal_wrapped(|ui| {
        for s in shown_slots(view) {
            let selected = current == s;
            if ui.selectable_label(selected, slot_name(view, s)).clicked() && !selected {
                set(setter, param, s as i32);
            }
        }
    });
}

/// The slot a position value means in this circuit (values past the last position clamp to it).
fn view_slot(view: &CircuitView, value: usize) -> usize {
    if value >= CANDIDATE {
        CANDIDATE
    } else {
        value.min(view.positions.len().saturating_sub(1))
    }
}

fn slider(
    ui: &mut egui::Ui,
    setter: &ParamSetter,
    label: &str,
    param: &FloatParam,
) -> egui::Response {
    ui.label(label);
    let r = ui.add(ParamSlider::for_param(param, setter).with_width(SLIDER));
    ui.end_row();
    r
}

pub fn switch(
    ui: &mut egui::Ui,
    setter: &ParamSetter,
    p: &BreakdownParams,
    shared: &Shared,
    view: &CircuitView,
) {
    let heard = shared.heard.load(Ordering::Relaxed);
    panel(ui, |ui| {
        heading(ui, "Switch position (heard)");
        position_buttons(ui, setter, &p.position, view);
        toggle(ui, setter, &p.ab, "A/B: hear compare-with (space bar)").on_hover_text(
            "While on, the compare-with position is heard instead; the switch crossfades in 20 ms",
        );
        if ui.input(|i| i.key_pressed(egui::Key::Space)) {
            set(setter, &p.ab, !p.ab.value());
        }
        heading(ui, "Compare with");
        position_buttons(ui, setter, &p.compare_with, view);
        ui.add_space(4.0);
        egui::Grid::new("loudness").num_columns(4).show(ui, |ui| {
            ui.label(egui::RichText::new("position").color(TEXT_DIM));
            ui.label(egui::RichText::new("parts (Vz)").color(TEXT_DIM));
            ui.label(egui::RichText::new("loudness").color(TEXT_DIM)).on_hover_text(
                "Unmatched K-weighted short-term loudness (ITU-R BS.1770, 3 s) of the listening output, one channel",
            );
            ui.label(egui::RichText::new("match").color(TEXT_DIM));
            ui.end_row();
            for s in shown_slots(view) {
                let r = &shared.slots[s];
                let name = slot_name(view, s);
                ui.label(if s == heard {
                    egui::RichText::new(format!("> {name}")).color(ACCENT)
                } else {
                    egui::RichText::new(name)
                });
                let vp = r.volts_positive.load(Ordering::Relaxed);
                let vn = r.volts_negative.load(Ordering::Relaxed);
                let part = |v: f32| if v.is_finite() { format!("{v:.1} V") } else { "none".into() };
                let mut parts = if vp.is_finite() || vn.is_finite() {
                    format!("+{} / -{}", part(vp), part(vn))
                } else {
                    "no parts".into()
                };
                if r.rebuilding.load(Ordering::Relaxed) {
                    parts.push_str(" (building)");
                }
                ui.label(parts);
                let l = r.loudness.load(Ordering::Relaxed);
                ui.label(if l.is_finite() { format!("{l:.1} LUFS") } else { "silent".into() });
                ui.label(format!("{:+.1} dB", r.match_gain_db.load(Ordering::Relaxed)));
                ui.end_row();
            }
        });
        ui.horizontal(|ui| {
            toggle(ui, setter, &p.level_match, "Level match")
                .on_hover_text("Every position at the loudness of the quietest (it only ever turns positions down)");
            toggle(ui, setter, &p.run_all, "Run all positions")
                .on_hover_text("Off: only the heard and the compare-with positions run; others restart from rest when chosen");
        });
    });
}

pub fn pots(ui: &mut egui::Ui, setter: &ParamSetter, p: &BreakdownParams, view: &CircuitView) {
    panel(ui, |ui| {
        heading(ui, "Pots");
        egui::Grid::new("pots").num_columns(2).show(ui, |ui| {
            slider(ui, setter, "Gain", &p.gain);
            slider(ui, setter, "Level", &p.level);
        });
        ui.add_enabled_ui(view.has_tone_stack, |ui| {
            egui::Grid::new("tone").num_columns(2).show(ui, |ui| {
                slider(ui, setter, "Treble", &p.treble);
                slider(ui, setter, "Middle", &p.middle);
                slider(ui, setter, "Bass", &p.bass);
            });
        });
        if !view.has_tone_stack {
            dim(
                ui,
                "Treble, middle, bass: this circuit has no [tone_stack].",
            );
        }
    });
}

pub fn candidate(ui: &mut egui::Ui, setter: &ParamSetter, p: &BreakdownParams) {
    let snap = p.snap_e24.value();
    let family = p.candidate_family.value().family();
    panel(ui, |ui| {
        heading(ui, "Candidate pair");
        egui::Grid::new("candidate").num_columns(2).show(ui, |ui| {
            slider(ui, setter, "+ clamp Vz", &p.candidate_positive);
            slider(ui, setter, "- clamp Vz", &p.candidate_negative);
        });
        ui.horizontal(|ui| {
            ui.label("Family");
            choice_buttons(
                ui,
                setter,
                &p.candidate_family,
                &[
                    (FamilyChoice::OneWatt, "1N47xxA (1 W)"),
                    (FamilyChoice::HalfWatt, "1N52xxB (1/2 W)"),
                ],
            );
        });
        toggle(ui, setter, &p.snap_e24, "Snap to E24")
            .on_hover_text("Use the nearest buyable E24 voltage (IEC 60063)");
        let vp = model_vz(safe_float(&p.candidate_positive), snap);
        let vn = model_vz(safe_float(&p.candidate_negative), snap);
        let part = |v: f64| match family.part_number(v) {
            Some(pn) => pn.to_string(),
            None => format!("no {} part", family.name),
        };
        ui.label(format!(
            "runs +{vp} V ({}) / -{vn} V ({})",
            part(vp),
            part(vn)
        ));
        dim(
            ui,
            format!(
                "Vz {} .. {} V: {}.",
                ZENER_VOLTS.low, ZENER_VOLTS.high, ZENER_VOLTS.why
            ),
        );
    });
}

pub fn input_output(
    ui: &mut egui::Ui,
    setter: &ParamSetter,
    p: &BreakdownParams,
    shared: &Shared,
    view: &CircuitView,
) {
    panel(ui, |ui| {
        heading(ui, "Input and output");
        egui::Grid::new("io").num_columns(2).show(ui, |ui| {
            slider(ui, setter, "Volts at full scale", &p.volts_at_full_scale)
                .on_hover_text(VOLTS_AT_FULL_SCALE_HELP);
            slider(ui, setter, "Output trim", &p.trim);
        });
        let v = safe_float(&p.volts_at_full_scale) as f64;
        dim(
            ui,
            format!(
                "0 dBFS = {v:.3} V peak at the jack = {:+.1} dBu for a sine (0 dBu = 0.775 V rms). Passive pickups: \
                 about 0.1-1 V peak strummed hard, hot ones up to 2 V (typical, common practice).",
                peak_volts_to_dbu(v)
            ),
        );
        let file = view.volts_at_full_scale;
        if (file - v).abs() > 1e-3 * file.max(1e-3) {
            ui.horizontal_wrapped(|ui| {
                ui.label(
                    egui::RichText::new(format!(
                        "The circuit file says [input] volts_at_full_scale = {file} V; this session's {v:.3} V wins."
                    ))
                    .color(WARN),
                );
                if ui.small_button("use the file's value").clicked() {
                    set(setter, &p.volts_at_full_scale, file as f32);
                }
            });
        }
        ui.horizontal(|ui| {
            ui.label("Quality");
            let choices: Vec<(QualityChoice, String)> = QualityChoice::ALL
                .iter()
                .map(|q| (*q, format!("{}x", q.quality().factor())))
                .collect();
            let refs: Vec<(QualityChoice, &str)> =
                choices.iter().map(|(q, s)| (*q, s.as_str())).collect();
            choice_buttons(ui, setter, &p.quality, &refs);
        });
        let latency = shared.latency.load(Ordering::Relaxed);
        let rate = shared.sample_rate.load(Ordering::Relaxed);
        let channels = match shared.models.load(Ordering::Relaxed) {
            2 => "stereo: two channels as two lanes of one model per position",
            _ => "mono: one model per position",
        };
        dim(
            ui,
            format!(
                "latency {latency} samples ({:.2} ms), {channels}",
                latency as f64 * 1000.0 / rate,
            ),
        );
    });
}
