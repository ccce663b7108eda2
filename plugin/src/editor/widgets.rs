//! Small shared pieces of the editor: colours, the panel frame, a toggle switch for on/off parameters, and
//! choice buttons.

use egui::{Color32, Sense, Stroke, Vec2};
use nice_plug::prelude::*;

pub const BACKGROUND: Color32 = Color32::from_rgb(22, 26, 30);
pub const PANEL: Color32 = Color32::from_rgb(32, 37, 43);
pub const GRID: Color32 = Color32::from_rgb(52, 60, 68);
pub const TRACE: Color32 = Color32::from_rgb(120, 220, 190);
pub const ACCENT: Color32 = Color32::from_rgb(240, 170, 60);
pub const WARN: Color32 = Color32::from_rgb(240, 90, 70);
pub const TEXT_DIM: Color32 = Color32::from_rgb(150, 160, 170);

/// A panel with the editor's background and margins.
pub fn panel<R>(ui: &mut egui::Ui, add: impl FnOnce(&mut egui::Ui) -> R) -> R {
    egui::Frame::new()
        .fill(PANEL)
        .inner_margin(8.0)
        .corner_radius(4.0)
        .show(ui, |ui| {
            ui.set_width(ui.available_width());
            add(ui)
        })
        .inner
}

/// A heading inside a panel.
pub fn heading(ui: &mut egui::Ui, text: &str) {
    ui.label(egui::RichText::new(text).color(ACCENT).strong());
}

/// Dim help text.
pub fn dim(ui: &mut egui::Ui, text: impl Into<String>) -> egui::Response {
    ui.label(egui::RichText::new(text.into()).color(TEXT_DIM).small())
}

/// Set a parameter as one gesture (begin, set, end), as a host expects from a click.
pub fn set<P: Param>(setter: &ParamSetter, param: &P, value: P::Plain) {
    setter.begin_set_parameter(param);
    setter.set_parameter(param, value);
    setter.end_set_parameter(param);
}

/// An on/off parameter drawn as a toggle switch with its label; a click flips it.
pub fn toggle(
    ui: &mut egui::Ui,
    setter: &ParamSetter,
    param: &BoolParam,
    label: &str,
) -> egui::Response {
    let on = param.value();
    let inner = ui.horizontal(|ui| {
        let size = Vec2::new(30.0, 16.0);
        let (rect, response) = ui.allocate_exact_size(size, Sense::click());
        let t = ui.ctx().animate_bool_responsive(response.id, on);
        let radius = rect.height() / 2.0;
        let track = if on { ACCENT.gamma_multiply(0.8) } else { GRID };
        ui.painter().rect_filled(rect, radius, track);
        let x = egui::lerp((rect.left() + radius)..=(rect.right() - radius), t);
        ui.painter().circle(
            egui::pos2(x, rect.center().y),
            radius - 2.0,
            Color32::WHITE,
            Stroke::NONE,
        );
        let text = ui.add(egui::Label::new(label).sense(Sense::click()));
        response.union(text)
    });
    let response = inner.inner;
    if response.clicked() {
        set(setter, param, !on);
    }
    response
}

/// A row of buttons, one per choice, the current one highlighted; a click chooses.
pub fn choice_buttons<T: Enum + PartialEq + Copy + 'static>(
    ui: &mut egui::Ui,
    setter: &ParamSetter,
    param: &EnumParam<T>,
    choices: &[(T, &str)],
) {
    for (value, text) in choices {
        let selected = param.value() == *value;
        if ui.selectable_label(selected, *text).clicked() && !selected {
            set(setter, param, *value);
        }
    }
}
