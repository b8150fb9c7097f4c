//! Fixed-point requantization (Jacob et al. 2018, Section 2) and the fused
//! output clamp.

/// A real multiplier `M` in fixed point: `M ≈ mult · 2^-(31 + shift)`.
///
/// `mult` is a Q31 mantissa with `|mult|` in `[2^30, 2^31)`, i.e. `|M|`'s
/// mantissa in `[0.5, 1)`; `shift` may be negative for `|M| >= 1`. The total
/// right shift `31 + shift` must lie in `1..=62`. A negative mantissa
/// (in `(-2^31, -2^30]`) encodes a negative multiplier, which only the
/// input transform needs. `mult == 0` encodes `M = 0` (any valid shift).
///
/// Applying it to an integer `x` (see [`Requant::scale`]):
///
/// ```text
/// t = 31 + shift
/// scale(x) = (x as i64 * mult as i64 + (1 << (t - 1))) >> t     (arithmetic shift)
/// ```
///
/// which is `x · M` rounded to the nearest integer, ties toward +∞, with a
/// single rounding step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Requant {
    /// Signed Q31 mantissa.
    pub mult: i32,
    /// Exponent: the value is `mult · 2^-(31 + shift)`.
    pub shift: i32,
}

/// Smallest allowed total right shift `31 + shift`.
pub const MIN_TOTAL_SHIFT: i32 = 1;
/// Largest allowed total right shift `31 + shift`.
pub const MAX_TOTAL_SHIFT: i32 = 62;

impl Requant {
    /// The multiplier 1.0 (`2^30 · 2^-30`).
    pub const ONE: Requant = Requant {
        mult: 1 << 30,
        shift: -1,
    };

    /// Builds a multiplier from its parts, or `None` if they violate the
    /// invariants listed on [`Requant`].
    pub const fn new(mult: i32, shift: i32) -> Option<Requant> {
        let r = Requant { mult, shift };
        if r.is_valid() {
            Some(r)
        } else {
            None
        }
    }

    /// True when the mantissa is normalised (or zero) and the total shift is
    /// in `1..=62`.
    pub const fn is_valid(&self) -> bool {
        let total = 31i64 + self.shift as i64;
        if total < MIN_TOTAL_SHIFT as i64 || total > MAX_TOTAL_SHIFT as i64 {
            return false;
        }
        let m = self.mult as i64;
        m == 0 || (m >= 1 << 30) || (m <= -(1 << 30) && m > i32::MIN as i64)
    }

    /// The total right shift `31 + shift` (meaningful only when valid).
    pub const fn total_shift(&self) -> u32 {
        (31 + self.shift) as u32
    }

    /// `x · M`, rounded to nearest with ties toward +∞, in one step:
    /// `(x·mult + 2^(t-1)) >> t` evaluated in i64 (`t = 31 + shift`).
    ///
    /// Cannot overflow: `|x·mult| < 2^31 · 2^31 = 2^62` and the rounding term
    /// is at most `2^61`. The caller must have checked [`is_valid`](Self::is_valid).
    #[inline(always)]
    pub const fn scale(&self, x: i32) -> i64 {
        // floor((p + 2^(t-1)) / 2^t) == (floor(p / 2^(t-1)) + 1) >> 1,
        // which avoids materialising the rounding constant.
        let prod = x as i64 * self.mult as i64;
        ((prod >> (30 + self.shift)) + 1) >> 1
    }

    /// Full requantization of an accumulator: `clamp(z_out + scale(acc))`
    /// into the output's activation range.
    ///
    /// The usual total shift (32 or more) takes a 32-bit path with the same
    /// result: `floor(p / 2^s) = floor(floor(p / 2^32) / 2^(s-32))`, and the
    /// high word of the product is what `smull` leaves in a register, so
    /// no 64-bit shift or compare is needed (Cortex-M: about 10
    /// instructions instead of 45).
    #[inline(always)]
    pub const fn apply(&self, acc: i32, out: OutputQuant) -> i8 {
        let s = 30 + self.shift;
        // An out-of-range zero point (refused by the kernels) takes the i64
        // path so the sum below cannot overflow.
        if s < 32 || out.zero_point.wrapping_add(128) as u32 > 255 {
            return out.finish(self.scale(acc));
        }
        let hi = high_word(acc, self.mult);
        // |hi| < 2^30 (see `scale`), so neither step overflows.
        let r = (((hi >> (s - 32)) + 1) >> 1) + out.zero_point;
        if r < out.min as i32 {
            out.min
        } else if r > out.max as i32 {
            out.max
        } else {
            r as i8
        }
    }

    /// Host-side constructor from a real multiplier.
    ///
    /// **Uses floating point: runs in the compiler, never on the inference
    /// path.** Decomposes `m = f · 2^e` with `|f|` in `[0.5, 1)` (exact
    /// power-of-two steps), sets `mult = round(f · 2^31)` (renormalising if
    /// the rounding reaches `2^31`) and `shift = -e`. Returns `None` for
    /// non-finite `m` or when `31 + shift` falls outside `1..=62` (`|m|`
    /// at or above `2^30`, or below about `2^-32`). `m == 0.0` gives
    /// `mult = 0, shift = 0`.
    pub fn from_real(m: f64) -> Option<Requant> {
        if !m.is_finite() {
            return None;
        }
        if m == 0.0 {
            return Some(Requant { mult: 0, shift: 0 });
        }
        let neg = m < 0.0;
        let mut f = if neg { -m } else { m };
        let mut e: i32 = 0;
        while f >= 1.0 {
            f *= 0.5;
            e += 1;
            if e > 2000 {
                return None;
            }
        }
        while f < 0.5 {
            f *= 2.0;
            e -= 1;
            if e < -2000 {
                return None;
            }
        }
        // f in [0.5, 1): f * 2^31 in [2^30, 2^31); round half up (f > 0).
        let mut q = (f * 2147483648.0 + 0.5) as i64;
        if q == 1i64 << 31 {
            q = 1 << 30;
            e += 1;
        }
        let mult = if neg { -q } else { q } as i32;
        Requant::new(mult, -e)
    }

    /// Host-side: the real value `mult · 2^-(31 + shift)`.
    ///
    /// **Floating point; for the compiler and for reports, not for firmware.**
    pub fn to_real(&self) -> f64 {
        let mut v = self.mult as f64;
        let mut t = 31 + self.shift;
        while t > 0 {
            v *= 0.5;
            t -= 1;
        }
        while t < 0 {
            v *= 2.0;
            t += 1;
        }
        v
    }
}

/// True when the first `n` multipliers exist and are all valid (a `const
/// fn`, so generated modules can run it at compile time).
pub(crate) const fn all_valid(requant: &[Requant], n: usize) -> bool {
    if requant.len() < n {
        return false;
    }
    let mut i = 0;
    while i < n {
        if !requant[i].is_valid() {
            return false;
        }
        i += 1;
    }
    true
}

/// Output zero point and fused activation clamp.
///
/// Every kernel finishes an output value as
/// `clamp(zero_point + v, min, max)` where `v` is the requantized value in
/// i64. The fused activation *is* this clamp:
///
/// | activation | `min` | `max` |
/// |---|---|---|
/// | none | -128 | 127 |
/// | ReLU | `z_out` | 127 |
/// | ReLU6 | `z_out` | `min(127, z_out + round(6 / s_out))` |
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct OutputQuant {
    /// Output zero point, in `[-128, 127]`.
    pub zero_point: i32,
    /// Lower clamp bound.
    pub min: i8,
    /// Upper clamp bound (`min <= max`).
    pub max: i8,
}

impl OutputQuant {
    /// No activation: clamp to the full int8 range.
    pub const fn linear(zero_point: i32) -> Self {
        OutputQuant {
            zero_point,
            min: i8::MIN,
            max: i8::MAX,
        }
    }

    /// ReLU: clamp to `[z_out, 127]`.
    pub const fn relu(zero_point: i32) -> Self {
        OutputQuant {
            zero_point,
            min: sat_i8(zero_point as i64),
            max: i8::MAX,
        }
    }

    /// ReLU6: clamp to `[z_out, min(127, z_out + six_q)]` where
    /// `six_q = round(6 / s_out)` is computed by the compiler.
    pub const fn relu6(zero_point: i32, six_q: i32) -> Self {
        OutputQuant {
            zero_point,
            min: sat_i8(zero_point as i64),
            max: sat_i8(zero_point as i64 + six_q as i64),
        }
    }

    /// An explicit clamp range.
    pub const fn clamped(zero_point: i32, min: i8, max: i8) -> Self {
        OutputQuant {
            zero_point,
            min,
            max,
        }
    }

    /// True when the zero point is an int8 value and `min <= max`.
    pub const fn is_valid(&self) -> bool {
        self.zero_point >= -128 && self.zero_point <= 127 && self.min <= self.max
    }

    /// `clamp(zero_point + v, min, max)` as i8.
    #[inline(always)]
    pub const fn finish(&self, v: i64) -> i8 {
        let r = v + self.zero_point as i64;
        if r < self.min as i64 {
            self.min
        } else if r > self.max as i64 {
            self.max
        } else {
            r as i8
        }
    }
}

/// How a call's outputs are finished when [`Requant::apply`] takes its
/// 32-bit path for every multiplier of the call (total shift 32 or more,
/// zero point in `-128..=127`; see [`fast_requant`]). The kernels decide
/// this once per call and then finish every value with [`requant_fast`]:
/// the same bytes as `apply`, without its choice of path per value.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Fast {
    /// The output bounds are the whole int8 range (no activation, or a
    /// ReLU6 whose range was calibrated to `[0, max]`): the clamp is one
    /// saturation (`ssat`, which also does the final halving).
    Full {
        /// `1 + 2·zp`, see [`requant_fast`].
        k: i32,
    },
    /// Other bounds `(lo, hi)`: two comparisons.
    Clamp {
        /// `1 + 2·zp`, see [`requant_fast`].
        k: i32,
        /// Lower bound.
        lo: i32,
        /// Upper bound.
        hi: i32,
    },
}

impl Fast {
    /// `Requant::apply(acc, out)` for one multiplier of the call this
    /// finish was made for (see [`fast_requant`]).
    #[inline(always)]
    pub(crate) fn finish(self, acc: i32, r: &Requant) -> i8 {
        match self {
            // Constant bounds (no panic path): one `ssat` with the halving.
            Fast::Full { k } => requant_fast(acc, r, k).clamp(-128, 127) as i8,
            Fast::Clamp { k, lo, hi } => requant_fast(acc, r, k).max(lo).min(hi) as i8,
        }
    }
}

/// `r.apply(acc, out)` by `fast` when there is one (see [`fast_requant`]):
/// for kernels that finish values one at a time.
#[inline(always)]
pub(crate) fn finish_one(fast: Option<Fast>, acc: i32, r: &Requant, out: OutputQuant) -> i8 {
    match fast {
        Some(f) => f.finish(acc, r),
        None => r.apply(acc, out),
    }
}

/// The 32-bit finish of a call ([`Fast`]), or `None` when some
/// multiplier or the zero point needs [`Requant::apply`]'s choice per
/// value. `k = 1 + 2·zp` is the rounding term and the zero point in one
/// (see [`requant_fast`]). The multipliers must be valid and `out.min <=
/// out.max` (the kernels refuse others).
pub(crate) fn fast_requant(requant: &[Requant], out: OutputQuant) -> Option<Fast> {
    let zp_ok = out.zero_point.wrapping_add(128) as u32 <= 255;
    let shifts_ok = requant.iter().all(|r| r.shift >= 2);
    let k = 1 + 2 * out.zero_point;
    let (lo, hi) = (out.min as i32, out.max as i32);
    (zp_ok && shifts_ok).then_some(if (lo, hi) == (-128, 127) {
        Fast::Full { k }
    } else {
        Fast::Clamp { k, lo, hi }
    })
}

/// [`Requant::apply`]'s 32-bit path before its clamp, without its choice
/// of path (the caller checked [`fast_requant`] once per call): with `h`
/// the high word of the product (`smmul`) and `s` the total shift less
/// 32, `((h >> s) + 1 >> 1) + zp`, computed as `(h >> s) + k >> 1` with
/// `k = 1 + 2·zp` (adding `2·zp` before the halving adds `zp` after it,
/// exactly; `|h| < 2^30`, so the sum cannot overflow).
#[inline(always)]
pub(crate) fn requant_fast(acc: i32, r: &Requant, k: i32) -> i32 {
    let h = high_word(acc, r.mult);
    (h.wrapping_shr(r.shift.wrapping_sub(2) as u32) + k) >> 1
}

/// The high word of the 64-bit product `a·b`, the way the core computes it
/// best: one `smull` where it has one, [`mul_hi`] on ARMv6-M (see
/// `ingot_dsp::LONG_MULTIPLY`). Every kernel's 32-bit requantization
/// path takes its product here, so none of them calls `__aeabi_lmul`.
#[inline(always)]
pub(crate) const fn high_word(a: i32, b: i32) -> i32 {
    if ingot_dsp::LONG_MULTIPLY {
        ((a as i64 * b as i64) >> 32) as i32
    } else {
        mul_hi(a, b)
    }
}

/// The high word of the 64-bit product `a·b`: `(a·b) >> 32` (arithmetic
/// shift), from four 16-bit multiplies with 32-bit intermediates (Warren,
/// "Hacker's Delight", 2nd ed. 2012, section 8-2, `mulhs`). Used where the
/// core has no 32×32→64 multiply (see `ingot_dsp::LONG_MULTIPLY`); exact
/// for every pair of `i32`.
#[inline(always)]
pub(crate) const fn mul_hi(a: i32, b: i32) -> i32 {
    let (a0, a1) = (a & 0xffff, a >> 16);
    let (b0, b1) = (b & 0xffff, b >> 16);
    // a0, b0 in [0, 2^16); a1, b1 in [-2^15, 2^15): no step below
    // leaves i32 (the largest is 32,767·65,535 + 65,535 < 2^31).
    let w0 = ((a0 as u32) * (b0 as u32)) >> 16;
    let t = a1 * b0 + w0 as i32;
    let w1 = a0 * b1 + (t & 0xffff);
    a1 * b1 + (t >> 16) + (w1 >> 16)
}

/// Saturate an i64 to the int8 range.
#[inline(always)]
pub const fn sat_i8(v: i64) -> i8 {
    if v < i8::MIN as i64 {
        i8::MIN
    } else if v > i8::MAX as i64 {
        i8::MAX
    } else {
        v as i8
    }
}

/// Worst-case accumulator magnitude for one output channel:
/// `|bias| + 255 · Σ|w|`.
///
/// `255` is the largest `|x - z_in|` for int8 data, so this bounds both the
/// folded accumulator `bias_folded + Σ w·x` (where `|x| <= 128`) and the
/// unfolded `bias_q + Σ w·(x - z_in)`. The kernels add in wrapping i32; the
/// compiler must keep this below `2^31` (see [`acc_fits`]).
pub const fn acc_worst_case(weight_row: &[i8], bias: i32) -> i64 {
    let mut s: i64 = 0;
    let mut i = 0;
    while i < weight_row.len() {
        let w = weight_row[i] as i64;
        s += if w < 0 { -w } else { w };
        i += 1;
    }
    let b = bias as i64;
    (if b < 0 { -b } else { b }) + 255 * s
}

/// True when [`acc_worst_case`] is below `2^31`, i.e. the i32 accumulator of
/// this channel can never overflow.
pub const fn acc_fits(weight_row: &[i8], bias: i32) -> bool {
    acc_worst_case(weight_row, bias) < (1i64 << 31)
}

#[cfg(test)]
mod tests {
    use super::{fast_requant, finish_one, mul_hi, Fast, OutputQuant, Requant};
    use proptest::prelude::*;

    /// A valid multiplier: zero, or a mantissa of either sign with
    /// `|mult|` in `[2^30, 2^31)`; any total shift in `1..=62`, most of
    /// them in the 32-bit path's `33..=62` (the usual case).
    fn multiplier() -> impl Strategy<Value = Requant> {
        let mult = prop_oneof![
            1 => Just(0i32),
            4 => (1i32 << 30)..=i32::MAX,
            4 => (i32::MIN + 1)..=-(1i32 << 30),
        ];
        let shift = prop_oneof![1 => -30i32..=1, 4 => 2i32..=31];
        (mult, shift).prop_map(|(mult, shift)| Requant { mult, shift })
    }

    /// A valid output: zero point in int8, `min <= max`, the whole range
    /// often (the `ssat` finish).
    fn output() -> impl Strategy<Value = OutputQuant> {
        (-128i32..=127, any::<i8>(), any::<i8>(), any::<bool>()).prop_map(|(zp, a, b, full)| {
            if full {
                OutputQuant::linear(zp)
            } else {
                OutputQuant::clamped(zp, a.min(b), a.max(b))
            }
        })
    }

    /// An accumulator: anywhere in i32, or near zero where the rounding
    /// ties and the clamp bounds are.
    fn accumulator() -> impl Strategy<Value = i32> {
        prop_oneof![any::<i32>(), -(1i32 << 20)..(1 << 20)]
    }

    /// The reference is the high word of the exact 64-bit product (the
    /// definition of `smull`'s high register; common practice).
    fn reference(a: i32, b: i32) -> i32 {
        ((a as i64 * b as i64) >> 32) as i32
    }

    #[test]
    fn mul_hi_on_the_edges() {
        let edges = [
            i32::MIN,
            i32::MIN + 1,
            -(1 << 30),
            -65_536,
            -65_535,
            -32_769,
            -32_768,
            -1,
            0,
            1,
            32_767,
            32_768,
            65_535,
            65_536,
            1 << 30,
            i32::MAX - 1,
            i32::MAX,
        ];
        for a in edges {
            for b in edges {
                assert_eq!(mul_hi(a, b), reference(a, b), "{a} · {b}");
            }
        }
    }

    proptest! {
        #[test]
        fn mul_hi_is_the_high_word_of_the_product(a in any::<i32>(), b in any::<i32>()) {
            prop_assert_eq!(mul_hi(a, b), reference(a, b));
        }
    }

    proptest! {
        /// The fast finish gives the bytes of `Requant::apply` (the
        /// project's own reference, itself checked against the real-number
        /// rounding in `tests/it/requant.rs`), and is offered exactly when
        /// every multiplier takes the 32-bit path.
        #[test]
        fn fast_finish_is_apply(
            rqs in proptest::collection::vec(multiplier(), 1..4),
            out in output(),
            accs in proptest::collection::vec(accumulator(), 4),
        ) {
            prop_assert!(rqs.iter().all(Requant::is_valid));
            let fast = fast_requant(&rqs, out);
            // `apply`'s 32-bit path: `30 + shift >= 32`.
            prop_assert_eq!(fast.is_some(), rqs.iter().all(|r| r.shift >= 2));
            if let Some(f) = fast {
                let full = (out.min, out.max) == (i8::MIN, i8::MAX);
                prop_assert_eq!(matches!(f, Fast::Full { .. }), full);
            }
            for r in &rqs {
                for &a in &accs {
                    prop_assert_eq!(finish_one(fast, a, r, out), r.apply(a, out), "{:?} {:?} {}", r, out, a);
                }
            }
        }
    }
}
