//! Checks of a validated graph that are not about its structure: the
//! memory the commands will need, estimated from the shapes before anything
//! large is allocated, and warnings about inputs that are valid but
//! suspicious (carried as data; the CLI prints them).

use super::LoadError;
use crate::graph::{cost, Graph, MapId, Op};
use std::path::Path;

/// Bytes the heaviest command (`calibrate` or `check`) needs for one image
/// in flight: every float feature map kept at once (calibration observes
/// them all), plus the weights three times (the f32 tensors as loaded, the
/// batch-norm-folded copy the lowering makes, and int8/int32 forms).
/// Deliberately coarse and on the high side: it only has to tell a graph
/// that fits from one that cannot.
pub fn memory_estimate(g: &Graph) -> u64 {
    let maps: u64 = (0..g.map_count())
        .map(|i| g.shape(MapId(i as u32)).len() as u64)
        .fold(0u64, u64::saturating_add);
    let params = cost::total_cost(g).params;
    maps.saturating_mul(4)
        .saturating_add(params.saturating_mul(12))
}

/// Refuses a graph whose [`memory_estimate`] exceeds `limit` bytes
/// (`crate::guard::memory_limit()`, 4 GiB unless `INGOT_MEMORY_LIMIT`
/// says otherwise).
pub fn check_memory(g: &Graph, path: &Path, limit: u64) -> Result<(), LoadError> {
    let need = memory_estimate(g);
    if need > limit {
        return Err(LoadError::TooLarge {
            path: path.to_path_buf(),
            need,
            limit,
            env: crate::guard::MEMORY_LIMIT_ENV,
        });
    }
    Ok(())
}

/// Something valid but probably not what the user meant.
#[derive(Debug, Clone, PartialEq, Eq)]
#[non_exhaustive]
pub struct Warning {
    /// The layer concerned.
    pub layer: String,
    /// The tensor concerned, if any.
    pub tensor: Option<String>,
    /// What looks wrong.
    pub message: String,
}

impl std::fmt::Display for Warning {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "layer `{}`", self.layer)?;
        if let Some(t) = &self.tensor {
            write!(f, ", tensor `{t}`")?;
        }
        write!(f, ": {}", self.message)
    }
}

/// Warnings about a loaded graph: convolution or linear weights that are
/// all zero (an untrained or wrongly exported layer: its output is its bias
/// alone).
pub fn warnings(g: &Graph) -> Vec<Warning> {
    let mut out = Vec::new();
    for l in g.layers() {
        let w = match &l.op {
            Op::Conv2d(c) => &c.weight,
            Op::Linear(lin) => &lin.weight,
            _ => continue,
        };
        if w.data.iter().all(|&v| v == 0.0) {
            out.push(Warning {
                layer: l.name.clone(),
                tensor: Some(w.name.clone()),
                message: format!(
                    "all {} weights are zero; the layer outputs its bias only (untrained or wrongly exported?)",
                    w.data.len()
                ),
            });
        }
    }
    out
}
