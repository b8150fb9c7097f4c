//! Pass 2 of the lowering: quantization parameters of the stored maps.
//!
//! Maps joined by concatenations share one parameter set (a union-find
//! over chains of concatenations); a max pool keeps its input's parameters
//! unless its output joins such a group.

use super::fusion::Role;
use super::quant::activation_qparams;
use super::{LowerError, QParams};
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

/// Pass 2: concatenation groups and quantization of stored maps.
pub(super) fn map_qparams(
    g: &Graph,
    ranges: &Ranges,
    roles: &[Role],
    canon: &[Option<MapId>],
    stored: impl Fn(MapId, LayerId) -> Result<MapId, LowerError>,
) -> Result<Vec<Option<QParams>>, LowerError> {
    let nm = g.map_count();
    let mut classes = UnionFind((0..nm).collect());
    for id in g.layer_ids() {
        if let (Op::Concat, Role::Step { out, .. }) = (&g.layer(id).op, &roles[id.index()]) {
            for &m in &g.layer(id).inputs {
                classes.union(out.index(), stored(m, id)?.index());
            }
        }
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
    // The main layer of the step writing each stored map.
    let mut writer: Vec<Option<LayerId>> = vec![None; nm];
    for id in g.layer_ids() {
        if let Role::Step { out, .. } = &roles[id.index()] {
            writer[out.index()] = Some(id);
        }
    }
    let mut qp: Vec<Option<QParams>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c != Some(MapId(m as u32)) {
            continue;
        }
        let root = classes.find(m);
        let p = if members[root] > 1 {
            activation_qparams(class_range[root].unwrap_or(ranges.maps[m]))
        } else {
            match writer[m] {
                Some(l) if matches!(g.layer(l).op, Op::MaxPool2d(_)) => {
                    let src = stored(g.layer(l).inputs[0], l)?;
                    qp[src.index()].ok_or_else(|| {
                        LowerError::Internal("max pool input not quantized yet".into())
                    })?
                }
                _ => activation_qparams(ranges.maps[m]),
            }
        };
        qp[m] = Some(p);
    }
    Ok(qp)
}
