//! The camera description: which frames the device receives and how they
//! become the network's input.
//!
//! A [`Camera`] comes from the `[camera]` section of a target profile
//! (`docs/targets.md`), from the command line (`--camera-format`,
//! `--frame`, `--roi`, `--resize`, `--rotate`, `--mirror`, `--luma`) or from
//! [`Builder::camera`](crate::build::Builder::camera). [`Camera::params`]
//! checks it against the network's input with the very `const fn` the
//! generated module uses ([`ingot_rt::FrameConfig::validate`]), so a
//! configuration the build accepts is one the firmware compiles.
//!
//! This module is a leaf: it uses only `ingot-rt`, so every stage may read
//! it.

use ingot_rt::{FrameConfig, FrameError, FrameParams, Luma, PixelFormat, Resize};
use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

/// Pixel format names as written in TOML and on the command line.
pub const FORMATS: &str = "gray8, rgb565le, rgb565be, rgb888, yuyv";
/// Resize method names.
pub const RESIZES: &str = "area, bilinear, nearest";
/// Luma weight names.
pub const LUMAS: &str = "bt601, bt709";

/// A sensor pixel format (see [`ingot_rt::PixelFormat`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    /// 8-bit gray.
    Gray8,
    /// RGB565, low byte first.
    Rgb565le,
    /// RGB565, high byte first.
    Rgb565be,
    /// 8-bit R, G, B.
    Rgb888,
    /// YUV 4:2:2, `Y0 U Y1 V`.
    Yuyv,
}

/// A resize method (see [`ingot_rt::Resize`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ResizeMethod {
    /// Averaging (shrinking only).
    #[default]
    Area,
    /// Bilinear, half-pixel centres.
    Bilinear,
    /// Nearest pixel.
    Nearest,
}

/// Luma weights for gray from colour (see [`ingot_rt::Luma`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum LumaWeights {
    /// ITU-R BT.601.
    #[default]
    Bt601,
    /// ITU-R BT.709.
    Bt709,
}

fn parse_name<T: for<'de> Deserialize<'de>>(
    s: &str,
    option: &'static str,
    expected: &'static str,
) -> Result<T, CameraError> {
    T::deserialize(serde::de::value::StrDeserializer::<serde::de::value::Error>::new(s.trim()))
        .map_err(|_| CameraError::UnknownValue {
            option,
            value: s.into(),
            expected,
        })
}

impl FromStr for Format {
    type Err = CameraError;
    fn from_str(s: &str) -> Result<Self, CameraError> {
        parse_name(s, "--camera-format", FORMATS)
    }
}

impl FromStr for ResizeMethod {
    type Err = CameraError;
    fn from_str(s: &str) -> Result<Self, CameraError> {
        parse_name(s, "--resize", RESIZES)
    }
}

impl FromStr for LumaWeights {
    type Err = CameraError;
    fn from_str(s: &str) -> Result<Self, CameraError> {
        parse_name(s, "--luma", LUMAS)
    }
}

impl Format {
    /// The kernel's format.
    pub fn rt(self) -> PixelFormat {
        match self {
            Format::Gray8 => PixelFormat::Gray8,
            Format::Rgb565le => PixelFormat::Rgb565Le,
            Format::Rgb565be => PixelFormat::Rgb565Be,
            Format::Rgb888 => PixelFormat::Rgb888,
            Format::Yuyv => PixelFormat::Yuyv,
        }
    }

    /// The name used in files and options.
    pub fn name(self) -> &'static str {
        match self {
            Format::Gray8 => "gray8",
            Format::Rgb565le => "rgb565le",
            Format::Rgb565be => "rgb565be",
            Format::Rgb888 => "rgb888",
            Format::Yuyv => "yuyv",
        }
    }
}

/// A camera: its frames and how the network's input is cut from them.
#[derive(Debug, Clone, PartialEq, Eq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Camera {
    /// Pixel format.
    pub format: Format,
    /// Frame width in pixels.
    pub width: u32,
    /// Frame height in pixels.
    pub height: u32,
    /// Region of interest `[x, y, w, h]` in frame pixels; default the
    /// largest centred region with the input's aspect ratio.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub roi: Option<[u32; 4]>,
    /// Resize method (default `area`).
    #[serde(default)]
    pub resize: ResizeMethod,
    /// Rotation in degrees: 0 or 180 (applied after resizing).
    #[serde(default)]
    pub rotate: u32,
    /// Mirror left-right (after any rotation).
    #[serde(default)]
    pub mirror: bool,
    /// Luma weights for gray from colour (default `bt601`).
    #[serde(default)]
    pub luma: LumaWeights,
}

/// Why a camera description is unusable.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum CameraError {
    /// An option or key has a value that is not one of the known names.
    #[error("{option}: unknown value `{value}` (expected one of: {expected})")]
    UnknownValue {
        /// Option or key.
        option: &'static str,
        /// What was given.
        value: String,
        /// The accepted names.
        expected: &'static str,
    },
    /// A size, region or rotation cannot be parsed.
    #[error("{option}: `{value}` is not {expected}")]
    Syntax {
        /// Option or key.
        option: &'static str,
        /// What was given.
        value: String,
        /// What it should look like.
        expected: &'static str,
    },
    /// Camera options without `--camera-format` and `--frame`.
    #[error("camera options need both --camera-format and --frame (missing {0})")]
    Incomplete(&'static str),
    /// The description does not fit the network's input or the kernel's
    /// limits.
    #[error("camera {camera}: {reason}")]
    Invalid {
        /// The camera, described.
        camera: String,
        /// What is wrong.
        reason: String,
    },
}

impl fmt::Display for Camera {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} {}x{}", self.format.name(), self.width, self.height)
    }
}

impl Camera {
    /// A camera with the defaults (centred region, area, no rotation,
    /// BT.601).
    pub fn new(format: Format, width: u32, height: u32) -> Camera {
        Camera {
            format,
            width,
            height,
            roi: None,
            resize: ResizeMethod::default(),
            rotate: 0,
            mirror: false,
            luma: LumaWeights::default(),
        }
    }

    /// The kernel configuration for an input of `out_w × out_h × out_c`
    /// (unvalidated).
    pub fn config(&self, out_w: u32, out_h: u32, out_c: u32) -> FrameConfig {
        let mut c = FrameConfig::new(
            self.format.rt(),
            self.width,
            self.height,
            out_w,
            out_h,
            out_c,
        )
        .resize(match self.resize {
            ResizeMethod::Area => Resize::Area,
            ResizeMethod::Bilinear => Resize::Bilinear,
            ResizeMethod::Nearest => Resize::Nearest,
        })
        .rotate180(self.rotate == 180)
        .mirror(self.mirror)
        .luma(match self.luma {
            LumaWeights::Bt601 => Luma::Bt601,
            LumaWeights::Bt709 => Luma::Bt709,
        });
        if let Some([x, y, w, h]) = self.roi {
            c = c.roi(x, y, w, h);
        }
        c
    }

    /// Validates the camera for an input of `out_w × out_h × out_c`, with
    /// a sentence naming the problem.
    pub fn params(&self, out_w: u32, out_h: u32, out_c: u32) -> Result<FrameParams, CameraError> {
        let invalid = |reason: String| CameraError::Invalid {
            camera: self.to_string(),
            reason,
        };
        if self.rotate != 0 && self.rotate != 180 {
            return Err(invalid(format!(
                "rotation {}° is not supported (0 or 180)",
                self.rotate
            )));
        }
        let c = self.config(out_w, out_h, out_c);
        let r = c.roi;
        let roi = format!("region x={} y={} w={} h={}", r.x, r.y, r.w, r.h);
        c.validate().map_err(|e| {
            invalid(match e {
                FrameError::ZeroSize => format!(
                    "frame {}x{}, {roi} and network input {out_w}x{out_h} must all have non-zero sizes",
                    self.width, self.height
                ),
                FrameError::Channels => {
                    format!("the network input has {out_c} channels; a camera feeds 1 (gray) or 3 (RGB)")
                }
                FrameError::RoiOutsideFrame => format!(
                    "{roi} reaches outside the {}x{} frame",
                    self.width, self.height
                ),
                FrameError::FrameTooLarge => format!(
                    "a {}x{} frame of {} bytes per pixel overflows 32 bits",
                    self.width,
                    self.height,
                    self.format.rt().bytes_per_pixel()
                ),
                FrameError::WindowTooLarge => format!(
                    "area averaging from {}x{} to {out_w}x{out_h} sums too many pixels per output for 32-bit accumulators; crop a smaller region or use bilinear",
                    r.w, r.h
                ),
                FrameError::AreaEnlarges => format!(
                    "area averaging only shrinks, but the {}x{} region is smaller than the {out_w}x{out_h} input; use bilinear or nearest",
                    r.w, r.h
                ),
                FrameError::OddYuyvWidth => {
                    format!("a yuyv frame needs an even width, not {}", self.width)
                }
                FrameError::Unsupported => {
                    "yuyv frames can feed gray networks only (Y is taken directly)".into()
                }
                _ => format!("refused by ingot-rt ({e:?})"),
            })
        })
    }

    /// A camera from command-line values. All `None` gives `Ok(None)`;
    /// format and frame size are required once any option is given.
    #[allow(clippy::too_many_arguments)]
    pub fn from_options(
        format: Option<&str>,
        frame: Option<&str>,
        roi: Option<&str>,
        resize: Option<&str>,
        rotate: Option<u32>,
        mirror: bool,
        luma: Option<&str>,
    ) -> Result<Option<Camera>, CameraError> {
        let any = format.is_some()
            || frame.is_some()
            || roi.is_some()
            || resize.is_some()
            || rotate.is_some()
            || mirror
            || luma.is_some();
        if !any {
            return Ok(None);
        }
        let format: Format = format
            .ok_or(CameraError::Incomplete("--camera-format"))?
            .parse()?;
        let frame = frame.ok_or(CameraError::Incomplete("--frame"))?;
        let [width, height] = parse_numbers::<2>(frame, "--frame", "WIDTHxHEIGHT, e.g. 320x240")?;
        let mut cam = Camera::new(format, width, height);
        if let Some(r) = roi {
            cam.roi = Some(parse_numbers::<4>(
                r,
                "--roi",
                "X,Y,W,H, e.g. 40,0,240,240",
            )?);
        }
        if let Some(r) = resize {
            cam.resize = r.parse()?;
        }
        if let Some(r) = rotate {
            cam.rotate = r;
        }
        cam.mirror = mirror;
        if let Some(l) = luma {
            cam.luma = l.parse()?;
        }
        Ok(Some(cam))
    }
}

/// `N` unsigned integers separated by `x` or `,`.
fn parse_numbers<const N: usize>(
    s: &str,
    option: &'static str,
    expected: &'static str,
) -> Result<[u32; N], CameraError> {
    let bad = || CameraError::Syntax {
        option,
        value: s.into(),
        expected,
    };
    let parts: Vec<&str> = s.split(['x', 'X', ',']).map(str::trim).collect();
    if parts.len() != N {
        return Err(bad());
    }
    let mut out = [0u32; N];
    for (o, p) in out.iter_mut().zip(parts) {
        *o = p.parse().map_err(|_| bad())?;
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn options_parse_and_validate() {
        let cam = Camera::from_options(
            Some("rgb565le"),
            Some("320x240"),
            Some("40,0,240,240"),
            Some("bilinear"),
            Some(180),
            true,
            Some("bt709"),
        )
        .unwrap()
        .unwrap();
        assert_eq!(cam.roi, Some([40, 0, 240, 240]));
        let p = cam.params(64, 64, 1).unwrap();
        assert_eq!(p.frame_bytes(), 153_600);
        assert!(p.config().rotate180 && p.config().mirror);
        assert_eq!(
            Camera::from_options(None, None, None, None, None, false, None),
            Ok(None)
        );
    }

    #[test]
    fn errors_say_what_is_wrong() {
        let e = |r: Result<Option<Camera>, CameraError>| r.unwrap_err().to_string();
        assert_eq!(
            e(Camera::from_options(Some("rgb565"), Some("320x240"), None, None, None, false, None)),
            "--camera-format: unknown value `rgb565` (expected one of: gray8, rgb565le, rgb565be, rgb888, yuyv)"
        );
        assert_eq!(
            e(Camera::from_options(
                Some("gray8"),
                Some("320"),
                None,
                None,
                None,
                false,
                None
            )),
            "--frame: `320` is not WIDTHxHEIGHT, e.g. 320x240"
        );
        assert_eq!(
            e(Camera::from_options(
                None,
                Some("320x240"),
                None,
                None,
                None,
                false,
                None
            )),
            "camera options need both --camera-format and --frame (missing --camera-format)"
        );
        let mut cam = Camera::new(Format::Rgb565le, 320, 240);
        cam.roi = Some([300, 0, 40, 40]);
        assert_eq!(
            cam.params(32, 32, 1).unwrap_err().to_string(),
            "camera rgb565le 320x240: region x=300 y=0 w=40 h=40 reaches outside the 320x240 frame"
        );
        let cam = Camera::new(Format::Gray8, 0, 240);
        assert!(cam
            .params(32, 32, 1)
            .unwrap_err()
            .to_string()
            .contains("non-zero"));
        let cam = Camera::new(Format::Rgb888, 100_000, 100_000);
        assert!(cam
            .params(32, 32, 1)
            .unwrap_err()
            .to_string()
            .contains("overflows 32 bits"));
        let mut cam = Camera::new(Format::Gray8, 320, 240);
        cam.rotate = 90;
        assert!(cam
            .params(32, 32, 1)
            .unwrap_err()
            .to_string()
            .contains("rotation 90°"));
    }

    #[test]
    fn toml_section() {
        let cam: Camera = toml::from_str(
            "format = \"yuyv\"\nwidth = 160\nheight = 120\nroi = [20, 0, 120, 120]\nresize = \"nearest\"\n",
        )
        .unwrap();
        assert_eq!(cam.format, Format::Yuyv);
        assert_eq!(cam.resize, ResizeMethod::Nearest);
        let e = toml::from_str::<Camera>("format = \"bgr\"\nwidth = 1\nheight = 1\n").unwrap_err();
        assert!(e.to_string().contains("unknown variant `bgr`"), "{e}");
    }
}
