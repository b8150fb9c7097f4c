//! Convolutions with one input channel (the "stem" that reads a gray
//! picture): every output pixel has only `kh·kw` taps (9 for a 3×3
//! kernel), so the general kernel's per-pixel costs (gathering a patch,
//! splitting the weight blocks, one call per block of rows) outweigh the
//! few multiply-accumulates. Here each output pixel's taps are packed into
//! 16-bit pairs once and every output channel meets them with one dual
//! multiply-accumulate (`smlad`) per pair, against weights widened once
//! per call into a small table on the stack that also holds each
//! channel's bias and requantization. 3×3 windows (the stem of every zoo
//! network) take the fast path: taps read straight from three input rows,
//! 16 pixels at a time, four channels per pass ([`quad`]); other windows
//! up to 32 taps go pixel by pixel, one channel at a time.
//!
//! Used on cores with the DSP extension (`ingot_dsp::NATIVE`) and on
//! hosts; on the Arm cores without it the dual multiply-accumulate is a
//! portable twin that costs more than the plain loops, so those keep them.

use crate::conv::{ConvArgs, Rows};
use crate::{Requant, Window};

/// Words of the weight table of windows other than 3×3: one entry of
/// `pairs + 4` words per output channel (the tap pairs, bias, multiplier,
/// rounding term, shift; see [`finish`]); a call whose channels do not all
/// fit runs in blocks of channels (512 B of stack).
const TABLE: usize = 128;

/// Most tap pairs a stem kernel takes (32 taps, e.g. 5×5).
const MAX_PAIRS: usize = 16;

/// Pairs of a 3×3 kernel (the fifth holds the ninth tap and a zero).
const P3: usize = 5;

/// True when [`run`] takes a checked convolution: one input channel, one
/// group, no dilation, no input transform, at most `2·MAX_PAIRS` taps, on
/// a core with the DSP extension or a host (not Arm: there the portable
/// twins are cheap, and the tests run this path).
/// Every one of the first `m` multipliers must take the 32-bit path of
/// [`crate::Requant::apply`] (a total shift of 32 or more, see
/// [`round_term`]); [`crate::conv::check_conv`] decides it at compile
/// time for a checked call, so [`run`] never meets another.
#[allow(clippy::too_many_arguments)]
pub(crate) const fn applies(
    w: &Window,
    c_in: usize,
    groups: usize,
    transform: bool,
    requant: &[Requant],
    m: usize,
    zp: i32,
) -> bool {
    if !((ingot_dsp::NATIVE || !cfg!(target_arch = "arm"))
        && c_in == 1
        && groups == 1
        && !transform
        && w.dilation_y == 1
        && w.dilation_x == 1
        && w.taps() > 0
        && w.taps() <= 2 * MAX_PAIRS
        && m <= requant.len())
    {
        return false;
    }
    let mut i = 0;
    while i < m {
        if round_term(requant[i].shift, zp).is_none() {
            return false;
        }
        i += 1;
    }
    true
}

/// Output rows `[y0, y1)` of a checked convolution that [`applies`]
/// (`y0 < y1 <= output height`).
#[inline(never)]
pub(crate) fn run(arena: &mut [i8], a: &ConvArgs<'_>, y0: usize, y1: usize) {
    let m = a.output.c;
    if a.bias.len() < m || a.requant.len() < m {
        return;
    }
    let w = &a.p.window;
    let taps = w.taps();
    let pairs = taps.div_ceil(2);
    let e = pairs + 4;
    let block = TABLE / e.max(1);
    if block == 0 || m == 0 {
        return;
    }
    let mut c0 = 0;
    if pairs == P3 {
        // Up to sixteen channels at a time, in quads.
        let mut quads = [Quad::ZERO; 4];
        while c0 < m {
            let n = if m - c0 < 16 { m - c0 } else { 16 };
            let Some(qs) = quads.get_mut(..n.div_ceil(4)) else {
                return;
            };
            for (i, q) in qs.iter_mut().enumerate() {
                *q = Quad::ZERO;
                for lane in 0..4 {
                    let j = 4 * i + lane;
                    if j >= n {
                        break;
                    }
                    let mut e = [0u32; P3 + 4];
                    fill_entry(a, c0 + j, &mut e);
                    for (wq, &v) in q.w.iter_mut().zip(&e) {
                        wq[lane] = v;
                    }
                    q.bias[lane] = e[P3] as i32;
                    q.mult[lane] = e[P3 + 1];
                    q.k[lane] = e[P3 + 2];
                    q.sh[lane] = e[P3 + 3] & 31;
                }
            }
            rows3(arena, a, qs, n, c0, y0, y1);
            c0 += n;
        }
        return;
    }
    let mut table = [0u32; TABLE];
    while c0 < m {
        let n = if m - c0 < block { m - c0 } else { block };
        let Some(t) = table.get_mut(..n * e) else {
            return;
        };
        for (j, entry) in t.chunks_exact_mut(e.max(1)).enumerate() {
            fill_entry(a, c0 + j, entry);
        }
        rows_any(arena, a, t, pairs, c0, y0, y1);
        c0 += n;
    }
}

/// The table entry of output channel `o`: its weights as tap pairs, then
/// bias, multiplier, rounding term and shift (see [`finish`]).
#[inline(never)]
fn fill_entry(a: &ConvArgs<'_>, o: usize, entry: &mut [u32]) {
    let (m, taps) = (a.output.c, a.p.window.taps());
    let pairs = taps.div_ceil(2);
    let (Some(&b), Some(r)) = (a.bias.get(o), a.requant.get(o)) else {
        return;
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
    if let (Some([vb, vm, vk, vs]), Some(k)) = (
        entry.get_mut(pairs..pairs + 4),
        round_term(r.shift, a.p.out.zero_point),
    ) {
        *vb = b as u32;
        *vm = r.mult as u32;
        *vk = k as u32;
        *vs = (r.shift - 1) as u32;
    }
}

/// Weight `t` (flattened `[ky][kx]`) of output channel `o`, from any
/// stored form (`k` weights a row, `m` rows).
#[inline(never)]
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
            let v = w
                .get(r0 * kp + (t / 2) * b + (o - r0))
                .copied()
                .unwrap_or(0);
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

/// The rounding term of [`finish`] for a multiplier's `shift` and the
/// output zero point, or `None` when the total shift is below 32 (the
/// 64-bit path of [`crate::Requant::apply`]) or the term does not fit.
///
/// With `h` the high word of `acc · mult` and `s = shift - 2` (the total
/// shift less 32), `Requant::apply` computes
/// `((h >> s) + 1 >> 1) + zp`, which is `(h + ((1 + 2·zp) << s)) >> (s + 1)`
/// (adding a multiple of `2^s` commutes with the floor of the shift, and
/// `zp = 2·zp / 2`): one addition and one shift. `|h| <= 2^30`, so the sum
/// cannot overflow while the term stays below `2^30` in magnitude.
const fn round_term(shift: i32, zp: i32) -> Option<i32> {
    if shift < 2 || shift > 32 || zp < -128 || zp > 127 {
        return None;
    }
    let k = (1 + 2 * zp as i64) << (shift - 2);
    if k >= 1 << 30 || k <= -(1 << 30) {
        return None;
    }
    Some(k as i32)
}

/// `clamp(z_out + round(acc · M), lo, hi)` from a table entry's
/// multiplier, rounding term and shift (see [`round_term`]): the same
/// result as [`crate::Requant::apply`] bit for bit. With `FULL` the upper
/// bound is 127 (no activation, ReLU): one saturation (`ssat`) and one
/// comparison with `lo`, and `hi` unused.
#[inline(always)]
fn finish<const FULL: bool>(acc: i32, mult: u32, k: u32, sh: u32, lo: i32, hi: i32) -> i8 {
    let h = ((acc as i64 * mult as i32 as i64) >> 32) as i32;
    let r = (h + k as i32).wrapping_shr(sh);
    if FULL {
        let r = r.clamp(-128, 127);
        (if r < lo { lo } else { r }) as i8
    } else if r < lo {
        lo as i8
    } else if r > hi {
        hi as i8
    } else {
        r as i8
    }
}

/// The taps of output pixel `(oy, ox)` as pairs (flattened `[ky][kx]`
/// order, padded taps at the input zero point, a zero after an odd last
/// tap), for any pixel of any window [`applies`] to.
#[inline(never)]
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

/// Output pixels whose tap pairs [`rows3`] builds before running their
/// channels (on the stack: `16 · 5` words).
const CHUNK: usize = 16;

/// A window of nine or ten taps over output rows `[y0, y1)`, the `n`
/// channels `c0..` held in the quads `t`. The tap pairs of up to [`CHUNK`] pixels of a row are built
/// first (3×3 windows inside a map of dense pixels read their nine taps
/// straight from the three input rows; the others gather with padding),
/// then [`pixels`] runs their channels.
#[inline(never)]
fn rows3(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    t: &[Quad],
    n: usize,
    c0: usize,
    y0: usize,
    y1: usize,
) {
    let (input, output, w) = (&a.input, &a.output, &a.p.window);
    let (lo, hi) = (a.p.out.min as i32, a.p.out.max as i32);
    let (sx, pl) = (w.step_x, w.pad.left);
    // Output columns whose window is inside the map horizontally.
    let ox_lo = pl.div_ceil(sx.max(1));
    let ox_hi = if input.w + pl >= 3 {
        ((input.w + pl - 3) / sx.max(1) + 1).min(output.w)
    } else {
        0
    };
    let mut xs = [[0u32; P3]; CHUNK];
    for oy in y0..y1 {
        let yy = oy * w.step_y;
        let rows_in = w.kh == 3
            && w.kw == 3
            && yy >= w.pad.top
            && yy - w.pad.top + 3 <= input.h
            && input.stride == 1;
        let (r0, r1, r2) = if rows_in {
            let iy = yy - w.pad.top;
            (input.row(iy), input.row(iy + 1), input.row(iy + 2))
        } else {
            (0, 0, 0)
        };
        let out_row = output.row(oy);
        let mut ox0 = 0;
        while ox0 < output.w {
            let cnt = if output.w - ox0 < CHUNK {
                output.w - ox0
            } else {
                CHUNK
            };
            let Some(chunk) = xs.get_mut(..cnt) else {
                return;
            };
            // Interior pixels of the chunk: [i0, i1) (empty when the rows
            // are not all inside).
            let (i0, i1) = if rows_in {
                // By hand, not `clamp` (its bound check is a panic path).
                let i0 = ox_lo.max(ox0).min(ox0 + cnt);
                (i0, ox_hi.max(i0).min(ox0 + cnt))
            } else {
                (ox0, ox0)
            };
            for ox in (ox0..i0).chain(i1..ox0 + cnt) {
                if let Some(x) = chunk.get_mut(ox - ox0) {
                    gather(a, arena, oy, ox, x);
                }
            }
            if i0 < i1 {
                let ix = i0 * sx - pl;
                let span = (i1 - i0 - 1) * sx + 3;
                let (Some(s0), Some(s1), Some(s2), Some(x)) = (
                    arena.get(r0 + ix..r0 + ix + span),
                    arena.get(r1 + ix..r1 + ix + span),
                    arena.get(r2 + ix..r2 + ix + span),
                    chunk.get_mut(i0 - ox0..i1 - ox0),
                ) else {
                    return;
                };
                taps3(s0, s1, s2, sx, x);
            }
            let dst = out_row + ox0 * output.stride + c0;
            if hi == 127 {
                pixels::<true>(arena, dst, output.stride, chunk, t, n, lo, hi);
            } else {
                pixels::<false>(arena, dst, output.stride, chunk, t, n, lo, hi);
            }
            ox0 += cnt;
        }
    }
}

/// The tap pairs of `xs.len()` pixels of a 3×3 window stepping `sx`
/// along three input rows (`s0`, `s1`, `s2`, each starting at the first
/// pixel's window), in [`gather`]'s order.
#[inline(never)]
fn taps3(s0: &[i8], s1: &[i8], s2: &[i8], sx: usize, xs: &mut [[u32; P3]]) {
    // One length for the three rows, one comparison per pixel: the nine
    // reads below are then in bounds, and the optimiser drops their checks.
    let len = s0.len();
    if s1.len() != len || s2.len() != len {
        return;
    }
    let mut i = 0;
    for x in xs.iter_mut() {
        match len.checked_sub(i) {
            Some(r) if r >= 3 => {}
            _ => return,
        }
        let at = |s: &[i8], k: usize| s.get(i + k).copied().unwrap_or(0);
        *x = [
            pair(at(s0, 0), at(s0, 1)),
            pair(at(s0, 2), at(s1, 0)),
            pair(at(s1, 1), at(s1, 2)),
            pair(at(s2, 0), at(s2, 1)),
            at(s2, 2) as i32 as u32,
        ];
        i += sx;
    }
}

/// Four output channels of a 3×3 stem: per tap pair the four channels'
/// weights side by side, so one loaded pair of taps feeds four `smlad`
/// (the shape of the paired dot products in `dot.rs`), then the four
/// channels' bias and requantization (see [`finish`]).
#[derive(Clone, Copy)]
struct Quad {
    w: [[u32; 4]; P3],
    bias: [i32; 4],
    mult: [u32; 4],
    k: [u32; 4],
    sh: [u32; 4],
}

impl Quad {
    /// No weights, no bias (a last quad's unused lanes).
    const ZERO: Quad = Quad {
        w: [[0; 4]; P3],
        bias: [0; 4],
        mult: [0; 4],
        k: [0; 4],
        sh: [0; 4],
    };
}

/// The four output codes of a quad for one pixel's tap pairs `x`,
/// packed little-endian in a word: `Σ_p x[p] · w[p][j]` (dual 16-bit
/// lanes) from the bias, then [`finish`]. A loop over the pairs rather
/// than five unrolled steps: unrolled, LLVM loads all twenty weights
/// first and spills.
#[inline(always)]
fn quad<const FULL: bool>(x: &[u32], q: &Quad, lo: i32, hi: i32) -> u32 {
    let [mut a, mut b, mut c, mut d] = q.bias;
    for (&xv, w) in x.iter().zip(&q.w) {
        crate::dot::no_unroll();
        a = ingot_dsp::smlad(xv, w[0], a);
        b = ingot_dsp::smlad(xv, w[1], b);
        c = ingot_dsp::smlad(xv, w[2], c);
        d = ingot_dsp::smlad(xv, w[3], d);
    }
    let y = |j: usize, s: i32| finish::<FULL>(s, q.mult[j], q.k[j], q.sh[j], lo, hi) as u8;
    u32::from_le_bytes([y(0, a), y(1, b), y(2, c), y(3, d)])
}

/// The `n` channels of the quads `t` for the pixels whose tap pairs are
/// `xs`, the first written at arena index `dst`, the next `stride`
/// further on: quad by quad, every pixel of the chunk.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn pixels<const FULL: bool>(
    arena: &mut [i8],
    dst: usize,
    stride: usize,
    xs: &[[u32; P3]],
    t: &[Quad],
    n: usize,
    lo: i32,
    hi: i32,
) {
    let cnt = xs.len();
    if cnt == 0 || n == 0 {
        return;
    }
    let Some(region) = arena.get_mut(dst..dst + (cnt - 1) * stride + n) else {
        return;
    };
    // The pair count, opaque: a constant would unroll the pair loop.
    let pairs = core::hint::black_box(P3);
    for (i, q) in t.iter().enumerate() {
        let w = if n - 4 * i < 4 { n - 4 * i } else { 4 };
        quad_pixels::<FULL>(
            region.get_mut(4 * i..).unwrap_or(&mut []),
            stride,
            xs,
            pairs,
            q,
            w,
            lo,
            hi,
        );
    }
}

/// One quad of [`pixels`]: its `w` (1 to 4) channels for every pixel of
/// `xs`, written from `out[0]` on, `stride` apart.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn quad_pixels<const FULL: bool>(
    out: &mut [i8],
    stride: usize,
    xs: &[[u32; P3]],
    pairs: usize,
    q: &Quad,
    w: usize,
    lo: i32,
    hi: i32,
) {
    let mut d = 0;
    for x in xs {
        let Some(x) = x.get(..pairs) else {
            return;
        };
        // Opaque, so that the quad is read where it is used rather than
        // copied to the stack once and reloaded from there (single loads
        // instead of pairs).
        let v = quad::<FULL>(x, core::hint::black_box(q), lo, hi);
        if w == 4 {
            if let Some(o) = out.get_mut(d..d + 4) {
                if let Ok(o) = <&mut [i8; 4]>::try_from(o) {
                    *o = v.to_le_bytes().map(|b| b as i8);
                }
            }
        } else if let Some(o) = out.get_mut(d..d + w) {
            for (y, b) in o.iter_mut().zip(v.to_le_bytes()) {
                *y = b as i8;
            }
        }
        d += stride;
    }
}

/// Any other window [`applies`] to: every pixel gathered, `pairs` pairs.
/// (Not inlined, like [`weight`] and [`gather`]: the stem's code is
/// flash that every firmware with a stem links.)
#[inline(never)]
fn rows_any(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    t: &[u32],
    pairs: usize,
    c0: usize,
    y0: usize,
    y1: usize,
) {
    let output = &a.output;
    let (lo, hi) = (a.p.out.min as i32, a.p.out.max as i32);
    let e = pairs + 4;
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
                let (Some(wv), Some(&[b, mult, k, sh])) =
                    (en.get(..pairs), en.get(pairs..pairs + 4))
                else {
                    return;
                };
                let mut acc = b as i32;
                for (&xv, &wv) in x.iter().zip(wv) {
                    acc = ingot_dsp::smlad(xv, wv, acc);
                }
                *o = finish::<false>(acc, mult, k, sh, lo, hi);
            }
        }
    }
}
