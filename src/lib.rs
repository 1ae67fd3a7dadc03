//! The sinew test suite: end-to-end tests live in `tests/`, the benchmark in `benches/`.
