//! Whole-map operations without arithmetic: the channel copy of a
//! concatenation that is not in place, and a per-channel transform applied
//! as a step of its own.

use crate::{Error, InputTransform, MapRef};

/// Copies `src` to `dst` element by element (same height, width and channel
/// count; strides may differ). This is how a concatenation that the planner
/// could not make free is executed: one call per input, into the channel
/// view [`MapRef::channels`] of the output region.
///
/// `src` and `dst` must be disjoint, or identical (then nothing happens).
pub fn copy_channels(arena: &mut [i8], src: MapRef, dst: MapRef) -> Result<(), Error> {
    src.check(arena.len())?;
    dst.check(arena.len())?;
    if !src.same_shape(&dst) {
        return Err(Error::ShapeMismatch);
    }
    if src == dst {
        return Ok(());
    }
    if !src.is_disjoint(&dst) {
        return Err(Error::Overlap);
    }
    for y in 0..src.h {
        for x in 0..src.w {
            let s = src.pixel(y, x);
            let d = dst.pixel(y, x);
            arena.copy_within(s..s + src.c, d);
        }
    }
    Ok(())
}

/// Applies a per-channel transform to every element of `input`, writing
/// `output` (same shape). May run in place (`output == input`); otherwise
/// the two must be disjoint. For an affine transform `zp_out` is the
/// output's zero point.
pub fn channel_transform(
    arena: &mut [i8],
    input: MapRef,
    output: MapRef,
    transform: &InputTransform<'_>,
) -> Result<(), Error> {
    input.check(arena.len())?;
    output.check(arena.len())?;
    if !input.same_shape(&output) {
        return Err(Error::ShapeMismatch);
    }
    if input != output && !input.is_disjoint(&output) {
        return Err(Error::Overlap);
    }
    let pad = match transform {
        InputTransform::Affine(a) => {
            if a.zp_out < -128 || a.zp_out > 127 {
                return Err(Error::BadParams);
            }
            a.zp_out as i8
        }
        InputTransform::Table(_) => 0,
    };
    if !transform.is_valid_for(input.c, pad) {
        return Err(Error::BadParams);
    }
    for y in 0..input.h {
        for x in 0..input.w {
            let s = input.pixel(y, x);
            let d = output.pixel(y, x);
            for ch in 0..input.c {
                arena[d + ch] = transform.apply(ch, arena[s + ch]);
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::AffineTransform;

    #[test]
    fn copy_into_a_channel_view() {
        // src 2x1x2 at 0, dst = channels [1,3) of a 2x1x3 region at 4.
        let mut a = [1i8, 2, 3, 4, 0, 0, 0, 0, 0, 0];
        let region = MapRef::new(4, 2, 1, 3);
        copy_channels(&mut a, MapRef::new(0, 2, 1, 2), region.channels(1, 2)).unwrap();
        assert_eq!(a, [1, 2, 3, 4, 0, 1, 2, 0, 3, 4]);
    }

    #[test]
    fn copy_rejects_overlap_and_shape() {
        let mut a = [0i8; 8];
        assert_eq!(copy_channels(&mut a, MapRef::new(0, 1, 2, 2), MapRef::new(2, 1, 2, 2)), Err(Error::Overlap));
        assert_eq!(copy_channels(&mut a, MapRef::new(0, 1, 2, 2), MapRef::new(4, 2, 1, 2)), Err(Error::ShapeMismatch));
        assert_eq!(copy_channels(&mut a, MapRef::new(0, 1, 2, 2), MapRef::new(6, 1, 2, 2)), Err(Error::MapOutOfBounds));
    }

    #[test]
    fn transform_in_place_and_table() {
        let mul = [2, -1];
        let add = [0, 0];
        let t = InputTransform::Affine(AffineTransform { mul: &mul, add: &add, shift: 0, zp_in: 1, zp_out: 0, min: -3, max: 100 });
        let mut a = [1i8, 1, 5, 5];
        let m = MapRef::new(0, 1, 2, 2);
        channel_transform(&mut a, m, m, &t).unwrap();
        assert_eq!(a, [0, 0, 8, -3]);
        let mut table = [0i8; 256];
        for (i, v) in table.iter_mut().enumerate() {
            *v = (i as u8 as i8).wrapping_neg();
        }
        let mut b = [3i8, -4, 0, 0];
        channel_transform(&mut b, MapRef::new(0, 1, 2, 1), MapRef::new(2, 1, 2, 1), &InputTransform::Table(&table)).unwrap();
        assert_eq!(b, [3, -4, -3, 4]);
        // A table shorter than 256 per channel is refused and writes nothing.
        let mut c = [7i8; 4];
        let short = [0i8; 255];
        let r = channel_transform(&mut c, MapRef::new(0, 1, 2, 1), MapRef::new(2, 1, 2, 1), &InputTransform::Table(&short));
        assert_eq!(r, Err(Error::BadParams));
        assert_eq!(c, [7; 4]);
    }
}
