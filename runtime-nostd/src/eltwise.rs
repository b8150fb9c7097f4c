//! Element-wise addition of two quantized maps (residual connections).

use crate::{Error, MapRef, OutputQuant, Requant};

/// Default headroom shift for [`AddParams::left_shift`].
pub const ADD_LEFT_SHIFT: u32 = 20;

/// Parameters of [`add`]. Integer formula, all in i64 except where noted:
///
/// ```text
/// da  = (a - a_zp) << left_shift          (|da| <= 255·2^22 < 2^30, fits i32)
/// db  = (b - b_zp) << left_shift
/// ta  = a_rq.scale(da)                    (a_rq ≈ s_a / s_c)
/// tb  = b_rq.scale(db)                    (b_rq ≈ s_b / s_c)
/// t   = clamp_i32(ta + tb)                (never clamps when |a_rq|,|b_rq| <= 1)
/// out = clamp(z_out + out_rq.scale(t), min, max)   (out_rq ≈ s_c / (2^left_shift · s_out))
/// ```
///
/// `s_c = 2·max(s_a, s_b)` is the shared intermediate scale, so both input
/// multipliers are at most 0.5 and the `left_shift` bits of headroom keep
/// their rounding error far below one output step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct AddParams {
    /// Zero point of input `a`.
    pub a_zp: i32,
    /// Zero point of input `b`.
    pub b_zp: i32,
    /// Multiplier of input `a` to the shared scale.
    pub a_rq: Requant,
    /// Multiplier of input `b` to the shared scale.
    pub b_rq: Requant,
    /// Multiplier from the shared scale (times `2^left_shift`) to the output.
    pub out_rq: Requant,
    /// Headroom shift, `0..=22`.
    pub left_shift: u32,
    /// Output zero point and clamp.
    pub out: OutputQuant,
}

impl AddParams {
    /// Host-side constructor from real scales, with
    /// `left_shift = ADD_LEFT_SHIFT`.
    ///
    /// **Uses floating point: compiler side only, off the inference path.**
    /// Returns `None` if a scale is not positive and finite or a multiplier
    /// cannot be represented.
    pub fn from_scales(
        s_a: f64,
        a_zp: i32,
        s_b: f64,
        b_zp: i32,
        s_out: f64,
        out: OutputQuant,
    ) -> Option<AddParams> {
        let ok = |s: f64| s.is_finite() && s > 0.0;
        if !(ok(s_a) && ok(s_b) && ok(s_out)) {
            return None;
        }
        let s_c = 2.0 * if s_a > s_b { s_a } else { s_b };
        let p = AddParams {
            a_zp,
            b_zp,
            a_rq: Requant::from_real(s_a / s_c)?,
            b_rq: Requant::from_real(s_b / s_c)?,
            out_rq: Requant::from_real(s_c / ((1u64 << ADD_LEFT_SHIFT) as f64 * s_out))?,
            left_shift: ADD_LEFT_SHIFT,
            out,
        };
        if p.is_valid() {
            Some(p)
        } else {
            None
        }
    }

    /// True when every field is in range.
    pub const fn is_valid(&self) -> bool {
        self.a_zp >= -128
            && self.a_zp <= 127
            && self.b_zp >= -128
            && self.b_zp <= 127
            && self.a_rq.is_valid()
            && self.b_rq.is_valid()
            && self.out_rq.is_valid()
            && self.left_shift <= 22
            && self.out.is_valid()
    }

    /// The formula above for one element.
    #[inline(always)]
    pub fn apply(&self, a: i8, b: i8) -> i8 {
        let da = (a as i32 - self.a_zp) << self.left_shift;
        let db = (b as i32 - self.b_zp) << self.left_shift;
        let t = self.a_rq.scale(da) + self.b_rq.scale(db);
        let t = if t > i32::MAX as i64 {
            i32::MAX
        } else if t < i32::MIN as i64 {
            i32::MIN
        } else {
            t as i32
        };
        self.out.finish(self.out_rq.scale(t))
    }
}

/// Element-wise `out = a + b` in real terms (formula on [`AddParams`]).
///
/// All three maps have the same shape. In place is allowed: `output` may be
/// exactly `a` or exactly `b` (the same `MapRef`); otherwise it must not
/// share elements with either input.
pub fn add(
    arena: &mut [i8],
    a: MapRef,
    b: MapRef,
    output: MapRef,
    p: &AddParams,
) -> Result<(), Error> {
    let args = check_add(arena.len(), a, b, output, *p)?;
    add_run(arena, &args, 0, usize::MAX);
    Ok(())
}

/// [`add`] for rows `[rows.0, rows.1)` only (clipped), for a row
/// pipeline; any of the maps may be a ring.
pub fn add_rows(
    arena: &mut [i8],
    a: MapRef,
    b: MapRef,
    output: MapRef,
    p: &AddParams,
    rows: (usize, usize),
) -> Result<(), Error> {
    let args = check_add(arena.len(), a, b, output, *p)?;
    add_run(arena, &args, rows.0, rows.1);
    Ok(())
}

/// An addition that passed [`check_add`]: running it cannot fail.
#[derive(Debug, Clone, Copy)]
pub(crate) struct AddArgs {
    pub(crate) a: MapRef,
    pub(crate) b: MapRef,
    pub(crate) output: MapRef,
    pub(crate) p: AddParams,
}

/// The checks of [`add`] (a `const fn`, see [`crate::checked`]).
pub(crate) const fn check_add(
    n: usize,
    a: MapRef,
    b: MapRef,
    output: MapRef,
    p: AddParams,
) -> Result<AddArgs, Error> {
    if let Err(e) = a.check(n) {
        return Err(e);
    }
    if let Err(e) = b.check(n) {
        return Err(e);
    }
    if let Err(e) = output.check(n) {
        return Err(e);
    }
    if !a.same_shape(&b) || !a.same_shape(&output) {
        return Err(Error::ShapeMismatch);
    }
    if (!same(&output, &a) && !output.is_disjoint(&a))
        || (!same(&output, &b) && !output.is_disjoint(&b))
    {
        return Err(Error::Overlap);
    }
    if !p.is_valid() {
        return Err(Error::BadParams);
    }
    Ok(AddArgs { a, b, output, p })
}

/// `x == y` for maps, in a `const fn`.
pub(crate) const fn same(x: &MapRef, y: &MapRef) -> bool {
    x.offset == y.offset
        && x.h == y.h
        && x.w == y.w
        && x.c == y.c
        && x.stride == y.stride
        && x.rows == y.rows
}

/// Runs a checked addition for rows `[y0, y1)` (`y1` clipped to the
/// height).
pub(crate) fn add_run(arena: &mut [i8], args: &AddArgs, y0: usize, y1: usize) {
    let (a, b, output, p) = (args.a, args.b, args.output, &args.p);
    let y1 = if y1 < a.h { y1 } else { a.h };
    for y in y0..y1 {
        let (ra, rb, ro) = (a.row(y), b.row(y), output.row(y));
        for x in 0..a.w {
            let (pa, pb, po) = (ra + x * a.stride, rb + x * b.stride, ro + x * output.stride);
            for ch in 0..a.c {
                let (Some(&va), Some(&vb)) = (arena.get(pa + ch), arena.get(pb + ch)) else {
                    return;
                };
                let Some(d) = arena.get_mut(po + ch) else {
                    return;
                };
                *d = p.apply(va, vb);
            }
        }
    }
}
