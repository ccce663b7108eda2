//! `breakdown demo` (being written).

#[derive(clap::Args)]
pub struct DemoArgs {}

pub fn run(_args: DemoArgs) -> Result<(), String> {
    Err("'demo' is not written yet".into())
}
