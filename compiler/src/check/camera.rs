//! What the camera path alone costs: with a camera, `check` measures the
//! device's path (picture → camera frame → `convert_frame`, see
//! [`crate::calibrate::frames`]); the same labelled images are also run
//! through the plain host path (picture resized by the image crate to the
//! input size) on the float reference and the integer simulator, and the
//! difference is the accuracy the camera path loses.

use super::compare::{argmax_f32, argmax_i8};
use super::pipeline::CheckData;
use serde::Serialize;
use std::fmt::Write;

/// Accuracy through the camera path against the plain host path.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct CameraFigures {
    /// The camera, described (`rgb565le 320x240, area, region x=...`).
    pub camera: String,
    /// Labelled images compared.
    pub images: usize,
    /// Float accuracy, pictures resized by the host to the input size.
    pub host_float_accuracy: f64,
    /// Int8 (integer simulator) accuracy on the host-resized pictures.
    pub host_int8_accuracy: f64,
    /// Float accuracy on the device path's samples.
    pub device_float_accuracy: f64,
    /// Int8 (integer simulator) accuracy on the device path's codes.
    pub device_int8_accuracy: f64,
    /// `host_float − device_float`, percentage points.
    pub float_drop_pp: f64,
    /// `host_int8 − device_int8`, percentage points.
    pub int8_drop_pp: f64,
}

fn hits_f(outs: &[Vec<f32>], labels: &[usize]) -> f64 {
    let n = outs.len().min(labels.len()).max(1);
    let h = outs
        .iter()
        .zip(labels)
        .filter(|(o, &l)| argmax_f32(o) == l)
        .count();
    h as f64 / n as f64
}

fn hits_q(outs: &[Vec<i8>], labels: &[usize]) -> f64 {
    let n = outs.len().min(labels.len()).max(1);
    let h = outs
        .iter()
        .zip(labels)
        .filter(|(o, &l)| argmax_i8(o) == l)
        .count();
    h as f64 / n as f64
}

/// The figures from the device-path data and the host-path data of the
/// same images; `None` without labels on both.
pub fn figures(camera: String, device: &CheckData, host: &CheckData) -> Option<CameraFigures> {
    let (dl, hl) = (device.labels.as_ref()?, host.labels.as_ref()?);
    let df = hits_f(device.float_outputs.as_ref()?, dl);
    let dq = hits_q(device.sim_outputs.as_ref()?, dl);
    let hf = hits_f(host.float_outputs.as_ref()?, hl);
    let hq = hits_q(host.sim_outputs.as_ref()?, hl);
    Some(CameraFigures {
        camera,
        images: dl.len(),
        host_float_accuracy: hf,
        host_int8_accuracy: hq,
        device_float_accuracy: df,
        device_int8_accuracy: dq,
        float_drop_pp: (hf - df) * 100.0,
        int8_drop_pp: (hq - dq) * 100.0,
    })
}

/// The Markdown section (empty without camera figures).
pub fn markdown(c: Option<&CameraFigures>) -> String {
    let Some(c) = c else {
        return String::new();
    };
    let pct = |x: f64| format!("{:.2}%", 100.0 * x);
    let mut s = String::new();
    let _ = writeln!(s, "## Camera path ({})\n", c.camera);
    let _ = writeln!(
        s,
        "The images above went through the camera path (picture → camera frame → `convert_frame`, what `frame_to_input` computes). The same {} labelled images resized by the host to the input size give (int8: integer simulator):\n",
        c.images
    );
    let _ = writeln!(
        s,
        "| path | float | int8 |\n|---|---|---|\n| host-resized pictures | {} | {} |\n| camera path (device) | {} | {} |\n| drop caused by the camera path | {:.2} pp | {:.2} pp |\n",
        pct(c.host_float_accuracy),
        pct(c.host_int8_accuracy),
        pct(c.device_float_accuracy),
        pct(c.device_int8_accuracy),
        c.float_drop_pp,
        c.int8_drop_pp
    );
    s
}

/// The terminal lines (empty without camera figures).
pub fn summary(c: Option<&CameraFigures>) -> String {
    let Some(c) = c else {
        return String::new();
    };
    let pct = |x: f64| format!("{:.2}%", 100.0 * x);
    format!(
        "  camera path:    {}: float {} int8 {} (host-resized pictures: float {} int8 {}; drop {:.2} pp float, {:.2} pp int8)\n",
        c.camera,
        pct(c.device_float_accuracy),
        pct(c.device_int8_accuracy),
        pct(c.host_float_accuracy),
        pct(c.host_int8_accuracy),
        c.float_drop_pp,
        c.int8_drop_pp
    )
}
