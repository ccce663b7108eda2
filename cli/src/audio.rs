//! WAV files for the command-line tools: reading goes through the project's one reader
//! (`breakdown_dsp::wav`), with each command's own rules on silence and level; writing makes 32-bit float or
//! 24-bit integer WAV, complete or not at all (`crate::files::write_atomic`: a regular file is replaced only
//! when the new one is complete, a device node or FIFO is written in place).

// Not every subcommand uses every function.
#![allow(dead_code)]

pub use breakdown_dsp::wav::Audio;
use breakdown_dsp::wav::{self, Limits};
use std::io::Write;
use std::path::Path;

/// What a command makes of a silent file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Silence {
    /// Silence is a valid input (a render of silence is silence).
    Allow,
    /// Silence makes the job meaningless: refuse with this reason.
    Refuse(&'static str),
}

/// Read a WAV file (see `breakdown_dsp::wav` for what is read and refused), print what was tolerated on
/// stderr as "note: ...", and apply `silence`. `volts_at_full_scale` is the input calibration, named when a
/// sample lies far beyond full scale; messages name the file as `shown`.
pub fn read_input(
    path: &Path,
    shown: &str,
    volts_at_full_scale: Option<f64>,
    silence: Silence,
) -> Result<Audio, String> {
    let limits = Limits {
        volts_at_full_scale,
        ..Limits::default()
    };
    let w = wav::read_file(path, shown, &limits).map_err(|e| e.0)?;
    for n in &w.notes {
        eprintln!("note: '{shown}': {n}");
    }
    if let Silence::Refuse(why) = silence {
        if w.audio.frames() == 0 {
            return Err(format!("'{shown}' holds no audio (0 frames); {why}"));
        }
        if w.audio.is_silent() {
            return Err(format!(
                "'{shown}' is silent (every sample below {} full scale, one step of 24-bit audio); {why}",
                breakdown_dsp::units::significant(wav::SILENCE, 3)
            ));
        }
    }
    Ok(w.audio)
}

/// Read a WAV file with the default rules (silence allowed), naming it by its path.
pub fn read_wav(path: impl AsRef<Path>) -> Result<Audio, String> {
    let path = path.as_ref();
    read_input(path, &path.display().to_string(), None, Silence::Allow)
}

/// Largest WAV data chunk (bytes): the 32-bit RIFF size field.
const MAX_DATA_BYTES: u64 = u32::MAX as u64 - 64;

/// Refuse, before rendering, an output too large for a WAV file.
pub fn check_size(
    path: &Path,
    frames: usize,
    channels: usize,
    bytes_per_sample: usize,
) -> Result<(), String> {
    let bytes = frames as u64 * channels as u64 * bytes_per_sample as u64;
    if bytes > MAX_DATA_BYTES {
        return Err(format!(
            "cannot write '{}': {} of audio exceeds the 4 GiB a WAV file can hold; render a shorter input",
            path.display(),
            breakdown_dsp::units::si(bytes as f64, "B")
        ));
    }
    Ok(())
}

/// Write 32-bit float WAV (samples as given, 1.0 = full scale).
pub fn write_wav_f32(path: impl AsRef<Path>, audio: &Audio) -> Result<(), String> {
    write_with(path.as_ref(), audio, Encoding::Float32)
}

/// Write 24-bit integer WAV (samples limited to full scale; non-finite samples become 0).
pub fn write_wav_i24(path: impl AsRef<Path>, audio: &Audio) -> Result<(), String> {
    write_with(path.as_ref(), audio, Encoding::Int24)
}

#[derive(Clone, Copy)]
enum Encoding {
    Float32,
    Int24,
}

/// The WAV header (RIFF, fmt, for float a fact chunk, data) for `frames` frames: PCM (format 1) for integers,
/// IEEE float (format 3, with the fact chunk the RIFF specification asks of non-PCM formats).
fn header(audio: &Audio, encoding: Encoding) -> Vec<u8> {
    let channels = audio.channels.len() as u16;
    let (tag, bits): (u16, u16) = match encoding {
        Encoding::Float32 => (3, 32),
        Encoding::Int24 => (1, 24),
    };
    let align = channels * bits / 8;
    let data = audio.frames() as u32 * align as u32;
    let mut fmt = Vec::new();
    fmt.extend_from_slice(&tag.to_le_bytes());
    fmt.extend_from_slice(&channels.to_le_bytes());
    fmt.extend_from_slice(&audio.rate.to_le_bytes());
    fmt.extend_from_slice(&(audio.rate * align as u32).to_le_bytes());
    fmt.extend_from_slice(&align.to_le_bytes());
    fmt.extend_from_slice(&bits.to_le_bytes());
    let mut chunks: Vec<u8> = Vec::new();
    let mut chunk = |id: &[u8; 4], body: &[u8], len: u32| {
        chunks.extend_from_slice(id);
        chunks.extend_from_slice(&len.to_le_bytes());
        chunks.extend_from_slice(body);
    };
    if matches!(encoding, Encoding::Float32) {
        fmt.extend_from_slice(&0u16.to_le_bytes());
        chunk(b"fmt ", &fmt, fmt.len() as u32);
        chunk(b"fact", &(audio.frames() as u32).to_le_bytes(), 4);
    } else {
        chunk(b"fmt ", &fmt, fmt.len() as u32);
    }
    chunk(b"data", &[], data);
    let mut out = b"RIFF".to_vec();
    out.extend_from_slice(&(4 + chunks.len() as u32 + data + (data & 1)).to_le_bytes());
    out.extend_from_slice(b"WAVE");
    out.extend(chunks);
    out
}

fn write_with(path: &Path, audio: &Audio, encoding: Encoding) -> Result<(), String> {
    let shown = path.display();
    let count = audio.channels.len();
    if count == 0 || count > wav::MAX_CHANNELS {
        return Err(format!("cannot write '{shown}': {count} channels"));
    }
    if audio.rate == 0 {
        return Err(format!("cannot write '{shown}': sample rate 0 Hz"));
    }
    let frames = audio.frames();
    if audio.channels.iter().any(|c| c.len() != frames) {
        return Err(format!("cannot write '{shown}': channels differ in length"));
    }
    let bytes = match encoding {
        Encoding::Float32 => 4,
        Encoding::Int24 => 3,
    };
    check_size(path, frames, count, bytes)?;
    crate::files::write_atomic(path, |w: &mut dyn Write| {
        w.write_all(&header(audio, encoding))?;
        let mut block = Vec::with_capacity(4096 * count * bytes);
        for start in (0..frames).step_by(4096) {
            block.clear();
            for n in start..(start + 4096).min(frames) {
                for c in &audio.channels {
                    let x = c[n];
                    match encoding {
                        Encoding::Float32 => block.extend_from_slice(&x.to_le_bytes()),
                        Encoding::Int24 => {
                            const FULL: f64 = 8_388_608.0; // 2^23
                            let x = if x.is_finite() { x as f64 } else { 0.0 };
                            let v = (x * FULL).round().clamp(-FULL, FULL - 1.0) as i32;
                            block.extend_from_slice(&v.to_le_bytes()[..3]);
                        }
                    }
                }
            }
            w.write_all(&block)?;
        }
        // A data chunk of odd size takes a pad byte.
        if (frames * count * bytes) % 2 == 1 {
            w.write_all(&[0])?;
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    /// A fresh, empty folder for one test.
    fn scratch(name: &str) -> PathBuf {
        let dir =
            std::env::temp_dir().join(format!("breakdown-audio-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        dir
    }

    fn spec(channels: u16, rate: u32, bits: u16, format: hound::SampleFormat) -> hound::WavSpec {
        hound::WavSpec {
            channels,
            sample_rate: rate,
            bits_per_sample: bits,
            sample_format: format,
        }
    }

    // Integer PCM convention (common practice, WAVE/PCM as used by hound and every DAW): a B-bit sample s
    // stands for s / 2^(B-1), so full scale -2^(B-1) reads as exactly -1.0.
    fn int_round_trip(bits: u16) {
        let dir = scratch(&format!("int{bits}"));
        let path = dir.join("in.wav");
        let full = 1i64 << (bits - 1);
        let values: Vec<i32> = [0, 1, -1, full - 1, -full, full / 2, -full / 3, 12345 % full]
            .iter()
            .map(|&v| v as i32)
            .collect();
        let mut w =
            hound::WavWriter::create(&path, spec(2, 44_100, bits, hound::SampleFormat::Int))
                .unwrap();
        for &v in &values {
            w.write_sample(v).unwrap();
            w.write_sample(-v.max(-(full as i32 - 1))).unwrap();
        }
        w.finalize().unwrap();
        let audio = read_wav(&path).unwrap();
        assert_eq!(audio.rate, 44_100);
        assert_eq!(audio.channels.len(), 2);
        assert_eq!(audio.frames(), values.len());
        for (n, &v) in values.iter().enumerate() {
            let left = v as f64 / full as f64;
            let right = -(v.max(-(full as i32 - 1))) as f64 / full as f64;
            assert!(
                (audio.channels[0][n] as f64 - left).abs() <= 1e-7,
                "{bits}-bit left {n}"
            );
            assert!(
                (audio.channels[1][n] as f64 - right).abs() <= 1e-7,
                "{bits}-bit right {n}"
            );
        }
        assert_eq!(audio.channels[0][4], -1.0);
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn reads_16_bit() {
        int_round_trip(16);
    }

    #[test]
    fn reads_24_bit() {
        int_round_trip(24);
    }

    #[test]
    fn reads_32_bit_integer() {
        int_round_trip(32);
    }

    #[test]
    fn reads_float_mono_any_rate() {
        let dir = scratch("float");
        let path = dir.join("in.wav");
        let values = [0.0f32, 0.25, -0.5, 1.5, -3.0, 1e-30, f32::MIN_POSITIVE];
        let mut w =
            hound::WavWriter::create(&path, spec(1, 11_025, 32, hound::SampleFormat::Float))
                .unwrap();
        for &v in &values {
            w.write_sample(v).unwrap();
        }
        w.finalize().unwrap();
        let audio = read_wav(&path).unwrap();
        assert_eq!(audio.rate, 11_025);
        assert_eq!(audio.channels, vec![values.to_vec()]);
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn float_writer_is_bit_exact_for_hound() {
        let dir = scratch("writef32");
        let path = dir.join("out.wav");
        let audio = Audio {
            rate: 96_000,
            channels: vec![vec![0.1, -0.2, 7.5, -1e-3], vec![1.0, -1.0, 0.0, 12.0]],
        };
        write_wav_f32(&path, &audio).unwrap();
        let mut r = hound::WavReader::open(&path).unwrap();
        let s = r.spec();
        assert_eq!(
            (s.channels, s.sample_rate, s.bits_per_sample),
            (2, 96_000, 32)
        );
        assert_eq!(s.sample_format, hound::SampleFormat::Float);
        let got: Vec<f32> = r.samples::<f32>().map(Result::unwrap).collect();
        assert_eq!(got, vec![0.1, 1.0, -0.2, -1.0, 7.5, 0.0, -1e-3, 12.0]);
        assert_eq!(read_wav(&path).unwrap(), audio);
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn i24_writer_matches_pcm_convention() {
        let dir = scratch("writei24");
        let path = dir.join("out.wav");
        let input = vec![
            0.0f32,
            0.5,
            -0.5,
            1.0,
            -1.0,
            2.0,
            -2.0,
            f32::NAN,
            1.0 / 8_388_608.0,
        ];
        let audio = Audio {
            rate: 48_000,
            channels: vec![input],
        };
        write_wav_i24(&path, &audio).unwrap();
        let mut r = hound::WavReader::open(&path).unwrap();
        let s = r.spec();
        assert_eq!(
            (s.channels, s.sample_rate, s.bits_per_sample),
            (1, 48_000, 24)
        );
        assert_eq!(s.sample_format, hound::SampleFormat::Int);
        let got: Vec<i32> = r.samples::<i32>().map(Result::unwrap).collect();
        // 24-bit range is -2^23 .. 2^23 - 1 (WAVE PCM); out-of-range values saturate, NaN becomes silence.
        let max = (1 << 23) - 1;
        let min = -(1 << 23);
        assert_eq!(got, vec![0, 1 << 22, -(1 << 22), max, min, max, min, 0, 1]);
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn errors_name_the_file() {
        let dir = scratch("errors");
        let missing = dir.join("x.wav");
        let e = read_wav(&missing).unwrap_err();
        assert!(
            e.starts_with("cannot open '") && e.contains("x.wav") && e.contains("No such file"),
            "{e}"
        );

        let text = dir.join("notes.wav");
        std::fs::write(&text, "just some text, not audio at all").unwrap();
        let e = read_wav(&text).unwrap_err();
        assert!(
            e.contains("notes.wav") && e.contains("is not a WAV file"),
            "{e}"
        );

        let six = dir.join("six.wav");
        let mut w =
            hound::WavWriter::create(&six, spec(6, 48_000, 16, hound::SampleFormat::Int)).unwrap();
        for _ in 0..12 {
            w.write_sample(0i16).unwrap();
        }
        w.finalize().unwrap();
        let e = read_wav(&six).unwrap_err();
        assert!(
            e.contains("six.wav") && e.contains("has 6 channels") && e.contains("mono or stereo"),
            "{e}"
        );
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn failed_write_leaves_nothing() {
        let dir = scratch("nothing");
        let path = dir.join("out.wav");
        let uneven = Audio {
            rate: 48_000,
            channels: vec![vec![0.0; 10], vec![0.0; 9]],
        };
        assert!(write_wav_f32(&path, &uneven).is_err());
        let missing_folder = dir.join("no-such-folder").join("out.wav");
        let ok = Audio {
            rate: 48_000,
            channels: vec![vec![0.0; 10]],
        };
        let e = write_wav_i24(&missing_folder, &ok).unwrap_err();
        assert!(e.contains("out.wav"), "{e}");
        let left: Vec<_> = std::fs::read_dir(&dir).unwrap().collect();
        assert!(left.is_empty(), "files left behind: {left:?}");
        std::fs::remove_dir_all(dir).unwrap();
    }
}
