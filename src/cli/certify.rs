//! `ballast certify` (not built yet).

/// Arguments of `ballast certify`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Runs `ballast certify`.
pub fn run(_args: Args) -> anyhow::Result<super::Outcome> {
    anyhow::bail!("`ballast certify` is not built yet")
}
