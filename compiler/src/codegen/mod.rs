//! Code generation: a lowered [`QGraph`] and a [`Schedule`] become one Rust
//! module (`NAME.rs`) plus its binary weights file (`NAME.weights.bin`).
//!
//! The module is `no_std`, allocation-free, free of `unsafe` and of floating
//! point on the inference path; it calls the `ingot-rt` kernels with
//! parameters that were all executed once by the compiler (see [`calls`]).
//! Its public API:
//!
//! ```text
//! pub const MODEL_NAME: &str;            pub const INPUT_SHAPE: [usize; 3]; // H, W, C
//! pub const INPUT_LEN: usize;            pub const OUTPUT_LEN: usize;
//! pub const ARENA_BYTES: usize;          pub const PATCH_LEN: usize; // i16
//! pub const PATCH_BYTES: usize;          pub const SCRATCH_BYTES: usize;
//! pub const INPUT_SCALE: f32;            pub const INPUT_ZERO_POINT: i32;
//! pub const OUTPUT_SCALE: f32;           pub const OUTPUT_ZERO_POINT: i32;
//! pub const SOFTMAX_DROPPED: bool;       pub const LABELS: [&str; N];
//! pub const MODEL_HASH: &str;            pub const INGOT_VERSION: &str;
//! pub const STEP_COUNT: usize;           pub const STEP_NAMES: [&str; STEP_COUNT];
//! pub const STEP_MAP_NAMES: [&str; STEP_COUNT];
//! pub struct Scratch { .. }              impl Scratch { pub const fn new() -> Self }
//! pub fn run(scratch: &mut Scratch, input: &[i8; INPUT_LEN], output: &mut [i8; OUTPUT_LEN]);
//! #[cfg(feature = "ingot-trace")]
//! pub fn run_traced(scratch, input, output, f: &mut dyn FnMut(usize, &str, &[i8]));
//! pub fn quantize_pixels(pixels: &[u8; INPUT_LEN], input: &mut [i8; INPUT_LEN]);
//! pub fn argmax(output: &[i8; OUTPUT_LEN]) -> usize;
//! pub fn dequantize(output: &[i8; OUTPUT_LEN], out: &mut [f32; OUTPUT_LEN]);
//! ```

pub(crate) mod blob;
pub(crate) mod calls;
pub mod camera;
pub(crate) mod emit;
pub(crate) mod names;
pub mod output;
pub mod report;
pub(crate) mod wide;

// The weight form and the schedule are the planner's (it sizes the patch
// buffer for the form); re-exported under their former paths.
pub use crate::plan::form::{pair_growth, WeightForm};
pub use crate::plan::schedule;
pub use crate::plan::{MapView, Schedule};

use crate::lower::QGraph;

/// How tensors reach the module.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum WeightsMode {
    /// `include_bytes!` of the weights file, decoded into `static` arrays by
    /// `const fn`s at compile time (the default: fast to compile).
    #[default]
    IncludeBytes,
    /// Every tensor as a literal array in the `.rs` file (for comparison; the
    /// weights file is still written but not read).
    Literal,
}

/// The target as the generator names it in docs and reports. Whether the
/// module fits is not the generator's call: the driver judges it with the
/// planner's budget ([`crate::plan::target::budget_for`]).
#[derive(Debug, Clone, PartialEq, Eq, Default)]
#[non_exhaustive]
pub struct TargetInfo {
    /// Name for docs and reports.
    pub name: String,
}

impl TargetInfo {
    /// The target called `name`.
    pub fn named(name: &str) -> Self {
        TargetInfo { name: name.into() }
    }
}

/// Generator options.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct GenOptions {
    /// Module name: files are `NAME.rs` and `NAME.weights.bin`.
    pub module: String,
    /// Target, for docs and reports.
    pub target: Option<TargetInfo>,
    /// Weights embedding.
    pub weights: WeightsMode,
    /// Hash of the source files (graph, weights, ranges), mixed into
    /// `MODEL_HASH`.
    pub source_hash: String,
    /// Run every kernel call once at generation time (default true). Turning
    /// it off only skips the dry run, not the static checks.
    pub dry_run: bool,
    /// How convolution weights are stored (default int8).
    pub weight_form: WeightForm,
    /// The camera, when frames come in (adds `FRAME_*` and `frame_to_input`).
    pub camera: Option<crate::camera::Camera>,
}

impl Default for GenOptions {
    fn default() -> Self {
        GenOptions {
            module: "model".into(),
            target: None,
            weights: WeightsMode::default(),
            source_hash: String::new(),
            dry_run: true,
            weight_form: WeightForm::Int8,
            camera: None,
        }
    }
}

/// The generated files, in memory.
#[derive(Debug, Clone)]
pub struct Generated {
    /// `NAME.rs`.
    pub module: String,
    /// `NAME.weights.bin`.
    pub weights: Vec<u8>,
    /// `NAME.report.md`.
    pub report_md: String,
    /// `NAME.report.json`.
    pub report_json: String,
    /// The report's data.
    pub report: report::Report,
}

impl Generated {
    /// `(file name, contents)` of every file, for writing.
    pub fn files(&self, module: &str) -> Vec<(String, Vec<u8>)> {
        vec![
            (format!("{module}.rs"), self.module.clone().into_bytes()),
            (format!("{module}.weights.bin"), self.weights.clone()),
            (
                format!("{module}.report.md"),
                self.report_md.clone().into_bytes(),
            ),
            (
                format!("{module}.report.json"),
                self.report_json.clone().into_bytes(),
            ),
        ]
    }
}

/// Why generation failed.
#[derive(Debug, thiserror::Error)]
pub enum CodegenError {
    /// The lowered graph is inconsistent.
    #[error("lowered graph `{0}` is inconsistent: {1}")]
    Graph(String, crate::lower::ir::QGraphError),
    /// The schedule does not fit the graph.
    #[error("schedule is invalid: {0}")]
    Schedule(#[from] calls::CallError),
    /// A kernel refused its parameters during the dry run.
    #[error("step `{step}` ({kind}): ingot-rt refused the call: {error:?}")]
    Kernel {
        /// Layer name.
        step: String,
        /// Kernel kind.
        kind: &'static str,
        /// The kernel's error.
        error: ingot_rt::Error,
    },
    /// The module name is not a plain file stem.
    #[error("module name `{0}` must be a non-empty identifier ([A-Za-z_][A-Za-z0-9_]*)")]
    ModuleName(String),
    /// The camera does not fit the network's input or the kernel's limits.
    #[error(transparent)]
    Camera(#[from] crate::camera::CameraError),
}

pub(crate) use crate::util::{fnv1a, FNV_BASIS};
pub use calls::CallError;
pub use names::stem as module_stem;

fn kernel_error(q: &QGraph, e: calls::ExecError) -> CodegenError {
    let st = q.step(e.step);
    CodegenError::Kernel {
        step: st.name.clone(),
        kind: st.kernel.kind(),
        error: e.error,
    }
}

/// Runs `q` on one int8 input (HWC) the way a module generated with
/// schedule `s` and int8 weights does: the same kernel calls in the same
/// order, in one arena. `trace` sees every step's output map (HWC) after
/// it runs, in the schedule's order. The compiler's interpretation of a
/// module, for tests that compare it with the module or the simulator.
pub fn interpret(
    q: &QGraph,
    s: &Schedule,
    input: &[i8],
    trace: &mut dyn FnMut(crate::lower::StepId, &[i8]),
) -> Result<Vec<i8>, CodegenError> {
    let steps = calls::step_calls(q, s)?;
    calls::execute(q, s, &steps, input, trace).map_err(|e| kernel_error(q, e))
}

/// Every map's arena view under `s`, as the generated module addresses it
/// (an int16 map's offset in bytes): the layout for
/// [`Simulator::with_layout`](crate::lower::Simulator::with_layout).
pub fn arena_refs(q: &QGraph, s: &Schedule) -> Vec<ingot_rt::MapRef> {
    (0..q.maps.len())
        .map(|i| wide::map_ref(q, s, crate::lower::QMapId(i as u32)))
        .collect()
}

/// True for `[A-Za-z_][A-Za-z0-9_]*`.
pub fn is_module_name(s: &str) -> bool {
    let mut c = s.chars();
    matches!(c.next(), Some(ch) if ch.is_ascii_alphabetic() || ch == '_')
        && c.all(|ch| ch.is_ascii_alphanumeric() || ch == '_')
}

/// Generates the module, weights file and reports.
pub fn generate(q: &QGraph, s: &Schedule, opt: &GenOptions) -> Result<Generated, CodegenError> {
    if !is_module_name(&opt.module) {
        return Err(CodegenError::ModuleName(opt.module.clone()));
    }
    if let Some(cam) = &opt.camera {
        camera::params(q, cam)?;
    }
    // The paired form's row buffers may need a larger patch than the
    // schedule was made with.
    let need = crate::plan::patch_bytes_for(q, opt.weight_form);
    let grown;
    let s = if s.patch_bytes < need {
        grown = Schedule {
            patch_bytes: need,
            ..s.clone()
        };
        &grown
    } else {
        s
    };
    q.verify()
        .map_err(|e| CodegenError::Graph(q.name.clone(), e))?;
    calls::check_schedule(q, s)?;
    let mut steps = calls::step_calls(q, s)?;
    calls::set_weight_form(&mut steps, opt.weight_form);
    if opt.dry_run {
        let zp = q.input_qp().zero_point as i8;
        let input = vec![zp; q.map(q.input).shape.len()];
        calls::execute(q, s, &steps, &input, &mut |_, _| {}).map_err(|e| kernel_error(q, e))?;
    }
    let blob = blob::build(q, opt.weight_form);
    let mut namer = names::Namer::default();
    let stems: Vec<String> = q.steps.iter().map(|st| namer.unique(&st.name)).collect();

    let mut h = fnv1a(
        FNV_BASIS,
        &serde_json::to_vec(q).expect("QGraph serializes"),
    );
    h = fnv1a(h, &serde_json::to_vec(s).expect("Schedule serializes"));
    h = fnv1a(h, opt.source_hash.as_bytes());
    let hash = format!("{h:016x}");

    let rep = report::build(q, s, &steps, &blob, opt, &hash);
    let figures = rep.figures();
    let table = rep.table();
    let ctx = emit::Ctx {
        q,
        s,
        calls: &steps,
        blob: &blob,
        stems: &stems,
        opt,
        hash: &hash,
        table: &table,
        figures: &figures,
    };
    let module = emit::module(&ctx);
    Ok(Generated {
        module,
        weights: blob.bytes,
        report_md: rep.markdown(),
        report_json: rep.json(),
        report: rep,
    })
}
