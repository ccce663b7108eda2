//! The ratings of the heard position's parts: current and dissipation against the rating of the family they
//! are judged by, and the margin (rating over average power, `breakdown_dsp::parts::margin`) with its state.

use super::widgets::{dim, panel, ACCENT, TEXT_DIM, TRACE, WARN};
use crate::params::FamilyChoice;
use crate::shared::Shared;
use breakdown_dsp::parts::{margin, margin_state, Family, MarginState};
use std::sync::atomic::Ordering;

/// "1N4747A (1N47xxA (1 W))", or what the family does not have.
fn part_text(family: &Family, vz: f64, own_knee: bool) -> String {
    match family.part_number(vz) {
        Some(pn) if !own_knee => pn.to_string(),
        Some(pn) => format!("own knee data; {pn} is the {} part", family.name),
        None if own_knee => format!("own knee data; no {} part at this Vz", family.name),
        None => format!(
            "no {} part at this Vz (knee data interpolated)",
            family.name
        ),
    }
}

fn margin_text(m: f64) -> String {
    if !m.is_finite() || m > 1000.0 {
        "> 1000x".into()
    } else {
        format!("{m:.1}x")
    }
}

pub fn draw(ui: &mut egui::Ui, shared: &Shared, heard_name: &str) {
    let heard = shared
        .heard
        .load(Ordering::Relaxed)
        .min(shared.slots.len() - 1);
    let r = &shared.slots[heard];
    let family = if r.family.load(Ordering::Relaxed) == FamilyChoice::HalfWatt as u32 {
        FamilyChoice::HalfWatt
    } else {
        FamilyChoice::OneWatt
    }
    .family();
    let own_knee = r.own_knee.load(Ordering::Relaxed);
    let rating = family.power_rating_watts;
    panel(ui, |ui| {
        let vp = r.volts_positive.load(Ordering::Relaxed) as f64;
        let vn = r.volts_negative.load(Ordering::Relaxed) as f64;
        if !vp.is_finite() && !vn.is_finite() {
            ui.label(format!("Zener ratings: {heard_name} has no parts."));
            return;
        }
        let ipk = r.zener_peak_current.load(Ordering::Relaxed) as f64;
        ui.label(
            egui::RichText::new(format!(
                "Zener ratings, {heard_name}: judged against the {} family ({} W each)",
                family.name, rating
            ))
            .color(ACCENT),
        );
        egui::Grid::new("ratings").num_columns(7).show(ui, |ui| {
            for h in [
                "part",
                "Vz",
                "peak current",
                "peak W",
                "average W",
                "margin",
                "",
            ] {
                ui.label(egui::RichText::new(h).color(TEXT_DIM));
            }
            ui.end_row();
            for (name, vz, wpk, wavg) in [
                (
                    "+ clamp",
                    vp,
                    r.positive_peak_watts.load(Ordering::Relaxed) as f64,
                    r.positive_average_watts.load(Ordering::Relaxed) as f64,
                ),
                (
                    "- clamp",
                    vn,
                    r.negative_peak_watts.load(Ordering::Relaxed) as f64,
                    r.negative_average_watts.load(Ordering::Relaxed) as f64,
                ),
            ] {
                if !vz.is_finite() {
                    ui.label(name);
                    ui.label("no part");
                    ui.end_row();
                    continue;
                }
                let m = margin(rating, wavg.max(0.0));
                ui.label(name)
                    .on_hover_text(part_text(family, vz, own_knee));
                ui.label(format!("{vz:.1} V"));
                ui.label(format!("{:.2} mA", ipk * 1e3));
                ui.label(format!("{wpk:.3} W"));
                ui.label(format!("{wavg:.4} W"));
                let state = margin_state(m);
                let color = match state {
                    MarginState::Ok => TRACE,
                    MarginState::Thin => ACCENT,
                    MarginState::Over => WARN,
                };
                ui.colored_label(color, format!("{} {}", margin_text(m), state.label()));
                dim(ui, part_text(family, vz, own_knee));
                ui.end_row();
            }
        });
        dim(
            ui,
            "Margin = part rating / average power (the junction's heat follows the average: a glass part's \
             thermal time constant is about a second). Ok at 2x or more, thin from 1x to 2x, over below 1x \
             (common practice). Both parts carry the same current.",
        );
    });
}
