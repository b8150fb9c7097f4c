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

use super::ir::{QGraph, QKernel, QMapId, StepId};
use super::quant::{self, to_requant, with_runtime_transform};
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
            .map(|m| {
                let r = MapRef::new(off, m.shape.h, m.shape.w, m.shape.c);
                off += m.shape.len();
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
        for (r, m) in refs.iter().zip(&q.maps) {
            if (r.h, r.w, r.c) != (m.shape.h, m.shape.w, m.shape.c) || !r.fits(arena_len) {
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

    /// The codes of a map after the last run, dense HWC.
    pub fn map_hwc(&self, m: QMapId) -> Vec<i8> {
        let r = self.refs[m.index()];
        let mut v = vec![0; r.len()];
        // The layout was validated on construction, so this cannot fail.
        let _ = ingot_rt::copy_out(&self.arena, r, &mut v);
        v
    }

    /// A map after the last run, dequantized, in the float graph's
    /// `[C, H, W]` order (for comparison with the float reference).
    pub fn map_chw_f32(&self, m: QMapId) -> Vec<f32> {
        let map = self.q.map(m);
        let hwc = self.map_hwc(m);
        let (c, hw) = (map.shape.c, map.shape.pixels());
        let qps = map.qp.per_channel(c);
        (0..hwc.len())
            .map(|i| quant::dequantize(hwc[(i % hw) * c + i / hw], qps[i / hw]))
            .collect()
    }
}
