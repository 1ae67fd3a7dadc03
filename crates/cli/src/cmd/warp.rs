//! `sinew warp` (not yet implemented).

/// Arguments of `sinew warp`.
#[derive(clap::Args, Debug)]
pub struct WarpArgs {}

/// Runs `sinew warp`.
pub fn run(_args: WarpArgs) -> anyhow::Result<()> {
    anyhow::bail!("'sinew warp' is not implemented yet")
}
