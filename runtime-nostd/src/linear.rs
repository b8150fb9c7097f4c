//! Fully connected layer.

use crate::dot::{dot_i8, Wt};
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
    // Advanced by hand, not zipped: `zip` over a chunk iterator can leave
    // a call that divides by the chunk size, a division-by-zero panic path.
    let mut rows = weights.chunks_exact(n_in.max(1));
    let mut params = a.bias.iter().zip(a.requant);
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
                *d = rq.apply(acc, a.out);
            }
        }
    }
}
