//! Naive reference implementations, written for clarity: nested loops,
//! i64/i128 arithmetic, explicit padding. Shared by the integration tests.
#![allow(dead_code)]

use ingot_rt::{AffineTransform, InputTransform, MapRef, Requant};

/// Reference requantization: round(acc · mult / 2^t), ties toward +∞,
/// computed with i128 and floor division.
pub fn ref_scale(x: i64, rq: Requant) -> i64 {
    let t = 31 + rq.shift;
    let num = x as i128 * rq.mult as i128;
    let den = 1i128 << t;
    // floor((num + den/2) / den)
    (num + den / 2).div_euclid(den) as i64
}

/// Clamp zp + v to [lo, hi].
pub fn ref_finish(v: i64, zp: i32, lo: i8, hi: i8) -> i8 {
    (v + zp as i64).clamp(lo as i64, hi as i64) as i8
}

/// Read element (y, x, ch) of a map.
pub fn get(arena: &[i8], m: &MapRef, y: usize, x: usize, ch: usize) -> i8 {
    arena[m.offset + (y * m.w + x) * m.stride + ch]
}

/// A small deterministic generator for non-proptest data.
pub struct Lcg(pub u64);
impl Lcg {
    pub fn next(&mut self) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        self.0 >> 33
    }
    pub fn i8(&mut self) -> i8 {
        self.next() as u8 as i8
    }
    pub fn range(&mut self, lo: i64, hi: i64) -> i64 {
        lo + (self.next() % ((hi - lo + 1) as u64)) as i64
    }
}

/// Parameters of a reference convolution.
#[derive(Debug, Clone)]
pub struct RefConv {
    pub kh: usize,
    pub kw: usize,
    pub sy: usize,
    pub sx: usize,
    pub dy: usize,
    pub dx: usize,
    pub pt: usize,
    pub pl: usize,
    pub pb: usize,
    pub pr: usize,
    pub groups: usize,
    pub pad_value: i8,
    pub zp_out: i32,
    pub lo: i8,
    pub hi: i8,
}

/// Reference transform: either affine or table.
#[derive(Debug, Clone)]
pub enum RefTransform {
    Affine {
        mul: Vec<i32>,
        add: Vec<i32>,
        shift: u32,
        zp_in: i32,
        zp_out: i32,
        lo: i8,
        hi: i8,
    },
    Table(Vec<i8>),
}

impl RefTransform {
    pub fn apply(&self, ch: usize, x: i8) -> i8 {
        match self {
            RefTransform::Affine {
                mul,
                add,
                shift,
                zp_in,
                zp_out,
                lo,
                hi,
            } => {
                let t = (x as i128 - *zp_in as i128) * mul[ch] as i128 + add[ch] as i128;
                let t = if *shift == 0 {
                    t
                } else {
                    // floor((t + 2^(s-1)) / 2^s)
                    (t + (1i128 << (shift - 1))).div_euclid(1i128 << shift)
                };
                (t + *zp_out as i128).clamp(*lo as i128, *hi as i128) as i8
            }
            RefTransform::Table(t) => t[ch * 256 + (x as u8) as usize],
        }
    }
}

/// Reference convolution; returns the output in dense HWC order.
#[allow(clippy::too_many_arguments)]
pub fn ref_conv(
    arena: &[i8],
    input: &MapRef,
    out_h: usize,
    out_w: usize,
    out_c: usize,
    weights: &[i8],
    bias: &[i32],
    rq: &[Requant],
    p: &RefConv,
    tr: Option<&RefTransform>,
) -> Vec<i8> {
    let cpg = input.c / p.groups;
    let opg = out_c / p.groups;
    let mut out = vec![0i8; out_h * out_w * out_c];
    for oy in 0..out_h {
        for ox in 0..out_w {
            for o in 0..out_c {
                let g = o / opg;
                let mut acc: i64 = bias[o] as i64;
                for ky in 0..p.kh {
                    for kx in 0..p.kw {
                        let iy = (oy * p.sy + ky * p.dy) as i64 - p.pt as i64;
                        let ix = (ox * p.sx + kx * p.dx) as i64 - p.pl as i64;
                        for ci in 0..cpg {
                            let ch = g * cpg + ci;
                            let x: i8 =
                                if iy < 0 || ix < 0 || iy >= input.h as i64 || ix >= input.w as i64
                                {
                                    p.pad_value
                                } else {
                                    let v = get(arena, input, iy as usize, ix as usize, ch);
                                    match tr {
                                        Some(t) => t.apply(ch, v),
                                        None => v,
                                    }
                                };
                            let wv = weights[((o * p.kh + ky) * p.kw + kx) * cpg + ci];
                            acc += wv as i64 * x as i64;
                        }
                    }
                }
                assert!(acc.abs() < 1 << 31, "test data overflowed the accumulator");
                out[(oy * out_w + ox) * out_c + o] =
                    ref_finish(ref_scale(acc, rq[o]), p.zp_out, p.lo, p.hi);
            }
        }
    }
    out
}

/// The data of a random fused input transform for `c` channels, drawn in
/// one order for every test: table bytes from `byte`, then the affine
/// multipliers, offsets, input zero point and shift.
pub struct RandTransform {
    pub table: Vec<i8>,
    pub mul: Vec<i32>,
    pub add: Vec<i32>,
    pub zp_in: i32,
    pub shift: u32,
}

impl RandTransform {
    pub fn new(rng: &mut Lcg, c: usize, mut byte: impl FnMut(&mut Lcg) -> i8) -> Self {
        let table = (0..256 * c).map(|_| byte(rng)).collect();
        let mul = (0..c).map(|_| rng.range(-70000, 70000) as i32).collect();
        let add = (0..c)
            .map(|_| rng.range(-1 << 24, 1 << 24) as i32)
            .collect();
        let zp_in = rng.range(-128, 127) as i32;
        let shift = rng.range(0, 16) as u32;
        RandTransform {
            table,
            mul,
            add,
            zp_in,
            shift,
        }
    }

    /// The reference and the kernel's form of transform `kind` (0 none,
    /// 1 affine clamped to `[pad, 127]` with output zero point `pad`, 2
    /// table).
    pub fn pair(&self, kind: u8, pad: i8) -> (Option<RefTransform>, Option<InputTransform<'_>>) {
        match kind {
            1 => (
                Some(RefTransform::Affine {
                    mul: self.mul.clone(),
                    add: self.add.clone(),
                    shift: self.shift,
                    zp_in: self.zp_in,
                    zp_out: pad as i32,
                    lo: pad,
                    hi: 127,
                }),
                Some(InputTransform::Affine(AffineTransform {
                    mul: &self.mul,
                    add: &self.add,
                    shift: self.shift,
                    zp_in: self.zp_in,
                    zp_out: pad as i32,
                    min: pad,
                    max: 127,
                })),
            ),
            2 => (
                Some(RefTransform::Table(self.table.clone())),
                Some(InputTransform::Table(&self.table)),
            ),
            _ => (None, None),
        }
    }
}
