//! One module per subcommand.
pub mod common;
pub mod demo;
pub mod info;
pub mod register;
pub mod warp;
