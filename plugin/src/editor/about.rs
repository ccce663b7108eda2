//! The about / safety panel: what the plugin is, and the whole caution of docs/model.md section 8 (a
//! plugin-only user may have no copy of the project's documents, so the editor carries the text itself).

use super::widgets::{dim, heading, panel, WARN};

/// The caution, word for word as docs/model.md section 8 has it (a test compares the two).
pub const SAFETY: &str = "Valve amplifiers run at several hundred volts and their filter capacitors stay charged \
after power-off; the numbers this tool prints are a simulation, not a measurement of a live chassis. Work on a \
live amp only with the training to do so; drain and verify capacitors; follow local electrical codes; when in \
doubt, have a qualified technician do the work. Check part voltage and power ratings against the values the tool \
reports, with margin.";

/// The caution, always on screen at the editor's foot.
pub fn safety_strip(ui: &mut egui::Ui) {
    panel(ui, |ui| {
        ui.label(egui::RichText::new(format!("Safety: {SAFETY}")).color(WARN));
    });
}

/// The about / safety panel's contents.
pub fn about(ui: &mut egui::Ui) {
    heading(ui, "Breakdown");
    ui.label(format!(
        "Version {}. A model of your preamp, its cathode follower and a back-to-back Zener pair on its switch, \
         from your own circuit file (or the built-in circuit), in real volts. Every switch position of the \
         circuit and a freely set candidate pair run on the same input; the switch and the A/B key crossfade in \
         20 ms, the level match holds every position at the same loudness, so you hear the parts, not the level.",
        env!("CARGO_PKG_VERSION")
    ));
    ui.add_space(6.0);
    heading(ui, "Safety");
    ui.label(egui::RichText::new(SAFETY).color(WARN));
    ui.add_space(6.0);
    heading(ui, "What the readouts mean");
    dim(
        ui,
        "Vz: a part's breakdown voltage at its datasheet test current. \"Conducts at X V (at 10 uA)\": the \
         clamp-node voltage where the pair passes 10 uA, drawn on the scope. Clamp level: the clamp node's measured \
         peaks. Margin: the part's power rating over the average power it dissipates; ok at 2x or more, thin from \
         1x to 2x, over below 1x (common practice). THD_F: harmonics 2-10 over the fundamental (IEC 61000-2-2 \
         style). Loudness: ITU-R BS.1770 K-weighted short-term loudness (3 s) of one channel.",
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The editor's caution is the whole of docs/model.md section 8, not a shortened line.
    #[test]
    fn safety_text_is_model_md_section_8() {
        let doc = include_str!("../../../docs/model.md");
        let section = doc
            .split("## 8. Safety")
            .nth(1)
            .expect("docs/model.md has section 8");
        let section = section.split("\n## ").next().unwrap_or(section);
        let words = |t: &str| t.split_whitespace().collect::<Vec<_>>().join(" ");
        assert_eq!(words(SAFETY), words(section));
        for needle in ["local electrical codes", "qualified technician", "ratings"] {
            assert!(SAFETY.contains(needle), "{needle}");
        }
    }
}
