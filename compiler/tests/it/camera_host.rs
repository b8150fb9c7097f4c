//! The camera path on the host (`calibrate::frames`, what `calibrate` and
//! `check` measure) against the device's kernel (`ingot_rt::convert_frame`,
//! what the generated `frame_to_input` calls), byte for byte, on random
//! frames and cameras; and pictures placed in a frame come back whole and
//! upright through the region of interest.
//!
//! The generated `frame_to_input` itself is compared with the host kernel
//! when compiled for the host in `codegen_camera.rs`; `convert_frame` on
//! emulated Cortex-M0+ and M4 cores in `frame_emulated.rs`.

use ingot_compiler::calibrate::frames::{self, CameraPath};
use ingot_compiler::camera::{Camera, Format, LumaWeights, ResizeMethod};
use proptest::prelude::*;

const FORMATS: [Format; 5] = [
    Format::Gray8,
    Format::Rgb565le,
    Format::Rgb565be,
    Format::Rgb888,
    Format::Yuyv,
];
const RESIZES: [ResizeMethod; 3] = [
    ResizeMethod::Area,
    ResizeMethod::Bilinear,
    ResizeMethod::Nearest,
];

/// A random camera and input that validate: `(camera, out_w, out_h, out_c)`.
fn camera() -> impl Strategy<Value = (Camera, u32, u32, u32)> {
    (
        0..FORMATS.len(),
        1u32..24,
        1u32..20,
        0..RESIZES.len(),
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
        any::<[u32; 6]>(),
    )
        .prop_map(|(f, w, h, r, rot, mir, bt709, rgb, k)| {
            let format = FORMATS[f];
            // YUYV frames have an even width.
            let w = if format == Format::Yuyv { 2 * w } else { w };
            let mut cam = Camera::new(format, w, h);
            cam.resize = RESIZES[r];
            cam.rotate = if rot { 180 } else { 0 };
            cam.mirror = mir;
            cam.luma = if bt709 {
                LumaWeights::Bt709
            } else {
                LumaWeights::Bt601
            };
            // A region inside the frame.
            let (rx, ry) = (k[0] % w, k[1] % h);
            let (rw, rh) = (1 + k[2] % (w - rx), 1 + k[3] % (h - ry));
            cam.roi = Some([rx, ry, rw, rh]);
            // Area only shrinks; the others may enlarge.
            let (ow, oh) = if cam.resize == ResizeMethod::Area {
                (1 + k[4] % rw, 1 + k[5] % rh)
            } else {
                (1 + k[4] % 16, 1 + k[5] % 16)
            };
            let oc = if rgb && format != Format::Yuyv { 3 } else { 1 };
            (cam, ow, oh, oc)
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]

    /// The host path's 8-bit samples, quantized through the model's pixel
    /// table (what the int8 path of `check` does), are the codes the
    /// device kernel writes with that table.
    #[test]
    fn host_samples_through_the_table_are_the_device_codes(
        (cam, ow, oh, oc) in camera(),
        seed in any::<u64>(),
    ) {
        let params = cam.params(ow, oh, oc).unwrap();
        let path = CameraPath { camera: cam, params };
        let mut s = seed | 1;
        let mut next = || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 56) as u8
        };
        let frame: Vec<u8> = (0..path.frame_bytes()).map(|_| next()).collect();
        let table: Vec<i8> = (0..256 * oc as usize).map(|_| next() as i8).collect();
        let samples = path.samples(&frame);
        prop_assert_eq!(samples.len(), params.input_len());
        let host: Vec<i8> = samples
            .iter()
            .enumerate()
            .map(|(i, &v)| table[(i % oc as usize) * 256 + v as usize])
            .collect();
        let mut device = vec![0i8; params.input_len()];
        ingot_rt::convert_frame(&frame, &params, &table, &mut device).unwrap();
        prop_assert_eq!(host, device);
    }

    /// A picture of the region's size placed in the frame comes back byte
    /// for byte through a 1:1 nearest resize, whatever the region, the
    /// rotation and the mirroring (RGB888 keeps the bytes exactly).
    #[test]
    fn placed_pictures_come_back_upright(
        (cam, _, _, _) in camera(),
        seed in any::<u8>(),
    ) {
        let mut cam = cam;
        cam.format = Format::Rgb888;
        cam.resize = ResizeMethod::Nearest;
        let [_, _, rw, rh] = cam.roi.unwrap();
        let params = cam.params(rw, rh, 3).unwrap();
        let path = CameraPath { camera: cam, params };
        let pic: Vec<u8> = (0..(rw * rh * 3) as usize)
            .map(|i| (i as u8).wrapping_mul(31).wrapping_add(seed))
            .collect();
        let frame = frames::place_picture(&params, &pic);
        prop_assert_eq!(path.samples(&frame), pic);
    }
}
