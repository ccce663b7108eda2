//! The spectrum of the listening point, with the harmonics of its strongest tone marked (even and odd in their
//! own colours) and THD_F counted over harmonics 2-10.

use super::widgets::{ACCENT, GRID, PANEL, TEXT_DIM, TRACE};
use crate::analysis::Spectrum;
use egui::{Align2, Color32, FontId, Pos2, Rect, Sense, Stroke, Vec2};

/// Harmonics counted for THD_F (2..=10, docs/model.md section 6) and the band edge.
pub const THD_HARMONICS: usize = 10;
pub const THD_BAND_HZ: f64 = 20_000.0;

pub fn draw(ui: &mut egui::Ui, sp: &Spectrum, rate: f64) {
    let (resp, painter) =
        ui.allocate_painter(Vec2::new(ui.available_width() - 8.0, 210.0), Sense::hover());
    let rect = resp.rect;
    painter.rect_filled(rect, 4.0, PANEL);
    let (f_lo, f_hi) = (20.0f64, (rate / 2.0).min(20_000.0));
    let x_of = |f: f64| rect.left() + rect.width() * ((f / f_lo).ln() / (f_hi / f_lo).ln()) as f32;
    let (db_top, db_bottom) = (0.0f32, -120.0f32);
    let y_of = |db: f32| {
        rect.top()
            + 32.0
            + (rect.height() - 36.0) * ((db_top - db) / (db_top - db_bottom)).clamp(0.0, 1.0)
    };
    for db in [-20.0, -40.0, -60.0, -80.0, -100.0] {
        painter.hline(rect.x_range(), y_of(db), Stroke::new(1.0, GRID));
        painter.text(
            Pos2::new(rect.left() + 2.0, y_of(db)),
            Align2::LEFT_BOTTOM,
            format!("{db:.0} dBFS"),
            FontId::monospace(9.0),
            TEXT_DIM,
        );
    }
    for f in [100.0, 1000.0, 10_000.0] {
        painter.vline(x_of(f), rect.y_range(), Stroke::new(1.0, GRID));
    }
    if !sp.magnitude_db.is_empty() {
        let points: Vec<Pos2> = sp
            .magnitude_db
            .iter()
            .enumerate()
            .skip(1)
            .filter_map(|(k, &db)| {
                let f = k as f64 * sp.bin_hz;
                (f >= f_lo && f <= f_hi).then(|| Pos2::new(x_of(f), y_of(db)))
            })
            .collect();
        painter.line(points, Stroke::new(1.0, TRACE));
    }
    let text = if let Some(f0) = sp.fundamental_hz {
        for h in 1..=sp.harmonic_count {
            let f = f0 * h as f64;
            if f > f_hi {
                break;
            }
            let color = if h == 1 {
                Color32::WHITE
            } else if h % 2 == 0 {
                ACCENT
            } else {
                Color32::from_rgb(130, 170, 255)
            };
            let x = x_of(f);
            painter.vline(
                x,
                Rect::from_x_y_ranges(x..=x, rect.top() + 32.0..=rect.top() + 46.0).y_range(),
                Stroke::new(2.0, color),
            );
            painter.text(
                Pos2::new(x, rect.top() + 46.0),
                Align2::CENTER_TOP,
                format!("{h}"),
                FontId::monospace(9.0),
                color,
            );
        }
        format!(
            "listening point  f0 {:.0} Hz  THD_F {:.2}% (harmonics 2-{}, to {:.0} kHz)\neven/odd {:.0}/{:.0}%",
            f0,
            sp.thd_f * 100.0,
            sp.harmonic_count,
            sp.band_hz / 1000.0,
            sp.even_share * 100.0,
            (1.0 - sp.even_share) * 100.0
        )
    } else {
        "listening point  (no steady tone)".into()
    };
    painter.text(
        rect.left_top() + Vec2::new(40.0, 2.0),
        Align2::LEFT_TOP,
        text,
        FontId::monospace(11.0),
        Color32::WHITE,
    );
}
