//! The session: what the plugin keeps in the host's saved state beside its parameters (the circuit file's
//! text, the scope window), and the running circuit parsed from it.
//!
//! The circuit's text lives in the persisted field `breakdown` (see `PersistedState`), so a saved session
//! reopens with the same circuit on another machine, whether or not the file is there. Every change of that
//! field (a host loading a state, a preset, the editor loading a file) bumps `revision`; whoever runs off the
//! audio thread (the background worker, the editor, activation) then calls `refresh`, which parses the new text
//! and, if it is good, makes it the running circuit under a new circuit id. The audio thread reads only the
//! atomics (`revision`, `key`): it never locks, parses or frees.

use crate::ir::{check_ir_bytes, decode_base64, encode_base64, CheckedIr, MAX_IR_FILE_BYTES};
use breakdown_dsp::cabinet::ImpulseResponse;
use breakdown_dsp::circuit::MAX_POSITIONS;
use breakdown_dsp::Circuit;
use nice_plug::params::persist::PersistentField;
use serde::{Deserialize, Serialize};
use std::sync::atomic::{AtomicU32, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard, OnceLock, RwLock};

/// Version of the persisted field's layout. 1: scope window only (the plugin ran the one-stage circuit with
/// four fixed switch slots); 2: the circuit file's text, positions from the circuit.
pub const STATE_VERSION: u32 = 2;
/// Key of our own persisted field in the framework's state object.
pub const STATE_FIELD: &str = "breakdown";
/// The parameter value (and runtime slot) of the freely set candidate pair: one past the last switch position
/// a circuit can have, so it means the same in every circuit.
pub const CANDIDATE: usize = MAX_POSITIONS;
/// Scope window the editor offers (ms).
pub const SCOPE_MS_RANGE: (f32, f32) = (1.0, 200.0);

/// Non-parameter state we persist ourselves, with its layout version.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PersistedState {
    pub version: u32,
    /// Scope time window (ms) chosen in the editor.
    #[serde(default = "default_scope_ms")]
    pub scope_ms: f32,
    /// The text of the circuit file the session runs; None: the built-in circuit.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub circuit: Option<String>,
    /// Name of the file the circuit was loaded from (shown in the editor only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub circuit_file: Option<String>,
    /// The cabinet's impulse response: the WAV file's bytes in base64 (`ir::encode_base64`); None: none
    /// loaded (the `loaded` cabinet choice plays the built-in response).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ir: Option<String>,
    /// Name of the file the response was loaded from (shown in the editor only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ir_file: Option<String>,
}

pub fn default_scope_ms() -> f32 {
    20.0
}

impl Default for PersistedState {
    fn default() -> Self {
        PersistedState {
            version: STATE_VERSION,
            scope_ms: default_scope_ms(),
            circuit: None,
            circuit_file: None,
            ir: None,
            ir_file: None,
        }
    }
}

/// The built-in circuit, parsed once.
pub fn builtin() -> Arc<Circuit> {
    static BUILTIN: OnceLock<Arc<Circuit>> = OnceLock::new();
    BUILTIN.get_or_init(|| Arc::new(Circuit::builtin())).clone()
}

/// The circuit the models run.
#[derive(Clone, Debug)]
pub struct Running {
    /// Changes whenever the running circuit does (the models are tagged with it).
    pub id: u32,
    pub circuit: Arc<Circuit>,
    /// The file's text; None for the built-in circuit.
    pub text: Option<String>,
    pub file: Option<String>,
    /// Notes from the circuit reader (renamed sections and the like).
    pub notes: Vec<String>,
    /// Why the last circuit offered was refused (the running one stayed), if it was.
    pub problem: Option<String>,
    /// The session revision this was last brought up to date with.
    seen_revision: u32,
}

impl Running {
    /// Name for display: the circuit's own `name`, else the file's, else "built-in circuit".
    pub fn display_name(&self) -> String {
        match (&self.circuit.name, &self.file, &self.text) {
            (Some(n), _, _) => n.clone(),
            (None, Some(f), _) => f.clone(),
            (None, None, None) => "built-in circuit".into(),
            (None, None, Some(_)) => "unnamed circuit".into(),
        }
    }

    pub fn is_builtin(&self) -> bool {
        self.text.is_none()
    }
}

/// What the editor shows of the running circuit (no file text).
#[derive(Clone, Debug, PartialEq)]
pub struct CircuitView {
    pub id: u32,
    pub name: String,
    /// `Circuit::summary`: "2 preamp stages, gain stage, follower, clamp".
    pub summary: String,
    /// The switch positions' names, in order.
    pub positions: Vec<String>,
    pub file: Option<String>,
    pub builtin: bool,
    pub notes: Vec<String>,
    pub problem: Option<String>,
    /// The file's `[input] volts_at_full_scale` (the session's setting overrides it).
    pub volts_at_full_scale: f64,
    pub has_tone_stack: bool,
}

/// The impulse response the `loaded` cabinet plays.
#[derive(Clone, Debug, Default)]
pub struct RunningIr {
    /// Changes whenever the response does (0: none loaded).
    pub id: u32,
    pub response: Option<Arc<ImpulseResponse>>,
    /// The persisted base64 text it came from.
    text: Option<String>,
    pub file: Option<String>,
    /// "48 kHz, 0.250 s, mono".
    pub summary: Option<String>,
    /// Why the last response offered was refused (the running one stayed), or why the cabinet could not be
    /// built at the session's rate.
    pub problem: Option<String>,
    seen_revision: u32,
}

/// What the editor shows of the loaded impulse response.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct IrView {
    pub id: u32,
    pub file: Option<String>,
    pub summary: Option<String>,
    pub problem: Option<String>,
}

/// Decode and check a persisted response (base64 of a WAV file's bytes).
fn decode_ir(text: &str, shown: &str) -> Result<CheckedIr, String> {
    if text.len() > MAX_IR_FILE_BYTES.div_ceil(3) * 4 {
        return Err(format!(
            "'{shown}' holds more than {MAX_IR_FILE_BYTES} bytes, the most an impulse-response file may have"
        ));
    }
    let bytes = decode_base64(text)
        .ok_or_else(|| format!("'{shown}' is damaged in the saved state (not base64 text)"))?;
    check_ir_bytes(&bytes, shown)
}

/// Which circuit the models should run, as the audio thread reads it: one atomic word.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct CircuitKey {
    pub id: u32,
    /// Number of switch positions (1..=MAX_POSITIONS).
    pub positions: usize,
}

impl CircuitKey {
    fn pack(self) -> u64 {
        ((self.id as u64) << 32) | self.positions as u64
    }
    fn unpack(word: u64) -> CircuitKey {
        CircuitKey {
            id: (word >> 32) as u32,
            positions: ((word & 0xffff_ffff) as usize).clamp(1, MAX_POSITIONS),
        }
    }

    /// The runtime slot heard for a position parameter `value`: the candidate for CANDIDATE and above,
    /// otherwise the position, values past this circuit's last position clamped to it.
    pub fn slot_of(self, value: usize) -> usize {
        if value >= CANDIDATE {
            CANDIDATE
        } else {
            value.min(self.positions - 1)
        }
    }
}

/// The session's persisted field and the running circuit (shared by the parameters, the worker and the
/// editor).
pub struct Session {
    persisted: RwLock<PersistedState>,
    revision: AtomicU32,
    running: Mutex<Running>,
    key: AtomicU64,
    ir: Mutex<RunningIr>,
    /// `RunningIr::id` for the audio thread.
    ir_id: AtomicU32,
}

impl Default for Session {
    fn default() -> Self {
        let circuit = builtin();
        let key = CircuitKey {
            id: 1,
            positions: circuit.clamp.position.len(),
        };
        Session {
            persisted: RwLock::new(PersistedState::default()),
            revision: AtomicU32::new(0),
            running: Mutex::new(Running {
                id: key.id,
                circuit,
                text: None,
                file: None,
                notes: Vec::new(),
                problem: None,
                seen_revision: 0,
            }),
            key: AtomicU64::new(key.pack()),
            ir: Mutex::new(RunningIr::default()),
            ir_id: AtomicU32::new(0),
        }
    }
}

impl Session {
    /// Bumped by every change of the persisted field (audio-thread safe).
    pub fn revision(&self) -> u32 {
        self.revision.load(Ordering::Acquire)
    }

    /// The running circuit's id and position count (audio-thread safe).
    pub fn key(&self) -> CircuitKey {
        CircuitKey::unpack(self.key.load(Ordering::Acquire))
    }

    /// Id of the running impulse response, 0 for none (audio-thread safe).
    pub fn ir_id(&self) -> u32 {
        self.ir_id.load(Ordering::Acquire)
    }

    fn lock_ir(&self) -> MutexGuard<'_, RunningIr> {
        self.ir.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The running impulse response and its id (not on the audio thread: locks).
    pub fn ir(&self) -> (u32, Option<Arc<ImpulseResponse>>) {
        let r = self.lock_ir();
        (r.id, r.response.clone())
    }

    /// What the editor shows of the running impulse response.
    pub fn ir_view(&self) -> IrView {
        let r = self.lock_ir();
        IrView {
            id: r.id,
            file: r.file.clone(),
            summary: r.summary.clone(),
            problem: r.problem.clone(),
        }
    }

    /// Record why the cabinet of response `id` could not be built (the worker; the running cabinet stays).
    pub fn set_ir_problem(&self, id: u32, problem: String) {
        let mut r = self.lock_ir();
        if r.id == id {
            r.problem = Some(problem);
        }
    }

    /// Load an impulse-response file's bytes (the editor's "Load IR..."): checked first (`check_ir_bytes`);
    /// a good one goes into the persisted field and becomes the running response, a bad one changes nothing
    /// and comes back as the message. Returns the response's summary.
    pub fn load_ir(&self, bytes: &[u8], file: String) -> Result<String, String> {
        let checked = check_ir_bytes(bytes, &file)?;
        let text = encode_base64(bytes);
        let summary = checked.summary.clone();
        let mut r = self.lock_ir();
        self.write(|p| {
            p.ir = Some(text.clone());
            p.ir_file = Some(file.clone());
        });
        r.seen_revision = self.revision();
        r.id = r.id.wrapping_add(1).max(1);
        r.response = Some(Arc::new(checked.response));
        r.text = Some(text);
        r.file = Some(file);
        r.summary = Some(checked.summary);
        r.problem = None;
        self.ir_id.store(r.id, Ordering::Release);
        Ok(summary)
    }

    /// Forget the loaded impulse response (the `loaded` choice then plays the built-in one).
    pub fn clear_ir(&self) {
        self.write(|p| {
            p.ir = None;
            p.ir_file = None;
        });
        self.refresh();
    }

    /// Bring the running response up to date with the persisted field, as `refresh` does the circuit: a
    /// response that is refused keeps the running one, records why, and goes back out of the persisted field.
    fn refresh_ir(&self, revision: u32) {
        let mut r = self.lock_ir();
        if r.seen_revision == revision {
            return;
        }
        r.seen_revision = revision;
        let (text, file) = {
            let p = self.persisted.read().unwrap_or_else(|e| e.into_inner());
            (p.ir.clone(), p.ir_file.clone())
        };
        if text == r.text {
            r.file = file;
            return;
        }
        let shown = file
            .clone()
            .unwrap_or_else(|| "the saved impulse response".into());
        let checked = match &text {
            None => Ok(None),
            Some(t) => decode_ir(t, &shown).map(Some),
        };
        match checked {
            Ok(c) => {
                r.id = if c.is_some() {
                    r.id.wrapping_add(1).max(1)
                } else {
                    0
                };
                r.summary = c.as_ref().map(|c| c.summary.clone());
                r.response = c.map(|c| Arc::new(c.response));
                r.text = text;
                r.file = file;
                r.problem = None;
                self.ir_id.store(r.id, Ordering::Release);
            }
            Err(e) => {
                nice_plug::nice_warn!(
                    "Breakdown: the impulse response in the session is refused ({e}); keeping {}",
                    r.file.as_deref().unwrap_or("the running cabinet")
                );
                r.problem = Some(e);
                let mut p = self.persisted.write().unwrap_or_else(|e| e.into_inner());
                p.ir = r.text.clone();
                p.ir_file = r.file.clone();
            }
        }
    }

    fn lock(&self) -> MutexGuard<'_, Running> {
        self.running.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The running circuit (not on the audio thread: locks).
    pub fn running(&self) -> Running {
        self.lock().clone()
    }

    /// The running circuit and its id (not on the audio thread: locks).
    pub fn circuit(&self) -> (u32, Arc<Circuit>) {
        let r = self.lock();
        (r.id, r.circuit.clone())
    }

    /// What the editor shows of the running circuit.
    pub fn view(&self) -> CircuitView {
        let r = self.lock();
        CircuitView {
            id: r.id,
            name: r.display_name(),
            summary: r.circuit.summary(),
            positions: r
                .circuit
                .clamp
                .position
                .iter()
                .map(|p| p.name.clone())
                .collect(),
            file: r.file.clone(),
            builtin: r.is_builtin(),
            notes: r.notes.clone(),
            problem: r.problem.clone(),
            volts_at_full_scale: r.circuit.input.volts_at_full_scale,
            has_tone_stack: r.circuit.tone_stack.is_some(),
        }
    }

    /// A copy of the persisted field.
    pub fn persisted(&self) -> PersistedState {
        self.persisted
            .read()
            .unwrap_or_else(|e| e.into_inner())
            .clone()
    }

    fn write(&self, f: impl FnOnce(&mut PersistedState)) {
        {
            let mut p = self.persisted.write().unwrap_or_else(|e| e.into_inner());
            f(&mut p);
        }
        self.revision.fetch_add(1, Ordering::AcqRel);
    }

    pub fn scope_ms(&self) -> f32 {
        let ms = self
            .persisted
            .read()
            .map(|p| p.scope_ms)
            .unwrap_or(default_scope_ms());
        if ms.is_finite() {
            ms.clamp(SCOPE_MS_RANGE.0, SCOPE_MS_RANGE.1)
        } else {
            default_scope_ms()
        }
    }

    pub fn set_scope_ms(&self, ms: f32) {
        if ms.is_finite() {
            self.write(|p| p.scope_ms = ms.clamp(SCOPE_MS_RANGE.0, SCOPE_MS_RANGE.1));
        }
    }

    /// Bring the running circuit up to date with the persisted field (off the audio thread). Returns true when
    /// the running circuit changed. A text that does not parse keeps the running circuit, records why in
    /// `Running::problem`, logs it, and puts the running circuit's text back into the persisted field, so a
    /// save never stores a circuit the plugin did not run.
    pub fn refresh(&self) -> bool {
        let revision = self.revision();
        self.refresh_ir(revision);
        let mut r = self.lock();
        if r.seen_revision == revision {
            return false;
        }
        r.seen_revision = revision;
        let (text, file) = {
            let p = self.persisted.read().unwrap_or_else(|e| e.into_inner());
            (p.circuit.clone(), p.circuit_file.clone())
        };
        if text == r.text {
            r.file = file;
            return false;
        }
        let parsed = match &text {
            None => Ok((builtin(), Vec::new())),
            Some(t) => Circuit::parse(t).map(|(c, notes)| (Arc::new(c), notes)),
        };
        match parsed {
            Ok((circuit, notes)) => {
                for n in &notes {
                    nice_plug::nice_log!("Breakdown: circuit file: {n}");
                }
                r.id = r.id.wrapping_add(1).max(1);
                let key = CircuitKey {
                    id: r.id,
                    positions: circuit.clamp.position.len().clamp(1, MAX_POSITIONS),
                };
                r.circuit = circuit;
                r.text = text;
                r.file = file;
                r.notes = notes;
                r.problem = None;
                self.key.store(key.pack(), Ordering::Release);
                true
            }
            Err(e) => {
                nice_plug::nice_warn!(
                    "Breakdown: the circuit in the session is refused ({e}); keeping {}",
                    r.display_name()
                );
                r.problem = Some(e.to_string());
                let (keep_text, keep_file) = (r.text.clone(), r.file.clone());
                let mut p = self.persisted.write().unwrap_or_else(|e| e.into_inner());
                p.circuit = keep_text;
                p.circuit_file = keep_file;
                false
            }
        }
    }

    /// Load a circuit file's text (the editor's "Load circuit..."): parse it first; a good one goes into the
    /// persisted field and becomes the running circuit, a bad one changes nothing and comes back as the
    /// message (with the reader's notes, if any).
    pub fn load_text(&self, text: String, file: Option<String>) -> Result<Vec<String>, String> {
        match Circuit::parse(&text) {
            Ok((_, notes)) => {
                self.write(|p| {
                    p.circuit = Some(text);
                    p.circuit_file = file;
                });
                self.refresh();
                Ok(notes)
            }
            Err(e) => Err(e.to_string()),
        }
    }

    /// Run the built-in circuit again.
    pub fn reset_to_builtin(&self) {
        self.write(|p| {
            p.circuit = None;
            p.circuit_file = None;
        });
        self.refresh();
    }

    /// Text shown for a position parameter value: "1 symmetric 20 V", "Candidate"; a value past the
    /// running circuit's last position shows the position it clamps to. (Locks: not for the audio thread.)
    pub fn position_label(&self, value: i32) -> String {
        let value = value.max(0) as usize;
        if value >= CANDIDATE {
            return "Candidate".into();
        }
        let r = self.lock();
        let positions = &r.circuit.clamp.position;
        let k = value.min(positions.len().saturating_sub(1));
        let name = positions.get(k).map(|p| p.name.as_str()).unwrap_or("?");
        if k == value {
            format!("{k} {name}")
        } else {
            format!("{k} {name} (clamped from {value})")
        }
    }

    /// Parse a position text: an index, "candidate", a position name of the running circuit, or the label
    /// `position_label` gives.
    pub fn parse_position(&self, text: &str) -> Option<i32> {
        let t = text.trim();
        if t.eq_ignore_ascii_case("candidate") {
            return Some(CANDIDATE as i32);
        }
        let first = t.split_whitespace().next().unwrap_or("");
        if let Ok(k) = first.parse::<i64>() {
            return Some(k.clamp(0, CANDIDATE as i64) as i32);
        }
        let r = self.lock();
        r.circuit
            .clamp
            .position
            .iter()
            .position(|p| p.name.eq_ignore_ascii_case(t))
            .map(|k| k as i32)
    }
}

impl<'a> PersistentField<'a, PersistedState> for Session {
    /// A state loaded by the host or the editor (already checked by `state::repair_state`).
    fn set(&self, new_value: PersistedState) {
        self.write(|p| *p = new_value);
    }
    fn map<F, R>(&self, f: F) -> R
    where
        F: Fn(&PersistedState) -> R,
    {
        f(&self.persisted.read().unwrap_or_else(|e| e.into_inner()))
    }
}

impl<'a> PersistentField<'a, PersistedState> for Arc<Session> {
    fn set(&self, new_value: PersistedState) {
        PersistentField::set(self.as_ref(), new_value);
    }
    fn map<F, R>(&self, f: F) -> R
    where
        F: Fn(&PersistedState) -> R,
    {
        PersistentField::map(self.as_ref(), f)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use breakdown_dsp::circuit::ONE_STAGE_TOML;

    #[test]
    fn a_good_text_becomes_the_running_circuit_and_a_bad_one_is_refused() {
        let s = Session::default();
        let before = s.key();
        assert_eq!(before.positions, 3);
        let text = ONE_STAGE_TOML.replace("name = \"symmetric 20 V\"", "name = \"sym\"");
        s.load_text(text.clone(), Some("mine.toml".into())).unwrap();
        let after = s.key();
        assert_ne!(after.id, before.id);
        assert_eq!(s.running().circuit.clamp.position[1].name, "sym");
        assert_eq!(s.persisted().circuit.as_deref(), Some(text.as_str()));
        // A refused file changes nothing and names the problem.
        let e = s
            .load_text("supply_volts = 1000.0".into(), None)
            .unwrap_err();
        assert!(e.contains("supply_volts"), "{e}");
        assert_eq!(s.key(), after);
        // A bad text arriving through the persisted field (a host state) keeps the running circuit too.
        PersistentField::set(
            &s,
            PersistedState {
                circuit: Some("not toml [".into()),
                ..PersistedState::default()
            },
        );
        assert!(!s.refresh());
        assert_eq!(s.key(), after);
        assert!(s.running().problem.is_some());
        assert_eq!(s.persisted().circuit.as_deref(), Some(text.as_str()));
        s.reset_to_builtin();
        assert!(s.running().is_builtin());
    }

    #[test]
    fn position_values_clamp_and_name_the_circuit_positions() {
        let s = Session::default();
        let key = s.key();
        assert_eq!(key.slot_of(1), 1);
        assert_eq!(key.slot_of(7), 2);
        assert_eq!(key.slot_of(CANDIDATE), CANDIDATE);
        assert_eq!(s.position_label(1), "1 symmetric 20 V");
        assert!(s.position_label(9).contains("clamped"));
        assert_eq!(s.position_label(CANDIDATE as i32), "Candidate");
        assert_eq!(s.parse_position("symmetric 20 V"), Some(1));
        assert_eq!(s.parse_position("2 asymmetric 18 V / 5.6 V"), Some(2));
        assert_eq!(s.parse_position("candidate"), Some(CANDIDATE as i32));
        assert_eq!(s.parse_position("nothing"), None);
    }
}
