//! From a float graph and image folders to everything [`run_check`] needs:
//! ranges (a file, or calibration on images), the lowered [`QGraph`], the
//! memory plan, the generated module on disk, and the comparison data
//! (int8 inputs, integer simulator outputs and trace, float reference
//! outputs, labels, per-step SQNR).
//!
//! The int8 inputs are quantized once, from the sample's pixel bytes through
//! the lowered graph's pixel table (or from the `.npy` float input with the
//! input map's parameters); the same codes go to the simulator and to the
//! module, so both see identical inputs.
//!
//! [`run_check`]: super::pipeline::run_check

use super::pipeline::{CheckData, StepInfo};
use crate::agree::AgreeError;
use crate::calibrate::{self, ImageError, ImageSet};
use crate::codegen::{self, calls::CallError, CodegenError, Generated, Schedule};
use crate::driver::{self, PipelineError, RangesSource};
use crate::graph::Graph;
use crate::lower::{self, quant, LowerError, LowerOptions, QGraph, SimError, SimInput, Simulator};
use crate::plan::{self, Plan, PlanError, TargetError};
use crate::ranges::RangesError;
use crate::reference::{Reference, ReferenceError};
use std::path::{Path, PathBuf};

/// A failure while preparing a check; the message starts with the option
/// or stage it concerns.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PrepareError {
    /// The graph did not load.
    #[error("loading the graph: {0}")]
    Load(Box<crate::LoadError>),
    /// The target profile is unusable.
    #[error("--target: {0}")]
    Target(TargetError),
    /// The checked images are unusable.
    #[error("--images: {0}")]
    Images(ImageError),
    /// The checked images' folder holds none.
    #[error("--images: no images in {}", .0.display())]
    NoImages(PathBuf),
    /// The ranges file is unusable.
    #[error("--ranges: {0}")]
    Ranges(RangesError),
    /// The calibration images are unusable.
    #[error("--calib-images: {0}")]
    CalibImages(ImageError),
    /// Calibration failed.
    #[error("calibration: {0}")]
    Calibration(AgreeError),
    /// The graph's files could not be hashed.
    #[error("hashing the graph: {0}")]
    Hash(std::io::Error),
    /// Lowering failed.
    #[error("lowering: {0}")]
    Lower(LowerError),
    /// Memory planning failed.
    #[error("planning: {0}")]
    Plan(PlanError),
    /// The module could not be generated, even with the naive schedule.
    #[error("generating the module: {0}")]
    Generate(CodegenError),
    /// The schedule cannot be turned into kernel calls.
    #[error("schedule: {0}")]
    Schedule(CallError),
    /// The float reference failed on an image.
    #[error("float reference: {0}")]
    Reference(ReferenceError),
    /// The float reference gave no output map.
    #[error("float reference: no output map")]
    NoFloatOutput,
    /// The integer simulator failed on an image.
    #[error("integer simulator: {0}")]
    Simulator(SimError),
    /// The sensitivity measurement failed.
    #[error("sensitivity: {0}")]
    Sensitivity(crate::agree::EvalError),
    /// Another step of the driver failed.
    #[error(transparent)]
    Driver(Box<PipelineError>),
    /// Writing the module failed.
    #[error("{}: {source}", .path.display())]
    Write {
        /// The folder or file.
        path: PathBuf,
        /// The error.
        source: std::io::Error,
    },
    /// The written module was not found again.
    #[error("module: {0}")]
    Module(super::CheckError),
}

impl PrepareError {
    /// The driver's error, named by the option or stage of a check
    /// (`images`: the ranges came from `--calib-images`).
    fn from_driver(e: PipelineError) -> Self {
        match e {
            PipelineError::Load(e) => PrepareError::Load(e),
            PipelineError::Target(e) => PrepareError::Target(e),
            PipelineError::Ranges(e) => PrepareError::Ranges(e),
            PipelineError::Images(e) => PrepareError::CalibImages(e),
            PipelineError::Calibrate(e) => PrepareError::Calibration(e),
            PipelineError::Io { source, .. } => PrepareError::Hash(source),
            PipelineError::Lower(e) => PrepareError::Lower(e),
            PipelineError::Plan(e) => PrepareError::Plan(e),
            e => PrepareError::Driver(Box::new(e)),
        }
    }
}

/// What to prepare.
#[derive(Debug, Clone)]
#[non_exhaustive]
pub struct PrepareOptions {
    /// Ranges source (default: min/max calibration on the checked images).
    pub ranges: RangesSource,
    /// Weight scales per output channel (default) or per tensor.
    pub per_channel: bool,
    /// Target profile for the budget.
    pub target: Option<PathBuf>,
    /// Module name (`NAME.rs`); empty: derived from the graph's name.
    pub module: String,
    /// How convolution weights are stored; `None`: the target's core
    /// decides (int8 without a target).
    pub weight_form: Option<codegen::WeightForm>,
    /// The camera images go through (see [`crate::calibrate::frames`]);
    /// `None`: the target's `[camera]`, if any.
    pub camera: Option<crate::camera::Camera>,
    /// Correct biases empirically when calibrating (`check
    /// --bias-correction`; an error with a ranges file).
    pub bias_correction: bool,
    /// Equalize depthwise pairs before calibrating (`check --equalize`; an
    /// error with a ranges file, which says itself whether it was).
    pub equalize: bool,
    /// Measure the per-layer sensitivity on the checked images (`check
    /// --sensitivity`).
    pub sensitivity: bool,
    /// Stream rows through rings where the planner finds it lowers the
    /// RAM (default true; `check --no-stream` turns it off).
    pub stream: bool,
    /// Layers whose output maps stay int16 (`check --wide`); `auto:N`
    /// ranks on the calibration images, else on the checked ones.
    pub wide: driver::WideChoice,
}

impl Default for PrepareOptions {
    fn default() -> Self {
        PrepareOptions {
            ranges: RangesSource::CheckImages(calibrate::Method::MinMax),
            per_channel: true,
            target: None,
            module: String::new(),
            weight_form: None,
            camera: None,
            bias_correction: false,
            equalize: false,
            sensitivity: false,
            stream: true,
            wide: driver::WideChoice::Off,
        }
    }
}

/// Everything prepared.
#[derive(Debug)]
pub struct Prepared {
    /// Comparison data for [`super::pipeline::run_check`].
    pub data: CheckData,
    /// The lowered graph.
    pub q: QGraph,
    /// The memory plan.
    pub plan: Plan,
    /// The schedule the module was generated with.
    pub schedule: Schedule,
    /// `planned` or `naive (reason)`.
    pub schedule_kind: String,
    /// The generated files.
    pub generated: Generated,
    /// The budget against the target profile, if one was given.
    pub budget: Option<plan::Budget>,
    /// Where the ranges came from, in words.
    pub ranges_note: String,
    /// Image names, in check order.
    pub image_names: Vec<String>,
    /// With a camera and labels: the camera path against host-resized
    /// pictures (put it in the report's `camera`).
    pub camera: Option<super::camera::CameraFigures>,
    /// With [`PrepareOptions::sensitivity`]: the per-layer sensitivity on
    /// the checked images (put it in the report's `sensitivity`).
    pub sensitivity: Option<crate::agree::sensitivity::Sensitivity>,
    /// With int16 maps: which, and the arena with and without them (put
    /// it in the report's `wide`).
    pub wide: Option<super::report::WideArena>,
}

/// Loads, calibrates (or reads ranges), lowers, plans, generates, and runs
/// the integer simulator and the float reference on every image of
/// `images`.
pub fn prepare(
    graph_path: &Path,
    images: &Path,
    opts: &PrepareOptions,
) -> Result<Prepared, PrepareError> {
    let g = crate::load(graph_path).map_err(|e| PrepareError::Load(Box::new(e)))?;
    let target = opts
        .target
        .as_deref()
        .map(driver::load_target)
        .transpose()
        .map_err(PrepareError::from_driver)?;
    let camera = driver::camera_for(opts.camera.as_ref(), target.as_ref());
    let set = ImageSet::open_camera(images, &g, camera.as_ref()).map_err(PrepareError::Images)?;
    if set.is_empty() {
        return Err(PrepareError::NoImages(images.to_path_buf()));
    }
    let sourced = driver::ranges_for_with(
        &g,
        &opts.ranges,
        Some(&set),
        camera.as_ref(),
        opts.bias_correction,
        opts.equalize,
    )
    .map_err(PrepareError::from_driver)?;
    // The graph the ranges were observed on (equalized when a ranges file
    // says so); the same function as the loaded one.
    let g = driver::graph_for(&g, &sourced).into_owned();
    let weight_form = driver::weight_form_for(opts.weight_form, target.as_ref());
    let int8_opts = LowerOptions {
        per_channel: opts.per_channel,
        ..LowerOptions::default()
    };
    // `auto:N` ranks on the calibration images when there are some.
    let calib_set = match (&opts.ranges, opts.wide.needs_ranking()) {
        (RangesSource::Images(dir, _), true) => Some(
            ImageSet::open_camera(dir, &g, camera.as_ref()).map_err(PrepareError::CalibImages)?,
        ),
        _ => None,
    };
    let lower_opts = driver::wide_options(
        &g,
        &sourced.ranges,
        &opts.wide,
        Some(calib_set.as_ref().unwrap_or(&set)),
        &int8_opts,
    )
    .map_err(PrepareError::from_driver)?;
    let (q, p) = driver::lower_and_plan(&g, &sourced.ranges, &lower_opts, weight_form, opts.stream)
        .map_err(PrepareError::from_driver)?;
    let wide = if q.wide.is_empty() {
        None
    } else {
        let int8 =
            driver::lower_and_plan(&g, &sourced.ranges, &int8_opts, weight_form, opts.stream)
                .map_err(PrepareError::from_driver)?
                .1;
        Some(super::report::WideArena {
            maps: q
                .wide
                .iter()
                .map(|w| (q.map(w.map).name.clone(), w.because.clone()))
                .collect(),
            arena_bytes: p.arena_bytes,
            arena_bytes_int8: int8.arena_bytes,
        })
    };
    let sensitivity = if opts.sensitivity {
        Some(
            driver::sensitivity_on(&g, &set, &sourced.ranges, &lower_opts)
                .map_err(PrepareError::Sensitivity)?,
        )
    } else {
        None
    };
    let budget = target.as_ref().map(|t| driver::budget_of(&q, &p, t, None));
    let module = if opts.module.is_empty() {
        module_name(g.name())
    } else {
        opts.module.clone()
    };
    let gen_opts = driver::gen_options(
        &module,
        target.as_ref(),
        weight_form,
        camera.clone(),
        String::new(),
    );
    let planned = driver::schedule_of(&q, &p);
    let (schedule, schedule_kind, generated) = match codegen::generate(&q, &planned, &gen_opts) {
        Ok(gen) => (planned, "planned".to_string(), gen),
        Err(e) => {
            let naive = Schedule::naive(&q);
            let gen = codegen::generate(&q, &naive, &gen_opts).map_err(PrepareError::Generate)?;
            (
                naive,
                format!("naive (the planned schedule failed: {e})"),
                gen,
            )
        }
    };
    let data = compare_data(&g, &set, &q, &schedule, &generated)?;
    let camera_figures = match (&camera, set.camera()) {
        (Some(cam), Some(path)) if data.labels.is_some() => {
            // Raw frames have no host-resized counterpart: no comparison.
            let plain = ImageSet::open(images, &g)
                .ok()
                .filter(|p| p.len() == set.len());
            if let Some(plain) = plain {
                let host = compare_data(&g, &plain, &q, &schedule, &generated)?;
                let c = path.params.config();
                let about = format!(
                    "{cam}, region x={} y={} w={} h={}, {:?}",
                    c.roi.x, c.roi.y, c.roi.w, c.roi.h, cam.resize
                )
                .to_lowercase();
                super::camera::figures(about, &data, &host)
            } else {
                None
            }
        }
        _ => None,
    };
    Ok(Prepared {
        data,
        q,
        plan: p,
        schedule,
        schedule_kind,
        generated,
        budget,
        ranges_note: sourced.note,
        image_names: set.entries().iter().map(|e| e.name.clone()).collect(),
        camera: camera_figures,
        sensitivity,
        wide,
    })
}

/// A module name from a graph name: lower case, other characters as `_`,
/// `model` when nothing usable is left.
pub fn module_name(graph: &str) -> String {
    let mut n: String = graph
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '_'
            }
        })
        .collect();
    if n.starts_with(|c: char| c.is_ascii_digit()) {
        n.insert_str(0, "m_");
    }
    if codegen::is_module_name(&n) {
        n
    } else {
        "model".into()
    }
}

/// The int8 input codes (HWC) of one sample: pixel bytes through the
/// lowered graph's pixel table, or the `[C, H, W]` float input quantized
/// with the input map's parameters.
pub fn input_codes(q: &QGraph, sample: &calibrate::Sample) -> Vec<i8> {
    let m = q.map(q.input);
    let (c, hw) = (m.shape.c, m.shape.pixels());
    match &sample.pixels {
        Some(px) => px
            .iter()
            .enumerate()
            .map(|(i, &p)| q.pixel_table[(i % c) * 256 + p as usize])
            .collect(),
        None => (0..c * hw)
            .map(|i| quant::quantize(sample.input[(i % c) * hw + i / c], q.input_qp()))
            .collect(),
    }
}

fn compare_data(
    g: &Graph,
    set: &ImageSet,
    q: &QGraph,
    s: &Schedule,
    generated: &Generated,
) -> Result<CheckData, PrepareError> {
    let calls = codegen::calls::step_calls(q, s).map_err(PrepareError::Schedule)?;
    // Trace numbering: the module's executed steps, in order.
    let traced: Vec<lower::StepId> = calls.iter().map(|c| c.step).collect();
    let steps: Vec<StepInfo> = {
        let all = super::pipeline::steps_of(q);
        traced.iter().map(|s| all[s.index()].clone()).collect()
    };
    let reference = Reference::new(g);
    let mut sim = Simulator::new(q);
    let out_map = q.map(q.output);
    let float_out_map = out_map.float_map;
    let want: Vec<crate::MapId> = traced
        .iter()
        .map(|&st| q.map(q.step(st).output).float_map)
        .collect();
    let mut data = CheckData {
        model: q.name.clone(),
        model_hash: Some(generated.report.model_hash.clone()),
        weight_form: Some(generated.report.weight_form.to_string()),
        input_len: q.map(q.input).shape.len(),
        output_len: out_map.shape.len(),
        output_scale: q.output_qp().scale,
        output_zero_point: q.output_qp().zero_point,
        class_names: g.labels().to_vec(),
        steps,
        ..CheckData::default()
    };
    let (mut sim_out, mut trace, mut float_outs, mut labels) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let mut all_labelled = true;
    let mut sums = vec![(0f64, 0f64, false); traced.len()];
    for i in 0..set.len() {
        let sample = set.load(i).map_err(PrepareError::Images)?;
        let codes = input_codes(q, &sample);
        let mut float_maps: Vec<Option<Vec<f32>>> = vec![None; g.map_count()];
        reference
            .run_with(&sample.input, |m: crate::MapId, v: &[f32]| {
                if m == float_out_map || want.contains(&m) {
                    float_maps[m.index()] = Some(v.to_vec());
                }
            })
            .map_err(PrepareError::Reference)?;
        let out = sim
            .run(SimInput::Codes(&codes))
            .map_err(PrepareError::Simulator)?;
        for (k, &st) in traced.iter().enumerate() {
            let om = q.step(st).output;
            trace.push(super::io::TraceMap {
                image: i,
                step: k,
                name: q.map(om).name.clone(),
                // The module traces a map it stores as a ring as empty.
                data: if s.ring_rows(om).is_some() {
                    Vec::new()
                } else {
                    sim.map_trace(om)
                },
            });
            if let Some(f) = &float_maps[want[k].index()] {
                let d = sim.map_chw_f32(om);
                let slot = &mut sums[k];
                for (&a, &b) in f.iter().zip(&d) {
                    slot.0 += (a as f64).powi(2);
                    slot.1 += (a as f64 - b as f64).powi(2);
                }
                slot.2 = true;
            }
        }
        sim_out.push(out);
        float_outs.push(
            float_maps[float_out_map.index()]
                .take()
                .ok_or(PrepareError::NoFloatOutput)?,
        );
        match sample.label {
            Some(l) => labels.push(l),
            None => all_labelled = false,
        }
        data.inputs.push(codes);
    }
    // Camera runs: the runners get each sample's raw frame and call the
    // module's `frame_to_input` themselves (`.npy` samples have no frame:
    // then the codes go to the runners as before).
    if let Some(cam) = set.camera() {
        let frames: Option<Vec<Vec<u8>>> = (0..set.len())
            .map(|i| set.frame(i).map_err(PrepareError::Images))
            .collect::<Result<Vec<_>, _>>()?
            .into_iter()
            .collect();
        if frames.is_some() {
            data.frame_bytes = cam.frame_bytes();
        }
        data.frames = frames;
    }
    data.step_sqnr = sums
        .into_iter()
        .map(|(sig, noise, seen)| {
            seen.then(|| crate::measure::sqnr_db(sig, noise).unwrap_or(f64::INFINITY))
        })
        .collect();
    data.sim_outputs = Some(sim_out);
    data.sim_trace = Some(trace);
    data.float_outputs = Some(float_outs);
    data.labels = (all_labelled && !labels.is_empty()).then_some(labels);
    Ok(data)
}

/// Writes the generated files into `dir` (created) and returns them as
/// [`super::ModuleFiles`].
pub fn write_module(
    dir: &Path,
    module: &str,
    generated: &Generated,
) -> Result<super::ModuleFiles, PrepareError> {
    std::fs::create_dir_all(dir).map_err(|source| PrepareError::Write {
        path: dir.to_path_buf(),
        source,
    })?;
    for (name, bytes) in generated.files(module) {
        std::fs::write(dir.join(&name), bytes).map_err(|source| PrepareError::Write {
            path: PathBuf::from(name),
            source,
        })?;
    }
    super::ModuleFiles::find(dir, Some(module)).map_err(PrepareError::Module)
}
