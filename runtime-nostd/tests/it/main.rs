//! The integration tests of this crate, in one binary: one link instead of one
//! per file keeps CI's link time and `target/` size down. Each file is a
//! module; run one with `cargo test --test it <module>::`.

mod checked;
mod common;
mod conv;
mod depthwise;
mod error_display;
mod frame;
mod frame_sums;
mod kernels;
mod no_std;
mod pointwise;
mod requant;
mod rows;
mod stem;
mod wide;
