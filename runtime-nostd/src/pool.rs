//! Max, average and global average pooling.
//!
//! Pooling output must not share elements with its input (the kernels
//! return [`Error::Overlap`]); write to another buffer or region.

use crate::{Error, MapRef, OutputQuant, Requant, Window};

/// Quantization parameters of a pooling layer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PoolQuant {
    /// Input zero point.
    pub in_zp: i32,
    /// Rescaling, see each kernel. `None` means "same scale", and for max
    /// pooling also "same zero point".
    pub requant: Option<Requant>,
    /// Output zero point and clamp.
    pub out: OutputQuant,
}

impl PoolQuant {
    const fn is_valid(&self) -> bool {
        self.out.is_valid()
            && self.in_zp >= -128
            && self.in_zp <= 127
            && match self.requant {
                Some(r) => r.is_valid(),
                None => true,
            }
    }
}

/// A pooling call that passed its checks: running it cannot fail.
#[derive(Debug, Clone, Copy)]
pub(crate) struct PoolArgs {
    pub(crate) input: MapRef,
    pub(crate) output: MapRef,
    pub(crate) window: Window,
    pub(crate) q: PoolQuant,
}

const fn check_pool(
    arena_len: usize,
    input: &MapRef,
    output: &MapRef,
    q: &PoolQuant,
) -> Result<(), Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.is_disjoint(output) {
        return Err(Error::Overlap);
    }
    if !q.is_valid() {
        return Err(Error::BadParams);
    }
    if input.c != output.c {
        return Err(Error::ShapeMismatch);
    }
    Ok(())
}

/// The checks of [`max_pool2d`] and [`avg_pool2d`] (a `const fn`, see
/// [`crate::checked`]).
pub(crate) const fn check_window_pool(
    arena_len: usize,
    input: MapRef,
    output: MapRef,
    window: Window,
    q: PoolQuant,
) -> Result<PoolArgs, Error> {
    if let Err(e) = check_pool(arena_len, &input, &output, &q) {
        return Err(e);
    }
    if window.dilation_y == 0 || window.dilation_x == 0 {
        return Err(Error::BadParams);
    }
    if !window.matches(input.h, input.w, output.h, output.w) {
        return Err(Error::ShapeMismatch);
    }
    Ok(PoolArgs {
        input,
        output,
        window,
        q,
    })
}

/// The checks of [`global_avg_pool`] (a `const fn`, see [`crate::checked`]).
pub(crate) const fn check_global_pool(
    arena_len: usize,
    input: MapRef,
    output: MapRef,
    q: PoolQuant,
) -> Result<PoolArgs, Error> {
    if let Err(e) = check_pool(arena_len, &input, &output, &q) {
        return Err(e);
    }
    // The sum walks the pixels as one run: whole maps only.
    if input.is_ring() || output.is_ring() {
        return Err(Error::BadParams);
    }
    if output.h != 1 || output.w != 1 || input.pixels() == 0 {
        return Err(Error::ShapeMismatch);
    }
    if input.pixels() >= 1 << 23 {
        return Err(Error::BadParams);
    }
    Ok(PoolArgs {
        input,
        output,
        window: Window::square(1, 1, 0),
        q,
    })
}

/// Rounded division `round(s / n)` with ties toward +∞:
/// `floor((2s + n) / (2n))`, `n > 0` (0 for `n <= 0`, which no kernel
/// passes).
#[inline(always)]
pub const fn div_round(s: i64, n: i64) -> i64 {
    if n > 0 && n & (n - 1) == 0 {
        // A power of two (2×2 and 4×4 windows): the arithmetic shift is
        // the same floor division without a 64-bit division routine, which
        // costs about a hundred instructions on a 32-bit core.
        (2 * s + n) >> (n.trailing_zeros() + 1)
    } else {
        match (2 * s + n).checked_div_euclid(2 * n) {
            Some(v) => v,
            None => 0,
        }
    }
}

/// Max pooling. Padded taps are ignored (they never win); a window that
/// covers only padding yields the real value 0 (`in_zp`).
///
/// With `q.requant == None` the output is the maximum itself, clamped to
/// `[min, max]` (same scale and zero point). With `Some(r)`
/// (`M = s_in / s_out > 0`, monotone, so taking the maximum first is exact):
/// `out = clamp(z_out + r.scale(max - in_zp))`.
pub fn max_pool2d(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    window: &Window,
    q: &PoolQuant,
) -> Result<(), Error> {
    max_pool2d_rows(arena, input, output, window, q, (0, usize::MAX))
}

/// [`max_pool2d`] for output rows `[rows.0, rows.1)` only (clipped), for
/// a row pipeline; `input` and `output` may be rings.
pub fn max_pool2d_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    window: &Window,
    q: &PoolQuant,
    rows: (usize, usize),
) -> Result<(), Error> {
    let a = check_window_pool(arena.len(), input, output, *window, *q)?;
    max_pool_run(arena, &a, rows.0, rows.1);
    Ok(())
}

/// [`avg_pool2d`] for output rows `[rows.0, rows.1)` only (clipped), for
/// a row pipeline; `input` and `output` may be rings.
pub fn avg_pool2d_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    window: &Window,
    q: &PoolQuant,
    rows: (usize, usize),
) -> Result<(), Error> {
    let a = check_window_pool(arena.len(), input, output, *window, *q)?;
    avg_pool_run(arena, &a, rows.0, rows.1);
    Ok(())
}

/// Runs a checked max pooling for output rows `[y0, y1)` (`y1` clipped to
/// the output's height).
pub(crate) fn max_pool_run(arena: &mut [i8], a: &PoolArgs, y0: usize, y1: usize) {
    let (input, output, w, q) = (a.input, a.output, &a.window, &a.q);
    let y1 = if y1 < output.h { y1 } else { output.h };
    for oy in y0..y1 {
        let out_row = output.row(oy);
        for ox in 0..output.w {
            let dst = out_row + ox * output.stride;
            for ch in 0..input.c {
                let mut m: i32 = i32::MIN;
                for ky in 0..w.kh {
                    let yy = oy * w.step_y + ky * w.dilation_y;
                    if yy < w.pad.top || yy - w.pad.top >= input.h {
                        continue;
                    }
                    for kx in 0..w.kw {
                        let xx = ox * w.step_x + kx * w.dilation_x;
                        if xx < w.pad.left || xx - w.pad.left >= input.w {
                            continue;
                        }
                        let Some(&v) = arena.get(input.index(yy - w.pad.top, xx - w.pad.left, ch))
                        else {
                            return;
                        };
                        if v as i32 > m {
                            m = v as i32;
                        }
                    }
                }
                if m == i32::MIN {
                    m = q.in_zp;
                }
                let Some(d) = arena.get_mut(dst + ch) else {
                    return;
                };
                *d = match q.requant {
                    None => q.out.finish(m as i64 - q.out.zero_point as i64),
                    Some(r) => r.apply(m - q.in_zp, q.out),
                };
            }
        }
    }
}

/// Average pooling. Every one of the `kh·kw` taps counts; padded taps are
/// real zeros (contribute `0` to the centred sum). With
/// `S = Σ (x - in_zp)` over in-bounds taps:
///
/// * `q.requant == None`: `out = clamp(z_out + div_round(S, kh·kw))`
///   (same scale; ties toward +∞).
/// * `Some(r)` where `r ≈ s_in / (s_out · kh · kw)`:
///   `out = clamp(z_out + r.scale(S))` (one rounding).
pub fn avg_pool2d(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    window: &Window,
    q: &PoolQuant,
) -> Result<(), Error> {
    avg_pool2d_rows(arena, input, output, window, q, (0, usize::MAX))
}

/// Runs a checked average pooling for output rows `[y0, y1)` (`y1`
/// clipped to the output's height).
pub(crate) fn avg_pool_run(arena: &mut [i8], a: &PoolArgs, y0: usize, y1: usize) {
    let (input, output, w, q) = (a.input, a.output, &a.window, &a.q);
    let n = w.taps() as i64;
    let y1 = if y1 < output.h { y1 } else { output.h };
    for oy in y0..y1 {
        let out_row = output.row(oy);
        for ox in 0..output.w {
            let dst = out_row + ox * output.stride;
            for ch in 0..input.c {
                let mut s: i32 = 0;
                for ky in 0..w.kh {
                    let yy = oy * w.step_y + ky * w.dilation_y;
                    if yy < w.pad.top || yy - w.pad.top >= input.h {
                        continue;
                    }
                    for kx in 0..w.kw {
                        let xx = ox * w.step_x + kx * w.dilation_x;
                        if xx < w.pad.left || xx - w.pad.left >= input.w {
                            continue;
                        }
                        let Some(&v) = arena.get(input.index(yy - w.pad.top, xx - w.pad.left, ch))
                        else {
                            return;
                        };
                        s = s.wrapping_add(v as i32 - q.in_zp);
                    }
                }
                let Some(d) = arena.get_mut(dst + ch) else {
                    return;
                };
                *d = match q.requant {
                    None => q.out.finish(div_round(s as i64, n)),
                    Some(r) => r.apply(s, q.out),
                };
            }
        }
    }
}

/// Global average pooling to a `1×1×C` output: average pooling with the
/// window equal to the whole map, divisor `h·w` (same formulas as
/// [`avg_pool2d`], `r ≈ s_in / (s_out · h · w)`). `h·w` must stay below
/// `2^23` so the centred sum fits in i32.
pub fn global_avg_pool(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    q: &PoolQuant,
) -> Result<(), Error> {
    let a = check_global_pool(arena.len(), input, output, *q)?;
    global_pool_run(arena, &a);
    Ok(())
}

/// Runs a checked global average pooling.
pub(crate) fn global_pool_run(arena: &mut [i8], a: &PoolArgs) {
    let (input, output, q) = (a.input, a.output, &a.q);
    let n = input.pixels() as i64;
    for ch in 0..input.c {
        let mut s: i32 = 0;
        for px in 0..input.pixels() {
            let Some(&v) = arena.get(input.offset + px * input.stride + ch) else {
                return;
            };
            s += v as i32 - q.in_zp;
        }
        let Some(d) = arena.get_mut(output.offset + ch) else {
            return;
        };
        *d = match q.requant {
            None => q.out.finish(div_round(s as i64, n)),
            Some(r) => r.apply(s, q.out),
        };
    }
}
