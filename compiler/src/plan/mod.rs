//! Memory planning: where every feature map lives in the one static arena.
//!
//! All maps of a generated module share one int8 scratch arena (HWC, one
//! byte per element). [`plan`] picks an execution order, decides which
//! concatenations run in place and which element-wise steps overwrite their
//! input, and gives every map an offset and pixel stride ([`MapView`]) so
//! that maps alive at the same step never share a byte. The pipeline:
//!
//! 1. **Regions** ([`regions`]): concatenations become channel regions that
//!    their producers write straight into; a dense block's chain of
//!    concatenations becomes one growing region. What cannot run in place
//!    is listed in [`Plan::copy_concat`].
//! 2. **Order** ([`order`]): a topological order minimising the peak of live
//!    bytes (exact dynamic programming over executed sets when small, a
//!    bounded beam otherwise).
//! 3. **Aliasing**: an element-wise step (`add`, per-channel transform) whose
//!    input is a whole buffer that dies at that step writes its output over
//!    it (same offset and stride, as `ingot_rt::add` allows). Convolution,
//!    linear and pooling never overwrite their own input: their input and
//!    output are both alive at the step.
//! 4. **Row streaming** ([`stream`]): producer → consumer edges whose map
//!    is then stored as a ring of the rows the consumer's window spans; the
//!    steps of a pipeline run row by row and share one time of the order.
//! 5. **Placement** ([`place`]): several greedy heuristics, the best kept.
//! 6. **Lower bound**: the largest total of buffers alive at one time of
//!    the chosen order, rings with their ring bytes; no placement of these
//!    buffers can be smaller. [`Plan::unfused_bound`] is the same without
//!    streaming.
//! 7. **Verification** ([`verify`]): an independent brute-force check of the
//!    result, run on every plan in debug builds (and on request).
//!
//! Offsets of buffers are multiples of [`PlanOptions::align`] (4 bytes by
//! default, so word-sized loads of a map's start are aligned); buffer sizes
//! are rounded up to it for placement and for the lower bound. Members of a
//! region sit at their channel offset inside it and are not aligned.

pub mod form;
pub(crate) mod liveness;
pub(crate) mod order;
pub(crate) mod place;
pub(crate) mod regions;
pub mod report;
pub mod schedule;
pub mod stream;
mod svg;
pub mod target;
mod verify;

use crate::lower::{QGraph, QKernel, QMapId, StepId};
use serde::Serialize;
use std::time::Instant;

pub use form::{patch_bytes, patch_bytes_for, WeightForm};
pub use report::{report, PlanReport};
pub use schedule::Schedule;
pub use stream::{Pipeline, Ring};
pub use svg::{render as render_svg, SvgError};
pub use target::{Budget, Target, TargetError};
pub use verify::{verify, PlanViolation};

/// Knobs of the planner.
#[derive(Debug, Clone)]
pub struct PlanOptions {
    /// Alignment of buffer offsets and sizes in bytes (≥ 1; default 4).
    pub align: usize,
    /// Let concatenations run in place (default true).
    pub inplace_concat: bool,
    /// Let `add` and per-channel steps overwrite a dying input (default true).
    pub inplace_elementwise: bool,
    /// Search the execution order (default true); otherwise the file order.
    pub reorder: bool,
    /// Sets of executed steps kept per layer of the order search; beyond it
    /// the search is a beam (default 2000).
    pub max_order_states: usize,
    /// Extra randomised placement attempts when the heuristics miss the
    /// lower bound (default 64).
    pub placement_trials: usize,
    /// Kernel kinds ([`QKernel::kind`]) that need a dense input
    /// (`stride == c`). Empty by default: every `ingot-rt` kernel takes a
    /// pixel stride.
    pub contiguous_kinds: Vec<String>,
    /// Run the verifier on the result (default: in debug builds).
    pub verify: bool,
    /// Also plan with every concatenation copying, for
    /// [`Plan::copying_bytes`] (default true).
    pub compare_copying: bool,
    /// The convolution weight form the module will use: the paired form's
    /// row buffers make the patch scratch larger ([`patch_bytes_for`]).
    pub weight_form: WeightForm,
    /// Stream rows from producers into consumers through rings where that
    /// lowers the live bytes ([`stream`]; default true).
    pub stream: bool,
}

impl Default for PlanOptions {
    fn default() -> Self {
        PlanOptions {
            align: 4,
            inplace_concat: true,
            inplace_elementwise: true,
            reorder: true,
            max_order_states: 2000,
            placement_trials: 64,
            contiguous_kinds: Vec::new(),
            verify: cfg!(debug_assertions),
            compare_copying: true,
            weight_form: WeightForm::Int8,
            stream: true,
        }
    }
}

/// Where a map lives: arena index of its element `(0,0,0)` and its pixel
/// stride (`ingot_rt::MapRef { offset, h, w, c, stride }`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct MapView {
    /// Arena index of element `(0, 0, 0)`.
    pub offset: usize,
    /// Distance between horizontally adjacent pixels (`>= c`).
    pub stride: usize,
}

/// One stored buffer of the plan: a plain map, or a concatenation region
/// with its members, or maps merged by in-place element-wise steps.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BufferLife {
    /// Maps stored in it; the first covers the whole buffer.
    pub maps: Vec<QMapId>,
    /// True for a concatenation region.
    pub region: bool,
    /// Arena offset.
    pub offset: usize,
    /// Bytes of the map(s) (unpadded).
    pub bytes: usize,
    /// Bytes reserved (rounded up to the alignment).
    pub padded: usize,
    /// First position in [`Plan::order`] at which it is alive.
    pub first: usize,
    /// Last position at which it is alive (inclusive).
    pub last: usize,
    /// Rows stored when the buffer is a ring of a streamed map.
    pub ring_rows: Option<usize>,
}

/// The memory plan of one network.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Plan {
    /// Execution order. Positions in this vector are the time axis of
    /// every lifetime.
    pub order: Vec<StepId>,
    /// View of every map, indexed by [`QMapId`] (maps no step touches get
    /// offset 0).
    pub map_views: Vec<MapView>,
    /// Concatenation steps that must copy their inputs (all others are
    /// no-ops: their inputs were written in place).
    pub copy_concat: Vec<StepId>,
    /// Element-wise steps that write over their (dying) first suitable
    /// input.
    pub in_place: Vec<StepId>,
    /// Stored buffers with offsets and lifetimes (only buffers that are
    /// alive at some step).
    pub buffers: Vec<BufferLife>,
    /// Arena size in bytes.
    pub arena_bytes: usize,
    /// Convolution patch scratch in bytes (outside the arena): twice the
    /// largest `ingot_rt::conv_patch_len` (`i16` elements) of any
    /// convolution, or of its row buffer with paired weights
    /// ([`patch_bytes_for`]).
    pub patch_bytes: usize,
    /// The weight form the patch was sized for (and the flash budget
    /// counts).
    pub weight_form: WeightForm,
    /// Largest total of (padded) buffers alive at one time of `order`,
    /// the steps of a pipeline sharing one time and rings counted with
    /// their ring bytes (the fused bound).
    pub lower_bound: usize,
    /// The same bound without streaming: every map stored whole, every
    /// step its own time.
    pub unfused_bound: usize,
    /// Row pipelines: consecutive steps of `order` run row by row, the
    /// maps between them stored as rings.
    pub pipelines: Vec<Pipeline>,
    /// Sum of all maps, each in its own bytes, no reuse.
    pub naive_bytes: usize,
    /// Arena of the best plan in which every concatenation copies.
    pub copying_bytes: usize,
    /// Position in `order` where the lower bound is reached.
    pub peak_step: usize,
    /// Peak of live bytes in the file order (with the same in-place rules).
    pub order_peak_before: usize,
    /// Peak of live bytes in the chosen order, unfused (equals
    /// `unfused_bound`).
    pub order_peak_after: usize,
    /// True when the order search was exhaustive.
    pub order_exact: bool,
    /// Placement heuristic that produced the arena.
    pub heuristic: String,
    /// Alignment used.
    pub align: usize,
    /// Wall time of planning in seconds.
    pub seconds: f64,
}

impl Plan {
    /// `arena_bytes / lower_bound` (1.0 for an empty plan).
    pub fn ratio(&self) -> f64 {
        if self.lower_bound == 0 {
            1.0
        } else {
            self.arena_bytes as f64 / self.lower_bound as f64
        }
    }

    /// The view of one map.
    pub fn view(&self, m: QMapId) -> MapView {
        self.map_views[m.index()]
    }

    /// Rows stored of every map (its height unless streamed as a ring),
    /// indexed by [`QMapId`].
    pub fn stored_rows(&self, q: &QGraph) -> Vec<usize> {
        let mut r: Vec<usize> = q.maps.iter().map(|m| m.shape.h).collect();
        for p in &self.pipelines {
            for g in &p.rings {
                r[g.map.index()] = g.rows;
            }
        }
        r
    }

    /// Position of every step in [`Plan::order`], indexed by [`StepId`].
    pub fn positions(&self) -> Vec<usize> {
        let mut p = vec![0; self.order.len()];
        for (i, s) in self.order.iter().enumerate() {
            p[s.index()] = i;
        }
        p
    }
}

/// Why planning failed.
#[derive(Debug, thiserror::Error)]
pub enum PlanError {
    /// The graph fails its structural check.
    #[error("graph `{0}` is not valid: {1}")]
    Graph(String, crate::lower::ir::QGraphError),
    /// The alignment is zero.
    #[error("alignment must be at least 1 byte")]
    Align,
    /// The verifier rejected the plan (a planner bug).
    #[error("plan of `{0}` failed verification: {1}")]
    Verify(String, verify::PlanViolation),
}

/// Plans the arena of `q`.
pub fn plan(q: &QGraph, opts: &PlanOptions) -> Result<Plan, PlanError> {
    let t0 = Instant::now();
    if opts.align == 0 {
        return Err(PlanError::Align);
    }
    q.verify()
        .map_err(|e| PlanError::Graph(q.name.clone(), e))?;
    let mut forced = vec![false; q.steps.len()];
    let mut p = plan_core(q, opts, &forced);
    // A region is reserved whole from its first member's write; when that
    // costs more than copying, give the region up (one region at a time).
    if opts.inplace_concat {
        let producers = q.producers();
        let regions: Vec<Vec<usize>> = p
            .buffers
            .iter()
            .filter(|b| b.region)
            .map(|b| {
                b.maps
                    .iter()
                    .filter_map(|m| producers[m.index()])
                    .map(|s| s.index())
                    .filter(|&s| matches!(q.steps[s].kernel, QKernel::Concat))
                    .collect()
            })
            .collect();
        for steps in regions {
            let mut trial = forced.clone();
            for s in steps {
                trial[s] = true;
            }
            let cand = plan_core(q, opts, &trial);
            if cand.arena_bytes < p.arena_bytes {
                p = cand;
                forced = trial;
            }
        }
    }
    let all_copy = p.copy_concat.len() == count_concats(q);
    p.copying_bytes = if opts.compare_copying && !all_copy {
        let o = PlanOptions {
            inplace_concat: false,
            verify: false,
            ..opts.clone()
        };
        plan_core(q, &o, &forced).arena_bytes
    } else {
        p.arena_bytes
    };
    p.seconds = t0.elapsed().as_secs_f64();
    if opts.verify {
        verify::verify(q, &p).map_err(|e| PlanError::Verify(q.name.clone(), e))?;
    }
    Ok(p)
}

fn count_concats(q: &QGraph) -> usize {
    q.steps
        .iter()
        .filter(|s| matches!(s.kernel, QKernel::Concat))
        .count()
}

/// Final storage for one order: buffers after element-wise aliasing.
struct Final {
    slots: Vec<regions::Slot>,
    buffers: Vec<Vec<QMapId>>,
    bytes: Vec<usize>,
    is_region: Vec<bool>,
    in_place: Vec<StepId>,
    iv: Vec<Option<(usize, usize)>>,
    sizes: Vec<u64>,
    profile: Vec<u64>,
}

fn finalize(q: &QGraph, st: &regions::Storage, order: &[usize], opts: &PlanOptions) -> Final {
    let n = q.steps.len();
    let mut pos = vec![0; n];
    for (i, &s) in order.iter().enumerate() {
        pos[s] = i;
    }
    let mut slots = st.slots.clone();
    let mut buffers = st.buffers.clone();
    let mut in_place = Vec::new();
    if opts.inplace_elementwise {
        let mb: Vec<usize> = slots.iter().map(|s| s.buffer).collect();
        let uses = liveness::buffer_uses(q, &mb, buffers.len());
        let mut iv = liveness::intervals(&uses, &pos, n);
        for (p, &s) in order.iter().enumerate() {
            let step = &q.steps[s];
            if !matches!(step.kernel, QKernel::Add(_) | QKernel::Channel(_)) {
                continue;
            }
            let o = step.output;
            let ob = slots[o.index()].buffer;
            if buffers[ob].len() != 1 || st.is_region[ob] || o == q.input {
                continue;
            }
            for &i in &step.inputs {
                let sl = slots[i.index()];
                let b = sl.buffer;
                let whole = sl.chan == 0
                    && sl.stride == q.map(i).shape.c
                    && st.bytes[b] == q.map(i).shape.len();
                // An int8 buffer cannot take an int16 (`--wide`) output.
                if b == ob || !whole || q.map(i).shape != q.map(o).shape || q.elem(i) != q.elem(o) {
                    continue;
                }
                let Some((_, last)) = iv[b] else { continue };
                if last != p {
                    continue;
                }
                // Merge the output's buffer into the input's.
                buffers[ob].clear();
                buffers[b].push(o);
                slots[o.index()] = sl;
                let oi = iv[ob];
                iv[b] = match (iv[b], oi) {
                    (Some((f, l)), Some((_, l2))) => Some((f, l.max(l2))),
                    (x, _) => x,
                };
                iv[ob] = None;
                in_place.push(StepId(s as u32));
                break;
            }
        }
    }
    // Compact: drop emptied buffers.
    let mut remap = vec![usize::MAX; buffers.len()];
    let mut nb = Vec::new();
    let mut bytes = Vec::new();
    let mut is_region = Vec::new();
    for (b, maps) in buffers.into_iter().enumerate() {
        if !maps.is_empty() {
            remap[b] = nb.len();
            nb.push(maps);
            bytes.push(st.bytes[b]);
            is_region.push(st.is_region[b]);
        }
    }
    for s in &mut slots {
        s.buffer = remap[s.buffer];
    }
    let mb: Vec<usize> = slots.iter().map(|s| s.buffer).collect();
    let uses = liveness::buffer_uses(q, &mb, nb.len());
    let iv = liveness::intervals(&uses, &pos, n);
    let sizes: Vec<u64> = bytes
        .iter()
        .map(|&b| liveness::align_up(b, opts.align) as u64)
        .collect();
    let profile = liveness::profile(&iv, &sizes, n);
    Final {
        slots,
        buffers: nb,
        bytes,
        is_region,
        in_place,
        iv,
        sizes,
        profile,
    }
}

fn plan_core(q: &QGraph, opts: &PlanOptions, forced_copy: &[bool]) -> Plan {
    let n = q.steps.len();
    let st = regions::analyze(q, opts, forced_copy);
    let file: Vec<usize> = (0..n).collect();
    let before = finalize(q, &st, &file, opts);
    let (peak_before, _) = liveness::peak(&before.profile);
    let mut chosen = before;
    let mut order = file;
    let mut exact = true;
    if opts.reorder && n > 1 {
        let prod = q.producers();
        let preds: Vec<Vec<usize>> = q
            .steps
            .iter()
            .map(|s| {
                let mut v: Vec<usize> = s
                    .inputs
                    .iter()
                    .filter_map(|m| prod[m.index()])
                    .map(|p| p.index())
                    .collect();
                v.sort_unstable();
                v.dedup();
                v
            })
            .collect();
        let mb: Vec<usize> = st.slots.iter().map(|s| s.buffer).collect();
        let uses = liveness::buffer_uses(q, &mb, st.buffers.len());
        let sizes: Vec<u64> = st
            .bytes
            .iter()
            .map(|&b| liveness::align_up(b, opts.align) as u64)
            .collect();
        let found = order::search(n, &preds, &uses, &sizes, opts.max_order_states);
        exact = found.exact;
        let cand = finalize(q, &st, &found.order, opts);
        if liveness::peak(&cand.profile).0 < peak_before {
            chosen = cand;
            order = found.order;
        }
    }
    let (unfused, _) = liveness::peak(&chosen.profile);
    let mb: Vec<usize> = chosen.slots.iter().map(|s| s.buffer).collect();
    let streaming = if opts.stream {
        stream::choose(
            q,
            &order,
            &mb,
            &chosen.buffers,
            &chosen.is_region,
            &chosen.sizes,
            opts.align,
            opts.weight_form,
        )
    } else {
        let mut time = vec![0; n];
        for (p, &s) in order.iter().enumerate() {
            time[s] = p;
        }
        stream::Streaming {
            pipelines: Vec::new(),
            time,
            ring_of_buffer: vec![None; chosen.buffers.len()],
        }
    };
    if !streaming.pipelines.is_empty() {
        for (b, r) in streaming.ring_of_buffer.iter().enumerate() {
            if let Some(rows) = r {
                let sh = q.map(chosen.buffers[b][0]).shape;
                chosen.bytes[b] = rows * sh.w * sh.c;
                chosen.sizes[b] = liveness::align_up(chosen.bytes[b], opts.align) as u64;
            }
        }
        let uses = liveness::buffer_uses(q, &mb, chosen.buffers.len());
        chosen.iv = liveness::intervals(&uses, &streaming.time, n);
        chosen.profile = liveness::profile(&chosen.iv, &chosen.sizes, n);
    }
    let (lb, peak_step) = liveness::peak(&chosen.profile);
    let live: Vec<usize> = (0..chosen.buffers.len())
        .filter(|&b| chosen.iv[b].is_some())
        .collect();
    let items: Vec<place::Item> = live
        .iter()
        .map(|&b| {
            let (first, last) = chosen.iv[b].expect("live");
            place::Item {
                size: chosen.sizes[b],
                first,
                last,
            }
        })
        .collect();
    let (offs, arena, heuristic) = place::place(&items, n, lb, opts.placement_trials);
    let mut buf_off = vec![0usize; chosen.buffers.len()];
    for (k, &b) in live.iter().enumerate() {
        buf_off[b] = offs[k] as usize;
    }
    let map_views = chosen
        .slots
        .iter()
        .enumerate()
        .map(|(m, sl)| {
            if chosen.iv[sl.buffer].is_some() {
                MapView {
                    offset: buf_off[sl.buffer] + sl.chan,
                    stride: sl.stride,
                }
            } else {
                MapView {
                    offset: 0,
                    stride: q.maps[m].shape.c,
                }
            }
        })
        .collect();
    let buffers = live
        .iter()
        .map(|&b| {
            let (first, last) = chosen.iv[b].expect("live");
            BufferLife {
                maps: chosen.buffers[b].clone(),
                region: chosen.is_region[b],
                offset: buf_off[b],
                bytes: chosen.bytes[b],
                padded: chosen.sizes[b] as usize,
                first,
                last,
                ring_rows: streaming.ring_of_buffer[b],
            }
        })
        .collect();
    let naive = q
        .maps
        .iter()
        .map(|m| liveness::align_up(m.shape.len(), opts.align))
        .sum();
    Plan {
        order: order.iter().map(|&s| StepId(s as u32)).collect(),
        map_views,
        copy_concat: st.copy_concat.clone(),
        in_place: chosen.in_place,
        buffers,
        arena_bytes: arena as usize,
        patch_bytes: patch_bytes_for(q, opts.weight_form),
        weight_form: opts.weight_form,
        lower_bound: lb as usize,
        unfused_bound: unfused as usize,
        pipelines: streaming.pipelines,
        naive_bytes: naive,
        copying_bytes: 0,
        peak_step,
        order_peak_before: peak_before as usize,
        order_peak_after: unfused as usize,
        order_exact: exact,
        heuristic,
        align: opts.align,
        seconds: 0.0,
    }
}
