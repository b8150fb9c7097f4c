//! `ingot build GRAPH.json (--images DIR | --ranges FILE) [--target FILE] --out DIR [--module NAME] [--force]`.

use ingot_compiler::calibrate::Method;
use ingot_compiler::codegen::{output, WeightForm};
use ingot_compiler::driver as pipeline;
use std::path::PathBuf;

/// Arguments of `ingot build`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The graph file (`ingot.graph.v1` JSON); its weights file is read too.
    pub graph: PathBuf,
    /// Calibrate on the images in this folder.
    #[arg(long, conflicts_with = "ranges", required_unless_present = "ranges")]
    pub images: Option<PathBuf>,
    /// Use a saved ranges file (`ingot.ranges.v1`) instead of calibrating.
    #[arg(long)]
    pub ranges: Option<PathBuf>,
    /// Range choice when calibrating on --images: minmax, percentile:P,
    /// mse, kl or auto (as `ingot calibrate --method`).
    #[arg(long, default_value = "minmax", value_parser = super::parse_method, requires = "images")]
    pub method: Method,
    /// Target description (TOML); the build fails if the model does not fit.
    #[arg(long)]
    pub target: Option<PathBuf>,
    /// Output folder for NAME.rs, NAME.weights.bin, NAME.report.md, NAME.report.json.
    #[arg(long)]
    pub out: PathBuf,
    /// Module name.
    #[arg(long, default_value = "model")]
    pub module: String,
    /// Overwrite files in --out that ingot did not write.
    #[arg(long)]
    pub force: bool,
    /// How convolution weights are stored: int8, words (int8 read four at a
    /// time and widened in registers for the Cortex-M4/M7 dual 16-bit
    /// multiply-accumulate, one byte per weight) or pairs (pre-widened
    /// 16-bit pairs for the same instructions, twice the flash)
    /// [default: by the --target core, else int8]
    #[arg(long)]
    pub weight_form: Option<WeightForm>,
    /// Camera frames in (adds `FRAME_BYTES` and `frame_to_input`).
    #[command(flatten)]
    pub camera: super::camera::CameraArgs,
    /// Store every map whole: no row streaming (more RAM, to compare).
    #[arg(long)]
    pub no_stream: bool,
    /// Keep these layers' output maps in int16 (comma-separated layer
    /// names, or auto:N for the N layers the sensitivity ranking on
    /// --images puts first); a member of a concatenation region widens the
    /// region. The module then calls the int16 kernels for every step that
    /// reads or writes one.
    #[arg(long, value_name = "LAYER[,LAYER]|auto:N", value_parser = super::calibrate::parse_wide)]
    pub wide: Option<pipeline::WideChoice>,
}

/// Compiles in memory, then writes all files into `--out` or none.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let ranges = match (&args.ranges, &args.images) {
        (Some(r), _) => pipeline::RangesSource::File(r.clone()),
        (None, Some(d)) => pipeline::RangesSource::Images(d.clone(), args.method),
        (None, None) => anyhow::bail!("pass --ranges FILE or --images DIR"),
    };
    let mut req = pipeline::BuildInputs::new(args.graph.clone(), ranges);
    req.target = args.target.clone();
    req.module = args.module.clone();
    req.weight_form = args.weight_form;
    req.camera = args.camera.camera()?;
    req.stream = !args.no_stream;
    req.wide = args.wide.clone().unwrap_or_default();
    let c = pipeline::compile(&req)?;
    super::print_warnings(&c.graph);
    output::write_all(&args.out, &c.files(&args.module), args.force)?;
    let r = c.report();
    println!(
        "wrote {m}.rs, {m}.weights.bin, {m}.report.md, {m}.report.json into {out}",
        m = args.module,
        out = args.out.display()
    );
    println!(
        "{}: {} steps, {} parameters, {} MACs; RAM {} bytes (arena {} + patch {}), weights {} bytes ({} in flash, {} form)",
        r.network,
        r.layers.len(),
        r.params,
        r.macs,
        r.scratch_bytes,
        r.arena_bytes,
        r.patch_bytes,
        r.weights_bytes,
        r.weights_flash_bytes,
        r.weight_form
    );
    println!(
        "plan: scratch {} bytes (arena {} + patch {}), lower bound {} bytes, naive {} bytes",
        c.plan.arena_bytes + c.plan.patch_bytes,
        c.plan.arena_bytes,
        c.plan.patch_bytes,
        c.plan.lower_bound,
        c.plan.naive_bytes
    );
    if !c.qgraph.wide.is_empty() {
        print!("{}", ingot_compiler::lower::wide_table(&c.qgraph));
    }
    if let Some(b) = &c.budget {
        println!(
            "target {}: RAM {} of {} bytes (headroom {}), flash {} of {} bytes (headroom {}); fits: {}",
            b.target,
            b.ram_used,
            b.ram_total,
            b.ram_headroom,
            b.flash_used,
            b.flash_total,
            b.flash_headroom,
            if b.fits { "yes" } else { "no" }
        );
    }
    Ok(())
}
