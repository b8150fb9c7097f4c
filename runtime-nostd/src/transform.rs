//! Per-channel input transforms fused into a convolution's gather
//! (pre-activation batch-norm + ReLU, as in densely connected networks).

/// Affine per-channel transform with one common shift:
///
/// ```text
/// t  = (x - zp_in) * mul[ch] + add[ch]                      (i32)
/// t' = (t + (1 << (shift - 1))) >> shift   if shift > 0     (round half up)
///    = t                                   if shift == 0
/// q' = clamp(zp_out + t', min, max)
/// ```
///
/// `mul` may be negative (a batch-norm with negative gamma). A fused ReLU is
/// `min = zp_out`. Validity ([`InputTransform::is_valid_for`]) requires
/// `255·|mul| + |add| + 2^(shift-1) < 2^30` for every channel, so every
/// step fits i32 with room to spare: the transform runs once per gathered
/// value, and on a 32-bit core 64-bit arithmetic would cost several times
/// the multiply-accumulates it feeds.
#[derive(Debug, Clone, Copy)]
pub struct AffineTransform<'a> {
    /// Per input channel multiplier (at least `C_in` entries).
    pub mul: &'a [i32],
    /// Per input channel additive term, already in units of `2^-shift`
    /// output steps (at least `C_in` entries).
    pub add: &'a [i32],
    /// Common right shift, `0..=29`.
    pub shift: u32,
    /// Zero point of the stored (untransformed) input.
    pub zp_in: i32,
    /// Zero point of the transformed values; must equal the convolution's
    /// `input_zp` (the padding value).
    pub zp_out: i32,
    /// Lower clamp of the transformed value.
    pub min: i8,
    /// Upper clamp of the transformed value.
    pub max: i8,
}

/// A transform applied to each input value while a convolution gathers its
/// patch; no transformed map is ever stored.
#[derive(Debug, Clone, Copy)]
pub enum InputTransform<'a> {
    /// Integer affine map, see [`AffineTransform`].
    Affine(AffineTransform<'a>),
    /// Per-channel lookup: `q' = table[ch * 256 + (x as u8) as usize]`; the
    /// slice holds at least `256 * C_in` entries.
    Table(&'a [i8]),
}

impl AffineTransform<'_> {
    /// Transform one value of input channel `ch` (see the type docs). A
    /// channel without parameters (`ch >= mul.len()`, which a validated
    /// transform never sees) transforms as `mul = add = 0`.
    #[inline(always)]
    pub fn apply(&self, ch: usize, x: i8) -> i8 {
        let (m, a) = match (self.mul.get(ch), self.add.get(ch)) {
            (Some(&m), Some(&a)) => (m, a),
            _ => (0, 0),
        };
        self.apply_with(m, a, self.rounding(), x)
    }

    /// `2^(shift-1)`, or 0 without a shift: adding it before the shift
    /// rounds half up, and `(t + 0) >> 0 == t`.
    #[inline(always)]
    pub const fn rounding(&self) -> i32 {
        if self.shift > 0 {
            1 << (self.shift - 1)
        } else {
            0
        }
    }

    /// [`apply`](Self::apply) with one channel's `mul` and `add` and
    /// [`rounding`](Self::rounding) already looked up, for loops that walk
    /// the channels in order.
    #[inline(always)]
    pub fn apply_with(&self, mul: i32, add: i32, rounding: i32, x: i8) -> i8 {
        let t = (x as i32 - self.zp_in).wrapping_mul(mul) + add;
        let r = ((t + rounding) >> self.shift) + self.zp_out;
        // Not `clamp`: its `min <= max` assertion is a panic path, and the
        // checks already guarantee it.
        r.max(self.min as i32).min(self.max as i32) as i8
    }

    /// Transforms `src` (channels `0..src.len()` of one pixel) into `dst`,
    /// widened. Does nothing when `dst`, `mul` or `add` is shorter than
    /// `src` (a validated transform never is).
    #[inline(always)]
    pub fn apply_pixel(&self, dst: &mut [i16], src: &[i8]) {
        let n = src.len();
        let rounding = self.rounding();
        let (Some(dst), Some(mul), Some(add)) =
            (dst.get_mut(..n), self.mul.get(..n), self.add.get(..n))
        else {
            return;
        };
        for ((d, &v), (&m, &a)) in dst.iter_mut().zip(src).zip(mul.iter().zip(add)) {
            crate::dot::no_unroll();
            *d = self.apply_with(m, a, rounding, v) as i16;
        }
    }

    /// True when channel `ch`'s parameters exist and keep
    /// [`apply`](Self::apply) inside i32 (see the type docs).
    pub fn fits_i32(&self, ch: usize) -> bool {
        match (self.mul.get(ch), self.add.get(ch)) {
            (Some(&m), Some(&a)) => self.fits(m, a),
            _ => false,
        }
    }

    /// [`fits_i32`](Self::fits_i32) for one channel's `mul` and `add`.
    const fn fits(&self, mul: i32, add: i32) -> bool {
        // The shift is checked first: `rounding` would overflow for a
        // shift of 32 or more.
        self.shift <= 29
            && 255 * (mul as i64).abs() + (add as i64).abs() + (self.rounding() as i64) < 1 << 30
    }

    /// True when the first `channels` channels all fit (see
    /// [`fits_i32`](Self::fits_i32)).
    const fn all_fit(&self, channels: usize) -> bool {
        if self.mul.len() < channels || self.add.len() < channels {
            return false;
        }
        let mut ch = 0;
        while ch < channels {
            if !self.fits(self.mul[ch], self.add[ch]) {
                return false;
            }
            ch += 1;
        }
        true
    }
}

impl InputTransform<'_> {
    /// Transform one value of input channel `ch`.
    /// Out-of-range channels (never seen by a validated transform) give the
    /// value 0 from a table.
    #[inline(always)]
    pub fn apply(&self, ch: usize, x: i8) -> i8 {
        match self {
            InputTransform::Affine(a) => a.apply(ch, x),
            InputTransform::Table(t) => match t.get(ch * 256 + (x as u8) as usize) {
                Some(&v) => v,
                None => 0,
            },
        }
    }

    /// True when the per-channel data covers `channels` input channels and
    /// the parameters are in range (`pad_value` is the convolution's
    /// `input_zp`, which an affine transform's `zp_out` must equal).
    pub const fn is_valid_for(&self, channels: usize, pad_value: i8) -> bool {
        match self {
            InputTransform::Affine(a) => {
                a.min <= a.max
                    && a.zp_out == pad_value as i32
                    && a.zp_out >= -255
                    && a.zp_out <= 255
                    && a.zp_in >= -128
                    && a.zp_in <= 127
                    && a.all_fit(channels)
            }
            InputTransform::Table(t) => match channels.checked_mul(256) {
                Some(n) => t.len() >= n,
                None => false,
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn affine<'a>(mul: &'a [i32], add: &'a [i32], shift: u32) -> AffineTransform<'a> {
        AffineTransform {
            mul,
            add,
            shift,
            zp_in: 0,
            zp_out: -128,
            min: -128,
            max: 127,
        }
    }

    #[test]
    fn validity_is_the_i32_bound_and_never_overflows() {
        // 255·4096 + 1000 + 2^9 is far below 2^30.
        let t = InputTransform::Affine(affine(&[4096], &[1000], 10));
        assert!(t.is_valid_for(1, -128));
        // 255·2^23 > 2^30.
        let t = InputTransform::Affine(affine(&[1 << 23], &[0], 10));
        assert!(!t.is_valid_for(1, -128));
        // A shift past the i32 width is refused, not a shift overflow.
        for shift in [30, 31, 32, 40, 62, 200] {
            let t = InputTransform::Affine(affine(&[1], &[0], shift));
            assert!(!t.is_valid_for(1, -128), "shift {shift}");
        }
        // The pad value must be the output zero point.
        let t = InputTransform::Affine(affine(&[1], &[0], 0));
        assert!(!t.is_valid_for(1, 0));
    }
}
