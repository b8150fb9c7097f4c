//! 2-D convolution over HWC maps: im2col of one output pixel into the
//! widened patch, then contiguous dot products per output channel.

use crate::dot::{
    dot2_wide, dot4_pairs, dot4_wide, dot4_words, dot_pairs_few, dot_wide, dot_words_few,
    tail_wide, widen_into, Wt,
};
use crate::requant::{fast_requant, finish_one, requant_fast, Fast};
use crate::{Error, InputTransform, MapRef, OutputQuant, Requant};
use core::num::NonZeroUsize;

/// Zero-padding amounts (in input pixels) on each side; may be asymmetric.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Padding {
    /// Rows added above the input.
    pub top: usize,
    /// Columns added left of the input.
    pub left: usize,
    /// Rows added below the input.
    pub bottom: usize,
    /// Columns added right of the input.
    pub right: usize,
}

impl Padding {
    /// No padding.
    pub const NONE: Padding = Padding {
        top: 0,
        left: 0,
        bottom: 0,
        right: 0,
    };

    /// The same amount on all four sides.
    pub const fn same(p: usize) -> Self {
        Padding {
            top: p,
            left: p,
            bottom: p,
            right: p,
        }
    }
}

/// A sliding window: kernel size, step ("stride" of the convolution, not to
/// be confused with [`MapRef::stride`]), dilation and padding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// Kernel height.
    pub kh: usize,
    /// Kernel width.
    pub kw: usize,
    /// Vertical step between output rows, in input rows.
    pub step_y: usize,
    /// Horizontal step between output columns, in input columns.
    pub step_x: usize,
    /// Vertical dilation (1 = dense kernel).
    pub dilation_y: usize,
    /// Horizontal dilation (1 = dense kernel).
    pub dilation_x: usize,
    /// Padding on each side.
    pub pad: Padding,
}

/// Output length along one axis: `(n + pa + pb - d·(k-1) - 1) / s + 1`, or
/// `None` when the dilated kernel does not fit the padded input or a
/// parameter is zero.
pub const fn window_out_len(
    n: usize,
    k: usize,
    step: usize,
    dilation: usize,
    pad_a: usize,
    pad_b: usize,
) -> Option<usize> {
    if k == 0 || step == 0 || dilation == 0 {
        return None;
    }
    let padded = n + pad_a + pad_b;
    let span = dilation * (k - 1) + 1;
    if padded < span {
        return None;
    }
    Some((padded - span) / step + 1)
}

impl Window {
    /// A square `k×k` window with equal step, dilation 1 and symmetric
    /// padding `pad`.
    pub const fn square(k: usize, step: usize, pad: usize) -> Self {
        Window {
            kh: k,
            kw: k,
            step_y: step,
            step_x: step,
            dilation_y: 1,
            dilation_x: 1,
            pad: Padding::same(pad),
        }
    }

    /// Number of taps `kh · kw`.
    pub const fn taps(&self) -> usize {
        self.kh * self.kw
    }

    /// Output height for an input of height `h`.
    pub const fn out_h(&self, h: usize) -> Option<usize> {
        window_out_len(
            h,
            self.kh,
            self.step_y,
            self.dilation_y,
            self.pad.top,
            self.pad.bottom,
        )
    }

    /// Output width for an input of width `w`.
    pub const fn out_w(&self, w: usize) -> Option<usize> {
        window_out_len(
            w,
            self.kw,
            self.step_x,
            self.dilation_x,
            self.pad.left,
            self.pad.right,
        )
    }

    /// True when an `out_h × out_w` output matches an `h × w` input.
    pub const fn matches(&self, h: usize, w: usize, out_h: usize, out_w: usize) -> bool {
        match (self.out_h(h), self.out_w(w)) {
            (Some(a), Some(b)) => a == out_h && b == out_w,
            _ => false,
        }
    }
}

/// Parameters of one convolution call.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvParams {
    /// Kernel geometry.
    pub window: Window,
    /// Number of groups; `C_in` and `C_out` must be multiples of it.
    /// `groups == C_in` is depthwise (with channel multiplier
    /// `C_out / C_in`).
    pub groups: usize,
    /// Input zero point: the value padded taps take. With an input transform
    /// this is the transform's output zero point. The folded bias assumes it.
    pub input_zp: i8,
    /// Output zero point and activation clamp.
    pub out: OutputQuant,
}

/// Length (in `i16` elements) of the `patch` scratch a convolution needs:
/// `kh · kw · C_in`, rounded up to an even number.
///
/// The patch holds one output pixel's receptive field, every element
/// widened to `i16`, laid out as `[group][ky][kx][channel within group]`.
/// The paired kernels ([`conv2d_paired`]) read it two elements at a time,
/// hence the even length; the odd element out meets a zero weight.
pub const fn conv_patch_len(kh: usize, kw: usize, c_in: usize) -> usize {
    (kh * kw * c_in + 1) & !1
}

/// Length in words of `rows` weight rows of `k` int8 weights in the paired
/// layout of [`pair_rows`]: `rows · ⌈k / 2⌉`.
pub const fn paired_len(rows: usize, k: usize) -> usize {
    rows * k.div_ceil(2)
}

/// Rearranges int8 weight rows `w = [rows][k]` into the paired layout the
/// [`conv2d_paired`] kernel reads, as a fixed-size array (generated modules
/// evaluate it at compile time). See [`pair_rows_into`] for the layout.
///
/// Panics (a compile error in a `const` or `static`, which is where
/// generated modules call it) when `N != paired_len(rows, k)` or `w` is
/// shorter than `rows · k`.
pub const fn pair_rows<const N: usize>(w: &[i8], rows: usize, k: usize) -> [u32; N] {
    let mut v = [0u32; N];
    if pair_rows_into(w, rows, k, &mut v).is_err() {
        panic!("pair_rows: N must be paired_len(rows, k) and w hold rows * k weights");
    }
    v
}

/// Writes the paired layout of int8 weight rows `w = [rows][k]` into `out`.
///
/// Each word holds two consecutive weights of one row as `i16`, the first
/// in the low half; an odd `k` gets a zero weight at the end of every row.
/// Rows go in blocks of four (the last block holds the one to three rows
/// left over); within a block, word `p` of every row in turn, so a block is
/// read front to back, one word per row per pair of patch elements.
///
/// [`Error::BufferTooSmall`] (and nothing written) when
/// `out.len() != paired_len(rows, k)` or `w` is shorter than `rows · k`.
pub const fn pair_rows_into(w: &[i8], rows: usize, k: usize, out: &mut [u32]) -> Result<(), Error> {
    let need = match rows.checked_mul(k) {
        Some(n) => n,
        None => return Err(Error::BufferTooSmall),
    };
    if out.len() != paired_len(rows, k) || w.len() < need {
        return Err(Error::BufferTooSmall);
    }
    let kp = k.div_ceil(2);
    let mut o = 0;
    let mut r0 = 0;
    while r0 < rows {
        let block = if rows - r0 < 4 { rows - r0 } else { 4 };
        let mut p = 0;
        while p < kp {
            let mut r = 0;
            while r < block {
                let row = (r0 + r) * k;
                // The explicit comparisons (always true after the length
                // checks above) let the optimiser drop the bounds checks.
                let lo = if row + 2 * p < w.len() {
                    w[row + 2 * p] as i16 as u16 as u32
                } else {
                    0
                };
                let hi = if 2 * p + 1 < k && row + 2 * p + 1 < w.len() {
                    w[row + 2 * p + 1] as i16 as u16 as u32
                } else {
                    0
                };
                if o < out.len() {
                    out[o] = lo | (hi << 16);
                }
                o += 1;
                r += 1;
            }
            p += 1;
        }
        r0 += block;
    }
    Ok(())
}

/// Length in bytes of `rows` weight rows of `k` int8 weights in the word
/// layout of [`word_rows_into`]: `rows · 4·⌈k / 4⌉`.
pub const fn words_len(rows: usize, k: usize) -> usize {
    rows * k.div_ceil(4) * 4
}

/// Writes the word layout of int8 weight rows `w = [rows][k]` into `out`,
/// the form [`conv2d_words`] reads: still one byte per weight, arranged so
/// that one 32-bit load and two sign-extending byte-pair widenings
/// (`sxtb16`, and `sxtb16` of the word rotated by 8 bits) give the 16-bit
/// pairs that meet the patch pairs `(x0, x1)` and `(x2, x3)`.
///
/// Each row is cut into quads of four consecutive weights `w0..w3`
/// (the last quad padded with zero weights), each stored as the four bytes
/// `[w0, w2, w1, w3]`. Rows go in blocks of four (the last block holds the
/// one to three rows left over); within a block, quad `q` of every row in
/// turn, so a block is read front to back, sixteen bytes per quad of patch
/// elements.
///
/// [`Error::BufferTooSmall`] (and nothing written) when
/// `out.len() != words_len(rows, k)` or `w` is shorter than `rows · k`.
pub fn word_rows_into(w: &[i8], rows: usize, k: usize, out: &mut [u8]) -> Result<(), Error> {
    let need = rows.checked_mul(k).ok_or(Error::BufferTooSmall)?;
    if out.len() != words_len(rows, k) || w.len() < need {
        return Err(Error::BufferTooSmall);
    }
    let kq = k.div_ceil(4);
    let at = |r: usize, i: usize| -> u8 {
        if i < k {
            w.get(r * k + i).map_or(0, |&v| v as u8)
        } else {
            0
        }
    };
    let mut o = out.iter_mut();
    let mut r0 = 0;
    while r0 < rows {
        let block = (rows - r0).min(4);
        for q in 0..kq {
            for r in r0..r0 + block {
                for i in [0, 2, 1, 3] {
                    if let Some(d) = o.next() {
                        *d = at(r, 4 * q + i);
                    }
                }
            }
        }
        r0 += block;
    }
    Ok(())
}

/// [`conv_rows_apply`] for the word layout of [`conv2d_words`]: every
/// kernel row must also start a new quad (`kw · C_in` a multiple of 4).
pub const fn conv_rows_apply_words(w: &Window, groups: usize, c_in: usize) -> bool {
    conv_rows_apply(w, groups, c_in) && (w.kw * c_in) % 4 == 0
}

/// True when [`conv2d_paired`] can run from a buffer of whole input rows
/// instead of a per-pixel patch: step and dilation 1, one group, and an
/// even number of elements per kernel row (`kw · C_in`), so every kernel
/// row starts a new pair of the weight layout.
pub const fn conv_rows_apply(w: &Window, groups: usize, c_in: usize) -> bool {
    groups == 1
        && w.step_y == 1
        && w.step_x == 1
        && w.dilation_y == 1
        && w.dilation_x == 1
        && (w.kw * c_in) % 2 == 0
}

/// Length (in `i16` elements) of the row buffer [`conv2d_paired`] uses
/// when [`conv_rows_apply`] holds and `patch` is at least this long: `kh`
/// padded input rows, `(pad.left + w_in + pad.right) · C_in` each.
///
/// Each input value is then transformed (or widened) once per inference
/// instead of once per kernel row it falls under, and a pixel's dot
/// products read its window straight out of the buffered rows.
pub const fn conv_rows_len(w: &Window, w_in: usize, c_in: usize) -> usize {
    w.kh * (w.pad.left + w_in + w.pad.right) * c_in
}

/// The stored form of a convolution's weights.
#[derive(Clone, Copy)]
pub(crate) enum Rows<'a> {
    /// `[C_out][kh][kw][C_in / groups]`, int8.
    Bytes(&'a [i8]),
    /// [`pair_rows`] of the same rows (one group).
    Pairs(&'a [u32]),
    /// [`word_rows_into`] of the same rows (one group).
    Words(&'a [u8]),
    /// [`Rows::Bytes`] as the bytes of the weights file (two's
    /// complement), read as they are.
    File(&'a [u8]),
}

/// A convolution call whose maps, buffers and parameters passed
/// [`check_conv`]: running it cannot fail.
#[derive(Clone, Copy)]
pub(crate) struct ConvArgs<'a> {
    pub(crate) input: MapRef,
    pub(crate) output: MapRef,
    pub(crate) rows: Rows<'a>,
    pub(crate) bias: &'a [i32],
    pub(crate) requant: &'a [Requant],
    pub(crate) p: ConvParams,
    pub(crate) transform: Option<InputTransform<'a>>,
    /// Paired weights read from a ring of input rows (see [`conv_rows_len`]).
    pub(crate) ring: bool,
    /// The kernel that runs the call, chosen once by [`check_conv`].
    pub(crate) kernel: Kernel,
}

/// The kernel a checked convolution runs. A checked call's `run`
/// dispatches on it where it is inlined, and the value is a constant of
/// each call's `static`, so a firmware links only the kernels its calls
/// use (the demo, with no depthwise or plain 1×1 convolution, leaves
/// those two out: 4 to 9 kB of thumbv7em code each).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Kernel {
    /// [`conv_run_forms`]: the patch and ring-of-rows kernels of the
    /// call's weight form.
    Forms,
    /// The direct depthwise 3×3 kernel ([`crate::depthwise::applies`]).
    Depthwise,
    /// The one-input-channel kernel ([`crate::stem::applies`]).
    Stem,
    /// The four-pixel 1×1 word kernel ([`crate::pointwise_applies`], no
    /// input transform, a patch of [`crate::pointwise_patch_len`]).
    Pointwise,
}

/// Every check of a convolution call, in a `const fn` so that generated
/// modules run it at compile time ([`crate::checked`]).
#[allow(clippy::too_many_arguments)]
pub(crate) const fn check_conv<'a>(
    arena_len: usize,
    patch_len: usize,
    input: MapRef,
    output: MapRef,
    rows: Rows<'a>,
    bias: &'a [i32],
    requant: &'a [Requant],
    p: ConvParams,
    transform: Option<InputTransform<'a>>,
) -> Result<ConvArgs<'a>, Error> {
    if let Err(e) = input.check(arena_len) {
        return Err(e);
    }
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    let w = &p.window;
    if p.groups == 0 || !p.out.is_valid() {
        return Err(Error::BadParams);
    }
    if w.out_h(input.h).is_none() || w.out_w(input.w).is_none() {
        return Err(Error::BadParams);
    }
    if !w.matches(input.h, input.w, output.h, output.w)
        || input.c % p.groups != 0
        || output.c % p.groups != 0
        || input.c == 0
    {
        return Err(Error::ShapeMismatch);
    }
    let taps = w.taps();
    let cpg = input.c / p.groups;
    let need_w = match output.c.checked_mul(taps) {
        Some(v) => match v.checked_mul(cpg) {
            Some(v) => v,
            None => return Err(Error::BadParams),
        },
        None => return Err(Error::BadParams),
    };
    let enough = match rows {
        Rows::Bytes(w) => w.len() >= need_w,
        Rows::File(w) => w.len() >= need_w,
        Rows::Pairs(w) => {
            if p.groups != 1 {
                return Err(Error::BadParams);
            }
            w.len() >= paired_len(output.c, taps * cpg)
        }
        Rows::Words(w) => {
            if p.groups != 1 {
                return Err(Error::BadParams);
            }
            w.len() >= words_len(output.c, taps * cpg)
        }
    };
    if !enough
        || bias.len() < output.c
        || requant.len() < output.c
        || patch_len < conv_patch_len(w.kh, w.kw, input.c)
    {
        return Err(Error::BufferTooSmall);
    }
    if !crate::requant::all_valid(requant, output.c) {
        return Err(Error::BadParams);
    }
    if let Some(t) = &transform {
        if !t.is_valid_for(input.c, p.input_zp) {
            return Err(Error::BadParams);
        }
    }
    let ring = match rows {
        Rows::Bytes(_) | Rows::File(_) => false,
        Rows::Pairs(_) => conv_rows_apply(w, p.groups, input.c),
        Rows::Words(_) => conv_rows_apply_words(w, p.groups, input.c),
    } && patch_len >= conv_rows_len(w, input.w, input.c);
    let int8 = matches!(rows, Rows::Bytes(_) | Rows::File(_));
    let kernel = if int8
        && p.groups == input.c
        && output.c == input.c
        && crate::depthwise::applies(w, input.c, transform.is_some(), &input, &output)
    {
        Kernel::Depthwise
    } else if crate::stem::applies(
        w,
        input.c,
        p.groups,
        transform.is_some(),
        requant,
        output.c,
        p.out.zero_point,
    ) {
        Kernel::Stem
    } else if matches!(rows, Rows::Words(_))
        && crate::pointwise_applies(w, p.groups)
        && transform.is_none()
        && patch_len >= crate::pointwise_patch_len(input.c)
    {
        // With a transform the ring of rows measured faster (the demo's
        // transition: 3.81 against 4.36 instructions per MAC).
        Kernel::Pointwise
    } else {
        Kernel::Forms
    };
    Ok(ConvArgs {
        input,
        output,
        rows,
        bias,
        requant,
        p,
        transform,
        ring,
        kernel,
    })
}

/// 2-D convolution (any kernel, step, dilation, asymmetric padding, groups,
/// depthwise with channel multiplier), per-output-channel requantization,
/// fused clamp, optional fused input transform.
///
/// For every output pixel the receptive field is gathered into `patch`
/// (widened, see [`conv_patch_len`]); padded taps take `p.input_zp`; with a
/// `transform` each in-bounds value is transformed on the way. Then for
/// output channel `o` in group `g`:
///
/// ```text
/// acc = bias[o] + Σ_{ky,kx,i} w[o][ky][kx][i] · patch[g][ky][kx][i]   (i32)
/// out = clamp(z_out + requant[o].scale(acc), min, max)
/// ```
///
/// `weights` is `[C_out][kh][kw][C_in / groups]`, `bias` is folded with the
/// input zero point. `output` must not share elements with `input`
/// (interleaved channel views of one concatenation region are fine).
#[allow(clippy::too_many_arguments)]
pub fn conv2d(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
) -> Result<(), Error> {
    check_and_run(
        arena,
        input,
        output,
        Rows::Bytes(weights),
        bias,
        requant,
        p,
        transform,
        patch,
        (0, usize::MAX),
    )
}

/// [`conv2d`] with the weights in the paired layout of [`pair_rows`]
/// (`weights = pair_rows(w, C_out, kh·kw·C_in)`), for cores with 16-bit
/// multiply-accumulate instructions (Cortex-M4, M7): there every pair of
/// patch elements costs one load for four rows, one load and two
/// multiply-accumulates per row. One group only (`p.groups == 1`, else
/// [`Error::BadParams`]). Same results as [`conv2d`], bit for bit.
///
/// When [`conv_rows_apply`] holds and `patch` has at least
/// [`conv_rows_len`] elements, the kernel keeps a ring of `kh` padded,
/// transformed input rows in `patch` instead of gathering a patch per
/// pixel; otherwise `patch` needs [`conv_patch_len`] elements as for
/// [`conv2d`].
#[allow(clippy::too_many_arguments)]
pub fn conv2d_paired(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[u32],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
) -> Result<(), Error> {
    check_and_run(
        arena,
        input,
        output,
        Rows::Pairs(weights),
        bias,
        requant,
        p,
        transform,
        patch,
        (0, usize::MAX),
    )
}

/// [`conv2d`] with the int8 weights in the word layout of
/// [`word_rows_into`] (`weights`, `words_len(C_out, kh·kw·C_in)` bytes),
/// for cores with the DSP extension (Cortex-M4, M7, M33 with it): one
/// 32-bit load brings four weights of a row, two `sxtb16` widen them into
/// 16-bit pairs in registers and two `smlad` add four MACs, so the weights
/// take one byte each in flash instead of the two of [`conv2d_paired`].
/// One group only (`p.groups == 1`, else [`Error::BadParams`]). Same
/// results as [`conv2d`], bit for bit, on every core (elsewhere the
/// instructions are their portable twins).
///
/// `patch` as for [`conv2d_paired`], with [`conv_rows_apply_words`] in
/// place of [`conv_rows_apply`] for the ring of input rows.
#[allow(clippy::too_many_arguments)]
pub fn conv2d_words(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[u8],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
) -> Result<(), Error> {
    check_and_run(
        arena,
        input,
        output,
        Rows::Words(weights),
        bias,
        requant,
        p,
        transform,
        patch,
        (0, usize::MAX),
    )
}

/// [`conv2d`] for output rows `[y0, y1)` only (clipped to the output's
/// height), for a row pipeline: `input` and `output` may be rings
/// ([`MapRef::ring`]) holding the rows these output rows read and write.
/// Same bytes in those rows as [`conv2d`].
#[allow(clippy::too_many_arguments)]
pub fn conv2d_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
    rows: (usize, usize),
) -> Result<(), Error> {
    let w = Rows::Bytes(weights);
    check_and_run(
        arena, input, output, w, bias, requant, p, transform, patch, rows,
    )
}

/// [`conv2d_paired`] for output rows `[rows.0, rows.1)` only, as
/// [`conv2d_rows`]. With its ring of input rows in `patch`, a call that
/// starts mid-map fills all `kh` rows of it first.
#[allow(clippy::too_many_arguments)]
pub fn conv2d_paired_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[u32],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
    rows: (usize, usize),
) -> Result<(), Error> {
    let w = Rows::Pairs(weights);
    check_and_run(
        arena, input, output, w, bias, requant, p, transform, patch, rows,
    )
}

/// [`conv2d_words`] for output rows `[rows.0, rows.1)` only, as
/// [`conv2d_paired_rows`].
#[allow(clippy::too_many_arguments)]
pub fn conv2d_words_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    weights: &[u8],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
    rows: (usize, usize),
) -> Result<(), Error> {
    let w = Rows::Words(weights);
    check_and_run(
        arena, input, output, w, bias, requant, p, transform, patch, rows,
    )
}

/// Checks a convolution of any weight form and runs it: the one body of
/// the public per-form entry points.
#[allow(clippy::too_many_arguments)]
fn check_and_run(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    rows: Rows<'_>,
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
    out_rows: (usize, usize),
) -> Result<(), Error> {
    let a = check_conv(
        arena.len(),
        patch.len(),
        input,
        output,
        rows,
        bias,
        requant,
        *p,
        transform.copied(),
    )?;
    conv_run(arena, &a, patch, out_rows.0, out_rows.1);
    Ok(())
}

/// Runs a checked convolution. Every slice is taken with `get`: after
/// [`check_conv`] none of them can be out of range, and the early returns
/// (which cannot happen) are what leaves no panic path in the binary.
pub(crate) fn conv_run(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    match a.kernel {
        Kernel::Forms => conv_run_forms::<{ forms::ANY }>(arena, a, patch, y0, y1),
        Kernel::Depthwise => conv_run_depthwise(arena, a, patch, y0, y1),
        Kernel::Stem => conv_run_stem(arena, a, y0, y1),
        Kernel::Pointwise => conv_run_pointwise(arena, a, patch, y0, y1),
    }
}

/// [`conv_run`] for the calls of [`Kernel::Stem`]: the one-input-channel
/// kernel (`stem.rs`), every weight form.
#[inline(never)]
pub(crate) fn conv_run_stem(arena: &mut [i8], a: &ConvArgs<'_>, y0: usize, y1: usize) {
    let y1 = if y1 < a.output.h { y1 } else { a.output.h };
    if y0 < y1 {
        crate::stem::run(arena, a, y0, y1);
    }
}

/// [`conv_run`] for the calls of [`Kernel::Pointwise`]: four pixels per
/// pass over each weight row (`pointwise.rs`).
#[inline(never)]
pub(crate) fn conv_run_pointwise(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let y1 = if y1 < a.output.h { y1 } else { a.output.h };
    if let (Rows::Words(ww), true) = (a.rows, y0 < y1) {
        crate::pointwise::run_words(arena, a, ww, patch, y0, y1);
    }
}

/// [`conv_run`] for the int8 forms only ([`crate::checked::Conv2d`]).
/// The three `conv_run_*` are plain functions so that the generic
/// instances are compiled here, once, and not again in every crate that
/// runs a checked call (a generated module would otherwise carry, and
/// rustc optimise, its own copy of every kernel).
#[inline(never)]
pub(crate) fn conv_run_int8(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    conv_run_forms::<{ forms::BYTES | forms::FILE }>(arena, a, patch, y0, y1);
}

/// [`conv_run`] for the calls of [`Kernel::Depthwise`]: the direct
/// depthwise 3×3 kernel (`depthwise.rs`), with the `9·C` values of
/// `patch` for its widened weights.
#[inline(never)]
pub(crate) fn conv_run_depthwise(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let (input, output, p) = (&a.input, &a.output, &a.p);
    let y1 = if y1 < output.h { y1 } else { output.h };
    let n = 9 * input.c;
    let Some(table) = patch.get_mut(..n) else {
        return;
    };
    let (b, r, w) = (a.bias, a.requant, &p.window);
    match a.rows {
        Rows::Bytes(wb) => crate::depthwise::run(
            arena, input, output, w, wb, b, r, p.out, p.input_zp, table, y0, y1,
        ),
        Rows::File(wb) => crate::depthwise::run(
            arena, input, output, w, wb, b, r, p.out, p.input_zp, table, y0, y1,
        ),
        _ => {}
    }
}

/// [`conv_run`] for the paired form only.
#[inline(never)]
pub(crate) fn conv_run_pairs(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    conv_run_forms::<{ forms::PAIRS }>(arena, a, patch, y0, y1);
}

/// [`conv_run`] for the word form only.
#[inline(never)]
pub(crate) fn conv_run_words(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    conv_run_forms::<{ forms::WORDS }>(arena, a, patch, y0, y1);
}

/// Which weight forms a [`conv_run_forms`] instance handles (bit set).
pub(crate) mod forms {
    /// [`Rows::Bytes`](super::Rows::Bytes).
    pub(crate) const BYTES: u8 = 1;
    /// [`Rows::File`](super::Rows::File).
    pub(crate) const FILE: u8 = 2;
    /// [`Rows::Pairs`](super::Rows::Pairs).
    pub(crate) const PAIRS: u8 = 4;
    /// [`Rows::Words`](super::Rows::Words).
    pub(crate) const WORDS: u8 = 8;
    /// All of them.
    pub(crate) const ANY: u8 = 15;
}

/// [`conv_run`] for the weight forms in the bit set `F` only: each checked
/// call type runs the instance of its own forms, so a firmware links the
/// kernels of the forms its module uses and not the others (the match on
/// the stored form cannot be decided at link time).
///
/// Only output rows `[y0, y1)` are computed (`y1` clipped to the output's
/// height): a row pipeline calls a step for the rows its consumer needs
/// next.
fn conv_run_forms<const F: u8>(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let (input, output, p) = (a.input, a.output, &a.p);
    let y1 = if y1 < output.h { y1 } else { output.h };
    if y0 >= y1 {
        return;
    }
    let transform = a.transform.as_ref();
    let (bias, requant) = (a.bias, a.requant);
    let w = &p.window;
    let c_in = input.c;
    if c_in == 0 || p.groups == 0 {
        return;
    }
    let taps = w.taps();
    let cpg = c_in / p.groups;
    // Elements per group segment and per weight row.
    let seg = taps * cpg;
    if seg == 0 {
        return;
    }
    match (a.rows, a.ring) {
        (Rows::Pairs(pw), true) if F & forms::PAIRS != 0 => {
            conv_rows(
                arena, &input, &output, pw, bias, requant, p, transform, patch, y0, y1,
            );
            return;
        }
        (Rows::Words(ww), true) if F & forms::WORDS != 0 => {
            conv_rows(
                arena, &input, &output, ww, bias, requant, p, transform, patch, y0, y1,
            );
            return;
        }
        _ => {}
    }
    // The paired kernels read the patch in pairs: with one group and an
    // odd length, the element after the last meets a zero weight.
    // The int8 forms run one body for `i8` weights (the `conv2d` API) and
    // one for the weights file's bytes (generated modules); the packed
    // forms share the bytes one, so a firmware links one copy.
    let n = output.c * seg;
    match a.rows {
        Rows::Bytes(wb) if F & forms::BYTES != 0 => {
            if let (Some(x), Some(wv)) = (patch.get_mut(..taps * c_in), wb.get(..n)) {
                conv_pixels::<i8, F>(arena, a, x, wv, y0, y1);
            }
        }
        Rows::File(wb) if F & forms::FILE != 0 => {
            if let (Some(x), Some(wv)) = (patch.get_mut(..taps * c_in), wb.get(..n)) {
                conv_pixels::<u8, F>(arena, a, x, wv, y0, y1);
            }
        }
        Rows::Pairs(_) if F & forms::PAIRS != 0 => {
            if let Some(x) = patch.get_mut(..seg.div_ceil(2) * 2) {
                conv_pixels::<u8, F>(arena, a, x, &[], y0, y1);
            }
        }
        // The word kernels pad the last quad themselves.
        Rows::Words(_) if F & forms::WORDS != 0 => {
            if let Some(x) = patch.get_mut(..seg) {
                conv_pixels::<u8, F>(arena, a, x, &[], y0, y1);
            }
        }
        _ => {}
    }
}

/// The per-pixel part of [`conv_run`] (everything but the ring of rows):
/// `patch` cut to the pixel's length, `weights` the int8 rows (empty for
/// the packed forms, which read `a.rows`).
fn conv_pixels<W: Wt, const F: u8>(
    arena: &mut [i8],
    a: &ConvArgs<'_>,
    patch: &mut [i16],
    weights: &[W],
    y0: usize,
    y1: usize,
) {
    let (input, output, p) = (a.input, a.output, &a.p);
    let transform = a.transform.as_ref();
    let (bias, requant) = (a.bias, a.requant);
    let w = &p.window;
    let c_in = input.c;
    if c_in == 0 || p.groups == 0 {
        return;
    }
    let taps = w.taps();
    let cpg = c_in / p.groups;
    let opg = output.c / p.groups;
    let seg = taps * cpg;
    if seg == 0 {
        return;
    }
    let pointwise = w.kh == 1
        && w.kw == 1
        && w.step_y == 1
        && w.step_x == 1
        && w.pad == Padding::NONE
        && p.groups == 1
        && transform.is_none();

    // Depthwise (one input channel per group): gather the window tap-major
    // like a dense convolution (`patch[t][c]`, whole kernel rows copied at
    // once), then each output channel walks its input channel's column.
    // (Only the int8 forms take more than one group: the packed instances
    // leave the depthwise and int8 row kernels out.)
    let int8 = F & (forms::BYTES | forms::FILE) != 0;
    let depthwise = cpg == 1 && p.groups > 1 && int8;
    // With a fused input transform each gathered value costs several
    // instructions, so neighbouring pixels share the columns they overlap
    // in (stride 1, no dilation, one group): each input value is then
    // transformed `kh` times instead of `kh·kw`.
    let slide = transform.is_some()
        && !pointwise
        && !depthwise
        && p.groups == 1
        && w.kw > 1
        && w.step_x == 1
        && w.dilation_x == 1;
    // Chunk sizes below are written `n.max(1)`: the guards make every one
    // nonzero, but only the `max` lets the optimiser drop the chunk
    // iterators' zero-size assertion (a panic path) everywhere.
    let run = w.kw * cpg;
    if run == 0 || taps == 0 || (opg == 0 && output.c > 0) {
        return;
    }
    let fast = fast_requant(requant, p.out);
    for oy in y0..y1 {
        // Row bases once per row (a ring's slot costs a division).
        let (in_row, out_row) = (input.row(oy), output.row(oy));
        for ox in 0..output.w {
            if pointwise {
                // 1×1 fast path: the patch is the input pixel, widened.
                let src = in_row + ox * input.stride;
                let Some(s) = arena.get(src..src + c_in) else {
                    return;
                };
                widen_into(patch, s);
            } else if depthwise {
                gather(
                    arena,
                    &input,
                    w,
                    p,
                    transform,
                    1,
                    oy,
                    ox,
                    c_in,
                    seg * c_in,
                    patch,
                );
            } else if slide && ox > 0 {
                // The patch holds pixel (oy, ox - 1): keep its last
                // `kw - 1` columns, gather (and transform) only the new one.
                for row in patch.chunks_exact_mut(run.max(1)) {
                    // By hand, not `copy_within`: its range checks stay
                    // in the binary as panic paths.
                    for i in cpg..row.len() {
                        if let Some(&v) = row.get(i) {
                            if let Some(d) = row.get_mut(i - cpg) {
                                *d = v;
                            }
                        }
                    }
                }
                gather_columns(
                    arena,
                    &input,
                    w,
                    p.input_zp,
                    transform,
                    oy,
                    ox,
                    w.kw - 1,
                    cpg,
                    patch,
                );
            } else {
                gather(
                    arena, &input, w, p, transform, p.groups, oy, ox, cpg, seg, patch,
                );
            }
            let dst = out_row + ox * output.stride;
            let Some(out) = arena.get_mut(dst..dst + output.c) else {
                return;
            };
            if depthwise && opg == 1 {
                depthwise_channels(patch, weights, taps, c_in, bias, requant, p.out, out, fast);
            } else if depthwise {
                // By hand, not `zip`: see `conv_rows`.
                let mut rows = weights.chunks_exact(taps.max(1));
                for (o, ((y, &b), rq)) in out.iter_mut().zip(bias).zip(requant).enumerate() {
                    let Some(row) = rows.next() else {
                        return;
                    };
                    let Some(col) = patch.get(o.checked_div(opg).unwrap_or(0)..) else {
                        return;
                    };
                    let mut acc = b;
                    for (x, &wv) in col.iter().step_by(c_in.max(1)).zip(row) {
                        acc = acc.wrapping_add((*x as i32).wrapping_mul(wv.v()));
                    }
                    *y = finish_one(fast, acc, rq, p.out);
                }
            } else if let (Rows::Pairs(pw), true) = (a.rows, F & forms::PAIRS != 0) {
                paired_rows(patch, pw, bias, requant, p.out, out, fast);
            } else if let (Rows::Words(ww), true) = (a.rows, F & forms::WORDS != 0) {
                paired_rows(patch, ww, bias, requant, p.out, out, fast);
            } else if int8 {
                for (g, xw) in patch.chunks_exact(seg.max(1)).enumerate() {
                    let o0 = g * opg;
                    let (Some(wg), Some(bg), Some(rg), Some(og)) = (
                        weights.get(o0 * seg..(o0 + opg) * seg),
                        bias.get(o0..o0 + opg),
                        requant.get(o0..o0 + opg),
                        out.get_mut(o0..o0 + opg),
                    ) else {
                        return;
                    };
                    channel_rows(xw, wg, bg, rg, p.out, og, fast);
                }
            }
        }
    }
}

/// Output channels of one group for one pixel: four (then two, then one)
/// weight rows per pass over the patch.
#[inline]
fn channel_rows<W: Wt>(
    xw: &[i16],
    weights: &[W],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    out: &mut [i8],
    fast: Option<Fast>,
) {
    let seg = xw.len();
    if seg == 0 {
        return;
    }
    if seg < 16 {
        // Short windows (first layer on a gray image, tiny kernels): plain
        // scalar rows.
        // By hand, not `zip`: see `conv_rows`.
        let mut rows = weights.chunks_exact(seg.max(1));
        for ((o, &b), rq) in out.iter_mut().zip(bias).zip(requant) {
            let Some(row) = rows.next() else {
                return;
            };
            let mut acc = b;
            for (&x, &w) in xw.iter().zip(row) {
                acc = acc.wrapping_add((x as i32).wrapping_mul(w.v()));
            }
            *o = finish_one(fast, acc, rq, out_q);
        }
        return;
    }
    let tail = seg - seg % 16;
    let (Some(xt), true) = (xw.get(tail..), weights.len() >= out.len() * seg) else {
        return;
    };
    let mut quads = weights.chunks_exact((4 * seg).max(1));
    let mut outs = out.chunks_exact_mut(4);
    let mut bq = bias.chunks_exact(4);
    let mut rq = requant.chunks_exact(4);
    for (((rows, o), b), r) in (&mut quads).zip(&mut outs).zip(&mut bq).zip(&mut rq) {
        let Some((a, rest)) = rows.split_at_checked(seg) else {
            return;
        };
        let Some((b_, rest)) = rest.split_at_checked(seg) else {
            return;
        };
        let Some((c, d)) = rest.split_at_checked(seg) else {
            return;
        };
        let mut acc = dot4_wide([xw, xw, xw, xw], [a, b_, c, d]);
        if tail < seg {
            for (v, w) in acc.iter_mut().zip([a, b_, c, d]) {
                if let Some(wt) = w.get(tail..) {
                    *v = v.wrapping_add(tail_wide(xt, wt));
                }
            }
        }
        requantize_into(o, &acc, b, r, out_q, fast);
    }
    let rest = quads.remainder();
    let out = outs.into_remainder();
    let (bias, requant) = (bq.remainder(), rq.remainder());
    let mut pairs = rest.chunks_exact((2 * seg).max(1));
    let mut outs = out.chunks_exact_mut(2);
    let mut bp = bias.chunks_exact(2);
    let mut rp = requant.chunks_exact(2);
    for (((rows, o), b), r) in (&mut pairs).zip(&mut outs).zip(&mut bp).zip(&mut rp) {
        let Some((a, b_)) = rows.split_at_checked(seg) else {
            return;
        };
        let mut acc = dot2_wide(xw, xw, a, b_);
        if tail < seg {
            if let (Some(at), Some(bt)) = (a.get(tail..), b_.get(tail..)) {
                acc[0] = acc[0].wrapping_add(tail_wide(xt, at));
                acc[1] = acc[1].wrapping_add(tail_wide(xt, bt));
            }
        }
        requantize_into(o, &acc, b, r, out_q, fast);
    }
    if let ([o], [b], [r]) = (outs.into_remainder(), bp.remainder(), rp.remainder()) {
        *o = finish_one(
            fast,
            b.wrapping_add(dot_wide(xw, pairs.remainder())),
            r,
            out_q,
        );
    }
}

/// One pixel of a depthwise convolution with one output channel per
/// input channel: `patch` is the window tap-major (`patch[t·c + ch]`),
/// `weights` the rows `[c][taps]`. Four channels per pass: each tap loads
/// the four neighbouring patch values (two words) and the four channels'
/// weights (one pointer each, stepping one byte per tap), so the inner
/// loop is loads and 16-bit multiply-accumulates (`smlabb`/`smlatb` on
/// Cortex-M4/M7) instead of one strided walk per channel.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn depthwise_channels<W: Wt>(
    patch: &[i16],
    weights: &[W],
    taps: usize,
    c: usize,
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    out: &mut [i8],
    fast: Option<Fast>,
) {
    if taps == 0 || c == 0 {
        return;
    }
    let mut ch = 0;
    while ch + 4 <= c {
        let (Some(w), Some(o), Some(b), Some(r)) = (
            weights.get(ch * taps..(ch + 4) * taps),
            out.get_mut(ch..ch + 4),
            bias.get(ch..ch + 4),
            requant.get(ch..ch + 4),
        ) else {
            return;
        };
        // 3×3 kernels: the nine taps unrolled against one weight pointer
        // (constant offsets), so nothing spills.
        if let (Ok(w9), Some(xs)) = (<&[W; 36]>::try_from(w), patch.get(ch..)) {
            let acc = depthwise4_3x3(xs, c, w9);
            requantize_into(o, &acc, b, r, out_q, fast);
            ch += 4;
            continue;
        }
        let Some((w0, w)) = w.split_at_checked(taps) else {
            return;
        };
        let Some((w1, w)) = w.split_at_checked(taps) else {
            return;
        };
        let Some((w2, w3)) = w.split_at_checked(taps) else {
            return;
        };
        // The patch rows start at channel `ch`: `get(ch..)` once, then
        // steps of `c`.
        let Some(xs) = patch.get(ch..) else {
            return;
        };
        let acc = depthwise4(xs, c, w0, w1, w2, w3);
        requantize_into(o, &acc, b, r, out_q, fast);
        ch += 4;
    }
    // The last one to three channels: one strided walk each.
    while ch < c {
        let (Some(row), Some(o), Some(&b), Some(r), Some(col)) = (
            weights.get(ch * taps..(ch + 1) * taps),
            out.get_mut(ch),
            bias.get(ch),
            requant.get(ch),
            patch.get(ch..),
        ) else {
            return;
        };
        let mut acc = b;
        for (x, &wv) in col.iter().step_by(c.max(1)).zip(row) {
            acc = acc.wrapping_add((*x as i32).wrapping_mul(wv.v()));
        }
        *o = finish_one(fast, acc, r, out_q);
        ch += 1;
    }
}

/// [`depthwise4`] for nine taps, the weights of the four channels one
/// after the other in `w`.
#[inline(never)]
fn depthwise4_3x3<W: Wt>(xs: &[i16], c: usize, w: &[W; 36]) -> [i32; 4] {
    let (mut a0, mut a1, mut a2, mut a3) = (0i32, 0i32, 0i32, 0i32);
    for t in 0..9 {
        let at = t * c;
        let Some(&[x0, x1, x2, x3]) = xs.get(at..at + 4) else {
            break;
        };
        a0 = a0.wrapping_add((x0 as i32).wrapping_mul(w[t].v()));
        a1 = a1.wrapping_add((x1 as i32).wrapping_mul(w[9 + t].v()));
        a2 = a2.wrapping_add((x2 as i32).wrapping_mul(w[18 + t].v()));
        a3 = a3.wrapping_add((x3 as i32).wrapping_mul(w[27 + t].v()));
    }
    [a0, a1, a2, a3]
}

/// The four sums of [`depthwise_channels`]: `xs[t·c + j] · wj[t]` over
/// the taps, for `j` in `0..4`. Its own function, so the loop holds only
/// its pointers and four accumulators in registers.
#[inline(never)]
fn depthwise4<W: Wt>(xs: &[i16], c: usize, w0: &[W], w1: &[W], w2: &[W], w3: &[W]) -> [i32; 4] {
    let (mut a0, mut a1, mut a2, mut a3) = (0i32, 0i32, 0i32, 0i32);
    for ((((row, &u0), &u1), &u2), &u3) in xs.chunks(c.max(1)).zip(w0).zip(w1).zip(w2).zip(w3) {
        crate::dot::no_unroll();
        if let [x0, x1, x2, x3, ..] = *row {
            a0 = a0.wrapping_add((x0 as i32).wrapping_mul(u0.v()));
            a1 = a1.wrapping_add((x1 as i32).wrapping_mul(u1.v()));
            a2 = a2.wrapping_add((x2 as i32).wrapping_mul(u2.v()));
            a3 = a3.wrapping_add((x3 as i32).wrapping_mul(u3.v()));
        }
    }
    [a0, a1, a2, a3]
}

/// Channels `c0..c0 + dst.len()` of one input pixel (`src`), transformed
/// if there is a transform, widened into `dst`.
#[inline(always)]
fn load_pixel(dst: &mut [i16], src: &[i8], transform: Option<&InputTransform<'_>>, c0: usize) {
    match transform {
        None => widen_into(dst, src),
        Some(InputTransform::Affine(a)) if c0 == 0 => a.apply_pixel(dst, src),
        Some(tr) => {
            for (ch, (d, &v)) in dst.iter_mut().zip(src).enumerate() {
                *d = tr.apply(c0 + ch, v) as i16;
            }
        }
    }
}

/// `out[j] = clamp(z_out + requant[j].scale(bias[j] + acc[j]))` for the
/// `acc.len()` channels given: [`Requant::apply`], or with `fast` (made
/// by [`fast_requant`] once per call for multipliers that include these)
/// its 32-bit path without the choice per value, the same bytes.
#[inline(always)]
fn requantize_into(
    out: &mut [i8],
    acc: &[i32],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    fast: Option<Fast>,
) {
    let values = out.iter_mut().zip(acc).zip(bias).zip(requant);
    match fast {
        Some(Fast::Full { k }) => {
            for (((o, &a), &b), rq) in values {
                // Constant bounds: one `ssat` with the halving.
                *o = requant_fast(b.wrapping_add(a), rq, k).clamp(-128, 127) as i8;
            }
        }
        Some(Fast::Clamp { k, lo, hi }) => {
            for (((o, &a), &b), rq) in values {
                *o = requant_fast(b.wrapping_add(a), rq, k).max(lo).min(hi) as i8;
            }
        }
        None => {
            for (((o, &a), &b), rq) in values {
                *o = rq.apply(b.wrapping_add(a), out_q);
            }
        }
    }
}

/// A packed weight layout of one-group convolutions: [`pair_rows`]
/// (`u32` words of two `i16`) or [`word_rows_into`] (bytes, four int8
/// weights a word). Rows go in blocks of four in both; a block stores, per
/// unit of [`Packed::ELEMS`] patch elements, [`Packed::STORE`] elements of
/// each row in turn.
pub(crate) trait Packed: Copy {
    /// Patch elements per unit.
    const ELEMS: usize;
    /// Stored elements per unit and row.
    const STORE: usize;
    /// Four rows of a block against the patch `x`, added into `acc`.
    fn dot4(x: &[i16], w: &[Self], acc: &mut [i32; 4]);
    /// The one to three rows of a last block, added into `acc`.
    fn few(x: &[i16], w: &[Self], acc: &mut [i32]);
}

impl Packed for u32 {
    const ELEMS: usize = 2;
    const STORE: usize = 1;
    #[inline(always)]
    fn dot4(x: &[i16], w: &[u32], acc: &mut [i32; 4]) {
        for (a, v) in acc.iter_mut().zip(dot4_pairs(x, w)) {
            *a = a.wrapping_add(v);
        }
    }
    #[inline(always)]
    fn few(x: &[i16], w: &[u32], acc: &mut [i32]) {
        dot_pairs_few(x, w, acc)
    }
}

impl Packed for u8 {
    const ELEMS: usize = 4;
    const STORE: usize = 4;
    #[inline(always)]
    fn dot4(x: &[i16], w: &[u8], acc: &mut [i32; 4]) {
        dot4_words(x, w, acc)
    }
    #[inline(always)]
    fn few(x: &[i16], w: &[u8], acc: &mut [i32]) {
        dot_words_few(x, w, acc)
    }
}

/// [`conv2d_paired`] or [`conv2d_words`] from a ring of `kh` padded,
/// transformed input rows (see [`conv_rows_len`]); the caller checked
/// [`conv_rows_apply`] (or [`conv_rows_apply_words`]), the shapes and the
/// buffer length.
#[allow(clippy::too_many_arguments)]
fn conv_rows<T: Packed>(
    arena: &mut [i8],
    input: &MapRef,
    output: &MapRef,
    weights: &[T],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    ring: &mut [i16],
    y0: usize,
    y1: usize,
) {
    let w = &p.window;
    let c = input.c;
    let Some(kh) = NonZeroUsize::new(w.kh) else {
        return;
    };
    let row_len = (w.pad.left + input.w + w.pad.right) * c;
    let Some(ring) = ring.get_mut(..w.kh * row_len) else {
        return;
    };
    let run = w.kw * c; // elements of one kernel row, whole units
    let row_pairs = run / T::ELEMS * T::STORE; // stored per kernel row
    let kp = w.kh * row_pairs; // stored per weight row
    let m = output.c;
    let quads = m / 4;
    let left = m % 4;
    if kp == 0 || row_pairs == 0 {
        return;
    }
    let Some((head, rest)) = weights
        .get(..m * kp)
        .and_then(|v| v.split_at_checked(quads * 4 * kp))
    else {
        return;
    };
    let (Some(bias), Some(requant)) = (bias.get(..m), requant.get(..m)) else {
        return;
    };
    let (Some((bias4, bias_left)), Some((rq4, rq_left))) = (
        bias.split_at_checked(quads * 4),
        requant.split_at_checked(quads * 4),
    ) else {
        return;
    };
    let k = RowKernel {
        head,
        rest,
        bias4,
        bias_left,
        rq4,
        rq_left,
        out_q: p.out,
        fast: fast_requant(requant, p.out),
        out_w: output.w,
        out_stride: output.stride,
        m,
        quads,
        left,
        kh,
        row_pairs,
        kp,
        row_len,
        c,
        run,
    };
    // Padded rows oy..oy+kh are needed; row yy lives in slot yy % kh. A
    // call (a whole map, or a row pipeline's rows from y0) first fills the
    // kh − 1 rows above its first output row's last one; then each output
    // row brings in one new input row (and y0 is not kept in a register
    // through the loop).
    for yy in y0..y0 + w.kh - 1 {
        let slot = yy % kh;
        let Some(dst) = ring.get_mut(slot * row_len..(slot + 1) * row_len) else {
            return;
        };
        fill_row(arena, input, w, p.input_zp, transform, yy, dst);
    }
    for oy in y0..y1 {
        let yy = oy + w.kh - 1;
        let slot = yy % kh;
        let Some(dst) = ring.get_mut(slot * row_len..(slot + 1) * row_len) else {
            return;
        };
        fill_row(arena, input, w, p.input_zp, transform, yy, dst);
        k.row(arena, ring, oy, output.row(oy));
    }
}

/// What every output row of a [`conv_rows`] call shares: the weights cut
/// into blocks, bias, requantization and sizes.
///
/// The pixels of a row run in [`RowKernel::row`], a function of its own:
/// inlined into `conv_rows`, the row loop's values (its range, the input
/// map, the fill's arguments) stay live across the pixel loop and crowd
/// its registers on a Cortex-M (spilled and reloaded around every dot
/// product): the split alone took the demo's `--no-stream` inference on
/// emulated M4 from 31,974,171 to 31,651,940 instructions.
struct RowKernel<'a, T> {
    head: &'a [T],
    rest: &'a [T],
    bias4: &'a [i32],
    bias_left: &'a [i32],
    rq4: &'a [Requant],
    rq_left: &'a [Requant],
    out_q: OutputQuant,
    /// The call's 32-bit finish, when every multiplier takes it.
    fast: Option<Fast>,
    /// Output pixels per row, pixel stride and channels of the output.
    out_w: usize,
    out_stride: usize,
    m: usize,
    quads: usize,
    left: usize,
    /// Kernel rows (nonzero), stored elements per kernel row and per
    /// weight row.
    kh: NonZeroUsize,
    row_pairs: usize,
    kp: usize,
    /// Ring row length, input channels, elements of one kernel row.
    row_len: usize,
    c: usize,
    run: usize,
}

impl<T: Packed> RowKernel<'_, T> {
    /// Output row `oy` (its arena base `out_row`) from the rows in `ring`.
    #[inline(never)]
    fn row(&self, arena: &mut [i8], ring: &[i16], oy: usize, out_row: usize) {
        let (m, row_len, c, run) = (self.m, self.row_len, self.c, self.run);
        // Kernel row ky of output row oy reads ring slot (oy + ky) mod kh:
        // from slot oy mod kh the slots go up by one and wrap once, so a
        // pixel steps an index instead of dividing per kernel row.
        let ring_len = self.kh.get() * row_len;
        let first = (oy % self.kh) * row_len;
        for ox in 0..self.out_w {
            // `at` of kernel row 0, and the value where `at` wraps.
            let (at0, wrap) = (first + ox * c, ring_len + ox * c);
            let dst = out_row + ox * self.out_stride;
            let Some(out) = arena.get_mut(dst..dst + m) else {
                return;
            };
            let Some((out4, out_left)) = out.split_at_mut_checked(self.quads * 4) else {
                return;
            };
            // Chunk iterators are advanced by hand: `zip` over two of them
            // can leave a call that divides by the (nonzero) chunk size,
            // with its division-by-zero panic path.
            let (mut blocks, mut bs, mut rs) = (
                self.head.chunks_exact((4 * self.kp).max(1)),
                self.bias4.chunks_exact(4),
                self.rq4.chunks_exact(4),
            );
            for o in out4.chunks_exact_mut(4) {
                let (Some(block), Some(b), Some(r)) = (blocks.next(), bs.next(), rs.next()) else {
                    return;
                };
                let mut acc = [0i32; 4];
                let mut at = at0;
                for wk in block.chunks_exact((4 * self.row_pairs).max(1)) {
                    let Some(x) = ring.get(at..at + run) else {
                        return;
                    };
                    T::dot4(x, wk, &mut acc);
                    at += row_len;
                    if at >= wrap {
                        at -= ring_len;
                    }
                }
                requantize_into(o, &acc, b, r, self.out_q, self.fast);
            }
            let left = self.left;
            if left > 0 {
                let mut acc = [0i32; 3];
                // `left` is a field here, not `m % 4`: `get_mut`, no panic path.
                let Some(acc) = acc.get_mut(..left) else {
                    return;
                };
                let mut at = at0;
                for wk in self.rest.chunks_exact((left * self.row_pairs).max(1)) {
                    let Some(x) = ring.get(at..at + run) else {
                        return;
                    };
                    T::few(x, wk, acc);
                    at += row_len;
                    if at >= wrap {
                        at -= ring_len;
                    }
                }
                requantize_into(
                    out_left,
                    acc,
                    self.bias_left,
                    self.rq_left,
                    self.out_q,
                    self.fast,
                );
            }
        }
    }
}

/// Padded input row `yy` (widened, transformed) into `dst`: padding
/// columns and rows outside the map take `pad_value`.
fn fill_row(
    arena: &[i8],
    input: &MapRef,
    w: &Window,
    pad_value: i8,
    transform: Option<&InputTransform<'_>>,
    yy: usize,
    dst: &mut [i16],
) {
    let c = input.c;
    if yy < w.pad.top || yy - w.pad.top >= input.h || c == 0 {
        dst.fill(pad_value as i16);
        return;
    }
    let iy = yy - w.pad.top;
    let Some((lead, body)) = dst.split_at_mut_checked(w.pad.left * c) else {
        return;
    };
    lead.fill(pad_value as i16);
    let Some((body, tail)) = body.split_at_mut_checked(input.w * c) else {
        return;
    };
    tail.fill(pad_value as i16);
    let base = input.row(iy);
    if let (Some(InputTransform::Affine(a)), Some(last)) = (transform, input.w.checked_sub(1)) {
        let end = base + last * input.stride + c;
        if let Some(src) = arena.get(base..end) {
            affine_row(body, src, c, input.stride, a);
        }
        return;
    }
    for (ix, d) in body.chunks_exact_mut(c.max(1)).enumerate() {
        let src = base + ix * input.stride;
        let Some(s) = arena.get(src..src + c) else {
            return;
        };
        load_pixel(d, s, transform, 0);
    }
}

/// Channels per block of [`affine_row`]'s parameter table.
const AFFINE_BLOCK: usize = 32;

/// The affine transform of a whole row of pixels (`src`: one pixel every
/// `stride` values, `c` channels each) into `dst` (`c` values a pixel).
/// Per block of up to [`AFFINE_BLOCK`] channels, each channel's
/// multiplier and additive term go into a stack table side by side, the
/// input zero point and the rounding folded into the term
/// (`(x − zp_in)·m + add + r = x·m + (add + r − zp_in·m)`, exact: the
/// transform's validity keeps every term below 2^30), and the output
/// zero point too where it fits, so a value costs the pair's two loads,
/// the input load, a multiply-accumulate, the shift, the clamp and a
/// store, with the shared parameters in registers: 14 instructions in
/// the loop on the Cortex-M4 (`arm-none-eabi-objdump -d` of the thumbv7em
/// rlib, and QEMU's execution log of the demo's LTO firmware). Pixel by
/// pixel, reading `mul`, `add` and five shared values per value, the loop
/// ran out of registers and spilled (25).
#[inline(never)]
fn affine_row(
    dst: &mut [i16],
    src: &[i8],
    c: usize,
    stride: usize,
    a: &crate::AffineTransform<'_>,
) {
    let rounding = a.rounding();
    let (shift, zp_out, lo, hi) = (a.shift, a.zp_out, a.min as i32, a.max as i32);
    // `(v >> s) + zp == (v + zp·2^s) >> s` (floor division by 2^s), so
    // the output zero point joins the additive term when `zp·2^s` is
    // small: with `|v| < 2^30 + 2^22` (the validity bound) the sum stays
    // inside i32, and the loop saves its add.
    let fold = (zp_out.unsigned_abs() as u64) << shift < 1 << 29;
    let (zp_term, zp_add) = if fold {
        (zp_out.wrapping_shl(shift), 0)
    } else {
        (0, zp_out)
    };
    let mut table = [(0i32, 0i32); AFFINE_BLOCK];
    let mut c0 = 0;
    while c0 < c {
        let n = (c - c0).min(AFFINE_BLOCK);
        let (Some(mul), Some(add), Some(tab)) = (
            a.mul.get(c0..c0 + n),
            a.add.get(c0..c0 + n),
            table.get_mut(..n),
        ) else {
            return;
        };
        for (t, (&m, &ad)) in tab.iter_mut().zip(mul.iter().zip(add)) {
            *t = (
                m,
                ad.wrapping_add(rounding)
                    .wrapping_sub(a.zp_in.wrapping_mul(m))
                    .wrapping_add(zp_term),
            );
        }
        let tab = &*tab;
        for (ix, d) in dst.chunks_exact_mut(c.max(1)).enumerate() {
            let s0 = ix * stride + c0;
            let (Some(s), Some(d)) = (src.get(s0..s0 + n), d.get_mut(c0..c0 + n)) else {
                return;
            };
            if fold {
                affine_values::<false>(d, s, tab, shift, zp_add, lo, hi);
            } else {
                affine_values::<true>(d, s, tab, shift, zp_add, lo, hi);
            }
        }
        c0 += n;
    }
}

/// The values of one pixel's channel block for [`affine_row`]: `ZP`
/// adds the output zero point `zp` after the shift (when it could not be
/// folded into the table's additive terms).
#[inline(always)]
fn affine_values<const ZP: bool>(
    d: &mut [i16],
    s: &[i8],
    tab: &[(i32, i32)],
    shift: u32,
    zp: i32,
    lo: i32,
    hi: i32,
) {
    for ((d, &x), &(m, k)) in d.iter_mut().zip(s).zip(tab) {
        crate::dot::no_unroll();
        let t = (x as i32).wrapping_mul(m).wrapping_add(k) >> shift;
        let r = if ZP { t + zp } else { t };
        *d = r.max(lo).min(hi) as i16;
    }
}

/// All output channels of one pixel from packed weights (one group): four
/// rows per pass over the patch, then the one to three left over.
#[inline]
pub(crate) fn paired_rows<T: Packed>(
    xw: &[i16],
    weights: &[T],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    out: &mut [i8],
    fast: Option<Fast>,
) {
    let kp = xw.len().div_ceil(T::ELEMS) * T::STORE;
    let m = out.len();
    let quads = m / 4;
    if kp == 0 {
        return;
    }
    let Some((head, rest)) = weights
        .get(..m * kp)
        .and_then(|v| v.split_at_checked(quads * 4 * kp))
    else {
        return;
    };
    let (Some((bias4, bias_left)), Some((rq4, rq_left))) = (
        bias.split_at_checked(quads * 4),
        requant.split_at_checked(quads * 4),
    ) else {
        return;
    };
    let Some((out4, out_left)) = out.split_at_mut_checked(quads * 4) else {
        return;
    };
    // By hand, not `zip`: see `conv_rows`.
    let (mut blocks, mut bs, mut rs) = (
        head.chunks_exact((4 * kp).max(1)),
        bias4.chunks_exact(4),
        rq4.chunks_exact(4),
    );
    for o in out4.chunks_exact_mut(4) {
        let (Some(block), Some(b), Some(r)) = (blocks.next(), bs.next(), rs.next()) else {
            return;
        };
        let mut acc = [0i32; 4];
        T::dot4(xw, block, &mut acc);
        requantize_into(o, &acc, b, r, out_q, fast);
    }
    let left = m % 4;
    if left > 0 {
        let mut acc = [0i32; 3];
        let acc = &mut acc[..left];
        T::few(xw, rest, acc);
        requantize_into(out_left, acc, bias_left, rq_left, out_q, fast);
    }
}

/// Gathers kernel columns `kx0..kw` of output pixel `(oy, ox)` into a
/// one-group patch (`[ky][kx][ci]`, widened, transformed).
#[allow(clippy::too_many_arguments)]
#[inline]
fn gather_columns(
    arena: &[i8],
    input: &MapRef,
    w: &Window,
    pad_value: i8,
    transform: Option<&InputTransform<'_>>,
    oy: usize,
    ox: usize,
    kx0: usize,
    c: usize,
    patch: &mut [i16],
) {
    let base_y = oy * w.step_y;
    let base_x = ox * w.step_x;
    for ky in 0..w.kh {
        let yy = base_y + ky * w.dilation_y;
        let row_in = yy >= w.pad.top && yy - w.pad.top < input.h;
        let row = if row_in { input.row(yy - w.pad.top) } else { 0 };
        for kx in kx0..w.kw {
            let t = ky * w.kw + kx;
            let xx = base_x + kx * w.dilation_x;
            let Some(dst) = patch.get_mut(t * c..(t + 1) * c) else {
                return;
            };
            if !(row_in && xx >= w.pad.left && xx - w.pad.left < input.w) {
                dst.fill(pad_value as i16);
                continue;
            }
            let src = row + (xx - w.pad.left) * input.stride;
            let Some(s) = arena.get(src..src + c) else {
                return;
            };
            load_pixel(dst, s, transform, 0);
        }
    }
}

/// Gathers the receptive field of output pixel `(oy, ox)` into `patch`,
/// laid out `[group][ky][kx][ci]`, widened.
#[allow(clippy::too_many_arguments)]
#[inline]
fn gather(
    arena: &[i8],
    input: &MapRef,
    w: &Window,
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    groups: usize,
    oy: usize,
    ox: usize,
    cpg: usize,
    seg: usize,
    patch: &mut [i16],
) {
    let base_y = oy * w.step_y;
    let base_x = ox * w.step_x;
    // A whole kernel row is one contiguous run of the arena when the
    // channels are dense, the kernel is not dilated horizontally and the
    // row lies inside the map horizontally.
    let dense_row = groups == 1
        && transform.is_none()
        && w.dilation_x == 1
        && input.stride == input.c
        && base_x >= w.pad.left
        && base_x - w.pad.left + w.kw <= input.w;
    if groups == 1 && !dense_row {
        gather_columns(
            arena, input, w, p.input_zp, transform, oy, ox, 0, cpg, patch,
        );
        return;
    }
    for ky in 0..w.kh {
        let yy = base_y + ky * w.dilation_y; // padded coordinate
        let row_in = yy >= w.pad.top && yy - w.pad.top < input.h;
        if dense_row {
            let run = w.kw * cpg;
            let Some(dst) = patch.get_mut(ky * run..(ky + 1) * run) else {
                return;
            };
            if row_in {
                let src = input.row(yy - w.pad.top) + (base_x - w.pad.left) * input.stride;
                let Some(s) = arena.get(src..src + run) else {
                    return;
                };
                widen_into(dst, s);
            } else {
                dst.fill(p.input_zp as i16);
            }
            continue;
        }
        // Grouped convolutions (groups > 1).
        let row = if row_in { input.row(yy - w.pad.top) } else { 0 };
        for kx in 0..w.kw {
            let t = ky * w.kw + kx;
            let xx = base_x + kx * w.dilation_x;
            let inside = row_in && xx >= w.pad.left && xx - w.pad.left < input.w;
            let src = if inside {
                row + (xx - w.pad.left) * input.stride
            } else {
                0
            };
            for g in 0..groups {
                let at = g * seg + t * cpg;
                let Some(dst) = patch.get_mut(at..at + cpg) else {
                    return;
                };
                if !inside {
                    dst.fill(p.input_zp as i16);
                    continue;
                }
                let c0 = g * cpg;
                let Some(s) = arena.get(src + c0..src + c0 + cpg) else {
                    return;
                };
                load_pixel(dst, s, transform, c0);
            }
        }
    }
}
