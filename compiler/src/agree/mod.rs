//! int8 against float on sample images: what lowering costs, and the
//! choice among candidate ranges by how well the int8 network agrees with
//! the float one.
//!
//! This stage comes after [`lower`](crate::lower) because it needs the
//! integer simulator; calibration ([`crate::calibrate`]) only observes the
//! float network. [`run`] is calibration with `--method auto` resolved;
//! [`report`] adds the int8 evaluation to a calibration report.

pub mod bias;
pub mod evaluate;
pub mod mixed;
pub mod sensitivity;

pub use evaluate::{evaluate, EvalError, Evaluation};

use crate::calibrate::{self, AutoChoice, CalibError, CalibOptions, Calibration, ImageSet, Method};
use crate::graph::Graph;
use crate::lower::{LowerError, LowerOptions};
use crate::ranges::{MapRange, Ranges};

/// Why [`run`] failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum AgreeError {
    /// Calibration itself failed.
    #[error(transparent)]
    Calibrate(#[from] CalibError),
    /// Lowering refused one candidate's ranges.
    #[error("method auto, trying {method}: {error}")]
    Lower {
        /// The candidate method.
        method: Method,
        /// Why lowering failed.
        error: LowerError,
    },
    /// Comparing the candidates' int8 networks with float failed.
    #[error("method auto: {0}")]
    Agreement(EvalError),
}

/// Calibrates `graph` on `images` ([`calibrate::run`]) and, under
/// [`Method::Auto`], keeps the candidate whose int8 network agrees best
/// with float ([`choose`]); with `bias_correction`, then corrects the
/// biases ([`bias::correct`]): the entry point the CLI, build scripts and
/// the harness use.
pub fn run(
    graph: &Graph,
    images: &ImageSet,
    opts: &CalibOptions,
) -> Result<Calibration, AgreeError> {
    let mut cal = calibrate::run(graph, images, opts)?;
    choose(graph, images, &mut cal, opts)?;
    if opts.bias_correction {
        bias::correct(
            graph,
            images,
            &mut cal,
            &LowerOptions::default(),
            opts.skip_bad,
        )
        .map_err(AgreeError::Agreement)?;
    }
    Ok(cal)
}

/// Resolves [`Method::Auto`] (nothing to do for other methods): lowers the
/// network with each candidate's ranges, runs the integer simulator against
/// the float reference on the calibration images (never the held-out ones,
/// which stay for an honest evaluation) and keeps the candidate with the
/// best top-1 agreement.
pub fn choose(
    graph: &Graph,
    images: &ImageSet,
    cal: &mut Calibration,
    opts: &CalibOptions,
) -> Result<(), AgreeError> {
    let candidates = std::mem::take(&mut cal.candidates);
    if candidates.is_empty() {
        return Ok(());
    }
    let mut lowered = Vec::with_capacity(candidates.len());
    for (method, maps, _) in &candidates {
        let ranges = Ranges {
            maps: maps.clone(),
            method: method.to_string(),
            ..cal.ranges.clone()
        };
        lowered.push(
            crate::lower::lower(graph, &ranges, &LowerOptions::default()).map_err(|error| {
                AgreeError::Lower {
                    method: *method,
                    error,
                }
            })?,
        );
    }
    let agree = evaluate::agreements(graph, images, &cal.calibration, &lowered, opts.skip_bad)
        .map_err(AgreeError::Agreement)?;
    let mut tried = Vec::new();
    let mut best: Option<(f64, Method, Vec<MapRange>, Vec<f64>)> = None;
    for ((method, maps, clipped), a) in candidates.into_iter().zip(agree) {
        tried.push((method.to_string(), a));
        if best.as_ref().is_none_or(|b| a > b.0) {
            best = Some((a, method, maps, clipped));
        }
    }
    let (_, method, maps, clipped) = best.expect("at least one candidate");
    for (s, c) in cal.stats.iter_mut().zip(clipped) {
        s.clipped = c;
    }
    cal.ranges.maps = maps;
    cal.ranges.method = format!("auto: {method}");
    cal.auto = Some(AutoChoice {
        tried,
        chosen: method.to_string(),
        images: cal.calibration.len(),
    });
    Ok(())
}

/// The full report of a calibration: ranges and statistics per map and,
/// when `int8` is set, the int8 evaluation (lowering with `lower_opts`, the
/// integer simulator against the float reference; see [`evaluate()`]).
pub fn report(
    graph: &Graph,
    images: &ImageSet,
    cal: &Calibration,
    opts: &CalibOptions,
    int8: Option<&LowerOptions>,
) -> Result<calibrate::Report, EvalError> {
    let mut r = calibrate::Report::new(graph, images, cal);
    match int8 {
        Some(lo) => {
            let ev = evaluate(graph, images, cal, lo, opts.skip_bad, opts.progress)?;
            r.add_evaluation(images, &ev);
            if !cal.ranges.bias_shifts.is_empty() {
                let mut plain = cal.clone();
                plain.ranges.bias_shifts.clear();
                let before = evaluate(graph, images, &plain, lo, opts.skip_bad, opts.progress)?;
                r.bias_correction = Some(bias_effect(graph, cal, lo, &before, &ev)?);
            }
        }
        None => r.not_evaluated = Some("not requested".into()),
    }
    Ok(r)
}

/// The report section of bias correction from the evaluations without and
/// with it.
fn bias_effect(
    graph: &Graph,
    cal: &Calibration,
    lo: &LowerOptions,
    before: &Evaluation,
    after: &Evaluation,
) -> Result<calibrate::report::BiasEffect, EvalError> {
    use calibrate::report::{BiasLayer, OutputFigures};
    let q = crate::lower::lower(graph, &cal.ranges, lo)?;
    let logits = q.map(q.output).float_map.index();
    let figures = |e: &Evaluation| OutputFigures {
        top1_agreement: e.output.top1_agreement,
        int8_accuracy: e.output.int8_accuracy,
        logit_sqnr_db: e.sqnr_db[logits],
        lowest_layer_sqnr_db: e
            .sqnr_db
            .iter()
            .flatten()
            .copied()
            .filter(|v| !v.is_nan())
            .reduce(f64::min),
    };
    let layers = q
        .steps
        .iter()
        .filter_map(|s| {
            let name = &graph.layer(s.layers[0]).name;
            let d = cal.ranges.bias_shifts.get(name)?;
            let m = q.map(s.output).float_map.index();
            Some(BiasLayer {
                layer: name.clone(),
                mean_abs_shift: d.iter().map(|v| v.abs() as f64).sum::<f64>()
                    / d.len().max(1) as f64,
                max_abs_shift: d.iter().fold(0f64, |a, v| a.max(v.abs() as f64)),
                sqnr_before_db: before.sqnr_db[m],
                sqnr_after_db: after.sqnr_db[m],
            })
        })
        .collect();
    Ok(calibrate::report::BiasEffect {
        layers,
        before: figures(before),
        after: figures(after),
    })
}
