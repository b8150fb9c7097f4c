//! The calibration report: per layer the chosen range and what it costs,
//! and at the output what int8 costs in decisions.

use super::{Calibration, ImageSet, MapRange};
use crate::graph::{Graph, MapId};
use crate::measure::format_db as db;
use crate::util::MISSING;
use serde::Serialize;
use std::fmt::{self, Write as _};

/// One row of the report: one map of the float graph.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LayerRow {
    /// Map index.
    pub map: u32,
    /// Map name (the input's or its layer's).
    pub name: String,
    /// Op of the producing layer (`input` for the graph input).
    pub op: String,
    /// Chosen range.
    pub range: MapRange,
    /// Observed range on the calibration images.
    pub observed: MapRange,
    /// Share of calibration values beyond the range (bin resolution).
    pub clipped: f64,
    /// Int8 scale of the stored map holding this value, if it is stored.
    pub scale: Option<f32>,
    /// Int8 zero point, likewise.
    pub zero_point: Option<i32>,
    /// SQNR of the int8 map against the float map over the evaluation
    /// images, in dB (`None` when not stored or not evaluated; infinite
    /// when exact).
    pub sqnr_db: Option<f64>,
}

/// Decisions at the output, int8 against float.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputAgreement {
    /// Images compared.
    pub images: usize,
    /// Share of images where the int8 and float arg-max agree.
    pub top1_agreement: f64,
    /// Images with a class label.
    pub labelled: usize,
    /// Float top-1 accuracy on the labelled images.
    pub float_accuracy: Option<f64>,
    /// Int8 top-1 accuracy on the labelled images.
    pub int8_accuracy: Option<f64>,
    /// Float minus int8 accuracy, in percentage points.
    pub drop_pp: Option<f64>,
    /// Float against int8 on the same labelled images (discordant pairs,
    /// McNemar, intervals, images needed).
    pub paired: Option<crate::stats::PairedAccuracy>,
    /// Escapes and overkill, when good classes are named.
    pub escapes: Option<crate::stats::Escapes>,
    /// `(float, int8, true class)` of each labelled image.
    #[serde(skip)]
    pub predictions: Vec<(usize, usize, usize)>,
}

impl OutputAgreement {
    /// Fills the paired figures and, when `good` names classes (indices
    /// into `names`), escapes and overkill.
    pub fn with_statistics(mut self, good: &[usize], names: &[String]) -> OutputAgreement {
        let f: Vec<usize> = self.predictions.iter().map(|p| p.0).collect();
        let i: Vec<usize> = self.predictions.iter().map(|p| p.1).collect();
        let l: Vec<usize> = self.predictions.iter().map(|p| p.2).collect();
        self.paired = crate::stats::paired_accuracy(&f, &i, &l);
        self.escapes = (!good.is_empty() && !l.is_empty())
            .then(|| crate::stats::escapes(&f, &i, &l, good, names));
        self
    }
}

impl Report {
    /// Adds escapes and overkill for the classes `good` (indices into the
    /// graph's labels `names`) to an evaluated report.
    pub fn set_good_classes(&mut self, good: &[usize], names: &[String]) {
        if let Some(o) = self.output.take() {
            self.output = Some(o.with_statistics(good, names));
        }
    }
}

/// Everything `ingot calibrate` prints.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// Graph name.
    pub graph: String,
    /// Method.
    pub method: String,
    /// Image folder.
    pub folder: String,
    /// Samples listed.
    pub listed: usize,
    /// Names of the images observed.
    pub calibration: Vec<String>,
    /// Names of the images held out for evaluation.
    pub evaluation: Vec<String>,
    /// Which images the SQNR and agreement figures are measured on:
    /// `held-out`, `calibration`, or `none` (not evaluated).
    pub evaluated_on: String,
    /// Unreadable images skipped, with the reason.
    pub skipped: Vec<(String, String)>,
    /// Files in the folder that are not samples.
    pub ignored: Vec<String>,
    /// One row per map.
    pub layers: Vec<LayerRow>,
    /// Output comparison, when evaluated.
    pub output: Option<OutputAgreement>,
    /// Why no evaluation was made, if none was.
    pub not_evaluated: Option<String>,
    /// What bias correction changed, when the ranges carry corrections.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias_correction: Option<BiasEffect>,
}

/// What bias correction changed (`--bias-correction`), measured as the
/// int8 evaluation is, once without and once with the corrections.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BiasEffect {
    /// One row per corrected layer, in schedule order.
    pub layers: Vec<BiasLayer>,
    /// Without the corrections.
    pub before: OutputFigures,
    /// With them.
    pub after: OutputFigures,
}

/// One corrected layer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BiasLayer {
    /// Layer name.
    pub layer: String,
    /// Mean of `|shift|` over its output channels (real units of its
    /// output).
    pub mean_abs_shift: f64,
    /// Largest `|shift|`.
    pub max_abs_shift: f64,
    /// SQNR of the map its step writes, without the corrections (dB).
    pub sqnr_before_db: Option<f64>,
    /// Likewise with them.
    pub sqnr_after_db: Option<f64>,
}

/// Output figures of one int8 evaluation.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OutputFigures {
    /// Int8 top-1 agreement with float.
    pub top1_agreement: f64,
    /// Int8 accuracy on the labelled images.
    pub int8_accuracy: Option<f64>,
    /// SQNR of the logits (dB).
    pub logit_sqnr_db: Option<f64>,
    /// Lowest SQNR of any stored map (dB).
    pub lowest_layer_sqnr_db: Option<f64>,
}

/// What cross-layer equalization changed (`calibrate --equalize`): the
/// pairs, and the int8 figures of a calibration of the graph as loaded
/// (`before`) and of the equalized graph (`after`), measured alike.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EqualizeEffect {
    /// The pairs found, with their channel-range ratios.
    pub pairs: Vec<crate::graph::equalize::Pair>,
    /// Without equalization.
    pub before: OutputFigures,
    /// With it.
    pub after: OutputFigures,
    /// Per stored map: `(name, SQNR before, SQNR after)` in dB.
    pub layers: Vec<(String, Option<f64>, Option<f64>)>,
}

impl OutputFigures {
    /// The figures of an evaluated report of `graph` (`None` when the
    /// report was not evaluated).
    pub fn of(graph: &Graph, r: &Report) -> Option<OutputFigures> {
        let o = r.output.as_ref()?;
        Some(OutputFigures {
            top1_agreement: o.top1_agreement,
            int8_accuracy: o.int8_accuracy,
            logit_sqnr_db: r.layers.get(graph.output().index()).and_then(|l| l.sqnr_db),
            lowest_layer_sqnr_db: r
                .layers
                .iter()
                .filter_map(|l| l.sqnr_db)
                .fold(None, |m: Option<f64>, v| Some(m.map_or(v, |m| m.min(v)))),
        })
    }
}

impl fmt::Display for EqualizeEffect {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        crate::graph::equalize::write_pairs(f, &self.pairs)?;
        for (name, v) in [("before", &self.before), ("after", &self.after)] {
            writeln!(
                f,
                "  {name:<6}: top-1 agreement {:.2}%, logit SQNR {} dB, lowest layer SQNR {} dB",
                100.0 * v.top1_agreement,
                db(v.logit_sqnr_db),
                db(v.lowest_layer_sqnr_db)
            )?;
        }
        Ok(())
    }
}

impl Report {
    /// The report of a calibration before any int8 evaluation.
    pub fn new(graph: &Graph, images: &ImageSet, cal: &Calibration) -> Report {
        let names = |ix: &[usize]| {
            ix.iter()
                .map(|&i| images.entries()[i].name.clone())
                .collect()
        };
        let layers = (0..graph.map_count())
            .map(|i| {
                let m = MapId(i as u32);
                LayerRow {
                    map: m.0,
                    name: graph.map_name(m).to_string(),
                    op: m
                        .producer()
                        .map_or("input", |l| graph.layer(l).op.kind())
                        .to_string(),
                    range: cal.ranges.maps[i],
                    observed: cal.stats[i].observed,
                    clipped: cal.stats[i].clipped,
                    scale: None,
                    zero_point: None,
                    sqnr_db: None,
                }
            })
            .collect();
        Report {
            graph: graph.name().to_string(),
            method: cal.ranges.method.clone(),
            folder: images.root().display().to_string(),
            listed: images.len(),
            calibration: names(&cal.calibration),
            evaluation: names(&cal.evaluation),
            evaluated_on: "none".into(),
            skipped: cal
                .skipped
                .iter()
                .map(|s| (images.entries()[s.index].name.clone(), s.reason.clone()))
                .collect(),
            ignored: images
                .ignored()
                .iter()
                .map(|p| p.display().to_string())
                .collect(),
            layers,
            output: None,
            not_evaluated: None,
            bias_correction: None,
        }
    }
}

/// The scale column of a map stored with more than one scale.
const PER_CHANNEL: &str = "per chan.";

fn pct(x: f64) -> String {
    format!("{:.2}%", 100.0 * x)
}

impl fmt::Display for Report {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(
            f,
            "graph `{}`, method {}: {} images listed in {}, {} calibration, {} held out",
            self.graph,
            self.method,
            self.listed,
            self.folder,
            self.calibration.len(),
            self.evaluation.len()
        )?;
        if !self.skipped.is_empty() {
            writeln!(f, "skipped {} unreadable image(s):", self.skipped.len())?;
            for (_, why) in &self.skipped {
                writeln!(f, "  {why}")?;
            }
        }
        if !self.ignored.is_empty() {
            writeln!(
                f,
                "ignored {} file(s) that are not images (first: {})",
                self.ignored.len(),
                self.ignored[0]
            )?;
        }
        let name_w = self
            .layers
            .iter()
            .map(|r| r.name.len())
            .max()
            .unwrap_or(4)
            .clamp(4, 48);
        let mut t = String::new();
        writeln!(
            t,
            "{:>4}  {:<name_w$}  {:<15}  {:>23}  {:>10}  {:>5}  {:>8}  {:>9}",
            "map", "name", "op", "range", "scale", "zp", "clipped", "SQNR dB"
        )?;
        for r in &self.layers {
            let range = format!("[{:.4}, {:.4}]", r.range.min, r.range.max);
            // A stored map without one scale holds one per channel (or per
            // slice of a concatenation region): say so rather than print the
            // mark of a map that is not stored.
            let scale = match (r.scale, r.sqnr_db) {
                (Some(s), _) => format!("{s:.3e}"),
                (None, Some(_)) => PER_CHANNEL.into(),
                (None, None) => MISSING.into(),
            };
            let zp = r.zero_point.map_or(MISSING.into(), |z| z.to_string());
            writeln!(
                t,
                "{:>4}  {:<name_w$}  {:<15}  {:>23}  {:>10}  {:>5}  {:>8}  {:>9}",
                r.map,
                r.name,
                r.op,
                range,
                scale,
                zp,
                pct(r.clipped),
                db(r.sqnr_db)
            )?;
        }
        f.write_str(&t)?;
        if self
            .layers
            .iter()
            .any(|r| r.scale.is_none() && r.sqnr_db.is_some())
        {
            writeln!(
                f,
                "{PER_CHANNEL}: one scale per channel, or per slice of a concatenation region (docs/quantization.md)"
            )?;
        }
        match (&self.output, &self.not_evaluated) {
            (Some(o), _) => {
                writeln!(
                    f,
                    "output, on {} {} image(s): int8 top-1 agrees with float on {}",
                    o.images,
                    self.evaluated_on,
                    pct(o.top1_agreement)
                )?;
                if let (Some(fa), Some(ia), Some(d)) =
                    (o.float_accuracy, o.int8_accuracy, o.drop_pp)
                {
                    writeln!(
                        f,
                        "accuracy on {} labelled image(s): float {}, int8 {}, drop {:.2} percentage points",
                        o.labelled,
                        pct(fa),
                        pct(ia),
                        d
                    )?;
                }
                if let Some(p) = &o.paired {
                    write_paired(f, p, o.escapes.as_ref())?;
                }
            }
            (None, Some(why)) => writeln!(f, "not evaluated in int8: {why}")?,
            (None, None) => {}
        }
        if let Some(b) = &self.bias_correction {
            writeln!(f, "bias correction (empirical, on the calibration images):")?;
            let w = b
                .layers
                .iter()
                .map(|l| l.layer.len())
                .max()
                .unwrap_or(5)
                .max(5);
            writeln!(
                f,
                "  {:<w$}  {:>10}  {:>10}  {:>10}  {:>10}",
                "layer", "mean |δ|", "max |δ|", "dB before", "dB after"
            )?;
            for l in &b.layers {
                writeln!(
                    f,
                    "  {:<w$}  {:>10.3e}  {:>10.3e}  {:>10}  {:>10}",
                    l.layer,
                    l.mean_abs_shift,
                    l.max_abs_shift,
                    db(l.sqnr_before_db),
                    db(l.sqnr_after_db)
                )?;
            }
            for (what, o) in [("before", &b.before), ("after", &b.after)] {
                writeln!(
                    f,
                    "  {what:<6}: top-1 agreement {}, int8 accuracy {}, logit SQNR {} dB, lowest layer SQNR {} dB",
                    pct(o.top1_agreement),
                    o.int8_accuracy.map_or(MISSING.to_string(), pct),
                    db(o.logit_sqnr_db),
                    db(o.lowest_layer_sqnr_db)
                )?;
            }
        }
        Ok(())
    }
}

/// The paired figures and escapes under the accuracy line.
fn write_paired(
    f: &mut fmt::Formatter<'_>,
    p: &crate::stats::PairedAccuracy,
    e: Option<&crate::stats::Escapes>,
) -> fmt::Result {
    use crate::stats::{interval_pct, interval_pp, p_value};
    writeln!(
        f,
        "  drop 95% interval {} (Newcombe 1998, method 10); float {}, int8 {} (Wilson)",
        interval_pp(p.drop_interval_pp),
        interval_pct(Some(p.float_interval)),
        interval_pct(Some(p.int8_interval))
    )?;
    writeln!(
        f,
        "  {} image(s) right in float only, {} in int8 only; exact McNemar p = {}",
        p.float_only,
        p.int8_only,
        p_value(p.mcnemar_p, p.mcnemar_log10_p)
    )?;
    writeln!(
        f,
        "  about {} labelled images would give a ±1 pp interval, {} a ±0.5 pp one",
        p.images_for_1pp, p.images_for_half_pp
    )?;
    if let Some(e) = e {
        writeln!(
            f,
            "  escapes (good: {}): float {} of {} defects, int8 {} ({}); overkill: float {} of {} good, int8 {} ({})",
            e.good_classes.join(", "),
            e.float.escapes,
            e.float.defects,
            e.int8.escapes,
            interval_pct(e.int8.escape_interval),
            e.float.overkill,
            e.float.good,
            e.int8.overkill,
            interval_pct(e.int8.overkill_interval)
        )?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(name: &str, scale: Option<f32>, sqnr_db: Option<f64>) -> LayerRow {
        let r = MapRange {
            min: -1.0,
            max: 1.0,
        };
        LayerRow {
            map: 0,
            name: name.into(),
            op: "conv2d".into(),
            range: r,
            observed: r,
            clipped: 0.0,
            scale,
            zero_point: scale.map(|_| 0),
            sqnr_db,
        }
    }

    fn report(layers: Vec<LayerRow>) -> String {
        Report {
            graph: "g".into(),
            method: "minmax".into(),
            folder: "d".into(),
            listed: 1,
            calibration: vec!["a.png".into()],
            evaluation: vec![],
            evaluated_on: "calibration".into(),
            skipped: vec![],
            ignored: vec![],
            layers,
            output: None,
            not_evaluated: None,
            bias_correction: None,
        }
        .to_string()
    }

    #[test]
    fn a_stored_map_with_per_channel_scales_is_not_printed_as_unstored() {
        let text = report(vec![
            row("one", Some(0.5), Some(30.0)),
            row("chan", None, Some(25.0)),
            row("gone", None, None),
        ]);
        let line = |n: &str| text.lines().find(|l| l.contains(n)).unwrap().to_string();
        assert!(line("one").contains("5.000e-1"), "{text}");
        assert!(line("chan").contains(PER_CHANNEL), "{text}");
        assert!(!line("gone").contains(PER_CHANNEL), "{text}");
        assert!(text.contains("per chan.: one scale per channel"), "{text}");
        // Without such a map the legend is not printed.
        let plain = report(vec![row("one", Some(0.5), Some(30.0))]);
        assert!(!plain.contains(PER_CHANNEL), "{plain}");
    }
}
