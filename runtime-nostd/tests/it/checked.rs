//! The checked call forms (`ingot_rt::checked`): the same checks and the
//! same bytes as the `Result` functions the compiler's simulator calls.

use ingot_rt::checked;
use ingot_rt::*;

const ARENA: usize = 4 * 4 * 3 + 4 * 4 * 5;
const PATCH: usize = conv_patch_len(3, 3, 3);

fn params(step: usize) -> ConvParams {
    ConvParams {
        window: Window::square(3, step, 1),
        groups: 1,
        input_zp: -3,
        out: OutputQuant::relu(-10),
    }
}

/// Deterministic weights in `[-127, 127]` and a filled input map.
fn data() -> ([i8; 5 * 27], [i32; 5], [Requant; 5], [i8; ARENA]) {
    let mut s = 0x2545_f491u32;
    let mut next = move || {
        s ^= s << 13;
        s ^= s >> 17;
        s ^= s << 5;
        s
    };
    let w = core::array::from_fn(|_| ((next() % 255) as i32 - 127) as i8);
    let b = core::array::from_fn(|i| i as i32 * 97 - 200);
    let rq = [Requant::from_real(0.0123).unwrap(); 5];
    let mut arena = [0i8; ARENA];
    for v in arena.iter_mut().take(48) {
        *v = next() as i8;
    }
    (w, b, rq, arena)
}

#[test]
fn checked_conv_gives_the_bytes_of_conv2d() {
    let (w, b, rq, arena0) = data();
    let (input, output) = (MapRef::new(0, 4, 4, 3), MapRef::new(48, 4, 4, 5));
    let mut want = arena0;
    let mut patch = [0i16; PATCH];
    conv2d(
        &mut want,
        input,
        output,
        &w,
        &b,
        &rq,
        &params(1),
        None,
        &mut patch,
    )
    .unwrap();
    let k =
        checked::Conv2d::<ARENA, PATCH>::new(input, output, &w, &b, &rq, params(1), None).unwrap();
    let mut got = arena0;
    k.run(&mut got, &mut [0i16; PATCH]);
    assert_eq!(got, want);
    // The paired form, checked, gives the same bytes too.
    let mut pw = vec![0u32; paired_len(5, 27)];
    pair_rows_into(&w, 5, 27, &mut pw).unwrap();
    let k =
        checked::Conv2dPaired::<ARENA, PATCH>::new(input, output, &pw, &b, &rq, params(1), None)
            .unwrap();
    let mut got = arena0;
    k.run(&mut got, &mut [0i16; PATCH]);
    assert_eq!(got, want);
    // The weights as the bytes of a weights file, read as they are.
    let wb: Vec<u8> = w.iter().map(|&v| v as u8).collect();
    let k =
        checked::Conv2d::<ARENA, PATCH>::new_bytes(input, output, &wb, &b, &rq, params(1), None)
            .unwrap();
    let mut got = arena0;
    k.run(&mut got, &mut [0i16; PATCH]);
    assert_eq!(got, want);
    // A linear layer over the same input, both ways (5×4×4×3 weights).
    let (li, lo) = (MapRef::new(0, 4, 4, 3), MapRef::new(48, 1, 1, 5));
    let lw: Vec<i8> = (0..5 * 48).map(|i| (i * 37 % 255) as i8).collect();
    let lwb: Vec<u8> = lw.iter().map(|&v| v as u8).collect();
    let out = OutputQuant::clamped(3, -128, 127);
    let mut lin_want = arena0;
    linear(&mut lin_want, li, lo, &lw, &b, &rq, out).unwrap();
    let k = checked::Linear::<ARENA>::new_bytes(li, lo, &lwb, &b, &rq, out).unwrap();
    let mut got = arena0;
    k.run(&mut got);
    assert_eq!(got, lin_want);
    assert_eq!(
        checked::Linear::<ARENA>::new_bytes(li, lo, &lwb[1..], &b, &rq, out).err(),
        Some(Error::BufferTooSmall)
    );
    // And the word form.
    let mut ww = vec![0u8; words_len(5, 27)];
    word_rows_into(&w, 5, 27, &mut ww).unwrap();
    let k = checked::Conv2dWords::<ARENA, PATCH>::new(input, output, &ww, &b, &rq, params(1), None)
        .unwrap();
    let mut got = arena0;
    k.run(&mut got, &mut [0i16; PATCH]);
    assert_eq!(got, want);
    // One byte short is refused.
    assert_eq!(
        checked::Conv2dWords::<ARENA, PATCH>::new(
            input,
            output,
            &ww[..ww.len() - 1],
            &b,
            &rq,
            params(1),
            None
        )
        .err(),
        Some(Error::BufferTooSmall)
    );
}

#[test]
fn checked_forms_refuse_what_the_kernels_refuse() {
    let (w, b, rq, mut arena) = data();
    let (input, output) = (MapRef::new(0, 4, 4, 3), MapRef::new(48, 4, 4, 5));
    let mut patch = [0i16; PATCH];
    // A zero step, an output past the arena, a patch too short.
    let bad = params(0);
    assert_eq!(
        conv2d(&mut arena, input, output, &w, &b, &rq, &bad, None, &mut patch),
        Err(Error::BadParams)
    );
    assert_eq!(
        checked::Conv2d::<ARENA, PATCH>::new(input, output, &w, &b, &rq, bad, None).err(),
        Some(Error::BadParams)
    );
    assert_eq!(
        checked::Conv2d::<{ ARENA - 1 }, PATCH>::new(input, output, &w, &b, &rq, params(1), None)
            .err(),
        Some(Error::MapOutOfBounds)
    );
    assert_eq!(
        checked::Conv2d::<ARENA, 8>::new(input, output, &w, &b, &rq, params(1), None).err(),
        Some(Error::BufferTooSmall)
    );
    assert_eq!(
        checked::CopyIn::<ARENA, 47>::new(input).err(),
        Some(Error::BufferTooSmall)
    );
    assert!(checked::CopyOut::<ARENA, 48>::new(input).is_ok());
}
