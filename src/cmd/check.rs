//! `ingot check`: build the generated module into a runner, run it on the
//! host or an emulated core, compare, report, and fail on thresholds.

use anyhow::{bail, Context};
use ingot_compiler::check::compare::Thresholds;
use ingot_compiler::check::pipeline::{self, CheckData, CheckPlan};
use ingot_compiler::check::prepare::{self, PrepareOptions};
use ingot_compiler::check::runner::{self, BuildConfig};
use ingot_compiler::check::size::Budget;
use ingot_compiler::check::{accuracy, report};
use ingot_compiler::check::{io, ModuleFiles, RunOn};
use ingot_compiler::codegen::WeightForm;
use ingot_compiler::driver::{self, RangesSource};
use ingot_compiler::stats::{self, Gates};
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
    /// Range choice when calibrating: minmax, percentile:P, mse, kl or auto
    /// (as `ingot calibrate --method`).
    #[arg(long, default_value = "minmax", value_parser = super::parse_method, conflicts_with = "ranges")]
    pub method: ingot_compiler::calibrate::Method,
    /// When calibrating (`--calib-images`, or on the checked images):
    /// correct the biases for the mean shift int8 causes, as `ingot
    /// calibrate --bias-correction` (a ranges file carries its own).
    #[arg(long, conflicts_with = "ranges")]
    pub bias_correction: bool,
    /// When calibrating: equalize depthwise pairs first, as `ingot
    /// calibrate --equalize` (a ranges file says itself whether it was).
    #[arg(long, conflicts_with = "ranges")]
    pub equalize: bool,
    /// Also measure which layers cost the accuracy on the checked images
    /// (as `ingot calibrate --sensitivity`): a section of `report.md` and
    /// the JSON report, and printed.
    #[arg(long)]
    pub sensitivity: bool,
    /// Keep these layers' output maps in int16 (comma-separated layer
    /// names, or auto:N for the N layers the sensitivity ranking puts
    /// first, ranked on --calib-images, else on the checked images); a
    /// member of a concatenation region widens the region. The report
    /// marks their steps `(int16)` and gives the arena with and without.
    #[arg(long, value_name = "LAYER[,LAYER]|auto:N", value_parser = super::calibrate::parse_wide)]
    pub wide: Option<driver::WideChoice>,
    /// Target profile (`targets/NAME.toml`): flash and RAM budget.
    #[arg(long)]
    pub target: Option<PathBuf>,
    /// Where to run: host, m0plus, m3, m4, m7 or m33.
    #[arg(long, default_value = "host", value_parser = parse_on)]
    pub on: RunOn,
    /// Largest allowed accuracy drop, percentage points (a finite number)
    /// [default: 5]
    #[arg(long, value_parser = parse_finite)]
    pub max_drop: Option<f64>,
    /// Smallest allowed top-1 agreement with the float model, fraction (a
    /// finite number) [default: 0.9]
    #[arg(long, value_parser = parse_finite)]
    pub min_agreement: Option<f64>,
    /// Largest allowed upper end of the accuracy drop's 95% interval,
    /// percentage points: fails when the images cannot rule out a larger
    /// drop.
    #[arg(long, value_name = "PP")]
    pub max_drop_upper: Option<f64>,
    /// Classes that mean "good part" (comma-separated graph labels):
    /// reports escapes (defect predicted good) and overkill (good
    /// predicted defect).
    #[arg(long, value_name = "CLASS[,CLASS]", value_delimiter = ',')]
    pub good: Vec<String>,
    /// Largest allowed number of int8 escapes (needs --good).
    #[arg(long, value_name = "N")]
    pub max_escapes: Option<u64>,
    /// Largest allowed number of escapes int8 adds to the float model's
    /// (needs --good).
    #[arg(long, value_name = "N")]
    pub max_added_escapes: Option<u64>,
    /// Report folder (markdown, JSON, SVG, the module); replaced as a whole
    /// if an earlier `check --report` wrote it (it holds `.ingot-report`)
    /// or it is empty, refused otherwise.
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
    /// Flash budget in bytes for the firmware ELF (`.text` + `.rodata` +
    /// `.data`) [default with `--target`: the part's flash less its reserve]
    #[arg(long)]
    pub flash_budget: Option<u64>,
    /// RAM budget in bytes for the firmware ELF (`.data` + `.bss` + stack
    /// used) [default with `--target`: the part's RAM less its reserve]
    #[arg(long)]
    pub ram_budget: Option<u64>,
    /// Seconds each runner (host or QEMU) may take for the whole image set
    /// [default: 120 s plus 1 s per 2 million MACs of work, so an emulated
    /// run of a large set is not cut short]
    #[arg(long)]
    pub timeout: Option<u64>,
    /// `opt-level` of the runner build.
    #[arg(long, default_value = "3")]
    pub opt_level: String,
    /// How convolution weights are stored: int8, words (int8 read four at a
    /// time and widened in registers for the Cortex-M4/M7 dual 16-bit
    /// multiply-accumulate, one byte per weight) or pairs (pre-widened
    /// 16-bit pairs for the same instructions, twice the flash)
    /// [default: by the --target core, else by the --on core, else int8]
    #[arg(long)]
    pub weight_form: Option<WeightForm>,
    /// Camera the images go through (as `ingot build`; default: the
    /// target's `[camera]`).
    #[command(flatten)]
    pub camera: super::camera::CameraArgs,
    /// Store every map whole: no row streaming (more RAM, to compare).
    #[arg(long)]
    pub no_stream: bool,
}

/// Gates applied when `--max-drop` / `--min-agreement` are not given, so an
/// int8 module whose accuracy collapsed never reads "pass". Lenient on
/// purpose: a drop of more than 5 points or agreement below 90% means the
/// ranges or the model are broken, not that int8 costs a little.
const DEFAULT_MAX_DROP_PP: f64 = 5.0;
const DEFAULT_MIN_AGREEMENT: f64 = 0.9;

/// A threshold must be a finite number: NaN compares false with everything
/// and would switch its gate off.
fn parse_finite(s: &str) -> Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(v) => Err(format!("{v} is not a finite number")),
        Err(e) => Err(e.to_string()),
    }
}

fn parse_on(s: &str) -> Result<RunOn, String> {
    RunOn::parse(s)
        .ok_or_else(|| format!("unknown core `{s}`: expected host, m0plus, m3, m4, m7 or m33"))
}

/// Runs `ingot check`.
pub fn run(a: &Args) -> anyhow::Result<()> {
    let Some(module_dir) = &a.module else {
        return run_graph(a);
    };
    refuse_foreign_report(a)?;
    if a.target.is_some() {
        bail!("--target applies to a GRAPH.json check; with --module pass --flash-budget/--ram-budget");
    }
    if a.camera.camera()?.is_some() {
        bail!("camera options apply to a GRAPH.json check (the images go through the camera); with --module pass --inputs");
    }
    if a.bias_correction || a.equalize || a.sensitivity {
        bail!("--bias-correction, --equalize and --sensitivity apply to a GRAPH.json check (they need the float graph)");
    }
    let module = ModuleFiles::find(module_dir, None)?;
    let src = std::fs::read_to_string(&module.source)
        .with_context(|| format!("reading {}", module.source.display()))?;
    let input_len = runner::module_const_usize(&src, "INPUT_LEN")
        .context("the module has no `const INPUT_LEN: usize`")?;
    let output_len = runner::module_const_usize(&src, "OUTPUT_LEN")
        .context("the module has no `const OUTPUT_LEN: usize`")?;
    let inputs_path = a.inputs.as_ref().context(
        "--module needs --inputs FILE (quantized int8 inputs); to check on images, pass the GRAPH.json instead",
    )?;
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
            timeout: timeout(a, &data),
            ..BuildConfig::default()
        },
        budget: Budget {
            flash: a.flash_budget,
            ram: a.ram_budget,
        },
        thresholds: thresholds(a),
    };
    if !a.good.is_empty() {
        bail!("--good needs labelled images: pass the GRAPH.json and --images");
    }
    let mut r = pipeline::run_check(&module, &data, &plan)?;
    apply_gates(a, &mut r);
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

/// The runner's wall-clock limit: `--timeout`, or one that grows with the
/// work. The allowance (1 s per 2 million MACs) assumes about 10 emulated
/// instructions per MAC (a Cortex-M0+ build) at 20 million instructions per
/// second under QEMU with `-icount` on a slow, shared machine; it guards
/// against a hung runner, not a slow one.
fn timeout(a: &Args, data: &CheckData) -> std::time::Duration {
    let secs = a.timeout.unwrap_or_else(|| {
        let macs: u64 = data.steps.iter().map(|s| s.macs).sum();
        120 + macs.saturating_mul(data.inputs.len() as u64) / 2_000_000
    });
    std::time::Duration::from_secs(secs)
}

/// Refuses a `--report` folder ingot may not replace before any work is
/// done (`write_report` checks again when it writes).
fn refuse_foreign_report(a: &Args) -> anyhow::Result<()> {
    match &a.report {
        Some(d) if !report::replaceable(d) => {
            Err(ingot_compiler::check::CheckError::ForeignReport(d.clone()).into())
        }
        _ => Ok(()),
    }
}

fn gates(a: &Args) -> Gates {
    Gates {
        max_drop_upper_pp: a.max_drop_upper,
        max_escapes: a.max_escapes,
        max_added_escapes: a.max_added_escapes,
    }
}

/// Applies the statistics gates to a finished report.
fn apply_gates(a: &Args, r: &mut report::CheckReport) {
    r.gates = gates(a);
    let fails = r.gates.failures(r.paired.as_ref(), r.escapes.as_ref());
    r.failures.extend(fails);
}

fn thresholds(a: &Args) -> Thresholds {
    Thresholds {
        max_drop_pp: Some(a.max_drop.unwrap_or(DEFAULT_MAX_DROP_PP)),
        min_agreement: Some(a.min_agreement.unwrap_or(DEFAULT_MIN_AGREEMENT)),
    }
}

/// `ingot check GRAPH.json --images DIR`: calibrate (or read ranges), lower,
/// plan, generate, build, run, compare, report.
fn run_graph(a: &Args) -> anyhow::Result<()> {
    refuse_foreign_report(a)?;
    let graph = a
        .graph
        .as_ref()
        .context("a GRAPH.json (or --module DIR) is required")?;
    let images = a
        .images
        .as_ref()
        .context("--images DIR is required to check a graph")?;
    if a.inputs.is_some() {
        bail!("--inputs applies to --module only");
    }
    let ranges = match (&a.ranges, &a.calib_images) {
        (Some(r), _) => RangesSource::File(r.clone()),
        (None, Some(d)) => RangesSource::Images(d.clone(), a.method),
        (None, None) => RangesSource::CheckImages(a.method),
    };
    let run_core = (a.on != RunOn::Host).then(|| a.on.name());
    let mut opts = PrepareOptions::default();
    opts.ranges = ranges;
    opts.target = a.target.clone();
    opts.weight_form = driver::weight_form_for_run(a.weight_form, a.target.is_some(), run_core);
    opts.camera = a.camera.camera()?;
    opts.bias_correction = a.bias_correction;
    opts.equalize = a.equalize;
    opts.sensitivity = a.sensitivity;
    opts.stream = !a.no_stream;
    opts.wide = a.wide.clone().unwrap_or_default();
    let mut p = prepare::prepare(graph, images, &opts)?;
    p.data.good_classes = stats::good_classes(&a.good, &p.data.class_names)
        .map_err(|e| anyhow::anyhow!("--good: {}: {e}", graph.display()))?;
    p.data.image_names = p.image_names.clone();
    let module_name = p.generated.report.module.clone();
    // Removed when this function returns, on success or failure; with
    // --report the module is copied into the report first.
    let staging_dir = tempfile::Builder::new()
        .prefix(&format!("ingot-check-{}-", std::process::id()))
        .tempdir()
        .context("creating a temporary folder for the module")?;
    let staging = staging_dir.path().to_path_buf();
    let module = prepare::write_module(&staging, &module_name, &p.generated)?;
    let plan = CheckPlan {
        on: a.on,
        build: BuildConfig {
            opt_level: a.opt_level.clone(),
            timeout: timeout(a, &p.data),
            ..BuildConfig::default()
        },
        // The firmware ELF (module + runner) against the target's memory
        // less its reserves.
        budget: {
            let (flash, ram) =
                driver::firmware_limits(a.flash_budget, a.ram_budget, p.budget.as_ref());
            Budget { flash, ram }
        },
        thresholds: thresholds(a),
    };
    let mut r = pipeline::run_check(&module, &p.data, &plan)?;
    r.camera = p.camera.clone();
    r.sensitivity = p.sensitivity.take();
    r.wide = p.wide.clone();
    apply_gates(a, &mut r);
    if let Some(b) = &p.budget {
        r.failures
            .extend(b.over.iter().map(|o| format!("target {}: {o}", b.target)));
    }
    let module_dir = match &a.report {
        Some(dir) => {
            report::write_report(dir, &r)?;
            let dest = dir.join("module");
            std::fs::create_dir_all(&dest)
                .with_context(|| format!("creating {}", dest.display()))?;
            for f in std::iter::once(&module.source).chain(&module.extra) {
                let to = dest.join(f.file_name().context("module file name")?);
                std::fs::copy(f, &to)
                    .with_context(|| format!("copying {} to {}", f.display(), to.display()))?;
            }
            Some(dest)
        }
        None => None,
    };
    let text = summary(a, &p, &r, module_dir.as_deref(), &module_name);
    if let Some(dir) = &a.report {
        std::fs::write(dir.join("summary.txt"), &text)
            .with_context(|| format!("writing {}", dir.join("summary.txt").display()))?;
    }
    print!("{text}");
    if let Some(sens) = &r.sensitivity {
        print!("{sens}");
    }
    if !r.failures.is_empty() {
        bail!("check failed: {}", r.failures.join("; "));
    }
    Ok(())
}

fn pct(x: f64) -> String {
    format!("{:.2}%", 100.0 * x)
}

/// The figures a firmware engineer reads first.
fn summary(
    a: &Args,
    p: &prepare::Prepared,
    r: &report::CheckReport,
    module_dir: Option<&std::path::Path>,
    module: &str,
) -> String {
    use std::fmt::Write as _;
    let mut s = String::new();
    let g = &p.generated.report;
    let _ = writeln!(
        s,
        "ingot check {}: {} images on {}",
        r.model, r.images, r.run_on
    );
    let _ = writeln!(s, "  ranges:         {}", p.ranges_note);
    let _ = writeln!(
        s,
        "  scratch RAM:    {} bytes (arena {} + patch {}); lower bound {} bytes ({} schedule)",
        g.scratch_bytes, g.arena_bytes, g.patch_bytes, p.plan.lower_bound, p.schedule_kind
    );
    if let Some(w) = &p.wide {
        let _ = writeln!(
            s,
            "  int16 maps:     {} ({}); arena {} bytes with them, {} all int8",
            w.maps.len(),
            w.maps
                .iter()
                .map(|(m, _)| m.as_str())
                .collect::<Vec<_>>()
                .join(", "),
            w.arena_bytes,
            w.arena_bytes_int8
        );
    }
    if g.weights_flash_bytes == g.weights_bytes {
        let _ = write!(s, "  flash:          weights {} bytes", g.weights_bytes);
    } else {
        let _ = write!(
            s,
            "  flash:          weights {} bytes in 16-bit pairs (weights file {} bytes)",
            g.weights_flash_bytes, g.weights_bytes
        );
    }
    match &r.sizes {
        Some(z) => {
            let _ = writeln!(
                s,
                "; firmware ELF on {}: {} bytes flash, {} bytes RAM ({} static + {} stack measured)",
                a.on,
                z.flash,
                z.ram,
                z.sections.static_ram(),
                z.stack_used
                    .map_or("?".to_string(), |v| v.to_string()),
            );
        }
        None => {
            let _ = writeln!(s, "; firmware size: run with --on CORE");
        }
    }
    if let Some(b) = &p.budget {
        if b.fits {
            let _ = writeln!(
                s,
                "  target:         fits {} (RAM {} of {} bytes incl. reserve, flash {} of {})",
                b.target, b.ram_used, b.ram_total, b.flash_used, b.flash_total
            );
        } else {
            let _ = writeln!(
                s,
                "  target:         DOES NOT FIT {}: {}",
                b.target,
                b.over.join("; ")
            );
        }
    }
    let acc_line = match &r.accuracy {
        Some(acc) => format!(
            "  accuracy:       float {} -> int8 {} (drop {:.2} pp)\n",
            pct(acc.float_accuracy),
            pct(acc.int8_accuracy),
            acc.drop_pp
        ),
        None => "  accuracy:       no labels (images not in class folders)\n".to_string(),
    };
    s.push_str(&accuracy::summary_lines(r, &acc_line));
    s.push_str(&ingot_compiler::check::camera::summary(r.camera.as_ref()));
    s.push_str(&ingot_compiler::check::camera::frame_step_summary(
        r.frame_step.as_ref(),
    ));
    if let Some(f) = &r.float {
        let _ = writeln!(
            s,
            "  agreement:      top-1 {} with the float model; logit error mean {:.4}, max {:.4}",
            pct(f.top1_agreement),
            f.mean_abs_error,
            f.max_abs_error
        );
    }
    let bit = match &r.bit_exact {
        Some(b) if b.identical() => "yes".to_string(),
        Some(b) => format!(
            "NO ({} of {} images differ{})",
            b.mismatched_images.len(),
            b.images,
            r.first_differing_layer
                .as_ref()
                .map_or(String::new(), |d| format!(
                    "; first at step {} `{}`",
                    d.step, d.name
                ))
        ),
        None => "not compared".into(),
    };
    let _ = writeln!(s, "  bit-identical:  {bit} (module vs integer simulator)");
    match &r.instructions {
        Some(i) => {
            let _ = writeln!(
                s,
                "  instructions:   {} per inference (min {}, max {}), {} per MAC ({} MACs), emulated {}",
                i.per_inference_mean,
                i.per_inference_min,
                i.per_inference_max,
                i.per_mac.map_or("?".into(), |v| format!("{v:.2}")),
                i.macs,
                a.on
            );
            if let Some(f) = i.frame_to_input_mean {
                let _ = writeln!(
                    s,
                    "  frame_to_input: {} instructions per frame; {} per frame with the inference",
                    f,
                    f + i.per_inference_mean
                );
            }
        }
        None => {
            let _ = writeln!(
                s,
                "  instructions:   not counted on the host (use --on m0plus|m3|m4|m7|m33)"
            );
        }
    }
    match module_dir {
        Some(d) => {
            let _ = writeln!(
                s,
                "  module:         {}/{module}.rs, {}/{module}.weights.bin",
                d.display(),
                d.display()
            );
        }
        None => {
            let _ = writeln!(
                s,
                "  module:         not kept (pass --report DIR to keep it)"
            );
        }
    }
    if let Some(d) = &a.report {
        let _ = writeln!(s, "  report:         {}/report.md", d.display());
    }
    if r.failures.is_empty() {
        let _ = writeln!(s, "  result:         pass");
    } else {
        for f in &r.failures {
            let _ = writeln!(s, "  FAIL:           {f}");
        }
    }
    s
}
