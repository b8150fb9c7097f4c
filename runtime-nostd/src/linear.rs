//! Fully connected layer.

use crate::dot::{dot_i8, no_unroll, Wt};
use crate::requant::{fast_requant, finish_one};
use crate::{Error, MapRef, OutputQuant, Requant};

/// Fully connected layer over a map flattened in HWC order.
///
/// With `I = h·w·c` input elements and `O = output.h·output.w·output.c`
/// outputs (written in HWC order), `weights` is `[O][I]` and
///
/// ```text
/// acc[o] = bias[o] + Σ_i w[o][i] · x[i]                    (i32)
/// out[o] = clamp(z_out + requant[o].scale(acc[o]), min, max)
/// ```
///
/// The input is read straight from the arena, one contiguous run per pixel
/// (a single run when `stride == c`), so no scratch is needed. `output` must
/// not share elements with `input`.
pub fn linear(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    out: OutputQuant,
) -> Result<(), Error> {
    let rows = LinearRows::Bytes(weights);
    let a = check_linear(arena.len(), input, output, rows, bias, requant, out)?;
    linear_run(arena, &a);
    Ok(())
}

/// The stored form of a linear layer's weights.
#[derive(Clone, Copy)]
pub(crate) enum LinearRows<'a> {
    /// `[O][I]`, int8.
    Bytes(&'a [i8]),
    /// The same as the bytes of the weights file.
    File(&'a [u8]),
}

impl LinearRows<'_> {
    const fn len(&self) -> usize {
        match self {
            LinearRows::Bytes(w) => w.len(),
            LinearRows::File(w) => w.len(),
        }
    }
}

/// A linear call that passed [`check_linear`]: running it cannot fail.
#[derive(Clone, Copy)]
pub(crate) struct LinearArgs<'a> {
    pub(crate) input: MapRef,
    pub(crate) output: MapRef,
    pub(crate) weights: LinearRows<'a>,
    pub(crate) bias: &'a [i32],
    pub(crate) requant: &'a [Requant],
    pub(crate) out: OutputQuant,
}

/// The checks of [`linear`] (a `const fn`, see [`crate::checked`]).
pub(crate) const fn check_linear<'a>(
    arena_len: usize,
    input: MapRef,
    output: MapRef,
    weights: LinearRows<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    out: OutputQuant,
) -> Result<LinearArgs<'a>, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    // The input is read as one run of pixels: whole maps only.
    if input.is_ring() || output.is_ring() {
        return Err(Error::BadParams);
    }
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    if !out.is_valid() {
        return Err(Error::BadParams);
    }
    let n_in = input.len();
    let n_out = output.len();
    let need_w = match n_in.checked_mul(n_out) {
        Some(v) => v,
        None => return Err(Error::BadParams),
    };
    if weights.len() < need_w || bias.len() < n_out || requant.len() < n_out {
        return Err(Error::BufferTooSmall);
    }
    if !crate::requant::all_valid(requant, n_out) {
        return Err(Error::BadParams);
    }
    if n_in == 0 {
        return Err(Error::ShapeMismatch);
    }
    Ok(LinearArgs {
        input,
        output,
        weights,
        bias,
        requant,
        out,
    })
}

/// Runs a checked linear layer.
pub(crate) fn linear_run(arena: &mut [i8], a: &LinearArgs<'_>) {
    match a.weights {
        LinearRows::Bytes(w) => linear_rows(arena, a, w),
        LinearRows::File(w) => linear_rows(arena, a, w),
    }
}

/// [`linear_run`] for one weight type.
fn linear_rows<W: Wt>(arena: &mut [i8], a: &LinearArgs<'_>, weights: &[W]) {
    let (input, output) = (a.input, a.output);
    let n_in = input.len();
    if n_in == 0 || input.c == 0 {
        return;
    }
    let contiguous = input.stride == input.c || input.pixels() == 1;
    if WORDS && contiguous {
        linear_words(arena, a, weights);
        return;
    }
    // Advanced by hand, not zipped: `zip` over a chunk iterator can leave
    // a call that divides by the chunk size, a division-by-zero panic path.
    let mut rows = weights.chunks_exact(n_in.max(1));
    let mut params = a.bias.iter().zip(a.requant);
    let fast = fast_requant(a.requant, a.out);
    for oy in 0..output.h {
        for ox in 0..output.w {
            let dst = output.pixel(oy, ox);
            for oc in 0..output.c {
                let (Some(row), Some((&b, rq))) = (rows.next(), params.next()) else {
                    return;
                };
                let mut acc = b;
                if contiguous {
                    let Some(x) = arena.get(input.offset..input.offset + n_in) else {
                        return;
                    };
                    acc = acc.wrapping_add(dot_i8(x, row));
                } else {
                    for (px, wrow) in row.chunks_exact(input.c.max(1)).enumerate() {
                        let s = input.offset + px * input.stride;
                        let Some(x) = arena.get(s..s + input.c) else {
                            return;
                        };
                        acc = acc.wrapping_add(dot_i8(x, wrow));
                    }
                }
                let Some(d) = arena.get_mut(dst + oc) else {
                    return;
                };
                *d = finish_one(fast, acc, rq, a.out);
            }
        }
    }
}

/// Whether [`linear_rows`] runs [`linear_words`]: on cores with the DSP
/// extension (its multiply-accumulates), and on hosts (the portable twins,
/// so the tests run it). Cores without it (Cortex-M0+, M3, M33 built
/// without `+dsp`) keep the plain loop, faster there than the twins.
const WORDS: bool = ingot_dsp::NATIVE || !cfg!(target_arch = "arm");

/// [`linear_rows`] for a contiguous input, two output rows per pass over
/// it: four int8 inputs and four weights of each row per 32-bit load,
/// widened in registers. `sxtb16` of a word of four int8 values gives the
/// 16-bit pair of its bytes 0 and 2, `sxtb16 … ror #8` that of bytes 1 and
/// 3, for the inputs and the weights alike, so the lanes meet and one
/// `smlad` adds two products: the weights stay in their plain `[O][I]`
/// order.
fn linear_words<W: Wt>(arena: &mut [i8], a: &LinearArgs<'_>, weights: &[W]) {
    let (input, output) = (a.input, a.output);
    let n = input.len();
    let mut rows = weights.chunks_exact(n.max(1));
    let mut params = a.bias.iter().zip(a.requant);
    let fast = fast_requant(a.requant, a.out);
    for oy in 0..output.h {
        for ox in 0..output.w {
            let dst = output.pixel(oy, ox);
            let mut oc = 0;
            while oc < output.c {
                let Some(x) = arena.get(input.offset..input.offset + n) else {
                    return;
                };
                let (Some(r0), Some((&b0, q0))) = (rows.next(), params.next()) else {
                    return;
                };
                let (s0, second) = if oc + 1 < output.c {
                    let (Some(r1), Some((&b1, q1))) = (rows.next(), params.next()) else {
                        return;
                    };
                    let [s0, s1] = dot2_words(x, r0, r1);
                    (s0, Some(finish_one(fast, b1.wrapping_add(s1), q1, a.out)))
                } else {
                    (dot2_words(x, r0, r0)[0], None)
                };
                let first = finish_one(fast, b0.wrapping_add(s0), q0, a.out);
                if let Some(d) = arena.get_mut(dst + oc) {
                    *d = first;
                }
                if let (Some(v), Some(d)) = (second, arena.get_mut(dst + oc + 1)) {
                    *d = v;
                }
                oc += 2;
            }
        }
    }
}

/// Four int8 values as one little-endian word (one load).
#[inline(always)]
fn word4<W: Wt>(q: &[W; 4]) -> u32 {
    u32::from_le_bytes([q[0].byte(), q[1].byte(), q[2].byte(), q[3].byte()])
}

/// `[Σ x·w0, Σ x·w1]` over `x.len()` int8 terms (`w0`, `w1` at least as
/// long; shorter rows give 0).
#[inline(never)]
fn dot2_words<W: Wt>(x: &[i8], w0: &[W], w1: &[W]) -> [i32; 2] {
    let n = x.len();
    let (Some(w0), Some(w1)) = (w0.get(..n), w1.get(..n)) else {
        return [0; 2];
    };
    let (xq, aq, bq) = (x.chunks_exact(4), w0.chunks_exact(4), w1.chunks_exact(4));
    let (xr, ar, br) = (xq.remainder(), aq.remainder(), bq.remainder());
    let (mut s0, mut s1) = (0i32, 0i32);
    for ((xq, aq), bq) in xq.zip(aq).zip(bq) {
        no_unroll();
        let (Some(xq), Some(aq), Some(bq)) = (
            xq.first_chunk::<4>(),
            aq.first_chunk::<4>(),
            bq.first_chunk::<4>(),
        ) else {
            break;
        };
        let xv = word4(xq);
        let (xe, xo) = (ingot_dsp::sxtb16(xv), ingot_dsp::sxtb16_ror8(xv));
        let av = word4(aq);
        s0 = ingot_dsp::smlad(xe, ingot_dsp::sxtb16(av), s0);
        s0 = ingot_dsp::smlad(xo, ingot_dsp::sxtb16_ror8(av), s0);
        let bv = word4(bq);
        s1 = ingot_dsp::smlad(xe, ingot_dsp::sxtb16(bv), s1);
        s1 = ingot_dsp::smlad(xo, ingot_dsp::sxtb16_ror8(bv), s1);
    }
    for ((&x, a), b) in xr.iter().zip(ar).zip(br) {
        s0 = s0.wrapping_add((x as i32).wrapping_mul(a.v()));
        s1 = s1.wrapping_add((x as i32).wrapping_mul(b.v()));
    }
    [s0, s1]
}
