//! libFuzzer target: arbitrary bytes through every sinew NIfTI reader (see `sinew_fuzz::check`).
#![no_main]

use libfuzzer_sys::fuzz_target;

#[global_allocator]
static ALLOC: sinew_fuzz::PeakAlloc = sinew_fuzz::PeakAlloc;

fuzz_target!(|data: &[u8]| {
    sinew_fuzz::check(data);
});
