//! Camera frames in (`convert_frame`): pixel layouts and luma weights on
//! hand-worked pixels, every resize method against a float reference of the
//! same method on random frames, crops, rotation, mirroring, and refused
//! configurations.

use ingot_rt::*;
use proptest::prelude::*;

/// Identity-like table: code `v` of channel `ch` becomes `v − 128`, so the
/// test reads the 8-bit code back as `out + 128`.
fn ident_table(c: usize) -> Vec<i8> {
    (0..256 * c)
        .map(|i| ((i % 256) as i32 - 128) as i8)
        .collect()
}

fn codes(frame: &[u8], p: &FrameParams) -> Vec<u8> {
    let c = p.config().out_c as usize;
    let mut out = vec![0i8; p.input_len()];
    convert_frame(frame, p, &ident_table(c), &mut out).unwrap();
    out.iter().map(|&v| (v as i32 + 128) as u8).collect()
}

fn params(cfg: FrameConfig) -> FrameParams {
    cfg.validate().unwrap()
}

/// A generated module validates its camera in a constant: a bad
/// configuration fails the build, a good one costs nothing at run time.
const CONST_PARAMS: FrameParams =
    match FrameConfig::new(PixelFormat::Rgb565Le, 320, 240, 64, 64, 1).validate() {
        Ok(p) => p,
        Err(_) => panic!("bad camera"),
    };

#[test]
fn const_validation_and_defaults() {
    assert_eq!(CONST_PARAMS.frame_bytes(), 320 * 240 * 2);
    assert_eq!(CONST_PARAMS.input_len(), 64 * 64);
    // Default region: the centred 240×240 square of a 320×240 frame.
    assert_eq!(
        CONST_PARAMS.config().roi,
        Roi {
            x: 40,
            y: 0,
            w: 240,
            h: 240
        }
    );
    assert_eq!(
        Roi::centred(160, 120, 32, 64),
        Roi {
            x: 50,
            y: 0,
            w: 60,
            h: 120
        }
    );
    assert_eq!(
        Roi::centred(100, 200, 10, 10),
        Roi {
            x: 0,
            y: 50,
            w: 100,
            h: 100
        }
    );
}

/// RGB565 bit fields: `RRRRRGGG GGGBBBBB`, 5/6/5 bits, scaled to 8 bits by
/// 255/31 and 255/63 (common practice). Worked by hand:
/// 0xF800 = red 31 → 255; 0x07E0 = green 63 → 255; 0x001F = blue 31 → 255;
/// 0x8410 = (16, 32, 16) → (16·255/31 = 131.6 → 132, 32·255/63 = 129.5 →
/// 130, 132).
#[test]
fn rgb565_bit_fields_both_byte_orders() {
    let words: [u16; 4] = [0xF800, 0x07E0, 0x001F, 0x8410];
    let want: [[u8; 3]; 4] = [[255, 0, 0], [0, 255, 0], [0, 0, 255], [132, 130, 132]];
    for (fmt, be) in [
        (PixelFormat::Rgb565Le, false),
        (PixelFormat::Rgb565Be, true),
    ] {
        let frame: Vec<u8> = words
            .iter()
            .flat_map(|w| if be { w.to_be_bytes() } else { w.to_le_bytes() })
            .collect();
        // Little-endian stores the low byte first: 0xF800 is [0x00, 0xF8].
        assert_eq!(frame[..2], if be { [0xF8, 0x00] } else { [0x00, 0xF8] });
        let p = params(FrameConfig::new(fmt, 4, 1, 4, 1, 3).resize(Resize::Nearest));
        let got = codes(&frame, &p);
        assert_eq!(got, want.concat(), "{fmt:?}");
    }
}

/// Luma weights. ITU-R BT.601: E'Y = 0.299 E'R + 0.587 E'G + 0.114 E'B;
/// ITU-R BT.709 (item 3.2, derivation of the luminance signal):
/// E'Y = 0.2126 E'R + 0.7152 E'G + 0.0722 E'B. Worked by hand for 8-bit
/// primaries: BT.601 red 76.2 → 76, green 149.7 → 150, blue 29.1 → 29;
/// BT.709 red 54.2 → 54, green 182.4 → 182, blue 18.4 → 18; a mid gray
/// (128, 128, 128) stays 128 under both (the weights sum to 1).
#[test]
fn luma_weights_bt601_bt709() {
    assert_eq!(Luma::Bt601.coefficients(), [2990, 5870, 1140]);
    assert_eq!(Luma::Bt709.coefficients(), [2126, 7152, 722]);
    let frame = [
        255, 0, 0, 0, 255, 0, 0, 0, 255, 128, 128, 128, 255, 255, 255,
    ];
    for (luma, want) in [
        (Luma::Bt601, [76, 150, 29, 128, 255]),
        (Luma::Bt709, [54, 182, 18, 128, 255]),
    ] {
        let p = params(
            FrameConfig::new(PixelFormat::Rgb888, 5, 1, 5, 1, 1)
                .resize(Resize::Nearest)
                .luma(luma),
        );
        assert_eq!(codes(&frame, &p), want, "{luma:?}");
    }
    // The same primaries through RGB565 (all fields at their maximum are
    // the same 8-bit primaries): BT.601 0xF800 → 76, 0x07E0 → 150,
    // 0x001F → 29, 0xFFFF → 255.
    let frame: Vec<u8> = [0xF800u16, 0x07E0, 0x001F, 0xFFFF]
        .iter()
        .flat_map(|w| w.to_le_bytes())
        .collect();
    let p = params(FrameConfig::new(PixelFormat::Rgb565Le, 4, 1, 4, 1, 1).resize(Resize::Nearest));
    assert_eq!(codes(&frame, &p), [76, 150, 29, 255]);
}

/// YUYV (YUV 4:2:2) stores two pixels in four bytes, `Y0 U Y1 V`; gray
/// takes the Y bytes and never the chroma.
#[test]
fn yuyv_byte_order_takes_y() {
    let frame = [10, 200, 20, 210, 30, 220, 40, 230];
    let p = params(FrameConfig::new(PixelFormat::Yuyv, 4, 1, 4, 1, 1).resize(Resize::Nearest));
    assert_eq!(codes(&frame, &p), [10, 20, 30, 40]);
    // Area over pairs: (10 + 20) / 2 = 15, (30 + 40) / 2 = 35.
    let p = params(FrameConfig::new(PixelFormat::Yuyv, 4, 1, 2, 1, 1).roi(0, 0, 4, 1));
    assert_eq!(codes(&frame, &p), [15, 35]);
}

#[test]
fn rotation_and_mirroring() {
    let frame = [1, 2, 3, 4, 5, 6];
    let base = FrameConfig::new(PixelFormat::Gray8, 3, 2, 3, 2, 1).roi(0, 0, 3, 2);
    assert_eq!(codes(&frame, &params(base)), [1, 2, 3, 4, 5, 6]);
    assert_eq!(
        codes(&frame, &params(base.rotate180(true))),
        [6, 5, 4, 3, 2, 1]
    );
    assert_eq!(
        codes(&frame, &params(base.mirror(true))),
        [3, 2, 1, 6, 5, 4]
    );
    assert_eq!(
        codes(&frame, &params(base.rotate180(true).mirror(true))),
        [4, 5, 6, 1, 2, 3]
    );
}

#[test]
fn one_pixel_regions_and_crop_bounds() {
    // 5×3 gray frame, value = 10·y + x.
    let frame: Vec<u8> = (0..3)
        .flat_map(|y| (0..5).map(move |x| 10 * y + x))
        .collect();
    for resize in [Resize::Area, Resize::Bilinear, Resize::Nearest] {
        for (x, y) in [(0, 0), (4, 2), (2, 1)] {
            let p = params(
                FrameConfig::new(PixelFormat::Gray8, 5, 3, 1, 1, 1)
                    .roi(x, y, 1, 1)
                    .resize(resize),
            );
            assert_eq!(codes(&frame, &p), [10 * y as u8 + x as u8], "{resize:?}");
            // A 1×1 region enlarged to 2×2 repeats the pixel (area refuses).
            let p = FrameConfig::new(PixelFormat::Gray8, 5, 3, 2, 2, 1)
                .roi(x, y, 1, 1)
                .resize(resize)
                .validate();
            if resize == Resize::Area {
                assert_eq!(p, Err(FrameError::AreaEnlarges));
            } else {
                assert_eq!(codes(&frame, &p.unwrap()), [10 * y as u8 + x as u8; 4]);
            }
        }
    }
    // The region touching the bottom-right corner is inside; one more
    // column or row is not.
    let cfg = FrameConfig::new(PixelFormat::Gray8, 5, 3, 2, 1, 1);
    assert!(cfg.roi(3, 2, 2, 1).validate().is_ok());
    assert_eq!(
        cfg.roi(4, 2, 2, 1).validate(),
        Err(FrameError::RoiOutsideFrame)
    );
    assert_eq!(
        cfg.roi(3, 3, 2, 1).validate(),
        Err(FrameError::RoiOutsideFrame)
    );
    assert_eq!(
        cfg.roi(u32::MAX, 0, 2, 1).validate(),
        Err(FrameError::RoiOutsideFrame)
    );
    // The last row of the frame: (4, 2) region 1 wide reads frame[14].
    let p = params(cfg.roi(3, 2, 2, 1).resize(Resize::Nearest));
    assert_eq!(p.input_len(), 2);
    assert_eq!(codes(&frame, &p), [23, 24]);
}

#[test]
fn bad_configurations_are_refused() {
    use FrameError::*;
    let f = |fmt, w, h, ow, oh, oc| FrameConfig::new(fmt, w, h, ow, oh, oc);
    let g = PixelFormat::Gray8;
    assert_eq!(f(g, 0, 10, 4, 4, 1).validate(), Err(ZeroSize));
    assert_eq!(f(g, 10, 0, 4, 4, 1).validate(), Err(ZeroSize));
    assert_eq!(f(g, 10, 10, 0, 4, 1).validate(), Err(ZeroSize));
    assert_eq!(
        f(g, 10, 10, 4, 4, 1).roi(0, 0, 0, 4).validate(),
        Err(ZeroSize)
    );
    assert_eq!(f(g, 10, 10, 4, 4, 2).validate(), Err(Channels));
    assert_eq!(
        f(g, 10, 10, 4, 4, 1).roi(8, 0, 4, 4).validate(),
        Err(RoiOutsideFrame)
    );
    assert_eq!(
        f(PixelFormat::Rgb565Le, 65536, 32768, 4, 4, 1).validate(),
        Err(FrameTooLarge)
    );
    assert_eq!(f(g, 65536, 65536, 4, 4, 1).validate(), Err(FrameTooLarge));
    assert_eq!(f(g, 10, 10, 20, 20, 1).validate(), Err(AreaEnlarges));
    assert!(f(g, 10, 10, 20, 20, 1)
        .resize(Resize::Bilinear)
        .validate()
        .is_ok());
    assert_eq!(
        f(PixelFormat::Yuyv, 11, 10, 4, 4, 1).validate(),
        Err(OddYuyvWidth)
    );
    assert_eq!(
        f(PixelFormat::Yuyv, 10, 10, 4, 4, 3).validate(),
        Err(Unsupported)
    );
    // An area window of 200×200 colour pixels overflows a u32 sum; the
    // same for gray8 (no fraction bits) does not.
    assert_eq!(
        f(PixelFormat::Rgb888, 400, 400, 2, 2, 1).validate(),
        Err(WindowTooLarge)
    );
    assert!(f(g, 400, 400, 2, 2, 1).validate().is_ok());
    // A 640×480 colour frame still shrinks to 8×8.
    assert!(f(PixelFormat::Rgb565Le, 640, 480, 8, 8, 1)
        .validate()
        .is_ok());
}

#[test]
fn short_buffers_write_nothing() {
    let p = params(FrameConfig::new(PixelFormat::Rgb565Le, 8, 8, 4, 4, 1));
    let table = ident_table(1);
    let mut out = vec![7i8; 16];
    assert_eq!(
        convert_frame(&[0; 127], &p, &table, &mut out),
        Err(Error::BufferTooSmall)
    );
    assert_eq!(
        convert_frame(&[0; 128], &p, &table[..255], &mut out),
        Err(Error::BufferTooSmall)
    );
    assert_eq!(
        convert_frame(&[0; 128], &p, &table, &mut out[..15]),
        Err(Error::BufferTooSmall)
    );
    assert!(out.iter().all(|&v| v == 7));
    assert!(convert_frame(&[0; 128], &p, &table, &mut out).is_ok());
    assert!(out.iter().all(|&v| v == -128));
}

// ---------------------------------------------------------------------
// Float reference of the same methods.

/// The float samples (8-bit scale) of pixel (x, y): exact luma weights and
/// exact 255/31, 255/63 scaling.
fn ref_sample(frame: &[u8], cfg: &FrameConfig, x: u32, y: u32) -> [f64; 3] {
    let i = (y * cfg.frame_w + x) as usize;
    let (r, g, b) = match cfg.format {
        PixelFormat::Gray8 => {
            let v = frame[i] as f64;
            (v, v, v)
        }
        PixelFormat::Yuyv => {
            let v = frame[2 * i] as f64;
            (v, v, v)
        }
        PixelFormat::Rgb888 => (
            frame[3 * i] as f64,
            frame[3 * i + 1] as f64,
            frame[3 * i + 2] as f64,
        ),
        PixelFormat::Rgb565Le | PixelFormat::Rgb565Be => {
            let pair = [frame[2 * i], frame[2 * i + 1]];
            let w = if cfg.format == PixelFormat::Rgb565Be {
                u16::from_be_bytes(pair)
            } else {
                u16::from_le_bytes(pair)
            };
            (
                (w >> 11) as f64 * 255.0 / 31.0,
                ((w >> 5) & 63) as f64 * 255.0 / 63.0,
                (w & 31) as f64 * 255.0 / 31.0,
            )
        }
    };
    if cfg.out_c == 3 {
        return [r, g, b];
    }
    let gray = match cfg.format {
        PixelFormat::Gray8 | PixelFormat::Yuyv => r,
        _ => {
            let k = match cfg.luma {
                Luma::Bt601 => [0.299, 0.587, 0.114],
                Luma::Bt709 => [0.2126, 0.7152, 0.0722],
            };
            k[0] * r + k[1] * g + k[2] * b
        }
    };
    [gray, 0.0, 0.0]
}

/// The resized (not yet rotated) image, float, `[ry][rx][ch]`.
fn ref_resize(frame: &[u8], cfg: &FrameConfig) -> Vec<Vec<[f64; 3]>> {
    let (rw, rh, ow, oh) = (cfg.roi.w, cfg.roi.h, cfg.out_w, cfg.out_h);
    let s = |x: u32, y: u32| ref_sample(frame, cfg, cfg.roi.x + x, cfg.roi.y + y);
    (0..oh)
        .map(|oy| {
            (0..ow)
                .map(|ox| match cfg.resize {
                    Resize::Area => {
                        let (x0, x1) = (ox * rw / ow, (ox + 1) * rw / ow);
                        let (y0, y1) = (oy * rh / oh, (oy + 1) * rh / oh);
                        let mut acc = [0.0; 3];
                        for y in y0..y1 {
                            for x in x0..x1 {
                                let v = s(x, y);
                                (0..3).for_each(|k| acc[k] += v[k]);
                            }
                        }
                        let n = ((x1 - x0) * (y1 - y0)) as f64;
                        acc.map(|a| a / n)
                    }
                    Resize::Nearest => {
                        let x = ((ox as f64 + 0.5) * rw as f64 / ow as f64).floor() as u32;
                        let y = ((oy as f64 + 0.5) * rh as f64 / oh as f64).floor() as u32;
                        s(x.min(rw - 1), y.min(rh - 1))
                    }
                    Resize::Bilinear => {
                        let pos = |o: u32, r: u32, out: u32| {
                            let p = ((o as f64 + 0.5) * r as f64 / out as f64 - 0.5)
                                .clamp(0.0, (r - 1) as f64);
                            let i0 = p.floor() as u32;
                            (i0, (i0 + 1).min(r - 1), p - i0 as f64)
                        };
                        let (x0, x1, fx) = pos(ox, rw, ow);
                        let (y0, y1, fy) = pos(oy, rh, oh);
                        std::array::from_fn(|k| {
                            let top = s(x0, y0)[k] * (1.0 - fx) + s(x1, y0)[k] * fx;
                            let bot = s(x0, y1)[k] * (1.0 - fx) + s(x1, y1)[k] * fx;
                            top * (1.0 - fy) + bot * fy
                        })
                    }
                })
                .collect()
        })
        .collect()
}

/// Reference codes in output order (rotation, then mirroring).
fn ref_codes(frame: &[u8], cfg: &FrameConfig) -> Vec<i32> {
    let img = ref_resize(frame, cfg);
    let (ow, oh, c) = (cfg.out_w, cfg.out_h, cfg.out_c as usize);
    let mut out = vec![0; (ow * oh) as usize * c];
    for ry in 0..oh {
        for rx in 0..ow {
            let (mut y, mut x) = (ry, rx);
            if cfg.rotate180 {
                y = oh - 1 - y;
                x = ow - 1 - x;
            }
            if cfg.mirror {
                x = ow - 1 - x;
            }
            for k in 0..c {
                out[(y * ow + x) as usize * c + k] =
                    img[ry as usize][rx as usize][k].round().clamp(0.0, 255.0) as i32;
            }
        }
    }
    out
}

fn arb_format() -> impl Strategy<Value = PixelFormat> {
    prop_oneof![
        Just(PixelFormat::Gray8),
        Just(PixelFormat::Rgb565Le),
        Just(PixelFormat::Rgb565Be),
        Just(PixelFormat::Rgb888),
        Just(PixelFormat::Yuyv),
    ]
}

fn arb_resize() -> impl Strategy<Value = Resize> {
    prop_oneof![
        Just(Resize::Area),
        Just(Resize::Bilinear),
        Just(Resize::Nearest)
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    /// Every format, method, odd and even size, region, rotation and
    /// mirroring: within ±1 output code of the float reference of the same
    /// method (common practice for fixed-point image resampling).
    #[test]
    fn matches_float_reference(
        format in arb_format(),
        resize in arb_resize(),
        fw in 1u32..24, fh in 1u32..24,
        roi in (0.0f64..1.0, 0.0f64..1.0, 0.0f64..1.0, 0.0f64..1.0),
        out in (1u32..20, 1u32..20),
        c3 in any::<bool>(),
        rotate in any::<bool>(), mirror in any::<bool>(),
        bt709 in any::<bool>(),
        seed in any::<u64>(),
    ) {
        let fw = if format == PixelFormat::Yuyv { fw * 2 } else { fw };
        let rx = (roi.0 * fw as f64) as u32;
        let ry = (roi.1 * fh as f64) as u32;
        let rw = 1 + (roi.2 * (fw - rx) as f64) as u32;
        let rh = 1 + (roi.3 * (fh - ry) as f64) as u32;
        let (ow, oh) = if resize == Resize::Area {
            (1 + out.0 % rw, 1 + out.1 % rh)
        } else {
            out
        };
        let oc = if c3 && format != PixelFormat::Yuyv { 3 } else { 1 };
        let cfg = FrameConfig::new(format, fw, fh, ow, oh, oc)
            .roi(rx, ry, rw, rh)
            .resize(resize)
            .rotate180(rotate)
            .mirror(mirror)
            .luma(if bt709 { Luma::Bt709 } else { Luma::Bt601 });
        let p = cfg.validate();
        prop_assert!(p.is_ok(), "{cfg:?}: {p:?}");
        let p = p.unwrap();
        let mut state = seed | 1;
        let frame: Vec<u8> = (0..p.frame_bytes())
            .map(|_| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                (state >> 24) as u8
            })
            .collect();
        let got = codes(&frame, &p);
        let want = ref_codes(&frame, &cfg);
        prop_assert_eq!(got.len(), want.len());
        for (i, (&g, &w)) in got.iter().zip(&want).enumerate() {
            prop_assert!((g as i32 - w).abs() <= 1, "{cfg:?} at {i}: {g} vs {w}");
        }
        // Plain 8-bit gray has no fixed-point weights: nearest is exact.
        if resize == Resize::Nearest && matches!(format, PixelFormat::Gray8 | PixelFormat::Yuyv) {
            let got: Vec<i32> = got.iter().map(|&g| g as i32).collect();
            prop_assert_eq!(got, want);
        }
    }
}
