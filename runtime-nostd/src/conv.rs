//! 2-D convolution over HWC maps: im2col of one output pixel into the
//! widened patch, then contiguous dot products per output channel.

use crate::dot::{
    dot2_wide, dot4_pairs, dot4_wide, dot_pairs_few, dot_wide, tail_wide, widen_into,
};
use crate::{Error, InputTransform, MapRef, OutputQuant, Requant};

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
/// Panics (a compile error in a `const`) when `N != paired_len(rows, k)` or
/// `w` is shorter than `rows · k`.
pub const fn pair_rows<const N: usize>(w: &[i8], rows: usize, k: usize) -> [u32; N] {
    let mut v = [0u32; N];
    pair_rows_into(w, rows, k, &mut v);
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
/// Panics when `out.len() != paired_len(rows, k)` or `w` is shorter than
/// `rows · k`.
pub const fn pair_rows_into(w: &[i8], rows: usize, k: usize, out: &mut [u32]) {
    assert!(
        out.len() == paired_len(rows, k),
        "pair_rows: the output must hold paired_len(rows, k) words"
    );
    assert!(
        w.len() >= rows * k,
        "pair_rows: fewer than rows * k weights"
    );
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
                let lo = w[row + 2 * p] as i16 as u16 as u32;
                let hi = if 2 * p + 1 < k {
                    w[row + 2 * p + 1] as i16 as u16 as u32
                } else {
                    0
                };
                out[o] = lo | (hi << 16);
                o += 1;
                r += 1;
            }
            p += 1;
        }
        r0 += block;
    }
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
enum Rows<'a> {
    /// `[C_out][kh][kw][C_in / groups]`, int8.
    Bytes(&'a [i8]),
    /// [`pair_rows`] of the same rows (one group).
    Pairs(&'a [u32]),
}

/// Checks shared by the convolution paths; returns `(taps, cpg, opg)`.
#[allow(clippy::too_many_arguments)]
fn check_conv(
    arena_len: usize,
    input: &MapRef,
    output: &MapRef,
    weights: Rows<'_>,
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch_len: usize,
) -> Result<(usize, usize, usize), Error> {
    input.check(arena_len)?;
    output.check(arena_len)?;
    if !input.is_disjoint(output) {
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
    let opg = output.c / p.groups;
    let need_w = output
        .c
        .checked_mul(taps)
        .and_then(|v| v.checked_mul(cpg))
        .ok_or(Error::BadParams)?;
    let enough = match weights {
        Rows::Bytes(w) => w.len() >= need_w,
        Rows::Pairs(w) => {
            if p.groups != 1 {
                return Err(Error::BadParams);
            }
            w.len() >= paired_len(output.c, taps * cpg)
        }
    };
    if !enough
        || bias.len() < output.c
        || requant.len() < output.c
        || patch_len < conv_patch_len(w.kh, w.kw, input.c)
    {
        return Err(Error::BufferTooSmall);
    }
    if !requant[..output.c].iter().all(Requant::is_valid) {
        return Err(Error::BadParams);
    }
    if let Some(t) = transform {
        if !t.is_valid_for(input.c, p.input_zp) {
            return Err(Error::BadParams);
        }
    }
    Ok((taps, cpg, opg))
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
    conv_core(
        arena,
        input,
        output,
        Rows::Bytes(weights),
        bias,
        requant,
        p,
        transform,
        patch,
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
    conv_core(
        arena,
        input,
        output,
        Rows::Pairs(weights),
        bias,
        requant,
        p,
        transform,
        patch,
    )
}

#[allow(clippy::too_many_arguments)]
fn conv_core(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    rows: Rows<'_>,
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    patch: &mut [i16],
) -> Result<(), Error> {
    let (taps, cpg, opg) = check_conv(
        arena.len(),
        &input,
        &output,
        rows,
        bias,
        requant,
        p,
        transform,
        patch.len(),
    )?;
    let w = &p.window;
    // Elements per group segment and per weight row.
    let seg = taps * cpg;
    if let Rows::Pairs(pw) = rows {
        if conv_rows_apply(w, p.groups, input.c)
            && patch.len() >= conv_rows_len(w, input.w, input.c)
        {
            conv_rows(
                arena, &input, &output, pw, bias, requant, p, transform, patch,
            );
            return Ok(());
        }
    }
    // The paired kernels read the patch in pairs: with one group and an
    // odd length, the element after the last meets a zero weight.
    let (patch, weights): (_, &[i8]) = match rows {
        Rows::Bytes(wb) => (&mut patch[..taps * input.c], &wb[..output.c * seg]),
        Rows::Pairs(_) => (&mut patch[..seg.div_ceil(2) * 2], &[]),
    };
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
    let depthwise = cpg == 1 && p.groups > 1;
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
    for oy in 0..output.h {
        for ox in 0..output.w {
            if pointwise {
                // 1×1 fast path: the patch is the input pixel, widened.
                let src = input.pixel(oy, ox);
                widen_into(patch, &arena[src..src + input.c]);
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
                    input.c,
                    seg * input.c,
                    patch,
                );
            } else if slide && ox > 0 {
                // The patch holds pixel (oy, ox - 1): keep its last
                // `kw - 1` columns, gather (and transform) only the new one.
                let run = w.kw * cpg;
                for row in patch.chunks_exact_mut(run) {
                    row.copy_within(cpg.., 0);
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
            let dst = output.pixel(oy, ox);
            let out = &mut arena[dst..dst + output.c];
            if depthwise {
                for (o, (((y, row), &b), rq)) in out
                    .iter_mut()
                    .zip(weights.chunks_exact(taps))
                    .zip(bias)
                    .zip(requant)
                    .enumerate()
                {
                    let col = &patch[o / opg..];
                    let mut acc = b;
                    for (x, &wv) in col.iter().step_by(input.c).zip(row) {
                        acc = acc.wrapping_add((*x as i32).wrapping_mul(wv as i32));
                    }
                    *y = rq.apply(acc, p.out);
                }
            } else if let Rows::Pairs(pw) = rows {
                paired_rows(patch, pw, bias, requant, p.out, out);
            } else {
                for (g, xw) in patch.chunks_exact(seg).enumerate() {
                    let o0 = g * opg;
                    channel_rows(
                        xw,
                        &weights[o0 * seg..(o0 + opg) * seg],
                        &bias[o0..o0 + opg],
                        &requant[o0..o0 + opg],
                        p.out,
                        &mut out[o0..o0 + opg],
                    );
                }
            }
        }
    }
    Ok(())
}

/// Output channels of one group for one pixel: four (then two, then one)
/// weight rows per pass over the patch.
#[inline]
fn channel_rows(
    xw: &[i16],
    weights: &[i8],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    out: &mut [i8],
) {
    let seg = xw.len();
    if seg == 0 {
        return;
    }
    if seg < 16 {
        // Short windows (first layer on a gray image, tiny kernels): plain
        // scalar rows.
        for (((o, row), &b), rq) in out
            .iter_mut()
            .zip(weights.chunks_exact(seg))
            .zip(bias)
            .zip(requant)
        {
            let mut acc = b;
            for (&x, &w) in xw.iter().zip(row) {
                acc = acc.wrapping_add((x as i32).wrapping_mul(w as i32));
            }
            *o = rq.apply(acc, out_q);
        }
        return;
    }
    let tail = seg - seg % 16;
    let mut quads = weights.chunks_exact(4 * seg);
    let mut outs = out.chunks_exact_mut(4);
    let mut k = 0;
    for (rows, o) in (&mut quads).zip(&mut outs) {
        let (a, r) = rows.split_at(seg);
        let (b, r) = r.split_at(seg);
        let (c, d) = r.split_at(seg);
        let mut acc = dot4_wide([xw, xw, xw, xw], [a, b, c, d]);
        if tail < seg {
            for (v, w) in acc.iter_mut().zip([a, b, c, d]) {
                *v = v.wrapping_add(tail_wide(&xw[tail..], &w[tail..]));
            }
        }
        for j in 0..4 {
            o[j] = requant[k + j].apply(bias[k + j].wrapping_add(acc[j]), out_q);
        }
        k += 4;
    }
    let rest = quads.remainder();
    let out = outs.into_remainder();
    let mut j = 0;
    while j + 2 <= out.len() {
        let (a, b) = rest[j * seg..(j + 2) * seg].split_at(seg);
        let mut acc = dot2_wide(xw, xw, a, b);
        if tail < seg {
            acc[0] = acc[0].wrapping_add(tail_wide(&xw[tail..], &a[tail..]));
            acc[1] = acc[1].wrapping_add(tail_wide(&xw[tail..], &b[tail..]));
        }
        out[j] = requant[k + j].apply(bias[k + j].wrapping_add(acc[0]), out_q);
        out[j + 1] = requant[k + j + 1].apply(bias[k + j + 1].wrapping_add(acc[1]), out_q);
        j += 2;
    }
    if j < out.len() {
        let a = &rest[j * seg..(j + 1) * seg];
        out[j] = requant[k + j].apply(bias[k + j].wrapping_add(dot_wide(xw, a)), out_q);
    }
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
/// `acc.len()` channels given.
#[inline(always)]
fn requantize_into(
    out: &mut [i8],
    acc: &[i32],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
) {
    for (((o, &a), &b), rq) in out.iter_mut().zip(acc).zip(bias).zip(requant) {
        *o = rq.apply(b.wrapping_add(a), out_q);
    }
}

/// [`conv2d_paired`] from a ring of `kh` padded, transformed input rows
/// (see [`conv_rows_len`]); the caller checked [`conv_rows_apply`], the
/// shapes and the buffer length.
#[allow(clippy::too_many_arguments)]
fn conv_rows(
    arena: &mut [i8],
    input: &MapRef,
    output: &MapRef,
    weights: &[u32],
    bias: &[i32],
    requant: &[Requant],
    p: &ConvParams,
    transform: Option<&InputTransform<'_>>,
    ring: &mut [i16],
) {
    let w = &p.window;
    let c = input.c;
    let row_len = (w.pad.left + input.w + w.pad.right) * c;
    let ring = &mut ring[..w.kh * row_len];
    let run = w.kw * c; // elements of one kernel row, even
    let row_pairs = run / 2;
    let kp = w.kh * row_pairs; // pairs per weight row
    let m = output.c;
    let quads = m / 4;
    let left = m % 4;
    let (head, rest) = weights[..m * kp].split_at(quads * 4 * kp);
    for oy in 0..output.h {
        // Padded rows oy..oy+kh are needed; row yy lives in slot yy % kh.
        // Going down one output row brings in one new input row.
        let first = if oy == 0 { 0 } else { oy + w.kh - 1 };
        for yy in first..oy + w.kh {
            let slot = yy % w.kh;
            fill_row(
                arena,
                input,
                w,
                p.input_zp,
                transform,
                yy,
                &mut ring[slot * row_len..(slot + 1) * row_len],
            );
        }
        for ox in 0..output.w {
            let dst = output.pixel(oy, ox);
            let out = &mut arena[dst..dst + m];
            for (q, block) in head.chunks_exact(4 * kp).enumerate() {
                let mut acc = [0i32; 4];
                for ky in 0..w.kh {
                    let at = ((oy + ky) % w.kh) * row_len + ox * c;
                    let part = dot4_pairs(
                        &ring[at..at + run],
                        &block[4 * ky * row_pairs..4 * (ky + 1) * row_pairs],
                    );
                    for (a, v) in acc.iter_mut().zip(part) {
                        *a = a.wrapping_add(v);
                    }
                }
                let o = 4 * q;
                requantize_into(&mut out[o..], &acc, &bias[o..], &requant[o..], p.out);
            }
            if left > 0 {
                let mut acc = [0i32; 3];
                let acc = &mut acc[..left];
                for ky in 0..w.kh {
                    let at = ((oy + ky) % w.kh) * row_len + ox * c;
                    dot_pairs_few(
                        &ring[at..at + run],
                        &rest[left * ky * row_pairs..left * (ky + 1) * row_pairs],
                        acc,
                    );
                }
                let o = 4 * quads;
                requantize_into(&mut out[o..], acc, &bias[o..], &requant[o..], p.out);
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
    if yy < w.pad.top || yy - w.pad.top >= input.h {
        dst.fill(pad_value as i16);
        return;
    }
    let iy = yy - w.pad.top;
    let (lead, body) = dst.split_at_mut(w.pad.left * c);
    lead.fill(pad_value as i16);
    let (body, tail) = body.split_at_mut(input.w * c);
    tail.fill(pad_value as i16);
    for (ix, d) in body.chunks_exact_mut(c).enumerate() {
        let src = input.pixel(iy, ix);
        load_pixel(d, &arena[src..src + c], transform, 0);
    }
}

/// All output channels of one pixel from paired weights (one group): four
/// rows per pass over the patch, then the one to three left over.
#[inline]
fn paired_rows(
    xw: &[i16],
    weights: &[u32],
    bias: &[i32],
    requant: &[Requant],
    out_q: OutputQuant,
    out: &mut [i8],
) {
    let kp = xw.len() / 2;
    let m = out.len();
    let quads = m / 4;
    let (head, rest) = weights[..m * kp].split_at(quads * 4 * kp);
    for (q, block) in head.chunks_exact(4 * kp).enumerate() {
        let acc = dot4_pairs(xw, block);
        let o = 4 * q;
        requantize_into(&mut out[o..], &acc, &bias[o..], &requant[o..], out_q);
    }
    let left = m - 4 * quads;
    if left > 0 {
        let mut acc = [0i32; 3];
        let acc = &mut acc[..left];
        dot_pairs_few(xw, rest, acc);
        let o = 4 * quads;
        requantize_into(&mut out[o..], acc, &bias[o..], &requant[o..], out_q);
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
        for kx in kx0..w.kw {
            let t = ky * w.kw + kx;
            let xx = base_x + kx * w.dilation_x;
            let dst = &mut patch[t * c..(t + 1) * c];
            if !(row_in && xx >= w.pad.left && xx - w.pad.left < input.w) {
                dst.fill(pad_value as i16);
                continue;
            }
            let src = input.pixel(yy - w.pad.top, xx - w.pad.left);
            load_pixel(dst, &arena[src..src + c], transform, 0);
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
            let dst = &mut patch[ky * run..(ky + 1) * run];
            if row_in {
                let src = input.pixel(yy - w.pad.top, base_x - w.pad.left);
                widen_into(dst, &arena[src..src + run]);
            } else {
                dst.fill(p.input_zp as i16);
            }
            continue;
        }
        // Grouped convolutions (groups > 1).
        for kx in 0..w.kw {
            let t = ky * w.kw + kx;
            let xx = base_x + kx * w.dilation_x;
            let inside = row_in && xx >= w.pad.left && xx - w.pad.left < input.w;
            let src = if inside {
                input.pixel(yy - w.pad.top, xx - w.pad.left)
            } else {
                0
            };
            for g in 0..groups {
                let at = g * seg + t * cpg;
                let dst = &mut patch[at..at + cpg];
                if !inside {
                    dst.fill(p.input_zp as i16);
                    continue;
                }
                let c0 = g * cpg;
                load_pixel(dst, &arena[src + c0..src + c0 + cpg], transform, c0);
            }
        }
    }
}
