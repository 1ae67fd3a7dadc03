//! Support shared by sinew's tests, examples and benchmarks (a dev-only crate, never
//! published): running the `sinew` binary, temporary folders and listings, a seeded
//! generator, the known-warp recovery case and its endpoint error, rotations for test affines,
//! and the timing helpers of the benchmarks.
//!
//! Only integration tests, examples and benchmarks depend on it (never a crate's own unit
//! tests), so the engine crates it uses are linked once.

mod accuracy;
mod bench;
mod cli;
mod files;
mod geometry;
mod rng;

pub use accuracy::{add_noise, endpoint_error, endpoint_errors, endpoint_errors_where, mean, KnownWarp};
pub use bench::{load_average, median, release_binary, thread_pool_from_args, time_runs, timed};
pub use cli::{ok, p, run_ok, text, Sinew, QUICK};
pub use files::{listing, table_without_times, tempdir};
pub use geometry::{matmul3, rotation};
pub use rng::SplitMix64;
