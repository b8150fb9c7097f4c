//! Target profiles (`targets/*.toml`) and the RAM/flash budget check.
//!
//! The file format is described in `docs/targets.md`. [`Target::load`] reads
//! one profile; [`budget`] sets a plan and the graph's constant data against
//! it.
//!
//! **RAM use** = arena + convolution patch + `ram.reserve` (stack and the
//! application's own data).
//!
//! **Flash use** = int8 weights + 32-bit biases + requantization multipliers
//! (8 bytes each: `i32` mantissa, `i32` shift) + per-channel transforms
//! (affine: 4 + 4 bytes per channel; table: 256 bytes per channel) + the
//! pixel table + an estimate of code + `flash.reserve` (the application's
//! code). The code estimate is [`RUNTIME_CODE_BYTES`] for the kernels of
//! `ingot-rt` plus [`STEP_CODE_BYTES`] per step for the generated call
//! (argument set-up, a `MapRef` pair, error check). Both are deliberately
//! generous round figures, not measurements; the code generator's measured
//! sizes should replace them.

use super::Plan;
use crate::lower::{ChannelTransform, QGraph, QKernel};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// Estimated flash bytes of the `ingot-rt` kernels linked into a module.
pub const RUNTIME_CODE_BYTES: u64 = 16 * 1024;
/// Estimated flash bytes of the generated code per step.
pub const STEP_CODE_BYTES: u64 = 160;

/// One memory of a part.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Memory {
    /// Bytes usable as one block.
    pub bytes: u64,
    /// Bytes kept for everything but the network (RAM: stack and
    /// application data; flash: application code).
    pub reserve: u64,
    /// Which physical memory this is and how it was counted.
    #[serde(default)]
    pub note: String,
}

/// The document the figures come from.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Datasheet {
    /// Document title.
    pub title: String,
    /// Document revision.
    pub revision: String,
    /// Document number, if the vendor gives one.
    #[serde(default)]
    pub document: String,
}

/// A target profile.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Target {
    /// Part name.
    pub name: String,
    /// CPU core (`cortex-m4f`, `cortex-m7`, `cortex-m33`, `cortex-m0+`, `xtensa-lx7`, …).
    pub core: String,
    /// Rust target triple.
    pub triple: String,
    /// Core clock in Hz.
    pub clock_hz: u64,
    /// True when the part is only used for budgets (its Rust target needs a
    /// toolchain the project does not build with).
    #[serde(default)]
    pub budget_only: bool,
    /// Free text.
    #[serde(default)]
    pub note: String,
    /// RAM for the arena and the patch.
    pub ram: Memory,
    /// Flash for constants and code.
    pub flash: Memory,
    /// Source of the figures.
    pub datasheet: Datasheet,
    /// The camera that feeds the network, if the profile names one
    /// (`[camera]`, see `docs/targets.md`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub camera: Option<crate::camera::Camera>,
}

/// Why a profile could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum TargetError {
    /// The file could not be read.
    #[error("{path}: cannot read target profile: {source}")]
    Io {
        /// File.
        path: PathBuf,
        /// Cause.
        source: std::io::Error,
    },
    /// The file is not valid TOML or misses / mistypes a key.
    #[error("{path}: {message}")]
    Parse {
        /// File.
        path: PathBuf,
        /// The parser's message (names the key and line).
        message: String,
    },
    /// A value is out of range.
    #[error("{path}: key `{key}`: {message}")]
    Value {
        /// File.
        path: PathBuf,
        /// Dotted key.
        key: String,
        /// What is wrong.
        message: String,
    },
}

impl Target {
    /// Reads and checks a profile.
    pub fn load(path: impl AsRef<Path>) -> Result<Target, TargetError> {
        let path = path.as_ref();
        let text = crate::guard::read_text_bounded(path, crate::guard::MAX_JSON_BYTES).map_err(
            |source| TargetError::Io {
                path: path.into(),
                source,
            },
        )?;
        Target::parse(&text, path)
    }

    /// Parses a profile; `path` is only used in messages.
    pub fn parse(text: &str, path: &Path) -> Result<Target, TargetError> {
        let t: Target = toml::from_str(text).map_err(|e| TargetError::Parse {
            path: path.into(),
            message: e.to_string().trim_end().to_string(),
        })?;
        let bad = |key: &str, message: String| TargetError::Value {
            path: path.into(),
            key: key.into(),
            message,
        };
        for (key, v) in [
            ("name", &t.name),
            ("core", &t.core),
            ("triple", &t.triple),
            ("datasheet.title", &t.datasheet.title),
        ] {
            if v.trim().is_empty() {
                return Err(bad(key, "must not be empty".into()));
            }
        }
        for (key, m) in [("ram", &t.ram), ("flash", &t.flash)] {
            if m.bytes == 0 {
                return Err(bad(&format!("{key}.bytes"), "must be positive".into()));
            }
            if m.reserve > m.bytes {
                return Err(bad(
                    &format!("{key}.reserve"),
                    format!("{} exceeds {key}.bytes = {}", m.reserve, m.bytes),
                ));
            }
        }
        if t.clock_hz == 0 {
            return Err(bad("clock_hz", "must be positive".into()));
        }
        Ok(t)
    }
}

/// Flash taken by the network's constants and code.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct FlashUse {
    /// Convolution and linear weights: one byte each, two for convolutions
    /// stored in 16-bit pairs (words: one, rows padded to whole words).
    pub weights: u64,
    /// 32-bit biases.
    pub biases: u64,
    /// Requantization multipliers (8 bytes each).
    pub multipliers: u64,
    /// Per-channel transforms and the pixel table.
    pub transforms: u64,
    /// Code estimate ([`RUNTIME_CODE_BYTES`] + [`STEP_CODE_BYTES`] per step).
    pub code: u64,
    /// Size of the generated weights file, when it exists: then it replaces
    /// the sum of the four constant parts above in [`FlashUse::total`].
    pub weights_file: Option<u64>,
}

impl FlashUse {
    /// Measures `q` with int8 weights.
    pub fn of(q: &QGraph) -> FlashUse {
        Self::of_form(q, super::WeightForm::Int8)
    }

    /// Measures `q` with the given weight form.
    pub fn of_form(q: &QGraph, form: super::WeightForm) -> FlashUse {
        let mut f = FlashUse {
            transforms: q.pixel_table.len() as u64,
            ..FlashUse::default()
        };
        let tf = |t: &ChannelTransform| match t {
            ChannelTransform::Affine { mul, add, .. } => 4 * (mul.len() + add.len()) as u64 + 16,
            ChannelTransform::Table(t) => t.len() as u64,
        };
        for s in &q.steps {
            match &s.kernel {
                QKernel::Conv2d(c) => {
                    f.weights += c.weights.len() as u64;
                    f.biases += 4 * c.bias.len() as u64;
                    f.multipliers += 8 * c.requant.len() as u64;
                    f.transforms += c.transform.as_ref().map_or(0, tf);
                }
                QKernel::Linear(l) => {
                    f.weights += l.weights.len() as u64;
                    f.biases += 4 * l.bias.len() as u64;
                    f.multipliers += 8 * l.requant.len() as u64;
                }
                QKernel::MaxPool(p) | QKernel::AvgPool(p) | QKernel::GlobalAvgPool(p) => {
                    f.multipliers += 8 * p.requant.is_some() as u64;
                }
                QKernel::Add(_) => f.multipliers += 3 * 8,
                QKernel::Channel(t) => f.transforms += tf(t),
                QKernel::Concat => {}
            }
        }
        f.weights += super::form::pair_growth(q, form) as u64;
        f.weights += super::form::word_padding(q, form) as u64;
        f.code = RUNTIME_CODE_BYTES + STEP_CODE_BYTES * q.steps.len() as u64;
        f
    }

    /// Constants: the generated weights file's size when known, else the
    /// sum of the parts.
    pub fn constants(&self) -> u64 {
        self.weights_file
            .unwrap_or(self.weights + self.biases + self.multipliers + self.transforms)
    }

    /// Constants and code.
    pub fn total(&self) -> u64 {
        self.constants() + self.code
    }
}

/// The budget verdict for one target.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Budget {
    /// Target name.
    pub target: String,
    /// Arena bytes.
    pub arena: u64,
    /// Patch bytes.
    pub patch: u64,
    /// RAM reserve.
    pub ram_reserve: u64,
    /// Arena + patch + reserve.
    pub ram_used: u64,
    /// RAM of the part.
    pub ram_total: u64,
    /// `ram_total - ram_used` (negative: over).
    pub ram_headroom: i64,
    /// Flash parts.
    pub flash: FlashUse,
    /// Flash reserve.
    pub flash_reserve: u64,
    /// Constants + code + reserve.
    pub flash_used: u64,
    /// Flash of the part.
    pub flash_total: u64,
    /// `flash_total - flash_used` (negative: over).
    pub flash_headroom: i64,
    /// True when both fit.
    pub fits: bool,
    /// One line per memory that does not fit, naming it and by how much.
    pub over: Vec<String>,
}

/// Checks `plan` of `q` against `t` (constants estimated from `q`).
pub fn budget(q: &QGraph, plan: &Plan, t: &Target) -> Budget {
    budget_with_weights_file(q, plan, t, None)
}

/// [`budget`], with the size in bytes of the generated weights file in
/// place of the estimate of the constants when it is given.
pub fn budget_with_weights_file(
    q: &QGraph,
    plan: &Plan,
    t: &Target,
    weights_file: Option<u64>,
) -> Budget {
    budget_for(
        q,
        plan.arena_bytes as u64,
        plan.patch_bytes as u64,
        plan.weight_form,
        t,
        weights_file,
    )
}

/// The one budget verdict: scratch RAM `arena + patch` and the constants of
/// `q` in `form` (the size of the generated weights file in place of the
/// estimate when it is given), plus code estimate and reserves, against
/// `t`. [`budget`] and the driver's checks of generated modules call it.
pub fn budget_for(
    q: &QGraph,
    arena: u64,
    patch: u64,
    form: super::WeightForm,
    t: &Target,
    weights_file: Option<u64>,
) -> Budget {
    let ram_used = arena + patch + t.ram.reserve;
    let mut flash = FlashUse::of_form(q, form);
    flash.weights_file = weights_file;
    let flash_used = flash.total() + t.flash.reserve;
    let ram_headroom = t.ram.bytes as i64 - ram_used as i64;
    let flash_headroom = t.flash.bytes as i64 - flash_used as i64;
    let mut over = Vec::new();
    if ram_headroom < 0 {
        over.push(format!(
            "RAM over by {} bytes: arena {} + patch {} + reserve {} = {} > {}",
            -ram_headroom, arena, patch, t.ram.reserve, ram_used, t.ram.bytes
        ));
    }
    if flash_headroom < 0 {
        over.push(format!(
            "flash over by {} bytes: constants {} + code estimate {} + reserve {} = {} > {}",
            -flash_headroom,
            flash.constants(),
            flash.code,
            t.flash.reserve,
            flash_used,
            t.flash.bytes
        ));
    }
    Budget {
        target: t.name.clone(),
        arena,
        patch,
        ram_reserve: t.ram.reserve,
        ram_used,
        ram_total: t.ram.bytes,
        ram_headroom,
        flash,
        flash_reserve: t.flash.reserve,
        flash_used,
        flash_total: t.flash.bytes,
        flash_headroom,
        fits: over.is_empty(),
        over,
    }
}
