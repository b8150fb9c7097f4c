//! `ingot`: command-line front of the ingot compiler.
//!
//! Each subcommand lives in its own file under `cmd/`: it parses its
//! arguments, calls the library's stages (the pipeline through
//! `ingot_compiler::driver`: where ranges come from, the weight form, the
//! budget verdict; the harness through `ingot_compiler::check`), and prints.
//! The choices a command makes are the driver's, so `ingot build`, `ingot
//! plan`, `ingot check` and a build script make them the same way.

mod cmd;

use clap::{Parser, Subcommand};

/// Compile a trained convolutional network into fixed-point no_std Rust for
/// microcontrollers.
#[derive(Debug, Parser)]
#[command(name = "ingot", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Import a trained network from an ONNX model into ingot's graph format.
    Import(cmd::import::Args),
    /// Show a graph's layers, shapes, parameters and multiply-accumulates.
    Inspect(cmd::inspect::Args),
    /// Choose int8 ranges from sample images and report what int8 costs.
    Calibrate(cmd::calibrate::Args),
    /// Plan the feature-map arena: order, offsets, lower bound, budget.
    Plan(cmd::plan::Args),
    /// Compile a graph into a no_std Rust module and its weights file.
    Build(cmd::build::Args),
    /// Build a generated module, run it on the host or an emulated Cortex-M
    /// core, and compare it with the integer simulator and the float model.
    Check(Box<cmd::check::Args>),
}

fn main() {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Import(args) => cmd::import::run(&args),
        Command::Inspect(args) => cmd::inspect::run(&args),
        Command::Calibrate(args) => cmd::calibrate::run(&args),
        Command::Plan(args) => cmd::plan::run(&args),
        Command::Build(args) => cmd::build::run(&args),
        Command::Check(args) => cmd::check::run(&args),
    };
    if let Err(e) = result {
        eprintln!("ingot: error: {}", message(&e));
        std::process::exit(1);
    }
}

/// The error and its causes joined by `: `, leaving out a cause whose text
/// is already there: most of ingot's errors print their source themselves,
/// and `{:#}` would repeat it.
fn message(e: &anyhow::Error) -> String {
    let mut s = String::new();
    for cause in e.chain() {
        let t = cause.to_string();
        if s.contains(&t) {
            continue;
        }
        if !s.is_empty() {
            s.push_str(": ");
        }
        s.push_str(&t);
    }
    s
}
