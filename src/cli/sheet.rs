//! `ballast sheet` (not built yet).

/// Arguments of `ballast sheet`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Runs `ballast sheet`.
pub fn run(_args: Args) -> anyhow::Result<super::Outcome> {
    anyhow::bail!("`ballast sheet` is not built yet")
}
