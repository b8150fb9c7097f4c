//! The build-script API: generate a model module from `build.rs`.
//!
//! ```no_run
//! // in build.rs's `main`:
//! ingot_compiler::build::Builder::new("model/net.graph.json")
//!     .ranges("model/net.ranges.json")
//!     .target("targets/stm32f4.toml")
//!     .module("model")
//!     .generate_or_exit();
//! ```
//!
//! and in the crate: `mod model { include!(concat!(env!("OUT_DIR"), "/model.rs")); }`.

use crate::codegen::output::{self, OutputError};
use crate::codegen::report::Report;
use crate::driver::{self as pipeline, BuildInputs, PipelineError, RangesSource};
use std::path::{Path, PathBuf};

/// Configures and runs one generation from a build script.
#[derive(Debug, Clone)]
pub struct Builder {
    graph: PathBuf,
    ranges: Option<RangesSource>,
    target: Option<PathBuf>,
    module: String,
    out_dir: Option<PathBuf>,
    lowered: Option<Box<crate::lower::QGraph>>,
    weight_form: Option<crate::codegen::WeightForm>,
    camera: Option<crate::camera::Camera>,
    stream: bool,
    wide: pipeline::WideChoice,
}

/// What [`Builder::generate`] wrote.
#[derive(Debug, Clone)]
pub struct Built {
    /// Path of the generated `.rs` module.
    pub module: PathBuf,
    /// Path of the weights file.
    pub weights: PathBuf,
    /// The generation report (sizes, layers).
    pub report: Report,
}

/// Why generation failed. Its `Display` is one readable sentence.
#[derive(Debug, thiserror::Error)]
pub enum BuildError {
    /// Neither `.ranges()` nor `.images()` was given.
    #[error(
        "ingot: {0}: no quantization ranges; call .ranges(\"x.ranges.json\") or .images(\"dir\")"
    )]
    NoRanges(PathBuf),
    /// No output folder: not run by cargo and no `.out_dir()`.
    #[error("ingot: OUT_DIR is not set (not running from a build script?); call .out_dir(path)")]
    NoOutDir,
    /// Compilation failed.
    #[error("ingot: {0}")]
    Pipeline(Box<PipelineError>),
    /// Writing failed.
    #[error("ingot: {0}")]
    Output(#[from] OutputError),
}

impl From<PipelineError> for BuildError {
    fn from(e: PipelineError) -> Self {
        BuildError::Pipeline(Box::new(e))
    }
}

impl BuildError {
    /// True when the model is valid but too large for the target.
    pub fn is_budget(&self) -> bool {
        matches!(self, BuildError::Pipeline(e) if e.is_budget())
    }
}

impl Builder {
    /// Generation from the graph file `graph` (its weights file is found
    /// through the graph). Relative paths are relative to the package
    /// folder, the working directory of build scripts.
    pub fn new(graph: impl AsRef<Path>) -> Self {
        Builder {
            graph: graph.as_ref().into(),
            ranges: None,
            target: None,
            module: "model".into(),
            out_dir: None,
            lowered: None,
            weight_form: None,
            camera: None,
            stream: true,
            wide: pipeline::WideChoice::Off,
        }
    }

    /// Generation from an already lowered graph (no graph file, ranges or
    /// calibration; the naive schedule).
    pub fn lowered(q: crate::lower::QGraph) -> Self {
        let mut b = Builder::new(format!("<lowered graph `{}`>", q.name));
        b.lowered = Some(Box::new(q));
        b
    }

    /// Use a saved ranges file.
    pub fn ranges(mut self, path: impl AsRef<Path>) -> Self {
        self.ranges = Some(RangesSource::File(path.as_ref().into()));
        self
    }

    /// Calibrate on the images in a folder (min/max ranges).
    pub fn images(self, dir: impl AsRef<Path>) -> Self {
        self.images_with(dir, crate::calibrate::Method::MinMax)
    }

    /// Calibrate on the images in a folder with the given range method.
    pub fn images_with(mut self, dir: impl AsRef<Path>, method: crate::calibrate::Method) -> Self {
        self.ranges = Some(RangesSource::Images(dir.as_ref().into(), method));
        self
    }

    /// Check the model against a target description.
    pub fn target(mut self, path: impl AsRef<Path>) -> Self {
        self.target = Some(path.as_ref().into());
        self
    }

    /// Module name (default `model`): files `NAME.rs`, `NAME.weights.bin`,
    /// `NAME.report.md`, `NAME.report.json`.
    pub fn module(mut self, name: &str) -> Self {
        self.module = name.into();
        self
    }

    /// How convolution weights are stored (default: chosen by the target's
    /// core, see [`WeightForm::for_core`](crate::codegen::WeightForm::for_core); int8
    /// without a target).
    pub fn weight_form(mut self, form: crate::codegen::WeightForm) -> Self {
        self.weight_form = Some(form);
        self
    }

    /// Frames come from this camera (instead of the target's `[camera]`):
    /// the module gets `FRAME_BYTES` and `frame_to_input`.
    pub fn camera(mut self, camera: crate::camera::Camera) -> Self {
        self.camera = Some(camera);
        self
    }

    /// Row streaming (default on): `false` stores every map whole, as
    /// `ingot build --no-stream` (more RAM; see `docs/memory-plan.md`).
    /// Generation from a graph file only.
    pub fn stream(mut self, on: bool) -> Self {
        self.stream = on;
        self
    }

    /// Keep these layers' output maps in int16 (`ingot build --wide`):
    /// named layers, or `auto:N` for the `N` layers the sensitivity
    /// ranking on the [`images`](Self::images) puts first (an error with a
    /// ranges file). A member of a concatenation region widens its region.
    pub fn wide(mut self, choice: pipeline::WideChoice) -> Self {
        self.wide = choice;
        self
    }

    /// Output folder instead of `OUT_DIR`.
    pub fn out_dir(mut self, dir: impl AsRef<Path>) -> Self {
        self.out_dir = Some(dir.as_ref().into());
        self
    }

    fn request(&self) -> Result<BuildInputs, BuildError> {
        let ranges = self
            .ranges
            .clone()
            .ok_or_else(|| BuildError::NoRanges(self.graph.clone()))?;
        let mut req = BuildInputs::new(self.graph.clone(), ranges);
        req.target = self.target.clone();
        req.module = self.module.clone();
        req.weight_form = self.weight_form;
        req.camera = self.camera.clone();
        req.stream = self.stream;
        req.wide = self.wide.clone();
        Ok(req)
    }

    /// The files this generation reads (graph, weights, ranges or image
    /// folder, target).
    pub fn inputs(&self) -> Vec<PathBuf> {
        if self.lowered.is_some() {
            return self.target.iter().cloned().collect();
        }
        match self.request() {
            Ok(r) => pipeline::inputs(&r),
            Err(_) => vec![self.graph.clone()],
        }
    }

    /// Generates into `OUT_DIR` (or [`out_dir`](Self::out_dir)), printing
    /// `cargo:rerun-if-changed=` for every input first (so a failed build is
    /// retried when an input changes).
    pub fn generate(self) -> Result<Built, BuildError> {
        for p in self.inputs() {
            println!("cargo:rerun-if-changed={}", p.display());
        }
        let out = match &self.out_dir {
            Some(d) => d.clone(),
            None => std::env::var_os("OUT_DIR")
                .map(PathBuf::from)
                .ok_or(BuildError::NoOutDir)?,
        };
        let g = match &self.lowered {
            Some(q) => pipeline::compile_lowered(
                q,
                self.target.as_deref(),
                &self.module,
                self.weight_form,
                self.camera.as_ref(),
            )?,
            None => pipeline::compile(&self.request()?)?.generated,
        };
        output::write_all(&out, &g.files(&self.module), true)?;
        Ok(Built {
            module: out.join(format!("{}.rs", self.module)),
            weights: out.join(format!("{}.weights.bin", self.module)),
            report: g.report,
        })
    }

    /// [`generate`](Self::generate), or on failure print the error as a cargo
    /// warning and an `error:` line and exit with status 1 (no panic, no
    /// backtrace).
    pub fn generate_or_exit(self) -> Built {
        match self.generate() {
            Ok(b) => b,
            Err(e) => {
                let msg = e.to_string();
                for line in msg.lines() {
                    println!("cargo:warning={line}");
                }
                eprintln!("error: {msg}");
                if e.is_budget() {
                    eprintln!("note: choose a larger target or a smaller model; the report lists per-layer sizes");
                }
                std::process::exit(1);
            }
        }
    }
}
