//! Example firmware library around an ingot-generated model.
//!
//! `build.rs` compiles the model with [`ingot_compiler::build::Builder`]
//! into `$OUT_DIR/model.rs`; this crate includes it as [`model`] and adds a
//! one-call classifier. No heap, no `unsafe`, no floating point on the
//! inference path; the only RAM is the caller's [`model::Scratch`]
//! ([`model::SCRATCH_BYTES`]) and two stack buffers of
//! [`model::INPUT_LEN`] and [`model::OUTPUT_LEN`] bytes.
#![no_std]
#![forbid(unsafe_code)]

/// The generated model module.
pub mod model {
    include!(concat!(env!("OUT_DIR"), "/model.rs"));
}

pub use model::Scratch;

/// Classifies one camera frame (HWC bytes, [`model::INPUT_SHAPE`]): returns
/// the class index into [`model::LABELS`].
pub fn classify(scratch: &mut Scratch, pixels: &[u8; model::INPUT_LEN]) -> usize {
    let mut input = [0i8; model::INPUT_LEN];
    model::quantize_pixels(pixels, &mut input);
    let mut output = [0i8; model::OUTPUT_LEN];
    model::run(scratch, &input, &mut output);
    model::argmax(&output)
}

/// Classifies one camera frame straight from the sensor (RGB565,
/// [`model::FRAME_WIDTH`] × [`model::FRAME_HEIGHT`], as the build's camera
/// says): the frame-to-decision loop is these two generated calls plus the
/// arg-max. No frame copy: [`model::frame_to_input`] crops, resizes, turns
/// gray and quantizes in one pass into the input buffer.
pub fn classify_frame(scratch: &mut Scratch, frame: &[u8; model::FRAME_BYTES]) -> usize {
    let mut input = [0i8; model::INPUT_LEN];
    model::frame_to_input(frame, &mut input);
    let mut output = [0i8; model::OUTPUT_LEN];
    model::run(scratch, &input, &mut output);
    model::argmax(&output)
}

/// The label of a class index (`"?"` when out of range).
pub fn label(class: usize) -> &'static str {
    model::LABELS.get(class).copied().unwrap_or("?")
}
