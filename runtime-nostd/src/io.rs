//! Getting data into and out of the arena.

use crate::{Error, MapRef};
use core::num::NonZeroUsize;

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
    check_pixels(arena.len(), pixels.len(), output, table)?;
    pixels_run(pixels, arena, output, table);
    Ok(())
}

/// The checks of [`quantize_pixels`] (a `const fn`, see [`crate::checked`]).
pub(crate) const fn check_pixels(
    arena_len: usize,
    pixels_len: usize,
    output: MapRef,
    table: &[i8],
) -> Result<(), Error> {
    if let Err(e) = output.check(arena_len) {
        return Err(e);
    }
    // Pixels are addressed as one run: whole maps only.
    if output.is_ring() {
        return Err(Error::BadParams);
    }
    match output.c.checked_mul(256) {
        Some(t) if pixels_len >= output.len() && table.len() >= t => Ok(()),
        _ => Err(Error::BufferTooSmall),
    }
}

/// Runs a checked [`quantize_pixels`].
pub(crate) fn pixels_run(pixels: &[u8], arena: &mut [i8], output: MapRef, table: &[i8]) {
    if output.c == 0 {
        return;
    }
    // One 256-entry row per channel: a `u8` index into a row is always in
    // range (the optimiser sees it too; the `get` costs nothing).
    let rows = table.chunks_exact(256);
    let Some(pixels) = pixels.get(..output.len()) else {
        return;
    };
    for (px, src) in pixels.chunks_exact(output.c.max(1)).enumerate() {
        let dst = output.offset + px * output.stride;
        let Some(d) = arena.get_mut(dst..dst + output.c) else {
            return;
        };
        // By hand, not `zip`: see `linear`.
        let mut rows = rows.clone();
        for (d, &v) in d.iter_mut().zip(src) {
            let Some(row) = rows.next() else {
                return;
            };
            if let Some(&q) = row.get(v as usize) {
                *d = q;
            }
        }
    }
}

/// Copies an already-quantized HWC int8 input (`h·w·c` values) into a map.
pub fn copy_in(src: &[i8], arena: &mut [i8], output: MapRef) -> Result<(), Error> {
    check_io(arena.len(), src.len(), output)?;
    copy_in_run(src, arena, output);
    Ok(())
}

/// The checks of [`copy_in`] and [`copy_out`]: the map fits the arena and
/// the dense side holds `h·w·c` values.
pub(crate) const fn check_io(arena_len: usize, dense_len: usize, map: MapRef) -> Result<(), Error> {
    if let Err(e) = map.check(arena_len) {
        return Err(e);
    }
    // Pixels are addressed as one run: whole maps only.
    if map.is_ring() {
        return Err(Error::BadParams);
    }
    if dense_len < map.len() {
        return Err(Error::BufferTooSmall);
    }
    Ok(())
}

/// Runs a checked [`copy_in`].
pub(crate) fn copy_in_run(src: &[i8], arena: &mut [i8], output: MapRef) {
    let (Some(src), Some(c)) = (src.get(..output.len()), NonZeroUsize::new(output.c)) else {
        return;
    };
    for (px, s) in src.chunks_exact(c.get()).enumerate() {
        let dst = output.offset + px * output.stride;
        let Some(d) = arena.get_mut(dst..dst + output.c) else {
            return;
        };
        for (d, &s) in d.iter_mut().zip(s) {
            *d = s;
        }
    }
}

/// Copies a map out of the arena into a dense HWC slice (`h·w·c` values).
pub fn copy_out(arena: &[i8], input: MapRef, dst: &mut [i8]) -> Result<(), Error> {
    check_io(arena.len(), dst.len(), input)?;
    copy_out_run(arena, input, dst);
    Ok(())
}

/// Runs a checked [`copy_out`].
pub(crate) fn copy_out_run(arena: &[i8], input: MapRef, dst: &mut [i8]) {
    let (Some(dst), Some(c)) = (dst.get_mut(..input.len()), NonZeroUsize::new(input.c)) else {
        return;
    };
    for (px, d) in dst.chunks_exact_mut(c.get()).enumerate() {
        let s = input.offset + px * input.stride;
        let Some(s) = arena.get(s..s + input.c) else {
            return;
        };
        for (d, &s) in d.iter_mut().zip(s) {
            *d = s;
        }
    }
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
