//! The integer simulator: runs a [`QGraph`] image by image with the
//! `ingot-rt` kernels themselves, so its results are bit-exact with what the
//! generated firmware computes.
//!
//! Every map lives in one arena as an HWC [`MapRef`]. [`Simulator::new`] uses
//! the naive layout (each map at its own offset, dense); a memory plan can be
//! checked with [`Simulator::with_layout`], which must give identical
//! results. A concatenation whose inputs already are channel views of its
//! output costs nothing (the copy kernel sees `input == output`).
//!
//! [`Simulator::with_program`] runs steps in a given order and row
//! pipelines (a memory plan's streamed steps: [`RowCall`]s over maps
//! stored as rings, `MapRef::ring`), which must again give identical
//! results.
//!
//! Wide (int16) maps take two bytes per value (`MapRef::offset` in bytes,
//! see `ingot_rt::wide`); a step that reads or writes one runs the
//! `ingot_rt::wide` kernels, every other step the int8 ones.

use super::ir::{QGraph, QKernel, QMapId, StepId};
use super::quant::{self, to_requant, with_runtime_transform};
use ingot_rt::wide::{self, TypedMap, WideOut};
use ingot_rt::{MapRef, OutputQuant, PoolQuant, Requant};

/// An input image in one of the forms the simulator accepts.
#[derive(Debug, Clone, Copy)]
pub enum SimInput<'a> {
    /// Int8 codes of the input map, HWC.
    Codes(&'a [i8]),
    /// Real values in the float graph's `[C, H, W]` order, quantized with
    /// the input map's parameters.
    Chw(&'a [f32]),
    /// Camera bytes, HWC interleaved, quantized through the pixel table.
    Pixels(&'a [u8]),
}

/// Why a simulation failed.
#[derive(Debug, thiserror::Error)]
pub enum SimError {
    /// The input has the wrong number of values.
    #[error("input has {got} values; the input map `{map}` {shape} needs {expected}")]
    InputLength {
        /// Input map name.
        map: String,
        /// Its shape.
        shape: crate::graph::Shape,
        /// Values given.
        got: usize,
        /// Values needed.
        expected: usize,
    },
    /// The layout does not give every map a region inside the arena.
    #[error("layout: {0}")]
    Layout(String),
    /// A kernel refused its arguments: a bug in lowering or in the layout.
    #[error("internal error: step {step} `{name}` ({kernel}): ingot-rt refused it with {error:?}")]
    Kernel {
        /// Step index.
        step: u32,
        /// Step name.
        name: String,
        /// Kernel kind.
        kernel: &'static str,
        /// The runtime's error.
        error: ingot_rt::Error,
    },
}

/// One call of a step for its output rows `[y0, y1)`: a row pipeline is a
/// list of them (see the memory plan's `plan::stream`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct RowCall {
    /// The step.
    pub step: StepId,
    /// First output row.
    pub y0: usize,
    /// One past the last output row.
    pub y1: usize,
}

/// One entry of a simulator program ([`Simulator::with_program`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SimCall {
    /// The whole step.
    Step(StepId),
    /// Some output rows of a step.
    Rows(RowCall),
}

/// Runs a lowered graph with the runtime kernels.
#[derive(Debug, Clone)]
pub struct Simulator<'q> {
    q: &'q QGraph,
    refs: Vec<MapRef>,
    arena: Vec<i8>,
    patch: Vec<i16>,
    /// Runtime multipliers of each conv/linear step.
    requant: Vec<Vec<Requant>>,
    /// What [`Self::run`] executes (the graph's steps in file order unless
    /// [`Self::with_program`] set it).
    program: Vec<SimCall>,
}

impl<'q> Simulator<'q> {
    /// A simulator with the naive layout: every map dense at its own offset.
    pub fn new(q: &'q QGraph) -> Self {
        let mut off = 0;
        let refs = q
            .maps
            .iter()
            .enumerate()
            .map(|(i, m)| {
                let r = MapRef::new(off, m.shape.h, m.shape.w, m.shape.c);
                off += m.shape.len() * q.value_bytes(QMapId(i as u32));
                r
            })
            .collect();
        Self::build(q, refs, off)
    }

    /// A simulator with a given layout (one `MapRef` per map, e.g. from a
    /// memory plan) and arena size.
    pub fn with_layout(
        q: &'q QGraph,
        refs: Vec<MapRef>,
        arena_len: usize,
    ) -> Result<Self, SimError> {
        if refs.len() != q.maps.len() {
            return Err(SimError::Layout(format!(
                "{} map refs for {} maps",
                refs.len(),
                q.maps.len()
            )));
        }
        for (i, (r, m)) in refs.iter().zip(&q.maps).enumerate() {
            let t = TypedMap {
                map: *r,
                elem: q.elem(QMapId(i as u32)),
            };
            if (r.h, r.w, r.c) != (m.shape.h, m.shape.w, m.shape.c) || !t.fits(arena_len) {
                return Err(SimError::Layout(format!(
                    "map `{}` {}: {r:?} does not match it or leaves the arena",
                    m.name, m.shape
                )));
            }
        }
        Ok(Self::build(q, refs, arena_len))
    }

    fn build(q: &'q QGraph, refs: Vec<MapRef>, arena_len: usize) -> Self {
        let patch_len = q
            .steps
            .iter()
            .filter_map(|s| match &s.kernel {
                QKernel::Conv2d(c) => Some(ingot_rt::conv_patch_len(
                    c.kernel[0],
                    c.kernel[1],
                    c.in_channels,
                )),
                _ => None,
            })
            .max()
            .unwrap_or(0);
        let requant = q
            .steps
            .iter()
            .map(|s| match &s.kernel {
                QKernel::Conv2d(c) => c.requant.iter().map(|&m| to_requant(m)).collect(),
                QKernel::Linear(l) => l.requant.iter().map(|&m| to_requant(m)).collect(),
                _ => Vec::new(),
            })
            .collect();
        Simulator {
            q,
            refs,
            arena: vec![0; arena_len],
            patch: vec![0; patch_len],
            requant,
            program: q.step_ids().map(SimCall::Step).collect(),
        }
    }

    /// Runs `program` instead of the steps in file order: every step once,
    /// whole or as row calls covering its output rows (a memory plan's
    /// order and row pipelines). The program is checked for that shape
    /// here; whether each row call finds its input rows is the plan's
    /// business (`plan::verify`).
    pub fn with_program(mut self, program: Vec<SimCall>) -> Result<Self, SimError> {
        let q = self.q;
        let mut next_row = vec![0usize; q.steps.len()];
        let mut whole = vec![false; q.steps.len()];
        for c in &program {
            let (s, y0, y1) = match *c {
                SimCall::Step(s) => (s, 0, usize::MAX),
                SimCall::Rows(r) => (r.step, r.y0, r.y1),
            };
            if s.index() >= q.steps.len() {
                return Err(SimError::Layout(format!("program: no step {}", s.0)));
            }
            let h = q.map(q.step(s).output).shape.h;
            let y1 = y1.min(h);
            if whole[s.index()] || y0 != next_row[s.index()] || y1 <= y0 {
                return Err(SimError::Layout(format!(
                    "program: step `{}` rows {y0}..{y1} out of turn",
                    q.step(s).name
                )));
            }
            next_row[s.index()] = y1;
            whole[s.index()] = y1 == h;
        }
        if let Some(s) = whole.iter().position(|w| !w) {
            return Err(SimError::Layout(format!(
                "program: step `{}` not run to its last row",
                q.steps[s].name
            )));
        }
        self.program = program;
        Ok(self)
    }

    /// The graph being simulated.
    pub fn graph(&self) -> &'q QGraph {
        self.q
    }

    /// Runs one image; returns the output map's codes (HWC). Every map stays
    /// readable until the next run ([`Self::map_hwc`], [`Self::map_chw_f32`]).
    pub fn run(&mut self, input: SimInput<'_>) -> Result<Vec<i8>, SimError> {
        let q = self.q;
        let inp = q.map(q.input);
        let r = self.refs[q.input.index()];
        let n = inp.shape.len();
        let len_err = |got| SimError::InputLength {
            map: inp.name.clone(),
            shape: inp.shape,
            got,
            expected: n,
        };
        let kerr = |error| SimError::Kernel {
            step: u32::MAX,
            name: "input".into(),
            kernel: "input",
            error,
        };
        match input {
            SimInput::Codes(v) => {
                if v.len() != n {
                    return Err(len_err(v.len()));
                }
                ingot_rt::copy_in(v, &mut self.arena, r).map_err(kerr)?;
            }
            SimInput::Chw(v) => {
                if v.len() != n {
                    return Err(len_err(v.len()));
                }
                let (c, hw) = (inp.shape.c, inp.shape.pixels());
                let codes: Vec<i8> = (0..n)
                    .map(|i| quant::quantize(v[(i % c) * hw + i / c], self.q.input_qp()))
                    .collect();
                ingot_rt::copy_in(&codes, &mut self.arena, r).map_err(kerr)?;
            }
            SimInput::Pixels(v) => {
                if v.len() != n {
                    return Err(len_err(v.len()));
                }
                ingot_rt::quantize_pixels(v, &mut self.arena, r, &q.pixel_table).map_err(kerr)?;
            }
        }
        for k in 0..self.program.len() {
            let (id, rows) = match self.program[k] {
                SimCall::Step(s) => (s, (0, usize::MAX)),
                SimCall::Rows(r) => (r.step, (r.y0, r.y1)),
            };
            self.step(id, rows).map_err(|error| {
                let s = q.step(id);
                SimError::Kernel {
                    step: id.0,
                    name: s.name.clone(),
                    kernel: s.kernel.kind(),
                    error,
                }
            })?;
        }
        Ok(self.map_hwc(q.output))
    }

    /// Runs output rows `rows` of a step (`(0, usize::MAX)`: all of it;
    /// only row-producing kernels are ever given fewer).
    fn step(&mut self, id: StepId, rows: (usize, usize)) -> Result<(), ingot_rt::Error> {
        let s = self.q.step(id);
        if self.q.step_is_wide(s) {
            return self.wide_step(id);
        }
        let out = self.refs[s.output.index()];
        let input = self.refs[s.inputs[0].index()];
        // `QGraph::verify` lets only a concatenation write a per-slice map,
        // and only readers that take no zero point from here read one.
        let in_zp = self.q.map(s.inputs[0]).qp.channel(0).zero_point;
        let oq = |c: super::Clamp| {
            OutputQuant::clamped(self.q.map(s.output).qp.channel(0).zero_point, c.min, c.max)
        };
        let arena = &mut self.arena;
        match &s.kernel {
            QKernel::Conv2d(c) => {
                let p = ingot_rt::ConvParams {
                    window: c.runtime_window(),
                    groups: c.groups,
                    input_zp: c.input_zp.clamp(-128, 127) as i8,
                    out: oq(c.clamp),
                };
                let rq = &self.requant[id.index()];
                let patch = &mut self.patch;
                match &c.transform {
                    None => ingot_rt::conv2d_rows(
                        arena, input, out, &c.weights, &c.bias, rq, &p, None, patch, rows,
                    ),
                    Some(t) => with_runtime_transform(t, |t| {
                        ingot_rt::conv2d_rows(
                            arena,
                            input,
                            out,
                            &c.weights,
                            &c.bias,
                            rq,
                            &p,
                            Some(t),
                            patch,
                            rows,
                        )
                    }),
                }
            }
            QKernel::Linear(l) => ingot_rt::linear(
                arena,
                input,
                out,
                &l.weights,
                &l.bias,
                &self.requant[id.index()],
                oq(l.clamp),
            ),
            QKernel::MaxPool(p) | QKernel::AvgPool(p) => {
                let w = p.runtime_window();
                let pq = PoolQuant {
                    in_zp,
                    requant: p.requant.map(to_requant),
                    out: oq(p.clamp),
                };
                if matches!(s.kernel, QKernel::MaxPool(_)) {
                    ingot_rt::max_pool2d_rows(arena, input, out, &w, &pq, rows)
                } else {
                    ingot_rt::avg_pool2d_rows(arena, input, out, &w, &pq, rows)
                }
            }
            QKernel::GlobalAvgPool(p) => {
                let pq = PoolQuant {
                    in_zp,
                    requant: p.requant.map(to_requant),
                    out: oq(p.clamp),
                };
                ingot_rt::global_avg_pool(arena, input, out, &pq)
            }
            QKernel::Add(a) => {
                let b = self.q.map(s.inputs[1]);
                let params = ingot_rt::AddParams {
                    a_zp: in_zp,
                    b_zp: b.qp.channel(0).zero_point,
                    a_rq: to_requant(a.a),
                    b_rq: to_requant(a.b),
                    out_rq: to_requant(a.out),
                    left_shift: a.left_shift,
                    out: oq(a.clamp),
                };
                ingot_rt::add_rows(
                    arena,
                    input,
                    self.refs[s.inputs[1].index()],
                    out,
                    &params,
                    rows,
                )
            }
            QKernel::Concat => {
                let mut c0 = 0;
                for m in &s.inputs {
                    let r = self.refs[m.index()];
                    ingot_rt::copy_channels(arena, r, out.channels(c0, r.c))?;
                    c0 += r.c;
                }
                Ok(())
            }
            QKernel::Channel(t) => with_runtime_transform(t, |t| {
                ingot_rt::channel_transform_rows(arena, input, out, t, rows)
            }),
        }
    }

    /// A map as the wide kernels address it.
    fn typed(&self, m: QMapId) -> TypedMap {
        TypedMap {
            map: self.refs[m.index()],
            elem: self.q.elem(m),
        }
    }

    /// Runs a step that reads or writes a wide map, with the kernels of
    /// `ingot_rt::wide` and the parameters of [`wide_op`] (which the
    /// generator's calls use too).
    fn wide_step(&mut self, id: StepId) -> Result<(), ingot_rt::Error> {
        let q = self.q;
        let s = q.step(id);
        let op = wide_op(q, id)?;
        let inputs: Vec<TypedMap> = s.inputs.iter().map(|&m| self.typed(m)).collect();
        let output = self.typed(s.output);
        op.run(&mut self.arena, &inputs, output, &mut self.patch)
    }

    /// The codes of an int8 map after the last run, dense HWC (a wide
    /// map's codes saturated to int8; see [`Self::map_values`]).
    pub fn map_hwc(&self, m: QMapId) -> Vec<i8> {
        if self.q.is_wide(m) {
            return self
                .map_values(m)
                .into_iter()
                .map(|v| v.clamp(-128, 127) as i8)
                .collect();
        }
        let r = self.refs[m.index()];
        let mut v = vec![0; r.len()];
        // The layout was validated on construction, so this cannot fail.
        let _ = ingot_rt::copy_out(&self.arena, r, &mut v);
        v
    }

    /// A map after the last run as a generated module's trace hook sees
    /// it: int8 codes, or an int16 map's codes as little-endian byte
    /// pairs, dense HWC.
    pub fn map_trace(&self, m: QMapId) -> Vec<i8> {
        if !self.q.is_wide(m) {
            return self.map_hwc(m);
        }
        self.map_values(m)
            .into_iter()
            .flat_map(|v| (v as i16).to_le_bytes())
            .map(|b| b as i8)
            .collect()
    }

    /// The codes of any map (int8 or wide) after the last run, dense HWC.
    pub fn map_values(&self, m: QMapId) -> Vec<i32> {
        let t = self.typed(m);
        let mut v = vec![0i16; t.map.len()];
        let _ = wide::copy_out_wide(&self.arena, t, &mut v);
        v.into_iter().map(i32::from).collect()
    }

    /// A map after the last run, dequantized, in the float graph's
    /// `[C, H, W]` order (for comparison with the float reference); wide
    /// maps with their int16 codes.
    pub fn map_chw_f32(&self, m: QMapId) -> Vec<f32> {
        let map = self.q.map(m);
        let hwc = self.map_values(m);
        let (c, hw) = (map.shape.c, map.shape.pixels());
        let qps = map.qp.per_channel(c);
        (0..hwc.len())
            .map(|i| {
                let qp = qps[i / hw];
                qp.scale * (hwc[(i % hw) * c + i / hw] - qp.zero_point) as f32
            })
            .collect()
    }
}

/// The kernel and parameters of a step that reads or writes a wide map:
/// the parameters of the int8 step, with the clamp of a wide output from
/// its [`super::WideMap`]. The simulator runs it ([`WideOp::run`]) and the
/// generator prints it, so the two cannot differ.
#[derive(Debug, Clone)]
#[non_exhaustive]
pub enum WideOp<'q> {
    /// `ingot_rt::wide::conv2d_wide`.
    Conv {
        /// The layer (weights, bias).
        conv: &'q super::QConv,
        /// Geometry, padding value, output clamp.
        params: wide::WideConvParams,
        /// Runtime multipliers.
        requant: Vec<Requant>,
        /// The fused input transform, in its int8 or int16 form.
        transform: Option<wide::WideTransform<'q>>,
    },
    /// `ingot_rt::wide::linear_wide`.
    Linear {
        /// The layer (weights, bias).
        lin: &'q super::QLinear,
        /// Runtime multipliers.
        requant: Vec<Requant>,
        /// Output zero point and clamp.
        out: WideOut,
    },
    /// `ingot_rt::wide::pool_wide`.
    Pool {
        /// Max, average or global average.
        kind: wide::PoolKind,
        /// The window (ignored for global pooling).
        window: ingot_rt::Window,
        /// Quantization.
        q: wide::WidePool,
    },
    /// `ingot_rt::wide::add_wide`.
    Add(wide::WideAdd),
    /// `ingot_rt::wide::copy_channels_wide` of every input into its
    /// channels of the output.
    Concat,
    /// `ingot_rt::wide::channel_wide`.
    Channel(wide::WideAffine<'q>),
}

impl WideOp<'_> {
    /// Runs the step on `arena`: `inputs` in the step's order, a
    /// concatenation's inputs copied to consecutive channels of `output`.
    pub fn run(
        &self,
        arena: &mut [i8],
        inputs: &[TypedMap],
        output: TypedMap,
        patch: &mut [i16],
    ) -> Result<(), ingot_rt::Error> {
        let input = *inputs.first().ok_or(ingot_rt::Error::ShapeMismatch)?;
        match self {
            WideOp::Conv {
                conv,
                params,
                requant,
                transform,
            } => wide::conv2d_wide(
                arena,
                input,
                output,
                &conv.weights,
                &conv.bias,
                requant,
                params,
                transform.as_ref(),
                patch,
            ),
            WideOp::Linear { lin, requant, out } => {
                wide::linear_wide(arena, input, output, &lin.weights, &lin.bias, requant, *out)
            }
            WideOp::Pool { kind, window, q } => {
                wide::pool_wide(arena, input, output, *kind, window, q)
            }
            WideOp::Add(p) => {
                let b = *inputs.get(1).ok_or(ingot_rt::Error::ShapeMismatch)?;
                wide::add_wide(arena, input, b, output, p)
            }
            WideOp::Concat => {
                let mut c0 = 0;
                for &r in inputs {
                    wide::copy_channels_wide(arena, r, output.channels(c0, r.map.c))?;
                    c0 += r.map.c;
                }
                Ok(())
            }
            WideOp::Channel(t) => wide::channel_wide(arena, input, output, t),
        }
    }
}

/// The [`WideOp`] of step `id` (which reads or writes a wide map).
pub fn wide_op(q: &QGraph, id: StepId) -> Result<WideOp<'_>, ingot_rt::Error> {
    let s = q.step(id);
    let first = *s.inputs.first().ok_or(ingot_rt::Error::ShapeMismatch)?;
    let in_zp = q.map(first).qp.channel(0).zero_point;
    let out_zp = q.map(s.output).qp.channel(0).zero_point;
    let out = |c: super::Clamp| match q.wide_map(s.output) {
        Some(w) => WideOut {
            zero_point: 0,
            min: w.min,
            max: w.max,
        },
        None => WideOut {
            zero_point: out_zp,
            min: c.min as i32,
            max: c.max as i32,
        },
    };
    Ok(match &s.kernel {
        QKernel::Conv2d(c) => WideOp::Conv {
            conv: c,
            params: wide::WideConvParams {
                window: c.runtime_window(),
                groups: c.groups,
                input_zp: c.input_zp,
                out: out(c.clamp),
            },
            requant: c.requant.iter().map(|&m| to_requant(m)).collect(),
            transform: match &c.transform {
                None => None,
                Some(t) if q.is_wide(first) => Some(wide::WideTransform::Affine(wide_affine(t)?)),
                Some(t) => Some(wide::WideTransform::Int8(t.runtime())),
            },
        },
        QKernel::Linear(l) => WideOp::Linear {
            lin: l,
            requant: l.requant.iter().map(|&m| to_requant(m)).collect(),
            out: out(l.clamp),
        },
        QKernel::MaxPool(p) | QKernel::AvgPool(p) | QKernel::GlobalAvgPool(p) => WideOp::Pool {
            kind: match s.kernel {
                QKernel::MaxPool(_) => wide::PoolKind::Max,
                QKernel::AvgPool(_) => wide::PoolKind::Avg,
                _ => wide::PoolKind::Global,
            },
            window: p.runtime_window(),
            q: wide::WidePool {
                in_zp,
                requant: p.requant.map(to_requant),
                out: out(p.clamp),
            },
        },
        QKernel::Add(a) => {
            let second = *s.inputs.get(1).ok_or(ingot_rt::Error::ShapeMismatch)?;
            WideOp::Add(wide::WideAdd {
                a_zp: in_zp,
                b_zp: q.map(second).qp.channel(0).zero_point,
                a_rq: to_requant(a.a),
                b_rq: to_requant(a.b),
                out_rq: to_requant(a.out),
                left_shift: a.left_shift,
                out: out(a.clamp),
            })
        }
        QKernel::Concat => WideOp::Concat,
        QKernel::Channel(t) => WideOp::Channel(wide_affine(t)?),
    })
}

/// The int16-input form of an int8-domain affine transform: the same
/// coefficients, clamp and zero points, evaluated in i64 over int16 codes.
/// A table has no int16 form (`QGraph::verify` refuses it on a wide input).
fn wide_affine(t: &super::ChannelTransform) -> Result<wide::WideAffine<'_>, ingot_rt::Error> {
    match t {
        super::ChannelTransform::Affine {
            mul,
            add,
            shift,
            zp_in,
            zp_out,
            clamp,
        } => Ok(wide::WideAffine {
            mul,
            add,
            shift: *shift,
            zp_in: *zp_in,
            zp_out: *zp_out,
            min: clamp.min as i32,
            max: clamp.max as i32,
        }),
        super::ChannelTransform::Table(_) => Err(ingot_rt::Error::BadParams),
    }
}
