//! The listening chain panel: which listening point is heard and which cabinet plays (built-in, the loaded
//! file's name, or none), the cabinet choice, and "Load IR..." with the system's file dialog (the same `rfd`
//! dialog as the circuit panel). The file is read and checked on the dialog's own thread (size bound, the WAV
//! reader, `Cabinet::new`), never on the audio thread; a refused file keeps the running cabinet and shows the
//! reader's or the cabinet's message. The file's bytes go into the session, so a saved session reopens with the
//! same response on another machine.

use super::widgets::{choice_buttons, dim, heading, panel, set, TEXT_DIM, TRACE, WARN};
use crate::ir::MAX_IR_FILE_BYTES;
use crate::params::{BreakdownParams, CabinetChoice, ListenPoint};
use crate::session::Session;
use crate::shared::Shared;
use nice_plug::prelude::*;
use std::path::Path;
use std::sync::atomic::Ordering;
use std::sync::{Arc, Mutex};

/// What came back from the dialog: None when cancelled, else (file name, the load's outcome).
type Picked = Option<(String, Result<String, String>)>;

/// A file's bytes, refused before reading when it is over the bound.
fn read_ir_file(path: &Path) -> Result<Vec<u8>, String> {
    let len = std::fs::metadata(path)
        .map_err(|e| format!("cannot read {}: {e}", path.display()))?
        .len();
    if len > MAX_IR_FILE_BYTES as u64 {
        return Err(format!(
            "{}: {len} bytes is too long for an impulse-response file (at most {MAX_IR_FILE_BYTES})",
            path.display()
        ));
    }
    std::fs::read(path).map_err(|e| format!("cannot read {}: {e}", path.display()))
}

fn pick(session: &Session) -> Picked {
    let path = rfd::FileDialog::new()
        .set_title("Load cabinet impulse response")
        .add_filter("impulse response (WAV)", &["wav", "wave"])
        .pick_file()?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string());
    let outcome = read_ir_file(&path).and_then(|bytes| session.load_ir(&bytes, name.clone()));
    Some((name, outcome))
}

/// "Tone stack + cabinet" and the like, for a `Shared::listen_point` value.
pub fn listen_name(index: u32) -> &'static str {
    match index {
        1 => "the level pot wiper",
        2 => "the clamp node",
        _ => "the tone stack + cabinet",
    }
}

#[derive(Default)]
pub struct CabinetPanel {
    pending: Option<Arc<Mutex<Option<Picked>>>>,
    /// The last load's outcome: (good, text).
    message: Option<(bool, String)>,
}

impl CabinetPanel {
    fn open_dialog(&mut self, session: &Arc<Session>) {
        let slot = Arc::new(Mutex::new(None));
        let out = slot.clone();
        let session = session.clone();
        let job = move || {
            let picked = pick(&session);
            *out.lock().unwrap_or_else(|e| e.into_inner()) = Some(picked);
        };
        #[cfg(target_os = "macos")]
        job();
        #[cfg(not(target_os = "macos"))]
        if let Err(e) = std::thread::Builder::new()
            .name("breakdown IR dialog".into())
            .spawn(job)
        {
            self.message = Some((false, format!("cannot open the file dialog: {e}")));
            return;
        }
        self.pending = Some(slot);
    }

    /// Take the dialog's answer when it has come; a loaded response is chosen as the cabinet.
    fn collect(&mut self, setter: &ParamSetter, params: &BreakdownParams, running: &str) {
        let Some(slot) = &self.pending else {
            return;
        };
        let Some(picked) = slot.lock().unwrap_or_else(|e| e.into_inner()).take() else {
            return;
        };
        self.pending = None;
        self.message = match picked {
            None => None,
            Some((name, Ok(summary))) => {
                set(setter, &params.cabinet, CabinetChoice::Loaded);
                Some((true, format!("Loaded {name} ({summary}).")))
            }
            Some((name, Err(e))) => Some((
                false,
                format!("{name} is refused: {e}. Still playing {running}."),
            )),
        };
    }

    pub fn draw(
        &mut self,
        ui: &mut egui::Ui,
        setter: &ParamSetter,
        params: &BreakdownParams,
        shared: &Shared,
    ) {
        let session = &params.session;
        let ir = session.ir_view();
        let playing = match shared.cabinet_kind.load(Ordering::Relaxed) {
            0 => "no cabinet".to_string(),
            1 => "the built-in cabinet".to_string(),
            _ => match (&ir.file, shared.cabinet_ir.load(Ordering::Relaxed) == ir.id) {
                (Some(f), true) => format!("the cabinet of {f}"),
                _ => "a loaded cabinet".to_string(),
            },
        };
        self.collect(setter, params, &playing);
        panel(ui, |ui| {
            heading(ui, "Listening chain");
            let point = shared.listen_point.load(Ordering::Relaxed);
            let heard = if point == 0 {
                format!("Hearing {} ({playing}).", listen_name(point))
            } else {
                format!(
                    "Hearing {}: no tone stack or cabinet ({playing} is ready for the chain).",
                    listen_name(point)
                )
            };
            ui.label(egui::RichText::new(heard).strong());
            if shared.cabinet_pending.load(Ordering::Relaxed) {
                dim(ui, "preparing the chosen cabinet...");
            }
            ui.horizontal(|ui| {
                ui.label("Listen at");
                choice_buttons(
                    ui,
                    setter,
                    &params.listen,
                    &[
                        (ListenPoint::Chain, "tone stack + cabinet"),
                        (ListenPoint::Wiper, "wiper"),
                        (ListenPoint::ClampNode, "clamp node"),
                    ],
                );
            });
            ui.horizontal(|ui| {
                ui.label("Cabinet");
                choice_buttons(
                    ui,
                    setter,
                    &params.cabinet,
                    &[
                        (CabinetChoice::BuiltIn, "built-in"),
                        (CabinetChoice::Loaded, "loaded IR"),
                        (CabinetChoice::None, "none"),
                    ],
                );
            });
            match (&ir.file, &ir.summary) {
                (Some(f), Some(s)) => dim(
                    ui,
                    format!("IR: {f} ({s}; its bytes are kept in the session)"),
                ),
                _ => dim(ui, "no IR loaded: 'loaded IR' plays the built-in cabinet"),
            };
            ui.horizontal(|ui| {
                let waiting = self.pending.is_some();
                let load = ui
                    .add_enabled(!waiting, egui::Button::new("Load IR..."))
                    .on_hover_text(format!(
                    "A cabinet impulse response: a mono or stereo WAV file, at most 2 s and {} MiB",
                    MAX_IR_FILE_BYTES / (1024 * 1024)
                ));
                if load.clicked() {
                    self.open_dialog(session);
                }
                if waiting {
                    ui.label(egui::RichText::new("choosing a file...").color(TEXT_DIM));
                }
                if ui
                    .add_enabled(ir.file.is_some(), egui::Button::new("Forget IR"))
                    .clicked()
                {
                    session.clear_ir();
                    self.message = Some((true, "The loaded IR is forgotten.".into()));
                }
            });
            if let Some((good, text)) = &self.message {
                ui.label(egui::RichText::new(text).color(if *good { TRACE } else { WARN }));
            }
            if let Some(problem) = &ir.problem {
                ui.label(
                    egui::RichText::new(format!("The session's impulse response: {problem}"))
                        .color(WARN),
                );
            }
        });
    }
}
