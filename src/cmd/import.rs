//! `ingot import MODEL.onnx --out DIR [--name NAME] [--labels a,b,c]
//! [--pixel-scale S] [--mean M[,M,M]] [--std S[,S,S]] [--color gray|rgb] [--force]`.

use anyhow::Context;
use ingot_compiler::codegen::output;
use ingot_compiler::frontend::onnx::{self, ImportOptions};
use std::path::PathBuf;

/// Arguments of `ingot import`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The ONNX model file (opsets 11 to 21).
    pub model: PathBuf,
    /// Output folder for NAME.graph.json and NAME.safetensors.
    #[arg(long)]
    pub out: PathBuf,
    /// Network name and file stem [default: the model file's stem].
    #[arg(long)]
    pub name: Option<String>,
    /// Class names, comma-separated, one per output value [default: the
    /// model's metadata_props `labels`, else 0..N-1].
    #[arg(long, value_delimiter = ',')]
    pub labels: Option<Vec<String>>,
    /// Factor applied to camera bytes 0..=255 [default: metadata, else 1/255].
    #[arg(long)]
    pub pixel_scale: Option<f32>,
    /// Mean subtracted after scaling, one value or one per channel
    /// [default: metadata, else 0].
    #[arg(long, value_delimiter = ',', allow_hyphen_values = true)]
    pub mean: Option<Vec<f32>>,
    /// Standard deviation divided by last, one value or one per channel
    /// [default: metadata, else 1].
    #[arg(long, value_delimiter = ',')]
    pub std: Option<Vec<f32>>,
    /// Camera colour handling: gray or rgb [default: by channel count].
    #[arg(long, value_parser = ["gray", "rgb"])]
    pub color: Option<String>,
    /// Overwrite files in --out that ingot did not write.
    #[arg(long)]
    pub force: bool,
}

/// Imports, validates with the regular loader, then writes both files or
/// none.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let opt = ImportOptions {
        name: args.name.clone(),
        labels: args.labels.clone(),
        pixel_scale: args.pixel_scale,
        mean: args.mean.clone(),
        std: args.std.clone(),
        color: args.color.clone(),
    };
    let imported = onnx::import(&args.model, &opt)?;
    let stem = imported.file.name.clone();
    let graph_name = format!("{stem}.graph.json");
    let weights_name = imported.file.weights.clone();
    let graph_path = args.out.join(&graph_name);
    // Never write over the model being read.
    for target in [&graph_path, &args.out.join(&weights_name)] {
        if let (Ok(a), Ok(b)) = (target.canonicalize(), args.model.canonicalize()) {
            anyhow::ensure!(
                a != b,
                "{}: is the input model; choose another --out or --name",
                target.display()
            );
        }
    }
    let graph = imported.validate(&graph_path)?;
    print!("{}", imported.table());
    for n in &imported.notices {
        println!("notice: {n}");
    }
    let files = vec![
        (graph_name.clone(), imported.graph_json().into_bytes()),
        (weights_name.clone(), imported.store.to_bytes()),
    ];
    output::write_all(&args.out, &files, args.force)
        .with_context(|| format!("writing into {}", args.out.display()))?;
    println!(
        "imported {} (opset {}): {} ONNX nodes -> {} ingot layers; wrote {graph_name} and {weights_name} into {}",
        args.model.display(),
        imported.opset,
        imported.rows.len(),
        graph.layers().len(),
        args.out.display()
    );
    Ok(())
}
