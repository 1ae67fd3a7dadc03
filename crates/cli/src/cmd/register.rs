//! `sinew register` (not yet implemented).

/// Arguments of `sinew register`.
#[derive(clap::Args, Debug)]
pub struct RegisterArgs {}

/// Runs `sinew register`.
pub fn run(_args: RegisterArgs) -> anyhow::Result<()> {
    anyhow::bail!("'sinew register' is not implemented yet")
}
