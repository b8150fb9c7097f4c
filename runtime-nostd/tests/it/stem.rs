//! Convolutions with one input channel (the stem kernel of
//! `runtime-nostd/src/stem.rs`) against the naive reference, every weight
//! form, whole maps and row ranges over rings: kernels 1×1 to 6×6 (past
//! the stem kernel's 32 taps, where the general kernel takes over), steps
//! 1 and 2, padding, odd widths, interleaved input pixels, output channel
//! counts across the kernel's blocks, extreme values, and multipliers on
//! both sides of the 32-bit requantization path.

use crate::common::*;
use ingot_rt::checked;
use ingot_rt::*;
use proptest::prelude::*;

const A: usize = 4096;
const P: usize = 64;
const IN: usize = 0;
const OUT: usize = 1024;

#[derive(Debug, Clone)]
struct Case {
    h: usize,
    w: usize,
    /// Input pixel stride (1: dense; more: one channel of a wider map).
    in_stride: usize,
    cout: usize,
    out_extra: usize,
    kh: usize,
    kw: usize,
    sy: usize,
    sx: usize,
    pad: (usize, usize, usize, usize),
    pad_value: i8,
    zp_out: i8,
    act: u8,
    /// Rows per call over rings (0: whole map only).
    chunk: usize,
    seed: u64,
    shifts: Vec<i32>,
}

fn arb_case() -> impl Strategy<Value = Case> {
    (
        (1usize..13, 1usize..13, 1usize..4, 1usize..41, 0usize..3),
        (
            // 3×3 (the stem kernel's register path) half the time.
            prop_oneof![1 => Just((3usize, 3usize)), 1 => (1usize..7, 1usize..7)],
            1usize..3,
            1usize..3,
        ),
        (0usize..3, 0usize..3, 0usize..3, 0usize..3),
        (
            prop_oneof![Just(-128i8), Just(127i8), any::<i8>()],
            any::<i8>(),
            0u8..3,
            0usize..4,
            any::<u64>(),
        ),
        // Mostly the usual total shifts (32 and more: `shift >= 2`), some
        // below (the 64-bit path, which the general kernel runs).
        prop::collection::vec(prop_oneof![4 => 2i32..24, 1 => -2i32..2], 40),
    )
        .prop_map(|(s, k, pad, q, shifts)| {
            let (h, w, in_stride, cout, out_extra) = s;
            let ((kh, kw), sy, sx) = k;
            let (pad_value, zp_out, act, chunk, seed) = q;
            Case {
                h,
                w,
                in_stride,
                cout,
                out_extra,
                kh,
                kw,
                sy,
                sx,
                pad,
                pad_value,
                zp_out,
                act,
                chunk,
                seed,
                shifts,
            }
        })
}

/// A value drawn with the int8 extremes often.
fn extreme(rng: &mut Lcg) -> i8 {
    match rng.next() % 6 {
        0 => -128,
        1 => 127,
        2 => -127,
        _ => rng.i8(),
    }
}

/// The case's four weight forms as checked calls, run over `[y0, y1)`
/// (`usize::MAX` for the whole map).
fn run_case(c: &Case) -> Result<(), TestCaseError> {
    let win = Window {
        kh: c.kh,
        kw: c.kw,
        step_y: c.sy,
        step_x: c.sx,
        dilation_y: 1,
        dilation_x: 1,
        pad: Padding {
            top: c.pad.0,
            left: c.pad.1,
            bottom: c.pad.2,
            right: c.pad.3,
        },
    };
    let (Some(oh), Some(ow)) = (win.out_h(c.h), win.out_w(c.w)) else {
        return Ok(());
    };
    let ostride = c.cout + c.out_extra;
    if c.h * c.w * c.in_stride > OUT || OUT + oh * ow * ostride > A {
        return Ok(());
    }
    let mut rng = Lcg(c.seed);
    let k = c.kh * c.kw;
    let weights: Vec<i8> = (0..c.cout * k).map(|_| extreme(&mut rng)).collect();
    let bias: Vec<i32> = (0..c.cout)
        .map(|_| rng.range(-40_000, 40_000) as i32)
        .collect();
    let rq: Vec<Requant> = (0..c.cout)
        .map(|o| {
            let mult = rng.range(1 << 30, i32::MAX as i64) as i32;
            Requant::new(mult, c.shifts[o]).unwrap()
        })
        .collect();
    let (lo, hi) = match c.act {
        0 => (-128i8, 127i8),
        1 => (c.zp_out, 127),
        _ => (c.zp_out, c.zp_out.saturating_add(30)),
    };
    let p = ConvParams {
        window: win,
        groups: 1,
        input_zp: c.pad_value,
        out: OutputQuant::clamped(c.zp_out as i32, lo, hi),
    };
    let mut src = [0i8; A];
    for v in src.iter_mut() {
        *v = extreme(&mut rng);
    }
    let whole_in = MapRef::strided(IN, c.h, c.w, 1, c.in_stride);
    let whole_out = MapRef::strided(OUT, oh, ow, c.cout, ostride);
    let rp = RefConv {
        kh: c.kh,
        kw: c.kw,
        sy: c.sy,
        sx: c.sx,
        dy: 1,
        dx: 1,
        pt: c.pad.0,
        pl: c.pad.1,
        pb: c.pad.2,
        pr: c.pad.3,
        groups: 1,
        pad_value: c.pad_value,
        zp_out: c.zp_out as i32,
        lo,
        hi,
    };
    let want = ref_conv(
        &src, &whole_in, oh, ow, c.cout, &weights, &bias, &rq, &rp, None,
    );
    let bytes: Vec<u8> = weights.iter().map(|&v| v as u8).collect();
    let mut pairs = vec![0u32; paired_len(c.cout, k)];
    pair_rows_into(&weights, c.cout, k, &mut pairs).unwrap();
    let mut words = vec![0u8; words_len(c.cout, k)];
    word_rows_into(&weights, c.cout, k, &mut words).unwrap();
    type Arena = [i8; A];
    type Patch = [i16; P];
    let run = |form: u8, a: &mut Arena, pt: &mut Patch, i: MapRef, o: MapRef, y0, y1| {
        let whole = y1 == usize::MAX;
        match form {
            0 => {
                let k = checked::Conv2d::<A, P>::new(i, o, &weights, &bias, &rq, p, None).unwrap();
                if whole {
                    k.run(a, pt)
                } else {
                    k.run_rows(a, pt, y0, y1)
                }
            }
            1 => {
                let k =
                    checked::Conv2d::<A, P>::new_bytes(i, o, &bytes, &bias, &rq, p, None).unwrap();
                if whole {
                    k.run(a, pt)
                } else {
                    k.run_rows(a, pt, y0, y1)
                }
            }
            2 => {
                let k =
                    checked::Conv2dPaired::<A, P>::new(i, o, &pairs, &bias, &rq, p, None).unwrap();
                if whole {
                    k.run(a, pt)
                } else {
                    k.run_rows(a, pt, y0, y1)
                }
            }
            _ => {
                let k =
                    checked::Conv2dWords::<A, P>::new(i, o, &words, &bias, &rq, p, None).unwrap();
                if whole {
                    k.run(a, pt)
                } else {
                    k.run_rows(a, pt, y0, y1)
                }
            }
        }
    };
    for form in 0..4u8 {
        // Whole map: the output view against the reference, and nothing
        // else touched.
        let mut a = src;
        let mut pt = [0x5a5ai16; P];
        run(form, &mut a, &mut pt, whole_in, whole_out, 0, usize::MAX);
        for y in 0..oh {
            for x in 0..ow {
                for ch in 0..c.cout {
                    let i = whole_out.index(y, x, ch);
                    prop_assert_eq!(
                        a[i],
                        want[(y * ow + x) * c.cout + ch],
                        "form {} pixel ({}, {}) channel {}",
                        form,
                        y,
                        x,
                        ch
                    );
                    a[i] = src[i];
                }
            }
        }
        prop_assert!(a == src, "form {form} wrote outside its output view");
        if c.chunk == 0 {
            continue;
        }
        // Row ranges of `chunk` rows from an input ring into an output
        // ring, the ring refilled just in time as a producer would.
        let span = c.kh;
        let in_rows = ((c.chunk - 1) * c.sy + span).min(c.h).max(1);
        let ring_in = MapRef::ring(IN, c.h, c.w, 1, c.in_stride, in_rows);
        let ring_out = MapRef::ring(OUT, oh, ow, c.cout, ostride, c.chunk.min(oh));
        let mut a = src;
        let mut written = 0;
        let mut y0 = 0;
        while y0 < oh {
            let y1 = (y0 + c.chunk).min(oh);
            let need = ((y1 - 1) * c.sy + span).saturating_sub(c.pad.0).min(c.h);
            while written < need {
                for x in 0..c.w {
                    a[ring_in.index(written, x, 0)] = src[whole_in.index(written, x, 0)];
                }
                written += 1;
            }
            let mut pt = [0x5a5ai16; P];
            run(form, &mut a, &mut pt, ring_in, ring_out, y0, y1);
            for y in y0..y1 {
                for x in 0..ow {
                    for ch in 0..c.cout {
                        prop_assert_eq!(
                            a[ring_out.index(y, x, ch)],
                            want[(y * ow + x) * c.cout + ch],
                            "form {} rings of {} rows: pixel ({}, {}) channel {}",
                            form,
                            c.chunk,
                            y,
                            x,
                            ch
                        );
                    }
                }
            }
            y0 = y1;
        }
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(600))]

    /// Reference: `common::ref_conv`, the textbook convolution sum in i64
    /// with the requantization of Jacob et al. (2018), Section 2.
    #[test]
    fn one_channel_convolutions_match_the_reference(c in arb_case()) {
        run_case(&c)?;
    }
}

/// The 3×3 step-2 stem of the zoo networks on maps large enough for
/// interior runs, pad values at the extremes, 8, 11 and 16 channels (one
/// table block) and 20 (two).
#[test]
fn stem_3x3_step_2_at_the_extremes() {
    for (cout, value, w) in [(8, -128i8, 17), (11, 127, 16), (16, -128, 9), (20, 127, 15)] {
        let c = Case {
            h: 9,
            w,
            in_stride: 1,
            cout,
            out_extra: 1,
            kh: 3,
            kw: 3,
            sy: 2,
            sx: 2,
            pad: (1, 1, 1, 1),
            pad_value: value,
            zp_out: -3,
            act: 1,
            chunk: 1,
            seed: value as u64 ^ cout as u64,
            shifts: vec![3; 40],
        };
        run_case(&c).unwrap();
    }
}
