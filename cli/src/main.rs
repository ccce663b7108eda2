//! `breakdown`: render DI through a modelled Zener clamp stage, compare part choices, answer a builder's
//! questions. Each subcommand lives in its own module.

use clap::{Parser, Subcommand};
use std::process::ExitCode;

/// The safety text (docs/model.md section 8, whole), carried by the help, every advice and every report.
macro_rules! safety_text {
    () => {
        "Valve amplifiers run at several hundred volts and their filter capacitors stay charged after \
         power-off; the numbers this tool prints are a simulation, not a measurement of a live chassis. Work on \
         a live amp only with the training to do so; drain and verify capacitors; follow local electrical \
         codes; when in doubt, have a qualified technician do the work. Check part voltage and power ratings \
         against the values the tool reports, with margin."
    };
}

mod analysis;
mod audio;
mod bench;
mod calibrate;
mod compare;
mod demo;
mod files;
mod listening;
mod options;
mod render;
mod report;

#[derive(Parser)]
#[command(
    name = "breakdown",
    version,
    about = "Hear a Zener clamp in your valve preamp before you buy parts: a circuit model from the input jack, in real volts.",
    after_help = concat!(
        "Input calibration: a plan's [input] or the command line's --volts-at-full-scale / --input-dbu \
         overrides the circuit file's [input] volts_at_full_scale (the command line wins over the plan).\n\n",
        "Safety: ",
        safety_text!()
    )
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Render a WAV file through the circuit (listening output or a node voltage in volts).
    Render(render::RenderArgs),
    /// Print speed figures: ns per sample and real-time factor per quality.
    Bench(bench::BenchArgs),
    /// Render DI files through several variants into clips and a report.
    Compare(compare::CompareArgs),
    /// Make the demo DI and run the demo plan into ./breakdown-demo/.
    Demo(demo::DemoArgs),
    /// Map which element limits first over gain and input level.
    Onset(analysis::OnsetArgs),
    /// Suggest buyable E24 Zener pairs for a goal.
    Suggest(analysis::SuggestArgs),
    /// Parts list with ratings for the switch layout.
    Parts(analysis::PartsArgs),
    /// Read a DI and report its peak in volts at the jack under an input calibration.
    Calibrate(calibrate::CalibrateArgs),
}

/// Let a closed pipe (`breakdown parts | head`) end the program quietly, as command-line tools do, instead of
/// `println!` panicking on the write error: restore the default action for SIGPIPE (13 on Linux and macOS).
#[cfg(unix)]
fn quiet_on_closed_pipe() {
    extern "C" {
        fn signal(signum: i32, handler: usize) -> usize;
    }
    const SIGPIPE: i32 = 13;
    const SIG_DFL: usize = 0;
    // SAFETY: installs the default disposition for one signal before any other thread exists.
    unsafe {
        signal(SIGPIPE, SIG_DFL);
    }
}

#[cfg(not(unix))]
fn quiet_on_closed_pipe() {}

fn main() -> ExitCode {
    quiet_on_closed_pipe();
    files::install_interrupt_handler();
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Render(a) => render::run(a),
        Command::Bench(a) => bench::run(a),
        Command::Compare(a) => compare::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Onset(a) => analysis::onset(a),
        Command::Suggest(a) => analysis::suggest(a),
        Command::Parts(a) => analysis::parts(a),
        Command::Calibrate(a) => calibrate::run(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(message) => {
            eprintln!("breakdown: {message}");
            ExitCode::FAILURE
        }
    }
}
