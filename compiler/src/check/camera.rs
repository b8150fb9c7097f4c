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

/// The frame step of a camera run: the input codes each runner's
/// `frame_to_input` made from the raw frames, against the codes the host
/// computed with `convert_frame` (the ones the simulator and the float
/// reference were given). A difference here is the frame conversion's, not
/// the network's.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct FrameStep {
    /// Frames compared per runner.
    pub images: usize,
    /// Per runner (`host`, the emulated core): images whose codes differ.
    pub runs: Vec<FrameStepRun>,
}

/// One runner's `frame_to_input` codes against the host's.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct FrameStepRun {
    /// Where `frame_to_input` ran.
    pub on: String,
    /// Images whose input codes differ anywhere.
    pub mismatched_images: Vec<usize>,
    /// The first differing code.
    pub first: Option<super::compare::Mismatch>,
}

impl FrameStep {
    /// True when every runner made exactly the host's codes.
    pub fn identical(&self) -> bool {
        self.runs.iter().all(|r| r.mismatched_images.is_empty())
    }

    /// One failure line per runner whose codes differ.
    pub fn failures(&self) -> Vec<String> {
        self.runs
            .iter()
            .filter(|r| !r.mismatched_images.is_empty())
            .map(|r| {
                let first = r
                    .first
                    .as_ref()
                    .map(|m| {
                        format!(
                            "; first: image {} code {} is {} (host convert_frame: {})",
                            m.image, m.index, m.module, m.reference
                        )
                    })
                    .unwrap_or_default();
                format!(
                    "frame step: frame_to_input on {} made other input codes than the host's convert_frame on {} of {} images{first}",
                    r.on,
                    r.mismatched_images.len(),
                    self.images
                )
            })
            .collect()
    }
}

/// Compares each runner's `frame_to_input` codes (`(where, codes)`) with
/// the host's `convert_frame` codes.
pub fn frame_step(runs: &[(String, Vec<Vec<i8>>)], host_codes: &[Vec<i8>]) -> FrameStep {
    FrameStep {
        images: host_codes.len(),
        runs: runs
            .iter()
            .map(|(on, codes)| {
                let d = super::compare::compare_outputs(codes, host_codes);
                FrameStepRun {
                    on: on.clone(),
                    mismatched_images: d.mismatched_images,
                    first: d.first,
                }
            })
            .collect(),
    }
}

fn frame_step_line(f: &FrameStep) -> String {
    let on: Vec<&str> = f.runs.iter().map(|r| r.on.as_str()).collect();
    if f.identical() {
        format!(
            "frame_to_input ran on the raw frames ({}); its input codes equal the host's convert_frame on all {} images",
            on.join(", "),
            f.images
        )
    } else {
        format!(
            "frame_to_input ran on the raw frames ({}); input codes DIFFER from the host's convert_frame (see failures)",
            on.join(", ")
        )
    }
}

/// The Markdown line of the frame step (empty without a camera run).
pub fn frame_step_markdown(f: Option<&FrameStep>) -> String {
    f.map(|f| format!("Frame step: {}.\n\n", frame_step_line(f)))
        .unwrap_or_default()
}

/// The terminal line of the frame step (empty without a camera run).
pub fn frame_step_summary(f: Option<&FrameStep>) -> String {
    f.map(|f| format!("  frame step:     {}\n", frame_step_line(f)))
        .unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_wrong_frame_conversion_is_named_as_the_frame_step() {
        let host = vec![vec![1i8, 2, 3], vec![4, 5, 6]];
        let same = frame_step(&[("m4".into(), host.clone())], &host);
        assert!(same.identical());
        assert!(same.failures().is_empty());
        assert!(frame_step_summary(Some(&same)).contains("equal the host's convert_frame on all 2"));

        // One code off by one, as a rounding slip in the frame kernel would be.
        let mut wrong = host.clone();
        wrong[1][2] = 7;
        let bad = frame_step(
            &[("host".into(), host.clone()), ("m4".into(), wrong)],
            &host,
        );
        assert!(!bad.identical());
        let f = bad.failures();
        assert_eq!(f.len(), 1, "{f:?}");
        assert!(
            f[0].starts_with("frame step: frame_to_input on m4"),
            "{}",
            f[0]
        );
        assert!(f[0].contains("1 of 2 images"), "{}", f[0]);
        assert!(
            f[0].contains("image 1 code 2 is 7 (host convert_frame: 6)"),
            "{}",
            f[0]
        );
        // A runner that returned too few frames is a mismatch too.
        let short = frame_step(&[("m0".into(), vec![host[0].clone()])], &host);
        assert_eq!(short.runs[0].mismatched_images, vec![1]);
    }
}
