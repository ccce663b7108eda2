//! Standalone application of the plugin (JACK, ALSA or `--backend dummy`), used for the headless screenshot.
use nice_plug::prelude::*;

fn main() {
    nice_export_standalone::<breakdown::Breakdown>();
}
