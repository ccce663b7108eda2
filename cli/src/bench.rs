//! `breakdown bench` (being written).

#[derive(clap::Args)]
pub struct BenchArgs {}

pub fn run(_args: BenchArgs) -> Result<(), String> {
    Err("'bench' is not written yet".into())
}
