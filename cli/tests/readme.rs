//! Every example in README.md and plugin/README.md runs as written: each TOML block reads (a circuit file
//! renders a DI, a comparison plan runs), and each `breakdown ...` command line exits 0 on a short DI in a
//! scratch folder holding the files the examples name.

mod common;

use common::{scratch, write_float, BIN};
use std::path::Path;
use std::process::Command;

const README: &str = include_str!("../../README.md");
const PLUGIN_README: &str = include_str!("../../plugin/README.md");

/// The fenced blocks of `text` with the given info string.
fn blocks<'a>(text: &'a str, lang: &str) -> Vec<&'a str> {
    let fence = format!("```{lang}\n");
    let mut out = Vec::new();
    let mut rest = text;
    while let Some(start) = rest.find(&fence) {
        let body = &rest[start + fence.len()..];
        let end = body.find("```").expect("a closed code block");
        out.push(&body[..end]);
        rest = &body[end + 3..];
    }
    out
}

/// A 1 s plucked-string-like DI at 48 kHz (a decaying 110 Hz tone with harmonics), peaking near 0.5 of full scale.
fn write_di(path: &Path) {
    let samples: Vec<f32> = (0..48_000)
        .map(|n| {
            let t = n as f64 / 48_000.0;
            let x: f64 = (1..=4)
                .map(|k| (std::f64::consts::TAU * 110.0 * k as f64 * t).sin() / k as f64)
                .sum();
            (0.3 * x * (-3.0 * t).exp()) as f32
        })
        .collect();
    write_float(path, 48_000, &samples);
}

fn breakdown(dir: &Path, args: &[&str]) -> (bool, String) {
    let out = Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("run breakdown");
    let err = String::from_utf8_lossy(&out.stderr).into_owned();
    (out.status.success(), err)
}

#[test]
fn every_toml_example_reads_and_runs() {
    let dir = scratch("readme", "toml");
    for name in ["di.wav", "take1.wav", "take2.wav"] {
        write_di(&dir.join(name));
    }
    let mut circuits = 0;
    let mut plans = 0;
    for (i, block) in blocks(README, "toml")
        .into_iter()
        .chain(blocks(PLUGIN_README, "toml"))
        .enumerate()
    {
        if block.contains("[[variant]]") {
            let plan = dir.join(format!("plan{i}.toml"));
            std::fs::write(&plan, block).unwrap();
            let (ok, err) = breakdown(&dir, &["compare", plan.to_str().unwrap()]);
            assert!(ok, "README plan example {i} fails: {err}");
            plans += 1;
        } else {
            let circuit = dir.join(format!("circuit{i}.toml"));
            std::fs::write(&circuit, block).unwrap();
            let out = dir.join(format!("circuit{i}.wav"));
            let (ok, err) = breakdown(
                &dir,
                &[
                    "render",
                    "--circuit",
                    circuit.to_str().unwrap(),
                    "--input",
                    "di.wav",
                    "--output",
                    out.to_str().unwrap(),
                ],
            );
            assert!(ok, "README circuit example {i} fails: {err}");
            let frames = hound::WavReader::open(&out).unwrap().duration();
            assert_eq!(frames, 48_000, "circuit example {i}: output length");
            circuits += 1;
        }
    }
    assert!(circuits >= 1 && plans >= 1, "the README lost its examples");
}

#[test]
fn every_command_line_example_runs() {
    let dir = scratch("readme", "commands");
    write_di(&dir.join("di.wav"));
    for name in ["take1.wav", "take2.wav"] {
        write_di(&dir.join(name));
    }
    // The impulse response the README's `--cabinet my-cab.wav` line stands for: a short decaying test response.
    let response: Vec<f32> = (0..256)
        .map(|n| ((-(n as f64) / 40.0).exp() * (0.3 * n as f64).cos()) as f32)
        .collect();
    write_float(&dir.join("my-cab.wav"), 48_000, &response);
    // The plan the README's `compare plan.toml` line refers to is the plan example below it.
    let plan = blocks(README, "toml")
        .into_iter()
        .find(|b| b.contains("[[variant]]"))
        .expect("a plan example");
    std::fs::write(dir.join("plan.toml"), plan).unwrap();
    let mut ran = 0;
    for block in blocks(README, "sh")
        .into_iter()
        .chain(blocks(PLUGIN_README, "sh"))
    {
        for line in block.lines() {
            let command = line.split(" #").next().unwrap().trim();
            let Some(args) = command.strip_prefix("breakdown ") else {
                continue;
            };
            let args: Vec<&str> = args.split_whitespace().collect();
            // `bench` measures for many seconds by design; its own test runs `bench --quick`.
            if args[0] == "bench" {
                continue;
            }
            let (ok, err) = breakdown(&dir, &args);
            assert!(ok, "README command `{command}` fails: {err}");
            assert!(!err.contains("panicked"), "`{command}`: {err}");
            ran += 1;
        }
    }
    assert!(ran >= 6, "only {ran} command examples found");
}
