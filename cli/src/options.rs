//! What several subcommands share on the command line: the circuit file, the input calibration, the
//! oversampling factor, and the notes printed for renamed options.

use breakdown_dsp::units::{dbu_to_peak_volts, peak_volts_to_dbu, si, significant};
use breakdown_dsp::{Circuit, Quality};
use std::path::{Path, PathBuf};

/// Say that an old option name was used (it still works).
pub fn renamed(old: &str, new: &str) {
    eprintln!("note: {old} is now {new}");
}

/// `new` unless the hidden old spelling was given (then say so).
pub fn pick<T: Clone>(
    new: Option<&T>,
    old: Option<&T>,
    old_name: &str,
    new_name: &str,
) -> Option<T> {
    match (new, old) {
        (Some(v), _) => Some(v.clone()),
        (None, Some(v)) => {
            renamed(old_name, new_name);
            Some(v.clone())
        }
        (None, None) => None,
    }
}

/// Read and check a circuit file (messages from `breakdown_dsp::circuit`, prefixed with the file), or the
/// built-in preamp without one. The reader's notes (a renamed section, ...) go to stderr.
pub fn load_circuit(path: Option<&Path>) -> Result<Circuit, String> {
    let Some(path) = path else {
        return Ok(Circuit::builtin());
    };
    let shown = path.display();
    if path.is_dir() {
        return Err(format!("circuit file '{shown}' is a folder, not a file"));
    }
    let too_long = std::fs::metadata(path)
        .map(|m| m.len() > breakdown_dsp::circuit::MAX_FILE_BYTES as u64)
        .unwrap_or(false);
    if too_long {
        return Err(format!(
            "circuit file '{shown}' is longer than {} bytes: not a circuit file",
            breakdown_dsp::circuit::MAX_FILE_BYTES
        ));
    }
    let text = std::fs::read_to_string(path).map_err(|e| {
        let reason = match e.kind() {
            std::io::ErrorKind::NotFound => "No such file".to_string(),
            std::io::ErrorKind::InvalidData => "not a text file (not UTF-8)".to_string(),
            _ => e.to_string(),
        };
        format!("cannot open circuit file '{shown}': {reason}")
    })?;
    parse_circuit(&text, &shown.to_string())
}

/// Parse a circuit file's text, naming the file as `shown`; the notes go to stderr.
pub fn parse_circuit(text: &str, shown: &str) -> Result<Circuit, String> {
    let (circuit, notes) = Circuit::parse(text).map_err(|e| {
        let message = one_line(&e.0);
        let message = message
            .strip_prefix("circuit file: ")
            .unwrap_or(&message)
            .to_string();
        format!("circuit file '{shown}': {message}")
    })?;
    for n in notes {
        eprintln!("note: circuit file '{shown}': {n}");
    }
    Ok(circuit)
}

/// Fold a multi-line parser message into one line.
pub fn one_line(message: &str) -> String {
    let lines: Vec<&str> = message
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('|') && !l.contains(" | "))
        .collect();
    lines.join(": ")
}

/// Oversampling factor from "1", "2", "4", "8" or "16" (an "x" in front is accepted).
pub fn parse_quality(text: &str) -> Result<Quality, String> {
    let t = text.trim();
    let t = t.strip_prefix(['x', 'X']).unwrap_or(t);
    t.parse::<usize>()
        .ok()
        .and_then(Quality::from_factor)
        .ok_or_else(|| {
            format!(
                "--quality {}: expected an oversampling factor of 1, 2, 4, 8 or 16",
                breakdown_dsp::units::clip(text, 20)
            )
        })
}

/// Input calibration range: peak volts at the jack for a full-scale sample.
pub const CALIBRATION_VOLTS: (f64, f64) = (1e-3, 100.0);

/// The input calibration as given on the command line: in volts or in dBu (one of them).
#[derive(clap::Args, Clone, Debug, Default)]
pub struct CalibrationArgs {
    /// Input calibration: peak volts at the input jack for a full-scale (0 dBFS) sample, 0.001 .. 100 V.
    /// Overrides the plan's and the circuit file's [input] volts_at_full_scale (default: the circuit file's).
    #[arg(
        long,
        value_name = "V",
        allow_negative_numbers = true,
        conflicts_with = "input_dbu"
    )]
    pub volts_at_full_scale: Option<f64>,
    /// The same as "0 dBFS = X dBu": the level in dBu (0 dBu = 0.775 V rms) of a full-scale sine at the jack,
    /// -57.8 .. +39.2 dBu. Overrides the plan's and the circuit file's calibration.
    #[arg(long, value_name = "DBU", allow_negative_numbers = true)]
    pub input_dbu: Option<f64>,
}

/// An input calibration and where it came from.
#[derive(Clone, Debug, PartialEq)]
pub struct Calibration {
    pub volts_at_full_scale: f64,
    /// "the circuit file's [input] volts_at_full_scale", "--input-dbu", ...
    pub source: String,
}

impl Calibration {
    /// 0 dBFS in dBu (a full-scale sine).
    pub fn dbu(&self) -> f64 {
        peak_volts_to_dbu(self.volts_at_full_scale)
    }

    /// "1 V peak at the jack for 0 dBFS (0 dBFS = +2.2 dBu), from the circuit file".
    pub fn describe(&self) -> String {
        format!(
            "{} peak at the jack for 0 dBFS (0 dBFS = {:+.1} dBu), from {}",
            si(self.volts_at_full_scale, "V"),
            self.dbu(),
            self.source
        )
    }
}

/// Check a calibration in volts, naming `what` (an option or a plan key) in the message.
pub fn check_calibration_volts(what: &str, volts: f64) -> Result<f64, String> {
    let (lo, hi) = CALIBRATION_VOLTS;
    if volts.is_finite() && (lo..=hi).contains(&volts) {
        Ok(volts)
    } else {
        Err(format!(
            "{what} = {}: the input calibration must lie between {} and {} peak at the jack for 0 dBFS \
             (a finite, positive voltage)",
            significant(volts, 4),
            si(lo, "V"),
            si(hi, "V")
        ))
    }
}

/// Check a calibration in dBu and convert it to peak volts (0 dBu = 0.775 V rms; a full-scale sine).
pub fn check_calibration_dbu(what: &str, dbu: f64) -> Result<f64, String> {
    let (lo, hi) = CALIBRATION_VOLTS;
    let (dlo, dhi) = (peak_volts_to_dbu(lo), peak_volts_to_dbu(hi));
    if dbu.is_finite() && (dlo..=dhi).contains(&dbu) {
        Ok(dbu_to_peak_volts(dbu))
    } else {
        Err(format!(
            "{what} = {} dBu: the input calibration must lie between {dlo:+.1} and {dhi:+.1} dBu \
             ({} .. {} peak at the jack for 0 dBFS; 0 dBu = 0.775 V rms)",
            significant(dbu, 4),
            si(lo, "V"),
            si(hi, "V")
        ))
    }
}

impl CalibrationArgs {
    /// The command line's calibration, if any.
    pub fn given(&self) -> Result<Option<Calibration>, String> {
        match (self.volts_at_full_scale, self.input_dbu) {
            (Some(v), _) => Ok(Some(Calibration {
                volts_at_full_scale: check_calibration_volts("--volts-at-full-scale", v)?,
                source: "--volts-at-full-scale".into(),
            })),
            (None, Some(d)) => Ok(Some(Calibration {
                volts_at_full_scale: check_calibration_dbu("--input-dbu", d)?,
                source: format!("--input-dbu {}", significant(d, 4)),
            })),
            (None, None) => Ok(None),
        }
    }

    /// The command line's calibration, else the circuit's (which it then replaces in `circuit`).
    pub fn apply(
        &self,
        circuit: &mut Circuit,
        circuit_source: &str,
    ) -> Result<Calibration, String> {
        let c = self.given()?.unwrap_or_else(|| Calibration {
            volts_at_full_scale: circuit.input.volts_at_full_scale,
            source: format!("{circuit_source} ([input] volts_at_full_scale)"),
        });
        circuit.input.volts_at_full_scale = c.volts_at_full_scale;
        Ok(c)
    }
}

/// How a circuit option's source is named: "the circuit file 'x.toml'" or "the built-in circuit".
pub fn circuit_source(path: Option<&PathBuf>) -> String {
    match path {
        Some(p) => format!("the circuit file '{}'", p.display()),
        None => "the built-in circuit".into(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// 0 dBu = 0.775 V rms (the dBu definition), so a full-scale sine at +4 dBu peaks at 1.736 V.
    #[test]
    fn dbu_calibration_converts_by_the_definition() {
        let v = check_calibration_dbu("--input-dbu", 4.0).unwrap();
        assert!((v - 1.736).abs() < 1e-3, "{v}");
        let e = check_calibration_dbu("--input-dbu", 60.0).unwrap_err();
        assert!(
            e.contains("--input-dbu = 60 dBu") && e.contains("+39.2"),
            "{e}"
        );
        let e = check_calibration_volts("--volts-at-full-scale", -1.0).unwrap_err();
        assert!(
            e.contains("= -1") && e.contains("1 mV") && e.contains("100 V"),
            "{e}"
        );
    }
}
