//! Convolutions with one input channel (the "stem" that reads a gray
//! picture): every output pixel has only `kh·kw` taps (9 for a 3×3
//! kernel), so the general kernel's per-pixel costs (gathering a patch,
//! splitting the weight blocks, one call per block of rows) outweigh the
//! few multiply-accumulates. Here each output pixel's taps are packed into
//! 16-bit pairs once, kept in registers, and every output channel meets
//! them with one dual multiply-accumulate (`smlad`) per pair against
//! weights widened once per call into a small table on the stack, the
//! channel's bias and requantization beside its weights.
//!
//! Used on cores with the DSP extension (`ingot_dsp::NATIVE`) and on
//! hosts; on the Arm cores without it the dual multiply-accumulate is a
//! portable twin that costs more than the plain loops, so those keep them.

use crate::conv::{ConvArgs, Rows};
use crate::OutputQuant;

/// Words of the weight table: one entry of `pairs + 3` words per output
/// channel (the tap pairs, bias, multiplier, shift); a call whose channels
/// do not all fit runs in blocks of channels (2 KiB of stack at most would
/// be too much on the small cores: 512 B).
const TABLE: usize = 128;

/// Most tap pairs a stem kernel takes (32 taps, e.g. 5×5).
const MAX_PAIRS: usize = 16;

/// Pairs of a 3×3 kernel (the fifth holds the ninth tap and a zero).
const P3: usize = 5;

/// True when [`run`] takes a checked convolution: one input channel, one
/// group, no dilation, no input transform, at most `2·MAX_PAIRS` taps, on
/// a core with the DSP extension or a host (not Arm: there the portable
/// twins are cheap, and the tests run this path).
#[inline(always)]
pub(crate) fn applies(a: &ConvArgs<'_>) -> bool {
    let w = &a.p.window;
    (ingot_dsp::NATIVE || !cfg!(target_arch = "arm"))
        && a.input.c == 1
        && a.p.groups == 1
        && a.transform.is_none()
        && w.dilation_y == 1
        && w.dilation_x == 1
        && w.taps() > 0
        && w.taps() <= 2 * MAX_PAIRS
}

/// Output rows `[y0, y1)` of a checked convolution that [`applies`].
/// Returns false (nothing written) when a channel's requantization takes
/// the 64-bit path of [`crate::Requant::apply`] (a total shift below 32),
/// which the caller's general kernel then runs.
#[inline(never)]
pub(crate) fn run(arena: &mut [i8], a: &ConvArgs<'_>, y0: usize, y1: usize) -> bool {
    let m = a.output.c;
    let (Some(bias), Some(requant)) = (a.bias.get(..m), a.requant.get(..m)) else {
        return false;
    };
    if requant.iter().any(|r| r.shift < 2) {
        return false;
    }
    let w = &a.p.window;
    let taps = w.taps();
    let pairs = taps.div_ceil(2);
    let e = pairs + 3;
    let block = TABLE / e;
    if block == 0 || m == 0 {
        return true;
    }
    let mut table = [0u32; TABLE];
    let mut c0 = 0;
    while c0 < m {
        let n = if m - c0 < block { m - c0 } else { block };
        let Some(t) = table.get_mut(..n * e) else {
            return true;
        };
        for (j, entry) in t.chunks_exact_mut(e.max(1)).enumerate() {
            let o = c0 + j;
            let (Some(&b), Some(r)) = (bias.get(o), requant.get(o)) else {
                return true;
            };
            for (p, v) in entry.iter_mut().take(pairs).enumerate() {
                let lo = weight(a.rows, m, taps, o, 2 * p);
                let hi = if 2 * p + 1 < taps {
                    weight(a.rows, m, taps, o, 2 * p + 1)
                } else {
                    0
                };
                *v = ingot_dsp::portable::pack(lo as i16, hi as i16);
            }
            if let Some([vb, vm, vs]) = entry.get_mut(pairs..pairs + 3) {
                *vb = b as u32;
                *vm = r.mult as u32;
                // The total shift less 32 (see `finish`).
                *vs = (r.shift - 2) as u32;
            }
        }
        if pairs == P3 {
            rows3(arena, a, t, c0, y0, y1);
        } else {
            rows_any(arena, a, t, pairs, c0, y0, y1);
        }
        c0 += n;
    }
    true
}

/// Weight `t` (flattened `[ky][kx]`) of output channel `o`, from any
/// stored form (`k` weights a row, `m` rows).
fn weight(rows: Rows<'_>, m: usize, k: usize, o: usize, t: usize) -> i32 {
    // The packed forms store rows in blocks of four: block `r0` holds its
    // `b` rows' units interleaved.
    let r0 = o / 4 * 4;
    let b = if m - r0 < 4 { m - r0 } else { 4 };
    match rows {
        Rows::Bytes(w) => w.get(o * k + t).map_or(0, |&v| v as i32),
        Rows::File(w) => w.get(o * k + t).map_or(0, |&v| v as i8 as i32),
        Rows::Pairs(w) => {
            let kp = k.div_ceil(2);
            let v = w.get(r0 * kp + (t / 2) * b + (o - r0)).copied().unwrap_or(0);
            let half = if t % 2 == 0 { v } else { v >> 16 };
            half as u16 as i16 as i32
        }
        Rows::Words(w) => {
            // Bytes of a quad are stored `[w0, w2, w1, w3]`.
            let kq = k.div_ceil(4);
            let at = [0, 2, 1, 3][t % 4];
            let i = (r0 * kq + (t / 4) * b + (o - r0)) * 4 + at;
            w.get(i).map_or(0, |&v| v as i8 as i32)
        }
    }
}

/// `clamp(z_out + round(acc · M))` for a total shift `32 + sh`: the 32-bit
/// path of [`crate::Requant::apply`], the same result bit for bit.
#[inline(always)]
fn finish(acc: i32, mult: u32, sh: u32, q: OutputQuant) -> i8 {
    let hi = ((acc as i64 * mult as i32 as i64) >> 32) as i32;
    let r = ((hi.wrapping_shr(sh) + 1) >> 1) + q.zero_point;
    if r < q.min as i32 {
        q.min
    } else if r > q.max as i32 {
        q.max
    } else {
        r as i8
    }
}

/// One pixel's channels of a table block: `x` the pixel's tap pairs,
/// `table` entries of `E = P + 3` words.
#[inline(always)]
fn channels<const P: usize, const E: usize>(
    x: &[u32; P],
    table: &[u32],
    q: OutputQuant,
    out: &mut [i8],
) {
    let mut entries = table.chunks_exact(E);
    for o in out.iter_mut() {
        let Some(Ok(e)) = entries.next().map(<&[u32; E]>::try_from) else {
            return;
        };
        let mut acc = e[P] as i32;
        for p in 0..P {
            acc = ingot_dsp::smlad(x[p], e[p], acc);
        }
        *o = finish(acc, e[P + 1], e[P + 2], q);
    }
}

/// The taps of output pixel `(oy, ox)` as pairs (flattened `[ky][kx]`
/// order, padded taps at the input zero point, a zero after an odd last
/// tap), for any pixel of any window [`applies`] to.
fn gather(a: &ConvArgs<'_>, arena: &[i8], oy: usize, ox: usize, x: &mut [u32]) {
    let (input, w) = (&a.input, &a.p.window);
    let pad = a.p.input_zp as i16;
    let mut taps = [0i16; 2 * MAX_PAIRS];
    let mut t = 0;
    for ky in 0..w.kh {
        let yy = oy * w.step_y + ky;
        let row = if yy >= w.pad.top && yy - w.pad.top < input.h {
            Some(input.row(yy - w.pad.top))
        } else {
            None
        };
        for kx in 0..w.kw {
            let xx = ox * w.step_x + kx;
            let v = match row {
                Some(r) if xx >= w.pad.left && xx - w.pad.left < input.w => arena
                    .get(r + (xx - w.pad.left) * input.stride)
                    .map_or(pad, |&v| v as i16),
                _ => pad,
            };
            if let Some(d) = taps.get_mut(t) {
                *d = v;
            }
            t += 1;
        }
    }
    for (d, p) in x.iter_mut().zip(taps.chunks_exact(2)) {
        *d = ingot_dsp::portable::pack(p[0], p[1]);
    }
}

/// Two taps as a pair (one `pkhbt` on DSP cores).
#[inline(always)]
fn pair(lo: i8, hi: i8) -> u32 {
    ingot_dsp::pkhbt_lsl16(lo as i32 as u32, hi as i32 as u32)
}

/// A 3×3 stem over output rows `[y0, y1)`, channels `c0..` of the table
/// block `t`. Pixels whose window lies inside the map (and a map with
/// dense pixels) read their nine taps straight from the three input rows
/// into five registers; the others gather with padding.
fn rows3(arena: &mut [i8], a: &ConvArgs<'_>, t: &[u32], c0: usize, y0: usize, y1: usize) {
    let (input, output, w) = (&a.input, &a.output, &a.p.window);
    let n = t.len() / (P3 + 3);
    let q = a.p.out;
    let (sx, pl) = (w.step_x, w.pad.left);
    // Output columns whose window is inside the map horizontally.
    let ox_lo = pl.div_ceil(sx.max(1));
    let ox_hi = if input.w + pl >= 3 {
        ((input.w + pl - 3) / sx.max(1) + 1).min(output.w)
    } else {
        0
    };
    for oy in y0..y1 {
        let yy = oy * w.step_y;
        let rows_in = w.kh == 3
            && w.kw == 3
            && yy >= w.pad.top
            && yy - w.pad.top + 3 <= input.h
            && input.stride == 1;
        let out_row = output.row(oy);
        let mut ox = 0;
        while ox < output.w {
            let dst = out_row + ox * output.stride + c0;
            if rows_in && ox >= ox_lo && ox < ox_hi {
                // Interior run of the row: three row slices, stepped.
                let iy = yy - w.pad.top;
                let (r0, r1, r2) = (input.row(iy), input.row(iy + 1), input.row(iy + 2));
                let mut xs = [0u32; P3];
                let mut ix = ox * sx - pl;
                while ox < ox_hi {
                    let (Some(&[a0, a1, a2]), Some(&[b0, b1, b2]), Some(&[c0_, c1, c2])) = (
                        arena.get(r0 + ix..r0 + ix + 3),
                        arena.get(r1 + ix..r1 + ix + 3),
                        arena.get(r2 + ix..r2 + ix + 3),
                    ) else {
                        return;
                    };
                    xs[0] = pair(a0, a1);
                    xs[1] = pair(a2, b0);
                    xs[2] = pair(b1, b2);
                    xs[3] = pair(c0_, c1);
                    xs[4] = c2 as i32 as u32;
                    let dst = out_row + ox * output.stride + c0;
                    let Some(out) = arena.get_mut(dst..dst + n) else {
                        return;
                    };
                    channels::<P3, { P3 + 3 }>(&xs, t, q, out);
                    ox += 1;
                    ix += sx;
                }
                continue;
            }
            let mut xs = [0u32; P3];
            gather(a, arena, oy, ox, &mut xs);
            let Some(out) = arena.get_mut(dst..dst + n) else {
                return;
            };
            channels::<P3, { P3 + 3 }>(&xs, t, q, out);
            ox += 1;
        }
    }
}

/// Any other window [`applies`] to: every pixel gathered, `pairs` pairs.
fn rows_any(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    t: &[u32],
    pairs: usize,
    c0: usize,
    y0: usize,
    y1: usize,
) {
    let (output, q) = (&a.output, a.p.out);
    let e = pairs + 3;
    let n = t.len() / e.max(1);
    let mut xs = [0u32; MAX_PAIRS];
    let Some(x) = xs.get_mut(..pairs) else {
        return;
    };
    for oy in y0..y1 {
        let out_row = output.row(oy);
        for ox in 0..output.w {
            gather(a, arena, oy, ox, x);
            let dst = out_row + ox * output.stride + c0;
            let Some(out) = arena.get_mut(dst..dst + n) else {
                return;
            };
            let mut entries = t.chunks_exact(e.max(1));
            for o in out.iter_mut() {
                let Some(en) = entries.next() else {
                    return;
                };
                let (Some(wv), Some(&[b, mult, sh])) = (en.get(..pairs), en.get(pairs..pairs + 3))
                else {
                    return;
                };
                let mut acc = b as i32;
                for (&xv, &wv) in x.iter().zip(wv) {
                    acc = ingot_dsp::smlad(xv, wv, acc);
                }
                *o = finish(acc, mult, sh, q);
            }
        }
    }
}
