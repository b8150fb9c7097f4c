//! Pass 2 of the lowering: quantization parameters of the stored maps.
//!
//! Maps joined by concatenations form a region (a union-find over chains
//! of concatenations). A region is quantized per slice (each member its
//! own parameters, each concatenation output its inputs' side by side)
//! when all its readers can absorb per-channel parameters, and otherwise
//! shares one parameter set; a max pool keeps its input's parameters
//! unless its output joins a shared region.

use super::fusion::Role;
use super::quant::activation_qparams;
use super::{LowerError, MapQuant};
use crate::graph::{Graph, LayerId, MapId, Op};
use crate::ranges::Ranges;

/// Union-find over float map indices, path-halving, union by smaller index
/// (deterministic roots).
struct UnionFind(Vec<usize>);

impl UnionFind {
    fn find(&mut self, mut x: usize) -> usize {
        while self.0[x] != x {
            self.0[x] = self.0[self.0[x]];
            x = self.0[x];
        }
        x
    }
    fn union(&mut self, a: usize, b: usize) {
        let (ra, rb) = (self.find(a), self.find(b));
        let (lo, hi) = (ra.min(rb), ra.max(rb));
        self.0[hi] = lo;
    }
}

/// True when a step whose main layer is `op` (with a fused pre-activation
/// transform: `fused`) reads per-channel input parameters: a per-channel
/// transform absorbs them, and a concatenation passes them on.
pub(super) fn absorbs_slices(op: &Op, fused: bool) -> bool {
    fused || matches!(op, Op::Concat | Op::BatchNorm(_) | Op::Relu | Op::Relu6)
}

/// Pass 2: concatenation regions and quantization of stored maps.
///
/// A region (maps joined by concatenations) is quantized per slice when
/// every step reading one of its concatenation outputs can absorb
/// per-channel input parameters: another concatenation, a convolution with
/// a fused input transform, or a channel step (batch norm, ReLU). Then each
/// member keeps the parameters of its own range (a max pool its input's),
/// and a concatenation's output carries its inputs' parameters side by
/// side, so the concatenation still copies codes unchanged (and costs
/// nothing when producers write into it). Otherwise (a reader such as a
/// pooling, linear, add or plain convolution, or a region holding the
/// network's output) every map of the region shares the parameters of the
/// union of their ranges, as a per-tensor reader needs.
pub(super) fn map_qparams(
    g: &Graph,
    ranges: &Ranges,
    roles: &[Role],
    canon: &[Option<MapId>],
    stored: impl Fn(MapId, LayerId) -> Result<MapId, LowerError>,
) -> Result<Vec<Option<MapQuant>>, LowerError> {
    let nm = g.map_count();
    let mut classes = UnionFind((0..nm).collect());
    // The main layer of the step writing each stored map.
    let mut writer: Vec<Option<LayerId>> = vec![None; nm];
    for id in g.layer_ids() {
        if let Role::Step { out, .. } = &roles[id.index()] {
            writer[out.index()] = Some(id);
            if matches!(g.layer(id).op, Op::Concat) {
                for &m in &g.layer(id).inputs {
                    classes.union(out.index(), stored(m, id)?.index());
                }
            }
        }
    }
    let is_concat = |m: usize| writer[m].is_some_and(|l| matches!(g.layer(l).op, Op::Concat));
    // Regions that may be quantized per slice: cleared by any reader of a
    // concatenation output that needs one parameter set.
    let mut sliced = vec![true; nm];
    for id in g.layer_ids() {
        let Role::Step { pre, .. } = &roles[id.index()] else {
            continue;
        };
        let absorbs = absorbs_slices(&g.layer(id).op, pre.is_some());
        let read: Vec<MapId> = match pre {
            Some(p) => vec![p.src],
            None => g.layer(id).inputs.clone(),
        };
        for m in read {
            let m = stored(m, id)?.index();
            if is_concat(m) && !absorbs {
                let root = classes.find(m);
                sliced[root] = false;
            }
        }
    }
    if let Some(out) = canon[g.output().index()] {
        let root = classes.find(out.index());
        sliced[root] = false;
    }
    let mut members = vec![0usize; nm];
    let mut class_range: Vec<Option<crate::ranges::MapRange>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c == Some(MapId(m as u32)) {
            let root = classes.find(m);
            members[root] += 1;
            let r = ranges.maps[m].with_zero();
            class_range[root] = Some(match class_range[root] {
                None => r,
                Some(u) => crate::ranges::MapRange {
                    min: u.min.min(r.min),
                    max: u.max.max(r.max),
                },
            });
        }
    }
    let mut qp: Vec<Option<MapQuant>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c != Some(MapId(m as u32)) {
            continue;
        }
        let root = classes.find(m);
        let shared = members[root] > 1 && !sliced[root];
        let p = match writer[m] {
            _ if shared => activation_qparams(class_range[root].unwrap_or(ranges.maps[m])).into(),
            Some(l) if matches!(g.layer(l).op, Op::Concat) => {
                let mut channels = Vec::new();
                for &i in &g.layer(l).inputs {
                    let src = stored(i, l)?;
                    let q = qp[src.index()].as_ref().ok_or_else(|| {
                        LowerError::Internal("concat input not quantized yet".into())
                    })?;
                    channels.extend(q.per_channel(g.shape(src).c));
                }
                MapQuant::from_channels(&channels)
                    .ok_or_else(|| LowerError::Internal("concat without channels".into()))?
            }
            Some(l) if matches!(g.layer(l).op, Op::MaxPool2d(_)) => {
                let src = stored(g.layer(l).inputs[0], l)?;
                qp[src.index()].clone().ok_or_else(|| {
                    LowerError::Internal("max pool input not quantized yet".into())
                })?
            }
            _ => activation_qparams(ranges.maps[m]).into(),
        };
        qp[m] = Some(p);
    }
    Ok(qp)
}
