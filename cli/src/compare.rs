//! `breakdown compare` (being written).

#[derive(clap::Args)]
pub struct CompareArgs {}

pub fn run(_args: CompareArgs) -> Result<(), String> {
    Err("'compare' is not written yet".into())
}
