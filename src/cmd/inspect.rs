//! `ingot inspect GRAPH.json [--json]`.

use anyhow::Context;
use std::path::PathBuf;

/// Arguments of `ingot inspect`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The graph file (`ingot.graph.v1` JSON); its weights file is read too.
    pub graph: PathBuf,
    /// Print the report as JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Loads the graph and prints its report.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let graph = ingot_compiler::load(&args.graph)?;
    super::print_warnings(&graph);
    let report = ingot_compiler::inspect::report(&graph);
    if args.json {
        let text = serde_json::to_string_pretty(&report).context("serialising the report")?;
        println!("{text}");
    } else {
        print!("{}", report.to_text());
    }
    Ok(())
}
