//! Fully connected layer.

use crate::dot::dot_i8;
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
    input.check(arena.len())?;
    output.check(arena.len())?;
    if !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    if !out.is_valid() {
        return Err(Error::BadParams);
    }
    let n_in = input.len();
    let n_out = output.len();
    let need_w = n_in.checked_mul(n_out).ok_or(Error::BadParams)?;
    if weights.len() < need_w || bias.len() < n_out || requant.len() < n_out {
        return Err(Error::BufferTooSmall);
    }
    if !requant[..n_out].iter().all(Requant::is_valid) {
        return Err(Error::BadParams);
    }
    if n_in == 0 {
        return Err(Error::ShapeMismatch);
    }
    let contiguous = input.stride == input.c || input.pixels() == 1;
    let mut o = 0;
    for oy in 0..output.h {
        for ox in 0..output.w {
            let dst = output.pixel(oy, ox);
            for oc in 0..output.c {
                let row = &weights[o * n_in..(o + 1) * n_in];
                let mut acc = bias[o];
                if contiguous {
                    acc = acc.wrapping_add(dot_i8(&arena[input.offset..input.offset + n_in], row));
                } else {
                    for (px, wrow) in row.chunks_exact(input.c).enumerate() {
                        let s = input.offset + px * input.stride;
                        acc = acc.wrapping_add(dot_i8(&arena[s..s + input.c], wrow));
                    }
                }
                arena[dst + oc] = requant[o].apply(acc, out);
                o += 1;
            }
        }
    }
    Ok(())
}
