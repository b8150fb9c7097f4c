//! `ingot check`: build the generated module into a runner, run it on the
//! host or an emulated core, compare, report, and fail on thresholds.

use anyhow::{bail, Context};
use ingot_compiler::check::compare::Thresholds;
use ingot_compiler::check::pipeline::{self, CheckData, CheckPlan};
use ingot_compiler::check::report;
use ingot_compiler::check::runner::{self, BuildConfig};
use ingot_compiler::check::size::Budget;
use ingot_compiler::check::{io, ModuleFiles, RunOn};
use std::path::PathBuf;

/// Arguments of `ingot check`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The float graph (`ingot.graph` JSON); optional with `--module`.
    pub graph: Option<PathBuf>,
    /// Folder of test images (optionally in one sub-folder per class, for
    /// accuracy).
    #[arg(long)]
    pub images: Option<PathBuf>,
    /// Ranges file from `ingot calibrate`.
    #[arg(long, conflicts_with = "calib_images")]
    pub ranges: Option<PathBuf>,
    /// Calibrate on these images instead of reading `--ranges`.
    #[arg(long)]
    pub calib_images: Option<PathBuf>,
    /// Target profile (`targets/NAME.toml`): flash and RAM budget.
    #[arg(long)]
    pub target: Option<PathBuf>,
    /// Where to run: host, m0plus, m3, m4, m7 or m33.
    #[arg(long, default_value = "host", value_parser = parse_on)]
    pub on: RunOn,
    /// Largest allowed accuracy drop, percentage points.
    #[arg(long)]
    pub max_drop: Option<f64>,
    /// Smallest allowed top-1 agreement with the float model, fraction.
    #[arg(long)]
    pub min_agreement: Option<f64>,
    /// Report folder (markdown, JSON, SVG); replaced as a whole.
    #[arg(long)]
    pub report: Option<PathBuf>,
    /// Check an already generated module folder (`NAME.rs` +
    /// `NAME.weights.bin`) instead of generating one.
    #[arg(long)]
    pub module: Option<PathBuf>,
    /// With `--module`: already quantized inputs (file with header `INGI`,
    /// count, input length, then int8 codes).
    #[arg(long, requires = "module")]
    pub inputs: Option<PathBuf>,
    /// Flash budget in bytes (until target profiles carry one).
    #[arg(long)]
    pub flash_budget: Option<u64>,
    /// RAM budget in bytes (until target profiles carry one).
    #[arg(long)]
    pub ram_budget: Option<u64>,
    /// `opt-level` of the runner build.
    #[arg(long, default_value = "3")]
    pub opt_level: String,
}

fn parse_on(s: &str) -> Result<RunOn, String> {
    RunOn::parse(s)
        .ok_or_else(|| format!("unknown core `{s}`: expected host, m0plus, m3, m4, m7 or m33"))
}

/// Runs `ingot check`.
pub fn run(a: &Args) -> anyhow::Result<()> {
    if a.target.is_some() {
        bail!("--target: target profiles are not available yet; pass --flash-budget/--ram-budget");
    }
    let Some(module_dir) = &a.module else {
        // The full pipeline (calibrate → lower → plan → generate → build →
        // run → compare) is wired here once lowering, the integer simulator,
        // the float reference and the code generator are in the library.
        let graph = a
            .graph
            .as_ref()
            .context("a GRAPH.json (or --module DIR) is required")?;
        let g =
            ingot_compiler::load(graph).with_context(|| format!("loading {}", graph.display()))?;
        bail!(
            "checking `{}` from its graph needs lowering, the integer simulator, the float reference and the code generator, which this build does not have yet; generate the module elsewhere and run `ingot check --module DIR --inputs FILE --on CORE`",
            g.name()
        );
    };
    let module = ModuleFiles::find(module_dir, None)?;
    let src = std::fs::read_to_string(&module.source)
        .with_context(|| format!("reading {}", module.source.display()))?;
    let input_len = runner::module_const_usize(&src, "INPUT_LEN")
        .context("the module has no `const INPUT_LEN: usize`")?;
    let output_len = runner::module_const_usize(&src, "OUTPUT_LEN")
        .context("the module has no `const OUTPUT_LEN: usize`")?;
    let inputs_path = a
        .inputs
        .as_ref()
        .context("--module needs --inputs FILE (quantized inputs) until image loading lands")?;
    let bytes =
        std::fs::read(inputs_path).with_context(|| format!("reading {}", inputs_path.display()))?;
    let (len, inputs) = io::decode_batch(io::INPUTS_MAGIC, &bytes, "inputs")?;
    if len != input_len {
        bail!(
            "{} holds inputs of {len} values; the module takes {input_len}",
            inputs_path.display()
        );
    }
    let data = CheckData {
        model: module.name.clone(),
        inputs,
        input_len,
        output_len,
        ..CheckData::default()
    };
    let plan = CheckPlan {
        on: a.on,
        build: BuildConfig {
            opt_level: a.opt_level.clone(),
            ..BuildConfig::default()
        },
        budget: Budget {
            flash: a.flash_budget,
            ram: a.ram_budget,
        },
        thresholds: Thresholds {
            max_drop_pp: a.max_drop,
            min_agreement: a.min_agreement,
        },
    };
    let r = pipeline::run_check(&module, &data, &plan)?;
    if let Some(dir) = &a.report {
        report::write_report(dir, &r)?;
        eprintln!("report written to {}", dir.display());
    }
    print!("{}", report::markdown(&r));
    if !r.failures.is_empty() {
        bail!("check failed: {}", r.failures.join("; "));
    }
    Ok(())
}
