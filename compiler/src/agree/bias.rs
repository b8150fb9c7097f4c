//! Empirical bias correction (Nagel et al. 2019, "Data-Free Quantization
//! Through Weight Equalization and Bias Correction", §4.2, its empirical
//! form; Finkelstein et al. 2019, "Fighting Quantization Bias With Bias").
//!
//! Rounding weights (and the activations before them) shifts the mean of a
//! layer's output, and a later ReLU or the arg-max turns that shift into
//! errors that do not average out. Layer by layer in schedule order, on the
//! calibration images: the network is run with every step up to and
//! including this layer in int8 ([`super::mixed`], the corrections of the
//! earlier layers applied), and the mean of this layer's pre-activation
//! output (after the folded batch norm, before the activation) per output
//! channel is compared with the float network's; the difference
//! `δ[o] = E[y_float[o]] − E[y_int8[o]]` is added to the layer's bias.
//! The shifts are kept in the ranges file (`bias_shifts`), and lowering
//! adds them to the real bias before quantizing it, so the generated
//! module and the simulator carry them as ordinary int32 biases.

use super::mixed::Mixed;
use super::EvalError;
use crate::calibrate::{Calibration, ImageSet};
use crate::graph::{Graph, MapId};
use crate::lower::{self, LowerOptions};
use rayon::prelude::*;

/// Computes the bias shifts for `cal`'s ranges on its calibration images
/// and stores them in `cal.ranges.bias_shifts` (replacing any there).
/// Unreadable images are skipped with `skip_bad`, else an error.
pub fn correct(
    graph: &Graph,
    images: &ImageSet,
    cal: &mut Calibration,
    lower_opts: &LowerOptions,
    skip_bad: bool,
) -> Result<(), EvalError> {
    cal.ranges.bias_shifts.clear();
    let per_image: Vec<Result<Option<Vec<f32>>, EvalError>> = cal
        .calibration
        .par_iter()
        .map(|&i| match images.load(i) {
            Ok(s) => Ok(Some(s.input)),
            Err(_) if skip_bad => Ok(None),
            Err(e) => Err(e.into()),
        })
        .collect();
    let mut inputs = Vec::with_capacity(per_image.len());
    for r in per_image {
        inputs.extend(r?);
    }
    let shifts = shifts_on(graph, &cal.ranges, lower_opts, &inputs)?;
    cal.ranges.bias_shifts = shifts;
    Ok(())
}

/// The bias shift of every convolution and linear layer, by layer name,
/// computed on `inputs` (`[C, H, W]` each) for the network lowered with
/// `ranges` (whose own shifts are ignored).
pub fn shifts_on(
    graph: &Graph,
    ranges: &crate::ranges::Ranges,
    lower_opts: &LowerOptions,
    inputs: &[Vec<f32>],
) -> Result<std::collections::BTreeMap<String, Vec<f32>>, EvalError> {
    let mut plain = ranges.clone();
    plain.bias_shifts.clear();
    let q = lower::lower(graph, &plain, lower_opts)?;
    let mut mixed = Mixed::new(graph, &q, &plain);
    let units: Vec<usize> = (0..mixed.units().len())
        .filter(|&u| mixed.has_weights(u))
        .collect();
    let maps: Vec<MapId> = units
        .iter()
        .map(|&u| mixed.pre_activation(u).expect("a unit with weights"))
        .collect();
    // Per-channel means of the float network's pre-activation maps.
    let float = channel_means(&mixed, inputs, &maps, &|_| false);
    let mut out = std::collections::BTreeMap::new();
    for (k, &u) in units.iter().enumerate() {
        let int8 = channel_means(&mixed, inputs, &maps[k..=k], &|v| v <= u);
        let delta: Vec<f64> = float[k].iter().zip(&int8[0]).map(|(f, q)| f - q).collect();
        mixed.set_bias_shift(u, &delta);
        let layer = mixed.weighted_layer(u).expect("a unit with weights");
        out.insert(
            graph.layer(layer).name.clone(),
            delta.iter().map(|&d| d as f32).collect(),
        );
    }
    Ok(out)
}

/// Mean per channel of each map in `maps` (as computed, before rounding)
/// over all inputs and pixels, with the units `on` quantized. Per-image
/// sums are added in input order, so the result does not depend on the
/// thread count.
fn channel_means(
    mixed: &Mixed<'_>,
    inputs: &[Vec<f32>],
    maps: &[MapId],
    on: &(dyn Fn(usize) -> bool + Sync),
) -> Vec<Vec<f64>> {
    let g = mixed.graph();
    let shapes: Vec<_> = maps.iter().map(|&m| g.shape(m)).collect();
    let per_image: Vec<Vec<Vec<f64>>> = inputs
        .par_iter()
        .map(|x| {
            let mut sums: Vec<Vec<f64>> = shapes.iter().map(|s| vec![0.0; s.c]).collect();
            mixed.run(x, on, |m, v| {
                if let Some(k) = maps.iter().position(|&t| t == m) {
                    let px = shapes[k].pixels().max(1);
                    for (i, &a) in v.iter().enumerate() {
                        sums[k][i / px] += a as f64;
                    }
                }
            });
            sums
        })
        .collect();
    let mut total: Vec<Vec<f64>> = shapes.iter().map(|s| vec![0.0; s.c]).collect();
    for s in per_image {
        for (t, s) in total.iter_mut().zip(s) {
            for (a, b) in t.iter_mut().zip(s) {
                *a += b;
            }
        }
    }
    for (t, s) in total.iter_mut().zip(&shapes) {
        let n = (inputs.len() * s.pixels()).max(1) as f64;
        t.iter_mut().for_each(|a| *a /= n);
    }
    total
}
