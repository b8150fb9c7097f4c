//! From files to generated code: load the graph, obtain ranges (from a
//! ranges file or by calibrating on images), lower, schedule, generate.
//! Shared by `ingot build` and the build-script [`Builder`](super::build_script::Builder).

use super::{CodegenError, GenOptions, Generated, Schedule, TargetInfo};
use std::path::{Path, PathBuf};

/// Where the quantization ranges come from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum RangesSource {
    /// A saved `ingot.ranges.v1` file.
    File(PathBuf),
    /// Calibrate on the images in this folder.
    Images(PathBuf),
}

/// One compilation request.
#[derive(Debug, Clone)]
pub struct Request {
    /// The graph JSON.
    pub graph: PathBuf,
    /// Ranges.
    pub ranges: RangesSource,
    /// Target TOML, if any.
    pub target: Option<PathBuf>,
    /// Module name.
    pub module: String,
}

/// Why a compilation failed.
#[derive(Debug, thiserror::Error)]
pub enum PipelineError {
    /// The graph did not load.
    #[error(transparent)]
    Load(Box<crate::LoadError>),
    /// The ranges file is unusable.
    #[error(transparent)]
    Ranges(#[from] crate::calibrate::RangesError),
    /// A step the pipeline needs is not available in this build.
    #[error("{0}")]
    Unavailable(String),
    /// The target file is unusable.
    #[error("{path}: {msg}")]
    Target {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        msg: String,
    },
    /// Generation failed (includes "does not fit the target").
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
        matches!(self, PipelineError::Codegen(CodegenError::Budget { .. }))
    }
}

/// Reads a target description: `name` and optional `ram_bytes`/`ram_kib`,
/// `flash_bytes`/`flash_kib` keys (top level or under `[memory]`).
pub fn load_target(path: &Path) -> Result<TargetInfo, PipelineError> {
    let text = std::fs::read_to_string(path).map_err(|source| PipelineError::Io {
        path: path.into(),
        source,
    })?;
    let v: toml::Table = text
        .parse()
        .map_err(|e: toml::de::Error| PipelineError::Target {
            path: path.into(),
            msg: e.to_string(),
        })?;
    let get = |k: &str| -> Option<i64> {
        v.get(k)
            .or_else(|| v.get("memory").and_then(|m| m.get(k)))
            .and_then(|x| x.as_integer())
    };
    let bytes = |b: &str, kib: &str| {
        get(b)
            .or_else(|| get(kib).map(|k| k * 1024))
            .map(|n| n.max(0) as usize)
    };
    Ok(TargetInfo {
        name: v
            .get("name")
            .and_then(|n| n.as_str())
            .map(str::to_string)
            .unwrap_or_else(|| {
                path.file_stem()
                    .map(|s| s.to_string_lossy().into_owned())
                    .unwrap_or_default()
            }),
        ram_bytes: bytes("ram_bytes", "ram_kib"),
        flash_bytes: bytes("flash_bytes", "flash_kib"),
    })
}

/// Files the request reads (for `cargo:rerun-if-changed`).
pub fn inputs(req: &Request) -> Vec<PathBuf> {
    let mut v = vec![req.graph.clone()];
    if let Ok(text) = std::fs::read_to_string(&req.graph) {
        if let Ok(file) = crate::frontend::parse(&text, &req.graph) {
            v.push(crate::frontend::resolve_weights(&req.graph, &file.weights));
        }
    }
    match &req.ranges {
        RangesSource::File(p) | RangesSource::Images(p) => v.push(p.clone()),
    }
    v.extend(req.target.clone());
    v
}

/// Runs the whole pipeline in memory.
pub fn compile(req: &Request) -> Result<Generated, PipelineError> {
    let target = req.target.as_deref().map(load_target).transpose()?;
    let graph = crate::load(&req.graph)?;
    let hash =
        crate::calibrate::ranges::graph_hash(&graph).map_err(|source| PipelineError::Io {
            path: req.graph.clone(),
            source,
        })?;
    let (ranges, ranges_hash) = match &req.ranges {
        RangesSource::File(p) => {
            let r = crate::calibrate::Ranges::load(&graph, p, Some(&hash))?;
            let bytes = std::fs::read(p).map_err(|source| PipelineError::Io {
                path: p.clone(),
                source,
            })?;
            (
                r,
                format!("{:016x}", super::fnv1a(super::FNV_BASIS, &bytes)),
            )
        }
        RangesSource::Images(_dir) => {
            return Err(PipelineError::Unavailable(
                "calibration on images is not available in this build yet; pass a ranges file"
                    .into(),
            ))
        }
    };
    let q = lower(&graph, &ranges)?;
    let schedule = Schedule::naive(&q);
    let opt = GenOptions {
        module: req.module.clone(),
        target,
        source_hash: format!("{hash}:{ranges_hash}"),
        ..GenOptions::default()
    };
    Ok(super::generate(&q, &schedule, &opt)?)
}

fn lower(
    _g: &crate::Graph,
    _r: &crate::calibrate::Ranges,
) -> Result<crate::lower::QGraph, PipelineError> {
    Err(PipelineError::Unavailable(
        "lowering is not available in this build yet".into(),
    ))
}
