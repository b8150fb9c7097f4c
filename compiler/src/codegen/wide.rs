//! The calls of steps that read or write an int16 ("wide", `--wide`) map:
//! their arena views in the wide kernels' units, and the calls themselves,
//! whose parameters are the simulator's ([`crate::lower::wide_op`]).
//!
//! The planner places a concatenation region's members at
//! `region offset + first channel` (value units, see `plan::regions`),
//! which for an int16 region is not a byte offset: [`map_ref`] turns it
//! into one. It is the one conversion: the generator's calls, the checked
//! statics and [`super::arena_refs`] (the layout a
//! `Simulator::with_layout` runs) all go through it.

use super::calls::{Call, CallError};
use crate::lower::{QGraph, QKernel, QMapId, StepId, WideOp};
use crate::plan::Schedule;
use ingot_rt::wide::TypedMap;
use ingot_rt::MapRef;

/// The byte offset of map `m` in the arena. An int8 map's view offset is
/// one already; an int16 member of an in-place concatenation region sits
/// `2 · (offset − region offset)` bytes into its region, whose own offset
/// (the outermost in-place concatenation's output, channel 0) is in bytes.
pub fn byte_offset(q: &QGraph, s: &Schedule, m: QMapId) -> usize {
    let v = s.views[m.index()].offset;
    if !q.is_wide(m) {
        return v;
    }
    let mut root = m;
    // A map is an input of at most one in-place concatenation; the depth
    // is bounded by the step count.
    for _ in 0..q.steps.len() {
        let outer = q.step_ids().find(|&id| {
            let st = q.step(id);
            matches!(st.kernel, QKernel::Concat)
                && !s.copy_concats.contains(&id)
                && st.inputs.contains(&root)
        });
        match outer {
            Some(id) => root = q.step(id).output,
            None => break,
        }
    }
    let base = s.views[root.index()].offset;
    base + q.value_bytes(m) * v.saturating_sub(base)
}

/// The view of map `m` the kernels take: offset in bytes, `c` and
/// `stride` in values (see `ingot_rt::wide`).
pub fn map_ref(q: &QGraph, s: &Schedule, m: QMapId) -> MapRef {
    let sh = q.map(m).shape;
    let v = s.views[m.index()];
    let rows = s.ring_rows(m).unwrap_or(sh.h);
    MapRef::ring(byte_offset(q, s, m), sh.h, sh.w, sh.c, v.stride, rows)
}

/// Map `m` with its element type.
pub fn typed(q: &QGraph, s: &Schedule, m: QMapId) -> TypedMap {
    TypedMap {
        map: map_ref(q, s, m),
        elem: q.elem(m),
    }
}

/// The bytes of map `m` as an int8 view: for an int16 map, two "channels"
/// per value, so a trace of it is its codes as little-endian byte pairs
/// in HWC order.
pub fn trace_ref(q: &QGraph, s: &Schedule, m: QMapId) -> MapRef {
    let r = map_ref(q, s, m);
    let n = q.value_bytes(m);
    if n == 1 {
        return r;
    }
    MapRef::ring(r.offset, r.h, r.w, r.c * n, r.stride * n, r.rows)
}

/// True when map `m`'s view ends inside an arena of `arena` bytes.
pub fn fits(q: &QGraph, s: &Schedule, m: QMapId, arena: usize) -> bool {
    typed(q, s, m).fits(arena)
}

/// One call of a step touching a wide map.
#[derive(Debug, Clone)]
pub struct WideCall<'a> {
    /// The kernel and its parameters.
    pub op: WideOp<'a>,
    /// The maps read (a copied concatenation member: its one source).
    pub inputs: Vec<TypedMap>,
    /// The map written (a copied member: its channels of the output).
    pub output: TypedMap,
}

impl WideCall<'_> {
    /// Runs the call on `arena`.
    pub fn run(&self, arena: &mut [i8], patch: &mut [i16]) -> Result<(), ingot_rt::Error> {
        self.op.run(arena, &self.inputs, self.output, patch)
    }
}

/// The calls of wide step `id`: one, a copy per input of a copying
/// concatenation, none for an in-place one.
pub fn calls<'a>(q: &'a QGraph, s: &Schedule, id: StepId) -> Result<Vec<Call<'a>>, CallError> {
    let st = q.step(id);
    let op = crate::lower::wide_op(q, id).map_err(|e| CallError::Wide {
        step: st.name.clone(),
        error: e,
    })?;
    let inputs: Vec<TypedMap> = st.inputs.iter().map(|&m| typed(q, s, m)).collect();
    let output = typed(q, s, st.output);
    if let WideOp::Concat = op {
        if !s.copy_concats.contains(&id) {
            return Ok(Vec::new());
        }
        let mut c0 = 0;
        let mut v = Vec::new();
        for src in inputs {
            v.push(Call::Wide(WideCall {
                op: WideOp::Concat,
                inputs: vec![src],
                output: output.channels(c0, src.map.c),
            }));
            c0 += src.map.c;
        }
        return Ok(v);
    }
    Ok(vec![Call::Wide(WideCall { op, inputs, output })])
}
