//! Independent check of a [`Plan`]: uses only the graph and the plan's
//! public result (order, views, copying concatenations, in-place steps,
//! arena size), none of the planner's internal structures.
//!
//! Checked:
//!
//! 1. the order is a permutation of the steps in which every input is
//!    written before it is read;
//! 2. every map touched by a step fits in the arena with its stride
//!    (`offset + ((h·w − 1)·stride + c) <= arena`, `stride >= c`);
//! 3. every input of an in-place concatenation is exactly its channel slice
//!    of the output (`offset = out.offset + c0`, same stride);
//! 4. for every pair of *stored* maps (all but in-place concatenation
//!    outputs, which are their members) whose lifetimes meet, no arena byte
//!    is shared. A map's lifetime runs from its write (the graph input: 0)
//!    to its last read (the graph output: the end), extended to the last
//!    read of any in-place concatenation containing it. The only sharing
//!    allowed is an element-wise step listed in [`Plan::in_place`] whose
//!    output view equals an input's view, that input's lifetime ending at
//!    the step; the input may be an in-place concatenation, whose members
//!    the output then overwrites.
//!
//! 5. row pipelines ([`Plan::pipelines`]): their steps are consecutive in
//!    the order and share the first one's time (every lifetime above is
//!    taken in these times); a ring is a map written by one step of the
//!    pipeline and read by exactly one later step of it, stored as fewer
//!    rows than its height (only those rows count for 2 and 4); the calls
//!    compute every row of every step once, in ascending order; and
//!    replaying them, every call finds each input row it reads in the
//!    ring (written, not yet overwritten), and never reads a row an
//!    in-place step of the pipeline already wrote over.
//!
//! Overlap is decided exactly, pixel run by pixel run (a brute-force
//! enumeration over the pixels of one map, with the other map's pixel index
//! computed arithmetically).

use super::{MapView, Plan};
use crate::lower::{QGraph, QKernel, QMapId, StepId};

/// `[start, end)` of the bytes a view spans, or `None` for an empty map.
fn span(v: MapView, px: usize, c: usize) -> Option<(usize, usize)> {
    if px == 0 || c == 0 {
        return None;
    }
    Some((v.offset, v.offset + (px - 1) * v.stride + c))
}

/// True when the two views share at least one byte.
pub fn views_overlap(
    a: MapView,
    a_px: usize,
    a_c: usize,
    b: MapView,
    b_px: usize,
    b_c: usize,
) -> bool {
    let (Some((sa, ea)), Some((sb, eb))) = (span(a, a_px, a_c), span(b, b_px, b_c)) else {
        return false;
    };
    if ea <= sb || eb <= sa {
        return false;
    }
    // Enumerate the runs of the map with fewer pixels.
    let (x, x_px, x_c, y, y_px, y_c) = if a_px <= b_px {
        (a, a_px, a_c, b, b_px, b_c)
    } else {
        (b, b_px, b_c, a, a_px, a_c)
    };
    for p in 0..x_px {
        let lo = x.offset + p * x.stride;
        let hi = lo + x_c; // run [lo, hi)
        if hi <= y.offset {
            continue;
        }
        // Pixels of `y` whose run could meet [lo, hi).
        let q0 = lo.saturating_sub(y.offset) / y.stride.max(1);
        let q0 = q0.saturating_sub(1);
        let q1 = ((hi - 1).saturating_sub(y.offset) / y.stride.max(1)).min(y_px - 1);
        for q in q0..=q1 {
            let rlo = y.offset + q * y.stride;
            let rhi = rlo + y_c;
            if rlo < hi && lo < rhi {
                return true;
            }
        }
    }
    false
}

/// The first problem [`verify`] found in a plan, naming the step or maps.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum PlanViolation {
    /// The order or the view table has the wrong length.
    #[error("order or view table has the wrong length")]
    Lengths,
    /// A step is missing from the order or listed twice.
    #[error("step {0} missing or repeated in the order")]
    Order(u32),
    /// A step reads a map before the order writes it.
    #[error("step `{step}` reads `{map}` before it is written")]
    ReadBeforeWrite {
        /// Step name.
        step: String,
        /// Map name.
        map: String,
    },
    /// A map's stride is smaller than its channel count.
    #[error("map `{map}` has stride {stride} < {channels} channels")]
    Stride {
        /// Map name.
        map: String,
        /// Its stride.
        stride: usize,
        /// Its channels.
        channels: usize,
    },
    /// A map ends beyond the arena.
    #[error("map `{map}` ends at {end} beyond the arena of {arena}")]
    BeyondArena {
        /// Map name.
        map: String,
        /// Its end offset.
        end: usize,
        /// Arena bytes.
        arena: usize,
    },
    /// An input of an in-place concatenation is not its channel slice.
    #[error("`{map}` is not at channel {channel} of in-place concatenation `{concat}` (view {view:?}, region {region:?})")]
    ConcatSlice {
        /// Input map name.
        map: String,
        /// The channel it should start at.
        channel: usize,
        /// Concatenation step name.
        concat: String,
        /// The input's view.
        view: MapView,
        /// The concatenation's view.
        region: MapView,
    },
    /// A row pipeline is malformed or a call reads a row its ring does not
    /// hold.
    #[error("pipeline at step `{step}`: {why}")]
    Pipeline {
        /// The step concerned.
        step: String,
        /// What is wrong.
        why: String,
    },
    /// Two maps alive together share arena bytes.
    #[error(
        "`{a}` (alive {a_from}..={a_to}) and `{b}` (alive {b_from}..={b_to}) share arena bytes"
    )]
    Overlap {
        /// First map.
        a: String,
        /// Its first step.
        a_from: usize,
        /// Its last step.
        a_to: usize,
        /// Second map.
        b: String,
        /// Its first step.
        b_from: usize,
        /// Its last step.
        b_to: usize,
    },
}

/// Checks `plan` against `q`; `Err` names the first problem.
pub fn verify(q: &QGraph, plan: &Plan) -> Result<(), PlanViolation> {
    let n = q.steps.len();
    let nm = q.maps.len();
    if plan.order.len() != n || plan.map_views.len() != nm {
        return Err(PlanViolation::Lengths);
    }
    let mut pos = vec![usize::MAX; n];
    for (i, s) in plan.order.iter().enumerate() {
        if s.index() >= n || pos[s.index()] != usize::MAX {
            return Err(PlanViolation::Order(s.0));
        }
        pos[s.index()] = i;
    }
    let rows = pipelines(q, plan, &pos)?;
    // The steps of a pipeline share one time.
    let order_pos = pos.clone();
    for p in &plan.pipelines {
        let t = order_pos[p.steps[0].index()];
        for s in &p.steps {
            pos[s.index()] = t;
        }
    }
    let mut def: Vec<Option<usize>> = vec![None; nm];
    def[q.input.index()] = Some(0);
    for (s, st) in q.steps.iter().enumerate() {
        def[st.output.index()] = Some(pos[s]);
    }
    let mut last: Vec<Option<usize>> = def.clone();
    for (s, st) in q.steps.iter().enumerate() {
        for m in &st.inputs {
            let written = q
                .steps
                .iter()
                .position(|p| p.output == *m)
                .map(|p| order_pos[p] < order_pos[s]);
            match def[m.index()] {
                Some(_) if m == &q.input || written == Some(true) => {}
                _ => {
                    return Err(PlanViolation::ReadBeforeWrite {
                        step: st.name.clone(),
                        map: q.map(*m).name.clone(),
                    })
                }
            }
            let l = last[m.index()].get_or_insert(pos[s]);
            *l = (*l).max(pos[s]);
        }
    }
    if let Some(l) = last[q.output.index()].as_mut() {
        *l = n.saturating_sub(1).max(*l);
    }
    let shape = |m: QMapId| {
        let s = q.map(m).shape;
        (rows[m.index()] * s.w, s.c)
    };
    // 2. In the arena.
    for (m, d) in def.iter().enumerate() {
        if d.is_none() {
            continue;
        }
        let v = plan.map_views[m];
        let (px, c) = shape(QMapId(m as u32));
        if v.stride < c {
            return Err(PlanViolation::Stride {
                map: q.maps[m].name.clone(),
                stride: v.stride,
                channels: c,
            });
        }
        if let Some((_, e)) = span(v, px, c) {
            if e > plan.arena_bytes {
                return Err(PlanViolation::BeyondArena {
                    map: q.maps[m].name.clone(),
                    end: e,
                    arena: plan.arena_bytes,
                });
            }
        }
    }
    // 3. In-place concatenations, latest first so containment propagates.
    let mut inplace_out = vec![false; nm];
    let mut containers: Vec<Vec<usize>> = vec![Vec::new(); nm];
    let mut concats: Vec<usize> = (0..n)
        .filter(|&s| {
            matches!(q.steps[s].kernel, QKernel::Concat)
                && !plan.copy_concat.iter().any(|c| c.index() == s)
        })
        .collect();
    concats.sort_by_key(|&s| std::cmp::Reverse(pos[s]));
    for &s in &concats {
        let st = &q.steps[s];
        let o = plan.map_views[st.output.index()];
        inplace_out[st.output.index()] = true;
        let mut c0 = 0;
        for &m in &st.inputs {
            let v = plan.map_views[m.index()];
            if v.offset != o.offset + c0 || v.stride != o.stride {
                return Err(PlanViolation::ConcatSlice {
                    map: q.map(m).name.clone(),
                    channel: c0,
                    concat: st.name.clone(),
                    view: v,
                    region: o,
                });
            }
            c0 += q.map(m).shape.c;
            containers[m.index()].push(st.output.index());
            if let (Some(lo), Some(lm)) = (last[st.output.index()], last[m.index()]) {
                last[m.index()] = Some(lm.max(lo));
            }
        }
    }
    // 4. Pairwise disjointness of stored maps alive together.
    let stored: Vec<usize> = (0..nm)
        .filter(|&m| def[m].is_some() && !inplace_out[m])
        .collect();
    // `a` is `i` or a member (at any depth) of the in-place concatenation `i`.
    let within = |a: usize, i: usize| {
        let mut todo = vec![a];
        let mut seen = vec![false; nm];
        while let Some(x) = todo.pop() {
            if x == i {
                return true;
            }
            for &c in &containers[x] {
                if !seen[c] {
                    seen[c] = true;
                    todo.push(c);
                }
            }
        }
        false
    };
    let allowed = |a: usize, b: usize| {
        plan.in_place.iter().any(|s| {
            let st = &q.steps[s.index()];
            let p = pos[s.index()];
            let elementwise = matches!(st.kernel, QKernel::Add(_) | QKernel::Channel(_));
            let pair = |i: usize, o: usize| {
                st.output.index() == o
                    && def[o] == Some(p)
                    && st.inputs.iter().any(|m| {
                        let m = m.index();
                        within(i, m)
                            && plan.map_views[m] == plan.map_views[o]
                            && last[m] == Some(p)
                            && last[i] == Some(p)
                    })
            };
            elementwise && (pair(a, b) || pair(b, a))
        })
    };
    for (k, &a) in stored.iter().enumerate() {
        let (da, la) = (def[a].unwrap_or(0), last[a].unwrap_or(0));
        let (pa, ca) = shape(QMapId(a as u32));
        for &b in &stored[k + 1..] {
            let (db, lb) = (def[b].unwrap_or(0), last[b].unwrap_or(0));
            if la < db || lb < da {
                continue;
            }
            let (pb, cb) = shape(QMapId(b as u32));
            if views_overlap(plan.map_views[a], pa, ca, plan.map_views[b], pb, cb) && !allowed(a, b)
            {
                return Err(PlanViolation::Overlap {
                    a: q.maps[a].name.clone(),
                    a_from: da,
                    a_to: la,
                    b: q.maps[b].name.clone(),
                    b_from: db,
                    b_to: lb,
                });
            }
        }
    }
    Ok(())
}

/// Checks the row pipelines (5. in the module docs); returns the rows
/// stored of every map.
fn pipelines(q: &QGraph, plan: &Plan, pos: &[usize]) -> Result<Vec<usize>, PlanViolation> {
    let mut rows: Vec<usize> = q.maps.iter().map(|m| m.shape.h).collect();
    let mut in_pipe = vec![false; q.steps.len()];
    let bad = |s: StepId, why: String| PlanViolation::Pipeline {
        step: q.step(s).name.clone(),
        why,
    };
    let readers = |m: QMapId| q.steps.iter().filter(|s| s.inputs.contains(&m)).count();
    for p in &plan.pipelines {
        let Some(&first) = p.steps.first() else {
            return Err(PlanViolation::Lengths);
        };
        for (i, &s) in p.steps.iter().enumerate() {
            if s.index() >= q.steps.len() || pos[s.index()] != pos[first.index()] + i {
                return Err(bad(s, "steps not consecutive in the order".into()));
            }
            if std::mem::replace(&mut in_pipe[s.index()], true) {
                return Err(bad(s, "step in two pipelines".into()));
            }
        }
        for r in &p.rings {
            let m = r.map;
            let h = q.map(m).shape.h;
            let writer = p.steps.iter().position(|&s| q.step(s).output == m);
            let reader = p.steps.iter().position(|&s| q.step(s).inputs.contains(&m));
            let ok = matches!((writer, reader), (Some(w), Some(r)) if w < r)
                && readers(m) == 1
                && m != q.input
                && m != q.output
                && r.rows >= 1
                && r.rows < h;
            if !ok {
                return Err(bad(first, format!("`{}` cannot be a ring", q.map(m).name)));
            }
            rows[m.index()] = r.rows;
        }
        // Replay the calls.
        let mut done: Vec<usize> = vec![0; q.maps.len()]; // rows written
        let mut clobbered: Vec<usize> = vec![0; q.maps.len()];
        for c in &p.calls {
            if !p.steps.contains(&c.step) {
                return Err(bad(c.step, "call of a step outside the pipeline".into()));
            }
            let st = q.step(c.step);
            let o = st.output;
            let oh = q.map(o).shape.h;
            if c.y0 != done[o.index()] || c.y1 <= c.y0 || c.y1 > oh {
                return Err(bad(c.step, format!("rows {}..{} out of turn", c.y0, c.y1)));
            }
            let (sy, top, span) = match &st.kernel {
                QKernel::Conv2d(cv) => (
                    cv.stride[0],
                    cv.padding.top,
                    (cv.kernel[0] - 1) * cv.dilation[0] + 1,
                ),
                QKernel::MaxPool(pl) | QKernel::AvgPool(pl) => {
                    (pl.stride[0], pl.padding.top, pl.kernel[0])
                }
                QKernel::Add(_) | QKernel::Channel(_) => (1, 0, 1),
                _ => return Err(bad(c.step, "kernel cannot run by rows".into())),
            };
            // Element-wise steps read rows y0..y1 of every input (step 1,
            // no padding, span 1); windows read their one input.
            for &m in &st.inputs {
                let h = q.map(m).shape.h;
                let lo = (c.y0 * sy).saturating_sub(top).min(h);
                let hi = ((c.y1 - 1) * sy + span).saturating_sub(top).min(h);
                if lo < clobbered[m.index()] {
                    return Err(bad(
                        c.step,
                        format!(
                            "reads row {lo} of `{}` after it was written over",
                            q.map(m).name
                        ),
                    ));
                }
                let stored = p.rings.iter().any(|r| r.map == m);
                let made_here = p.steps.iter().any(|&s| q.step(s).output == m);
                if made_here
                    && (hi > done[m.index()] || (stored && lo + rows[m.index()] < done[m.index()]))
                {
                    return Err(bad(
                        c.step,
                        format!(
                            "rows {lo}..{hi} of `{}` not held (written {}, ring {})",
                            q.map(m).name,
                            done[m.index()],
                            rows[m.index()]
                        ),
                    ));
                }
            }
            // An in-place step writes over its input's rows.
            if plan.in_place.contains(&c.step) {
                for &m in &st.inputs {
                    if plan.map_views[m.index()] == plan.map_views[o.index()] {
                        clobbered[m.index()] = c.y1;
                    }
                }
            }
            done[o.index()] = c.y1;
        }
        for &s in &p.steps {
            let o = q.step(s).output;
            if done[o.index()] != q.map(o).shape.h {
                return Err(bad(s, "not every row computed".into()));
            }
        }
    }
    Ok(rows)
}
