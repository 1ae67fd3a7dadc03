//! `sinew demo` (not yet implemented).

/// Arguments of `sinew demo`.
#[derive(clap::Args, Debug)]
pub struct DemoArgs {}

/// Runs `sinew demo`.
pub fn run(_args: DemoArgs) -> anyhow::Result<()> {
    anyhow::bail!("'sinew demo' is not implemented yet")
}
