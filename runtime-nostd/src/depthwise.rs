//! Depthwise 3×3 convolutions read straight from the int8 HWC map.
//!
//! The general path ([`conv2d`](crate::conv2d)) gathers every output
//! pixel's 3×3×C window into the widened patch first: one load, one
//! widening and one store per MAC before any multiply. A depthwise layer
//! has only nine MACs per output value, so that copy, not the
//! multiply-accumulates, set its cost (about 17 instructions per MAC on
//! the emulated Cortex-M4).
//!
//! Here the pixels whose window lies inside the map (all but a one-pixel
//! frame for the usual padding of 1) read the map itself, four channels
//! per pass: HWC puts four neighbouring channels of one pixel in one
//! 32-bit word. On cores with the DSP extension one unaligned word load
//! gives the four inputs, `sxtb16` and `sxtb16 … ror #8` widen them into
//! the pairs `(x0, x2)` and `(x1, x3)`, and `smlabb`/`smlatt` meet them
//! with the matching 16-bit weights: per tap and four channels one input
//! load, two widenings, one weight load (two words) and four
//! multiply-accumulates. Elsewhere (Cortex-M0+, M3, plain M33, hosts) the
//! same loop runs as byte loads and plain multiplies, which those cores
//! do faster than the instructions' portable twins.
//!
//! The weights reach the kernel as the module stores them (`[C][3][3]`,
//! int8). Before the interior pixels the kernel widens them once per call
//! into the convolution's patch scratch (which the gather no longer needs
//! by then: border pixels run first), four channels per block, tap-major,
//! so that each tap's four weights are two words ready for the
//! multiplies. The patch of a 3×3 depthwise convolution holds `9·C`
//! values, exactly the widened weights; the widening costs about three
//! instructions per weight per call, against nine MACs per weight per
//! output pixel.
//!
//! Border pixels, channel counts that are not a multiple of four,
//! dilation, other kernel sizes, a fused input transform, and inputs that
//! interleave with the output (channel views of one concatenation region)
//! keep the gathering path; the results are the same bytes either way
//! (`runtime-nostd/tests/it/depthwise.rs`).

use crate::conv::Window;
use crate::dot::{no_unroll, Wt};
use crate::{MapRef, OutputQuant, Requant};

/// Taps of the kernel this module handles (3×3).
const TAPS: usize = 9;
/// Widened weights of one block of four channels: four per tap.
const BLOCK: usize = 4 * TAPS;

/// True when the interior pixels of a depthwise convolution (one input
/// and one output channel per group, `c` channels) can run here: a 3×3
/// kernel without dilation, any step and padding, `c` a nonzero multiple
/// of four, no fused input transform, and input and output in separate
/// byte spans of the arena.
pub(crate) fn applies(
    w: &Window,
    c: usize,
    transform: bool,
    input: &MapRef,
    output: &MapRef,
) -> bool {
    w.kh == 3
        && w.kw == 3
        && w.dilation_y == 1
        && w.dilation_x == 1
        && w.step_x > 0
        && w.step_y > 0
        && !transform
        && c > 0
        && c % 4 == 0
        && split_spans(input, output).is_some()
}

/// Where to cut the arena so that one side holds the whole input and the
/// other the whole output: `Some((at, input_first))`, or `None` when
/// their byte spans overlap (interleaved channel views) or are empty.
fn split_spans(input: &MapRef, output: &MapRef) -> Option<(usize, bool)> {
    let (ie, oe) = (input.end()?, output.end()?);
    if ie <= output.offset {
        Some((output.offset, true))
    } else if oe <= input.offset {
        Some((input.offset, false))
    } else {
        None
    }
}

/// The output columns `[lo, hi)` whose window lies inside an input row of
/// `in_w` pixels (`lo >= hi` when there are none).
pub(crate) fn inner_cols(w: &Window, in_w: usize, out_w: usize) -> (usize, usize) {
    let s = w.step_x;
    let lo = (w.pad.left + s)
        .saturating_sub(1)
        .checked_div(s)
        .unwrap_or(0);
    let hi = match (in_w + w.pad.left).checked_sub(3) {
        Some(n) => n.checked_div(s).unwrap_or(0) + 1,
        None => 0,
    };
    (lo, hi.min(out_w))
}

/// True when output row `oy` reads three rows inside a map of `in_h`
/// rows.
pub(crate) fn inner_row(w: &Window, in_h: usize, oy: usize) -> bool {
    let y = oy * w.step_y;
    y >= w.pad.top && y - w.pad.top + 3 <= in_h
}

/// Order of a block's four channels among one tap's four widened weights:
/// `(w0, w2)` then `(w1, w3)` for `smlabb`/`smlatt` against the lanes
/// `sxtb16` makes, in channel order for the plain loop.
const ORDER: [usize; 4] = if ingot_dsp::NATIVE {
    [0, 2, 1, 3]
} else {
    [0, 1, 2, 3]
};

/// Widens the weights `[C][9]` into `table`: per block of four channels,
/// per tap, the four weights in [`ORDER`].
fn widen_weights<W: Wt>(weights: &[W], table: &mut [i16]) {
    for (src, dst) in weights
        .chunks_exact(BLOCK)
        .zip(table.chunks_exact_mut(BLOCK))
    {
        let (Ok(src), Ok(dst)) = (
            <&[W; BLOCK]>::try_from(src),
            <&mut [i16; BLOCK]>::try_from(dst),
        ) else {
            return;
        };
        for t in 0..TAPS {
            for (k, &j) in ORDER.iter().enumerate() {
                dst[4 * t + k] = src[j * TAPS + t].v() as i16;
            }
        }
    }
}

/// The interior pixels of output rows `[y0, y1)` of a depthwise 3×3
/// convolution for which [`applies`] holds (the caller computes the
/// others); `weights` are `[C][9]`, `table` the patch scratch (at least
/// `9·C` values).
#[allow(clippy::too_many_arguments)]
pub(crate) fn interior<W: Wt>(
    arena: &mut [i8],
    input: &MapRef,
    output: &MapRef,
    w: &Window,
    weights: &[W],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    table: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let c = input.c;
    let (lo, hi) = inner_cols(w, input.w, output.w);
    if lo >= hi || c == 0 {
        return;
    }
    let (Some(table), Some(weights), Some(bias), Some(requant)) = (
        table.get_mut(..TAPS * c),
        weights.get(..TAPS * c),
        bias.get(..c),
        requant.get(..c),
    ) else {
        return;
    };
    widen_weights(weights, table);
    let Some((at, input_first)) = split_spans(input, output) else {
        return;
    };
    let Some((a, b)) = arena.split_at_mut_checked(at) else {
        return;
    };
    // Input indices are arena indices less `src_base`, output ones less
    // `dst_base`.
    let (src, src_base, dst, dst_base) = if input_first {
        (&*a, 0, b, at)
    } else {
        (&*b, at, a, 0)
    };
    let k = Pixels {
        table,
        bias,
        requant,
        out_q,
        c,
        s: input.stride,
    };
    let (sx, sy) = (w.step_x, w.step_y);
    for oy in y0..y1 {
        if !inner_row(w, input.h, oy) {
            continue;
        }
        let iy = oy * sy - w.pad.top;
        let rows = [input.row(iy), input.row(iy + 1), input.row(iy + 2)];
        let Some(out_row) = output.row(oy).checked_sub(dst_base) else {
            return;
        };
        let Some(in_x) = (lo * sx).checked_sub(w.pad.left) else {
            return;
        };
        let r = rows.map(|r| (r + in_x * input.stride).wrapping_sub(src_base));
        k.row(
            src,
            dst,
            r,
            sx * input.stride,
            out_row + lo * output.stride,
            output.stride,
            hi - lo,
        );
    }
}

/// What every interior pixel of a call shares.
struct Pixels<'a> {
    /// The widened weights ([`widen_weights`]).
    table: &'a [i16],
    bias: &'a [i32],
    requant: &'a [Requant],
    out_q: OutputQuant,
    /// Channels, input pixel stride.
    c: usize,
    s: usize,
}

impl Pixels<'_> {
    /// `n` output pixels of one row, the first at `dst[out]` (then every
    /// `out_step`), reading the three input rows from `src[rows[k]]` (then
    /// every `in_step`).
    #[allow(clippy::too_many_arguments)]
    #[inline(never)]
    fn row(
        &self,
        src: &[i8],
        dst: &mut [i8],
        rows: [usize; 3],
        in_step: usize,
        out: usize,
        out_step: usize,
        n: usize,
    ) {
        let (c, s) = (self.c, self.s);
        // One window row: three pixels, the last only up to channel c.
        let span = 2 * s + c;
        for i in 0..n {
            let (at, o) = (i * in_step, out + i * out_step);
            let (Some(r0), Some(r1), Some(r2), Some(out)) = (
                src.get(rows[0] + at..rows[0] + at + span),
                src.get(rows[1] + at..rows[1] + at + span),
                src.get(rows[2] + at..rows[2] + at + span),
                dst.get_mut(o..o + c),
            ) else {
                return;
            };
            self.pixel([r0, r1, r2], out);
        }
    }

    /// One output pixel: its window rows `r` (each `2·s + c` bytes).
    #[inline(always)]
    fn pixel(&self, r: [&[i8]; 3], out: &mut [i8]) {
        let s = self.s;
        let (mut blocks, mut bs, mut rs) = (
            self.table.chunks_exact(BLOCK),
            self.bias.chunks_exact(4),
            self.requant.chunks_exact(4),
        );
        for (ch, o) in out.chunks_exact_mut(4).enumerate() {
            no_unroll();
            let (Some(wt), Some(b), Some(rq)) = (blocks.next(), bs.next(), rs.next()) else {
                return;
            };
            let (Ok(wt), Ok(b), Ok(rq), Ok(o)) = (
                <&[i16; BLOCK]>::try_from(wt),
                <&[i32; 4]>::try_from(b),
                <&[Requant; 4]>::try_from(rq),
                <&mut [i8; 4]>::try_from(o),
            ) else {
                return;
            };
            let b0 = 4 * ch;
            let mut acc = *b;
            for (ky, row) in r.iter().enumerate() {
                for kx in 0..3 {
                    let i = b0 + kx * s;
                    let Some(x) = row.get(i..i + 4) else {
                        return;
                    };
                    let Ok(&x) = <&[i8; 4]>::try_from(x) else {
                        return;
                    };
                    tap(&mut acc, x, wt, 4 * (3 * ky + kx));
                }
            }
            for j in 0..4 {
                o[j] = rq[j].apply(acc[j], self.out_q);
            }
        }
    }
}

/// `acc[j] += x[j] · w[j]` for the four channels of one tap, the weights
/// at `wt[t..t + 4]` in [`ORDER`].
#[inline(always)]
fn tap(acc: &mut [i32; 4], x: [i8; 4], wt: &[i16; BLOCK], t: usize) {
    if ingot_dsp::NATIVE {
        let xv = u32::from_le_bytes(x.map(|v| v as u8));
        let (xe, xo) = (ingot_dsp::sxtb16(xv), ingot_dsp::sxtb16_ror8(xv));
        let p0 = pair(wt[t], wt[t + 1]);
        let p1 = pair(wt[t + 2], wt[t + 3]);
        acc[0] = ingot_dsp::smlabb(xe, p0, acc[0]);
        acc[2] = ingot_dsp::smlatt(xe, p0, acc[2]);
        acc[1] = ingot_dsp::smlabb(xo, p1, acc[1]);
        acc[3] = ingot_dsp::smlatt(xo, p1, acc[3]);
    } else {
        for j in 0..4 {
            acc[j] = acc[j].wrapping_add((x[j] as i32).wrapping_mul(wt[t + j] as i32));
        }
    }
}

/// Two 16-bit values in one word, `lo` in the low half.
#[inline(always)]
fn pair(lo: i16, hi: i16) -> u32 {
    (lo as u16 as u32) | ((hi as u16 as u32) << 16)
}
