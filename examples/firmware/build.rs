//! Compiles the demo model into `$OUT_DIR/model.rs` (+ `model.weights.bin`).
//!
//! Uses the committed demo model and its committed ranges
//! (`examples/demo/model/brackets.{graph,ranges}.json`, written once by
//! `ingot calibrate`), so the build does not recalibrate, and fails when the
//! model does not fit the demo's Cortex-M4F profile with its bench camera
//! (`examples/demo/bench-camera.toml`). Only when the model is
//! not in the tree does it fall back to a built-in demo-sized network with
//! random weights, with a warning.

use ingot_compiler::build::Builder;
use std::path::Path;

fn main() {
    let graph = Path::new("../demo/model/brackets.graph.json");
    let ranges = Path::new("../demo/model/brackets.ranges.json");
    println!("cargo:rerun-if-changed=../demo/model");
    if graph.exists() && ranges.exists() {
        // The demo model is in the tree: any problem with it (stale ranges,
        // a model that does not fit) fails the build rather than quietly
        // building the stand-in.
        Builder::new(graph)
            .ranges(ranges)
            // The demo part with its bench camera (`[camera]`): the module
            // also gets `FRAME_BYTES` and `frame_to_input`.
            .target("../demo/bench-camera.toml")
            .module("model")
            .generate_or_exit();
        return;
    }
    println!(
        "cargo:warning=demo model not found at {}; using the built-in demo-sized network",
        graph.display()
    );
    Builder::lowered(ingot_testkit::testnets::demo_sized())
        .camera(ingot_compiler::camera::Camera::new(
            ingot_compiler::camera::Format::Rgb565le,
            320,
            240,
        ))
        .module("model")
        .generate_or_exit();
}
