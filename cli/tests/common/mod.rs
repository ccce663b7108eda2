//! What every CLI test file needs: the built binary, a fresh scratch folder, and a way to run the binary.

#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

pub const BIN: &str = env!("CARGO_BIN_EXE_breakdown");

/// A fresh, empty folder `<prefix>-<name>` under cargo's scratch space for integration tests.
pub fn scratch(prefix: &str, name: &str) -> PathBuf {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join(format!("{prefix}-{name}"));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Run `breakdown` with `args` and collect its exit status and output.
pub fn run(args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .output()
        .expect("run breakdown")
}

/// Write `samples` as a mono 32-bit float WAV at `rate`.
pub fn write_float(path: &Path, rate: u32, samples: &[f32]) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    for &x in samples {
        w.write_sample(x).unwrap();
    }
    w.finalize().unwrap();
}
