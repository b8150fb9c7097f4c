//! Row streaming: a producer and its consumer run as one *row pipeline*,
//! the map between them stored as a ring of the few rows the consumer's
//! window spans instead of whole.
//!
//! An edge producer → map → consumer can stream when the map has exactly
//! one reader, is neither the graph input nor its output, is a buffer of
//! its own (no concatenation region, no in-place merge), both steps
//! produce output rows one at a time (convolution in any form, max and
//! average pooling, add, channel transform), and the consumer runs right
//! after the producer in the chosen order, so a pipeline is a run of
//! consecutive steps. The ring holds `(kh − 1)·dilation + 1` rows (one for
//! an element-wise consumer), clipped to the height.
//!
//! Execution ([`Pipeline::calls`], and the loop of the generated
//! `forward`): for every output row `y` of the last step, each step in
//! turn computes its rows from where it stopped up to the last row the
//! next step's rows up to `y` read ([`need_of`]: just in time), so a ring
//! never loses a row its consumer still needs. A ring holds the most rows
//! one call of its consumer reads (the window span when the consumer
//! computes one row per pass). Every row of every step is computed once:
//! no recompute, the same MACs as the unfused plan.
//!
//! Liveness: all steps of a pipeline share one time (the first step's
//! position), so every map any of them touches is alive together, a ring
//! with its `rows · w · c` bytes. The planner keeps an edge when it does
//! not raise the plan's peak and lowers the live bytes at the pipeline's
//! time.
//!
//! Not streamed: a paired or word-form convolution that reads its input
//! through its own ring of `kh > 1` rows in the patch scratch
//! (`ingot_rt::conv_rows_apply`), as producer or consumer. A call that
//! starts mid-map refills all `kh` rows of that ring, and the patch is
//! shared by every convolution of a pipeline, so row by row each input row
//! would be transformed `kh` times instead of once.

use super::liveness::{self, BufUse};
use super::WeightForm;
use crate::lower::{QGraph, QKernel, QMapId, RowCall, StepId};
use serde::Serialize;

/// One map of a pipeline stored as a ring.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Ring {
    /// The map.
    pub map: QMapId,
    /// Rows stored (fewer than its height).
    pub rows: usize,
}

/// Consecutive steps of the order run row by row.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Pipeline {
    /// The steps, in order (each but the last streams into a later one).
    pub steps: Vec<StepId>,
    /// The maps between them stored as rings.
    pub rings: Vec<Ring>,
    /// The calls that execute it, in order: every step's output rows
    /// exactly once, ascending.
    pub calls: Vec<RowCall>,
}

/// Input rows `[lo, hi)` that output rows `[y0, y1)` of `step` read of its
/// input `m` (clipped to the input), for a row-producing step.
pub(crate) fn input_rows(q: &QGraph, step: StepId, y0: usize, y1: usize) -> (usize, usize) {
    let s = q.step(step);
    let h = q.map(s.inputs[0]).shape.h;
    let (sy, top, span) = window_rows(&s.kernel);
    if y1 <= y0 {
        return (0, 0);
    }
    let lo = (y0 * sy).saturating_sub(top).min(h);
    let hi = ((y1 - 1) * sy + span).saturating_sub(top).min(h);
    (lo, hi)
}

/// `(step, top padding, span, input height)` of the rows `consumer` reads
/// of its first input per output row: the constants of [`need_of`].
pub fn row_window(q: &QGraph, consumer: StepId) -> (usize, usize, usize, usize) {
    let s = q.step(consumer);
    let (sy, top, span) = window_rows(&s.kernel);
    (sy, top, span, q.map(s.inputs[0]).shape.h)
}

/// `(step, top padding, span)` of the rows a kernel reads per output row.
fn window_rows(k: &QKernel) -> (usize, usize, usize) {
    let w = match k {
        QKernel::Conv2d(c) => c.runtime_window(),
        QKernel::MaxPool(p) | QKernel::AvgPool(p) => p.runtime_window(),
        _ => return (1, 0, 1),
    };
    (w.step_y, w.pad.top, (w.kh - 1) * w.dilation_y + 1)
}

/// True for the kernels that can compute some of their output rows.
fn row_kernel(k: &QKernel) -> bool {
    matches!(
        k,
        QKernel::Conv2d(_)
            | QKernel::MaxPool(_)
            | QKernel::AvgPool(_)
            | QKernel::Add(_)
            | QKernel::Channel(_)
    )
}

/// A convolution that keeps its own ring of `kh > 1` input rows in the
/// patch with this weight form (see the module docs).
fn patch_ring(k: &QKernel, form: WeightForm) -> bool {
    let QKernel::Conv2d(c) = k else {
        return false;
    };
    let w = c.runtime_window();
    w.kh > 1
        && match form {
            WeightForm::Int8 => false,
            WeightForm::Pairs => ingot_rt::conv_rows_apply(&w, c.groups, c.in_channels),
            WeightForm::Words => ingot_rt::conv_rows_apply_words(&w, c.groups, c.in_channels),
        }
}

/// Rows the ring of `m` needs for its reader `consumer`.
fn ring_rows(q: &QGraph, consumer: StepId) -> usize {
    let s = q.step(consumer);
    let h = q.map(s.inputs[0]).shape.h;
    window_rows(&s.kernel).2.min(h).max(1)
}

/// A streamable edge: position `p` of the order streams into `p + 1`.
#[derive(Debug, Clone, Copy)]
struct Edge {
    pos: usize,
    map: QMapId,
    buffer: usize,
    rows: usize,
    /// Bytes of the ring, aligned.
    buffer_bytes: u64,
}

/// What [`choose`] decided.
#[derive(Debug, Clone, Default)]
pub(crate) struct Streaming {
    /// The pipelines, in order.
    pub pipelines: Vec<Pipeline>,
    /// Time of every step (indexed by step): its pipeline's first position,
    /// or its own position.
    pub time: Vec<usize>,
    /// Ring rows of buffers stored as rings (indexed by buffer).
    pub ring_of_buffer: Vec<Option<usize>>,
}

/// Candidate edges of an order (`order[p]` streams into `order[p + 1]`).
#[allow(clippy::too_many_arguments)]
/// True when `s` reads or writes an int16 map: the `ingot_rt::wide`
/// kernels compute whole maps only, so such a step never joins a pipeline.
fn touches_wide(q: &QGraph, s: &crate::lower::QStep) -> bool {
    s.inputs.iter().chain([&s.output]).any(|&m| q.is_wide(m))
}

fn candidates(
    q: &QGraph,
    order: &[usize],
    map_buffer: &[usize],
    buffer_maps: &[Vec<QMapId>],
    is_region: &[bool],
    form: WeightForm,
) -> Vec<Edge> {
    let mut readers = vec![0usize; q.maps.len()];
    for s in &q.steps {
        let mut seen: Vec<QMapId> = Vec::new();
        for &m in &s.inputs {
            if !seen.contains(&m) {
                readers[m.index()] += 1;
                seen.push(m);
            }
        }
    }
    let mut out = Vec::new();
    for p in 0..order.len().saturating_sub(1) {
        let (ps, cs) = (StepId(order[p] as u32), StepId(order[p + 1] as u32));
        let (prod, cons) = (q.step(ps), q.step(cs));
        let m = prod.output;
        let b = map_buffer[m.index()];
        if m == q.input
            || m == q.output
            || readers[m.index()] != 1
            || !row_kernel(&prod.kernel)
            || !row_kernel(&cons.kernel)
            || patch_ring(&prod.kernel, form)
            || patch_ring(&cons.kernel, form)
            || is_region[b]
            || buffer_maps[b].len() != 1
            || !cons.inputs.contains(&m)
            || touches_wide(q, prod)
            || touches_wide(q, cons)
        {
            continue;
        }
        // Windows read their first input; element-wise steps any input.
        let windowed = !matches!(cons.kernel, QKernel::Add(_) | QKernel::Channel(_));
        if windowed && cons.inputs[0] != m {
            continue;
        }
        let rows = ring_rows(q, cs);
        let h = q.map(m).shape.h;
        if rows >= h {
            continue;
        }
        out.push(Edge {
            pos: p,
            map: m,
            buffer: b,
            rows,
            buffer_bytes: 0,
        });
    }
    out
}

/// Times, profile and ring sizes for a set of chosen edges.
struct Eval {
    time_of_pos: Vec<usize>,
    profile: Vec<u64>,
}

fn evaluate(
    n: usize,
    order: &[usize],
    uses: &[BufUse],
    sizes: &[u64],
    edges: &[Edge],
    chosen: &[bool],
) -> Eval {
    let mut joined = vec![false; n]; // position p joined to p - 1
    let mut sizes = sizes.to_vec();
    for (e, &c) in edges.iter().zip(chosen) {
        if c {
            joined[e.pos + 1] = true;
        }
    }
    let mut time_of_pos = vec![0; n];
    for p in 0..n {
        time_of_pos[p] = if p > 0 && joined[p] {
            time_of_pos[p - 1]
        } else {
            p
        };
    }
    let mut tpos = vec![0; n];
    for (p, &s) in order.iter().enumerate() {
        tpos[s] = time_of_pos[p];
    }
    for (e, &c) in edges.iter().zip(chosen) {
        if c {
            sizes[e.buffer] = e.buffer_bytes;
        }
    }
    let iv = liveness::intervals(uses, &tpos, n);
    let profile = liveness::profile(&iv, &sizes, n);
    Eval {
        time_of_pos,
        profile,
    }
}

/// Chooses the edges to stream for an order and builds the pipelines.
#[allow(clippy::too_many_arguments)]
pub(crate) fn choose(
    q: &QGraph,
    order: &[usize],
    map_buffer: &[usize],
    buffer_maps: &[Vec<QMapId>],
    is_region: &[bool],
    sizes: &[u64],
    align: usize,
    form: WeightForm,
) -> Streaming {
    let n = order.len();
    let uses = liveness::buffer_uses(q, map_buffer, buffer_maps.len());
    let mut edges = candidates(q, order, map_buffer, buffer_maps, is_region, form);
    for e in &mut edges {
        let sh = q.map(e.map).shape;
        e.buffer_bytes = liveness::align_up(e.rows * sh.w * sh.c, align) as u64;
    }
    let mut chosen = vec![false; edges.len()];
    let mut cur = evaluate(n, order, &uses, sizes, &edges, &chosen);
    let mut cur_peak = liveness::peak(&cur.profile).0;
    // Two passes: an edge kept later can make an earlier one pay.
    for _ in 0..2 {
        for k in 0..edges.len() {
            if chosen[k] {
                continue;
            }
            let p = edges[k].pos;
            let local = |ev: &Eval| {
                let (a, b) = (ev.time_of_pos[p], ev.time_of_pos[p + 1]);
                ev.profile[a].max(ev.profile[b])
            };
            chosen[k] = true;
            let trial = evaluate(n, order, &uses, sizes, &edges, &chosen);
            let peak = liveness::peak(&trial.profile).0;
            if peak <= cur_peak && local(&trial) < local(&cur) {
                cur = trial;
                cur_peak = peak;
            } else {
                chosen[k] = false;
            }
        }
    }
    let mut time = vec![0; n];
    for (p, &s) in order.iter().enumerate() {
        time[s] = cur.time_of_pos[p];
    }
    let mut ring_of_buffer = vec![None; buffer_maps.len()];
    let mut pipelines: Vec<Pipeline> = Vec::new();
    let mut k = 0;
    while k < edges.len() {
        if !chosen[k] {
            k += 1;
            continue;
        }
        let first = edges[k].pos;
        let mut steps = vec![StepId(order[first] as u32)];
        let mut rings = Vec::new();
        while k < edges.len() && chosen[k] && edges[k].pos == first + steps.len() - 1 {
            steps.push(StepId(order[edges[k].pos + 1] as u32));
            rings.push(Ring {
                map: edges[k].map,
                rows: edges[k].rows,
            });
            ring_of_buffer[edges[k].buffer] = Some(edges[k].rows);
            k += 1;
        }
        let calls = calls(q, &steps);
        // The loop may read more rows per call than one window spans
        // (a consumer that computes several rows in one pass).
        // A ring that would hold every row stays a whole map.
        for (j, r) in rings.iter_mut().enumerate() {
            let held = rows_held(q, &calls, steps[j + 1]);
            r.rows = r.rows.max(held);
            let b = map_buffer[r.map.index()];
            ring_of_buffer[b] = (r.rows < q.map(r.map).shape.h).then_some(r.rows);
        }
        rings.retain(|r| r.rows < q.map(r.map).shape.h);
        pipelines.push(Pipeline {
            steps,
            rings,
            calls,
        });
    }
    Streaming {
        pipelines,
        time,
        ring_of_buffer,
    }
}

/// The rows step `j + 1` of a chain needs of step `j`'s output for its
/// output rows below `need` (`need >= 1`): the loop bound of the
/// generated code, `min(h, ((need − 1)·step + span) − top)` (clipped at 0).
pub fn need_of(q: &QGraph, consumer: StepId, need: usize) -> usize {
    if need == 0 {
        return 0;
    }
    input_rows(q, consumer, need - 1, need).1
}

/// The row calls of a pipeline (a chain: each step reads the previous
/// one's output), in the order of the generated loop: for every output
/// row `y` of the last step, each step in turn computes its rows from
/// where it stopped up to what the next step's rows up to `y` read
/// ([`need_of`]); empty ranges are left out.
pub(crate) fn calls(q: &QGraph, steps: &[StepId]) -> Vec<RowCall> {
    let k = steps.len();
    let Some(&last) = steps.last() else {
        return Vec::new();
    };
    let h = q.map(q.step(last).output).shape.h;
    let mut done = vec![0usize; k];
    let mut need = vec![0usize; k];
    let mut out = Vec::new();
    for y in 0..h {
        need[k - 1] = y + 1;
        for j in (0..k - 1).rev() {
            need[j] = need_of(q, steps[j + 1], need[j + 1]);
        }
        for j in 0..k {
            if need[j] > done[j] {
                out.push(RowCall {
                    step: steps[j],
                    y0: done[j],
                    y1: need[j],
                });
                done[j] = need[j];
            }
        }
    }
    out
}

/// Rows a ring of the output of `steps[j]` must hold for these calls:
/// the most input rows one call of `steps[j + 1]` reads.
pub(crate) fn rows_held(q: &QGraph, calls: &[RowCall], consumer: StepId) -> usize {
    calls
        .iter()
        .filter(|c| c.step == consumer)
        .map(|c| {
            let (lo, hi) = input_rows(q, consumer, c.y0, c.y1);
            hi - lo
        })
        .max()
        .unwrap_or(1)
        .max(1)
}
