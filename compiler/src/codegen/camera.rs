//! The camera part of a generated module: `FRAME`, `FRAME_WIDTH`,
//! `FRAME_HEIGHT`, `FRAME_BYTES` and `frame_to_input`, emitted only when a
//! camera is configured (so modules without one are unchanged).

use super::CodegenError;
use crate::camera::{Camera, Format, LumaWeights, ResizeMethod};
use crate::lower::QGraph;
use proc_macro2::{Literal, TokenStream};
use quote::quote;

/// Validates `cam` against the input of `q` (the same `const fn` the
/// module evaluates at compile time).
pub fn params(q: &QGraph, cam: &Camera) -> Result<ingot_rt::FrameParams, CodegenError> {
    let s = q.map(q.input).shape;
    let n = |v: usize| u32::try_from(v).unwrap_or(u32::MAX);
    Ok(cam.params(n(s.w), n(s.h), n(s.c))?)
}

/// The camera items of the module.
pub fn tokens(q: &QGraph, cam: &Camera) -> Result<TokenStream, CodegenError> {
    let p = params(q, cam)?;
    let c = p.config();
    let u = Literal::u32_unsuffixed;
    let (fw, fh, ow, oh, oc) = (
        u(c.frame_w),
        u(c.frame_h),
        u(c.out_w),
        u(c.out_h),
        u(c.out_c),
    );
    let (rx, ry, rw, rh) = (u(c.roi.x), u(c.roi.y), u(c.roi.w), u(c.roi.h));
    let fwu = Literal::usize_unsuffixed(c.frame_w as usize);
    let fhu = Literal::usize_unsuffixed(c.frame_h as usize);
    let format = match cam.format {
        Format::Gray8 => quote!(Gray8),
        Format::Rgb565le => quote!(Rgb565Le),
        Format::Rgb565be => quote!(Rgb565Be),
        Format::Rgb888 => quote!(Rgb888),
        Format::Yuyv => quote!(Yuyv),
    };
    let resize = match cam.resize {
        ResizeMethod::Area => quote!(Area),
        ResizeMethod::Bilinear => quote!(Bilinear),
        ResizeMethod::Nearest => quote!(Nearest),
    };
    let luma = match cam.luma {
        LumaWeights::Bt601 => quote!(Bt601),
        LumaWeights::Bt709 => quote!(Bt709),
    };
    let (rot, mir) = (c.rotate180, c.mirror);
    let gray = match (cam.format, c.out_c) {
        (Format::Yuyv, _) => "gray is the Y byte of each pixel".to_string(),
        (Format::Gray8, _) => "gray bytes are used as they are".to_string(),
        (_, 1) => format!(
            "gray from colour by the ITU-R {} luma weights",
            match cam.luma {
                LumaWeights::Bt601 => "BT.601",
                LumaWeights::Bt709 => "BT.709",
            }
        ),
        _ => "RGB channels (RGB565 fields scaled to 8 bits)".to_string(),
    };
    let about = format!(
        " The camera this module was built for: {} frames of {}x{}, region x={} y={} w={} h={} resized to {}x{} by {}{}{}; {gray}.",
        cam.format.name(),
        c.frame_w,
        c.frame_h,
        c.roi.x,
        c.roi.y,
        c.roi.w,
        c.roi.h,
        c.out_w,
        c.out_h,
        match cam.resize {
            ResizeMethod::Area => "area averaging",
            ResizeMethod::Bilinear => "bilinear interpolation",
            ResizeMethod::Nearest => "nearest pixel",
        },
        if rot { ", rotated 180°" } else { "" },
        if mir { ", mirrored" } else { "" },
    );
    Ok(quote! {
        #[doc = #about]
        ///
        /// Validated at compile time by `ingot_rt::FrameConfig::validate`.
        pub const FRAME: ingot_rt::FrameParams = match ingot_rt::FrameConfig::new(
            ingot_rt::PixelFormat::#format, #fw, #fh, #ow, #oh, #oc,
        )
        .roi(#rx, #ry, #rw, #rh)
        .resize(ingot_rt::Resize::#resize)
        .rotate180(#rot)
        .mirror(#mir)
        .luma(ingot_rt::Luma::#luma)
        .validate()
        {
            Ok(p) => p,
            Err(_) => panic!("camera configuration refused by ingot-rt"),
        };
        /// Camera frame width in pixels.
        pub const FRAME_WIDTH: usize = #fwu;
        /// Camera frame height in pixels.
        pub const FRAME_HEIGHT: usize = #fhu;
        /// Bytes of one camera frame.
        pub const FRAME_BYTES: usize = FRAME.frame_bytes();

        /// One camera frame to input codes in one pass (crop, resize, rotation and
        /// mirroring, colour conversion, normalisation and input quantization; see
        /// [`FRAME`]): integer only, no temporary frame. Then call [`run`].
        pub fn frame_to_input(frame: &[u8; FRAME_BYTES], input: &mut [i8; INPUT_LEN]) {
            FRAME_TO_INPUT.run(frame, input);
        }

        static FRAME_TO_INPUT: ingot_rt::checked::ConvertFrame<'static, FRAME_BYTES, INPUT_LEN> =
            match ingot_rt::checked::ConvertFrame::new(FRAME, &ingot_data::PIXEL_TABLE) {
                Ok(k) => k,
                Err(e) => e.refuse(),
            };
    })
}
