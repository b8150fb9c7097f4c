//! Pointwise (1×1) convolutions with weights in the word layout, four
//! output pixels per pass over a weight row.
//!
//! The per-pixel word kernel ([`conv2d_words`](crate::conv2d_words)'s
//! general path) runs four weight rows against one widened pixel: every
//! weight word it loads is widened (`sxtb16`, twice) for four MACs of one
//! pixel only, so a quarter of its inner loop is widening. Here a weight
//! row meets four pixels at once: the four input pixels are first widened
//! (and transformed, with a fused input transform) into a staging buffer,
//! interleaved per quad of channels (`[quad][pixel][4]`, `i16`), so one
//! pointer walks them; then each output channel's weight word is loaded
//! and widened once and feeds eight `smlad` (two per pixel). The staged
//! values are loaded as words, two per pixel and quad, already in the
//! lanes the widened weights meet (`(x0, x1)`, `(x2, x3)`: the word
//! layout's byte order `w0, w2, w1, w3` is the one the patch kernels use,
//! so no layout of their own is needed).
//!
//! Why four pixels × one row rather than the two × two or two × four
//! blocks that also reuse each widened input word: a Cortex-M has 13
//! usable registers in such a loop (r7 holds the frame pointer). Two
//! pixels × four rows needs eight accumulators, four widened input words,
//! two widened weight halves and three pointers (17): it spills. Four
//! pixels × one row needs four accumulators, two weight halves, the two
//! words of the pixel being added and three pointers (11), with the input
//! words reloaded from the staging buffer (`ldrd`, one instruction per
//! pixel and quad). The pixels are taken in order across output rows, so
//! a whole map leaves at most three pixels, which run the per-pixel word
//! kernel.

use crate::conv::{paired_rows, ConvArgs, Window};
use crate::dot::no_unroll;
use crate::{InputTransform, OutputQuant, Requant};

/// Length (in `i16` elements) of the staging buffer the four-pixel
/// pointwise kernel of [`conv2d_words`](crate::conv2d_words) takes from
/// its `patch` scratch: four pixels of `C_in` channels, each padded to
/// whole quads, `16 · ⌈C_in / 4⌉`.
pub const fn pointwise_patch_len(c_in: usize) -> usize {
    16 * c_in.div_ceil(4)
}

/// True when [`conv2d_words`](crate::conv2d_words) runs a window as a
/// pointwise convolution four pixels at a time (given a `patch` of at
/// least [`pointwise_patch_len`] elements): a 1×1 kernel without padding
/// and one group (any step).
pub const fn pointwise_applies(w: &Window, groups: usize) -> bool {
    w.kh == 1
        && w.kw == 1
        && groups == 1
        && w.pad.top == 0
        && w.pad.left == 0
        && w.pad.bottom == 0
        && w.pad.right == 0
}

/// Two `i16` values as one word, the first in the low half (adjacent in
/// the staging buffer: one load).
#[inline(always)]
fn word(lo: i16, hi: i16) -> u32 {
    (lo as u16 as u32) | ((hi as u16 as u32) << 16)
}

/// What every pass of one call shares.
struct Pass<'a> {
    weights: &'a [u8],
    bias: &'a [i32],
    requant: &'a [Requant],
    out_q: OutputQuant,
    transform: Option<&'a InputTransform<'a>>,
    /// Input and output channels, quads per weight row.
    c: usize,
    m: usize,
    kq: usize,
}

/// Runs a checked convolution for which [`pointwise_applies`] holds and
/// whose `patch` holds [`pointwise_patch_len`] elements, word layout,
/// output rows `[y0, y1)` (`y1` already clipped).
pub(crate) fn run_words(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    weights: &[u8],
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let (input, output, p) = (a.input, a.output, &a.p);
    let (c, m) = (input.c, output.c);
    let kq = c.div_ceil(4);
    if kq == 0 || m == 0 {
        return;
    }
    let (Some(stage), Some(weights), Some(bias), Some(requant)) = (
        patch.get_mut(..16 * kq),
        weights.get(..m * 4 * kq),
        a.bias.get(..m),
        a.requant.get(..m),
    ) else {
        return;
    };
    let pass = Pass {
        weights,
        bias,
        requant,
        out_q: p.out,
        transform: a.transform.as_ref(),
        c,
        m,
        kq,
    };
    let w = &p.window;
    // (input pixel, output pixel) arena bases of the pixels gathered so
    // far, in order across rows.
    let mut px = [(0usize, 0usize); 4];
    let mut n = 0;
    for oy in y0..y1 {
        let (in_row, out_row) = (input.row(oy * w.step_y), output.row(oy));
        let (in_step, out_step) = (w.step_x * input.stride, output.stride);
        for ox in 0..output.w {
            if let Some(slot) = px.get_mut(n) {
                *slot = (in_row + ox * in_step, out_row + ox * out_step);
            }
            n += 1;
            if n == 4 {
                pass.four(arena, &px, stage);
                n = 0;
            }
        }
    }
    for &(src, dst) in px.get(..n).unwrap_or(&[]) {
        pass.one(arena, src, dst, stage);
    }
}

impl Pass<'_> {
    /// Four pixels: stage them, then every output channel.
    #[inline(never)]
    fn four(&self, arena: &mut [i8], px: &[(usize, usize); 4], stage: &mut [i16]) {
        let (c, m, kq) = (self.c, self.m, self.kq);
        for (i, &(src, _)) in px.iter().enumerate() {
            let Some(s) = arena.get(src..src + c) else {
                return;
            };
            self.stage_pixel(stage, i, s);
        }
        let [d0, d1, d2, d3] = px.map(|(_, d)| d);
        // Rows in blocks of four, a block's rows interleaved word by word
        // (the last block holds the one to three rows left over).
        let block_len = 16 * kq;
        let mut j = 0;
        for block in self.weights.chunks(block_len.max(1)) {
            let rows = (m - j).min(4);
            for r in 0..rows {
                let Some(row) = block.get(4 * r..) else {
                    return;
                };
                let acc = match rows {
                    4 => px4::<16>(stage, row, kq),
                    3 => px4::<12>(stage, row, kq),
                    2 => px4::<8>(stage, row, kq),
                    _ => px4::<4>(stage, row, kq),
                };
                let (Some(&b), Some(rq)) = (self.bias.get(j), self.requant.get(j)) else {
                    return;
                };
                for (&acc, dst) in acc.iter().zip([d0, d1, d2, d3]) {
                    if let Some(o) = arena.get_mut(dst + j) {
                        *o = rq.apply(b.wrapping_add(acc), self.out_q);
                    }
                }
                j += 1;
            }
        }
    }

    /// One pixel alone: widened into the front of `stage`, then the
    /// per-pixel word kernel (four rows per pass).
    #[inline(never)]
    fn one(&self, arena: &mut [i8], src: usize, dst: usize, stage: &mut [i16]) {
        let c = self.c;
        let (Some(x), Some(s)) = (stage.get_mut(..c), arena.get(src..src + c)) else {
            return;
        };
        for (ch, (d, &v)) in x.iter_mut().zip(s).enumerate() {
            *d = self.value(ch, v);
        }
        let Some(out) = arena.get_mut(dst..dst + self.m) else {
            return;
        };
        paired_rows(x, self.weights, self.bias, self.requant, self.out_q, out);
    }

    /// Channel `ch`'s value `v` as the kernel multiplies it: transformed
    /// if there is a transform, widened.
    #[inline(always)]
    fn value(&self, ch: usize, v: i8) -> i16 {
        match self.transform {
            None => v as i16,
            Some(t) => t.apply(ch, v) as i16,
        }
    }

    /// Pixel `s` into lane group `i` of every quad of `stage`
    /// (`stage[16q + 4i .. 16q + 4i + 4]`), zeros past the last channel
    /// (they meet zero weights).
    #[inline(always)]
    fn stage_pixel(&self, stage: &mut [i16], i: usize, s: &[i8]) {
        let Some(lanes) = stage.get_mut(4 * i..) else {
            return;
        };
        for (q, (dst, src)) in lanes.chunks_mut(16).zip(s.chunks(4)).enumerate() {
            let Some(dst) = dst.get_mut(..4) else {
                return;
            };
            dst.fill(0);
            for (k, (d, &v)) in dst.iter_mut().zip(src).enumerate() {
                *d = self.value(4 * q + k, v);
            }
        }
    }
}

/// One weight row against four staged pixels: `x` holds `16·kq` values
/// (`[quad][pixel][4]`), `w` the row from its first word, one word every
/// `STEP` bytes (the row's block interleaves `STEP / 4` rows), `kq` words.
/// The four sums, pixel by pixel.
#[inline(never)]
fn px4<const STEP: usize>(x: &[i16], w: &[u8], kq: usize) -> [i32; 4] {
    let mut acc = [0i32; 4];
    if kq == 0 {
        return acc;
    }
    // The last word of a row in the last block has fewer than STEP bytes
    // after it: the loop takes whole steps, the last quad comes after.
    let body = kq - 1;
    let (Some(xb), Some(wb)) = (x.get(..16 * body), w.get(..STEP * body)) else {
        return acc;
    };
    let (xq, _) = xb.as_chunks::<16>();
    let (wq, _) = wb.as_chunks::<STEP>();
    let [mut a, mut b, mut c, mut d] = acc;
    for (xq, wq) in xq.iter().zip(wq) {
        no_unroll();
        let wv = u32::from_le_bytes([wq[0], wq[1], wq[2], wq[3]]);
        (a, b, c, d) = quad(xq, wv, (a, b, c, d));
    }
    let last = (
        x.get(16 * body..16 * kq),
        w.get(STEP * body..STEP * body + 4),
    );
    if let (Some(xq), Some(wq)) = last {
        if let (Ok(xq), Ok(wq)) = (<&[i16; 16]>::try_from(xq), <&[u8; 4]>::try_from(wq)) {
            (a, b, c, d) = quad(xq, u32::from_le_bytes(*wq), (a, b, c, d));
        }
    }
    acc = [a, b, c, d];
    acc
}

/// One quad of four staged pixels against one stored word `wv`
/// (`[w0, w2, w1, w3]`): `sxtb16` gives `(w0, w1)`, `sxtb16 … ror #8`
/// gives `(w2, w3)`, each meeting one word of a pixel's widened values.
#[inline(always)]
fn quad(x: &[i16; 16], wv: u32, acc: (i32, i32, i32, i32)) -> (i32, i32, i32, i32) {
    let (lo, hi) = (ingot_dsp::sxtb16(wv), ingot_dsp::sxtb16_ror8(wv));
    let mac = |s: i32, k: usize| {
        let s = ingot_dsp::smlad(word(x[k], x[k + 1]), lo, s);
        ingot_dsp::smlad(word(x[k + 2], x[k + 3]), hi, s)
    };
    (mac(acc.0, 0), mac(acc.1, 4), mac(acc.2, 8), mac(acc.3, 12))
}
