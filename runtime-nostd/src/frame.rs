//! Camera frames in: a sensor frame (gray8, RGB565, RGB888 or YUYV) is
//! cropped to a region of interest, resized, optionally rotated by 180° and
//! mirrored, converted to gray or RGB, and quantized through the model's
//! pixel table, in one pass, straight into the network's input.
//!
//! Everything is integer: no floating point, no temporary frame (a few
//! words of stack), no allocation, and no panic path (slices are reached
//! with `get`, divisors are `NonZeroU32`). The parameters are a
//! [`FrameParams`], which only [`FrameConfig::validate`] builds; that is a
//! `const fn`, so a generated module checks its camera at compile time and
//! the kernel needs no run-time check beyond the slice lengths.
//!
//! # Conventions
//!
//! * **Order of operations.** The region of interest is given in frame
//!   coordinates. It is resized to the network's `out_w × out_h`; the
//!   result is then rotated by 180° (if asked) and then mirrored
//!   left-right (if asked). Rotation and mirroring together are a
//!   top-bottom flip.
//! * **Samples.** A source pixel becomes one integer per output channel, in
//!   units of 1/2^`SHIFT` of an 8-bit code: 8-bit channels are used as they
//!   are, RGB565's 5- and 6-bit fields are scaled by 255/31 and 255/63
//!   (common practice), folded into fixed-point weights.
//! * **Gray from colour** uses the luma weights of ITU-R BT.601
//!   (`Y = 0.299 R + 0.587 G + 0.114 B`, the usual choice for camera YUV)
//!   or ITU-R BT.709 (`Y = 0.2126 R + 0.7152 G + 0.0722 B`), selected by
//!   [`Luma`], in Q10 fixed point. YUYV to gray takes the Y bytes directly.
//!   Gray8 to a 3-channel input repeats the gray value; YUYV to a
//!   3-channel input is refused ([`FrameError::Unsupported`]).
//! * **[`Resize::Area`]** (shrinking only): output pixel `ox` averages the
//!   source columns `[⌊ox·w/ow⌋, ⌊(ox+1)·w/ow⌋)` of the region (and
//!   likewise for rows), every source pixel with weight 1, so each source
//!   pixel is read exactly once; the average is rounded to nearest, ties
//!   up. When `w` is not a multiple of `ow` the windows differ in size by
//!   one pixel (a box filter on integer pixel boundaries, not fractional
//!   coverage).
//! * **[`Resize::Bilinear`]** uses the half-pixel-centre convention: output
//!   `o` samples the region at `(o + ½)·w/ow − ½`, clamped to `[0, w − 1]`,
//!   with the position rounded to 1/4096 pixel.
//! * **[`Resize::Nearest`]** takes source pixel `⌊(o + ½)·w/ow⌋`.
//! * **Limits.** Frame bytes must fit `u32`; an area window (at most
//!   `⌈w/ow⌉·⌈h/oh⌉` pixels) must keep its sum inside `u32`, about 16,000
//!   pixels for colour formats (a 640×480 frame can still shrink to 5×4);
//!   RGB565 windows also keep the sum of their 16-bit words inside `u32`
//!   (a bound of an earlier kernel, kept so that the same configurations
//!   are accepted).
//! * **RGB565 area windows** of at most 1,024 pixel pairs (and odd last
//!   pixels) are summed two pixels per 32-bit load, the R, G and B fields
//!   of both in the two 16-bit halves of one `u32` each (big-endian
//!   pixels without a byte swap: their fields are read where they lie);
//!   larger windows pixel by pixel. Windows of 1 to 8 pixels a row are
//!   summed by straight-line code of that width, two rows per step. All
//!   give the same sums.
//! * **Weights once per output pixel.** Area windows sum the raw colour
//!   fields and apply the luma (or 8-bit scaling) weights to the sums;
//!   integer weights make that exactly the sum of weighted pixels.

use crate::Error;
use core::num::NonZeroU32;

/// How a camera lays out one frame in memory (rows top to bottom, pixels
/// left to right, no padding between rows).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PixelFormat {
    /// One byte per pixel, gray.
    Gray8,
    /// Two bytes per pixel, `RRRRRGGG GGGBBBBB` as a 16-bit word stored
    /// low byte first.
    Rgb565Le,
    /// The same 16-bit word stored high byte first.
    Rgb565Be,
    /// Three bytes per pixel: R, G, B.
    Rgb888,
    /// YUV 4:2:2, four bytes per two pixels: `Y0 U Y1 V`.
    Yuyv,
}

impl PixelFormat {
    /// Bytes per pixel (YUYV: 4 bytes per 2 pixels, so 2).
    pub const fn bytes_per_pixel(self) -> u32 {
        match self {
            PixelFormat::Gray8 => 1,
            PixelFormat::Rgb565Le | PixelFormat::Rgb565Be | PixelFormat::Yuyv => 2,
            PixelFormat::Rgb888 => 3,
        }
    }
}

/// How the region of interest is scaled to the network's input size.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Resize {
    /// Average of the source pixels each output pixel covers (shrinking).
    Area,
    /// Bilinear interpolation, half-pixel centres.
    Bilinear,
    /// Nearest source pixel.
    Nearest,
}

/// Which luma weights turn colour into gray.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Luma {
    /// ITU-R BT.601: 0.299, 0.587, 0.114.
    Bt601,
    /// ITU-R BT.709: 0.2126, 0.7152, 0.0722.
    Bt709,
}

impl Luma {
    /// The R, G, B weights in units of 1/10,000 (exact for both
    /// recommendations).
    pub const fn coefficients(self) -> [u32; 3] {
        match self {
            Luma::Bt601 => [2990, 5870, 1140],
            Luma::Bt709 => [2126, 7152, 722],
        }
    }
}

/// A rectangle of the frame, in frame pixels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Roi {
    /// Left column.
    pub x: u32,
    /// Top row.
    pub y: u32,
    /// Width.
    pub w: u32,
    /// Height.
    pub h: u32,
}

impl Roi {
    /// The largest region centred in a `frame_w × frame_h` frame with the
    /// aspect ratio of `out_w × out_h` (the whole frame when the ratios
    /// agree). Zero sizes give a zero region, which validation refuses.
    pub const fn centred(frame_w: u32, frame_h: u32, out_w: u32, out_h: u32) -> Roi {
        if out_w == 0 || out_h == 0 {
            return Roi {
                x: 0,
                y: 0,
                w: 0,
                h: 0,
            };
        }
        let (fw, fh, ow, oh) = (frame_w as u64, frame_h as u64, out_w as u64, out_h as u64);
        if fw * oh >= fh * ow {
            let w = fh * ow / oh;
            Roi {
                x: ((fw - w) / 2) as u32,
                y: 0,
                w: w as u32,
                h: frame_h,
            }
        } else {
            let h = fw * oh / ow;
            Roi {
                x: 0,
                y: ((fh - h) / 2) as u32,
                w: frame_w,
                h: h as u32,
            }
        }
    }
}

/// Why a camera configuration was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum FrameError {
    /// The frame, the region or the output has a zero width or height.
    ZeroSize,
    /// The output has neither 1 (gray) nor 3 (RGB) channels.
    Channels,
    /// The region of interest reaches outside the frame.
    RoiOutsideFrame,
    /// The frame's byte count (or the output's) does not fit in `u32`.
    FrameTooLarge,
    /// An area window sums too many pixels for a `u32` accumulator.
    WindowTooLarge,
    /// Area averaging cannot enlarge: the output is larger than the region.
    AreaEnlarges,
    /// YUYV frames need an even width (two pixels share their chroma).
    OddYuyvWidth,
    /// This format cannot produce this many channels (YUYV to RGB).
    Unsupported,
}

/// An unvalidated camera description; [`FrameConfig::validate`] turns it
/// into the [`FrameParams`] the kernel takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameConfig {
    /// The sensor's pixel format.
    pub format: PixelFormat,
    /// Frame width in pixels.
    pub frame_w: u32,
    /// Frame height in pixels.
    pub frame_h: u32,
    /// The part of the frame the network sees.
    pub roi: Roi,
    /// Network input width.
    pub out_w: u32,
    /// Network input height.
    pub out_h: u32,
    /// Network input channels: 1 (gray) or 3 (RGB).
    pub out_c: u32,
    /// Resize method.
    pub resize: Resize,
    /// Rotate the result by 180°.
    pub rotate180: bool,
    /// Mirror the result left-right (after any rotation).
    pub mirror: bool,
    /// Luma weights for gray from colour.
    pub luma: Luma,
}

impl FrameConfig {
    /// A frame of `frame_w × frame_h` for an `out_w × out_h × out_c` input,
    /// with the defaults: centred region of the input's aspect ratio
    /// ([`Roi::centred`]), area averaging, no rotation or mirroring,
    /// BT.601 luma.
    pub const fn new(
        format: PixelFormat,
        frame_w: u32,
        frame_h: u32,
        out_w: u32,
        out_h: u32,
        out_c: u32,
    ) -> FrameConfig {
        FrameConfig {
            format,
            frame_w,
            frame_h,
            roi: Roi::centred(frame_w, frame_h, out_w, out_h),
            out_w,
            out_h,
            out_c,
            resize: Resize::Area,
            rotate180: false,
            mirror: false,
            luma: Luma::Bt601,
        }
    }

    /// Sets the region of interest.
    pub const fn roi(mut self, x: u32, y: u32, w: u32, h: u32) -> FrameConfig {
        self.roi = Roi { x, y, w, h };
        self
    }

    /// Sets the resize method.
    pub const fn resize(mut self, resize: Resize) -> FrameConfig {
        self.resize = resize;
        self
    }

    /// Rotates the result by 180° or not.
    pub const fn rotate180(mut self, on: bool) -> FrameConfig {
        self.rotate180 = on;
        self
    }

    /// Mirrors the result left-right or not.
    pub const fn mirror(mut self, on: bool) -> FrameConfig {
        self.mirror = on;
        self
    }

    /// Sets the luma weights.
    pub const fn luma(mut self, luma: Luma) -> FrameConfig {
        self.luma = luma;
        self
    }

    /// Checks every limit and precomputes the fixed-point weights.
    pub const fn validate(self) -> Result<FrameParams, FrameError> {
        let c = self;
        if c.frame_w == 0 || c.frame_h == 0 || c.roi.w == 0 || c.roi.h == 0 {
            return Err(FrameError::ZeroSize);
        }
        if c.out_w == 0 || c.out_h == 0 {
            return Err(FrameError::ZeroSize);
        }
        if c.out_c != 1 && c.out_c != 3 {
            return Err(FrameError::Channels);
        }
        let bpp = c.format.bytes_per_pixel();
        let frame_bytes = match c.frame_w.checked_mul(c.frame_h) {
            Some(px) => match px.checked_mul(bpp) {
                Some(b) => b,
                None => return Err(FrameError::FrameTooLarge),
            },
            None => return Err(FrameError::FrameTooLarge),
        };
        match c.out_w.checked_mul(c.out_h) {
            Some(px) if px.checked_mul(c.out_c).is_some() => {}
            _ => return Err(FrameError::FrameTooLarge),
        }
        // usize may be 16 bits wide on some targets; the kernel indexes
        // with usize.
        if frame_bytes as usize as u32 != frame_bytes {
            return Err(FrameError::FrameTooLarge);
        }
        match (c.roi.x.checked_add(c.roi.w), c.roi.y.checked_add(c.roi.h)) {
            (Some(r), Some(b)) if r <= c.frame_w && b <= c.frame_h => {}
            _ => return Err(FrameError::RoiOutsideFrame),
        }
        if matches!(c.format, PixelFormat::Yuyv) {
            if c.frame_w % 2 != 0 {
                return Err(FrameError::OddYuyvWidth);
            }
            if c.out_c == 3 {
                return Err(FrameError::Unsupported);
            }
        }
        let (weights, shift) = weights(c.format, c.out_c, c.luma);
        // Largest sample of any channel.
        let max_sample = if c.out_c == 1 {
            let m = field_max(c.format);
            weights[0] * m[0] + weights[1] * m[1] + weights[2] * m[2]
        } else {
            let m = field_max(c.format);
            let (a, b, d) = (weights[0] * m[0], weights[1] * m[1], weights[2] * m[2]);
            let ab = if a > b { a } else { b };
            if ab > d {
                ab
            } else {
                d
            }
        };
        if matches!(c.resize, Resize::Area) {
            if c.out_w > c.roi.w || c.out_h > c.roi.h {
                return Err(FrameError::AreaEnlarges);
            }
            let win = c.roi.w.div_ceil(c.out_w) as u64 * c.roi.h.div_ceil(c.out_h) as u64;
            // sum + den/2 must fit: win · (max_sample + 2^shift).
            if win * (max_sample as u64 + (1u64 << shift)) > u32::MAX as u64 {
                return Err(FrameError::WindowTooLarge);
            }
            // The RGB565 kernel once also summed whole 16-bit words; the
            // bound is kept so that the configurations accepted stay the
            // same (it is implied by the one above for every luma choice).
            let rgb565 = matches!(c.format, PixelFormat::Rgb565Le | PixelFormat::Rgb565Be);
            if rgb565 && win * 0xFFFF > u32::MAX as u64 {
                return Err(FrameError::WindowTooLarge);
            }
        }
        // The first-pixel lane of a window sums one field per pixel pair
        // (and odd last pixel) of each of its rows.
        let lanes = matches!(c.resize, Resize::Area)
            && c.roi.h.div_ceil(c.out_h) as u64 * c.roi.w.div_ceil(c.out_w).div_ceil(2) as u64
                <= LANE_FIELDS;
        Ok(FrameParams {
            cfg: c,
            weights,
            shift,
            bpp,
            frame_bytes,
            lanes,
        })
    }
}

/// The largest value of each field a format stores, in its own units.
const fn field_max(f: PixelFormat) -> [u32; 3] {
    match f {
        PixelFormat::Rgb565Le | PixelFormat::Rgb565Be => [31, 63, 31],
        PixelFormat::Rgb888 => [255, 255, 255],
        // Gray and YUYV: one field (weights[1], [2] are 0).
        PixelFormat::Gray8 | PixelFormat::Yuyv => [255, 0, 0],
    }
}

/// Fraction bits of a colour sample.
const Q: u32 = 10;

/// `round(num / den)` in integers.
const fn div_round(num: u64, den: u64) -> u32 {
    ((2 * num + den) / (2 * den)) as u32
}

/// Per-field weights and the fraction bits of the resulting sample.
///
/// Gray from colour: `coef · (255 / field_max) · 2^10`, so that a sample is
/// the luma of the 8-bit-scaled colour in Q10. RGB from RGB565: each field
/// scaled by `255 / field_max` in Q10. Plain 8-bit values keep shift 0.
const fn weights(f: PixelFormat, out_c: u32, luma: Luma) -> ([u32; 3], u32) {
    let m = field_max(f);
    match f {
        PixelFormat::Gray8 | PixelFormat::Yuyv => ([1, 0, 0], 0),
        PixelFormat::Rgb888 if out_c == 3 => ([1, 1, 1], 0),
        _ => {
            let coef = luma.coefficients();
            let mut w = [0u32; 3];
            let mut i = 0;
            while i < 3 {
                let (num, den) = if out_c == 1 {
                    ((coef[i] as u64 * 255) << Q, 10_000 * m[i] as u64)
                } else {
                    ((255u64) << Q, m[i] as u64)
                };
                w[i] = div_round(num, den);
                i += 1;
            }
            (w, Q)
        }
    }
}

/// A validated camera description: only [`FrameConfig::validate`] builds
/// one, so the kernel trusts its fields.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameParams {
    cfg: FrameConfig,
    weights: [u32; 3],
    shift: u32,
    bpp: u32,
    frame_bytes: u32,
    /// Area windows are small enough for RGB565's 16-bit lanes: at most
    /// [`LANE_FIELDS`] pixels in the first-pixel lane.
    lanes: bool,
}

impl FrameParams {
    /// The configuration it was validated from.
    pub const fn config(&self) -> FrameConfig {
        self.cfg
    }

    /// Bytes of one frame (`frame_w · frame_h · bytes_per_pixel`).
    pub const fn frame_bytes(&self) -> usize {
        self.frame_bytes as usize
    }

    /// Values written to the input (`out_h · out_w · out_c`).
    pub const fn input_len(&self) -> usize {
        (self.cfg.out_w * self.cfg.out_h * self.cfg.out_c) as usize
    }

    /// Fixed-point weights of the R, G, B fields (or of the one gray
    /// field) and their fraction bits: a sample is `Σ w·field / 2^shift`
    /// 8-bit codes.
    pub const fn weights(&self) -> ([u32; 3], u32) {
        (self.weights, self.shift)
    }
}

/// Converts one camera frame into the network's input: crop, resize,
/// rotate/mirror, colour conversion and quantization through `table` (the
/// model's pixel table, `256·out_c` entries,
/// `input[(y·out_w + x)·out_c + ch] = table[ch·256 + code]`) in one pass.
///
/// Fails with [`Error::BufferTooSmall`] (writing nothing) when `frame`,
/// `table` or `input` is shorter than the parameters need.
pub fn convert_frame(
    frame: &[u8],
    params: &FrameParams,
    table: &[i8],
    input: &mut [i8],
) -> Result<(), Error> {
    let c = params.cfg.out_c as usize;
    if frame.len() < params.frame_bytes()
        || input.len() < params.input_len()
        || table.len() < 256 * c
    {
        return Err(Error::BufferTooSmall);
    }
    let p = params;
    match (p.cfg.format, c) {
        (PixelFormat::Gray8, 1) => run::<Gray8>(frame, p, table, input),
        (PixelFormat::Gray8, _) => run::<Gray8Rgb>(frame, p, table, input),
        (PixelFormat::Yuyv, _) => run::<YuyvY>(frame, p, table, input),
        (PixelFormat::Rgb888, 1) => run::<Rgb888Gray>(frame, p, table, input),
        (PixelFormat::Rgb888, _) => run::<Rgb888Rgb>(frame, p, table, input),
        (PixelFormat::Rgb565Le, 1) => run::<Rgb565<false, 1>>(frame, p, table, input),
        (PixelFormat::Rgb565Le, _) => run::<Rgb565<false, 3>>(frame, p, table, input),
        (PixelFormat::Rgb565Be, 1) => run::<Rgb565<true, 1>>(frame, p, table, input),
        (PixelFormat::Rgb565Be, _) => run::<Rgb565<true, 3>>(frame, p, table, input),
    }
    Ok(())
}

/// One source pixel's bytes to sums, and sums to samples.
///
/// `add` adds the pixel's raw fields into `acc` (no weights), and `weigh`
/// turns the sums of a window (or of one pixel) into the `CH` samples, so
/// the luma weights are applied once per output pixel instead of once per
/// source pixel. Every weight is a plain integer factor, so
/// `weigh(Σ fields) = Σ weigh(fields)` exactly: the output bytes are those
/// of weighing every pixel. `px` is always `BPP` bytes long
/// (`chunks_exact`).
trait Sampler {
    const BPP: usize;
    const CH: usize;
    fn add(px: &[u8], acc: &mut [u32; 3]);
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3];
    /// True when [`Sampler::add_lanes`] sums a row faster than `add` on
    /// each pixel (for windows the parameters allow, see
    /// [`FrameParams`]'s `lanes`).
    const LANES: bool = false;
    /// Adds every pixel of `row` (whole pixels) into packed sums; `unlane`
    /// turns them into what `add` would have summed.
    #[inline(always)]
    fn add_lanes(row: &[u8], lanes: &mut [u32; 3]) {
        for px in row.chunks_exact(Self::BPP) {
            Self::add(px, lanes);
        }
    }
    /// `add_lanes` on two rows of the same length.
    #[inline(always)]
    fn add_lanes2(a: &[u8], b: &[u8], lanes: &mut [u32; 3]) {
        Self::add_lanes(a, lanes);
        Self::add_lanes(b, lanes);
    }
    /// The sums of `add` from the packed sums of `add_lanes`.
    #[inline(always)]
    fn unlane(lanes: [u32; 3]) -> [u32; 3] {
        lanes
    }
    /// `add_lanes` on the `rows` rows of one window: `len` bytes each,
    /// the first at `frame[start..]`, `stride` bytes apart.
    #[inline(always)]
    fn add_window(
        frame: &[u8],
        start: usize,
        stride: usize,
        len: usize,
        rows: u32,
        lanes: &mut [u32; 3],
    ) {
        window_rows::<Self>(frame, start, stride, len, rows, lanes);
    }
}

/// [`Sampler::add_window`] for any width: two rows per step with
/// `add_lanes2` (half the per-row overhead), then a last odd row.
#[inline(always)]
fn window_rows<S: Sampler + ?Sized>(
    frame: &[u8],
    mut start: usize,
    stride: usize,
    len: usize,
    rows: u32,
    lanes: &mut [u32; 3],
) {
    let mut left = rows;
    while left >= 2 {
        if let Some(two) = frame.get(start..start + stride + len) {
            if let (Some(a), Some(b)) = (two.get(..len), two.get(stride..)) {
                S::add_lanes2(a, b, lanes);
            }
        }
        start += 2 * stride;
        left -= 2;
    }
    if left == 1 {
        if let Some(row) = frame.get(start..start + len) {
            S::add_lanes(row, lanes);
        }
    }
}

/// The sums are the samples (8-bit channels, shift 0).
#[inline(always)]
fn unweighed(acc: [u32; 3], _: &[u32; 3]) -> [u32; 3] {
    acc
}

struct Gray8;
impl Sampler for Gray8 {
    const BPP: usize = 1;
    const CH: usize = 1;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        if let [g] = *px {
            acc[0] += g as u32;
        }
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3] {
        unweighed(acc, w)
    }
}

struct Gray8Rgb;
impl Sampler for Gray8Rgb {
    const BPP: usize = 1;
    const CH: usize = 3;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        if let [g] = *px {
            acc[0] += g as u32;
        }
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], _: &[u32; 3]) -> [u32; 3] {
        [acc[0], acc[0], acc[0]]
    }
}

/// YUYV to gray: the Y byte of this pixel. The kernel passes 2-byte
/// chunks, `Y U` for even and `Y V` for odd pixels, so Y is always first.
struct YuyvY;
impl Sampler for YuyvY {
    const BPP: usize = 2;
    const CH: usize = 1;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        if let [y, _] = *px {
            acc[0] += y as u32;
        }
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3] {
        unweighed(acc, w)
    }
}

struct Rgb888Gray;
impl Sampler for Rgb888Gray {
    const BPP: usize = 3;
    const CH: usize = 1;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        if let [r, g, b] = *px {
            acc[0] += r as u32;
            acc[1] += g as u32;
            acc[2] += b as u32;
        }
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3] {
        [acc[0] * w[0] + acc[1] * w[1] + acc[2] * w[2], 0, 0]
    }
}

struct Rgb888Rgb;
impl Sampler for Rgb888Rgb {
    const BPP: usize = 3;
    const CH: usize = 3;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        if let [r, g, b] = *px {
            acc[0] += r as u32;
            acc[1] += g as u32;
            acc[2] += b as u32;
        }
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3] {
        unweighed(acc, w)
    }
}

/// The RGB565 word of a 2-byte pixel.
#[inline(always)]
fn word565<const BE: bool>(px: &[u8]) -> u32 {
    match *px {
        [a, b] if BE => u16::from_be_bytes([a, b]) as u32,
        [a, b] => u16::from_le_bytes([a, b]) as u32,
        _ => 0,
    }
}

/// RGB565 sums of one pixel: `acc = [Σ R, Σ G, Σ B]` in the fields' own
/// units (5, 6, 5 bits).
#[inline(always)]
fn add565<const BE: bool>(px: &[u8], acc: &mut [u32; 3]) {
    let v = word565::<BE>(px);
    acc[0] += v >> 11;
    acc[1] += (v >> 5) & 63;
    acc[2] += v & 31;
}

/// Mask of a 5-bit field in both 16-bit halves of a word.
const LANES5: u32 = 0x001F_001F;
/// Mask of a 6-bit field in both halves.
const LANES6: u32 = 0x003F_003F;
/// Most fields a 16-bit lane may sum: `1024 · 63 < 2^16`.
const LANE_FIELDS: u64 = 1024;

/// Two RGB565 pixels (4 bytes) as one word exactly as stored, the first
/// pixel's bytes in the low half: one load on Thumb-2. Big-endian pixels
/// are not swapped; [`lanes565`] reads their fields where they lie.
#[inline(always)]
fn pair565(q: &[u8]) -> u32 {
    let Ok(q) = <&[u8; 4]>::try_from(q) else {
        return 0;
    };
    u32::from_le_bytes(*q)
}

/// One RGB565 pixel's two bytes as stored, in the low half of a word (a
/// lane word whose second pixel is missing); see [`pair565`].
#[inline(always)]
fn half565(px: &[u8]) -> u32 {
    match *px {
        [a, b] => u16::from_le_bytes([a, b]) as u32,
        _ => 0,
    }
}

/// The R, G and B fields of both pixels of a lane word (two pixels as
/// stored, [`pair565`]) added into the lanes `[R, G, B]`, each
/// `Σ first-pixel field + 2^16 · Σ second-pixel field`, with one shift-and-
/// mask and one add per field.
///
/// Big-endian halves hold `RRRRRGGG` in their low byte and `GGGBBBBB` in
/// their high byte: R is bits 3–7 and B bits 8–12 of a half, and G is
/// split into its high three bits (bits 0–2) and low three (bits 13–15).
/// Rotating the word right by 13 brings the low three G bits of each half
/// to bits 0–2 of the same half and the high three G bits of the *other*
/// half to bits 3–5: one mask gives, per lane, the low three G bits of
/// this pixel plus 8 × the high three G bits of the other pixel (at most
/// 63, like a G field). The two lanes then hold
/// the G values of the pixels mixed, but [`unlane565`] adds the two
/// lanes, so `Σ G` is the same integer; no swap of bytes is needed.
#[inline(always)]
fn lanes565<const BE: bool>(w: u32, lanes: &mut [u32; 3]) {
    if BE {
        lanes[0] += (w >> 3) & LANES5;
        lanes[1] += w.rotate_right(13) & LANES6;
        lanes[2] += (w >> 8) & LANES5;
    } else {
        lanes[0] += (w >> 11) & LANES5;
        lanes[1] += (w >> 5) & LANES6;
        lanes[2] += w & LANES5;
    }
}

/// [`add565`] over a window row, two pixels per step: the word of a pixel
/// pair is split into its R, G and B fields with one mask each, and the
/// fields of both pixels are summed at once in the two 16-bit halves of a
/// `u32` (SIMD within a register), [`lanes565`]. The window's lanes are
/// added up once, by [`unlane565`]; [`FrameConfig::validate`] allows this
/// only for windows whose lanes hold at most [`LANE_FIELDS`] fields, so no
/// lane carries into the next. The sums are the same integers as
/// `add565`'s.
#[inline(always)]
fn add_lanes565<const BE: bool>(row: &[u8], lanes: &mut [u32; 3]) {
    let mut pairs = row.chunks_exact(4);
    for q in &mut pairs {
        // Rolled, the loop keeps its lanes in registers.
        crate::dot::no_unroll();
        lanes565::<BE>(pair565(q), lanes);
    }
    // An odd pixel at the end goes into the low half.
    lanes565::<BE>(half565(pairs.remainder()), lanes);
}

/// [`add_lanes565`] on two rows of one window at once: one loop, and the
/// odd last pixels of both rows in one word (row `a`'s in the low half,
/// `b`'s in the high half), so each lane still sums at most one field per
/// pixel pair and odd pixel of each row.
#[inline(always)]
fn add_lanes2_565<const BE: bool>(a: &[u8], b: &[u8], lanes: &mut [u32; 3]) {
    for (qa, qb) in a.chunks_exact(4).zip(b.chunks_exact(4)) {
        crate::dot::no_unroll();
        lanes565::<BE>(pair565(qa), lanes);
        lanes565::<BE>(pair565(qb), lanes);
    }
    let w = half565(a.chunks_exact(4).remainder()) | (half565(b.chunks_exact(4).remainder()) << 16);
    lanes565::<BE>(w, lanes);
}

/// [`add_lanes2_565`] for rows of exactly `B` bytes (`b` is `None` for a
/// last odd row): `B` is a constant, so the pairs are unrolled and the
/// rows need no loop and no chunk setup. The odd last pixels come from a
/// 32-bit load of the row's last four bytes, not a 16-bit one, to pack
/// both rows' into one word cheaply.
#[inline(always)]
fn add_fixed2_565<const BE: bool, const B: usize>(
    a: &[u8; B],
    b: Option<&[u8; B]>,
    lanes: &mut [u32; 3],
) {
    let mut i = 0;
    while i + 4 <= B {
        let wa = pair565(a.get(i..i + 4).unwrap_or(&[]));
        lanes565::<BE>(wa, lanes);
        if let Some(b) = b {
            let wb = pair565(b.get(i..i + 4).unwrap_or(&[]));
            lanes565::<BE>(wb, lanes);
        }
        i += 4;
    }
    if B == 2 {
        let mut w = half565(a);
        if let Some(b) = b {
            w |= half565(b) << 16;
        }
        lanes565::<BE>(w, lanes);
    } else if B % 4 == 2 {
        // The odd last pixels are the high halves of the rows' last four
        // bytes: row `a`'s moves to the low half, `b`'s stays high.
        let wa = pair565(a.get(B - 4..).unwrap_or(&[]));
        let mut w = wa >> 16;
        if let Some(b) = b {
            w |= pair565(b.get(B - 4..).unwrap_or(&[])) & 0xFFFF_0000;
        }
        lanes565::<BE>(w, lanes);
    }
}

/// `B` bytes of `frame` from `at`, if there are that many.
#[inline(always)]
fn row_at<const B: usize>(frame: &[u8], at: usize) -> Option<&[u8; B]> {
    frame.get(at..)?.first_chunk::<B>()
}

/// [`Sampler::add_window`] for RGB565 windows `B` bytes wide: two rows
/// per step, each row straight-line code ([`add_fixed2_565`]).
#[inline(always)]
fn window565<const BE: bool, const B: usize>(
    frame: &[u8],
    mut start: usize,
    stride: usize,
    rows: u32,
    lanes: &mut [u32; 3],
) {
    let mut left = rows;
    while left >= 2 {
        if let Some(two) = frame.get(start..start + stride + B) {
            if let (Some(a), Some(b)) = (two.first_chunk::<B>(), two.last_chunk::<B>()) {
                add_fixed2_565::<BE, B>(a, Some(b), lanes);
            }
        }
        start += 2 * stride;
        left -= 2;
    }
    if left == 1 {
        if let Some(a) = row_at::<B>(frame, start) {
            add_fixed2_565::<BE, B>(a, None, lanes);
        }
    }
}

/// [`Sampler::add_window`] for RGB565: windows of at most 8 pixels
/// (16 bytes) a row by [`window565`] of that width (one jump per
/// window), wider ones by [`window_rows`].
#[inline(always)]
fn add_window565<S: Sampler, const BE: bool>(
    frame: &[u8],
    start: usize,
    stride: usize,
    len: usize,
    rows: u32,
    lanes: &mut [u32; 3],
) {
    match len {
        2 => window565::<BE, 2>(frame, start, stride, rows, lanes),
        4 => window565::<BE, 4>(frame, start, stride, rows, lanes),
        6 => window565::<BE, 6>(frame, start, stride, rows, lanes),
        8 => window565::<BE, 8>(frame, start, stride, rows, lanes),
        10 => window565::<BE, 10>(frame, start, stride, rows, lanes),
        12 => window565::<BE, 12>(frame, start, stride, rows, lanes),
        14 => window565::<BE, 14>(frame, start, stride, rows, lanes),
        16 => window565::<BE, 16>(frame, start, stride, rows, lanes),
        _ => window_rows::<S>(frame, start, stride, len, rows, lanes),
    }
}

/// `[Σ R, Σ G, Σ B]` from [`add_lanes565`]'s lanes.
#[inline(always)]
fn unlane565(lanes: [u32; 3]) -> [u32; 3] {
    lanes.map(|l| (l & 0xFFFF) + (l >> 16))
}

/// RGB565 pixels, big-endian when `BE`, into `CH` channels: 1 (gray, the
/// three fields weighed into one sum) or 3.
struct Rgb565<const BE: bool, const CH: usize>;
impl<const BE: bool, const CH: usize> Sampler for Rgb565<BE, CH> {
    const BPP: usize = 2;
    const CH: usize = CH;
    #[inline(always)]
    fn add(px: &[u8], acc: &mut [u32; 3]) {
        add565::<BE>(px, acc);
    }
    const LANES: bool = true;
    #[inline(always)]
    fn add_lanes(row: &[u8], lanes: &mut [u32; 3]) {
        add_lanes565::<BE>(row, lanes);
    }
    #[inline(always)]
    fn add_lanes2(a: &[u8], b: &[u8], lanes: &mut [u32; 3]) {
        add_lanes2_565::<BE>(a, b, lanes);
    }
    #[inline(always)]
    fn unlane(lanes: [u32; 3]) -> [u32; 3] {
        unlane565(lanes)
    }
    #[inline(always)]
    fn add_window(
        frame: &[u8],
        start: usize,
        stride: usize,
        len: usize,
        rows: u32,
        lanes: &mut [u32; 3],
    ) {
        add_window565::<Self, BE>(frame, start, stride, len, rows, lanes);
    }
    #[inline(always)]
    fn weigh(acc: [u32; 3], w: &[u32; 3]) -> [u32; 3] {
        let [r, g, b] = acc;
        if CH == 1 {
            [r * w[0] + g * w[1] + b * w[2], 0, 0]
        } else {
            [r * w[0], g * w[1], b * w[2]]
        }
    }
}

/// Where resized pixel `(ry, rx)` goes in the input, after rotation and
/// mirroring.
#[inline(always)]
fn dst_index(p: &FrameParams, ry: u32, rx: u32) -> usize {
    let (ow, oh) = (p.cfg.out_w, p.cfg.out_h);
    let flip_y = p.cfg.rotate180;
    let flip_x = p.cfg.rotate180 != p.cfg.mirror;
    let y = if flip_y { oh - 1 - ry } else { ry };
    let x = if flip_x { ow - 1 - rx } else { rx };
    ((y * ow + x) * p.cfg.out_c) as usize
}

/// Writes one output pixel: `code = min(255, value)` through the table.
#[inline(always)]
fn put<const CH: usize>(input: &mut [i8], table: &[i8], at: usize, codes: [u32; 3]) {
    let mut k = 0;
    while k < CH {
        let code = if codes[k] > 255 { 255 } else { codes[k] } as usize;
        if let (Some(d), Some(&t)) = (input.get_mut(at + k), table.get(k * 256 + code)) {
            *d = t;
        }
        k += 1;
    }
}

fn run<S: Sampler>(frame: &[u8], p: &FrameParams, table: &[i8], input: &mut [i8]) {
    match p.cfg.resize {
        Resize::Area if S::LANES && p.lanes => area::<S, true>(frame, p, table, input),
        Resize::Area => area::<S, false>(frame, p, table, input),
        Resize::Bilinear => bilinear::<S>(frame, p, table, input),
        Resize::Nearest => nearest::<S>(frame, p, table, input),
    }
}

/// The samples of source pixel `(x, y)` (frame coordinates).
#[inline(always)]
fn sample<S: Sampler>(frame: &[u8], p: &FrameParams, x: u32, y: u32) -> [u32; 3] {
    let mut acc = [0u32; 3];
    let at = (y as usize * p.cfg.frame_w as usize + x as usize) * S::BPP;
    if let Some(px) = frame.get(at..at + S::BPP) {
        S::add(px, &mut acc);
    }
    S::weigh(acc, &p.weights)
}

/// Area averaging; `LANES`: sum rows with [`Sampler::add_lanes`].
fn area<S: Sampler, const LANES: bool>(
    frame: &[u8],
    p: &FrameParams,
    table: &[i8],
    input: &mut [i8],
) {
    let cfg = &p.cfg;
    let (rw, rh, ow, oh) = (cfg.roi.w, cfg.roi.h, cfg.out_w, cfg.out_h);
    let fw = cfg.frame_w as usize;
    // Window edges ⌊o·r/out⌋ by exact stepping (no division per pixel).
    let (qx, rx) = (rw / ow, rw % ow);
    let (qy, ry) = (rh / oh, rh % oh);
    let half = (1u32 << p.shift) >> 1;
    let mut y0 = cfg.roi.y;
    let mut ey = 0;
    for oy in 0..oh {
        let mut y1 = y0 + qy;
        ey += ry;
        if ey >= oh {
            ey -= oh;
            y1 += 1;
        }
        let mut x0 = cfg.roi.x;
        let mut ex = 0;
        // The window's first byte and its output position, stepped along
        // the row (the output moves by ±out_c, mirrored or not).
        let mut wstart = (y0 as usize * fw + x0 as usize) * S::BPP;
        let mut at = dst_index(p, oy, 0);
        let step = if ow > 1 {
            dst_index(p, oy, 1).wrapping_sub(at)
        } else {
            0
        };
        for _ in 0..ow {
            let mut x1 = x0 + qx;
            ex += rx;
            if ex >= ow {
                ex -= ow;
                x1 += 1;
            }
            let mut acc = [0u32; 3];
            let mut start = wstart;
            let len = (x1 - x0) as usize * S::BPP;
            let stride = fw * S::BPP;
            if LANES {
                S::add_window(frame, start, stride, len, y1 - y0, &mut acc);
                acc = S::unlane(acc);
            } else {
                for _ in y0..y1 {
                    if let Some(row) = frame.get(start..start + len) {
                        for px in row.chunks_exact(S::BPP) {
                            S::add(px, &mut acc);
                        }
                    }
                    start += stride;
                }
            }
            let count = (x1 - x0) * (y1 - y0);
            let acc = S::weigh(acc, &p.weights);
            let mut codes = [0u32; 3];
            if let Some(den) = NonZeroU32::new(count << p.shift) {
                let round = count * half;
                let mut k = 0;
                while k < S::CH {
                    codes[k] = (acc[k] + round) / den;
                    k += 1;
                }
            }
            write::<S>(input, table, at, codes);
            at = at.wrapping_add(step);
            wstart += len;
            x0 = x1;
        }
        y0 = y1;
    }
}

/// Fraction bits of a bilinear source position and weight.
const POS_BITS: u32 = 12;

/// Bilinear source position of output `o` in 1/2^[`POS_BITS`] pixel,
/// clamped: `(i0, i1, frac)`.
#[inline(always)]
fn bilinear_pos(o: u32, r: u32, out: u32) -> (u32, u32, u32) {
    // (o + ½)·r/out − ½ in 1/4096 pixel, rounded to nearest: the position
    // error (at most 1/8192 pixel) moves a result by less than 0.04 code.
    let half = 1u64 << (POS_BITS - 1);
    let num = (2 * o as u64 + 1) * r as u64 * half;
    let pos = ((num + out as u64 / 2) / out as u64) as i64 - half as i64;
    let max = (r as i64 - 1) << POS_BITS;
    let pos = if pos < 0 {
        0
    } else if pos > max {
        max
    } else {
        pos
    } as u32;
    let i0 = pos >> POS_BITS;
    let i1 = if i0 + 1 < r { i0 + 1 } else { i0 };
    (i0, i1, pos & ((1 << POS_BITS) - 1))
}

fn bilinear<S: Sampler>(frame: &[u8], p: &FrameParams, table: &[i8], input: &mut [i8]) {
    let cfg = &p.cfg;
    let (ox0, oy0) = (cfg.roi.x, cfg.roi.y);
    // Samples to Q8 (< 2^16) so that two Q12 weights keep the sums inside
    // u32.
    let to_q8 = |s: u32| {
        if p.shift >= 8 {
            s >> (p.shift - 8)
        } else {
            s << (8 - p.shift)
        }
    };
    for oy in 0..cfg.out_h {
        let (y0, y1, fy) = bilinear_pos(oy, cfg.roi.h, cfg.out_h);
        for ox in 0..cfg.out_w {
            let (x0, x1, fx) = bilinear_pos(ox, cfg.roi.w, cfg.out_w);
            let s00 = sample::<S>(frame, p, ox0 + x0, oy0 + y0);
            let s01 = sample::<S>(frame, p, ox0 + x1, oy0 + y0);
            let s10 = sample::<S>(frame, p, ox0 + x0, oy0 + y1);
            let s11 = sample::<S>(frame, p, ox0 + x1, oy0 + y1);
            let mut codes = [0u32; 3];
            let mut k = 0;
            while k < S::CH {
                let one = 1 << POS_BITS;
                let top = to_q8(s00[k]) * (one - fx) + to_q8(s01[k]) * fx;
                let bot = to_q8(s10[k]) * (one - fx) + to_q8(s11[k]) * fx;
                // top, bot < 2^28 (Q20): back to Q8 before the second
                // weight so the sum stays inside u32 with room to round.
                let v = (top >> POS_BITS) * (one - fy) + (bot >> POS_BITS) * fy;
                codes[k] = (v + (1 << (POS_BITS + 7))) >> (POS_BITS + 8);
                k += 1;
            }
            write::<S>(input, table, dst_index(p, oy, ox), codes);
        }
    }
}

fn nearest<S: Sampler>(frame: &[u8], p: &FrameParams, table: &[i8], input: &mut [i8]) {
    let cfg = &p.cfg;
    let half = (1u32 << p.shift) >> 1;
    let pick = |o: u32, r: u32, out: u32| ((2 * o as u64 + 1) * r as u64 / (2 * out as u64)) as u32;
    for oy in 0..cfg.out_h {
        let y = cfg.roi.y + pick(oy, cfg.roi.h, cfg.out_h);
        for ox in 0..cfg.out_w {
            let x = cfg.roi.x + pick(ox, cfg.roi.w, cfg.out_w);
            let s = sample::<S>(frame, p, x, y);
            let mut codes = [0u32; 3];
            let mut k = 0;
            while k < S::CH {
                codes[k] = (s[k] + half) >> p.shift;
                k += 1;
            }
            write::<S>(input, table, dst_index(p, oy, ox), codes);
        }
    }
}

/// Writes the `S::CH` codes of one output pixel.
#[inline(always)]
fn write<S: Sampler>(input: &mut [i8], table: &[i8], at: usize, codes: [u32; 3]) {
    if S::CH == 1 {
        put::<1>(input, table, at, codes);
    } else {
        put::<3>(input, table, at, codes);
    }
}
