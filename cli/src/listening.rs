//! The listening point shared by `render`, `compare` and `demo`: what a clip plays.
//!
//! ```text
//! chain (default): tone stack output (or the wiper, with no [tone_stack]) ─► ÷ [listen] volts_at_full_scale ─► cabinet
//! wiper:           level pot's wiper ─────────────────────────────────────► ÷ [listen] volts_at_full_scale
//! ```
//!
//! The cabinet is the built-in response (`breakdown_dsp::cabinet`), an impulse-response WAV, or none. Probes,
//! the clamp readouts and the ratings never pass through the chain.

use breakdown_dsp::cabinet::{self, Cabinet, ImpulseResponse};
use breakdown_dsp::units::clip;
use breakdown_dsp::wav::{self, Limits};
use breakdown_dsp::{Circuit, Frame, Probe};
use std::path::{Path, PathBuf};

/// Where the listening output is taken.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Point {
    /// The tone stack's output (the wiper without a tone stack), then the cabinet.
    Chain,
    /// The level pot's wiper, bare: no tone stack, no cabinet.
    Wiper,
}

/// Which speaker cabinet the chain ends in.
#[derive(Clone, Debug, PartialEq)]
pub enum CabinetChoice {
    BuiltIn,
    /// An impulse response read from `path` (checked when it was read).
    File {
        path: PathBuf,
        ir: ImpulseResponse,
    },
    None,
}

/// The listening point and cabinet of a render or a comparison.
#[derive(Clone, Debug, PartialEq)]
pub struct Listening {
    pub point: Point,
    pub cabinet: CabinetChoice,
}

impl Default for Listening {
    fn default() -> Self {
        Listening {
            point: Point::Chain,
            cabinet: CabinetChoice::BuiltIn,
        }
    }
}

/// Read an impulse-response WAV and check that it makes a cabinet (at 48 kHz, the check does not depend on
/// the rate), so a bad file is refused before anything is rendered. `what` names the option or key.
pub fn read_impulse_response(path: &Path, what: &str) -> Result<ImpulseResponse, String> {
    let shown = clip(&path.display().to_string(), 80);
    if path.is_dir() {
        return Err(format!(
            "{what} '{shown}' is a folder, not an impulse-response WAV"
        ));
    }
    let limits = Limits {
        max_seconds: cabinet::MAX_SECONDS,
        ..Limits::default()
    };
    let w = wav::read_file(path, &shown, &limits).map_err(|e| format!("{what}: {}", e.0))?;
    let ir = ImpulseResponse {
        channels: w.audio.channels,
        sample_rate: w.audio.rate as f64,
    };
    Cabinet::new(&ir, 48_000.0, 1)
        .map_err(|e| format!("{what} '{shown}': not usable as a cabinet: {e}"))?;
    Ok(ir)
}

impl Listening {
    /// From the words a user gives: `listen` "chain" or "wiper", `cabinet` "builtin", "none" or a WAV file
    /// (relative to `base`). `listen_what` and `cabinet_what` name the option or key in messages.
    pub fn parse(
        listen: Option<&str>,
        cabinet: Option<&str>,
        base: &Path,
        listen_what: &str,
        cabinet_what: &str,
    ) -> Result<Listening, String> {
        let point = match listen.map(|l| l.trim().to_ascii_lowercase()).as_deref() {
            None | Some("chain") => Point::Chain,
            Some("wiper") => Point::Wiper,
            Some(other) => {
                return Err(format!(
                    "{listen_what} {}: expected chain (tone stack then cabinet, the default) or wiper (the level \
                     pot's wiper, bare)",
                    clip(other, 40)
                ))
            }
        };
        let cabinet_given = cabinet.is_some();
        let cabinet = match cabinet.map(str::trim) {
            None | Some("builtin") | Some("built-in") => CabinetChoice::BuiltIn,
            Some("none") => CabinetChoice::None,
            Some("") => {
                return Err(format!(
                    "{cabinet_what} is empty: give builtin, none or an impulse-response WAV file"
                ))
            }
            Some(file) => {
                let path = base.join(file);
                let ir = read_impulse_response(&path, cabinet_what)?;
                CabinetChoice::File { path, ir }
            }
        };
        if point == Point::Wiper && cabinet != CabinetChoice::None && cabinet_given {
            return Err(format!(
                "{cabinet_what} with {listen_what} wiper: the bare wiper has no cabinet; listen at the chain or \
                 leave the cabinet out"
            ));
        }
        Ok(Listening { point, cabinet })
    }

    /// The cabinet actually heard: none when listening at the wiper.
    pub fn heard_cabinet(&self) -> &CabinetChoice {
        match self.point {
            Point::Chain => &self.cabinet,
            Point::Wiper => &CabinetChoice::None,
        }
    }

    /// The engine probe whose value (scaled by `scale`) is the listening output before the cabinet.
    pub fn probe(&self) -> Probe {
        match self.point {
            Point::Chain => Probe::Listen,
            Point::Wiper => Probe::Wiper,
        }
    }

    /// Full-scale units per unit of `probe()`'s value.
    pub fn scale(&self, circuit: &Circuit) -> f64 {
        match self.point {
            Point::Chain => 1.0,
            Point::Wiper => 1.0 / circuit.listen.volts_at_full_scale,
        }
    }

    /// The listening value of one engine frame, before the cabinet.
    pub fn value(&self, frame: &Frame, scale: f64) -> f64 {
        match self.point {
            Point::Chain => frame.listen,
            Point::Wiper => frame.wiper_volts * scale,
        }
    }

    /// A fresh cabinet for `channels` signal channels at `rate`, or `None` when nothing is convolved.
    pub fn make_cabinet(&self, rate: f64, channels: usize) -> Result<Option<Cabinet>, String> {
        match self.heard_cabinet() {
            CabinetChoice::None => Ok(None),
            CabinetChoice::BuiltIn => Cabinet::builtin(rate, channels)
                .map(Some)
                .map_err(|e| format!("built-in cabinet: {e}")),
            CabinetChoice::File { path, ir } => {
                Cabinet::new(ir, rate, channels).map(Some).map_err(|e| {
                    format!(
                        "cabinet '{}' at {rate} Hz: {e}",
                        clip(&path.display().to_string(), 80)
                    )
                })
            }
        }
    }

    /// The cabinet over whole channels (already scaled to full-scale units); unchanged without one. A mono
    /// signal through a stereo response comes out stereo.
    pub fn through_cabinet(
        &self,
        channels: Vec<Vec<f32>>,
        rate: f64,
    ) -> Result<Vec<Vec<f32>>, String> {
        match self.make_cabinet(rate, channels.len())? {
            None => Ok(channels),
            Some(mut cab) => Ok(cab.render(&channels)),
        }
    }

    /// One line for reports and messages, e.g. "tone stack output, then the built-in cabinet".
    pub fn describe(&self, circuit: &Circuit) -> String {
        let stage = if circuit.tone_stack.is_some() {
            "tone stack output"
        } else {
            "level pot wiper (the circuit has no tone stack)"
        };
        match (self.point, self.heard_cabinet()) {
            (Point::Wiper, _) => "level pot wiper, bare: no tone stack, no cabinet".into(),
            (Point::Chain, CabinetChoice::None) => format!("{stage}, no cabinet"),
            (Point::Chain, CabinetChoice::BuiltIn) => format!("{stage}, then the built-in cabinet"),
            (Point::Chain, CabinetChoice::File { path, .. }) => format!(
                "{stage}, then the cabinet '{}'",
                clip(
                    &path
                        .file_name()
                        .map(|n| n.to_string_lossy().into_owned())
                        .unwrap_or_default(),
                    60
                )
            ),
        }
    }

    /// Short names for machine-readable reports: ("chain"|"wiper", "builtin"|"none"|file name).
    pub fn names(&self) -> (&'static str, String) {
        let point = match self.point {
            Point::Chain => "chain",
            Point::Wiper => "wiper",
        };
        let cab = match self.heard_cabinet() {
            CabinetChoice::BuiltIn => "builtin".to_string(),
            CabinetChoice::None => "none".to_string(),
            CabinetChoice::File { path, .. } => path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default(),
        };
        (point, cab)
    }
}
