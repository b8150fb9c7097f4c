//! Compiles the demo model into `$OUT_DIR/model.rs` (+ `model.weights.bin`).
//!
//! Uses the committed demo model and its committed ranges
//! (`examples/demo/model/brackets.{graph,ranges}.json`, written once by
//! `ingot calibrate`), so the build does not recalibrate. Only when the
//! model is not in the tree (or its ranges are stale) does it fall back to
//! a built-in demo-sized network with random weights, with a warning.

use ingot_compiler::build::Builder;
use std::path::Path;

fn main() {
    let graph = Path::new("../demo/model/brackets.graph.json");
    let ranges = Path::new("../demo/model/brackets.ranges.json");
    println!("cargo:rerun-if-changed=../demo/model");
    if graph.exists() && ranges.exists() {
        match Builder::new(graph)
            .ranges(ranges)
            .module("model")
            .generate()
        {
            Ok(_) => return,
            Err(e) if e.is_budget() => {
                println!("cargo:warning={e}");
                eprintln!("error: {e}");
                std::process::exit(1);
            }
            Err(e) => println!(
                "cargo:warning=demo model not usable ({e}); using the built-in demo-sized network"
            ),
        }
    } else {
        println!(
            "cargo:warning=demo model not found at {}; using the built-in demo-sized network",
            graph.display()
        );
    }
    Builder::lowered(ingot_compiler::codegen::testnets::demo_sized())
        .module("model")
        .generate_or_exit();
}
