//! The scope: the heard position's clamp node in volts, triggered on a rising crossing, with the pair's
//! conduction thresholds and the clamp level (the node's measured peaks).

use super::widgets::{ACCENT, GRID, PANEL, TEXT_DIM, TRACE};
use crate::analysis::trigger;
use crate::shared::{Shared, RING_LEN};
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::units::si;
use egui::{Align2, Color32, FontId, Pos2, Sense, Stroke, Vec2};
use std::sync::atomic::Ordering;

fn volts(v: f32) -> String {
    if v.is_finite() {
        format!("{v:+.1} V")
    } else {
        "-".into()
    }
}

/// Draw the scope over `scope_ms` of the heard position `heard_name`; `buffer` is the editor's scratch.
pub fn draw(
    ui: &mut egui::Ui,
    shared: &Shared,
    scope_ms: f32,
    heard_name: &str,
    buffer: &mut Vec<f32>,
) {
    let rate = shared.sample_rate.load(Ordering::Relaxed);
    let window = ((scope_ms as f64 * 1e-3 * rate) as usize).clamp(64, RING_LEN / 6);
    buffer.resize(window * 3, 0.0);
    shared.scope.newest(buffer);
    let start = trigger(buffer, window).unwrap_or(buffer.len() - window);
    let shown = &buffer[start..start + window];
    let heard = shared
        .heard
        .load(Ordering::Relaxed)
        .min(shared.slots.len() - 1);
    let r = &shared.slots[heard];
    let tp = r.threshold_positive.load(Ordering::Relaxed);
    let tn = r.threshold_negative.load(Ordering::Relaxed);
    let peak = shown.iter().fold(0.0f32, |m, x| m.max(x.abs()));
    let mut range = [5.0f32, 10.0, 20.0, 50.0, 100.0, 200.0]
        .into_iter()
        .find(|r| *r >= peak * 1.1)
        .unwrap_or(400.0);
    if tp.is_finite() && tn.is_finite() {
        range = range.max(tp.abs().max(tn.abs()) * 1.2);
    }
    let (resp, painter) =
        ui.allocate_painter(Vec2::new(ui.available_width() - 8.0, 220.0), Sense::hover());
    let rect = resp.rect;
    painter.rect_filled(rect, 4.0, PANEL);
    let y_of = |v: f32| rect.center().y - v / range * rect.height() * 0.45;
    for k in -2..=2 {
        let v = range * k as f32 / 2.0;
        painter.hline(rect.x_range(), y_of(v), Stroke::new(1.0, GRID));
        painter.text(
            Pos2::new(rect.left() + 4.0, y_of(v)),
            Align2::LEFT_BOTTOM,
            format!("{v:.0} V"),
            FontId::monospace(10.0),
            TEXT_DIM,
        );
    }
    let current = si(CLAMPED_CURRENT, "A");
    for (t, sign) in [(tp, "+"), (tn, "-")] {
        if t.is_finite() {
            let y = y_of(t);
            painter.hline(
                rect.x_range(),
                y,
                Stroke::new(1.0, ACCENT.gamma_multiply(0.8)),
            );
            painter.text(
                Pos2::new(rect.right() - 4.0, y),
                Align2::RIGHT_BOTTOM,
                format!("{sign} conducts at {t:+.1} V (at {current})"),
                FontId::monospace(10.0),
                ACCENT,
            );
        }
    }
    let points: Vec<Pos2> = shown
        .iter()
        .enumerate()
        .map(|(k, &v)| {
            Pos2::new(
                rect.left() + rect.width() * k as f32 / (window - 1) as f32,
                y_of(v.clamp(-range * 1.1, range * 1.1)),
            )
        })
        .collect();
    painter.line(points, Stroke::new(1.5, TRACE));
    let pp = r.clamp_peak_positive.load(Ordering::Relaxed);
    let pn = r.clamp_peak_negative.load(Ordering::Relaxed);
    let share = r.share_clamped.load(Ordering::Relaxed);
    painter.text(
        Pos2::new(rect.left() + 40.0, rect.top() + 4.0),
        Align2::LEFT_TOP,
        format!(
            "clamp node, {heard_name} ({scope_ms:.0} ms)\nclamp level {} / {}  p-p {:.1} V  over {current} {:.0}% of the time",
            volts(pp),
            volts(pn),
            (pp - pn).max(0.0),
            share * 100.0
        ),
        FontId::monospace(11.0),
        Color32::WHITE,
    );
}
