//! The seeded generator of the library's unit tests: the library's
//! [`SplitMix64`](super::splitmix::SplitMix64), the same sequence as
//! `ingot_testkit::zoo::Rng`. Unit tests cannot use the dev crate
//! `ingot-testkit` (it links a second copy of this crate), so they get
//! these few helpers.

use super::splitmix::SplitMix64;

/// A small deterministic generator.
#[derive(Debug, Clone)]
pub(crate) struct Rng(SplitMix64);

impl Rng {
    /// A generator started from `seed`.
    pub(crate) fn new(seed: u64) -> Self {
        Rng(SplitMix64::new(seed))
    }

    /// The next 64 random bits.
    pub(crate) fn next_u64(&mut self) -> u64 {
        self.0.next_u64()
    }

    /// Uniform in `[lo, hi)`, with 24 random bits.
    fn range(&mut self, lo: f32, hi: f32) -> f32 {
        lo + (hi - lo) * ((self.next_u64() >> 40) as f32 / (1u64 << 24) as f32)
    }

    /// `n` values uniform in `[lo, hi)`.
    pub(crate) fn uniform_vec(&mut self, n: usize, lo: f32, hi: f32) -> Vec<f32> {
        (0..n).map(|_| self.range(lo, hi)).collect()
    }
}
