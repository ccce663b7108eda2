//! WAV reading and writing for the command-line tools.
//!
//! Reads 8/16/24/32-bit integer and 32-bit float WAV, mono or stereo, at any rate, into `f32` channels
//! (full scale = 1.0). Writes 32-bit float or 24-bit integer WAV. Every error names the file. Writing goes to a
//! temporary file in the same folder that is renamed over the target only when complete, so a failed write
//! never leaves a half-written file behind.

// Not every subcommand uses every function.
#![allow(dead_code)]

use std::fs::File;
use std::io::{BufReader, BufWriter};
use std::path::{Path, PathBuf};

/// Audio in full-scale units (1.0 = 0 dBFS), one `Vec` per channel, all the same length.
#[derive(Clone, Debug, PartialEq)]
pub struct Audio {
    pub rate: u32,
    pub channels: Vec<Vec<f32>>,
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
}

fn io_reason(e: &std::io::Error) -> String {
    match e.kind() {
        std::io::ErrorKind::NotFound => "No such file".into(),
        std::io::ErrorKind::PermissionDenied => "permission denied".into(),
        _ => e.to_string(),
    }
}

fn hound_reason(e: &hound::Error) -> String {
    match e {
        hound::Error::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof => {
            "the file ends early (truncated)".into()
        }
        hound::Error::IoError(io) => io_reason(io),
        hound::Error::FormatError(m) => (*m).to_string(),
        hound::Error::Unsupported => {
            "unsupported sample format (Breakdown reads 16/24/32-bit integer and 32-bit float PCM)"
                .into()
        }
        other => other.to_string(),
    }
}

/// Read a WAV file: 8/16/24/32-bit integer or 32-bit float, mono or stereo, any rate.
pub fn read_wav(path: impl AsRef<Path>) -> Result<Audio, String> {
    let path = path.as_ref();
    let shown = path.display();
    if path.is_dir() {
        return Err(format!("cannot open '{shown}': it is a folder, not a file"));
    }
    let file = File::open(path).map_err(|e| format!("cannot open '{shown}': {}", io_reason(&e)))?;
    let reader = hound::WavReader::new(BufReader::new(file))
        .map_err(|e| format!("'{shown}' is not a WAV file: {}", hound_reason(&e)))?;
    let spec = reader.spec();
    let count = spec.channels as usize;
    if count == 0 || count > 2 {
        return Err(format!(
            "'{shown}' has {count} channels; Breakdown takes mono or stereo"
        ));
    }
    if spec.sample_rate == 0 {
        return Err(format!("'{shown}' declares a sample rate of 0 Hz"));
    }
    let frames = reader.duration() as usize;
    let mut channels: Vec<Vec<f32>> = (0..count).map(|_| Vec::with_capacity(frames)).collect();
    let damaged = |e: hound::Error| format!("'{shown}' cannot be read: {}", hound_reason(&e));
    match (spec.sample_format, spec.bits_per_sample) {
        (hound::SampleFormat::Float, 32) => {
            let mut reader = reader;
            for (n, s) in reader.samples::<f32>().enumerate() {
                channels[n % count].push(s.map_err(damaged)?);
            }
        }
        (hound::SampleFormat::Int, bits @ (8 | 16 | 24 | 32)) => {
            let scale = 1.0 / (1u64 << (bits - 1)) as f64;
            let mut reader = reader;
            for (n, s) in reader.samples::<i32>().enumerate() {
                channels[n % count].push((s.map_err(damaged)? as f64 * scale) as f32);
            }
        }
        (format, bits) => {
            let kind = match format {
                hound::SampleFormat::Float => "float",
                hound::SampleFormat::Int => "integer",
            };
            return Err(format!(
                "'{shown}' is {bits}-bit {kind}; Breakdown reads 16/24/32-bit integer and 32-bit float WAV"
            ));
        }
    }
    // A final incomplete frame (odd sample count in a stereo file) is dropped.
    let len = channels.iter().map(Vec::len).min().unwrap_or(0);
    for c in &mut channels {
        c.truncate(len);
    }
    Ok(Audio {
        rate: spec.sample_rate,
        channels,
    })
}

/// Write 32-bit float WAV (samples as given, 1.0 = full scale).
pub fn write_wav_f32(path: impl AsRef<Path>, audio: &Audio) -> Result<(), String> {
    write_with(
        path.as_ref(),
        audio,
        32,
        hound::SampleFormat::Float,
        |w, x| w.write_sample(x),
    )
}

/// Write 24-bit integer WAV (samples limited to full scale; non-finite samples become 0).
pub fn write_wav_i24(path: impl AsRef<Path>, audio: &Audio) -> Result<(), String> {
    const FULL: f64 = 8_388_608.0; // 2^23
    write_with(
        path.as_ref(),
        audio,
        24,
        hound::SampleFormat::Int,
        |w, x| {
            let x = if x.is_finite() { x as f64 } else { 0.0 };
            let v = (x * FULL).round().clamp(-FULL, FULL - 1.0) as i32;
            w.write_sample(v)
        },
    )
}

type Writer = hound::WavWriter<BufWriter<File>>;

fn temp_path_for(path: &Path) -> Result<PathBuf, String> {
    let name = path
        .file_name()
        .ok_or_else(|| format!("cannot write '{}': not a file name", path.display()))?;
    let folder = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let mut temp = std::ffi::OsString::from(".");
    temp.push(name);
    temp.push(format!(".partial-{}", std::process::id()));
    Ok(folder.join(temp))
}

fn write_with(
    path: &Path,
    audio: &Audio,
    bits: u16,
    format: hound::SampleFormat,
    mut put: impl FnMut(&mut Writer, f32) -> Result<(), hound::Error>,
) -> Result<(), String> {
    let shown = path.display();
    let count = audio.channels.len();
    if count == 0 || count > u16::MAX as usize {
        return Err(format!("cannot write '{shown}': {count} channels"));
    }
    if audio.rate == 0 {
        return Err(format!("cannot write '{shown}': sample rate 0 Hz"));
    }
    let frames = audio.frames();
    if audio.channels.iter().any(|c| c.len() != frames) {
        return Err(format!("cannot write '{shown}': channels differ in length"));
    }
    if path.is_dir() {
        return Err(format!("cannot write '{shown}': it is a folder"));
    }
    let spec = hound::WavSpec {
        channels: count as u16,
        sample_rate: audio.rate,
        bits_per_sample: bits,
        sample_format: format,
    };
    let temp = temp_path_for(path)?;
    let result = (|| -> Result<(), String> {
        let file = File::create(&temp)
            .map_err(|e| format!("cannot write '{shown}': {}", io_reason(&e)))?;
        let failed = |e: hound::Error| format!("cannot write '{shown}': {}", hound_reason(&e));
        let mut writer = hound::WavWriter::new(BufWriter::new(file), spec).map_err(failed)?;
        for n in 0..frames {
            for c in &audio.channels {
                put(&mut writer, c[n]).map_err(failed)?;
            }
        }
        writer.finalize().map_err(failed)?;
        std::fs::rename(&temp, path)
            .map_err(|e| format!("cannot write '{shown}': {}", io_reason(&e)))
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&temp);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;

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
            channels: vec![vec![0.1, -0.2, 7.5, -1e-3], vec![1.0, -1.0, 0.0, 42.0]],
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
        assert_eq!(got, vec![0.1, 1.0, -0.2, -1.0, 7.5, 0.0, -1e-3, 42.0]);
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
