//! Area averaging of colour frames weighs the window's field sums once per
//! output pixel; that must give exactly the bytes of weighing every source
//! pixel first (the kernel's definition before the change, kept here as an
//! independent integer model built only from the public `FrameParams`).

use ingot_rt::*;
use proptest::prelude::*;

/// The raw fields of pixel `i`: RGB565 `(R5, G6, B5)` or RGB888 bytes.
fn fields(frame: &[u8], format: PixelFormat, i: usize) -> [u32; 3] {
    match format {
        PixelFormat::Rgb565Le | PixelFormat::Rgb565Be => {
            let (a, b) = (frame[2 * i], frame[2 * i + 1]);
            let v = if format == PixelFormat::Rgb565Be {
                u16::from_be_bytes([a, b])
            } else {
                u16::from_le_bytes([a, b])
            } as u32;
            [v >> 11, (v >> 5) & 63, v & 31]
        }
        _ => [
            frame[3 * i] as u32,
            frame[3 * i + 1] as u32,
            frame[3 * i + 2] as u32,
        ],
    }
}

/// Per-pixel weighted sums over each area window (no rotation/mirroring),
/// rounded to nearest with ties up and capped at 255.
fn per_pixel_model(frame: &[u8], p: &FrameParams) -> Vec<u8> {
    let c = p.config();
    let (w, shift) = p.weights();
    let oc = c.out_c as usize;
    let mut out = vec![0u8; p.input_len()];
    for oy in 0..c.out_h {
        let (y0, y1) = (oy * c.roi.h / c.out_h, (oy + 1) * c.roi.h / c.out_h);
        for ox in 0..c.out_w {
            let (x0, x1) = (ox * c.roi.w / c.out_w, (ox + 1) * c.roi.w / c.out_w);
            let mut acc = [0u64; 3];
            for y in c.roi.y + y0..c.roi.y + y1 {
                for x in c.roi.x + x0..c.roi.x + x1 {
                    let f = fields(frame, c.format, (y * c.frame_w + x) as usize);
                    if oc == 1 {
                        acc[0] += (f[0] * w[0] + f[1] * w[1] + f[2] * w[2]) as u64;
                    } else {
                        for k in 0..3 {
                            acc[k] += (f[k] * w[k]) as u64;
                        }
                    }
                }
            }
            let n = ((x1 - x0) * (y1 - y0)) as u64;
            for (k, a) in acc.iter().enumerate().take(oc) {
                let v = (a + n * ((1u64 << shift) >> 1)) / (n << shift);
                out[(oy * c.out_w + ox) as usize * oc + k] = v.min(255) as u8;
            }
        }
    }
    out
}

fn arb_colour() -> impl Strategy<Value = PixelFormat> {
    prop_oneof![
        Just(PixelFormat::Rgb565Le),
        Just(PixelFormat::Rgb565Be),
        Just(PixelFormat::Rgb888),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn window_sums_equal_per_pixel_weights(
        format in arb_colour(),
        fw in 1u32..40, fh in 1u32..40,
        out in (1u32..12, 1u32..12),
        c3 in any::<bool>(),
        bt709 in any::<bool>(),
        seed in any::<u64>(),
    ) {
        prop_assume!(out.0 <= fw && out.1 <= fh);
        let cfg = FrameConfig::new(format, fw, fh, out.0, out.1, if c3 { 3 } else { 1 })
            .roi(0, 0, fw, fh)
            .luma(if bt709 { Luma::Bt709 } else { Luma::Bt601 });
        let p = cfg.validate();
        prop_assert!(p.is_ok(), "{cfg:?}: {p:?}");
        let p = p.unwrap();
        let mut s = seed | 1;
        let frame: Vec<u8> = (0..p.frame_bytes())
            .map(|_| {
                s ^= s << 13;
                s ^= s >> 7;
                s ^= s << 17;
                (s >> 24) as u8
            })
            .collect();
        let table: Vec<i8> = (0..768).map(|i| (i % 256 - 128) as i8).collect();
        let mut got = vec![0i8; p.input_len()];
        prop_assert!(convert_frame(&frame, &p, &table, &mut got).is_ok());
        let got: Vec<u8> = got.iter().map(|&v| (v as i32 + 128) as u8).collect();
        prop_assert_eq!(got, per_pixel_model(&frame, &p));
    }
}

/// The largest RGB565 windows the limit admits still sum exactly: an
/// all-white frame (every word 0xFFFF) is code 255, all-black 0, in both
/// byte orders.
#[test]
fn largest_rgb565_window_sums_exactly() {
    for format in [PixelFormat::Rgb565Le, PixelFormat::Rgb565Be] {
        // 127×128 = 16,256 pixels in one window, just under the limit
        // for RGB565 gray (about 16,380); 128×128 is refused.
        let cfg = FrameConfig::new(format, 127, 128, 1, 1, 1).roi(0, 0, 127, 128);
        let p = cfg.validate().unwrap();
        let big = FrameConfig::new(format, 128, 128, 1, 1, 1);
        assert_eq!(big.validate(), Err(FrameError::WindowTooLarge));
        for (byte, want) in [(0xFFu8, 127i8), (0, -128)] {
            let frame = vec![byte; p.frame_bytes()];
            let mut out = [0i8; 1];
            let table: Vec<i8> = (0..256).map(|i| (i - 128) as i8).collect();
            convert_frame(&frame, &p, &table, &mut out).unwrap();
            assert_eq!(out[0], want, "{format:?} byte {byte:#x}");
        }
    }
}

/// RGB565 windows sum pixel pairs in 16-bit lanes when a lane holds at
/// most 1024 fields (6-bit G: 1024 · 63 < 2^16) and pixel by pixel
/// otherwise: windows at the limit (1024 pairs in one row, 32 rows of 32
/// pairs, odd widths) and past it, both byte orders, gray and RGB, all
/// white (the lanes' largest sums) and random.
#[test]
fn rgb565_windows_at_and_past_the_lane_limit_sum_exactly() {
    for format in [PixelFormat::Rgb565Le, PixelFormat::Rgb565Be] {
        for (fw, fh, oc) in [
            (2048, 1, 1),
            (2047, 1, 3),
            (64, 32, 1),
            (63, 32, 3),
            (2049, 1, 1),
            (65, 32, 1),
            (4097, 3, 1),
            (5000, 3, 3),
        ] {
            let cfg = FrameConfig::new(format, fw, fh, 1, 1, oc).roi(0, 0, fw, fh);
            let p = cfg.validate().unwrap();
            let mut s = 0x9E37_79B9_7F4A_7C15u64 ^ fw as u64;
            let random: Vec<u8> = (0..p.frame_bytes())
                .map(|_| {
                    s ^= s << 13;
                    s ^= s >> 7;
                    s ^= s << 17;
                    (s >> 24) as u8
                })
                .collect();
            let table: Vec<i8> = (0..768).map(|i| (i % 256 - 128) as i8).collect();
            for frame in [vec![0xFF; p.frame_bytes()], random] {
                let mut got = vec![0i8; p.input_len()];
                convert_frame(&frame, &p, &table, &mut got).unwrap();
                let got: Vec<u8> = got.iter().map(|&v| (v as i32 + 128) as u8).collect();
                assert_eq!(got, per_pixel_model(&frame, &p), "{cfg:?}");
            }
            let mut white = vec![0i8; p.input_len()];
            convert_frame(&vec![0xFF; p.frame_bytes()], &p, &table, &mut white).unwrap();
            assert!(white.iter().all(|&v| v == 127), "{cfg:?}: {white:?}");
        }
    }
}

/// RGB565 windows of 1 to 8 pixels a row are summed by straight-line code
/// of that width (9 and more by the general loop), two rows per step and
/// a last odd row, with big-endian fields read without a byte swap: every
/// width from 1 to 10 and height from 1 to 5, inside a frame with a
/// one-pixel border (odd start, so the 32-bit loads are unaligned), both
/// byte orders, gray and RGB, random and all-white frames, against the
/// per-pixel model (the RGB565 bit layout is common practice).
#[test]
fn rgb565_windows_of_every_small_shape_sum_exactly() {
    let table: Vec<i8> = (0..768).map(|i| (i % 256 - 128) as i8).collect();
    for format in [PixelFormat::Rgb565Le, PixelFormat::Rgb565Be] {
        for oc in [1, 3] {
            for ww in 1u32..=10 {
                for wh in 1u32..=5 {
                    let (fw, fh) = (3 * ww + 2, 2 * wh + 2);
                    let cfg = FrameConfig::new(format, fw, fh, 3, 2, oc).roi(1, 1, 3 * ww, 2 * wh);
                    let p = cfg.validate().unwrap();
                    let mut s = 0x2545_F491_4F6C_DD1Du64 ^ (ww * 16 + wh) as u64;
                    let random: Vec<u8> = (0..p.frame_bytes())
                        .map(|_| {
                            s ^= s << 13;
                            s ^= s >> 7;
                            s ^= s << 17;
                            (s >> 24) as u8
                        })
                        .collect();
                    for frame in [random, vec![0xFF; p.frame_bytes()]] {
                        let mut got = vec![0i8; p.input_len()];
                        convert_frame(&frame, &p, &table, &mut got).unwrap();
                        let got: Vec<u8> = got.iter().map(|&v| (v as i32 + 128) as u8).collect();
                        assert_eq!(got, per_pixel_model(&frame, &p), "{cfg:?}");
                    }
                }
            }
        }
    }
}
