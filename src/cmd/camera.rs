//! The camera options shared by `calibrate`, `build` and `check`.

use ingot_compiler::camera::{Camera, CameraError};

/// Where frames come from (overrides the target profile's `[camera]`).
#[derive(Debug, Default, clap::Args)]
pub struct CameraArgs {
    /// Camera pixel format: gray8, rgb565le, rgb565be, rgb888 or yuyv
    /// (needs --frame).
    #[arg(long, value_name = "FORMAT")]
    pub camera_format: Option<String>,
    /// Camera frame size, WIDTHxHEIGHT (e.g. 320x240).
    #[arg(long, value_name = "WxH")]
    pub frame: Option<String>,
    /// Region of interest X,Y,W,H in frame pixels [default: the largest
    /// centred region with the network input's aspect ratio].
    #[arg(long, value_name = "X,Y,W,H")]
    pub roi: Option<String>,
    /// Resize method: area (shrinking), bilinear or nearest [default: area].
    #[arg(long, value_name = "METHOD")]
    pub resize: Option<String>,
    /// Rotate the frame's region by 0 or 180 degrees.
    #[arg(long, value_name = "DEGREES")]
    pub rotate: Option<u32>,
    /// Mirror left-right (after any rotation).
    #[arg(long)]
    pub mirror: bool,
    /// Luma weights for gray from colour: bt601 or bt709 [default: bt601].
    #[arg(long, value_name = "WEIGHTS")]
    pub luma: Option<String>,
}

impl CameraArgs {
    /// The camera the options describe, if any.
    pub fn camera(&self) -> Result<Option<Camera>, CameraError> {
        Camera::from_options(
            self.camera_format.as_deref(),
            self.frame.as_deref(),
            self.roi.as_deref(),
            self.resize.as_deref(),
            self.rotate,
            self.mirror,
            self.luma.as_deref(),
        )
    }
}
