//! The circuit panel: which circuit the session runs (name, one-line summary, the switch positions), "Load
//! circuit..." with the system's file dialog, "Reset to built-in", and the reader's message when a file is
//! refused (the running circuit stays).
//!
//! The dialog is `rfd`: on Linux through the XDG desktop portal over D-Bus (no GTK in the plugin: `rfd` opens
//! `libdbus-1.so.3` when the dialog is asked for, and the desktop must run `xdg-desktop-portal` with a
//! file-chooser back end; without a portal it falls back to the `zenity` program if that is installed), on
//! Windows and macOS the system's own dialog.
//! It runs on its own thread (on macOS on the editor's thread, as Cocoa requires), so the host's window never
//! waits on it; the file is read there too, and parsed by `Session::load_text` off the audio thread.

use super::widgets::{dim, heading, panel, ACCENT, TEXT_DIM, TRACE, WARN};
use crate::session::{CircuitView, Session};
use breakdown_dsp::circuit::MAX_FILE_BYTES;
use std::path::Path;
use std::sync::{Arc, Mutex};

/// What came back from the dialog.
enum Picked {
    Cancelled,
    File {
        name: String,
        text: Result<String, String>,
    },
}

/// A file's text, refused when it is too long or not UTF-8 text (the message names the file and the reason).
fn read_circuit_file(path: &Path) -> Result<String, String> {
    let len = std::fs::metadata(path)
        .map_err(|e| format!("cannot read {}: {e}", path.display()))?
        .len();
    if len > MAX_FILE_BYTES as u64 {
        return Err(format!(
            "{}: {len} bytes is too long for a circuit file (at most {MAX_FILE_BYTES})",
            path.display()
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| format!("cannot read {}: {e}", path.display()))?;
    String::from_utf8(bytes).map_err(|_| format!("{}: not a text file (UTF-8)", path.display()))
}

fn pick() -> Picked {
    match rfd::FileDialog::new()
        .set_title("Load circuit file")
        .add_filter("circuit file (TOML)", &["toml"])
        .pick_file()
    {
        None => Picked::Cancelled,
        Some(path) => Picked::File {
            name: path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_else(|| path.display().to_string()),
            text: read_circuit_file(&path),
        },
    }
}

#[derive(Default)]
pub struct CircuitPanel {
    pending: Option<Arc<Mutex<Option<Picked>>>>,
    /// The last load's outcome: (good, text).
    message: Option<(bool, String)>,
}

impl CircuitPanel {
    fn open_dialog(&mut self) {
        let slot = Arc::new(Mutex::new(None));
        let out = slot.clone();
        let job = move || {
            let picked = pick();
            *out.lock().unwrap_or_else(|e| e.into_inner()) = Some(picked);
        };
        #[cfg(target_os = "macos")]
        job();
        #[cfg(not(target_os = "macos"))]
        if let Err(e) = std::thread::Builder::new()
            .name("breakdown file dialog".into())
            .spawn(job)
        {
            self.message = Some((false, format!("cannot open the file dialog: {e}")));
            return;
        }
        self.pending = Some(slot);
    }

    /// Take the dialog's answer when it has come.
    fn collect(&mut self, session: &Session, running: &CircuitView) {
        let Some(slot) = &self.pending else {
            return;
        };
        let Some(picked) = slot.lock().unwrap_or_else(|e| e.into_inner()).take() else {
            return;
        };
        self.pending = None;
        self.message = match picked {
            Picked::Cancelled => None,
            Picked::File { name, text: Err(e) } => Some((
                false,
                format!("{name} is refused: {e}. Still running {}.", running.name),
            )),
            Picked::File {
                name,
                text: Ok(text),
            } => match session.load_text(text, Some(name.clone())) {
                Ok(notes) => {
                    let mut m = format!("Loaded {name}.");
                    for n in notes {
                        m.push_str(&format!(" Note: {n}."));
                    }
                    Some((true, m))
                }
                Err(e) => Some((
                    false,
                    format!("{name} is refused: {e}. Still running {}.", running.name),
                )),
            },
        };
    }

    pub fn draw(&mut self, ui: &mut egui::Ui, session: &Session, view: &CircuitView) {
        self.collect(session, view);
        panel(ui, |ui| {
            ui.horizontal(|ui| {
                heading(ui, "Circuit");
                ui.label(egui::RichText::new(&view.name).strong());
            });
            dim(ui, &view.summary);
            if let Some(file) = &view.file {
                dim(ui, format!("from {file} (its text is kept in the session)"));
            } else if view.builtin {
                dim(ui, "the built-in circuit");
            }
            ui.horizontal_wrapped(|ui| {
                ui.label(egui::RichText::new("positions:").color(TEXT_DIM));
                for (k, name) in view.positions.iter().enumerate() {
                    ui.label(format!("{k} {name};"));
                }
                ui.label("Candidate");
            });
            ui.horizontal(|ui| {
                let waiting = self.pending.is_some();
                let load = ui
                    .add_enabled(!waiting, egui::Button::new("Load circuit..."))
                    .on_hover_text("A circuit file (TOML, the keys of docs/model.md section 5)");
                if load.clicked() {
                    self.open_dialog();
                }
                if waiting {
                    ui.label(egui::RichText::new("choosing a file...").color(TEXT_DIM));
                }
                if ui
                    .add_enabled(!view.builtin, egui::Button::new("Reset to built-in"))
                    .clicked()
                {
                    session.reset_to_builtin();
                    self.message = Some((true, "Running the built-in circuit.".into()));
                }
            });
            if let Some((good, text)) = &self.message {
                ui.label(egui::RichText::new(text).color(if *good { TRACE } else { WARN }));
            }
            if let Some(problem) = &view.problem {
                ui.label(
                    egui::RichText::new(format!("The session's circuit was refused: {problem}"))
                        .color(WARN),
                );
            }
            for n in &view.notes {
                ui.label(
                    egui::RichText::new(format!("Note: {n}"))
                        .color(ACCENT)
                        .small(),
                );
            }
        });
    }
}
