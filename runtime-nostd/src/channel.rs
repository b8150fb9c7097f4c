//! Element-wise channel kernels: a per-channel transform as a step of its
//! own, and the channel copy that assembles a concatenation when producers
//! could not write into its region directly.

use crate::eltwise::same;
use crate::{Error, InputTransform, MapRef};

/// Applies a per-channel transform to every element of `input`, writing
/// `output[y][x][ch] = t.apply(ch, input[y][x][ch])`.
///
/// This is the standalone form of the transform a convolution can fuse into
/// its input read (batch norm and ReLU of pre-activation networks, or a ReLU
/// after a concatenation). Both maps have the same shape. In place is
/// allowed: `output` may be exactly `input` (the same `MapRef`); otherwise
/// the two must not share elements. For an affine transform, `zp_out` is the
/// output's zero point (there is no padding, so no other check ties it).
pub fn channel_transform(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    t: &InputTransform<'_>,
) -> Result<(), Error> {
    let a = check_transform(arena.len(), input, output, *t)?;
    transform_run(arena, &a, 0, usize::MAX);
    Ok(())
}

/// [`channel_transform`] for rows `[rows.0, rows.1)` only (clipped), for
/// a row pipeline; either map may be a ring.
pub fn channel_transform_rows(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    t: &InputTransform<'_>,
    rows: (usize, usize),
) -> Result<(), Error> {
    let a = check_transform(arena.len(), input, output, *t)?;
    transform_run(arena, &a, rows.0, rows.1);
    Ok(())
}

/// A channel transform that passed [`check_transform`]: running it cannot
/// fail.
#[derive(Clone, Copy)]
pub(crate) struct TransformArgs<'a> {
    pub(crate) input: MapRef,
    pub(crate) output: MapRef,
    pub(crate) t: InputTransform<'a>,
}

/// The checks of [`channel_transform`] (a `const fn`, see
/// [`crate::checked`]).
pub(crate) const fn check_transform<'a>(
    n: usize,
    input: MapRef,
    output: MapRef,
    t: InputTransform<'a>,
) -> Result<TransformArgs<'a>, Error> {
    if let Err(e) = input.check(n) {
        return Err(e);
    }
    if let Err(e) = output.check(n) {
        return Err(e);
    }
    if !input.same_shape(&output) {
        return Err(Error::ShapeMismatch);
    }
    if !same(&output, &input) && !output.is_disjoint(&input) {
        return Err(Error::Overlap);
    }
    // The pad value does not matter here: validate against the transform's
    // own output zero point.
    let valid = match &t {
        InputTransform::Affine(a) => {
            a.zp_out >= -128 && a.zp_out <= 127 && t.is_valid_for(input.c, a.zp_out as i8)
        }
        InputTransform::Table(_) => t.is_valid_for(input.c, 0),
    };
    if !valid {
        return Err(Error::BadParams);
    }
    Ok(TransformArgs { input, output, t })
}

/// Runs a checked channel transform for rows `[y0, y1)` (`y1` clipped to
/// the height).
pub(crate) fn transform_run(arena: &mut [i8], a: &TransformArgs<'_>, y0: usize, y1: usize) {
    let (input, output, t) = (a.input, a.output, &a.t);
    let y1 = if y1 < input.h { y1 } else { input.h };
    for y in y0..y1 {
        for x in 0..input.w {
            let (src, dst) = (input.pixel(y, x), output.pixel(y, x));
            for ch in 0..input.c {
                // Read before write: element-wise, so in place is exact.
                let Some(&v) = arena.get(src + ch) else {
                    return;
                };
                let Some(d) = arena.get_mut(dst + ch) else {
                    return;
                };
                *d = t.apply(ch, v);
            }
        }
    }
}

/// Copies every element of `input` to `output` (same shape; typically
/// `output` is a channel view of a concatenation region, see
/// [`MapRef::channels`]). When `output == input` the data is already in
/// place and nothing is done; otherwise the maps must not share elements.
pub fn copy_channels(arena: &mut [i8], input: MapRef, output: MapRef) -> Result<(), Error> {
    let a = check_copy(arena.len(), input, output)?;
    copy_run(arena, &a);
    Ok(())
}

/// The checks of [`copy_channels`] (a `const fn`, see [`crate::checked`]).
pub(crate) const fn check_copy(
    n: usize,
    input: MapRef,
    output: MapRef,
) -> Result<(MapRef, MapRef), Error> {
    if let Err(e) = input.check(n) {
        return Err(e);
    }
    if let Err(e) = output.check(n) {
        return Err(e);
    }
    if !input.same_shape(&output) {
        return Err(Error::ShapeMismatch);
    }
    if !same(&output, &input) && !output.is_disjoint(&input) {
        return Err(Error::Overlap);
    }
    Ok((input, output))
}

/// Runs a checked channel copy, one pixel's channels at a time.
///
/// Never inlined: rustc inlines small leaf functions across crates, so a
/// generated module got its own copy of this loop, specialised to the
/// call's constant maps, at every copied map (a 121-layer network's
/// copies made 350 KB of its module's code and most of its release build
/// time). The other kernel entries call further functions, which keeps
/// them out of the module; the convolutions say so themselves.
#[inline(never)]
pub(crate) fn copy_run(arena: &mut [i8], &(input, output): &(MapRef, MapRef)) {
    if input == output {
        return;
    }
    let c = input.c;
    for y in 0..input.h {
        let (ri, ro) = (input.row(y), output.row(y));
        for x in 0..input.w {
            let (src, dst) = (ri + x * input.stride, ro + x * output.stride);
            // The maps share no element ([`check_copy`]), so the pixel
            // that starts later starts after the other one ends: the
            // arena splits there into the source and the destination.
            let (from, to) = if src < dst {
                let Some((lo, hi)) = arena.split_at_mut_checked(dst) else {
                    return;
                };
                (lo.get(src..src + c), hi.get_mut(..c))
            } else {
                let Some((lo, hi)) = arena.split_at_mut_checked(src) else {
                    return;
                };
                (hi.get(..c), lo.get_mut(dst..dst + c))
            };
            let (Some(from), Some(to)) = (from, to) else {
                return;
            };
            // Four bytes a step (one load and one store where the core
            // allows unaligned words), then the rest byte by byte.
            let (mut dw, mut sw) = (to.chunks_exact_mut(4), from.chunks_exact(4));
            for (d, v) in (&mut dw).zip(&mut sw) {
                if let (Ok(d), Ok(v)) = (<&mut [i8; 4]>::try_from(d), <&[i8; 4]>::try_from(v)) {
                    *d = *v;
                }
            }
            for (d, &v) in dw.into_remainder().iter_mut().zip(sw.remainder()) {
                *d = v;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::AffineTransform;

    /// Naive reference: the affine formula of [`AffineTransform`] written out
    /// with plain i64 arithmetic and floor division.
    #[allow(clippy::too_many_arguments)]
    fn naive_affine(
        x: i8,
        mul: i32,
        add: i32,
        shift: u32,
        zp_in: i32,
        zp_out: i32,
        min: i8,
        max: i8,
    ) -> i8 {
        let t = (x as i64 - zp_in as i64) * mul as i64 + add as i64;
        let t = if shift == 0 {
            t
        } else {
            (t + (1i64 << (shift - 1))).div_euclid(1i64 << shift)
        };
        (t + zp_out as i64).clamp(min as i64, max as i64) as i8
    }

    #[test]
    fn transform_matches_naive_reference_in_place_and_out_of_place() {
        let (h, w, c) = (2, 3, 3);
        let mut arena = [0i8; 2 * 18];
        for (i, v) in arena[..18].iter_mut().enumerate() {
            *v = (i as i32 * 37 - 128) as i8;
        }
        let mul = [3 << 20, -(5 << 19), 1 << 16];
        let add = [7 << 18, 0, -(123 << 16)];
        let a = AffineTransform {
            mul: &mul,
            add: &add,
            shift: 20,
            zp_in: -5,
            zp_out: -128,
            min: -128,
            max: 100,
        };
        let t = InputTransform::Affine(a);
        let src = MapRef::new(0, h, w, c);
        let dst = MapRef::new(18, h, w, c);
        channel_transform(&mut arena, src, dst, &t).unwrap();
        for i in 0..18 {
            let ch = i % c;
            let want = naive_affine(arena[i], mul[ch], add[ch], 20, -5, -128, -128, 100);
            assert_eq!(arena[18 + i], want, "element {i}");
        }
        let expected: [i8; 18] = core::array::from_fn(|i| arena[18 + i]);
        channel_transform(&mut arena, src, src, &t).unwrap();
        assert_eq!(arena[..18], expected);
    }

    #[test]
    fn table_transform_and_overlap_refused() {
        let mut table = [0i8; 512];
        for (i, v) in table.iter_mut().enumerate() {
            *v = if i < 256 {
                (i as u8 as i8).wrapping_neg()
            } else {
                7
            };
        }
        let mut arena = [1i8, -2, 3, -4, 0, 0, 0, 0];
        let t = InputTransform::Table(&table);
        channel_transform(
            &mut arena,
            MapRef::new(0, 1, 2, 2),
            MapRef::new(4, 1, 2, 2),
            &t,
        )
        .unwrap();
        assert_eq!(arena[4..], [-1, 7, -3, 7]);
        let r = channel_transform(
            &mut arena,
            MapRef::new(0, 1, 2, 2),
            MapRef::new(2, 1, 2, 2),
            &t,
        );
        assert_eq!(r, Err(Error::Overlap));
    }

    #[test]
    fn copy_into_concat_region_views() {
        // Two 2x1 maps of 1 and 2 channels copied into a 3-channel region.
        let mut arena = [10i8, 11, 20, 21, 22, 23, 0, 0, 0, 0, 0, 0];
        let region = MapRef::new(6, 2, 1, 3);
        copy_channels(&mut arena, MapRef::new(0, 2, 1, 1), region.channels(0, 1)).unwrap();
        copy_channels(&mut arena, MapRef::new(2, 2, 1, 2), region.channels(1, 2)).unwrap();
        assert_eq!(arena[6..], [10, 20, 21, 11, 22, 23]);
        let bad = copy_channels(&mut arena, MapRef::new(0, 2, 1, 1), MapRef::new(6, 2, 1, 2));
        assert_eq!(bad, Err(Error::ShapeMismatch));
    }

    #[test]
    fn copies_match_element_by_element_either_way_round() {
        // Source before and after the destination, dense and strided,
        // interleaved channel views of one region: the pixel-run copy
        // equals the plain element-by-element definition.
        let cases = [
            (MapRef::new(0, 3, 2, 5), MapRef::new(40, 3, 2, 5)),
            (MapRef::new(40, 3, 2, 5), MapRef::new(0, 3, 2, 5)),
            (
                MapRef::strided(0, 3, 2, 3, 8),
                MapRef::strided(3, 3, 2, 3, 8),
            ),
            (
                MapRef::strided(4, 3, 2, 4, 8),
                MapRef::strided(0, 3, 2, 4, 8),
            ),
            (
                MapRef::strided(40, 2, 3, 2, 7),
                MapRef::strided(1, 2, 3, 2, 6),
            ),
            (MapRef::new(0, 1, 1, 1), MapRef::new(79, 1, 1, 1)),
        ];
        for (k, (src, dst)) in cases.into_iter().enumerate() {
            let start: [i8; 80] = core::array::from_fn(|i| (i as i8).wrapping_mul(37));
            let mut want = start;
            for y in 0..src.h {
                for x in 0..src.w {
                    for ch in 0..src.c {
                        want[dst.pixel(y, x) + ch] = start[src.pixel(y, x) + ch];
                    }
                }
            }
            let mut got = start;
            copy_channels(&mut got, src, dst).unwrap();
            assert_eq!(got, want, "case {k}");
        }
    }
}
