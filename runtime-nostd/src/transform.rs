//! Per-channel input transforms fused into a convolution's gather
//! (pre-activation batch-norm + ReLU, as in densely connected networks).

/// Affine per-channel transform with one common shift:
///
/// ```text
/// t  = (x - zp_in) * mul[ch] + add[ch]                      (i64)
/// t' = (t + (1 << (shift - 1))) >> shift   if shift > 0     (round half up)
///    = t                                   if shift == 0
/// q' = clamp(zp_out + t', min, max)
/// ```
///
/// `mul` may be negative (a batch-norm with negative gamma). A fused ReLU is
/// `min = zp_out`. `|x - zp_in| <= 255` and `|mul| < 2^31` keep every step
/// far inside i64.
#[derive(Debug, Clone, Copy)]
pub struct AffineTransform<'a> {
    /// Per input channel multiplier (at least `C_in` entries).
    pub mul: &'a [i32],
    /// Per input channel additive term, already in units of `2^-shift`
    /// output steps (at least `C_in` entries).
    pub add: &'a [i32],
    /// Common right shift, `0..=62`.
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
    /// Transform one value of input channel `ch` (see the type docs).
    #[inline(always)]
    pub fn apply(&self, ch: usize, x: i8) -> i8 {
        let mut t = (x as i64 - self.zp_in as i64) * self.mul[ch] as i64 + self.add[ch] as i64;
        if self.shift > 0 {
            t = (t + (1i64 << (self.shift - 1))) >> self.shift;
        }
        let r = t + self.zp_out as i64;
        if r < self.min as i64 {
            self.min
        } else if r > self.max as i64 {
            self.max
        } else {
            r as i8
        }
    }
}

impl InputTransform<'_> {
    /// Transform one value of input channel `ch`.
    #[inline(always)]
    pub fn apply(&self, ch: usize, x: i8) -> i8 {
        match self {
            InputTransform::Affine(a) => a.apply(ch, x),
            InputTransform::Table(t) => t[ch * 256 + (x as u8) as usize],
        }
    }

    /// True when the per-channel data covers `channels` input channels and
    /// the parameters are in range (`pad_value` is the convolution's
    /// `input_zp`, which an affine transform's `zp_out` must equal).
    pub fn is_valid_for(&self, channels: usize, pad_value: i8) -> bool {
        match self {
            InputTransform::Affine(a) => {
                a.mul.len() >= channels
                    && a.add.len() >= channels
                    && a.shift <= 62
                    && a.min <= a.max
                    && a.zp_out == pad_value as i32
            }
            InputTransform::Table(t) => channels
                .checked_mul(256)
                .is_some_and(|n| t.len() >= n),
        }
    }
}
