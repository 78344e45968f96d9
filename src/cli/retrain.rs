//! `ballast retrain` (not built yet).

/// Arguments of `ballast retrain`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Runs `ballast retrain`.
pub fn run(_args: Args) -> anyhow::Result<super::Outcome> {
    anyhow::bail!("`ballast retrain` is not built yet")
}
