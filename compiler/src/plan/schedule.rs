//! What the generator needs from memory planning: a [`Schedule`]
//! (execution order, where every map lives in the arena, which
//! concatenations must copy, and the two buffer sizes), the planner's
//! output in the form the generator reads.
//! [`Schedule::naive`] gives every map its own region, which is always
//! valid and lets the generator be tested on its own.

use super::{MapView, Plan};
use crate::lower::{QGraph, QKernel, QMapId, SimCall, StepId};

/// Execution order and memory layout of a [`QGraph`].
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Schedule {
    /// Steps in execution order.
    pub order: Vec<StepId>,
    /// One view per map, indexed by `QMapId`.
    pub views: Vec<MapView>,
    /// Concatenation steps that copy their inputs; all other concatenations
    /// are in place (their producers write into the region) and emit no code.
    pub copy_concats: Vec<StepId>,
    /// Arena size in bytes.
    pub arena_bytes: usize,
    /// Convolution patch buffer size in bytes (`i16` elements × 2).
    pub patch_bytes: usize,
    /// Row pipelines (consecutive steps of `order` run row by row, the
    /// maps between them stored as rings); empty when nothing streams
    /// (and then left out of the serialized form, so the hash of a
    /// schedule without streaming is what it was before streaming).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub pipelines: Vec<super::Pipeline>,
}

impl Schedule {
    /// Every map at its own offset with `stride == c`, steps in graph order,
    /// every concatenation copying.
    pub fn naive(q: &QGraph) -> Schedule {
        let mut views = Vec::with_capacity(q.maps.len());
        let mut at = 0;
        for (i, m) in q.maps.iter().enumerate() {
            views.push(MapView {
                offset: at,
                stride: m.shape.c,
            });
            // An int16 (`--wide`) map takes two bytes a value.
            at += m.shape.len() * q.value_bytes(crate::lower::QMapId(i as u32));
        }
        Schedule {
            order: q.step_ids().collect(),
            views,
            copy_concats: q
                .step_ids()
                .filter(|&s| matches!(q.step(s).kernel, QKernel::Concat))
                .collect(),
            arena_bytes: at,
            patch_bytes: min_patch_bytes(q),
            pipelines: Vec::new(),
        }
    }

    /// Rows stored of map `m`: `Some(rows)` when it is a ring.
    pub fn ring_rows(&self, m: QMapId) -> Option<usize> {
        self.pipelines
            .iter()
            .flat_map(|p| &p.rings)
            .find(|r| r.map == m)
            .map(|r| r.rows)
    }

    /// The order as a simulator program: whole steps, and each pipeline's
    /// row calls where its first step stands.
    pub fn program(&self) -> Vec<SimCall> {
        let mut out = Vec::with_capacity(self.order.len());
        for &s in &self.order {
            match self.pipelines.iter().find(|p| p.steps.contains(&s)) {
                Some(p) if p.steps[0] == s => {
                    out.extend(p.calls.iter().map(|&c| SimCall::Rows(c)));
                }
                Some(_) => {}
                None => out.push(SimCall::Step(s)),
            }
        }
        out
    }
}

/// The patch size in bytes the convolutions of `q` need with int8 weights
/// (see [`super::patch_bytes`]).
pub fn min_patch_bytes(q: &QGraph) -> usize {
    super::patch_bytes(q)
}

impl From<&Plan> for Schedule {
    fn from(p: &Plan) -> Schedule {
        Schedule {
            order: p.order.clone(),
            views: p.map_views.clone(),
            copy_concats: p.copy_concat.clone(),
            arena_bytes: p.arena_bytes,
            patch_bytes: p.patch_bytes,
            pipelines: p.pipelines.clone(),
        }
    }
}
