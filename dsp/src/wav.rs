//! The project's one WAV reader: DI files for the command line, impulse responses for the plugin.
//!
//! Reads the RIFF chunks itself (hound reads neither RF64 nor 64-bit float, and trusts the declared data size):
//! 8-bit unsigned and 16/24/32-bit signed integer PCM, 32/64-bit IEEE float, WAVE_FORMAT_EXTENSIBLE (with
//! fewer valid bits than the container), mono or stereo, any rate; RF64/BW64 with its `ds64` chunk; chunks of
//! odd size followed by their pad byte; chunks in any order. Samples become `f32` full-scale units (1.0 =
//! 0 dBFS; a B-bit integer s reads s / 2^(B-1), the WAVE PCM convention).
//!
//! What it refuses, each with a message that names the file: not a WAV file, an unsupported format, more than
//! two channels, a rate of 0 Hz, a file longer than [`Limits::max_seconds`] (length and bound stated),
//! non-finite samples (how many, and the time of the first) and samples beyond [`Limits::max_magnitude`] full
//! scale (time, value and, with a calibration, the volts that would be at the jack).
//!
//! What it tolerates, with a note: a header claiming more data than the file holds (it never reserves more
//! than the file really holds: memory is bounded by the file's length), and a file ending in an incomplete
//! frame (the partial frame is dropped).

use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::Path;

/// Longest file read by default (s): 60 minutes.
pub const MAX_SECONDS: f64 = 3600.0;
/// Samples beyond this many times full scale are refused by default: no interface or editor writes them on
/// purpose (a float file holding 1e30 is a damaged or mis-scaled file, not a guitar).
pub const MAX_MAGNITUDE: f64 = 16.0;
/// Most channels read: mono or stereo.
pub const MAX_CHANNELS: usize = 2;
/// A file whose every sample is below this (full scale) is silent: under one step of 24-bit audio (2^-23).
pub const SILENCE: f64 = 1.0 / 8_388_608.0;

/// A refusal, naming the file.
#[derive(Clone, Debug, PartialEq)]
pub struct WavError(pub String);

impl std::fmt::Display for WavError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for WavError {}

/// What a reader accepts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Limits {
    /// Longest file (s).
    pub max_seconds: f64,
    /// Largest sample magnitude (full-scale units).
    pub max_magnitude: f64,
    /// Peak volts at the input jack for a full-scale sample, when the file is a DI: named in the message for
    /// samples beyond `max_magnitude`.
    pub volts_at_full_scale: Option<f64>,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_seconds: MAX_SECONDS,
            max_magnitude: MAX_MAGNITUDE,
            volts_at_full_scale: None,
        }
    }
}

/// Audio in full-scale units (1.0 = 0 dBFS), one `Vec` per channel, all the same length.
#[derive(Clone, Debug, PartialEq)]
pub struct Audio {
    pub rate: u32,
    pub channels: Vec<Vec<f32>>,
}

/// The largest sample magnitude of a file and where it is.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Peak {
    /// Full-scale units (>= 0).
    pub value: f64,
    pub frame: usize,
    pub channel: usize,
}

impl Audio {
    /// Frames (samples per channel).
    pub fn frames(&self) -> usize {
        self.channels.first().map_or(0, Vec::len)
    }

    /// Duration in seconds.
    pub fn seconds(&self) -> f64 {
        if self.rate == 0 {
            0.0
        } else {
            self.frames() as f64 / self.rate as f64
        }
    }

    /// The largest magnitude and where it is (NaN samples are skipped).
    pub fn peak(&self) -> Peak {
        let mut peak = Peak::default();
        for (c, samples) in self.channels.iter().enumerate() {
            for (n, x) in samples.iter().enumerate() {
                let a = x.abs() as f64;
                if a > peak.value {
                    peak = Peak {
                        value: a,
                        frame: n,
                        channel: c,
                    };
                }
            }
        }
        peak
    }

    /// Every sample below [`SILENCE`] (or no samples at all).
    pub fn is_silent(&self) -> bool {
        self.peak().value < SILENCE
    }
}

/// A file read: the audio, what it held, and notes on what was tolerated.
#[derive(Clone, Debug, PartialEq)]
pub struct Wav {
    pub audio: Audio,
    /// "24-bit integer", "32-bit float", ...
    pub format: String,
    pub peak: Peak,
    /// Things the reader tolerated (a short data chunk, a dropped partial frame), one sentence each.
    pub notes: Vec<String>,
}

/// "m:ss.mmm" of a frame at `rate`.
pub fn time_of(frame: usize, rate: u32) -> String {
    let seconds = frame as f64 / rate.max(1) as f64;
    let minutes = (seconds / 60.0).floor();
    format!("{}:{:06.3}", minutes as u64, seconds - 60.0 * minutes)
}

/// Read the WAV file at `path`; messages name it as `shown` (pass the name the user gave, never a temporary
/// path).
pub fn read_file(path: &Path, shown: &str, limits: &Limits) -> Result<Wav, WavError> {
    if path.is_dir() {
        return Err(WavError(format!(
            "cannot open '{shown}': it is a folder, not a WAV file"
        )));
    }
    let file = File::open(path).map_err(|e| {
        WavError(format!(
            "cannot open '{shown}': {}",
            match e.kind() {
                std::io::ErrorKind::NotFound => "No such file".to_string(),
                std::io::ErrorKind::PermissionDenied => "permission denied".to_string(),
                _ => e.to_string(),
            }
        ))
    })?;
    let length = file
        .metadata()
        .map_err(|e| WavError(format!("cannot read '{shown}': {e}")))?
        .len();
    read(BufReader::new(file), length, shown, limits)
}

/// Read a WAV file held in memory.
pub fn parse(bytes: &[u8], shown: &str, limits: &Limits) -> Result<Wav, WavError> {
    read(
        std::io::Cursor::new(bytes),
        bytes.len() as u64,
        shown,
        limits,
    )
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum Kind {
    Int,
    Float,
}

#[derive(Clone, Copy, Debug)]
struct Format {
    kind: Kind,
    channels: usize,
    rate: u32,
    /// Bytes per sample in the container.
    bytes: usize,
    block_align: usize,
}

fn le16(b: &[u8]) -> u16 {
    u16::from_le_bytes([b[0], b[1]])
}
fn le32(b: &[u8]) -> u32 {
    u32::from_le_bytes([b[0], b[1], b[2], b[3]])
}
fn le64(b: &[u8]) -> u64 {
    u64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]])
}

const WAVE_FORMAT_PCM: u16 = 1;
const WAVE_FORMAT_IEEE_FLOAT: u16 = 3;
const WAVE_FORMAT_EXTENSIBLE: u16 = 0xFFFE;
const SUPPORTED: &str =
    "Breakdown reads 8/16/24/32-bit integer and 32/64-bit float PCM, plain or WAVE_FORMAT_EXTENSIBLE";

fn parse_fmt(body: &[u8], shown: &str) -> Result<Format, WavError> {
    let bad = |why: String| WavError(format!("'{shown}' cannot be read: {why}"));
    if body.len() < 16 {
        return Err(bad(format!(
            "its fmt chunk is {} bytes, shorter than the 16 a WAV format needs",
            body.len()
        )));
    }
    let mut tag = le16(&body[0..]);
    let channels = le16(&body[2..]) as usize;
    let rate = le32(&body[4..]);
    let block_align = le16(&body[12..]) as usize;
    let bits = le16(&body[14..]) as usize;
    if tag == WAVE_FORMAT_EXTENSIBLE {
        if body.len() < 40 {
            return Err(bad(
                "it says WAVE_FORMAT_EXTENSIBLE but its fmt chunk is shorter than 40 bytes".into(),
            ));
        }
        let valid = le16(&body[18..]) as usize;
        if valid > bits {
            return Err(bad(format!(
                "it says {valid} valid bits in a {bits}-bit container"
            )));
        }
        // The sub-format GUID starts with the plain format tag.
        tag = le16(&body[24..]);
    }
    if channels == 0 || channels > MAX_CHANNELS {
        return Err(WavError(format!(
            "'{shown}' has {channels} channels; Breakdown takes mono or stereo"
        )));
    }
    if rate == 0 {
        return Err(WavError(format!(
            "'{shown}' declares a sample rate of 0 Hz"
        )));
    }
    let kind = match (tag, bits) {
        (WAVE_FORMAT_PCM, 8 | 16 | 24 | 32) => Kind::Int,
        (WAVE_FORMAT_IEEE_FLOAT, 32 | 64) => Kind::Float,
        (WAVE_FORMAT_PCM, b) => {
            return Err(WavError(format!(
                "'{shown}' is {b}-bit integer PCM; {SUPPORTED}"
            )))
        }
        (WAVE_FORMAT_IEEE_FLOAT, b) => {
            return Err(WavError(format!("'{shown}' is {b}-bit float; {SUPPORTED}")))
        }
        (t, _) => {
            return Err(WavError(format!(
                "'{shown}' uses WAV format tag {t:#06x} (compressed or unknown); {SUPPORTED}"
            )))
        }
    };
    let bytes = bits / 8;
    if block_align != channels * bytes {
        return Err(bad(format!(
            "its block size is {block_align} bytes, but {channels} channel(s) of {bits}-bit samples take {}",
            channels * bytes
        )));
    }
    Ok(Format {
        kind,
        channels,
        rate,
        bytes,
        block_align,
    })
}

/// Read a WAV stream of `length` bytes.
pub fn read<R: Read + Seek>(
    mut r: R,
    length: u64,
    shown: &str,
    limits: &Limits,
) -> Result<Wav, WavError> {
    let io = |e: std::io::Error| WavError(format!("cannot read '{shown}': {e}"));
    let not_wav = |why: &str| WavError(format!("'{shown}' is not a WAV file: {why}"));
    let mut head = [0u8; 12];
    if length < 12 {
        return Err(not_wav("it is shorter than a WAV header (12 bytes)"));
    }
    r.read_exact(&mut head).map_err(io)?;
    let rf64 = match &head[0..4] {
        b"RIFF" => false,
        b"RF64" | b"BW64" => true,
        _ => return Err(not_wav("it does not start with RIFF (or RF64)")),
    };
    if &head[8..12] != b"WAVE" {
        return Err(not_wav("its RIFF form is not WAVE"));
    }
    let mut notes = Vec::new();
    let mut position: u64 = 12;
    let mut format: Option<Format> = None;
    let mut ds64_data: Option<u64> = None;
    // (offset of the audio, declared length)
    let mut data: Option<(u64, u64)> = None;
    while position + 8 <= length {
        let mut header = [0u8; 8];
        r.seek(SeekFrom::Start(position)).map_err(io)?;
        r.read_exact(&mut header).map_err(io)?;
        let id = [header[0], header[1], header[2], header[3]];
        let mut size = le32(&header[4..]) as u64;
        let body = position + 8;
        let available = length - body;
        match &id {
            b"ds64" if rf64 => {
                if size < 24 || available < 24 {
                    return Err(WavError(format!(
                        "'{shown}' cannot be read: its ds64 chunk is shorter than 24 bytes"
                    )));
                }
                let mut b = [0u8; 24];
                r.read_exact(&mut b).map_err(io)?;
                ds64_data = Some(le64(&b[8..]));
            }
            b"fmt " => {
                // A fmt chunk is at most 40 bytes of use; anything longer is extension data.
                let take = size.min(available).min(64) as usize;
                let mut b = vec![0u8; take];
                r.read_exact(&mut b).map_err(io)?;
                if format.is_none() {
                    format = Some(parse_fmt(&b, shown)?);
                }
            }
            b"data" if data.is_none() => {
                if rf64 && size == u32::MAX as u64 {
                    size = ds64_data.unwrap_or(available);
                } else if size == u32::MAX as u64 {
                    // A writer that never came back to fill in the size: the data runs to the end.
                    size = available;
                }
                if size > available {
                    notes.push(format!(
                        "the header claims {size} bytes of audio but the file holds only {available}: read what is there"
                    ));
                    size = available;
                }
                data = Some((body, size));
            }
            _ => {}
        }
        // Chunks of odd size are followed by a pad byte.
        position = body.saturating_add(size).saturating_add(size & 1);
    }
    let format = format.ok_or_else(|| {
        WavError(format!(
            "'{shown}' cannot be read: it has no fmt chunk (the sample format is unknown)"
        ))
    })?;
    let (offset, size) = data.ok_or_else(|| {
        WavError(format!(
            "'{shown}' cannot be read: it has no data chunk (no audio)"
        ))
    })?;
    let frames = (size / format.block_align as u64) as usize;
    let partial = size % format.block_align as u64;
    if partial != 0 {
        notes.push(format!(
            "the file ends in an incomplete frame ({partial} of {} bytes): dropped",
            format.block_align
        ));
    }
    let seconds = frames as f64 / format.rate as f64;
    if seconds > limits.max_seconds {
        return Err(WavError(format!(
            "'{shown}' is {:.1} minutes long; Breakdown reads at most {:.0} minutes (a longer file would take \
             too long and too much memory: cut it)",
            seconds / 60.0,
            limits.max_seconds / 60.0
        )));
    }
    r.seek(SeekFrom::Start(offset)).map_err(io)?;
    decode(r, format, frames, shown, limits, notes)
}

fn decode<R: Read>(
    mut r: R,
    f: Format,
    frames: usize,
    shown: &str,
    limits: &Limits,
    notes: Vec<String>,
) -> Result<Wav, WavError> {
    // `frames` is bounded by the bytes the file really holds, so this reserves at most four times the file.
    let mut channels: Vec<Vec<f32>> = (0..f.channels)
        .map(|_| Vec::with_capacity(frames))
        .collect();
    let mut block = vec![0u8; f.block_align * 4096];
    let mut done = 0usize;
    let mut non_finite = 0usize;
    let mut first_bad: Option<(usize, usize)> = None;
    let mut peak = Peak::default();
    let int_scale = 1.0 / (1u64 << (8 * f.bytes - 1)) as f64;
    while done < frames {
        let count = (frames - done).min(4096);
        let bytes = &mut block[..count * f.block_align];
        r.read_exact(bytes).map_err(|e| {
            WavError(format!(
                "'{shown}' cannot be read at {}: {e}",
                time_of(done, f.rate)
            ))
        })?;
        for (k, frame) in bytes.chunks_exact(f.block_align).enumerate() {
            for (c, s) in frame.chunks_exact(f.bytes).enumerate() {
                let x: f64 = match (f.kind, f.bytes) {
                    (Kind::Int, 1) => (s[0] as f64 - 128.0) / 128.0,
                    (Kind::Int, 2) => i16::from_le_bytes([s[0], s[1]]) as f64 * int_scale,
                    (Kind::Int, 3) => {
                        (i32::from_le_bytes([0, s[0], s[1], s[2]]) >> 8) as f64 * int_scale
                    }
                    (Kind::Int, _) => {
                        i32::from_le_bytes([s[0], s[1], s[2], s[3]]) as f64 * int_scale
                    }
                    (Kind::Float, 4) => f32::from_le_bytes([s[0], s[1], s[2], s[3]]) as f64,
                    (Kind::Float, _) => {
                        f64::from_le_bytes([s[0], s[1], s[2], s[3], s[4], s[5], s[6], s[7]])
                    }
                };
                let n = done + k;
                if !x.is_finite() {
                    non_finite += 1;
                    first_bad.get_or_insert((n, c));
                    channels[c].push(0.0);
                    continue;
                }
                if x.abs() > peak.value {
                    peak = Peak {
                        value: x.abs(),
                        frame: n,
                        channel: c,
                    };
                }
                channels[c].push(x as f32);
            }
        }
        done += count;
    }
    if let Some((frame, channel)) = first_bad {
        let total = frames * f.channels;
        let all = if non_finite == total {
            " (every sample: the file holds no audio)"
        } else {
            ""
        };
        return Err(WavError(format!(
            "'{shown}' holds {non_finite} non-finite samples (NaN or infinity){all}, the first at {} in channel {}; \
             Breakdown will not guess what they stood for: repair or re-export the file",
            time_of(frame, f.rate),
            channel + 1
        )));
    }
    if peak.value > limits.max_magnitude {
        let volts = match limits.volts_at_full_scale {
            Some(v) => format!(
                ", which is {} at the input jack with {} at full scale",
                crate::units::si(peak.value * v, "V"),
                crate::units::si(v, "V")
            ),
            None => String::new(),
        };
        return Err(WavError(format!(
            "'{shown}' has a sample of {} full scale at {} in channel {}{volts}; Breakdown reads at most {}x full \
             scale (a float file this far beyond 0 dBFS is damaged or mis-scaled)",
            crate::units::significant(peak.value, 4),
            time_of(peak.frame, f.rate),
            peak.channel + 1,
            limits.max_magnitude
        )));
    }
    let kind = match f.kind {
        Kind::Int => "integer",
        Kind::Float => "float",
    };
    Ok(Wav {
        audio: Audio {
            rate: f.rate,
            channels,
        },
        format: format!("{}-bit {kind}", f.bytes * 8),
        peak,
        notes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A RIFF/WAVE file of our own making, chunk by chunk (the layout of the Microsoft/IBM RIFF specification,
    /// 1991, and the EBU Tech 3306 RF64 specification for `ds64`).
    fn riff(form: &[u8; 4], chunks: &[(&[u8; 4], Vec<u8>)]) -> Vec<u8> {
        let mut body = b"WAVE".to_vec();
        for (id, data) in chunks {
            body.extend_from_slice(*id);
            body.extend_from_slice(&(data.len() as u32).to_le_bytes());
            body.extend_from_slice(data);
            if data.len() % 2 == 1 {
                body.push(0);
            }
        }
        let mut out = form.to_vec();
        out.extend_from_slice(&(body.len() as u32).to_le_bytes());
        out.extend(body);
        out
    }

    fn fmt(tag: u16, channels: u16, rate: u32, bits: u16) -> Vec<u8> {
        let align = channels * bits / 8;
        let mut v = Vec::new();
        v.extend_from_slice(&tag.to_le_bytes());
        v.extend_from_slice(&channels.to_le_bytes());
        v.extend_from_slice(&rate.to_le_bytes());
        v.extend_from_slice(&(rate * align as u32).to_le_bytes());
        v.extend_from_slice(&align.to_le_bytes());
        v.extend_from_slice(&bits.to_le_bytes());
        v
    }

    fn extensible(sub: u16, channels: u16, rate: u32, bits: u16, valid: u16) -> Vec<u8> {
        let mut v = fmt(WAVE_FORMAT_EXTENSIBLE, channels, rate, bits);
        v.extend_from_slice(&22u16.to_le_bytes());
        v.extend_from_slice(&valid.to_le_bytes());
        v.extend_from_slice(&0u32.to_le_bytes()); // channel mask
        v.extend_from_slice(&sub.to_le_bytes());
        // The rest of the KSDATAFORMAT_SUBTYPE GUID {xxxx0000-0000-0010-8000-00AA00389B71}.
        v.extend_from_slice(&[
            0x00, 0x00, 0x00, 0x00, 0x10, 0x00, 0x80, 0x00, 0x00, 0xAA, 0x00, 0x38, 0x9B, 0x71,
        ]);
        v
    }

    fn ok(bytes: &[u8]) -> Wav {
        parse(bytes, "take.wav", &Limits::default()).unwrap()
    }

    fn err(bytes: &[u8]) -> String {
        parse(bytes, "take.wav", &Limits::default()).unwrap_err().0
    }

    #[test]
    fn reads_every_integer_width_by_the_pcm_convention() {
        // WAVE PCM: 8-bit is unsigned with 128 as zero; wider samples are signed, s / 2^(B-1).
        let w = ok(&riff(
            b"RIFF",
            &[
                (b"fmt ", fmt(1, 1, 8000, 8)),
                (b"data", vec![0, 128, 255, 64]),
            ],
        ));
        assert_eq!(w.audio.channels, vec![vec![-1.0, 0.0, 127.0 / 128.0, -0.5]]);
        let d: Vec<u8> = [i16::MIN, 0, 16384, i16::MAX]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(1, 2, 44_100, 16)), (b"data", d)],
        ));
        assert_eq!(
            w.audio.channels,
            vec![vec![-1.0, 0.5], vec![0.0, 32767.0 / 32768.0]]
        );
        let d = vec![0x00, 0x00, 0x80, 0xFF, 0xFF, 0x7F, 0x00, 0x00, 0x40];
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(1, 1, 48_000, 24)), (b"data", d)],
        ));
        assert_eq!(
            w.audio.channels[0],
            vec![-1.0, 8_388_607.0 / 8_388_608.0, 0.5]
        );
        let d: Vec<u8> = [i32::MIN, 1 << 30]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(1, 1, 96_000, 32)), (b"data", d)],
        ));
        assert_eq!(w.audio.channels[0], vec![-1.0, 0.5]);
        assert_eq!(w.format, "32-bit integer");
    }

    #[test]
    fn reads_32_and_64_bit_float_and_extensible() {
        let d: Vec<u8> = [0.25f32, -1.5]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(3, 1, 48_000, 32)), (b"data", d)],
        ));
        assert_eq!(w.audio.channels[0], vec![0.25, -1.5]);
        let d: Vec<u8> = [0.125f64, -0.75, 1.0, 0.0]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", extensible(3, 2, 48_000, 64, 64)), (b"data", d)],
        ));
        assert_eq!(w.audio.channels, vec![vec![0.125, 1.0], vec![-0.75, 0.0]]);
        assert_eq!(w.format, "64-bit float");
        // 24 valid bits left-justified in a 32-bit container read by the container's scale.
        let d: Vec<u8> = [0x4000_0000i32]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", extensible(1, 1, 48_000, 32, 24)), (b"data", d)],
        ));
        assert_eq!(w.audio.channels[0], vec![0.5]);
    }

    #[test]
    fn odd_chunk_and_its_pad_byte_are_skipped() {
        // A 3-byte chunk before fmt: its pad byte must be skipped or every later chunk is misread.
        let d: Vec<u8> = [1000i16, -1000]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let w = ok(&riff(
            b"RIFF",
            &[
                (b"junk", vec![1, 2, 3]),
                (b"fmt ", fmt(1, 1, 48_000, 16)),
                (b"LIST", vec![9; 5]),
                (b"data", d),
            ],
        ));
        assert_eq!(
            w.audio.channels[0],
            vec![1000.0 / 32768.0, -1000.0 / 32768.0]
        );
    }

    #[test]
    fn data_before_fmt_is_read() {
        let d: Vec<u8> = [0.5f32].iter().flat_map(|v| v.to_le_bytes()).collect();
        let w = ok(&riff(
            b"RIFF",
            &[(b"data", d), (b"fmt ", fmt(3, 1, 48_000, 32))],
        ));
        assert_eq!(w.audio.channels[0], vec![0.5]);
    }

    #[test]
    fn rf64_takes_the_data_size_from_ds64() {
        // EBU Tech 3306: RF64 files put 0xFFFFFFFF in the 32-bit sizes and the real ones in ds64.
        let samples: Vec<u8> = [0.5f32, -0.5, 0.25]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let mut ds64 = Vec::new();
        ds64.extend_from_slice(&0u64.to_le_bytes());
        ds64.extend_from_slice(&(samples.len() as u64).to_le_bytes());
        ds64.extend_from_slice(&3u64.to_le_bytes());
        ds64.extend_from_slice(&0u32.to_le_bytes());
        let mut bytes = riff(
            b"RF64",
            &[(b"ds64", ds64), (b"fmt ", fmt(3, 1, 48_000, 32))],
        );
        bytes.extend_from_slice(b"data");
        bytes.extend_from_slice(&u32::MAX.to_le_bytes());
        bytes.extend_from_slice(&samples);
        let w = ok(&bytes);
        assert_eq!(w.audio.channels[0], vec![0.5, -0.5, 0.25]);
        assert!(w.notes.is_empty(), "{:?}", w.notes);
    }

    #[test]
    fn incomplete_last_frame_is_dropped_with_a_note() {
        let mut d: Vec<u8> = [100i16, 200, 300, 400]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        d.extend_from_slice(&[1, 2]); // half a stereo frame
        let w = ok(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(1, 2, 48_000, 16)), (b"data", d)],
        ));
        assert_eq!(w.audio.frames(), 2);
        assert!(
            w.notes.iter().any(|n| n.contains("incomplete frame")),
            "{:?}",
            w.notes
        );
    }

    #[test]
    fn huge_declared_size_reads_what_is_there() {
        let mut bytes = riff(b"RIFF", &[(b"fmt ", fmt(1, 1, 48_000, 16))]);
        bytes.extend_from_slice(b"data");
        bytes.extend_from_slice(&0xFFFF_FFF0u32.to_le_bytes());
        bytes.extend_from_slice(&[0, 64, 0, 192]);
        let w = ok(&bytes);
        assert_eq!(w.audio.channels[0], vec![0.5, -0.5]);
        assert!(w.audio.channels[0].capacity() < 1024);
        assert!(
            w.notes.iter().any(|n| n.contains("claims")),
            "{:?}",
            w.notes
        );
    }

    #[test]
    fn too_long_is_refused_with_length_and_bound() {
        // 2 s at 1 Hz... a limit of 1 s: "0.0 minutes" would not name it, so use a limit in minutes.
        let d = vec![0u8; 2 * 130];
        let bytes = riff(b"RIFF", &[(b"fmt ", fmt(1, 1, 1, 16)), (b"data", d)]);
        let limits = Limits {
            max_seconds: 120.0,
            ..Limits::default()
        };
        let e = parse(&bytes, "long.wav", &limits).unwrap_err().0;
        assert!(
            e.contains("long.wav") && e.contains("2.2 minutes") && e.contains("at most 2 minutes"),
            "{e}"
        );
    }

    #[test]
    fn non_finite_samples_are_refused_with_count_and_time() {
        let mut v = vec![0.0f32; 48_000];
        v[24_000] = f32::NAN;
        v[30_000] = f32::INFINITY;
        let d: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        let e = err(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(3, 1, 48_000, 32)), (b"data", d)],
        ));
        assert!(
            e.contains("take.wav") && e.contains("2 non-finite") && e.contains("0:00.500"),
            "{e}"
        );
        let d: Vec<u8> = [f64::NAN; 4].iter().flat_map(|x| x.to_le_bytes()).collect();
        let e = err(&riff(
            b"RIFF",
            &[(b"fmt ", fmt(3, 1, 48_000, 64)), (b"data", d)],
        ));
        assert!(e.contains("every sample"), "{e}");
    }

    #[test]
    fn samples_far_beyond_full_scale_name_time_value_and_volts() {
        let mut v = vec![0.1f32; 4800];
        v[2400] = 1e30;
        let d: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        let bytes = riff(b"RIFF", &[(b"fmt ", fmt(3, 1, 48_000, 32)), (b"data", d)]);
        let limits = Limits {
            volts_at_full_scale: Some(1.0),
            ..Limits::default()
        };
        let e = parse(&bytes, "hot.wav", &limits).unwrap_err().0;
        assert!(
            e.contains("hot.wav") && e.contains("0:00.050") && e.contains("1.000e30"),
            "{e}"
        );
        assert!(
            e.contains("at the input jack with 1 V at full scale") && e.contains("16x"),
            "{e}"
        );
        // 15x full scale is allowed (a float file may go over 0 dBFS).
        let d: Vec<u8> = [15.0f32].iter().flat_map(|x| x.to_le_bytes()).collect();
        assert_eq!(
            ok(&riff(
                b"RIFF",
                &[(b"fmt ", fmt(3, 1, 48_000, 32)), (b"data", d)]
            ))
            .peak
            .value,
            15.0
        );
    }

    #[test]
    fn refusals_name_the_file() {
        for (bytes, words) in [
            (b"just text, not audio".to_vec(), "is not a WAV file"),
            (riff(b"RIFF", &[(b"data", vec![0; 4])]), "no fmt chunk"),
            (
                riff(b"RIFF", &[(b"fmt ", fmt(1, 1, 48_000, 16))]),
                "no data chunk",
            ),
            (
                riff(
                    b"RIFF",
                    &[(b"fmt ", fmt(1, 6, 48_000, 16)), (b"data", vec![0; 12])],
                ),
                "6 channels",
            ),
            (
                riff(
                    b"RIFF",
                    &[(b"fmt ", fmt(1, 1, 0, 16)), (b"data", vec![0; 2])],
                ),
                "0 Hz",
            ),
            (
                riff(
                    b"RIFF",
                    &[(b"fmt ", fmt(1, 1, 48_000, 12)), (b"data", vec![0; 2])],
                ),
                "12-bit",
            ),
            (
                riff(
                    b"RIFF",
                    &[(b"fmt ", fmt(2, 1, 48_000, 4)), (b"data", vec![0; 2])],
                ),
                "format tag 0x0002",
            ),
        ] {
            let e = err(&bytes);
            assert!(e.contains("'take.wav'") && e.contains(words), "{e}");
        }
    }

    #[test]
    fn silence_is_told_apart() {
        let silent = Audio {
            rate: 48_000,
            channels: vec![vec![0.0; 10]],
        };
        assert!(silent.is_silent());
        let quiet = Audio {
            rate: 48_000,
            channels: vec![vec![0.0, 1e-4]],
        };
        assert!(!quiet.is_silent());
    }
}
