//! `breakdown render` (being written).

#[derive(clap::Args)]
pub struct RenderArgs {}

pub fn run(_args: RenderArgs) -> Result<(), String> {
    Err("'render' is not written yet".into())
}
