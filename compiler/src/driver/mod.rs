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
use crate::calibrate::{CalibOptions, ImageError, ImageSet, Ranges, RangesError};
use crate::codegen::{self, CodegenError, GenOptions, Generated, Schedule, TargetInfo, WeightForm};
use crate::lower::{LowerError, LowerOptions, QGraph};
use crate::plan::{Budget, Plan, PlanError, PlanOptions, Target, TargetError};
use crate::Graph;
use std::path::{Path, PathBuf};

/// Where the quantization ranges come from.
#[derive(Debug, Clone, PartialEq)]
pub enum RangesSource {
    /// A saved `ingot.ranges.v1` file.
    File(PathBuf),
    /// Calibrate on the images in this folder with this range method
    /// (otherwise default [`CalibOptions`]).
    Images(PathBuf, crate::calibrate::Method),
}

/// One compilation request.
#[derive(Debug, Clone)]
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
        matches!(
            self,
            PipelineError::Budget { .. } | PipelineError::Codegen(CodegenError::Budget { .. })
        )
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

/// Generator view of a target: its name and the memory left after the
/// reserves.
pub fn target_info(t: &Target) -> TargetInfo {
    TargetInfo {
        name: t.name.clone(),
        ram_bytes: Some(t.ram.bytes.saturating_sub(t.ram.reserve) as usize),
        flash_bytes: Some(t.flash.bytes.saturating_sub(t.flash.reserve) as usize),
    }
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
    }
    v.extend(req.target.clone());
    v
}

/// Ranges for `graph` from `src`, and a hash of where they came from.
pub fn ranges_for(graph: &Graph, src: &RangesSource) -> Result<(Ranges, String), PipelineError> {
    let hash = crate::calibrate::ranges::graph_hash(graph).map_err(|source| PipelineError::Io {
        path: PathBuf::from(graph.name()),
        source,
    })?;
    match src {
        RangesSource::File(p) => {
            let r = Ranges::load(graph, p, Some(&hash))?;
            let bytes = std::fs::read(p).map_err(|source| PipelineError::Io {
                path: p.clone(),
                source,
            })?;
            Ok((
                r,
                format!("{:016x}", codegen::fnv1a(codegen::FNV_BASIS, &bytes)),
            ))
        }
        RangesSource::Images(dir, method) => {
            let images = ImageSet::open(dir, graph)?;
            let opts = CalibOptions {
                method: *method,
                ..CalibOptions::default()
            };
            let cal = crate::agree::run(graph, &images, &opts)?;
            let bytes = serde_json::to_vec(&cal.ranges.maps).unwrap_or_default();
            Ok((
                cal.ranges,
                format!("{:016x}", codegen::fnv1a(codegen::FNV_BASIS, &bytes)),
            ))
        }
    }
}

/// Runs the whole pipeline in memory; fails with
/// [`PipelineError::Budget`] when the model does not fit the target.
pub fn compile(req: &BuildInputs) -> Result<Compiled, PipelineError> {
    let c = compile_unchecked(req)?;
    if let Some(b) = &c.budget {
        if !b.fits {
            return Err(PipelineError::Budget {
                graph: c.qgraph.name.clone(),
                target: b.target.clone(),
                over: b.over.clone(),
                budget: Box::new(b.clone()),
            });
        }
    }
    Ok(c)
}

/// [`compile`] without refusing a model that is over the target's budget
/// (the verdict is in [`Compiled::budget`]); for reports.
pub fn compile_unchecked(req: &BuildInputs) -> Result<Compiled, PipelineError> {
    let target = req.target.as_deref().map(load_target).transpose()?;
    let graph = crate::load(&req.graph)?;
    let (ranges, ranges_hash) = ranges_for(&graph, &req.ranges)?;
    let graph_hash =
        crate::calibrate::ranges::graph_hash(&graph).map_err(|source| PipelineError::Io {
            path: req.graph.clone(),
            source,
        })?;
    let q = crate::lower::lower(&graph, &ranges, &LowerOptions::default())?;
    let weight_form = weight_form_for(req.weight_form, target.as_ref());
    let plan = crate::plan::plan(
        &q,
        &PlanOptions {
            weight_form,
            ..PlanOptions::default()
        },
    )?;
    let schedule = schedule_of(&q, &plan);
    let opt = GenOptions {
        module: req.module.clone(),
        // The budget is checked below with the planner's figures; the
        // generator only names the target.
        target: target.as_ref().map(|t| TargetInfo {
            name: t.name.clone(),
            ram_bytes: None,
            flash_bytes: None,
        }),
        source_hash: format!("{graph_hash}:{ranges_hash}"),
        weight_form,
        camera: camera_for(req.camera.as_ref(), target.as_ref()),
        ..GenOptions::default()
    };
    let generated = codegen::generate(&q, &schedule, &opt)?;
    let budget = target.as_ref().map(|t| {
        crate::plan::target::budget_with_weights_file(
            &q,
            &plan,
            t,
            Some(generated.report.weights_flash_bytes as u64),
        )
    });
    Ok(Compiled {
        graph,
        ranges,
        qgraph: q,
        plan,
        schedule,
        target,
        budget,
        generated,
    })
}
