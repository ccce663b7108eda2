//! The editor: controls, a triggered scope of the clamp node in volts with the active pair's thresholds, a
//! spectrum of the listening point with THD_F and the even/odd balance, per-Zener current and dissipation against
//! the part rating, and the safety line. Reads the audio thread's data through `Shared` (atomics only).

use crate::analysis::{trigger, Analyser, Spectrum};
use crate::params::{
    BreakdownParams, ListenPoint, Position, QualityChoice, INPUT_CALIBRATION_HELP,
};
use crate::shared::Shared;
use breakdown_dsp::parts::FAMILY_1N47XXA;
use egui::{Align2, Color32, FontId, Pos2, Rect, Sense, Stroke, Vec2};
use nice_plug::prelude::*;
use nice_plug_egui::widgets::ParamSlider;
use nice_plug_egui::{EguiEditorState, NiceEguiApp};
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;

pub const WIDTH: u32 = 1120;
pub const HEIGHT: u32 = 720;

const BACKGROUND: Color32 = Color32::from_rgb(22, 26, 30);
const PANEL: Color32 = Color32::from_rgb(32, 37, 43);
const GRID: Color32 = Color32::from_rgb(52, 60, 68);
const TRACE: Color32 = Color32::from_rgb(120, 220, 190);
const ACCENT: Color32 = Color32::from_rgb(240, 170, 60);
const WARN: Color32 = Color32::from_rgb(240, 90, 70);
const TEXT_DIM: Color32 = Color32::from_rgb(150, 160, 170);

/// Spectrum size (samples at the host rate).
const FFT_SIZE: usize = 8192;
/// Harmonics counted for THD_F and the band edge.
const THD_HARMONICS: usize = 10;
const THD_BAND_HZ: f64 = 20_000.0;
/// Share of the part rating above which the margin counts as thin (50% derating, common practice).
const THIN_MARGIN: f64 = 0.5;

pub fn default_state() -> Arc<EguiEditorState> {
    EguiEditorState::from_size(
        nice_plug::editor::dpi::LogicalSize::new(WIDTH as f64, HEIGHT as f64),
        1.0,
    )
}

pub struct App {
    params: Arc<BreakdownParams>,
    shared: Arc<Shared>,
    gui: Option<nice_plug::context::gui::GuiContext>,
    analyser: Analyser,
    scope_buffer: Vec<f32>,
    listen_buffer: Vec<f32>,
    spectrum: Spectrum,
    last_publication: u32,
}

impl App {
    pub fn new(params: Arc<BreakdownParams>, shared: Arc<Shared>) -> Self {
        App {
            params,
            shared,
            gui: None,
            analyser: Analyser::new(FFT_SIZE),
            scope_buffer: Vec::new(),
            listen_buffer: vec![0.0; FFT_SIZE],
            spectrum: Spectrum::default(),
            last_publication: u32::MAX,
        }
    }
}

impl NiceEguiApp for App {
    fn build(
        &mut self,
        egui_ctx: egui::Context,
        gui: nice_plug::context::gui::GuiContext,
        _frame: &mut nice_plug_egui::Frame,
    ) -> Result<(), nice_plug_egui::baseview::HandlerError> {
        self.gui = Some(gui);
        let mut visuals = egui::Visuals::dark();
        visuals.panel_fill = BACKGROUND;
        visuals.window_fill = BACKGROUND;
        visuals.selection.bg_fill = ACCENT.gamma_multiply(0.6);
        visuals.widgets.active.bg_fill = ACCENT;
        egui_ctx.set_visuals(visuals);
        Ok(())
    }

    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut nice_plug_egui::Frame) {
        ui.ctx().request_repaint_after(Duration::from_millis(40));
        let Some(gui) = self.gui.clone() else {
            return;
        };
        let setter = gui.param_setter();
        let publication = self.shared.publications.load(Ordering::Relaxed);
        if publication != self.last_publication {
            self.last_publication = publication;
            self.shared.listen.newest(&mut self.listen_buffer);
            let rate = self.shared.sample_rate.load(Ordering::Relaxed);
            self.spectrum =
                self.analyser
                    .analyse(&self.listen_buffer, rate, THD_HARMONICS, THD_BAND_HZ);
        }
        let full = ui.max_rect();
        ui.painter().rect_filled(full, 0.0, BACKGROUND);
        ui.horizontal(|ui| {
            ui.label(
                egui::RichText::new("BREAKDOWN")
                    .font(FontId::proportional(22.0))
                    .color(ACCENT)
                    .strong(),
            );
            ui.label(
                egui::RichText::new("Zener clamp audition: cathode follower -> back-to-back pair")
                    .color(TEXT_DIM),
            );
            egui::ComboBox::from_id_salt("presets")
                .selected_text("Demo presets")
                .show_ui(ui, |ui| {
                    for (file, text) in crate::presets::DEMO_PRESETS {
                        match crate::presets::Preset::from_toml(text) {
                            Ok(preset) => {
                                let r = ui
                                    .selectable_label(false, &preset.name)
                                    .on_hover_text(&preset.description);
                                if r.clicked() {
                                    if let Ok(state) = preset.to_state() {
                                        gui.set_state(state);
                                    }
                                }
                            }
                            Err(e) => {
                                ui.label(format!("{file}: {e}"));
                            }
                        }
                    }
                });
        });
        ui.add_space(4.0);
        ui.horizontal_top(|ui| {
            ui.vertical(|ui| {
                ui.set_width(330.0);
                self.controls(ui, &setter);
            });
            ui.add_space(8.0);
            ui.vertical(|ui| {
                self.scope(ui);
                ui.add_space(6.0);
                self.spectrum_view(ui);
                ui.add_space(6.0);
                self.ratings(ui);
            });
        });
        ui.add_space(4.0);
        ui.horizontal_wrapped(|ui| {
            ui.colored_label(
                WARN,
                "Safety: valve amps hold lethal voltages, also after switch-off. These numbers are a simulation, \
                 not a measurement; drain and verify capacitors, work live only with training.",
            );
            ui.label(egui::RichText::new("Full cautions: README, section \"Safety\".").color(TEXT_DIM));
        });
    }
}

fn fmt_volts(v: f32) -> String {
    if v.is_finite() {
        format!("{v:+.1} V")
    } else {
        "-".into()
    }
}

impl App {
    fn position_buttons(
        &self,
        ui: &mut egui::Ui,
        setter: &ParamSetter,
        param: &EnumParam<Position>,
    ) {
        ui.horizontal(|ui| {
            for p in Position::ALL {
                let selected = param.value() == p;
                if ui.selectable_label(selected, p.label()).clicked() && !selected {
                    setter.begin_set_parameter(param);
                    setter.set_parameter(param, p);
                    setter.end_set_parameter(param);
                }
            }
        });
    }

    fn controls(&self, ui: &mut egui::Ui, setter: &ParamSetter) {
        let p = &self.params;
        let heard = self.shared.heard.load(Ordering::Relaxed);
        egui::Frame::new()
            .fill(PANEL)
            .inner_margin(8.0)
            .corner_radius(4.0)
            .show(ui, |ui| {
                ui.label(egui::RichText::new("Switch (heard)").color(ACCENT));
                self.position_buttons(ui, setter, &p.switch);
                ui.horizontal(|ui| {
                    let on = p.ab.value();
                    let label = if on { "Compare key: ON" } else { "Compare key" };
                    if ui
                        .selectable_label(on, label)
                        .on_hover_text("Hear the 'compare with' position instead (space bar toggles)")
                        .clicked()
                    {
                        setter.begin_set_parameter(&p.ab);
                        setter.set_parameter(&p.ab, !on);
                        setter.end_set_parameter(&p.ab);
                    }
                    ui.label("with");
                });
                self.position_buttons(ui, setter, &p.compare_with);
                if ui.input(|i| i.key_pressed(egui::Key::Space)) {
                    let on = p.ab.value();
                    setter.begin_set_parameter(&p.ab);
                    setter.set_parameter(&p.ab, !on);
                    setter.end_set_parameter(&p.ab);
                }
                ui.add_space(4.0);
                egui::Grid::new("loudness").num_columns(4).show(ui, |ui| {
                    ui.label(egui::RichText::new("position").color(TEXT_DIM));
                    ui.label(egui::RichText::new("parts").color(TEXT_DIM));
                    ui.label(egui::RichText::new("loudness").color(TEXT_DIM))
                        .on_hover_text("Unmatched K-weighted short-term loudness (BS.1770, 3 s) of the listening output, one channel");
                    ui.label(egui::RichText::new("match").color(TEXT_DIM));
                    ui.end_row();
                    for pos in Position::ALL {
                        let r = &self.shared.slots[pos.index()];
                        let name = if pos.index() == heard {
                            egui::RichText::new(format!("> {}", pos.label())).color(ACCENT)
                        } else {
                            egui::RichText::new(pos.label())
                        };
                        ui.label(name);
                        let vp = r.volts_positive.load(Ordering::Relaxed);
                        let vn = r.volts_negative.load(Ordering::Relaxed);
                        let mut parts = if vp.is_finite() {
                            format!("+{vp:.1} / -{vn:.1} V")
                        } else {
                            "no parts".into()
                        };
                        if r.rebuilding.load(Ordering::Relaxed) {
                            parts.push_str(" ...");
                        }
                        ui.label(parts);
                        let l = r.loudness.load(Ordering::Relaxed);
                        ui.label(if l.is_finite() {
                            format!("{l:.1} LUFS")
                        } else {
                            "silent".into()
                        });
                        ui.label(format!("{:+.1} dB", r.match_gain_db.load(Ordering::Relaxed)));
                        ui.end_row();
                    }
                });
                ui.horizontal(|ui| {
                    ui.label("Level match");
                    ui.add(ParamSlider::for_param(&p.level_match, setter).with_width(70.0));
                    ui.label("Run all");
                    ui.add(ParamSlider::for_param(&p.run_all, setter).with_width(70.0))
                        .on_hover_text("Off: only the heard and the 'compare with' positions run (half the CPU)");
                });
            });
        ui.add_space(6.0);
        egui::Frame::new()
            .fill(PANEL)
            .inner_margin(8.0)
            .corner_radius(4.0)
            .show(ui, |ui| {
                egui::Grid::new("knobs").num_columns(2).show(ui, |ui| {
                    ui.label("Gain");
                    ui.add(ParamSlider::for_param(&p.gain, setter).with_width(170.0));
                    ui.end_row();
                    ui.label("Level");
                    ui.add(ParamSlider::for_param(&p.level, setter).with_width(170.0));
                    ui.end_row();
                    for (name, param) in [
                        ("Pair 1 +", &p.pair1_positive),
                        ("Pair 1 -", &p.pair1_negative),
                        ("Pair 2 +", &p.pair2_positive),
                        ("Pair 2 -", &p.pair2_negative),
                        ("Cand. +", &p.candidate_positive),
                        ("Cand. -", &p.candidate_negative),
                    ] {
                        ui.label(name);
                        ui.add(ParamSlider::for_param(param, setter).with_width(170.0));
                        ui.end_row();
                    }
                    ui.label("Snap E24");
                    ui.add(ParamSlider::for_param(&p.snap_e24, setter).with_width(170.0))
                        .on_hover_text("Use the nearest buyable E24 voltage (IEC 60063)");
                    ui.end_row();
                    ui.label("Input cal.").on_hover_text(INPUT_CALIBRATION_HELP);
                    ui.add(ParamSlider::for_param(&p.input_calibration, setter).with_width(170.0))
                        .on_hover_text(INPUT_CALIBRATION_HELP);
                    ui.end_row();
                    ui.label("Trim");
                    ui.add(ParamSlider::for_param(&p.trim, setter).with_width(170.0));
                    ui.end_row();
                });
                ui.horizontal(|ui| {
                    ui.label("Quality");
                    for q in [
                        QualityChoice::X1,
                        QualityChoice::X2,
                        QualityChoice::X4,
                        QualityChoice::X8,
                        QualityChoice::X16,
                    ] {
                        let selected = p.quality.value() == q;
                        let text = format!("{}x", q.quality().factor());
                        if ui.selectable_label(selected, text).clicked() && !selected {
                            setter.begin_set_parameter(&p.quality);
                            setter.set_parameter(&p.quality, q);
                            setter.end_set_parameter(&p.quality);
                        }
                    }
                });
                ui.horizontal(|ui| {
                    ui.label("Listen at");
                    for (l, text) in [
                        (ListenPoint::Wiper, "wiper"),
                        (ListenPoint::ClampNode, "clamp node"),
                    ] {
                        let selected = p.listen.value() == l;
                        if ui.selectable_label(selected, text).clicked() && !selected {
                            setter.begin_set_parameter(&p.listen);
                            setter.set_parameter(&p.listen, l);
                            setter.end_set_parameter(&p.listen);
                        }
                    }
                });
                let latency = self.shared.latency.load(Ordering::Relaxed);
                let rate = self.shared.sample_rate.load(Ordering::Relaxed);
                ui.label(
                    egui::RichText::new(format!(
                        "latency {latency} samples ({:.2} ms), {} model(s) per position",
                        latency as f64 * 1000.0 / rate,
                        self.shared.models.load(Ordering::Relaxed)
                    ))
                    .color(TEXT_DIM),
                );
            });
    }

    fn scope(&mut self, ui: &mut egui::Ui) {
        let rate = self.shared.sample_rate.load(Ordering::Relaxed);
        let scope_ms = self.params.state.read().map(|s| s.scope_ms).unwrap_or(20.0);
        let window =
            ((scope_ms as f64 * 1e-3 * rate) as usize).clamp(64, crate::shared::RING_LEN / 6);
        self.scope_buffer.resize(window * 3, 0.0);
        self.shared.scope.newest(&mut self.scope_buffer);
        let start = trigger(&self.scope_buffer, window).unwrap_or(self.scope_buffer.len() - window);
        let shown = &self.scope_buffer[start..start + window];
        let heard = self.shared.heard.load(Ordering::Relaxed);
        let r = &self.shared.slots[heard];
        let tp = r.threshold_positive.load(Ordering::Relaxed);
        let tn = r.threshold_negative.load(Ordering::Relaxed);
        let peak = shown.iter().fold(0.0f32, |m, x| m.max(x.abs()));
        let mut range = [5.0f32, 10.0, 20.0, 50.0, 100.0, 200.0]
            .into_iter()
            .find(|r| *r >= peak * 1.1)
            .unwrap_or(400.0);
        if tp.is_finite() {
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
        for (t, label) in [(tp, "+ clamp"), (tn, "- clamp")] {
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
                    format!("{label} {t:+.1} V"),
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
                "clamp node, {} ({scope_ms:.0} ms)  peak + {}  peak - {}  p-p {:.1} V  clamped {:.0}% of the time",
                Position::ALL[heard].label(),
                fmt_volts(pp),
                fmt_volts(pn),
                (pp - pn).max(0.0),
                share * 100.0
            ),
            FontId::monospace(11.0),
            Color32::WHITE,
        );
    }

    fn spectrum_view(&self, ui: &mut egui::Ui) {
        let (resp, painter) =
            ui.allocate_painter(Vec2::new(ui.available_width() - 8.0, 200.0), Sense::hover());
        let rect = resp.rect;
        painter.rect_filled(rect, 4.0, PANEL);
        let sp = &self.spectrum;
        let rate = self.shared.sample_rate.load(Ordering::Relaxed);
        let (f_lo, f_hi) = (20.0f64, (rate / 2.0).min(20_000.0));
        let x_of =
            |f: f64| rect.left() + rect.width() * ((f / f_lo).ln() / (f_hi / f_lo).ln()) as f32;
        let (db_top, db_bottom) = (0.0f32, -120.0f32);
        let y_of = |db: f32| {
            rect.top()
                + 16.0
                + (rect.height() - 20.0) * ((db_top - db) / (db_top - db_bottom)).clamp(0.0, 1.0)
        };
        for db in [-20.0, -40.0, -60.0, -80.0, -100.0] {
            painter.hline(rect.x_range(), y_of(db), Stroke::new(1.0, GRID));
            painter.text(
                Pos2::new(rect.left() + 2.0, y_of(db)),
                Align2::LEFT_BOTTOM,
                format!("{db:.0} dB"),
                FontId::monospace(9.0),
                TEXT_DIM,
            );
        }
        for f in [100.0, 1000.0, 10_000.0] {
            painter.vline(x_of(f), rect.y_range(), Stroke::new(1.0, GRID));
        }
        if !sp.magnitude_db.is_empty() {
            let mut points = Vec::with_capacity(sp.magnitude_db.len());
            for (k, &db) in sp.magnitude_db.iter().enumerate().skip(1) {
                let f = k as f64 * sp.bin_hz;
                if f < f_lo || f > f_hi {
                    continue;
                }
                points.push(Pos2::new(x_of(f), y_of(db)));
            }
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
                    Rect::from_x_y_ranges(x..=x, rect.top() + 16.0..=rect.top() + 30.0).y_range(),
                    Stroke::new(2.0, color),
                );
                painter.text(
                    Pos2::new(x, rect.top() + 30.0),
                    Align2::CENTER_TOP,
                    format!("{h}"),
                    FontId::monospace(9.0),
                    color,
                );
            }
            format!(
                "listening point  f0 {:.0} Hz  THD_F {:.2}% (harmonics 2-{}, band to {:.0} kHz)  even/odd {:.0}/{:.0}%",
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

    fn ratings(&self, ui: &mut egui::Ui) {
        let heard = self.shared.heard.load(Ordering::Relaxed);
        let r = &self.shared.slots[heard];
        let rating = FAMILY_1N47XXA.power_rating_watts;
        egui::Frame::new()
            .fill(PANEL)
            .inner_margin(8.0)
            .corner_radius(4.0)
            .show(ui, |ui| {
                ui.set_width(ui.available_width() - 24.0);
                let vp = r.volts_positive.load(Ordering::Relaxed);
                if !vp.is_finite() {
                    ui.label("Zener ratings: no parts in this position.");
                    return;
                }
                let vn = r.volts_negative.load(Ordering::Relaxed);
                let ipk = r.zener_peak_current.load(Ordering::Relaxed) as f64;
                egui::Grid::new("ratings").num_columns(6).show(ui, |ui| {
                    for h in ["Zener (1 W family)", "peak current", "max current P/Vz", "peak W", "average W", "margin"] {
                        ui.label(egui::RichText::new(h).color(TEXT_DIM));
                    }
                    ui.end_row();
                    for (name, vz, wpk, wavg) in [
                        ("+ clamp", vp as f64, r.positive_peak_watts.load(Ordering::Relaxed) as f64, r.positive_average_watts.load(Ordering::Relaxed) as f64),
                        ("- clamp", vn as f64, r.negative_peak_watts.load(Ordering::Relaxed) as f64, r.negative_average_watts.load(Ordering::Relaxed) as f64),
                    ] {
                        let izm = rating / vz;
                        let use_share = (wavg / rating).max(ipk / izm);
                        ui.label(format!("{name} {vz:.1} V"));
                        ui.label(format!("{:.2} mA", ipk * 1e3));
                        ui.label(format!("{:.0} mA", izm * 1e3));
                        ui.label(format!("{:.3} W", wpk));
                        ui.label(format!("{:.3} W", wavg));
                        if use_share > THIN_MARGIN {
                            ui.colored_label(WARN, format!("THIN: {:.0}% of rating", use_share * 100.0));
                        } else {
                            ui.colored_label(TRACE, format!("ok: {:.1}% of rating", use_share * 100.0));
                        }
                        ui.end_row();
                    }
                });
                ui.label(
                    egui::RichText::new(
                        "Margin = larger of average power / 1 W and peak current / (1 W / Vz); above 50% is flagged \
                         (derating, common practice).",
                    )
                    .color(TEXT_DIM)
                    .small(),
                );
            });
    }
}

/// Keep the scope window choice sane when it comes from a saved state.
pub fn scope_ms_valid(ms: f32) -> bool {
    ms.is_finite() && (1.0..=200.0).contains(&ms)
}
