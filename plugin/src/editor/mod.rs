//! The editor, one file per part: the circuit panel, the listening chain (listening point, cabinet, IR loader),
//! the controls, a triggered scope of the clamp node, the
//! spectrum of the listening point, the ratings of the heard parts, and the about / safety panel with the whole
//! caution. It reads the audio thread's data through `Shared` (atomics only) and the running circuit through
//! the `Session`.

mod about;
mod cabinet_panel;
mod circuit_panel;
mod controls;
mod ratings;
mod scope;
pub(crate) mod spectrum;
mod widgets;

pub use about::SAFETY;

use crate::analysis::{Analyser, Spectrum};
use crate::params::{BreakdownParams, Kind};
use crate::presets::{Preset, DEMO_PRESETS};
use crate::session::CircuitView;
use crate::shared::Shared;
use crate::state::default_param_values;
use cabinet_panel::CabinetPanel;
use circuit_panel::CircuitPanel;
use egui::FontId;
use nice_plug::plugin::ParamValue;
use nice_plug::prelude::*;
use nice_plug_egui::{EguiEditorState, NiceEguiApp};
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;
use widgets::{ACCENT, BACKGROUND, TEXT_DIM};

pub const WIDTH: u32 = 1300;
pub const HEIGHT: u32 = 760;
/// Widths of the two control columns (the scope, spectrum and ratings take the rest).
const LEFT: f32 = 360.0;
const MIDDLE: f32 = 330.0;

/// Spectrum size (samples at the host rate).
const FFT_SIZE: usize = 8192;

pub fn default_state() -> Arc<EguiEditorState> {
    EguiEditorState::from_size(
        nice_plug::editor::dpi::LogicalSize::new(WIDTH as f64, HEIGHT as f64),
        1.0,
    )
}

/// Set a choice parameter by its stable id.
fn set_choice<T: Enum + PartialEq + Copy + 'static>(
    setter: &ParamSetter,
    p: &EnumParam<T>,
    id: &str,
) {
    if let Some(k) = T::ids().and_then(|ids| ids.iter().position(|x| *x == id)) {
        widgets::set(setter, p, T::from_index(k));
    }
}

/// Load a preset as a person turning the controls would: every parameter set through the host (one gesture
/// each), those the preset leaves out back to their defaults. The session's circuit stays. (Not a state load:
/// that would run on the audio thread while the host plays.)
fn apply_preset(setter: &ParamSetter, params: &BreakdownParams, preset: &Preset) {
    let mut values = default_param_values();
    for (id, v) in &preset.values {
        values.insert(id.clone(), v.clone());
    }
    for (id, v) in &values {
        match (id.as_str(), v) {
            ("quality", ParamValue::String(c)) => set_choice(setter, &params.quality, c),
            ("listen", ParamValue::String(c)) => set_choice(setter, &params.listen, c),
            ("cabinet", ParamValue::String(c)) => set_choice(setter, &params.cabinet, c),
            ("candidate_family", ParamValue::String(c)) => {
                set_choice(setter, &params.candidate_family, c)
            }
            _ => match (params.kind(id), v) {
                (Some(Kind::Float(p)), ParamValue::F32(x)) => widgets::set(setter, p, *x),
                (Some(Kind::Int(p)), ParamValue::I32(x)) => widgets::set(setter, p, *x),
                (Some(Kind::Bool(p)), ParamValue::Bool(x)) => widgets::set(setter, p, *x),
                _ => nice_plug::nice_warn!("Breakdown: preset value {id} = {v:?} not applied"),
            },
        }
    }
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
    circuit_panel: CircuitPanel,
    cabinet_panel: CabinetPanel,
    view: CircuitView,
    view_revision: u32,
    show_about: bool,
    preset_message: Option<String>,
}

impl App {
    pub fn new(params: Arc<BreakdownParams>, shared: Arc<Shared>) -> Self {
        let view = params.session.view();
        App {
            params,
            shared,
            gui: None,
            analyser: Analyser::new(FFT_SIZE),
            scope_buffer: Vec::new(),
            listen_buffer: vec![0.0; FFT_SIZE],
            spectrum: Spectrum::default(),
            last_publication: u32::MAX,
            circuit_panel: CircuitPanel::default(),
            cabinet_panel: CabinetPanel::default(),
            view,
            view_revision: u32::MAX,
            show_about: false,
            preset_message: None,
        }
    }

    /// Follow the session (a state the host loaded, a circuit the panel loaded).
    fn follow_session(&mut self) {
        let session = &self.params.session;
        session.refresh();
        let revision = session.revision();
        if revision != self.view_revision || session.key().id != self.view.id {
            self.view_revision = revision;
            self.view = session.view();
        }
    }

    fn analyse(&mut self) {
        let publication = self.shared.publications.load(Ordering::Relaxed);
        if publication != self.last_publication {
            self.last_publication = publication;
            self.shared.listen.newest(&mut self.listen_buffer);
            let rate = self.shared.sample_rate.load(Ordering::Relaxed);
            self.spectrum = self.analyser.analyse(
                &self.listen_buffer,
                rate,
                spectrum::THD_HARMONICS,
                spectrum::THD_BAND_HZ,
            );
        }
    }

    fn title_bar(&mut self, ui: &mut egui::Ui, setter: &ParamSetter) {
        ui.horizontal(|ui| {
            ui.label(
                egui::RichText::new("BREAKDOWN")
                    .font(FontId::proportional(22.0))
                    .color(ACCENT)
                    .strong(),
            );
            ui.label(
                egui::RichText::new("your circuit's Zener clamp positions, side by side")
                    .color(TEXT_DIM),
            );
            egui::ComboBox::from_id_salt("presets")
                .selected_text("Demo presets")
                .show_ui(ui, |ui| {
                    for (file, text) in DEMO_PRESETS {
                        match Preset::from_toml(text) {
                            Ok(preset) => {
                                let r = ui
                                    .selectable_label(false, &preset.name)
                                    .on_hover_text(&preset.description);
                                if r.clicked() {
                                    for n in &preset.notes {
                                        nice_plug::nice_log!("Breakdown: preset {file}: {n}");
                                    }
                                    apply_preset(setter, &self.params, &preset);
                                    self.preset_message =
                                        Some(format!("Loaded preset: {}", preset.name));
                                }
                            }
                            Err(e) => {
                                ui.label(format!("{file}: {e}"));
                            }
                        }
                    }
                });
            if let Some(m) = &self.preset_message {
                ui.label(egui::RichText::new(m).color(TEXT_DIM));
            }
            if ui
                .selectable_label(self.show_about, "About / safety")
                .clicked()
            {
                self.show_about = !self.show_about;
            }
        });
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
        self.follow_session();
        self.analyse();
        let setter = gui.param_setter();
        let full = ui.max_rect();
        ui.painter().rect_filled(full, 0.0, BACKGROUND);
        self.title_bar(ui, &setter);
        let heard = self.shared.heard.load(Ordering::Relaxed);
        let heard_name = controls::slot_name(&self.view, heard);
        ui.add_space(4.0);
        let column_height = HEIGHT as f32 - 140.0;
        ui.horizontal_top(|ui| {
            ui.vertical(|ui| {
                ui.set_width(LEFT);
                egui::ScrollArea::vertical()
                    .id_salt("left")
                    .max_height(column_height)
                    .show(ui, |ui| {
                        self.circuit_panel
                            .draw(ui, &self.params.session, &self.view);
                        ui.add_space(6.0);
                        self.cabinet_panel
                            .draw(ui, &setter, &self.params, &self.shared);
                        ui.add_space(6.0);
                        controls::switch(ui, &setter, &self.params, &self.shared, &self.view);
                    });
            });
            ui.vertical(|ui| {
                ui.set_width(MIDDLE);
                egui::ScrollArea::vertical()
                    .id_salt("middle")
                    .max_height(column_height)
                    .show(ui, |ui| {
                        controls::pots(ui, &setter, &self.params, &self.view);
                        ui.add_space(6.0);
                        controls::candidate(ui, &setter, &self.params);
                        ui.add_space(6.0);
                        controls::input_output(ui, &setter, &self.params, &self.shared, &self.view);
                    });
            });
            ui.vertical(|ui| {
                egui::ScrollArea::vertical()
                    .id_salt("right")
                    .max_height(column_height)
                    .show(ui, |ui| {
                        if self.show_about {
                            widgets::panel(ui, about::about);
                            ui.add_space(6.0);
                        }
                        let scope_ms = self.params.session.scope_ms();
                        scope::draw(
                            ui,
                            &self.shared,
                            scope_ms,
                            &heard_name,
                            &mut self.scope_buffer,
                        );
                        ui.add_space(6.0);
                        let rate = self.shared.sample_rate.load(Ordering::Relaxed);
                        spectrum::draw(ui, &self.spectrum, rate);
                        ui.add_space(6.0);
                        ratings::draw(ui, &self.shared, &heard_name);
                    });
            });
        });
        ui.add_space(4.0);
        about::safety_strip(ui);
    }
}
