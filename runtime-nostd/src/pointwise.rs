//! Pointwise (1×1) convolutions with weights in the word layout, four
//! output pixels per pass over a weight row.
//!
//! The per-pixel word kernel ([`conv2d_words`](crate::conv2d_words)'s
//! general path) runs four weight rows against one widened pixel: every
//! weight word it loads is widened (`sxtb16`, twice) for four MACs of one
//! pixel only. Here a weight row meets four pixels at once: the four
//! input pixels are first widened into a staging buffer, interleaved per
//! quad of channels (`[quad][pixel][4]`, `i16`), so one pointer walks
//! them; then each output channel's weight word is loaded and widened once
//! and feeds eight `smlad` (two per pixel). The staged values are loaded
//! as words, two per pixel and quad, already in the lanes the widened
//! weights meet (`(x0, x1)`, `(x2, x3)`: the word layout's byte order
//! `w0, w2, w1, w3` is the one the patch kernels use, so no layout of
//! their own is needed).
//!
//! Why four pixels × one row rather than two × two or two × four, which
//! would also keep each widened input word in a register for several
//! rows: a Cortex-M has 13 usable registers in such a loop (r7 holds the
//! frame pointer). Two pixels × four rows needs eight accumulators, four
//! widened input words, two widened weight halves and three pointers
//! (17): it spills. Four pixels × one row needs four accumulators, two
//! weight halves, one staged word at a time and three pointers, and
//! compiles to 23 instructions per 16 MACs (`arm-none-eabi-objdump -d`
//! of the thumbv7em rlib: one weight load, two `sxtb16`, eight loads of
//! staged words, eight `smlad`, three of loop step). The staged words are
//! loaded one at a time: the patch is an `i16` slice, so the compiler
//! cannot assume the 4-byte alignment `ldrd` needs (with it, 19). Six
//! pixels (30 per 24 MACs on paper) spilled one accumulator and the loop
//! counter (33 to 35). So the loop is about as long per MAC as the
//! per-pixel kernel's (24 per 16); what the four pixels save is the
//! per-output work around it for small input channel counts, where the
//! per-pixel kernel's calls dominate. The pixels are taken in order
//! across output rows, so a call leaves at most three pixels, which run
//! the per-pixel word kernel.
//!
//! With a fused input transform the kernel is not used: the ring of
//! transformed rows measured faster on the demo's transition.

use crate::conv::{paired_rows, ConvArgs, Window};
use crate::dot::{no_unroll, word};
use crate::requant::{fast_requant, requant_fast, Fast};
use crate::{OutputQuant, Requant};

/// Length (in `i16` elements) of the staging buffer the four-pixel
/// pointwise kernel of [`conv2d_words`](crate::conv2d_words) takes from
/// its `patch` scratch: four pixels of `C_in` channels, each padded to
/// whole quads, `16 · ⌈C_in / 4⌉`.
pub const fn pointwise_patch_len(c_in: usize) -> usize {
    4 * PIXELS * c_in.div_ceil(4)
}

/// True when [`conv2d_words`](crate::conv2d_words) runs a window as a
/// pointwise convolution four pixels at a time (given a `patch` of at
/// least [`pointwise_patch_len`] elements and no input transform): a 1×1
/// kernel without padding and one group (any step).
pub const fn pointwise_applies(w: &Window, groups: usize) -> bool {
    w.kh == 1
        && w.kw == 1
        && groups == 1
        && w.pad.top == 0
        && w.pad.left == 0
        && w.pad.bottom == 0
        && w.pad.right == 0
}

/// What every pass of one call shares.
struct Pass<'a> {
    weights: &'a [u8],
    bias: &'a [i32],
    requant: &'a [Requant],
    out_q: OutputQuant,
    /// The call's 32-bit finish, when every multiplier takes it.
    fast: Option<Fast>,
    /// Input and output channels, quads per weight row.
    c: usize,
    m: usize,
    kq: usize,
}

/// Pixels per pass of the main kernel.
const PIXELS: usize = 4;

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
        patch.get_mut(..4 * PIXELS * kq),
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
        fast: fast_requant(requant, p.out),
        c,
        m,
        kq,
    };
    let w = &p.window;
    // (input pixel, output pixel) arena bases of the pixels gathered so
    // far, in order across rows.
    let mut px = [(0usize, 0usize); PIXELS];
    let mut n = 0;
    for oy in y0..y1 {
        let (in_row, out_row) = (input.row(oy * w.step_y), output.row(oy));
        let (in_step, out_step) = (w.step_x * input.stride, output.stride);
        for ox in 0..output.w {
            if let Some(slot) = px.get_mut(n) {
                *slot = (in_row + ox * in_step, out_row + ox * out_step);
            }
            n += 1;
            if n == PIXELS {
                pass.group(arena, &px, stage);
                n = 0;
            }
        }
    }
    // The one to three pixels left, one at a time.
    for &(src, dst) in px.get(..n).unwrap_or(&[]) {
        pass.one(arena, src, dst, stage);
    }
}

impl Pass<'_> {
    /// `P` pixels: stage them, then every output channel, one weight row
    /// per call of [`px`].
    #[inline(never)]
    fn group(&self, arena: &mut [i8], pixels: &[(usize, usize); PIXELS], stage: &mut [i16]) {
        let (c, kq) = (self.c, self.kq);
        for (i, &(src, _)) in pixels.iter().enumerate() {
            let Some(s) = arena.get(src..src + c) else {
                return;
            };
            self.stage_pixel(stage, i, s);
        }
        let Some(x) = stage.get(..4 * PIXELS * kq) else {
            return;
        };
        // Opaque to the optimiser: with link-time optimisation the patch is
        // a static of the module, and `px` specialised to its constant
        // address spilled an accumulator in its loop (25 instructions per
        // pass in the firmware of `check --on m4` instead of 23).
        let x = core::hint::black_box(x);
        let dsts = pixels.map(|(_, d)| d);
        // Rows in blocks of four, a block's rows interleaved word by word
        // (the last block holds the one to three rows left over).
        let mut start = 0; // the block's first byte
        let mut j = 0;
        for (bias, requant) in self.bias.chunks(4).zip(self.requant.chunks(4)) {
            let rows = bias.len();
            for (r, (&b, rq)) in bias.iter().zip(requant).enumerate() {
                let Some(w) = self.weights.get(start + 4 * r..) else {
                    return;
                };
                let acc = match rows {
                    4 => px::<16>(x, w),
                    3 => px::<12>(x, w),
                    2 => px::<8>(x, w),
                    _ => px::<4>(x, w),
                };
                for (v, &dst) in requant_row(rq, b, &acc, self.out_q, self.fast)
                    .into_iter()
                    .zip(&dsts)
                {
                    if let Some(o) = arena.get_mut(dst + j) {
                        *o = v;
                    }
                }
                j += 1;
            }
            start += 4 * rows * kq;
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
        for (d, &v) in x.iter_mut().zip(s) {
            *d = v as i16;
        }
        let Some(out) = arena.get_mut(dst..dst + self.m) else {
            return;
        };
        paired_rows(
            x,
            self.weights,
            self.bias,
            self.requant,
            self.out_q,
            out,
            self.fast,
        );
    }

    /// Pixel `s` into lane group `i` of every quad of a `P`-pixel staging
    /// buffer (`stage[4Pq + 4i .. 4Pq + 4i + 4]`), widened, zeros past the
    /// last channel (they meet zero weights).
    #[inline(always)]
    fn stage_pixel(&self, stage: &mut [i16], i: usize, s: &[i8]) {
        let Some(lanes) = stage.get_mut(4 * i..) else {
            return;
        };
        let mut dst = lanes.chunks_mut(4 * PIXELS);
        let src = s.chunks_exact(4);
        let rest = src.remainder();
        // Four channels per word: `sxtb16` gives (x0, x2) and (x1, x3),
        // the pack instructions (x0, x1) and (x2, x3). Source first: `zip`
        // asks its first iterator first, and a destination chunk taken for
        // a missing source quad would be lost to the partial quad below.
        for (q, d) in src.zip(&mut dst) {
            let v = u32::from_le_bytes([q[0] as u8, q[1] as u8, q[2] as u8, q[3] as u8]);
            let (even, odd) = (ingot_dsp::sxtb16(v), ingot_dsp::sxtb16_ror8(v));
            let lo = ingot_dsp::pkhbt_lsl16(even, odd);
            let hi = ingot_dsp::pkhtb_asr16(odd, even);
            if let Some(d) = d.get_mut(..4) {
                for (d, h) in d.iter_mut().zip([lo, lo >> 16, hi, hi >> 16]) {
                    *d = h as i16;
                }
            }
        }
        // The one to three channels of a last quad.
        if let (Some(d), false) = (dst.next(), rest.is_empty()) {
            if let Some(d) = d.get_mut(..4) {
                d.fill(0);
                for (d, &v) in d.iter_mut().zip(rest) {
                    *d = v as i16;
                }
            }
        }
    }
}

/// One weight row against `P` staged pixels: `x` holds one unit per quad
/// of channels (`[pixel][4]`), `w` the weights from the row's first word
/// on, one word of the row every `STEP` bytes (its block interleaves
/// `STEP / 4` rows). The four sums, pixel by pixel.
///
/// The last word of a row in the layer's last block ends the weights, so
/// the loop takes whole steps and the last quad comes after it. (The same
/// loop over every quad for the rows that have a whole step after each
/// word compiled worse: LLVM addressed the staging buffer through an
/// index and spilled, 31 to 48 instructions per pass instead of 23.) Its
/// own function: the loop holds two pointers, the count, the widened
/// weight word, one staged word at a time and four accumulators.
#[inline(never)]
fn px<const STEP: usize>(x: &[i16], w: &[u8]) -> [i32; PIXELS] {
    let mut acc = [0i32; PIXELS];
    let Some(body) = (x.len() / 16).checked_sub(1) else {
        return acc;
    };
    let (Some(xb), Some(xl), Some(wb)) = (
        x.get(..16 * body),
        x.get(16 * body..16 * body + 16),
        w.get(..STEP * body),
    ) else {
        return acc;
    };
    for (xq, wq) in xb.chunks_exact(16).zip(wb.chunks_exact(STEP)) {
        no_unroll();
        let (Ok(xq), Some(wq)) = (<&[i16; 16]>::try_from(xq), wq.first_chunk::<4>()) else {
            break;
        };
        quad(xq, u32::from_le_bytes(*wq), &mut acc);
    }
    let last = w.get(STEP * body..STEP * body + 4);
    if let (Ok(xq), Some(Ok(wq))) = (<&[i16; 16]>::try_from(xl), last.map(<&[u8; 4]>::try_from)) {
        quad(xq, u32::from_le_bytes(*wq), &mut acc);
    }
    acc
}

/// `rq.apply(b + acc[k], out)` for every pixel `k` of one output
/// channel: with `fast` (made by [`fast_requant`] once per call, when
/// every multiplier takes [`Requant::apply`]'s 32-bit path and the zero
/// point is in range, the usual case) that path without the choice per
/// value, the zero point folded into the rounding term and, for the
/// whole int8 range, one saturation: the same bytes.
#[inline(always)]
fn requant_row<const P: usize>(
    rq: &Requant,
    b: i32,
    acc: &[i32; P],
    out: OutputQuant,
    fast: Option<Fast>,
) -> [i8; P] {
    match fast {
        Some(Fast::Full { k }) => {
            acc.map(|a| requant_fast(b.wrapping_add(a), rq, k).clamp(-128, 127) as i8)
        }
        Some(Fast::Clamp { k, lo, hi }) => {
            acc.map(|a| requant_fast(b.wrapping_add(a), rq, k).max(lo).min(hi) as i8)
        }
        None => acc.map(|a| rq.apply(b.wrapping_add(a), out)),
    }
}

/// One quad of `P` staged pixels against one stored word `wv`
/// (`[w0, w2, w1, w3]`): `sxtb16` gives `(w0, w1)`, `sxtb16 … ror #8`
/// gives `(w2, w3)`, each meeting one word of a pixel's widened values.
#[inline(always)]
fn quad(x: &[i16; 16], wv: u32, acc: &mut [i32; PIXELS]) {
    let (lo, hi) = (ingot_dsp::sxtb16(wv), ingot_dsp::sxtb16_ror8(wv));
    for (s, v) in acc.iter_mut().zip(x.chunks_exact(4)) {
        // A barrier between pixels: without it the scheduler loads ahead
        // and, in the firmware's build, spills one staged word per pass.
        no_unroll();
        // Adjacent in the staging buffer: one load each.
        *s = ingot_dsp::smlad(word(v[0], v[1]), lo, *s);
        *s = ingot_dsp::smlad(word(v[2], v[3]), hi, *s);
    }
}
