//! Which layers cost the accuracy: per unit of the lowered network (the
//! input's quantization and each step, see [`super::mixed`]), the output
//! figures with only that unit in int8 (the rest float), and with every
//! unit in int8 except that one.
//!
//! Figures are against the float network on the same images: top-1
//! agreement, and the SQNR of the logits
//! `10 log10(Σ x² / Σ (x − x̂)²)` summed over the images. The rows are
//! ranked by the SQNR with only that unit in int8, lowest (most
//! sensitive) first, ties by agreement. Per-image sums are combined in
//! image order, so the figures do not depend on the thread count.

use super::mixed::Mixed;
use super::EvalError;
use crate::calibrate::{Calibration, ImageSet};
use crate::graph::Graph;
use crate::lower::{self, LowerOptions};
use crate::measure::{argmax_f32 as argmax, format_db as db, sqnr_db};
use rayon::prelude::*;
use serde::Serialize;
use std::fmt;

/// Output figures of one configuration against float.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Figures {
    /// Share of images whose top-1 class matches float's.
    pub agreement: f64,
    /// SQNR of the logits in dB (`None` for zero over zero).
    pub sqnr_db: Option<f64>,
}

/// One unit's row.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SensitivityRow {
    /// Rank, 1 = most sensitive.
    pub rank: usize,
    /// Step name (`input` for the input's quantization).
    pub name: String,
    /// Step kind.
    pub kind: &'static str,
    /// Only this unit in int8.
    pub only: Figures,
    /// Every unit in int8 but this one.
    pub all_but: Figures,
}

/// The sensitivity report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Sensitivity {
    /// `held-out` or `calibration`: which images were used (`given` for
    /// [`measure_inputs`]).
    pub on: &'static str,
    /// Images compared.
    pub images: usize,
    /// Every unit in int8 (the fake-quantized network, which approximates
    /// the integer simulator).
    pub all: Figures,
    /// One row per unit, most sensitive first.
    pub rows: Vec<SensitivityRow>,
}

/// `(agrees, signal, noise)` per configuration of one image.
type PerImage = Vec<(bool, f64, f64)>;

/// Measures the sensitivity of every unit of `graph` lowered with `cal`'s
/// ranges, on the held-out images (or the calibration images when none
/// are held out), as [`super::evaluate()`] chooses them.
pub fn measure(
    graph: &Graph,
    images: &ImageSet,
    cal: &Calibration,
    lower_opts: &LowerOptions,
    skip_bad: bool,
    progress: bool,
) -> Result<Sensitivity, EvalError> {
    let q = lower::lower(graph, &cal.ranges, lower_opts)?;
    let mixed = Mixed::new(graph, &q, &cal.ranges);
    let (on, indices) = super::evaluate::evaluation_images(cal);
    let pb = crate::calibrate::progress_bar(indices.len() as u64, progress, "sensitivity");
    let per_image: Vec<Result<Option<PerImage>, EvalError>> = indices
        .par_iter()
        .map(|&i| {
            let sample = match images.load(i) {
                Ok(s) => s,
                Err(_) if skip_bad => return Ok(None),
                Err(e) => return Err(e.into()),
            };
            let r = configurations(&mixed, &sample.input);
            pb.inc(1);
            Ok(Some(r))
        })
        .collect();
    pb.finish_and_clear();
    let mut done = Vec::with_capacity(per_image.len());
    for r in per_image {
        done.extend(r?);
    }
    Ok(summarise(&mixed, on, done))
}

/// [`measure`] on given inputs (`[C, H, W]` each), with a prepared mixed
/// network: for tests and callers that hold their samples in memory.
pub fn measure_inputs(mixed: &Mixed<'_>, inputs: &[Vec<f32>]) -> Sensitivity {
    let per_image: Vec<PerImage> = inputs
        .par_iter()
        .map(|x| configurations(mixed, x))
        .collect();
    summarise(mixed, "given", per_image)
}

fn summarise(mixed: &Mixed<'_>, on: &'static str, per_image: Vec<PerImage>) -> Sensitivity {
    let n = mixed.units().len();
    // Configuration 0: all in int8; 1 + u: only u; 1 + n + u: all but u.
    let mut sums = vec![(0usize, 0f64, 0f64); 1 + 2 * n];
    let count = per_image.len();
    for r in per_image {
        for (s, (a, sig, noise)) in sums.iter_mut().zip(r) {
            s.0 += a as usize;
            s.1 += sig;
            s.2 += noise;
        }
    }
    let fig = |s: (usize, f64, f64)| Figures {
        agreement: if count == 0 {
            0.0
        } else {
            s.0 as f64 / count as f64
        },
        sqnr_db: sqnr_db(s.1, s.2),
    };
    let mut rows: Vec<SensitivityRow> = mixed
        .units()
        .iter()
        .enumerate()
        .map(|(u, unit)| SensitivityRow {
            rank: 0,
            name: unit.name.clone(),
            kind: unit.kind,
            only: fig(sums[1 + u]),
            all_but: fig(sums[1 + n + u]),
        })
        .collect();
    rank(&mut rows);
    Sensitivity {
        on,
        images: count,
        all: fig(sums[0]),
        rows,
    }
}

/// Sorts rows most sensitive first (lowest SQNR with only that unit in
/// int8; a missing or exact SQNR last; ties by agreement, then name) and
/// numbers them.
fn rank(rows: &mut [SensitivityRow]) {
    let key = |f: &Figures| f.sqnr_db.unwrap_or(f64::INFINITY);
    rows.sort_by(|a, b| {
        key(&a.only)
            .total_cmp(&key(&b.only))
            .then(a.only.agreement.total_cmp(&b.only.agreement))
            .then_with(|| a.name.cmp(&b.name))
    });
    for (i, r) in rows.iter_mut().enumerate() {
        r.rank = i + 1;
    }
}

/// One image through float and every configuration: all units, each one
/// alone, all but each one.
fn configurations(mixed: &Mixed<'_>, input: &[f32]) -> PerImage {
    let n = mixed.units().len();
    let float = mixed.run(input, &|_| false, |_, _| {});
    let top = argmax(&float);
    let compare = |x: Vec<f32>| {
        let (sig, noise) = float.iter().zip(&x).fold((0.0, 0.0), |(s, e), (&a, &b)| {
            let d = a as f64 - b as f64;
            (s + a as f64 * a as f64, e + d * d)
        });
        (argmax(&x) == top, sig, noise)
    };
    let mut out = Vec::with_capacity(1 + 2 * n);
    out.push(compare(mixed.run(input, &|_| true, |_, _| {})));
    for u in 0..n {
        out.push(compare(mixed.run(input, &|v| v == u, |_, _| {})));
    }
    for u in 0..n {
        out.push(compare(mixed.run(input, &|v| v != u, |_, _| {})));
    }
    out
}

impl Sensitivity {
    /// The ranking as an SVG bar chart: per unit, the logits' SQNR with
    /// only that unit in int8 (lower is worse), most sensitive first.
    pub fn svg(&self) -> Result<String, String> {
        let vals: Vec<(String, f64)> = self
            .rows
            .iter()
            .map(|r| {
                (
                    format!("{} {}", r.rank, r.name),
                    r.only.sqnr_db.unwrap_or(f64::INFINITY),
                )
            })
            .collect();
        let finite_max = vals
            .iter()
            .filter(|v| v.1.is_finite())
            .map(|v| v.1)
            .fold(0.0f64, f64::max);
        let top = (finite_max * 1.15).max(10.0);
        // A layer that alone ruins the output has a negative SQNR: the axis
        // goes below zero so its bar shows (downwards).
        let finite_min = vals
            .iter()
            .filter(|v| v.1.is_finite())
            .map(|v| v.1)
            .fold(0.0f64, f64::min);
        let bottom = if finite_min < 0.0 {
            finite_min * 1.15 - 1.0
        } else {
            0.0
        };
        let look = crate::util::bars::Bars {
            caption: (
                "Logit SQNR with only this layer in int8 (lower = more sensitive)",
                16,
            ),
            bar_width: 40,
            height: 420,
            x_label_area: 110,
            y_desc: "logit SQNR (dB)",
            colour: plotters::style::RGBColor(190, 80, 60),
            bar_margin: 4,
            y: bottom..top,
        };
        let bars: Vec<(String, f64)> = vals
            .into_iter()
            .map(|(name, v)| (name, if v.is_finite() { v } else { top }))
            .collect();
        crate::util::bars::svg(&look, &bars)
    }
}

impl fmt::Display for Sensitivity {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(
            f,
            "sensitivity on {} {} images (logits against float; every layer in int8: agreement {:.2}%, SQNR {} dB)",
            self.images,
            self.on,
            100.0 * self.all.agreement,
            db(self.all.sqnr_db)
        )?;
        let w = self
            .rows
            .iter()
            .map(|r| r.name.len())
            .max()
            .unwrap_or(4)
            .max(5);
        writeln!(
            f,
            "{:>4}  {:<w$}  {:<17}  {:>11}  {:>8}  {:>14}  {:>11}",
            "rank", "layer", "kind", "only: agree", "only: dB", "all but: agree", "all but: dB"
        )?;
        for r in &self.rows {
            writeln!(
                f,
                "{:>4}  {:<w$}  {:<17}  {:>10.2}%  {:>8}  {:>13.2}%  {:>11}",
                r.rank,
                r.name,
                r.kind,
                100.0 * r.only.agreement,
                db(r.only.sqnr_db),
                100.0 * r.all_but.agreement,
                db(r.all_but.sqnr_db)
            )?;
        }
        Ok(())
    }
}
