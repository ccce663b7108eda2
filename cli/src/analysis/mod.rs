//! `breakdown onset`, `suggest` and `parts` (being written).

#[derive(clap::Args)]
pub struct OnsetArgs {}
#[derive(clap::Args)]
pub struct SuggestArgs {}
#[derive(clap::Args)]
pub struct PartsArgs {}

pub fn onset(_a: OnsetArgs) -> Result<(), String> {
    Err("'onset' is not written yet".into())
}
pub fn suggest(_a: SuggestArgs) -> Result<(), String> {
    Err("'suggest' is not written yet".into())
}
pub fn parts(_a: PartsArgs) -> Result<(), String> {
    Err("'parts' is not written yet".into())
}
