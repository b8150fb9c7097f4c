//! `ingot calibrate`: observe the float network on sample images, choose
//! int8 ranges, write the ranges file and report.

use anyhow::Context;
use ingot_compiler::agree;
use ingot_compiler::calibrate::{CalibOptions, ImageSet, Method};
use ingot_compiler::codegen::output;
use ingot_compiler::lower::LowerOptions;
use std::path::PathBuf;

/// Arguments of `ingot calibrate`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The graph file (`*.graph.json`).
    pub graph: PathBuf,
    /// Folder of sample images (PNG, JPEG, BMP, PGM or .npy), optionally
    /// one sub-folder per class.
    #[arg(long)]
    pub images: PathBuf,
    /// Range choice: minmax, percentile:P (e.g. percentile:99.99), mse, kl,
    /// or auto (each of minmax, percentile:99.99/99.95/99.9, mse and kl is
    /// tried, and the one whose int8 network agrees best with float on the
    /// calibration images is kept).
    #[arg(long, default_value = "minmax", value_parser = super::parse_method)]
    pub method: Method,
    /// Where to write the ranges file [default: `<graph name>.ranges.json`
    /// beside the graph file].
    #[arg(short, long)]
    pub output: Option<PathBuf>,
    /// Share of the images kept apart for evaluation (every 1/F-th image).
    #[arg(long, default_value_t = 0.0)]
    pub holdout: f64,
    /// Skip unreadable images (they are counted and listed) instead of failing.
    #[arg(long)]
    pub skip_bad: bool,
    /// Classes that mean "good part" (comma-separated graph labels): the
    /// held-out evaluation then reports escapes and overkill.
    #[arg(long, value_name = "CLASS[,CLASS]", value_delimiter = ',')]
    pub good: Vec<String>,
    /// Print the report as JSON on standard output.
    #[arg(long)]
    pub json: bool,
    /// Overwrite an existing ranges file that ingot did not write (never
    /// one of the command's inputs).
    #[arg(long)]
    pub force: bool,
    /// Correct the biases of convolution and linear layers for the mean
    /// shift int8 causes (empirical bias correction, layer by layer on the
    /// calibration images); the shifts go into the ranges file, and the
    /// report shows the figures without and with them.
    #[arg(long)]
    pub bias_correction: bool,
    /// Also measure which layers cost the accuracy: per layer, the output
    /// agreement and logit SQNR with only that layer in int8 and with all
    /// but that layer in int8, ranked (printed, and in `--json`).
    #[arg(long)]
    pub sensitivity: bool,
    /// Equalize depthwise -> convolution pairs first (cross-layer
    /// equalization, Nagel et al. 2019; pairs with a ReLU6 between are
    /// skipped): the ranges are observed on the equalized graph, the
    /// ranges file says so and `build`/`check` equalize the same way; the
    /// report sets the figures without and with it side by side.
    #[arg(long)]
    pub equalize: bool,
    /// Write the sensitivity ranking as an SVG bar chart (implies
    /// `--sensitivity`).
    #[arg(long, value_name = "FILE")]
    pub sensitivity_svg: Option<PathBuf>,
    /// Keep these layers' output maps in int16 (comma-separated layer
    /// names, or auto:N for the N layers the sensitivity ranking puts
    /// first); a member of a concatenation region widens the region. The
    /// report's int8 figures are then those of the mixed network, and the
    /// ranges file is unchanged.
    #[arg(long, value_name = "LAYER[,LAYER]|auto:N", value_parser = parse_wide)]
    pub wide: Option<ingot_compiler::driver::WideChoice>,
    /// Target profile (`targets/NAME.toml`): only its `[camera]` is used.
    #[arg(long)]
    pub target: Option<PathBuf>,
    /// Camera the images go through (as `ingot build`; default: the
    /// target's `[camera]`).
    #[command(flatten)]
    pub camera: super::camera::CameraArgs,
}

pub(super) fn parse_wide(s: &str) -> Result<ingot_compiler::driver::WideChoice, String> {
    s.parse()
}

/// Runs the command.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let graph = ingot_compiler::load(&args.graph)?;
    super::print_warnings(&graph);
    let good = ingot_compiler::stats::good_classes(&args.good, graph.labels())
        .map_err(|e| anyhow::anyhow!("--good: {}: {e}", args.graph.display()))?;
    let target = args
        .target
        .as_ref()
        .map(ingot_compiler::plan::Target::load)
        .transpose()?;
    let camera =
        ingot_compiler::driver::camera_for(args.camera.camera()?.as_ref(), target.as_ref());
    let images = ImageSet::open_camera(&args.images, &graph, camera.as_ref())?;
    let opts = CalibOptions {
        method: args.method,
        holdout: args.holdout,
        skip_bad: args.skip_bad,
        progress: true,
        bias_correction: args.bias_correction,
        ..CalibOptions::default()
    };
    let loaded = graph;
    let (graph, found) = if args.equalize {
        let (g, e) = ingot_compiler::driver::equalized(&loaded);
        (g, Some(e))
    } else {
        (loaded.clone(), None)
    };
    let cal = agree::run(&graph, &images, &opts)?;
    let out = match &args.output {
        Some(p) => p.clone(),
        None => args
            .graph
            .parent()
            .unwrap_or_else(|| std::path::Path::new(""))
            // The name comes from the graph file: made one plain file-name
            // component so it cannot point outside the graph's folder.
            .join(format!(
                "{}.ranges.json",
                ingot_compiler::guard::file_stem(graph.name())
            )),
    };
    output::write_file(
        &out,
        cal.ranges.to_json_with(&graph, args.equalize).as_bytes(),
        &[
            ("graph file", &args.graph),
            ("weights file", graph.weights_path()),
            ("images folder", &args.images),
        ],
        args.force,
    )
    .context("cannot write the ranges file")?;
    let wide = args.wide.clone().unwrap_or_default();
    // `auto:N` ranks on the all-int8 network; the ranking is measured once
    // and also printed when `--sensitivity` asks for it.
    let ranking = if args.sensitivity || args.sensitivity_svg.is_some() || wide.needs_ranking() {
        Some(ingot_compiler::driver::sensitivity(
            &graph, &images, &cal, &opts,
        )?)
    } else {
        None
    };
    let int8 = ingot_compiler::lower::lower(&graph, &cal.ranges, &LowerOptions::default())?;
    let lower_opts = LowerOptions {
        wide: ingot_compiler::driver::wide_layers(&wide, ranking.as_ref(), &int8)?,
        ..LowerOptions::default()
    };
    let lowered = ingot_compiler::lower::lower(&graph, &cal.ranges, &lower_opts)?;
    let wide_maps: Vec<serde_json::Value> = lowered
        .wide
        .iter()
        .map(|w| {
            serde_json::json!({
                "map": lowered.map(w.map).name,
                "because": w.because,
                "extra_bytes": lowered.map(w.map).shape.len(),
            })
        })
        .collect();
    let mut report = agree::report(&graph, &images, &cal, &opts, Some(&lower_opts))?;
    report.set_good_classes(&good, graph.labels());
    let equalization = match &found {
        Some(e) => Some(ingot_compiler::driver::equalize_effect(
            &loaded, &images, &opts, e, &report,
        )?),
        None => None,
    };
    let sensitivity = if args.sensitivity || args.sensitivity_svg.is_some() {
        ranking
    } else {
        None
    };
    if let (Some(s), Some(path)) = (&sensitivity, &args.sensitivity_svg) {
        let svg = s
            .svg()
            .map_err(|e| anyhow::anyhow!("sensitivity chart: {e}"))?;
        output::write_file(
            path,
            svg.as_bytes(),
            &[
                ("graph file", &args.graph),
                ("weights file", graph.weights_path()),
                ("images folder", &args.images),
                ("ranges file", &out),
            ],
            args.force,
        )
        .context("cannot write the sensitivity chart")?;
    }
    if args.json {
        let mut v = serde_json::to_value(&report)?;
        v["ranges_file"] = serde_json::Value::String(out.display().to_string());
        if let Some(a) = &cal.auto {
            v["auto"] = serde_json::to_value(a)?;
        }
        if let Some(s) = &sensitivity {
            v["sensitivity"] = serde_json::to_value(s)?;
        }
        if let Some(e) = &equalization {
            v["equalization"] = serde_json::to_value(e)?;
        }
        if !wide_maps.is_empty() {
            v["wide"] = serde_json::Value::Array(wide_maps);
        }
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        print!("{report}");
        if let Some(a) = &cal.auto {
            let tried: Vec<String> = a
                .tried
                .iter()
                .map(|(m, agree)| format!("{m} {:.2}%", 100.0 * agree))
                .collect();
            println!(
                "method auto: int8 top-1 agreement on the {} calibration images: {}; kept {}",
                a.images,
                tried.join(", "),
                a.chosen
            );
        }
        if let Some(s) = &sensitivity {
            print!("{s}");
        }
        if let Some(e) = &equalization {
            print!("{e}");
        }
        print!("{}", ingot_compiler::lower::wide_table(&lowered));
        println!("ranges written to {}", out.display());
        if let Some(p) = &args.sensitivity_svg {
            println!("sensitivity chart written to {}", p.display());
        }
    }
    Ok(())
}
