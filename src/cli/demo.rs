//! `ballast demo` (not built yet).

/// Arguments of `ballast demo`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Runs `ballast demo`.
pub fn run(_args: Args) -> anyhow::Result<super::Outcome> {
    anyhow::bail!("`ballast demo` is not built yet")
}
