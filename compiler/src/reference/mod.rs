//! The float reference: runs a checked [`Graph`] in f32 on one `[C, H, W]`
//! image.
//!
//! It is the ground truth every later pass is measured against (calibration
//! observes its maps, the integer simulator is compared with its outputs), so
//! it favours plain, obviously-correct arithmetic; speed comes from doing
//! convolutions as one matrix product per group (im2col followed by
//! `matrixmultiply::sgemm`, Chellapilla, Puri & Simard 2006) and from reusing
//! buffers instead of allocating per pixel.
//!
//! Semantics follow the doc comments of [`crate::graph`]: max pooling ignores
//! padded taps, average pooling counts them as zeros and always divides by
//! `kH * kW`, `flatten` keeps `C, H, W` order, softmax runs over channels.

mod kernels;

use crate::graph::{Graph, MapId, Op, Shape};
use rayon::prelude::*;
use thiserror::Error;

/// Why the reference refused to run.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum ReferenceError {
    /// The input does not have `C * H * W` values.
    #[error("input has {got} values; graph `{graph}` expects shape {expected} = {} values (CHW order)", expected.len())]
    InputLength {
        /// Graph name.
        graph: String,
        /// The input shape the graph expects.
        expected: Shape,
        /// Number of values given.
        got: usize,
    },
    /// One image of a batch has the wrong length.
    #[error("image {index} of the batch: {source}")]
    BatchItem {
        /// Position in the batch.
        index: usize,
        /// The image's error.
        source: Box<ReferenceError>,
    },
}

/// Per-layer data prepared once, so running does no weight work.
#[derive(Debug, Clone)]
enum Prepared {
    /// Nothing beyond what the op holds.
    None,
    /// Batch norm folded to `scale * x + shift`, per channel.
    Affine { scale: Vec<f32>, shift: Vec<f32> },
}

/// An f32 executor for one graph.
#[derive(Debug, Clone)]
pub struct Reference<'g> {
    graph: &'g Graph,
    prepared: Vec<Prepared>,
    /// For each map, the index of the last layer reading it (`usize::MAX`
    /// for the graph output, which is never freed).
    last_use: Vec<usize>,
    /// Largest im2col matrix any convolution needs.
    scratch_len: usize,
    /// Per layer, a second form of a convolution or linear layer (other
    /// weights and bias, same shape) that [`Reference::run_mixed`] may use
    /// instead: the fake-quantized layers of `agree::sensitivity`.
    alternative: Vec<Option<Op>>,
}

/// A second set of weights and bias for one convolution or linear layer
/// ([`Reference::set_alternative`]), in the float graph's layouts.
#[derive(Debug, Clone, PartialEq)]
pub struct Alternative {
    /// Weights, the same length as the layer's.
    pub weight: Vec<f32>,
    /// Bias, one per output channel.
    pub bias: Vec<f32>,
}

impl<'g> Reference<'g> {
    /// Prepares `graph` for execution.
    pub fn new(graph: &'g Graph) -> Self {
        let mut prepared = Vec::with_capacity(graph.layers().len());
        let mut scratch_len = 0usize;
        for id in graph.layer_ids() {
            let layer = graph.layer(id);
            prepared.push(match &layer.op {
                Op::BatchNorm(b) => {
                    let (scale, shift) = b.affine().into_iter().unzip();
                    Prepared::Affine { scale, shift }
                }
                Op::Conv2d(c) => {
                    let out = graph.shape(id.output());
                    if kernels::conv_needs_im2col(c) {
                        let k = c.in_channels / c.groups * c.kernel[0] * c.kernel[1];
                        scratch_len = scratch_len.max(k * out.pixels());
                    }
                    Prepared::None
                }
                _ => Prepared::None,
            });
        }
        let mut last_use = vec![0usize; graph.map_count()];
        for (i, layer) in graph.layers().iter().enumerate() {
            for m in &layer.inputs {
                last_use[m.index()] = i;
            }
        }
        last_use[graph.output().index()] = usize::MAX;
        Reference {
            graph,
            prepared,
            last_use,
            scratch_len,
            alternative: vec![None; graph.layers().len()],
        }
    }

    /// Gives a convolution or linear layer a second set of weights and bias
    /// that [`Reference::run_mixed`] uses when asked. Returns `false` (and
    /// changes nothing) for another kind of layer or mismatched lengths.
    pub fn set_alternative(&mut self, layer: crate::graph::LayerId, alt: Alternative) -> bool {
        let Some(l) = self.graph.layers().get(layer.index()) else {
            return false;
        };
        let tensor = |t: &crate::graph::Tensor, data: Vec<f32>| crate::graph::Tensor {
            name: t.name.clone(),
            shape: t.shape.clone(),
            data,
        };
        let op = match &l.op {
            Op::Conv2d(c)
                if alt.weight.len() == c.weight.len() && alt.bias.len() == c.out_channels =>
            {
                let bias = crate::graph::Tensor {
                    shape: vec![c.out_channels],
                    data: alt.bias,
                    name: format!("{}.alternative_bias", c.weight.name),
                };
                Op::Conv2d(crate::graph::Conv2d {
                    weight: tensor(&c.weight, alt.weight),
                    bias: Some(bias),
                    ..c.clone()
                })
            }
            Op::Linear(f)
                if alt.weight.len() == f.weight.len() && alt.bias.len() == f.out_features =>
            {
                let bias = crate::graph::Tensor {
                    shape: vec![f.out_features],
                    data: alt.bias,
                    name: format!("{}.alternative_bias", f.weight.name),
                };
                Op::Linear(crate::graph::Linear {
                    weight: tensor(&f.weight, alt.weight),
                    bias: Some(bias),
                    ..f.clone()
                })
            }
            _ => return false,
        };
        self.alternative[layer.index()] = Some(op);
        true
    }

    /// The graph this reference runs.
    pub fn graph(&self) -> &'g Graph {
        self.graph
    }

    /// Runs one image (`[C, H, W]`, CHW order) and returns the output map.
    pub fn run(&self, input: &[f32]) -> Result<Vec<f32>, ReferenceError> {
        self.run_with(input, |_, _| {})
    }

    /// Runs one image and returns every map, indexed by [`MapId`]: element 0
    /// is the input, element `i + 1` the output of layer `i`.
    pub fn run_all(&self, input: &[f32]) -> Result<Vec<Vec<f32>>, ReferenceError> {
        let mut maps = Vec::with_capacity(self.graph.map_count());
        self.run_with(input, |_, m| maps.push(m.to_vec()))?;
        Ok(maps)
    }

    /// Runs one image, calling `visit` with every map as soon as it is
    /// computed (first the input as [`MapId::INPUT`], then each layer's
    /// output in execution order), and returns the output map. Maps are
    /// freed after their last reader, so observing them all costs no more
    /// memory than running.
    pub fn run_with<F>(&self, input: &[f32], mut visit: F) -> Result<Vec<f32>, ReferenceError>
    where
        F: FnMut(MapId, &[f32]),
    {
        self.run_mixed(input, &[], |m, v| visit(m, v))
    }

    /// Runs one image like [`Reference::run_with`], with two differences:
    /// layer `i` computes with its alternative weights
    /// ([`Reference::set_alternative`]) when `use_alternative[i]` is true
    /// (missing entries are false), and `edit` may change each map (the
    /// input included) before any layer reads it.
    pub fn run_mixed<F>(
        &self,
        input: &[f32],
        use_alternative: &[bool],
        mut edit: F,
    ) -> Result<Vec<f32>, ReferenceError>
    where
        F: FnMut(MapId, &mut [f32]),
    {
        let g = self.graph;
        let in_shape = g.input().shape;
        if input.len() != in_shape.len() {
            return Err(ReferenceError::InputLength {
                graph: g.name().to_string(),
                expected: in_shape,
                got: input.len(),
            });
        }
        let mut maps: Vec<Option<Vec<f32>>> = vec![None; g.map_count()];
        let mut first = input.to_vec();
        edit(MapId::INPUT, &mut first);
        maps[0] = Some(first);
        let mut pool: Vec<Vec<f32>> = Vec::new();
        let mut scratch = vec![0.0f32; self.scratch_len];
        for (i, layer) in g.layers().iter().enumerate() {
            let out_id = MapId(i as u32 + 1);
            let out_shape = g.shape(out_id);
            let mut out = take_buffer(&mut pool, out_shape.len());
            {
                let ins: Vec<(&[f32], Shape)> = layer
                    .inputs
                    .iter()
                    .map(|m| {
                        (
                            maps[m.index()]
                                .as_deref()
                                .expect("map computed and not yet freed"),
                            g.shape(*m),
                        )
                    })
                    .collect();
                let alt = use_alternative.get(i).copied().unwrap_or(false);
                self.layer(i, alt, &ins, out_shape, &mut out, &mut scratch);
            }
            edit(out_id, &mut out);
            maps[out_id.index()] = Some(out);
            for m in &layer.inputs {
                if self.last_use[m.index()] == i {
                    if let Some(buf) = maps[m.index()].take() {
                        pool.push(buf);
                    }
                }
            }
        }
        Ok(maps[g.output().index()].take().expect("output map kept"))
    }

    /// Runs several images in parallel (rayon) and returns their outputs in
    /// input order. Each image is computed exactly as by [`Reference::run`],
    /// so the result does not depend on the number of threads.
    pub fn run_batch(&self, inputs: &[Vec<f32>]) -> Result<Vec<Vec<f32>>, ReferenceError> {
        inputs
            .par_iter()
            .enumerate()
            .map(|(index, x)| {
                self.run(x).map_err(|e| ReferenceError::BatchItem {
                    index,
                    source: Box::new(e),
                })
            })
            .collect()
    }

    fn layer(
        &self,
        i: usize,
        alt: bool,
        ins: &[(&[f32], Shape)],
        out_shape: Shape,
        out: &mut [f32],
        scratch: &mut [f32],
    ) {
        let layer = &self.graph.layers()[i];
        let op = match &self.alternative[i] {
            Some(op) if alt => op,
            _ => &layer.op,
        };
        let (x, xs) = ins[0];
        match (op, &self.prepared[i]) {
            (Op::Conv2d(c), _) => kernels::conv2d(c, x, xs, out, out_shape, scratch),
            (Op::BatchNorm(_), Prepared::Affine { scale, shift }) => {
                kernels::affine(x, xs, scale, shift, out)
            }
            (Op::BatchNorm(_), Prepared::None) => unreachable!("batch norm prepared as affine"),
            (Op::Relu, _) => out.iter_mut().zip(x).for_each(|(o, &v)| *o = v.max(0.0)),
            (Op::Relu6, _) => out
                .iter_mut()
                .zip(x)
                .for_each(|(o, &v)| *o = v.clamp(0.0, 6.0)),
            (Op::MaxPool2d(p), _) => kernels::max_pool(p, x, xs, out, out_shape),
            (Op::AvgPool2d(p), _) => kernels::avg_pool(p, x, xs, out, out_shape),
            (Op::GlobalAvgPool, _) => kernels::global_avg_pool(x, xs, out),
            (Op::Flatten | Op::Dropout, _) => out.copy_from_slice(x),
            (Op::Linear(l), _) => kernels::linear(l, x, out),
            (Op::Concat, _) => {
                let mut at = 0;
                for (m, s) in ins {
                    out[at..at + s.len()].copy_from_slice(m);
                    at += s.len();
                }
            }
            (Op::Add, _) => {
                let y = ins[1].0;
                out.iter_mut()
                    .zip(x.iter().zip(y))
                    .for_each(|(o, (a, b))| *o = a + b);
            }
            (Op::Softmax, _) => kernels::softmax(x, xs, out),
        }
    }
}

/// A buffer of exactly `len` values from the free list, or a new one. The
/// contents are unspecified; every kernel writes its whole output.
fn take_buffer(pool: &mut Vec<Vec<f32>>, len: usize) -> Vec<f32> {
    // Prefer the smallest free buffer that is large enough.
    let best = pool
        .iter()
        .enumerate()
        .filter(|(_, b)| b.capacity() >= len)
        .min_by_key(|(_, b)| b.capacity())
        .map(|(i, _)| i);
    let mut b = match best {
        Some(i) => pool.swap_remove(i),
        None => Vec::with_capacity(len),
    };
    b.clear();
    b.resize(len, 0.0);
    b
}

#[cfg(test)]
mod tests;
