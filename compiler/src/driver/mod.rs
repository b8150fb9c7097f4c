//! From files to generated code: load the graph, obtain ranges (from a
//! ranges file or by calibrating on images), lower, plan the memory, check
//! the target budget, generate.
//!
//! The driver comes after the stages it assembles (`codegen` and all before
//! it) and before the harness (`check`), which uses it. [`compile`] is the
//! library entry point for `ingot build` and the build-script
//! [`Builder`](build_script::Builder); `ingot check` and `ingot plan` use
//! its stage functions ([`ranges_for`], [`weight_form_for`],
//! [`schedule_of`], [`load_target`]).

pub mod build_script;

use crate::agree::AgreeError;
use crate::calibrate::{CalibOptions, ImageError, ImageSet};
use crate::codegen::{self, CodegenError, GenOptions, Generated, Schedule, TargetInfo, WeightForm};
use crate::lower::{LowerError, LowerOptions, QGraph};
use crate::plan::{Budget, Plan, PlanError, PlanOptions, Target, TargetError};
use crate::ranges::{MapRange, Ranges, RangesError};
use crate::Graph;
use std::path::{Path, PathBuf};

/// Where the quantization ranges come from: the one description the CLI
/// commands, the build script and the harness share.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum RangesSource {
    /// A saved `ingot.ranges.v1` file.
    File(PathBuf),
    /// Calibrate on the images in this folder with this range method
    /// (otherwise default [`CalibOptions`]).
    Images(PathBuf, crate::calibrate::Method),
    /// Calibrate with this range method on the images the harness checks
    /// (optimistic, and said so in the note); needs those images
    /// ([`ranges_for`]'s `checked`).
    CheckImages(crate::calibrate::Method),
    /// The same range, `[-4, 4]`, for every map: enough for a memory plan,
    /// which depends only on shapes (`ingot plan` without ranges).
    Synthetic,
}

/// Ranges as [`ranges_for`] obtained them.
#[derive(Debug, Clone)]
pub struct SourcedRanges {
    /// The ranges.
    pub ranges: Ranges,
    /// A hash of where they came from (the file's bytes, or the calibrated
    /// ranges), mixed into `MODEL_HASH`.
    pub hash: String,
    /// Where they came from, in words, for reports.
    pub note: String,
    /// The ranges were observed on the graph after cross-layer
    /// equalization: lower [`graph_for`] of them, not the graph as loaded.
    pub equalized: bool,
}

/// The graph to lower with `sourced`: `graph` equalized
/// ([`crate::graph::equalize`]) when the ranges were observed on the
/// equalized graph, else `graph` itself. Equalization depends on the
/// weights alone, so this gives the weights the calibration saw.
pub fn graph_for<'g>(graph: &'g Graph, sourced: &SourcedRanges) -> std::borrow::Cow<'g, Graph> {
    if sourced.equalized {
        let mut g = graph.clone();
        crate::graph::equalize::equalize(&mut g);
        std::borrow::Cow::Owned(g)
    } else {
        std::borrow::Cow::Borrowed(graph)
    }
}

/// One compilation request ([`BuildInputs::new`], then set the fields that
/// differ from the defaults).
#[derive(Debug, Clone)]
#[non_exhaustive]
pub struct BuildInputs {
    /// The graph JSON.
    pub graph: PathBuf,
    /// Ranges.
    pub ranges: RangesSource,
    /// Target TOML (`targets/*.toml`), if any: the build fails when the
    /// model does not fit it.
    pub target: Option<PathBuf>,
    /// Module name.
    pub module: String,
    /// How convolution weights are stored; `None`: chosen by the target's
    /// core ([`WeightForm::for_core`]), int8 without a target.
    pub weight_form: Option<WeightForm>,
    /// The camera; `None`: the target's `[camera]`, if any.
    pub camera: Option<crate::camera::Camera>,
    /// Stream rows through rings where the planner finds it lowers the
    /// RAM (default true; `--no-stream` turns it off).
    pub stream: bool,
    /// Layers whose output maps stay int16 (`--wide`); `auto:N` ranks
    /// the layers on the calibration images, so it needs
    /// [`RangesSource::Images`].
    pub wide: WideChoice,
}

impl BuildInputs {
    /// A request for `graph` with `ranges`: no target, module `model`, the
    /// weight form and camera left to the target.
    pub fn new(graph: impl Into<PathBuf>, ranges: RangesSource) -> Self {
        BuildInputs {
            graph: graph.into(),
            ranges,
            target: None,
            module: "model".into(),
            weight_form: None,
            camera: None,
            stream: true,
            wide: WideChoice::Off,
        }
    }
}

/// The weight form of a request: the explicit choice, else the target
/// core's, else int8.
pub fn weight_form_for(explicit: Option<WeightForm>, target: Option<&Target>) -> WeightForm {
    explicit
        .or_else(|| target.map(|t| WeightForm::for_core(&t.core)))
        .unwrap_or_default()
}

/// The camera of a request: the explicit one, else the target's.
pub fn camera_for(
    explicit: Option<&crate::camera::Camera>,
    target: Option<&Target>,
) -> Option<crate::camera::Camera> {
    explicit
        .or_else(|| target.and_then(|t| t.camera.as_ref()))
        .cloned()
}

/// Everything one compilation produced, in memory.
#[derive(Debug, Clone)]
pub struct Compiled {
    /// The float graph as loaded.
    pub graph: Graph,
    /// The ranges the lowering used.
    pub ranges: Ranges,
    /// The lowered int8 graph.
    pub qgraph: QGraph,
    /// The memory plan.
    pub plan: Plan,
    /// The schedule given to the generator (derived from `plan`).
    pub schedule: Schedule,
    /// The target, when one was given.
    pub target: Option<Target>,
    /// The budget verdict against `target` (always `fits` when returned
    /// by [`compile`]; see [`compile_unchecked`]).
    pub budget: Option<Budget>,
    /// The generated module, weights and reports.
    pub generated: Generated,
}

impl Compiled {
    /// `(file name, contents)` of every generated file.
    pub fn files(&self, module: &str) -> Vec<(String, Vec<u8>)> {
        self.generated.files(module)
    }

    /// The generation report.
    pub fn report(&self) -> &codegen::report::Report {
        &self.generated.report
    }
}

/// Why a compilation failed. `Display` is one readable sentence.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PipelineError {
    /// The graph did not load.
    #[error(transparent)]
    Load(Box<crate::LoadError>),
    /// The ranges file is unusable.
    #[error(transparent)]
    Ranges(#[from] RangesError),
    /// The image folder is unusable.
    #[error(transparent)]
    Images(#[from] ImageError),
    /// Calibration failed.
    #[error("calibration failed: {0}")]
    Calibrate(#[from] AgreeError),
    /// Lowering failed.
    #[error("lowering failed: {0}")]
    Lower(#[from] LowerError),
    /// Memory planning failed.
    #[error("memory planning failed: {0}")]
    Plan(#[from] PlanError),
    /// A step the pipeline needs is not available in this build.
    #[error("{0}")]
    Unavailable(String),
    /// The target file is unusable.
    #[error(transparent)]
    Target(#[from] TargetError),
    /// The model does not fit the target.
    #[error("model `{graph}` does not fit target `{target}`: {}", over.join("; "))]
    Budget {
        /// Graph name.
        graph: String,
        /// Target name.
        target: String,
        /// One line per memory that is over.
        over: Vec<String>,
        /// The full verdict.
        budget: Box<Budget>,
    },
    /// Generation failed.
    #[error(transparent)]
    Codegen(#[from] CodegenError),
    /// `--wide auto:N` could not rank the layers.
    #[error("--wide auto:N: ranking the layers: {0}")]
    Sensitivity(crate::agree::EvalError),
    /// File system error.
    #[error("{path}: {source}")]
    Io {
        /// Path involved.
        path: PathBuf,
        /// The error.
        source: std::io::Error,
    },
}

impl From<crate::LoadError> for PipelineError {
    fn from(e: crate::LoadError) -> Self {
        PipelineError::Load(Box::new(e))
    }
}

impl PipelineError {
    /// True when the model is valid but does not fit the target's memory.
    pub fn is_budget(&self) -> bool {
        matches!(self, PipelineError::Budget { .. })
    }
}

/// The schedule of `plan` for `q`, with the patch buffer at least as large
/// as the generator's kernels need (the one schedule the CLI, build scripts
/// and the harness generate with).
pub fn schedule_of(q: &QGraph, plan: &Plan) -> Schedule {
    let mut s = Schedule::from(plan);
    s.patch_bytes = s.patch_bytes.max(crate::plan::schedule::min_patch_bytes(q));
    s
}

/// The weight form to ask for when a module will run on `run_core` (a core
/// name as [`WeightForm::for_core`] reads it; `None` on the host): the
/// explicit choice; else, without a target profile, the run core's; else
/// `None`, which leaves the choice to the profile ([`weight_form_for`]).
pub fn weight_form_for_run(
    explicit: Option<WeightForm>,
    has_target: bool,
    run_core: Option<&str>,
) -> Option<WeightForm> {
    explicit.or_else(|| run_core.filter(|_| !has_target).map(WeightForm::for_core))
}

/// The memory a firmware image built around the module may use on a
/// budget's target: `(flash, RAM)` in bytes, each memory less its reserve.
/// Conservative: a stack measured in the image's RAM is counted although the
/// RAM reserve already covers one.
pub fn firmware_budget(b: &Budget) -> (u64, u64) {
    (
        b.flash_total.saturating_sub(b.flash_reserve),
        b.ram_total.saturating_sub(b.ram_reserve),
    )
}

/// The firmware limits `(flash, RAM)` of a check: each explicit limit, else
/// the target's memory less its reserve ([`firmware_budget`]), else none.
pub fn firmware_limits(
    flash: Option<u64>,
    ram: Option<u64>,
    budget: Option<&Budget>,
) -> (Option<u64>, Option<u64>) {
    let from_target = budget.map(firmware_budget);
    (
        flash.or(from_target.map(|b| b.0)),
        ram.or(from_target.map(|b| b.1)),
    )
}

/// Reads a target description (`targets/*.toml`).
pub fn load_target(path: &Path) -> Result<Target, PipelineError> {
    Ok(Target::load(path)?)
}

/// Files the request reads (for `cargo:rerun-if-changed`).
pub fn inputs(req: &BuildInputs) -> Vec<PathBuf> {
    let mut v = vec![req.graph.clone()];
    if let Ok(text) = std::fs::read_to_string(&req.graph) {
        if let Ok(file) = crate::frontend::parse(&text, &req.graph) {
            v.push(crate::frontend::resolve_weights(&req.graph, &file.weights));
        }
    }
    match &req.ranges {
        RangesSource::File(p) | RangesSource::Images(p, _) => v.push(p.clone()),
        RangesSource::CheckImages(_) | RangesSource::Synthetic => {}
    }
    v.extend(req.target.clone());
    v
}

fn graph_hash(graph: &Graph) -> Result<String, PipelineError> {
    crate::ranges::graph_hash(graph).map_err(|source| PipelineError::Io {
        path: PathBuf::from(graph.name()),
        source,
    })
}

/// Ranges for `graph` from `src`, with a hash of where they came from and a
/// note in words. Images are read through `camera` when one is given;
/// [`RangesSource::CheckImages`] calibrates on `checked` (an error without
/// it).
pub fn ranges_for(
    graph: &Graph,
    src: &RangesSource,
    checked: Option<&ImageSet>,
    camera: Option<&crate::camera::Camera>,
) -> Result<SourcedRanges, PipelineError> {
    ranges_for_with(graph, src, checked, camera, false, false)
}

/// [`ranges_for`], with empirical bias correction when `bias_correction`
/// is set ([`CalibOptions::bias_correction`]; `ingot check
/// --bias-correction`). Only a calibration can correct biases: with
/// [`RangesSource::File`] (whose file carries its own `bias_shifts`, if
/// `calibrate --bias-correction` wrote them) or [`RangesSource::Synthetic`]
/// the flag is an error. With `equalize`, a calibration observes the
/// equalized graph ([`graph_for`]; a ranges file says itself whether it
/// was, and the flag is an error with one).
pub fn ranges_for_with(
    graph: &Graph,
    src: &RangesSource,
    checked: Option<&ImageSet>,
    camera: Option<&crate::camera::Camera>,
    bias_correction: bool,
    equalize: bool,
) -> Result<SourcedRanges, PipelineError> {
    let equalized_graph = equalize.then(|| {
        let mut g = graph.clone();
        crate::graph::equalize::equalize(&mut g);
        g
    });
    let graph = equalized_graph.as_ref().unwrap_or(graph);
    let calibrate_on = |images: &ImageSet, method| -> Result<SourcedRanges, PipelineError> {
        let opts = CalibOptions {
            method,
            bias_correction,
            ..CalibOptions::default()
        };
        let cal = crate::agree::run(graph, images, &opts)?;
        // The shifts change the module: they are part of the hash.
        let mut bytes = serde_json::to_vec(&cal.ranges.maps).unwrap_or_default();
        if !cal.ranges.bias_shifts.is_empty() {
            bytes.extend(serde_json::to_vec(&cal.ranges.bias_shifts).unwrap_or_default());
        }
        if !cal.ranges.channels.is_empty() {
            bytes.extend(serde_json::to_vec(&cal.ranges.channels).unwrap_or_default());
        }
        Ok(SourcedRanges {
            hash: format!("{:016x}", codegen::fnv1a(codegen::FNV_BASIS, &bytes)),
            note: format!(
                "calibrated ({}{}{}) on {} images of {}",
                cal.ranges.method,
                if equalize { ", equalized" } else { "" },
                if bias_correction {
                    ", bias-corrected"
                } else {
                    ""
                },
                images.len(),
                images.root().display()
            ),
            ranges: cal.ranges,
            equalized: equalize,
        })
    };
    if (bias_correction || equalize)
        && matches!(src, RangesSource::File(_) | RangesSource::Synthetic)
    {
        return Err(PipelineError::Unavailable(
            "bias correction and equalization need a calibration (calibration images), not a ranges file or synthetic ranges".into(),
        ));
    }
    match src {
        RangesSource::File(p) => {
            let hash = graph_hash(graph)?;
            let r = Ranges::load(graph, p, Some(&hash))?;
            let bytes = std::fs::read(p).map_err(|source| PipelineError::Io {
                path: p.clone(),
                source,
            })?;
            Ok(SourcedRanges {
                ranges: r,
                hash: format!("{:016x}", codegen::fnv1a(codegen::FNV_BASIS, &bytes)),
                note: format!("ranges read from {}", p.display()),
                equalized: Ranges::file_equalized(p)?,
            })
        }
        RangesSource::Images(dir, method) => {
            calibrate_on(&ImageSet::open_camera(dir, graph, camera)?, *method)
        }
        RangesSource::CheckImages(method) => {
            let images = checked.ok_or_else(|| {
                PipelineError::Unavailable(
                    "calibration on the checked images needs the images of a check".into(),
                )
            })?;
            let mut r = calibrate_on(images, *method)?;
            r.note = format!(
                "calibrated ({}) on the checked images themselves ({} images of {}): no --ranges or --calib-images was given, so the figures are optimistic",
                r.ranges.method,
                images.len(),
                images.root().display()
            );
            Ok(r)
        }
        RangesSource::Synthetic => Ok(SourcedRanges {
            ranges: Ranges {
                graph: graph.name().into(),
                graph_hash: String::new(),
                method: "synthetic".into(),
                images: 0,
                maps: vec![
                    MapRange {
                        min: -4.0,
                        max: 4.0
                    };
                    graph.map_count()
                ],
                bias_shifts: Default::default(),
                channels: Vec::new(),
            },
            hash: String::new(),
            note: "synthetic ranges ([-4, 4] for every map)".into(),
            equalized: false,
        }),
    }
}

/// The per-layer sensitivity report of a calibration (`ingot calibrate
/// --sensitivity`): the network lowered with `cal`'s ranges and the
/// lowering options a build uses, measured on the images the int8
/// evaluation uses ([`crate::agree::sensitivity::measure`]).
pub fn sensitivity(
    graph: &Graph,
    images: &ImageSet,
    cal: &crate::calibrate::Calibration,
    opts: &CalibOptions,
) -> Result<crate::agree::sensitivity::Sensitivity, crate::agree::EvalError> {
    crate::agree::sensitivity::measure(
        graph,
        images,
        cal,
        &LowerOptions::default(),
        opts.skip_bad,
        opts.progress,
    )
}

/// `--wide`: which layers keep their output maps in int16.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
#[non_exhaustive]
pub enum WideChoice {
    /// Every map int8 (no `--wide`).
    #[default]
    Off,
    /// The layers named (`--wide LAYER,…`).
    Layers(Vec<String>),
    /// The `n` layers ranked most sensitive (`--wide auto:N`): the lowest
    /// logit SQNR with only that layer in int8.
    Auto(usize),
}

impl std::str::FromStr for WideChoice {
    type Err = String;

    /// `auto:N` (N ≥ 1) or a comma-separated list of layer names.
    fn from_str(s: &str) -> Result<Self, String> {
        if let Some(n) = s.strip_prefix("auto:") {
            return match n.parse::<usize>() {
                Ok(n) if n >= 1 => Ok(WideChoice::Auto(n)),
                _ => Err(format!(
                    "`auto:{n}`: N must be a whole number of layers, at least 1"
                )),
            };
        }
        let names: Vec<String> = s
            .split(',')
            .map(str::trim)
            .filter(|n| !n.is_empty())
            .map(String::from)
            .collect();
        if names.is_empty() {
            return Err("name at least one layer, or auto:N".into());
        }
        Ok(WideChoice::Layers(names))
    }
}

impl WideChoice {
    /// True for `auto:N`, which needs a sensitivity ranking.
    pub fn needs_ranking(&self) -> bool {
        matches!(self, WideChoice::Auto(_))
    }
}

/// The layers `choice` widens. `auto:N` takes the first `N` rows of
/// `ranking` (measured on the all-int8 network) that can be widened: the
/// input's quantization and the step writing the network's output stay
/// int8, and are skipped. A missing ranking for `auto:N`, or fewer such
/// rows than `N`, is an error naming both counts.
pub fn wide_layers(
    choice: &WideChoice,
    ranking: Option<&crate::agree::sensitivity::Sensitivity>,
    int8: &QGraph,
) -> Result<Vec<String>, PipelineError> {
    match choice {
        WideChoice::Off => Ok(Vec::new()),
        WideChoice::Layers(v) => Ok(v.clone()),
        WideChoice::Auto(n) => {
            let ranking = ranking.ok_or_else(|| {
                PipelineError::Unavailable(
                    "--wide auto:N ranks the layers on images: give images to calibrate or check on".into(),
                )
            })?;
            let out = int8.map(int8.output).name.clone();
            let eligible: Vec<String> = ranking
                .rows
                .iter()
                .filter(|r| {
                    r.name != "input" && r.kind != "concat" && r.kind != "channel_transform"
                })
                .filter(|r| {
                    int8.steps
                        .iter()
                        .find(|s| s.name == r.name)
                        .is_some_and(|s| int8.map(s.output).name != out)
                })
                .map(|r| r.name.clone())
                .collect();
            if eligible.len() < *n {
                return Err(PipelineError::Lower(LowerError::Wide {
                    layer: format!("auto:{n}"),
                    message: format!(
                        "the ranking has only {} layers that can be widened",
                        eligible.len()
                    ),
                }));
            }
            Ok(eligible[..*n].to_vec())
        }
    }
}

/// `base` with the layers of `choice` widened (`--wide` on `build`,
/// `check` and the build script). `auto:N` ranks the layers of the
/// all-int8 network ([`sensitivity_on`] with `base`) on `images`, and is
/// an error without them.
pub fn wide_options(
    graph: &Graph,
    ranges: &Ranges,
    choice: &WideChoice,
    images: Option<&ImageSet>,
    base: &LowerOptions,
) -> Result<LowerOptions, PipelineError> {
    if *choice == WideChoice::Off {
        return Ok(base.clone());
    }
    let int8 = crate::lower::lower(graph, ranges, base)?;
    let ranking = match images {
        Some(set) if choice.needs_ranking() => {
            Some(sensitivity_on(graph, set, ranges, base).map_err(PipelineError::Sensitivity)?)
        }
        _ => None,
    };
    Ok(LowerOptions {
        wide: wide_layers(choice, ranking.as_ref(), &int8)?,
        ..base.clone()
    })
}

/// `calibrate --equalize`: `graph` equalized ([`crate::graph::equalize`])
/// and what equalization found.
pub fn equalized(graph: &Graph) -> (Graph, crate::graph::equalize::Equalization) {
    let mut g = graph.clone();
    let e = crate::graph::equalize::equalize(&mut g);
    (g, e)
}

/// The report section of `calibrate --equalize`: `graph` (as loaded) is
/// calibrated and evaluated with `opts` as the equalized one was, and its
/// figures are set against `after`, the evaluated report of the equalized
/// graph.
pub fn equalize_effect(
    graph: &Graph,
    images: &ImageSet,
    opts: &CalibOptions,
    found: &crate::graph::equalize::Equalization,
    after: &crate::calibrate::Report,
) -> Result<crate::calibrate::report::EqualizeEffect, PipelineError> {
    use crate::calibrate::report::{EqualizeEffect, OutputFigures};
    let cal = crate::agree::run(graph, images, opts)?;
    let before = crate::agree::report(graph, images, &cal, opts, Some(&LowerOptions::default()))
        .map_err(|e| PipelineError::Unavailable(format!("evaluating the graph as loaded: {e}")))?;
    let (Some(b), Some(a)) = (
        OutputFigures::of(graph, &before),
        OutputFigures::of(graph, after),
    ) else {
        return Err(PipelineError::Unavailable(
            "equalization: no int8 evaluation to compare".into(),
        ));
    };
    Ok(EqualizeEffect {
        pairs: found.pairs.clone(),
        before: b,
        after: a,
        layers: before
            .layers
            .iter()
            .zip(&after.layers)
            .filter(|(x, y)| x.sqnr_db.is_some() || y.sqnr_db.is_some())
            .map(|(x, y)| (x.name.clone(), x.sqnr_db, y.sqnr_db))
            .collect(),
    })
}

/// The per-layer sensitivity of `graph` lowered with `ranges` and
/// `lower`, measured on every image of `images`
/// (`ingot check --sensitivity`: the checked images, reported as
/// `checked`).
pub fn sensitivity_on(
    graph: &Graph,
    images: &ImageSet,
    ranges: &Ranges,
    lower: &LowerOptions,
) -> Result<crate::agree::sensitivity::Sensitivity, crate::agree::EvalError> {
    let cal = crate::calibrate::Calibration {
        ranges: ranges.clone(),
        stats: Vec::new(),
        calibration: (0..images.len()).collect(),
        evaluation: Vec::new(),
        skipped: Vec::new(),
        auto: None,
        candidates: Vec::new(),
    };
    let mut s = crate::agree::sensitivity::measure(graph, images, &cal, lower, false, false)?;
    s.on = "checked";
    Ok(s)
}

/// Lowers `graph` with `ranges` and plans its memory for `weight_form`.
pub fn lower_and_plan(
    graph: &Graph,
    ranges: &Ranges,
    lower: &LowerOptions,
    weight_form: WeightForm,
    stream: bool,
) -> Result<(QGraph, Plan), PipelineError> {
    let q = crate::lower::lower(graph, ranges, lower)?;
    let plan = crate::plan::plan(
        &q,
        &PlanOptions {
            weight_form,
            stream,
            ..PlanOptions::default()
        },
    )?;
    Ok((q, plan))
}

/// The generator options of a request: `module`, the target's name (the
/// budget is the driver's verdict, [`budget_of`], not the generator's),
/// the weight form and camera.
pub fn gen_options(
    module: &str,
    target: Option<&Target>,
    weight_form: WeightForm,
    camera: Option<crate::camera::Camera>,
    source_hash: String,
) -> GenOptions {
    GenOptions {
        module: module.into(),
        target: target.map(|t| TargetInfo::named(&t.name)),
        source_hash,
        weight_form,
        camera,
        ..GenOptions::default()
    }
}

/// The budget verdict of a module on `target`: the planner's
/// ([`crate::plan::target::budget_for`]), with the generated weights file
/// in place of the estimate of the constants when it is given.
pub fn budget_of(
    q: &QGraph,
    plan: &Plan,
    target: &Target,
    generated: Option<&Generated>,
) -> Budget {
    crate::plan::target::budget_with_weights_file(
        q,
        plan,
        target,
        generated.map(|g| g.report.weights_flash_bytes as u64),
    )
}

/// `Err(PipelineError::Budget)` when the verdict says the model does not
/// fit.
fn refuse_over(graph: &str, budget: Option<&Budget>) -> Result<(), PipelineError> {
    match budget {
        Some(b) if !b.fits => Err(PipelineError::Budget {
            graph: graph.into(),
            target: b.target.clone(),
            over: b.over.clone(),
            budget: Box::new(b.clone()),
        }),
        _ => Ok(()),
    }
}

/// Runs the whole pipeline in memory; fails with
/// [`PipelineError::Budget`] when the model does not fit the target.
pub fn compile(req: &BuildInputs) -> Result<Compiled, PipelineError> {
    let c = compile_unchecked(req)?;
    refuse_over(&c.qgraph.name, c.budget.as_ref())?;
    Ok(c)
}

/// [`compile`] without refusing a model that is over the target's budget
/// (the verdict is in [`Compiled::budget`]); for reports.
pub fn compile_unchecked(req: &BuildInputs) -> Result<Compiled, PipelineError> {
    let target = req.target.as_deref().map(load_target).transpose()?;
    let graph = crate::load(&req.graph)?;
    // Calibration reads plain pictures here, as it always has for builds.
    let sourced = ranges_for(&graph, &req.ranges, None, None)?;
    let graph_hash = graph_hash(&graph).map_err(|e| match e {
        PipelineError::Io { source, .. } => PipelineError::Io {
            path: req.graph.clone(),
            source,
        },
        e => e,
    })?;
    let weight_form = weight_form_for(req.weight_form, target.as_ref());
    let graph = graph_for(&graph, &sourced).into_owned();
    // `auto:N` ranks on the calibration images, read as calibration read
    // them.
    let ranked_on = match (&req.ranges, req.wide.needs_ranking()) {
        (RangesSource::Images(dir, _), true) => Some(ImageSet::open(dir, &graph)?),
        _ => None,
    };
    let lower = wide_options(
        &graph,
        &sourced.ranges,
        &req.wide,
        ranked_on.as_ref(),
        &LowerOptions::default(),
    )?;
    let (q, plan) = lower_and_plan(&graph, &sourced.ranges, &lower, weight_form, req.stream)?;
    let schedule = schedule_of(&q, &plan);
    let opt = gen_options(
        &req.module,
        target.as_ref(),
        weight_form,
        camera_for(req.camera.as_ref(), target.as_ref()),
        format!("{graph_hash}:{}", sourced.hash),
    );
    let generated = codegen::generate(&q, &schedule, &opt)?;
    let budget = target
        .as_ref()
        .map(|t| budget_of(&q, &plan, t, Some(&generated)));
    Ok(Compiled {
        graph,
        ranges: sourced.ranges,
        qgraph: q,
        plan,
        schedule,
        target,
        budget,
        generated,
    })
}

/// Generates an already lowered graph with the naive schedule (no graph
/// file, ranges or planning), judged against `target` like [`compile`]:
/// the build script's [`Builder::lowered`](build_script::Builder::lowered).
pub fn compile_lowered(
    q: &QGraph,
    target: Option<&Path>,
    module: &str,
    weight_form: Option<WeightForm>,
    camera: Option<&crate::camera::Camera>,
) -> Result<Generated, PipelineError> {
    let target = target.map(load_target).transpose()?;
    let weight_form = weight_form_for(weight_form, target.as_ref());
    let opt = gen_options(
        module,
        target.as_ref(),
        weight_form,
        camera_for(camera, target.as_ref()),
        String::new(),
    );
    let generated = codegen::generate(q, &Schedule::naive(q), &opt)?;
    let budget = target.as_ref().map(|t| {
        let r = &generated.report;
        crate::plan::target::budget_for(
            q,
            r.arena_bytes as u64,
            r.patch_bytes as u64,
            weight_form,
            t,
            Some(r.weights_flash_bytes as u64),
        )
    });
    refuse_over(&q.name, budget.as_ref())?;
    Ok(generated)
}
