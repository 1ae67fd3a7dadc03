//! One module per subcommand.
pub mod common;
pub mod demo;
pub mod info;
pub mod prep;
pub mod register;
pub mod warp;
