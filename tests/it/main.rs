//! The integration tests of this crate, in one binary: one link instead of one
//! per file keeps CI's link time and `target/` size down. Each file is a
//! module; run one with `cargo test --test it <module>::`.

mod cli_build;
mod cli_calibrate;
mod cli_camera;
mod cli_camera_check;
mod cli_check;
mod cli_hardening;
mod cli_import;
mod cli_inspect;
mod cli_plan;
mod cli_wide;
mod demo;
mod demo_slices;
mod demo_stream;
mod digits_accuracy;
mod separable_accuracy;
