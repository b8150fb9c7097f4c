//! `ingot plan GRAPH.json [--ranges R.json | --images DIR] [--target T.toml] [--svg OUT.svg] [--json]`.

use anyhow::{bail, Context};
use ingot_compiler::calibrate::Method;
use ingot_compiler::codegen::{output, WeightForm};
use ingot_compiler::driver::{self, RangesSource};
use ingot_compiler::lower::LowerOptions;
use ingot_compiler::plan;
use std::path::PathBuf;

/// Arguments of `ingot plan`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The graph file (`ingot.graph.v1` JSON); its weights file is read too.
    pub graph: PathBuf,
    /// Calibrated ranges (`ingot.ranges.v1`). Without it (and without
    /// `--images`) every map gets the same synthetic range: the memory plan
    /// depends only on shapes, so it is the same, but the flash figures of
    /// the budget are then those of an uncalibrated lowering.
    #[arg(long, conflicts_with = "images")]
    pub ranges: Option<PathBuf>,
    /// Calibrate on the images of this folder first.
    #[arg(long)]
    pub images: Option<PathBuf>,
    /// Target profile (`targets/*.toml`) for the RAM/flash budget.
    #[arg(long)]
    pub target: Option<PathBuf>,
    /// Write a picture of the plan.
    #[arg(long)]
    pub svg: Option<PathBuf>,
    /// Print the report as JSON instead of text.
    #[arg(long)]
    pub json: bool,
    /// Overwrite an existing `--svg` file that ingot did not write (never
    /// one of the command's inputs).
    #[arg(long)]
    pub force: bool,
    /// Keep these layers' output maps in int16 (comma-separated layer
    /// names; a member of a concatenation region widens the region): the
    /// plan then sizes their buffers at two bytes per value, and the
    /// report adds the arena without widening and the int16 maps.
    #[arg(long, value_name = "LAYER[,LAYER]", value_delimiter = ',')]
    pub wide: Vec<String>,
    /// Convolution weight form the module will use (int8, words or pairs;
    /// words and pairs add row buffers to the patch scratch) [default: by
    /// the --target core, else int8]
    #[arg(long)]
    pub weight_form: Option<WeightForm>,
    /// Store every map whole: no row streaming (to compare with the fused
    /// plan).
    #[arg(long)]
    pub no_stream: bool,
}

/// Lowers and plans through the driver, prints; fails when the plan does
/// not fit the target.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let g = ingot_compiler::load(&args.graph)?;
    super::print_warnings(&g);
    let source = match (&args.ranges, &args.images) {
        (Some(p), _) => RangesSource::File(p.clone()),
        (None, Some(dir)) => RangesSource::Images(dir.clone(), Method::MinMax),
        (None, None) => RangesSource::Synthetic,
    };
    let ranges = driver::ranges_for(&g, &source, None, None)?.ranges;
    let target = args
        .target
        .as_deref()
        .map(driver::load_target)
        .transpose()?;
    // The patch scratch depends on the kernels `build` will use for this
    // target (see `ingot build --weight-form`).
    let weight_form = driver::weight_form_for(args.weight_form, target.as_ref());
    let lower_opts = LowerOptions {
        wide: args.wide.clone(),
        ..LowerOptions::default()
    };
    let (q, p) = driver::lower_and_plan(&g, &ranges, &lower_opts, weight_form, !args.no_stream)?;
    let report = plan::report(&q, &p, target.as_ref());
    // The same plan without widening, for the cost of the int16 maps.
    let int8_arena = if q.wide.is_empty() {
        None
    } else {
        Some(
            driver::lower_and_plan(
                &g,
                &ranges,
                &LowerOptions::default(),
                weight_form,
                !args.no_stream,
            )?
            .1
            .arena_bytes,
        )
    };
    if let Some(svg) = &args.svg {
        let picture = plan::render_svg(&q, &p)?;
        let mut inputs = vec![
            ("graph file", args.graph.as_path()),
            ("weights file", g.weights_path()),
        ];
        inputs.extend(args.ranges.as_deref().map(|r| ("ranges file", r)));
        inputs.extend(args.images.as_deref().map(|d| ("images folder", d)));
        inputs.extend(args.target.as_deref().map(|t| ("target profile", t)));
        output::write_file(svg, picture.as_bytes(), &inputs, args.force)
            .context("cannot write the picture")?;
    }
    if args.json {
        let mut v = serde_json::to_value(&report).context("serialising the report")?;
        if let Some(a) = int8_arena {
            v["wide"] = serde_json::json!({
                "maps": q.wide.iter().map(|w| q.map(w.map).name.clone()).collect::<Vec<_>>(),
                "arena_bytes_without": a,
            });
        }
        println!(
            "{}",
            serde_json::to_string_pretty(&v).context("serialising the report")?
        );
    } else {
        print!("{report}");
        if let Some(a) = int8_arena {
            print!("{}", ingot_compiler::lower::wide_table(&q));
            println!(
                "arena with int16 maps: {} B; all int8: {} B",
                p.arena_bytes, a
            );
        }
    }
    if let Some(b) = &report.budget {
        if !b.fits {
            bail!("does not fit {}: {}", b.target, b.over.join("; "));
        }
    }
    Ok(())
}
