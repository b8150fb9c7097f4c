//! Getting data into and out of the arena.

use crate::{Error, MapRef};

/// Quantizes camera bytes into the input map through a per-channel table.
///
/// `pixels` is HWC interleaved (`h·w·c` bytes: gray `c = 1`, RGB `c = 3`).
/// `table` holds `256·c` entries computed by the compiler, folding pixel
/// scale, mean, standard deviation, input scale and zero point:
/// `out[y][x][ch] = table[ch·256 + pixels[(y·w + x)·c + ch]]`.
pub fn quantize_pixels(
    pixels: &[u8],
    arena: &mut [i8],
    output: MapRef,
    table: &[i8],
) -> Result<(), Error> {
    output.check(arena.len())?;
    if pixels.len() < output.len() || table.len() < 256 * output.c {
        return Err(Error::BufferTooSmall);
    }
    if output.c == 0 {
        return Ok(());
    }
    for (px, src) in pixels[..output.len()].chunks_exact(output.c).enumerate() {
        let dst = output.offset + px * output.stride;
        for (ch, (d, &v)) in arena[dst..dst + output.c].iter_mut().zip(src).enumerate() {
            *d = table[ch * 256 + v as usize];
        }
    }
    Ok(())
}

/// Copies an already-quantized HWC int8 input (`h·w·c` values) into a map.
pub fn copy_in(src: &[i8], arena: &mut [i8], output: MapRef) -> Result<(), Error> {
    output.check(arena.len())?;
    if src.len() < output.len() {
        return Err(Error::BufferTooSmall);
    }
    if output.c == 0 {
        return Ok(());
    }
    for (px, s) in src[..output.len()].chunks_exact(output.c).enumerate() {
        let dst = output.offset + px * output.stride;
        arena[dst..dst + output.c].copy_from_slice(s);
    }
    Ok(())
}

/// Copies a map out of the arena into a dense HWC slice (`h·w·c` values).
pub fn copy_out(arena: &[i8], input: MapRef, dst: &mut [i8]) -> Result<(), Error> {
    input.check(arena.len())?;
    if dst.len() < input.len() {
        return Err(Error::BufferTooSmall);
    }
    if input.c == 0 {
        return Ok(());
    }
    for (px, d) in dst[..input.len()].chunks_exact_mut(input.c).enumerate() {
        let s = input.offset + px * input.stride;
        d.copy_from_slice(&arena[s..s + input.c]);
    }
    Ok(())
}

/// Index of the largest value; on ties the **first** maximum wins. Returns
/// 0 for an empty slice.
pub fn argmax(values: &[i8]) -> usize {
    let mut best = 0;
    let mut best_v = i8::MIN;
    for (i, &v) in values.iter().enumerate() {
        if i == 0 || v > best_v {
            best = i;
            best_v = v;
        }
    }
    best
}

/// `scale · (q − zp)` as f32.
///
/// **Host/reporting helper, off the inference path**: it is the only float
/// operation in the crate besides the compiler-side constructors, and
/// firmware never needs to call it (classification uses [`argmax`] on the
/// integers).
pub fn dequantize(q: i8, scale: f32, zp: i32) -> f32 {
    scale * (q as i32 - zp) as f32
}
