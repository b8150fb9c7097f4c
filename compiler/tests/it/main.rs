//! The integration tests of this crate, in one binary: one link instead of one
//! per file keeps CI's link time and `target/` size down. Each file is a
//! module; run one with `cargo test --test it <module>::`.

mod bias_correction;
mod calibrate_zoo;
mod camera_host;
mod channels;
mod check_runners;
mod codegen;
mod codegen_camera;
mod codegen_output;
mod common;
mod densenet121;
mod dsp_emulated;
mod equalize;
mod frame_emulated;
mod graph_format_doc;
mod layering;
mod load_errors;
mod lower_dense;
mod lower_ops;
mod lower_zoo;
mod module_code;
mod onnx_import;
mod onnx_malformed;
mod onnx_roundtrip;
mod panic_never;
mod plan_hand;
mod plan_nets;
mod plan_targets;
mod reference_vs_candle;
mod sensitivity;
mod slices;
mod stats;
mod stream;
mod wide;
mod zoo_reference;
