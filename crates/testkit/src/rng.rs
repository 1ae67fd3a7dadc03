//! A fixed, documented generator, so that seeded tests see the same sequence everywhere.

/// SplitMix64 ("Fast splittable pseudorandom number generators", OOPSLA 2014): the state
/// advances by the golden-ratio increment `0x9E3779B97F4A7C15` and each output is the mixed
/// state.
#[derive(Clone, Debug)]
pub struct SplitMix64(pub u64);

impl SplitMix64 {
    /// The next 64-bit value.
    pub fn next_u64(&mut self) -> u64 {
        sinew_phantom::splitmix64(&mut self.0)
    }

    /// Uniform on `[0, 1)` from the top 53 bits.
    pub fn next_f64(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Uniform on `0..n` (`0` when `n` is 0), by the remainder (its bias is irrelevant for
    /// picking test inputs).
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n.max(1) as u64) as usize
    }

    /// One element of `v`, uniformly.
    pub fn pick<'a>(&mut self, v: &[&'a str]) -> &'a str {
        v[self.below(v.len())]
    }

    /// A standard normal deviate by the Box–Muller transform `√(−2 ln a)·cos(2π b)` with `a`,
    /// `b` uniform ("A Note on the Generation of Random Normal Deviates", Annals of
    /// Mathematical Statistics, 1958); `a` is kept above 1e-300 so the logarithm is finite.
    pub fn normal(&mut self) -> f64 {
        let (a, b) = (self.next_f64().max(1e-300), self.next_f64());
        (-2.0 * a.ln()).sqrt() * (std::f64::consts::TAU * b).cos()
    }
}
