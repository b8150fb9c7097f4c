//! The seeded generator of the library's unit tests: splitmix64 (Steele,
//! Lea & Flood 2014, "Fast splittable pseudorandom number generators"),
//! the same sequence as `ingot_testkit::zoo::Rng`. Unit tests cannot use
//! the dev crate `ingot-testkit` (it links a second copy of this crate), so
//! they get this small copy.

/// A small deterministic generator.
#[derive(Debug, Clone)]
pub(crate) struct Rng(u64);

impl Rng {
    /// A generator started from `seed`.
    pub(crate) fn new(seed: u64) -> Self {
        Rng(seed)
    }

    /// The next 64 random bits.
    pub(crate) fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
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
