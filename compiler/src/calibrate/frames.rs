//! The camera path on the host: pictures and raw frame dumps become the
//! 8-bit samples the device computes from a camera frame.
//!
//! With a camera configured (`[camera]` of the target, `--camera-*`
//! options, [`ImageSet::with_camera`](super::ImageSet::with_camera)):
//! 1. a picture (PNG, JPEG, ...) is decoded to 8-bit RGB and placed in a
//!    synthetic frame of the camera's size so that the region of interest
//!    covers the whole picture ([`place_picture`]): the picture is
//!    stretched to the region's `w × h` by the image crate's
//!    [`Triangle`](image::imageops::FilterType::Triangle) filter (standing
//!    in for the optics and sensor), turned the way the sensor is mounted
//!    (the device's 180° rotation and mirroring undone, so `convert_frame`
//!    puts it back upright), and the rest of the frame repeats the
//!    picture's nearest edge pixel. The device thus sees the whole
//!    picture, upright, at the region's resolution, as a camera aimed at
//!    the part would deliver it; nothing of it is cropped or squashed by
//!    the region;
//! 2. the RGB frame is encoded in the camera's pixel format
//!    ([`encode_frame`]): `rgb565` keeps the top 5/6/5 bits of R/G/B
//!    (truncation, common practice for sensor output), `gray8` is the luma
//!    of the camera's weights (ITU-R BT.601 or BT.709, rounded), `yuyv`
//!    is full-range Y'CbCr of ITU-T T.81/T.871 (JFIF), chroma averaged
//!    over each pixel pair; so RGB565's lost bits are part of what is
//!    measured;
//! 3. a raw frame dump (`.raw` or `.bin`) must hold exactly the frame's
//!    bytes and is taken as it is;
//! 4. the frame goes through [`ingot_rt::convert_frame`], the very kernel
//!    the generated `frame_to_input` calls, with a table that maps each
//!    8-bit sample to itself (offset by 128 to fit `i8`). The result is the
//!    device's 8-bit samples before quantization: the float reference sees
//!    them through the input's preprocessing and the int8 path through the
//!    model's pixel table, which gives the same codes as `frame_to_input`
//!    (its table is that pixel table). Both paths thus start from the same
//!    samples, so float-vs-int8 comparisons stay fair.

use crate::camera::{Camera, Format, LumaWeights};
use ingot_rt::FrameParams;

/// File-name extensions read as raw camera frames (compared
/// case-insensitively), only when a camera is configured.
pub const FRAME_EXTENSIONS: &[&str] = &["raw", "bin"];

/// A camera validated against one network input.
#[derive(Debug, Clone)]
pub struct CameraPath {
    /// The description.
    pub camera: Camera,
    /// The kernel's parameters.
    pub params: FrameParams,
}

impl CameraPath {
    /// Bytes of one frame.
    pub fn frame_bytes(&self) -> usize {
        self.params.frame_bytes()
    }

    /// A frame's 8-bit samples (HWC, the input's size and channels),
    /// computed by [`ingot_rt::convert_frame`]. `frame` must hold
    /// [`CameraPath::frame_bytes`] bytes.
    pub fn samples(&self, frame: &[u8]) -> Vec<u8> {
        let c = self.params.config().out_c as usize;
        // Sample p becomes code p - 128, and back below: the identity.
        let table: Vec<i8> = (0..256 * c)
            .map(|i| ((i % 256) as i32 - 128) as i8)
            .collect();
        let mut codes = vec![0i8; self.params.input_len()];
        match ingot_rt::convert_frame(frame, &self.params, &table, &mut codes) {
            Ok(()) => codes.iter().map(|&v| (v as i32 + 128) as u8).collect(),
            // Only a short frame fails; callers check the size first.
            Err(_) => vec![0; self.params.input_len()],
        }
    }
}

/// The synthetic 8-bit RGB frame (`frame_w · frame_h · 3` bytes,
/// row-major) for a picture already stretched to the region of interest
/// (`roi`: `roi.w · roi.h · 3` bytes).
///
/// The device resizes the region, then rotates by 180° (flips both axes)
/// and then mirrors (flips x); those are flips, each its own inverse, and
/// flips commute, so applying the same flips to the picture before placing
/// it makes the device's output upright. Frame pixels outside the region
/// take the nearest region pixel (edge replication), so a resize that reads
/// a little past the region (none of ingot's does) would still see the
/// picture's own colours.
pub fn place_picture(params: &FrameParams, roi: &[u8]) -> Vec<u8> {
    let c = params.config();
    let (fw, fh) = (c.frame_w as usize, c.frame_h as usize);
    let (rx, ry, rw, rh) = (
        c.roi.x as usize,
        c.roi.y as usize,
        c.roi.w as usize,
        c.roi.h as usize,
    );
    let flip_y = c.rotate180;
    let flip_x = c.rotate180 != c.mirror;
    let mut out = vec![0u8; fw * fh * 3];
    if rw == 0 || rh == 0 || roi.len() < rw * rh * 3 {
        return out;
    }
    for y in 0..fh {
        // Region row this frame row shows, clamped to the region's edge.
        let v = y.clamp(ry, ry + rh - 1) - ry;
        let sy = if flip_y { rh - 1 - v } else { v };
        for x in 0..fw {
            let u = x.clamp(rx, rx + rw - 1) - rx;
            let sx = if flip_x { rw - 1 - u } else { u };
            let s = (sy * rw + sx) * 3;
            let d = (y * fw + x) * 3;
            out[d..d + 3].copy_from_slice(&roi[s..s + 3]);
        }
    }
    out
}

/// An 8-bit RGB frame (`width · height · 3` bytes, row-major) in the
/// camera's pixel format.
pub fn encode_frame(cam: &Camera, rgb: &[u8]) -> Vec<u8> {
    let px = rgb.chunks_exact(3);
    match cam.format {
        Format::Rgb888 => rgb.to_vec(),
        Format::Gray8 => px.map(|p| luma(cam.luma, p)).collect(),
        Format::Rgb565le | Format::Rgb565be => px
            .flat_map(|p| {
                let v = ((p[0] as u16 >> 3) << 11) | ((p[1] as u16 >> 2) << 5) | (p[2] as u16 >> 3);
                if cam.format == Format::Rgb565le {
                    v.to_le_bytes()
                } else {
                    v.to_be_bytes()
                }
            })
            .collect(),
        Format::Yuyv => {
            let mut out = Vec::with_capacity(rgb.len() / 3 * 2);
            // The frame width is even (validated), so pairs never straddle
            // rows.
            for pair in rgb.chunks_exact(6) {
                let (a, b) = (&pair[..3], &pair[3..]);
                let f = |p: &[u8]| [p[0] as f64, p[1] as f64, p[2] as f64];
                let (pa, pb) = (f(a), f(b));
                let m = [
                    (pa[0] + pb[0]) / 2.0,
                    (pa[1] + pb[1]) / 2.0,
                    (pa[2] + pb[2]) / 2.0,
                ];
                // ITU-T T.871 (JFIF) full-range conversion.
                let y = |p: [f64; 3]| clamp8(0.299 * p[0] + 0.587 * p[1] + 0.114 * p[2]);
                let u = clamp8(128.0 - 0.168_736 * m[0] - 0.331_264 * m[1] + 0.5 * m[2]);
                let v = clamp8(128.0 + 0.5 * m[0] - 0.418_688 * m[1] - 0.081_312 * m[2]);
                out.extend_from_slice(&[y(pa), u, y(pb), v]);
            }
            out
        }
    }
}

fn clamp8(v: f64) -> u8 {
    v.round().clamp(0.0, 255.0) as u8
}

fn luma(w: LumaWeights, p: &[u8]) -> u8 {
    let [r, g, b] = [p[0] as f64, p[1] as f64, p[2] as f64];
    clamp8(match w {
        // ITU-R BT.601 and BT.709 luma coefficients.
        LumaWeights::Bt601 => 0.299 * r + 0.587 * g + 0.114 * b,
        LumaWeights::Bt709 => 0.2126 * r + 0.7152 * g + 0.0722 * b,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encodings_on_hand_worked_pixels() {
        let mut cam = Camera::new(Format::Rgb565le, 2, 1);
        // RGB565 bit fields (R 15..11, G 10..5, B 4..0; common practice):
        // (255, 128, 8) -> R 11111, G 100000, B 00001
        // = 1111_1100_0000_0001 = 0xFC01.
        let rgb = [255, 128, 8, 0, 0, 0];
        assert_eq!(encode_frame(&cam, &rgb), [0x01, 0xFC, 0, 0]);
        cam.format = Format::Rgb565be;
        assert_eq!(encode_frame(&cam, &rgb), [0xFC, 0x01, 0, 0]);
        cam.format = Format::Gray8;
        // BT.601: 0.299·255 + 0.587·128 + 0.114·8 = 152.35.
        assert_eq!(encode_frame(&cam, &rgb), [152, 0]);
        cam.format = Format::Yuyv;
        // T.871: white and black share U = V = 128 (gray has no chroma).
        assert_eq!(
            encode_frame(&cam, &[255, 255, 255, 0, 0, 0]),
            [255, 128, 0, 128]
        );
    }

    #[test]
    fn the_region_shows_the_whole_picture_upright() {
        // A 5x4 RGB picture of distinct pixels; the region (2, 1, 5, 4) of
        // a 9x7 RGB888 frame, resized 1:1 with nearest, must give the
        // picture back byte for byte whatever the mounting, because
        // place_picture undoes what convert_frame does.
        let pic: Vec<u8> = (0..5 * 4 * 3).map(|i| (i * 7 + 3) as u8).collect();
        for (rotate, mirror) in [(0, false), (180, false), (0, true), (180, true)] {
            let mut cam = Camera::new(Format::Rgb888, 9, 7);
            cam.roi = Some([2, 1, 5, 4]);
            cam.resize = crate::camera::ResizeMethod::Nearest;
            cam.rotate = rotate;
            cam.mirror = mirror;
            let path = CameraPath {
                params: cam.params(5, 4, 3).unwrap(),
                camera: cam,
            };
            let frame = place_picture(&path.params, &pic);
            assert_eq!(frame.len(), 9 * 7 * 3);
            assert_eq!(path.samples(&frame), pic, "rotate {rotate} mirror {mirror}");
            // Outside the region: the nearest region pixel, as placed
            // (frame corner (0, 0) repeats region corner (2, 1)).
            assert_eq!(frame[..3], frame[(9 + 2) * 3..(9 + 2) * 3 + 3]);
        }
    }
}
