//! What int8 costs: the lowered network run by the integer simulator
//! against the float reference on the same images.
//!
//! Per float map stored in int8, the signal-to-quantization-noise ratio
//! `SQNR = 10 log10(Σ x² / Σ (x − x̂)²)` in dB, summed over all evaluation
//! images (`x` float, `x̂` the int8 map dequantized); at the output, top-1
//! agreement and, for labelled images, both accuracies.
//!
//! The int8 input is quantized from the same pixel bytes the float input
//! was preprocessed from (through the lowered graph's pixel table), or from
//! the float input for `.npy` samples. Per-image sums are combined in image
//! order, so the figures do not depend on the thread count.

use crate::calibrate::{Calibration, ImageError, ImageSet, OutputAgreement, Report};
use crate::graph::{Graph, MapId};
use crate::lower::{
    self, LowerError, LowerOptions, QGraph, QMapId, QParams, SimError, SimInput, Simulator,
};
use crate::reference::Reference;
use rayon::prelude::*;

/// Why the int8 evaluation failed.
#[derive(Debug, thiserror::Error)]
pub enum EvalError {
    /// Lowering refused the graph or ranges.
    #[error(transparent)]
    Lower(#[from] LowerError),
    /// The simulator failed (an internal error).
    #[error(transparent)]
    Sim(#[from] SimError),
    /// An evaluation image could not be read.
    #[error(transparent)]
    Image(#[from] ImageError),
}

/// Results of [`evaluate`].
#[derive(Debug, Clone, PartialEq)]
pub struct Evaluation {
    /// `held-out` or `calibration`: which images were used.
    pub on: &'static str,
    /// Indices of the images evaluated.
    pub images: Vec<usize>,
    /// Quantization of the stored map holding each float map, by `MapId`
    /// (`None` when folded away or quantized per slice).
    pub qparams: Vec<Option<QParams>>,
    /// SQNR in dB per float map (`None` when not stored).
    pub sqnr_db: Vec<Option<f64>>,
    /// Output comparison.
    pub output: OutputAgreement,
    /// Evaluation images skipped as unreadable (with `skip_bad`).
    pub skipped: Vec<(usize, String)>,
}

// Under their former paths.
pub use crate::measure::{argmax_f32 as argmax, sqnr_db};

struct PerImage {
    sums: Vec<(f64, f64)>,
    float_top1: usize,
    int8_top1: usize,
    label: Option<usize>,
}

/// The stored int8 map holding each float map's value, by `MapId`.
pub fn stored_maps(g: &Graph, q: &QGraph) -> Vec<Option<QMapId>> {
    let mut out = vec![None; g.map_count()];
    for (i, m) in q.maps.iter().enumerate() {
        let slot = &mut out[m.float_map.index()];
        if slot.is_none() {
            *slot = Some(QMapId(i as u32));
        }
    }
    out
}

/// The images an evaluation of `cal` runs on, named: the held-out ones,
/// or the calibration images when none are held out.
pub(crate) fn evaluation_images(cal: &Calibration) -> (&'static str, Vec<usize>) {
    if cal.evaluation.is_empty() {
        ("calibration", cal.calibration.clone())
    } else {
        ("held-out", cal.evaluation.clone())
    }
}

/// Lowers `graph` with `cal`'s ranges and compares the simulator with the
/// float reference on the held-out images (or on the calibration images
/// when none are held out).
pub fn evaluate(
    graph: &Graph,
    images: &ImageSet,
    cal: &Calibration,
    lower_opts: &LowerOptions,
    skip_bad: bool,
    progress: bool,
) -> Result<Evaluation, EvalError> {
    let q = lower::lower(graph, &cal.ranges, lower_opts)?;
    let stored = stored_maps(graph, &q);
    let (on, indices) = evaluation_images(cal);
    let reference = Reference::new(graph);
    let pb = crate::calibrate::progress_bar(indices.len() as u64, progress, "int8 evaluation");
    let results: Vec<(usize, Result<PerImage, EvalError>)> = indices
        .par_iter()
        .map_init(
            || Simulator::new(&q),
            |sim, &i| {
                let r = one_image(graph, images, &q, &stored, &reference, sim, i);
                pb.inc(1);
                (i, r)
            },
        )
        .collect();
    pb.finish_and_clear();

    let mut sums = vec![(0.0f64, 0.0f64); graph.map_count()];
    let (mut n, mut agree, mut labelled, mut float_ok, mut int8_ok) =
        (0usize, 0usize, 0usize, 0usize, 0usize);
    let mut skipped = Vec::new();
    let mut used = Vec::new();
    // (float, int8, label) of each labelled image, for the paired figures.
    let mut predictions = Vec::new();
    for (i, r) in results {
        let r = match r {
            Ok(r) => r,
            Err(EvalError::Image(e)) if skip_bad => {
                skipped.push((i, e.to_string()));
                continue;
            }
            Err(e) => return Err(e),
        };
        used.push(i);
        for (acc, s) in sums.iter_mut().zip(&r.sums) {
            acc.0 += s.0;
            acc.1 += s.1;
        }
        n += 1;
        agree += (r.float_top1 == r.int8_top1) as usize;
        if let Some(l) = r.label {
            labelled += 1;
            float_ok += (r.float_top1 == l) as usize;
            int8_ok += (r.int8_top1 == l) as usize;
            predictions.push((r.float_top1, r.int8_top1, l));
        }
    }
    let share = |a: usize, b: usize| if b == 0 { 0.0 } else { a as f64 / b as f64 };
    let (fa, ia) = (share(float_ok, labelled), share(int8_ok, labelled));
    let output = OutputAgreement {
        images: n,
        top1_agreement: share(agree, n),
        labelled,
        float_accuracy: (labelled > 0).then_some(fa),
        int8_accuracy: (labelled > 0).then_some(ia),
        drop_pp: (labelled > 0).then_some(100.0 * (fa - ia)),
        paired: None,
        escapes: None,
        predictions,
    };
    let output = output.with_statistics(&[], &[]);
    Ok(Evaluation {
        on,
        images: used,
        qparams: stored
            .iter()
            .map(|s| s.and_then(|id| q.map(id).qp.tensor()))
            .collect(),
        sqnr_db: stored
            .iter()
            .zip(&sums)
            .map(|(s, &(sig, noise))| s.and_then(|_| sqnr_db(sig, noise)))
            .collect(),
        output,
        skipped,
    })
}

/// Top-1 agreement with the float network of each lowering in `qs`, on the
/// images `indices` (unreadable images are skipped with `skip_bad`, else an
/// error). The float reference runs once per image and each lowering's
/// simulator once: for choosing among range candidates, where
/// [`evaluate`]'s per-layer SQNR is not needed.
pub fn agreements(
    graph: &Graph,
    images: &ImageSet,
    indices: &[usize],
    qs: &[QGraph],
    skip_bad: bool,
) -> Result<Vec<f64>, EvalError> {
    let reference = Reference::new(graph);
    // Per image: the float top-1 and each lowering's, or None if skipped.
    type Top1s = Option<(usize, Vec<usize>)>;
    let per_image: Vec<Result<Top1s, EvalError>> = indices
        .par_iter()
        .map_init(
            || qs.iter().map(Simulator::new).collect::<Vec<_>>(),
            |sims, &i| {
                let sample = match images.load(i) {
                    Ok(s) => s,
                    Err(_) if skip_bad => return Ok(None),
                    Err(e) => return Err(e.into()),
                };
                let float_out = reference
                    .run_with(&sample.input, |_, _| {})
                    .expect("sample has the input's length");
                let mut int8 = Vec::with_capacity(qs.len());
                for (sim, q) in sims.iter_mut().zip(qs) {
                    match &sample.pixels {
                        Some(p) => sim.run(SimInput::Pixels(p))?,
                        None => sim.run(SimInput::Chw(&sample.input))?,
                    };
                    int8.push(argmax(&sim.map_chw_f32(q.output)));
                }
                Ok(Some((argmax(&float_out), int8)))
            },
        )
        .collect();
    let mut agree = vec![0usize; qs.len()];
    let mut n = 0usize;
    for r in per_image {
        if let Some((f, int8)) = r? {
            n += 1;
            for (a, t) in agree.iter_mut().zip(int8) {
                *a += (t == f) as usize;
            }
        }
    }
    Ok(agree
        .into_iter()
        .map(|a| if n == 0 { 0.0 } else { a as f64 / n as f64 })
        .collect())
}

fn one_image(
    graph: &Graph,
    images: &ImageSet,
    q: &QGraph,
    stored: &[Option<QMapId>],
    reference: &Reference<'_>,
    sim: &mut Simulator<'_>,
    i: usize,
) -> Result<PerImage, EvalError> {
    let sample = images.load(i)?;
    let mut float_maps: Vec<Option<Vec<f32>>> = vec![None; graph.map_count()];
    let float_out = reference
        .run_with(&sample.input, |m: MapId, v: &[f32]| {
            if stored[m.index()].is_some() {
                float_maps[m.index()] = Some(v.to_vec());
            }
        })
        .expect("sample has the input's length");
    match &sample.pixels {
        Some(p) => sim.run(SimInput::Pixels(p))?,
        None => sim.run(SimInput::Chw(&sample.input))?,
    };
    let sums = stored
        .iter()
        .zip(&float_maps)
        .map(|(s, f)| match (s, f) {
            (Some(id), Some(x)) => {
                let xq = sim.map_chw_f32(*id);
                x.iter()
                    .zip(&xq)
                    .fold((0.0, 0.0), |(sig, noise), (&a, &b)| {
                        let d = a as f64 - b as f64;
                        (sig + a as f64 * a as f64, noise + d * d)
                    })
            }
            _ => (0.0, 0.0),
        })
        .collect();
    let int8_out = sim.map_chw_f32(q.output);
    Ok(PerImage {
        sums,
        float_top1: argmax(&float_out),
        int8_top1: argmax(&int8_out),
        label: sample.label,
    })
}

impl Report {
    /// Adds an int8 evaluation to the report.
    pub fn add_evaluation(&mut self, images: &ImageSet, ev: &Evaluation) {
        for (i, why) in &ev.skipped {
            self.skipped
                .push((images.entries()[*i].name.clone(), why.clone()));
        }
        for row in &mut self.layers {
            let i = row.map as usize;
            row.scale = ev.qparams[i].map(|q| q.scale);
            row.zero_point = ev.qparams[i].map(|q| q.zero_point);
            row.sqnr_db = ev.sqnr_db[i];
        }
        self.evaluated_on = ev.on.to_string();
        self.output = Some(ev.output.clone());
        self.not_evaluated = None;
    }
}
