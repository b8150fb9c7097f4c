//! Runs the three exported models with the compiler's f32 reference on their
//! committed image folders and prints float accuracy per class.
//!
//! ```text
//! cargo run -p ingot-demo --example check_models --release
//! ```

use ingot_demo::{crate_dir, reference_accuracy, repo_root};

fn main() -> anyhow::Result<()> {
    let digits = repo_root().join("tests/data/optdigits");
    for (name, graph, dir) in [
        (
            "brackets (invented eval set)",
            crate_dir().join("model/brackets.graph.json"),
            crate_dir().join("data/eval"),
        ),
        (
            "separable (invented eval set)",
            crate_dir().join("model/separable.graph.json"),
            crate_dir().join("data/eval"),
        ),
        (
            "digits (optdigits held-out rows)",
            digits.join("model/digits.graph.json"),
            digits.join("heldout"),
        ),
    ] {
        let t = std::time::Instant::now();
        let acc = reference_accuracy(&graph, &dir, usize::MAX)?;
        let n: usize = acc.per_class.iter().map(|c| c.1).sum();
        println!(
            "{name}: f32 reference accuracy {:.2}% on {n} images ({:.1}s)",
            100.0 * acc.overall(),
            t.elapsed().as_secs_f64()
        );
        for (l, (c, t)) in acc.labels.iter().zip(&acc.per_class) {
            println!(
                "  {l:>8}: {:6.2}% ({c} / {t})",
                100.0 * *c as f64 / *t as f64
            );
        }
        println!("  output of the first image: {:?}", acc.outputs[0]);
    }
    Ok(())
}
