//! `ballast attack` (not built yet).

/// Arguments of `ballast attack`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Runs `ballast attack`.
pub fn run(_args: Args) -> anyhow::Result<super::Outcome> {
    anyhow::bail!("`ballast attack` is not built yet")
}
