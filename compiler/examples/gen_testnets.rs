//! Writes the generator's test networks as modules into a folder:
//! `cargo run -p ingot-compiler --example gen_testnets -- OUT_DIR`.

use ingot_compiler::codegen::{generate, GenOptions, Schedule};
use ingot_testkit::testnets;

fn main() {
    let out = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "gen-testnets".into());
    std::fs::create_dir_all(&out).expect("create output folder");
    for q in testnets::all()
        .into_iter()
        .chain([testnets::hostile_names()])
    {
        let module = ingot_compiler::codegen::module_stem(&q.name).to_lowercase();
        let opt = GenOptions {
            module: module.clone(),
            ..GenOptions::default()
        };
        let g = generate(&q, &Schedule::naive(&q), &opt).expect("generate");
        for (name, bytes) in g.files(&module) {
            std::fs::write(format!("{out}/{name}"), bytes).expect("write");
        }
        println!(
            "{module}: {} bytes of Rust, {} bytes of weights",
            g.module.len(),
            g.weights.len()
        );
    }
}
