//! Impulse responses for the cabinet: a WAV file's bytes as the session keeps them (base64 text in the
//! persisted field, so a saved session reopens with the same response on another machine), and the checks a
//! file passes before it becomes the running cabinet (off the audio thread: decoding, `Cabinet::new`).

use breakdown_dsp::cabinet::{Cabinet, ImpulseResponse, MAX_SECONDS};
use breakdown_dsp::wav::{self, Limits};

/// Largest impulse-response file accepted (bytes): 4 MiB. A cabinet response is at most `MAX_SECONDS` (2 s)
/// long; 2 s of stereo 32-bit float at 192 kHz is 3.1 MB, so every response the cabinet takes at the usual
/// rates fits, and the session's saved state stays bounded (base64 adds a third).
pub const MAX_IR_FILE_BYTES: usize = 4 * 1024 * 1024;

/// Rate the editor and the state check try a response at before it is accepted (Hz). The audio thread's
/// cabinet is built at the session's own rate by the worker.
pub const CHECK_RATE: f64 = 48_000.0;

const ALPHABET: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";

/// Base64 (RFC 4648 section 4, with padding).
pub fn encode_base64(bytes: &[u8]) -> String {
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for chunk in bytes.chunks(3) {
        let b = [
            chunk[0],
            chunk.get(1).copied().unwrap_or(0),
            chunk.get(2).copied().unwrap_or(0),
        ];
        let n = ((b[0] as u32) << 16) | ((b[1] as u32) << 8) | b[2] as u32;
        for k in 0..4 {
            if k <= chunk.len() {
                out.push(ALPHABET[((n >> (18 - 6 * k)) & 63) as usize] as char);
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// Decode base64 (RFC 4648 section 4; padding required, no white space); None when the text is not that.
pub fn decode_base64(text: &str) -> Option<Vec<u8>> {
    let t = text.as_bytes();
    if !t.len().is_multiple_of(4) {
        return None;
    }
    let value = |c: u8| -> Option<u32> {
        Some(match c {
            b'A'..=b'Z' => c - b'A',
            b'a'..=b'z' => c - b'a' + 26,
            b'0'..=b'9' => c - b'0' + 52,
            b'+' => 62,
            b'/' => 63,
            _ => return None,
        } as u32)
    };
    let mut out = Vec::with_capacity(t.len() / 4 * 3);
    let quads = t.len() / 4;
    for (q, chunk) in t.chunks(4).enumerate() {
        let pad = chunk.iter().rev().take_while(|&&c| c == b'=').count();
        if pad > 2 || (pad > 0 && q + 1 != quads) {
            return None;
        }
        let mut n = 0u32;
        for &c in &chunk[..4 - pad] {
            n = (n << 6) | value(c)?;
        }
        n <<= 6 * pad as u32;
        let bytes = [(n >> 16) as u8, (n >> 8) as u8, n as u8];
        out.extend_from_slice(&bytes[..3 - pad]);
    }
    Some(out)
}

/// A response that passed the checks, with what the editor shows about it.
#[derive(Clone, Debug, PartialEq)]
pub struct CheckedIr {
    pub response: ImpulseResponse,
    /// "48 kHz, 0.250 s, mono".
    pub summary: String,
}

/// Check a WAV file's bytes as a cabinet response: not over `MAX_IR_FILE_BYTES`, a WAV file the reader takes
/// (`WavError`: not audio, an unsupported format, NaN samples...), then one `Cabinet::new` would take
/// (`CabinetError`: empty, too long, silent...). Messages name the file as `shown`.
pub fn check_ir_bytes(bytes: &[u8], shown: &str) -> Result<CheckedIr, String> {
    if bytes.len() > MAX_IR_FILE_BYTES {
        return Err(format!(
            "'{shown}' is {} bytes; an impulse-response file may be at most {MAX_IR_FILE_BYTES} bytes \
             (4 MiB; a cabinet response is at most {MAX_SECONDS} s long: trim the file or save it at a lower \
             rate or bit depth)",
            bytes.len()
        ));
    }
    let w = wav::parse(bytes, shown, &Limits::default()).map_err(|e| e.to_string())?;
    let response = ImpulseResponse {
        channels: w.audio.channels,
        sample_rate: w.audio.rate as f64,
    };
    Cabinet::new(&response, CHECK_RATE, 1).map_err(|e| format!("'{shown}': {e}"))?;
    let frames = response.channels.first().map_or(0, Vec::len);
    let summary = format!(
        "{} kHz, {:.3} s, {}",
        response.sample_rate / 1000.0,
        frames as f64 / response.sample_rate,
        if response.channels.len() == 2 {
            "stereo"
        } else {
            "mono"
        }
    );
    Ok(CheckedIr { response, summary })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base64_matches_the_rfc_4648_test_vectors() {
        // RFC 4648 section 10.
        let vectors = [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ];
        for (plain, coded) in vectors {
            assert_eq!(encode_base64(plain.as_bytes()), coded);
            assert_eq!(decode_base64(coded).as_deref(), Some(plain.as_bytes()));
        }
        let all: Vec<u8> = (0..=255u8).collect();
        assert_eq!(decode_base64(&encode_base64(&all)), Some(all));
        for bad in ["Zg=", "Z===", "Zm9v!A==", "Zg==Zm9v", "Zm 9v"] {
            assert_eq!(decode_base64(bad), None, "{bad}");
        }
    }
}
