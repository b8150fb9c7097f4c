//! Pass 2 of the lowering: quantization parameters of the stored maps.
//!
//! Maps joined by concatenations form a region (a union-find over chains
//! of concatenations). A region is quantized per slice (each member its
//! own parameters, each concatenation output its inputs' side by side)
//! when all its readers can absorb per-channel parameters, and otherwise
//! shares one parameter set; a max pool keeps its input's parameters
//! unless its output joins a shared region.

use super::fusion::{is_pool, step_reads, Role};
use super::quant::{activation_qparams, DEGENERATE_SCALE};
use super::{Activation, LowerError, MapQuant, QParams};
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
///
/// `wide` names, per float map, the `--wide` layer that asks for it to be
/// stored as int16 (see [`widen`]); the result's second vector says the
/// same for every map made wide, region members included.
#[allow(clippy::type_complexity)]
pub(super) fn map_qparams(
    g: &Graph,
    ranges: &Ranges,
    roles: &[Role],
    canon: &[Option<MapId>],
    stored: impl Fn(MapId, LayerId) -> Result<MapId, LowerError>,
    wide: &[Option<String>],
) -> Result<(Vec<Option<MapQuant>>, Vec<Option<String>>), LowerError> {
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
        let read = step_reads(&g.layer(id).inputs, pre.as_ref());
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
    // A wide map widens its whole concatenation region (copy-free
    // concatenation needs one element type per region).
    let mut wide_root: Vec<Option<String>> = vec![None; nm];
    for (m, w) in wide.iter().enumerate() {
        if let Some(w) = w {
            let root = classes.find(m);
            wide_root[root].get_or_insert_with(|| w.clone());
        }
    }
    let wide: Vec<Option<String>> = (0..nm)
        .map(|m| match (&wide[m], canon[m] == Some(MapId(m as u32))) {
            (Some(w), _) => Some(w.clone()),
            (None, true) => wide_root[classes.find(m)].clone(),
            (None, false) => None,
        })
        .collect();
    let shared: Vec<bool> = (0..nm)
        .map(|m| {
            let root = classes.find(m);
            members[root] > 1 && !sliced[root]
        })
        .collect();
    let mut per_channel = per_channel_outputs(g, ranges, roles, canon, &stored, &writer, &shared)?;
    // A pooling writing a wide map has one multiplier: its input is per
    // tensor.
    for (m, w) in writer.iter().enumerate() {
        if let Some(l) = w {
            if wide[m].is_some() && is_pool(&g.layer(*l).op) {
                let src = stored(g.layer(*l).inputs[0], *l)?;
                per_channel[src.index()] = false;
            }
        }
    }
    let src_wide = |l: LayerId| -> Result<bool, LowerError> {
        Ok(wide[stored(g.layer(l).inputs[0], l)?.index()].is_some())
    };
    let mut qp: Vec<Option<MapQuant>> = vec![None; nm];
    for (m, c) in canon.iter().enumerate() {
        if *c != Some(MapId(m as u32)) {
            continue;
        }
        let root = classes.find(m);
        let shared = shared[m];
        let p = match writer[m] {
            _ if wide[m].is_some() => {
                let r = if members[root] > 1 {
                    class_range[root].unwrap_or(ranges.maps[m])
                } else {
                    ranges.maps[m]
                };
                wide_qparams(r).into()
            }
            _ if shared => activation_qparams(class_range[root].unwrap_or(ranges.maps[m])).into(),
            Some(_) if per_channel[m] => channel_qparams(
                ranges.maps[m],
                ranges.channel_ranges(MapId(m as u32)).unwrap_or_default(),
            ),
            // An average pool of a per-channel map keeps its parameters:
            // its multiplier `1/taps` is then the same for every channel.
            Some(l)
                if matches!(g.layer(l).op, Op::AvgPool2d(_) | Op::GlobalAvgPool)
                    && !src_wide(l)?
                    && qp[stored(g.layer(l).inputs[0], l)?.index()]
                        .as_ref()
                        .is_some_and(MapQuant::is_sliced) =>
            {
                let src = stored(g.layer(l).inputs[0], l)?;
                qp[src.index()]
                    .clone()
                    .unwrap_or_else(|| activation_qparams(ranges.maps[m]).into())
            }
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
            Some(l) if matches!(g.layer(l).op, Op::MaxPool2d(_)) && !src_wide(l)? => {
                let src = stored(g.layer(l).inputs[0], l)?;
                qp[src.index()].clone().ok_or_else(|| {
                    LowerError::Internal("max pool input not quantized yet".into())
                })?
            }
            _ => activation_qparams(ranges.maps[m]).into(),
        };
        qp[m] = Some(p);
    }
    Ok((qp, wide))
}

/// Symmetric int16 quantization of a range: `zero_point` 0,
/// `scale = max(|min|, |max|) / 32767` (a range at 0 alone gets
/// [`DEGENERATE_SCALE`]).
pub(super) fn wide_qparams(r: crate::ranges::MapRange) -> QParams {
    let m = (r.min.abs() as f64).max(r.max.abs() as f64);
    let scale = (m / 32767.0) as f32;
    QParams {
        scale: if scale.is_normal() && scale > 0.0 {
            scale
        } else {
            DEGENERATE_SCALE
        },
        zero_point: 0,
    }
}

/// True when a step with main layer `op` (fused input transform: `fused`;
/// fused activation `act`) writes its output with its input's parameters,
/// whatever they are per channel: a pooling, whose multiplier
/// (`s_in/s_out`, or `1/taps`) is then one value for every channel. ReLU6
/// is excluded: its clamp `z + round(6/s)` would differ per channel.
fn passes_channels(op: &Op, fused: bool, act: Activation) -> bool {
    !fused && act != Activation::Relu6 && is_pool(op)
}

/// Which stored maps written by a convolution get one scale per output
/// channel (one shared zero point).
///
/// A convolution's requantization is already one multiplier per output
/// channel (`s_in·s_w[o]/s_out`), so dividing by a per-channel `s_out[o]`
/// changes only coefficients; its clamp and output zero point stay
/// scalar, hence one zero point for all channels and no ReLU6. It pays off
/// only where every reader folds the per-channel parameters in without a
/// runtime change: a fused input transform or channel step (per-channel
/// `mul`/`add`), a concatenation of a per-slice region (a shared region
/// makes the map shared first), or a pooling that passes them on to its
/// own output, whose readers must then absorb them in turn. An `add`, a
/// linear layer or a convolution without a transform reads one parameter
/// set, and the network's output stays per tensor, so a map read by any
/// of them stays per tensor. Without per-channel ranges in the ranges file
/// (older files) nothing changes.
fn per_channel_outputs(
    g: &Graph,
    ranges: &Ranges,
    roles: &[Role],
    canon: &[Option<MapId>],
    stored: &impl Fn(MapId, LayerId) -> Result<MapId, LowerError>,
    writer: &[Option<LayerId>],
    shared: &[bool],
) -> Result<Vec<bool>, LowerError> {
    let nm = g.map_count();
    let mut out = vec![false; nm];
    if ranges.channels.is_empty() {
        return Ok(out);
    }
    // Readers of each stored map: (main layer, absorbs, output if it
    // passes the parameters on).
    let mut readers: Vec<Vec<(bool, Option<usize>)>> = vec![Vec::new(); nm];
    for id in g.layer_ids() {
        let Role::Step {
            pre, act, out: o, ..
        } = &roles[id.index()]
        else {
            continue;
        };
        let op = &g.layer(id).op;
        let read = step_reads(&g.layer(id).inputs, pre.as_ref());
        let absorbs = absorbs_slices(op, pre.is_some());
        let passes = passes_channels(op, pre.is_some(), *act).then_some(o.index());
        for m in read {
            readers[stored(m, id)?.index()].push((absorbs, passes));
        }
    }
    let output = canon[g.output().index()].map(|m| m.index());
    // Readers come after writers, so a pass from the last map backwards
    // settles every map after the maps it passes its parameters to.
    let mut ok = vec![false; nm];
    for m in (0..nm).rev() {
        ok[m] = canon[m] == Some(MapId(m as u32))
            && Some(m) != output
            && !shared[m]
            && readers[m]
                .iter()
                .all(|&(absorbs, passes)| absorbs || passes.is_some_and(|p| ok[p]));
    }
    for m in 0..nm {
        let Some(l) = writer[m] else { continue };
        let Role::Step { act, .. } = &roles[l.index()] else {
            continue;
        };
        out[m] = ok[m]
            && matches!(g.layer(l).op, Op::Conv2d(_))
            && *act != Activation::Relu6
            && ranges
                .channel_ranges(MapId(m as u32))
                .is_some_and(|c| c.len() == g.shape(MapId(m as u32)).c);
    }
    Ok(out)
}

/// Smallest scale per channel a conv map may use relative to its
/// per-tensor scale: a channel (nearly) dead in calibration still gets
/// `1/64` of the map's step, so a value it did not show in calibration
/// saturates at 64 times less than the map's range rather than at once.
const CHANNEL_SCALE_FLOOR: f32 = 1.0 / 64.0;

/// One scale per channel at the map's zero point: the map's range `r`
/// gives `(S, z)` as per tensor; channel `c`'s observed range, clipped to
/// `r` (so a clipping method keeps its meaning), gets the smallest scale
/// that holds it at `z`, `s_c = max(max_c/(127 − z), −min_c/(z + 128))`,
/// never above `S` and never below `S·CHANNEL_SCALE_FLOOR`. Affine
/// quantization per Jacob et al. 2018, §2.1, with one scale per channel.
pub(super) fn channel_qparams(
    r: crate::ranges::MapRange,
    chans: &[crate::ranges::MapRange],
) -> MapQuant {
    let t = activation_qparams(r);
    if t.scale == DEGENERATE_SCALE || chans.is_empty() {
        return t.into();
    }
    let r = r.with_zero();
    let z = t.zero_point as f64;
    let s = t.scale as f64;
    let qps: Vec<QParams> = chans
        .iter()
        .map(|c| {
            let hi = (c.max.clamp(r.min, r.max) as f64).max(0.0);
            let lo = (c.min.clamp(r.min, r.max) as f64).min(0.0);
            let up = if 127.0 - z > 0.0 {
                hi / (127.0 - z)
            } else if hi > 0.0 {
                s
            } else {
                0.0
            };
            let down = if z + 128.0 > 0.0 {
                -lo / (z + 128.0)
            } else if lo < 0.0 {
                s
            } else {
                0.0
            };
            let sc = up.max(down).min(s).max(s * CHANNEL_SCALE_FLOOR as f64) as f32;
            QParams {
                scale: if sc.is_normal() { sc } else { t.scale },
                zero_point: t.zero_point,
            }
        })
        .collect();
    MapQuant::from_channels(&qps).unwrap_or(t.into())
}
