//! Row ranges over rings: every kernel that can sit in a row pipeline,
//! run output rows range by range with its input (and output) stored as
//! rings of a few rows, gives the bytes of the whole-map run.
//!
//! The input ring holds the rows one range's windows span
//! (`(n - 1)·step + (k - 1)·dilation + 1`, clipped to the height: the
//! window span for ranges of one row, what the planner reserves), and is
//! refilled just in time, oldest rows overwritten, as a producer would.

use ingot_rt::checked;
use ingot_rt::*;
use proptest::prelude::*;

const A: usize = 8192;
const P: usize = 4096;
/// Where the (whole or ring) input, output and a whole second input sit.
const IN: usize = 0;
const OUT: usize = 3072;
const SIDE: usize = 6144;

type Arena = [i8; A];
type Patch = [i16; P];
/// A kernel call from `input` to `output` for output rows `[y0, y1)`.
type Kernel<'k> = dyn Fn(&mut Arena, &mut Patch, MapRef, MapRef, usize, usize) + 'k;

fn fill(seed: u64) -> Box<Arena> {
    let mut a = Box::new([0i8; A]);
    let mut s = seed | 1;
    for v in a.iter_mut() {
        s ^= s << 13;
        s ^= s >> 7;
        s ^= s << 17;
        *v = (s >> 24) as i8;
    }
    a
}

/// Input geometry of one output row: which input rows row `oy` reads.
#[derive(Debug, Clone, Copy)]
struct Rows {
    step: usize,
    top: usize,
    span: usize,
}

impl Rows {
    /// One past the last input row output rows `< y1` read (clipped).
    fn hi(&self, y1: usize, h: usize) -> usize {
        ((y1 - 1) * self.step + self.span)
            .saturating_sub(self.top)
            .min(h)
    }
}

/// Runs `k` whole, then range by range (ranges of `chunk` rows) from an
/// input ring into an output ring, and compares every output row.
#[allow(clippy::too_many_arguments)]
fn check(
    seed: u64,
    (h, w, c, stride): (usize, usize, usize, usize),
    (oh, ow, oc, ostride): (usize, usize, usize, usize),
    g: Rows,
    chunk: usize,
    k: &Kernel<'_>,
) -> Result<(), TestCaseError> {
    let whole_in = MapRef::strided(IN, h, w, c, stride);
    let whole_out = MapRef::strided(OUT, oh, ow, oc, ostride);
    let mut want = fill(seed);
    let src = want.clone();
    let mut patch = Box::new([0i16; P]);
    k(&mut want, &mut patch, whole_in, whole_out, 0, usize::MAX);

    let in_rows = ((chunk - 1) * g.step + g.span).min(h).max(1);
    let ring_in = MapRef::ring(IN, h, w, c, stride, in_rows);
    let ring_out = MapRef::ring(OUT, oh, ow, oc, ostride, chunk.min(oh));
    let mut got = fill(seed);
    let mut patch = Box::new([0i16; P]);
    let mut written = 0;
    let mut y0 = 0;
    while y0 < oh {
        let y1 = (y0 + chunk).min(oh);
        let need = g.hi(y1, h);
        // The oldest rows go: the ring keeps what rows [y0, y1) read.
        let lo = (y0 * g.step).saturating_sub(g.top);
        prop_assert!(need <= lo + in_rows || need == 0, "ring too small");
        while written < need {
            for x in 0..w {
                for ch in 0..c {
                    got[ring_in.index(written, x, ch)] = src[whole_in.index(written, x, ch)];
                }
            }
            written += 1;
        }
        // Other steps of a pipeline use the patch between two calls.
        patch.fill(0x5a5a);
        k(&mut got, &mut patch, ring_in, ring_out, y0, y1);
        for y in y0..y1 {
            for x in 0..ow {
                for ch in 0..oc {
                    prop_assert_eq!(
                        got[ring_out.index(y, x, ch)],
                        want[whole_out.index(y, x, ch)],
                        "row {} x {} ch {} (rows {}..{})",
                        y,
                        x,
                        ch,
                        y0,
                        y1
                    );
                }
            }
        }
        y0 = y1;
    }
    Ok(())
}

#[derive(Debug, Clone)]
struct ConvCase {
    h: usize,
    w: usize,
    cin: usize,
    cout: usize,
    depthwise: bool,
    window: Window,
    extra: usize,
    chunk: usize,
    form: u8,
    seed: u64,
}

fn arb_conv() -> impl Strategy<Value = ConvCase> {
    (
        (1usize..9, 1usize..9, 1usize..7, 1usize..7, any::<bool>()),
        (
            1usize..4,
            1usize..4,
            1usize..3,
            1usize..3,
            1usize..3,
            1usize..3,
        ),
        (0usize..3, 0usize..3, 0usize..3, 0usize..3),
        (0usize..3, 1usize..4, 0u8..4, any::<u64>()),
    )
        .prop_map(
            |(
                (h, w, cin, cout, depthwise),
                (kh, kw, sy, sx, dy, dx),
                (t, l, b, r),
                (extra, chunk, form, seed),
            )| {
                ConvCase {
                    h,
                    w,
                    cin,
                    cout,
                    depthwise,
                    window: Window {
                        kh,
                        kw,
                        step_y: sy,
                        step_x: sx,
                        dilation_y: dy,
                        dilation_x: dx,
                        pad: Padding {
                            top: t,
                            left: l,
                            bottom: b,
                            right: r,
                        },
                    },
                    extra,
                    chunk,
                    form,
                    seed,
                }
            },
        )
}

/// Every convolution form (int8 rows, file bytes, pairs, words; dense,
/// depthwise, pointwise, strided, dilated, padded): ring input and output,
/// row ranges of 1 to 3 rows, against the whole-map run.
fn conv_case(cc: &ConvCase) -> Result<(), TestCaseError> {
    let win = cc.window;
    let (Some(oh), Some(ow)) = (win.out_h(cc.h), win.out_w(cc.w)) else {
        return Ok(());
    };
    // Depthwise (groups = C_in, multiplier cout) runs with the int8 forms.
    let (groups, cout) = if cc.depthwise {
        (cc.cin, cc.cin * cc.cout.min(2))
    } else {
        (1, cc.cout)
    };
    let form = if groups > 1 { cc.form % 2 } else { cc.form };
    let cpg = cc.cin / groups;
    let k = win.taps() * cpg;
    let mut s = cc.seed | 1;
    let mut next = move || {
        s ^= s << 13;
        s ^= s >> 7;
        s ^= s << 17;
        s
    };
    let weights: Vec<i8> = (0..cout * k).map(|_| (next() % 255) as i8).collect();
    let bias: Vec<i32> = (0..cout).map(|_| (next() % 2001) as i32 - 1000).collect();
    let rq: Vec<Requant> = (0..cout)
        .map(|_| Requant::from_real(0.002 + (next() % 100) as f64 * 0.0004).unwrap())
        .collect();
    let p = ConvParams {
        window: win,
        groups,
        input_zp: (next() % 256) as u8 as i8,
        out: OutputQuant::clamped(-5, -100, 120),
    };
    let bytes: Vec<u8> = weights.iter().map(|&v| v as u8).collect();
    let mut pairs = vec![0u32; paired_len(cout, k)];
    pair_rows_into(&weights, cout, k, &mut pairs).unwrap();
    let mut words = vec![0u8; words_len(cout, k)];
    word_rows_into(&weights, cout, k, &mut words).unwrap();
    let run = |a: &mut Arena, pt: &mut Patch, i: MapRef, o: MapRef, y0: usize, y1: usize| {
        let whole = y1 == usize::MAX;
        match form {
            0 => {
                let c = checked::Conv2d::<A, P>::new(i, o, &weights, &bias, &rq, p, None).unwrap();
                if whole {
                    c.run(a, pt)
                } else {
                    c.run_rows(a, pt, y0, y1)
                }
            }
            1 => {
                let c =
                    checked::Conv2d::<A, P>::new_bytes(i, o, &bytes, &bias, &rq, p, None).unwrap();
                if whole {
                    c.run(a, pt)
                } else {
                    c.run_rows(a, pt, y0, y1)
                }
            }
            2 => {
                let c =
                    checked::Conv2dPaired::<A, P>::new(i, o, &pairs, &bias, &rq, p, None).unwrap();
                if whole {
                    c.run(a, pt)
                } else {
                    c.run_rows(a, pt, y0, y1)
                }
            }
            _ => {
                let c =
                    checked::Conv2dWords::<A, P>::new(i, o, &words, &bias, &rq, p, None).unwrap();
                if whole {
                    c.run(a, pt)
                } else {
                    c.run_rows(a, pt, y0, y1)
                }
            }
        }
    };
    let stride = cc.cin + cc.extra;
    let g = Rows {
        step: win.step_y,
        top: win.pad.top,
        span: (win.kh - 1) * win.dilation_y + 1,
    };
    check(
        cc.seed,
        (cc.h, cc.w, cc.cin, stride),
        (oh, ow, cout, cout + cc.extra),
        g,
        cc.chunk,
        &run,
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    #[test]
    fn conv_rows_over_rings_equal_the_whole_map(cc in arb_conv()) {
        conv_case(&cc)?;
    }

    /// Max and average pooling, any window, over rings.
    #[test]
    fn pool_rows_over_rings_equal_the_whole_map(
        (h, w, c, extra) in (1usize..9, 1usize..9, 1usize..6, 0usize..3),
        (kh, kw, sy, sx, pad) in (1usize..4, 1usize..4, 1usize..3, 1usize..3, 0usize..2),
        (avg, chunk, seed) in (any::<bool>(), 1usize..4, any::<u64>()),
    ) {
        let win = Window {
            kh,
            kw,
            step_y: sy,
            step_x: sx,
            dilation_y: 1,
            dilation_x: 1,
            pad: Padding::same(pad),
        };
        let (Some(oh), Some(ow)) = (win.out_h(h), win.out_w(w)) else {
            return Ok(());
        };
        let q = PoolQuant {
            in_zp: 3,
            requant: if avg { Requant::from_real(0.7 / (kh * kw) as f64) } else { None },
            out: OutputQuant::clamped(-2, -128, 127),
        };
        let run = |a: &mut Arena, _: &mut Patch, i: MapRef, o: MapRef, y0: usize, y1: usize| {
            if avg {
                let k = checked::AvgPool2d::<A>::new(i, o, win, q).unwrap();
                k.run_rows(a, y0, y1);
            } else {
                let k = checked::MaxPool2d::<A>::new(i, o, win, q).unwrap();
                k.run_rows(a, y0, y1);
            }
        };
        let g = Rows { step: sy, top: pad, span: kh };
        check(seed, (h, w, c, c + extra), (oh, ow, c, c), g, chunk, &run)?;
    }

    /// Addition (the ring is one input, the other a whole map) and the
    /// channel transform, over rings.
    #[test]
    fn elementwise_rows_over_rings_equal_the_whole_map(
        (h, w, c, extra) in (1usize..9, 1usize..9, 1usize..6, 0usize..3),
        (is_add, chunk, seed) in (any::<bool>(), 1usize..4, any::<u64>()),
    ) {
        let ap = AddParams::from_scales(0.02, 3, 0.03, -4, 0.04, OutputQuant::clamped(1, -128, 127))
            .unwrap();
        let mul: Vec<i32> = (0..c as i32).map(|i| 900 + 37 * i).collect();
        let add: Vec<i32> = (0..c as i32).map(|i| -500 * i).collect();
        let t = InputTransform::Affine(AffineTransform {
            mul: &mul,
            add: &add,
            shift: 10,
            zp_in: 2,
            zp_out: -3,
            min: -128,
            max: 127,
        });
        let side = MapRef::new(SIDE, h, w, c);
        let run = |a: &mut Arena, _: &mut Patch, i: MapRef, o: MapRef, y0: usize, y1: usize| {
            if is_add {
                let k = checked::Add::<A>::new(i, side, o, ap).unwrap();
                k.run_rows(a, y0, y1);
            } else {
                let k = checked::ChannelTransform::<A>::new(i, o, t).unwrap();
                k.run_rows(a, y0, y1);
            }
        };
        let g = Rows { step: 1, top: 0, span: 1 };
        check(seed, (h, w, c, c + extra), (h, w, c, c), g, chunk, &run)?;
    }
}

#[test]
fn a_ring_stores_its_rows_and_wraps() {
    let r = MapRef::ring(10, 7, 3, 2, 4, 3);
    assert!(r.is_ring());
    // Stored bytes: 3 rows of 3 pixels, stride 4, last pixel's 2 channels.
    assert_eq!(r.end(), Some(10 + (3 * 3 - 1) * 4 + 2));
    assert_eq!(r.pixel(4, 1), r.pixel(1, 1));
    assert_eq!(r.row(5), 10 + 2 * 3 * 4);
    assert!(r.fits(10 + 34));
    assert!(!r.fits(10 + 33));
    // A ring as tall as its map is the whole map.
    assert_eq!(MapRef::ring(0, 4, 2, 1, 1, 9), MapRef::new(0, 4, 2, 1));
    // Kernels that read a map as one run of pixels refuse rings.
    let q = PoolQuant {
        in_zp: 0,
        requant: None,
        out: OutputQuant::clamped(0, -128, 127),
    };
    assert_eq!(
        checked::GlobalAvgPool::<64>::new(
            MapRef::ring(0, 4, 2, 1, 1, 2),
            MapRef::new(32, 1, 1, 1),
            q
        )
        .err(),
        Some(Error::BadParams)
    );
}
