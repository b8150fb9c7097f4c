//! The exact `ingot-rt` calls of a schedule.
//!
//! [`step_calls`] turns every step of a [`QGraph`] under a [`Schedule`] into
//! the kernel calls with all their parameters. The same list is
//! * executed here ([`execute`]) with the real `ingot-rt` kernels: at
//!   generation time on a dummy input, so every kernel's own parameter
//!   validation has run before any code is written, and in tests as the
//!   straightforward interpretation the generated module must match;
//! * printed as Rust by the emitter.
//!
//! So the generated module cannot pass parameters the compiler did not
//! validate.

use crate::lower::{
    ChannelTransform, Clamp, Multiplier, QConv, QGraph, QKernel, QLinear, QPool, StepId,
};
pub use crate::plan::form::weight_rows;
use crate::plan::Schedule;
use ingot_rt::{
    AddParams, ConvParams, InputTransform, MapRef, OutputQuant, PoolQuant, Requant, Window,
};

/// One kernel call.
#[derive(Debug, Clone)]
pub enum Call<'a> {
    /// `ingot_rt::conv2d`, `conv2d_paired` or `conv2d_words` by `form`.
    Conv {
        input: MapRef,
        output: MapRef,
        conv: &'a QConv,
        params: ConvParams,
        /// The layer's weight form (see [`set_weight_form`]).
        form: super::WeightForm,
    },
    /// `ingot_rt::linear`.
    Linear {
        input: MapRef,
        output: MapRef,
        lin: &'a QLinear,
        out: OutputQuant,
    },
    /// `ingot_rt::max_pool2d`.
    MaxPool {
        input: MapRef,
        output: MapRef,
        window: Window,
        q: PoolQuant,
    },
    /// `ingot_rt::avg_pool2d`.
    AvgPool {
        input: MapRef,
        output: MapRef,
        window: Window,
        q: PoolQuant,
    },
    /// `ingot_rt::global_avg_pool`.
    GlobalAvgPool {
        input: MapRef,
        output: MapRef,
        q: PoolQuant,
    },
    /// `ingot_rt::add`.
    Add {
        a: MapRef,
        b: MapRef,
        output: MapRef,
        p: AddParams,
    },
    /// `ingot_rt::copy_channels` (one input of a copying concatenation).
    Copy { src: MapRef, dst: MapRef },
    /// `ingot_rt::channel_transform`.
    Channel {
        input: MapRef,
        output: MapRef,
        t: &'a ChannelTransform,
    },
    /// A step reading or writing an int16 map: `ingot_rt::wide`.
    Wide(super::wide::WideCall<'a>),
}

/// The calls of one step (empty for an in-place concatenation).
#[derive(Debug, Clone)]
pub struct StepCalls<'a> {
    /// The step.
    pub step: StepId,
    /// Its calls, in order.
    pub calls: Vec<Call<'a>>,
}

/// The arena view of a map (an int16 map's offset in bytes, see
/// [`super::wide::map_ref`]).
pub fn map_ref(q: &QGraph, s: &Schedule, m: crate::lower::QMapId) -> MapRef {
    super::wide::map_ref(q, s, m)
}

pub use super::wide::trace_ref;

/// `ingot_rt::Requant` of a multiplier.
pub fn requant(m: Multiplier) -> Requant {
    Requant {
        mult: m.mult,
        shift: m.shift,
    }
}

fn out_quant(zp: i32, c: Clamp) -> OutputQuant {
    OutputQuant::clamped(zp, c.min, c.max)
}

/// The borrowed runtime form of a channel transform.
pub fn rt_transform(t: &ChannelTransform) -> InputTransform<'_> {
    t.runtime()
}

/// Why a schedule cannot be turned into kernel calls; names the step or
/// map.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum CallError {
    /// A step has fewer inputs than its kernel reads.
    #[error("step `{step}` lacks input {input}")]
    MissingInput {
        /// Step name.
        step: String,
        /// Index of the missing input.
        input: usize,
    },
    /// A convolution's input zero point is not an `i8`.
    #[error("step `{0}`: input zero point out of range")]
    ZeroPoint(String),
    /// The schedule has a view count other than the graph's map count.
    #[error("schedule has {views} map views for {maps} maps")]
    ViewCount {
        /// Views in the schedule.
        views: usize,
        /// Maps in the graph.
        maps: usize,
    },
    /// A map's view leaves the arena.
    #[error("map `{map}` does not fit the {arena}-byte arena at offset {offset} stride {stride}")]
    OutsideArena {
        /// Map name.
        map: String,
        /// Arena bytes.
        arena: usize,
        /// The view's offset.
        offset: usize,
        /// The view's stride.
        stride: usize,
    },
    /// A step index is repeated or out of range in the order.
    #[error("schedule order lists step {0} twice or out of range")]
    BadStep(u32),
    /// A step reads a map before any step wrote it.
    #[error("step `{step}` runs before `{map}` is written")]
    ReadBeforeWrite {
        /// Step name.
        step: String,
        /// Map name.
        map: String,
    },
    /// A step is missing from the order.
    #[error("schedule order misses a step")]
    MissingStep,
    /// The patch buffer is too small.
    #[error("patch of {have} bytes is smaller than the {need} the convolutions need")]
    Patch {
        /// Patch bytes in the schedule.
        have: usize,
        /// Bytes the convolutions need.
        need: usize,
    },
    /// A layer's weight count does not match its shape.
    #[error("step `{0}`: weight count does not match its shape")]
    WeightCount(String),
    /// An accumulator could overflow `i32`.
    #[error("step `{0}`: an output channel's accumulator can exceed i32")]
    Accumulator(String),
    /// A step touching an int16 map has parameters the int16 kernels
    /// cannot take.
    #[error("step `{step}` (int16): {error:?}")]
    Wide {
        /// Step name.
        step: String,
        /// What the kernels said.
        error: ingot_rt::Error,
    },
}

/// Gives every convolution the layer form of the module's `form`
/// ([`WeightForm::for_conv`](super::WeightForm::for_conv): the packed forms
/// for one-group convolutions, int8 for the rest; calls from
/// [`step_calls`] start in int8).
pub fn set_weight_form(steps: &mut [StepCalls<'_>], form: super::WeightForm) {
    for sc in steps {
        for c in &mut sc.calls {
            if let Call::Conv {
                conv, form: layer, ..
            } = c
            {
                *layer = form.for_conv(conv);
            }
        }
    }
}

/// The word layout of a convolution's weights (`ingot_rt::word_rows_into`),
/// as the weights file stores them for the word form.
pub fn word_weights(c: &QConv) -> Vec<u8> {
    let (rows, k) = weight_rows(c);
    let mut v = vec![0u8; ingot_rt::words_len(rows, k)];
    // As in `paired_weights`: the lengths agree by construction.
    if ingot_rt::word_rows_into(&c.weights, rows, k, &mut v).is_err() {
        v.clear();
    }
    v
}

/// The paired layout of a convolution's weights (`ingot_rt::pair_rows`).
pub fn paired_weights(c: &QConv) -> Vec<u32> {
    let (rows, k) = weight_rows(c);
    let mut v = vec![0u32; ingot_rt::paired_len(rows, k)];
    // `weight_rows` derives `k` from the weight count, so the lengths agree;
    // were they not, the kernel's own length check refuses the empty rows.
    if ingot_rt::pair_rows_into(&c.weights, rows, k, &mut v).is_err() {
        v.clear();
    }
    v
}

/// All calls of the schedule, in its order.
pub fn step_calls<'a>(q: &'a QGraph, s: &Schedule) -> Result<Vec<StepCalls<'a>>, CallError> {
    let mut out = Vec::with_capacity(s.order.len());
    for &id in &s.order {
        let st = q.step(id);
        if q.step_is_wide(st) {
            let calls = super::wide::calls(q, s, id)?;
            out.push(StepCalls { step: id, calls });
            continue;
        }
        let o = map_ref(q, s, st.output);
        // `QGraph::verify` (run before) lets only a concatenation write a
        // per-slice map, and only concatenations, channel steps and fused
        // transforms (which take no zero point from here) read one.
        let out_zp = q.map(st.output).qp.channel(0).zero_point;
        let inp = |i: usize| -> Result<MapRef, CallError> {
            st.inputs
                .get(i)
                .map(|&m| map_ref(q, s, m))
                .ok_or_else(|| CallError::MissingInput {
                    step: st.name.clone(),
                    input: i,
                })
        };
        let in_zp = |i: usize| {
            st.inputs
                .get(i)
                .map(|&m| q.map(m).qp.channel(0).zero_point)
                .unwrap_or(0)
        };
        let pool_q = |p: &QPool| PoolQuant {
            in_zp: in_zp(0),
            requant: p.requant.map(requant),
            out: out_quant(out_zp, p.clamp),
        };
        let calls = match &st.kernel {
            QKernel::Conv2d(c) => {
                let input_zp =
                    i8::try_from(c.input_zp).map_err(|_| CallError::ZeroPoint(st.name.clone()))?;
                let window = c.runtime_window();
                let params = ConvParams {
                    window,
                    groups: c.groups,
                    input_zp,
                    out: out_quant(out_zp, c.clamp),
                };
                vec![Call::Conv {
                    input: inp(0)?,
                    output: o,
                    conv: c,
                    params,
                    form: super::WeightForm::Int8,
                }]
            }
            QKernel::Linear(l) => vec![Call::Linear {
                input: inp(0)?,
                output: o,
                lin: l,
                out: out_quant(out_zp, l.clamp),
            }],
            QKernel::MaxPool(p) => vec![Call::MaxPool {
                input: inp(0)?,
                output: o,
                window: p.runtime_window(),
                q: pool_q(p),
            }],
            QKernel::AvgPool(p) => vec![Call::AvgPool {
                input: inp(0)?,
                output: o,
                window: p.runtime_window(),
                q: pool_q(p),
            }],
            QKernel::GlobalAvgPool(p) => vec![Call::GlobalAvgPool {
                input: inp(0)?,
                output: o,
                q: pool_q(p),
            }],
            QKernel::Add(a) => vec![Call::Add {
                a: inp(0)?,
                b: inp(1)?,
                output: o,
                p: AddParams {
                    a_zp: in_zp(0),
                    b_zp: in_zp(1),
                    a_rq: requant(a.a),
                    b_rq: requant(a.b),
                    out_rq: requant(a.out),
                    left_shift: a.left_shift,
                    out: out_quant(out_zp, a.clamp),
                },
            }],
            QKernel::Concat if s.copy_concats.contains(&id) => {
                let mut c0 = 0;
                let mut v = Vec::new();
                for (i, &m) in st.inputs.iter().enumerate() {
                    let src = inp(i)?;
                    v.push(Call::Copy {
                        src,
                        dst: o.channels(c0, src.c),
                    });
                    c0 += q.map(m).shape.c;
                }
                v
            }
            QKernel::Concat => Vec::new(),
            QKernel::Channel(t) => vec![Call::Channel {
                input: inp(0)?,
                output: o,
                t,
            }],
        };
        out.push(StepCalls { step: id, calls });
    }
    Ok(out)
}

/// Runs one call on the arena.
pub fn run_call(
    call: &Call<'_>,
    arena: &mut [i8],
    patch: &mut [i16],
    rows: (usize, usize),
) -> Result<(), ingot_rt::Error> {
    match call {
        Call::Conv {
            input,
            output,
            conv,
            params,
            form,
        } => {
            let t = conv.transform.as_ref().map(rt_transform);
            let rq: Vec<Requant> = conv.requant.iter().map(|&m| requant(m)).collect();
            if *form == super::WeightForm::Words {
                return ingot_rt::conv2d_words_rows(
                    arena,
                    *input,
                    *output,
                    &word_weights(conv),
                    &conv.bias,
                    &rq,
                    params,
                    t.as_ref(),
                    patch,
                    rows,
                );
            }
            if *form == super::WeightForm::Pairs {
                return ingot_rt::conv2d_paired_rows(
                    arena,
                    *input,
                    *output,
                    &paired_weights(conv),
                    &conv.bias,
                    &rq,
                    params,
                    t.as_ref(),
                    patch,
                    rows,
                );
            }
            ingot_rt::conv2d_rows(
                arena,
                *input,
                *output,
                &conv.weights,
                &conv.bias,
                &rq,
                params,
                t.as_ref(),
                patch,
                rows,
            )
        }
        Call::Linear {
            input,
            output,
            lin,
            out,
        } => {
            let rq: Vec<Requant> = lin.requant.iter().map(|&m| requant(m)).collect();
            ingot_rt::linear(arena, *input, *output, &lin.weights, &lin.bias, &rq, *out)
        }
        Call::MaxPool {
            input,
            output,
            window,
            q,
        } => ingot_rt::max_pool2d_rows(arena, *input, *output, window, q, rows),
        Call::AvgPool {
            input,
            output,
            window,
            q,
        } => ingot_rt::avg_pool2d_rows(arena, *input, *output, window, q, rows),
        Call::GlobalAvgPool { input, output, q } => {
            ingot_rt::global_avg_pool(arena, *input, *output, q)
        }
        Call::Add { a, b, output, p } => ingot_rt::add_rows(arena, *a, *b, *output, p, rows),
        Call::Copy { src, dst } => ingot_rt::copy_channels(arena, *src, *dst),
        Call::Channel { input, output, t } => {
            ingot_rt::channel_transform_rows(arena, *input, *output, &rt_transform(t), rows)
        }
        Call::Wide(w) => w.run(arena, patch),
    }
}

/// A kernel refused a call.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ExecError {
    /// The step.
    pub step: StepId,
    /// What the kernel said.
    pub error: ingot_rt::Error,
}

/// Interprets the schedule through the `ingot-rt` kernels, exactly as the
/// generated `run` does: copies `input` (HWC, compact) into the input view,
/// runs every step and returns the compact output map. `trace` sees every
/// step's output map, compacted, right after the step; the steps of a row
/// pipeline run as its row calls (`plan::Pipeline::calls`) where its first
/// step stands and are traced after it, a map stored as a ring as an
/// empty map (its rows are gone).
pub fn execute(
    q: &QGraph,
    s: &Schedule,
    calls: &[StepCalls<'_>],
    input: &[i8],
    trace: &mut dyn FnMut(StepId, &[i8]),
) -> Result<Vec<i8>, ExecError> {
    let mut arena = vec![0i8; s.arena_bytes];
    let mut patch = vec![0i16; s.patch_bytes / 2];
    let first = calls.first().map(|c| c.step).unwrap_or(StepId(0));
    ingot_rt::copy_in(input, &mut arena, map_ref(q, s, q.input))
        .map_err(|error| ExecError { step: first, error })?;
    let by_step = |st: StepId| calls.iter().find(|c| c.step == st);
    for sc in calls {
        // (step, output rows) calls to make, then the steps to trace.
        type Rows = Vec<(StepId, (usize, usize))>;
        let (run, traced): (Rows, Vec<StepId>) =
            match s.pipelines.iter().find(|p| p.steps.contains(&sc.step)) {
                Some(p) if p.steps[0] == sc.step => (
                    p.calls.iter().map(|c| (c.step, (c.y0, c.y1))).collect(),
                    p.steps.clone(),
                ),
                Some(_) => continue,
                None => (vec![(sc.step, (0, usize::MAX))], vec![sc.step]),
            };
        for (st, rows) in run {
            let Some(stc) = by_step(st) else { continue };
            for c in &stc.calls {
                run_call(c, &mut arena, &mut patch, rows)
                    .map_err(|error| ExecError { step: st, error })?;
            }
        }
        for st in traced {
            let m = trace_ref(q, s, q.step(st).output);
            if m.is_ring() {
                trace(st, &[]);
                continue;
            }
            let mut buf = vec![0i8; m.len()];
            ingot_rt::copy_out(&arena, m, &mut buf)
                .map_err(|error| ExecError { step: st, error })?;
            trace(st, &buf);
        }
    }
    let m = map_ref(q, s, q.output);
    let mut out = vec![0i8; m.len()];
    let last = calls.last().map(|c| c.step).unwrap_or(StepId(0));
    ingot_rt::copy_out(&arena, m, &mut out).map_err(|error| ExecError { step: last, error })?;
    Ok(out)
}

/// Checks the schedule against the graph before anything runs: one view per
/// map that fits the arena, every step exactly once, inputs produced before
/// they are read, the patch large enough, and every accumulator bounded.
pub fn check_schedule(q: &QGraph, s: &Schedule) -> Result<(), CallError> {
    if s.views.len() != q.maps.len() {
        return Err(CallError::ViewCount {
            views: s.views.len(),
            maps: q.maps.len(),
        });
    }
    for (i, m) in q.maps.iter().enumerate() {
        let r = map_ref(q, s, crate::lower::QMapId(i as u32));
        if !super::wide::fits(q, s, crate::lower::QMapId(i as u32), s.arena_bytes) {
            return Err(CallError::OutsideArena {
                map: m.name.clone(),
                arena: s.arena_bytes,
                offset: r.offset,
                stride: r.stride,
            });
        }
    }
    let mut seen = vec![false; q.steps.len()];
    let mut written = vec![false; q.maps.len()];
    written[q.input.index()] = true;
    for &id in &s.order {
        if id.index() >= q.steps.len() || std::mem::replace(&mut seen[id.index()], true) {
            return Err(CallError::BadStep(id.0));
        }
        let st = q.step(id);
        if let Some(m) = st.inputs.iter().find(|m| !written[m.index()]) {
            return Err(CallError::ReadBeforeWrite {
                step: st.name.clone(),
                map: q.map(*m).name.clone(),
            });
        }
        written[st.output.index()] = true;
    }
    if seen.iter().any(|s| !s) {
        return Err(CallError::MissingStep);
    }
    if s.patch_bytes < super::schedule::min_patch_bytes(q) {
        return Err(CallError::Patch {
            have: s.patch_bytes,
            need: super::schedule::min_patch_bytes(q),
        });
    }
    for st in &q.steps {
        // The int16 kernels bound their sums themselves (i64 when needed).
        if q.step_is_wide(st) {
            continue;
        }
        let (w, b, per) = match &st.kernel {
            QKernel::Conv2d(c) => (
                &c.weights,
                &c.bias,
                c.kernel[0] * c.kernel[1] * (c.in_channels / c.groups.max(1)),
            ),
            QKernel::Linear(l) => (&l.weights, &l.bias, l.in_features),
            _ => continue,
        };
        if per == 0 || w.len() != per * b.len() {
            return Err(CallError::WeightCount(st.name.clone()));
        }
        for (row, &bias) in w.chunks_exact(per).zip(b) {
            if !ingot_rt::acc_fits(row, bias) {
                return Err(CallError::Accumulator(st.name.clone()));
            }
        }
    }
    Ok(())
}
