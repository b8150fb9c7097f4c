//! A small seeded random number generator (SplitMix64), so that the demo
//! data depends on nothing but the seed.

/// SplitMix64 generator.
#[derive(Debug, Clone)]
pub struct Rng(u64);

/// One SplitMix64 output step applied to `x` (a good 64-bit mixer).
pub fn mix(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

/// A seed derived from several integers (order matters).
pub fn derive(parts: &[u64]) -> u64 {
    parts
        .iter()
        .fold(0x1234_5678_9ABC_DEF0, |acc, &p| mix(acc ^ mix(p)))
}

impl Rng {
    /// A generator from a seed.
    pub fn new(seed: u64) -> Self {
        Rng(mix(seed))
    }

    /// Next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `[0, 1)`, with 53 bits.
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform in `[lo, hi)`.
    pub fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }

    /// Uniform integer in `0..n`.
    pub fn below(&mut self, n: usize) -> usize {
        (self.unit() * n as f64) as usize % n.max(1)
    }

    /// True with probability `p`.
    pub fn chance(&mut self, p: f64) -> bool {
        self.unit() < p
    }

    /// `+1.0` or `-1.0`, equally likely.
    pub fn sign(&mut self) -> f64 {
        if self.chance(0.5) {
            1.0
        } else {
            -1.0
        }
    }

    /// Approximately standard normal: the centred sum of six uniforms,
    /// scaled to unit variance (Irwin-Hall). Uses only `+` and `*`, so the
    /// values are the same on every platform.
    pub fn gaussish(&mut self) -> f64 {
        let s: f64 = (0..6).map(|_| self.unit()).sum();
        (s - 3.0) * std::f64::consts::SQRT_2
    }

    /// A uniformly random unit vector (rejection sampling; only `sqrt`,
    /// which IEEE 754 rounds exactly).
    pub fn unit_vector(&mut self) -> (f64, f64) {
        loop {
            let (x, y) = (self.range(-1.0, 1.0), self.range(-1.0, 1.0));
            let r2 = x * x + y * y;
            if r2 > 1e-4 && r2 <= 1.0 {
                let r = r2.sqrt();
                return (x / r, y / r);
            }
        }
    }

    /// Fisher-Yates shuffle.
    pub fn shuffle<T>(&mut self, v: &mut [T]) {
        for i in (1..v.len()).rev() {
            let j = self.below(i + 1);
            v.swap(i, j);
        }
    }
}
