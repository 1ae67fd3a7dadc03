//! `sinew info` (not yet implemented).

/// Arguments of `sinew info`.
#[derive(clap::Args, Debug)]
pub struct InfoArgs {}

/// Runs `sinew info`.
pub fn run(_args: InfoArgs) -> anyhow::Result<()> {
    anyhow::bail!("'sinew info' is not implemented yet")
}
