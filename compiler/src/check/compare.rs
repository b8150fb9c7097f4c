//! Comparisons over plain arrays: module vs integer simulator (must be
//! bit-identical), dequantized module output vs float reference, accuracy
//! against labels, per-layer SQNR, and the pass/fail thresholds.

use super::io::TraceMap;
use serde::Serialize;
use std::collections::BTreeMap;

/// First differing value of two int8 output batches.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Mismatch {
    /// Image index.
    pub image: usize,
    /// Element index in the output.
    pub index: usize,
    /// Value the module produced.
    pub module: i8,
    /// Value the simulator produced.
    pub reference: i8,
}

/// Module outputs vs simulator outputs.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct BitExact {
    /// Images compared.
    pub images: usize,
    /// Images whose output differs anywhere (or whose length differs).
    pub mismatched_images: Vec<usize>,
    /// The first differing element.
    pub first: Option<Mismatch>,
}

impl BitExact {
    /// True when every output is identical.
    pub fn identical(&self) -> bool {
        self.mismatched_images.is_empty()
    }
}

/// Compares int8 outputs image by image.
pub fn compare_outputs(module: &[Vec<i8>], reference: &[Vec<i8>]) -> BitExact {
    let images = module.len().max(reference.len());
    let mut mismatched = Vec::new();
    let mut first = None;
    for i in 0..images {
        let (m, r) = (module.get(i), reference.get(i));
        let differs = match (m, r) {
            (Some(m), Some(r)) => {
                let pos = m.iter().zip(r).position(|(a, b)| a != b);
                if let (Some(p), None) = (pos, &first) {
                    first = Some(Mismatch {
                        image: i,
                        index: p,
                        module: m[p],
                        reference: r[p],
                    });
                }
                pos.is_some() || m.len() != r.len()
            }
            _ => true,
        };
        if differs {
            mismatched.push(i);
        }
    }
    BitExact {
        images,
        mismatched_images: mismatched,
        first,
    }
}

/// Where two traces first part.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct LayerDiff {
    /// Step index.
    pub step: usize,
    /// Step name (the module's).
    pub name: String,
    /// Image on which that step first differs.
    pub image: usize,
    /// Elements that differ in that map.
    pub differing: usize,
    /// Elements in the map.
    pub len: usize,
    /// First differing element.
    pub first_index: usize,
    /// Largest |module − reference| over the map.
    pub max_abs_diff: u8,
    /// True when one side has no map for this step or the lengths differ.
    pub shape_mismatch: bool,
}

/// The earliest step (over all images) whose map differs between the
/// module's trace and the reference trace (the simulator's, or a known-good
/// module's). `None` when every traced map is identical.
pub fn first_differing_step(module: &[TraceMap], reference: &[TraceMap]) -> Option<LayerDiff> {
    let index = |t: &[TraceMap]| -> BTreeMap<(usize, usize), usize> {
        t.iter()
            .enumerate()
            .map(|(i, m)| ((m.step, m.image), i))
            .collect()
    };
    let (mi, ri) = (index(module), index(reference));
    let mut keys: Vec<(usize, usize)> = mi.keys().chain(ri.keys()).copied().collect();
    keys.sort_unstable();
    keys.dedup();
    for (step, image) in keys {
        match (mi.get(&(step, image)), ri.get(&(step, image))) {
            (Some(&a), Some(&b)) => {
                let (a, b) = (&module[a], &reference[b]);
                let differing = a.data.iter().zip(&b.data).filter(|(x, y)| x != y).count();
                if differing == 0 && a.data.len() == b.data.len() {
                    continue;
                }
                let first_index = a
                    .data
                    .iter()
                    .zip(&b.data)
                    .position(|(x, y)| x != y)
                    .unwrap_or(a.data.len().min(b.data.len()));
                let max_abs_diff = a
                    .data
                    .iter()
                    .zip(&b.data)
                    .map(|(&x, &y)| (x as i16 - y as i16).unsigned_abs() as u8)
                    .max()
                    .unwrap_or(0);
                return Some(LayerDiff {
                    step,
                    name: a.name.clone(),
                    image,
                    differing,
                    len: a.data.len(),
                    first_index,
                    max_abs_diff,
                    shape_mismatch: a.data.len() != b.data.len(),
                });
            }
            (m, r) => {
                let name = m.or(r).map(|&i| {
                    if m.is_some() {
                        &module[i]
                    } else {
                        &reference[i]
                    }
                    .name
                    .clone()
                });
                return Some(LayerDiff {
                    step,
                    name: name.unwrap_or_default(),
                    image,
                    differing: 0,
                    len: 0,
                    first_index: 0,
                    max_abs_diff: 0,
                    shape_mismatch: true,
                });
            }
        }
    }
    None
}

/// Index of the largest value, first on ties (`ingot_rt::argmax`, what the
/// generated module's `argmax` calls).
pub fn argmax_i8(v: &[i8]) -> usize {
    ingot_rt::argmax(v)
}

pub use crate::measure::argmax_f32;

/// `scale · (q − zero_point)`.
pub fn dequantize(q: &[i8], scale: f32, zero_point: i32) -> Vec<f32> {
    q.iter()
        .map(|&v| scale * (v as i32 - zero_point) as f32)
        .collect()
}

/// Dequantized int8 outputs vs float reference outputs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FloatAgreement {
    /// Images compared.
    pub images: usize,
    /// Fraction of images whose int8 arg-max equals the float arg-max.
    pub top1_agreement: f64,
    /// Mean |dequantized − float| over all logits of all images.
    pub mean_abs_error: f64,
    /// Largest |dequantized − float|.
    pub max_abs_error: f64,
}

/// Compares dequantized module outputs with float outputs.
pub fn compare_float(
    int8: &[Vec<i8>],
    scale: f32,
    zero_point: i32,
    float: &[Vec<f32>],
) -> FloatAgreement {
    let images = int8.len().min(float.len());
    let (mut agree, mut sum, mut n, mut max) = (0usize, 0f64, 0usize, 0f64);
    for (q, f) in int8.iter().zip(float) {
        if argmax_i8(q) == argmax_f32(f) {
            agree += 1;
        }
        for (d, &r) in dequantize(q, scale, zero_point).iter().zip(f) {
            let e = (*d as f64 - r as f64).abs();
            sum += e;
            n += 1;
            max = max.max(e);
        }
    }
    FloatAgreement {
        images,
        top1_agreement: if images == 0 {
            0.0
        } else {
            agree as f64 / images as f64
        },
        mean_abs_error: if n == 0 { 0.0 } else { sum / n as f64 },
        max_abs_error: max,
    }
}

/// `[true class][predicted class]` counts; labels or predictions outside
/// `0..classes` are skipped.
pub fn confusion(predictions: &[usize], labels: &[usize], classes: usize) -> Vec<Vec<u64>> {
    let mut m = vec![vec![0u64; classes]; classes];
    for (&p, &l) in predictions.iter().zip(labels) {
        if p < classes && l < classes {
            m[l][p] += 1;
        }
    }
    m
}

/// Accuracy of the float reference and of the int8 module against labels.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Accuracy {
    /// Labelled images.
    pub images: usize,
    /// Float top-1 accuracy, fraction.
    pub float_accuracy: f64,
    /// Int8 top-1 accuracy, fraction.
    pub int8_accuracy: f64,
    /// `(float − int8) · 100`, percentage points (negative: int8 better).
    pub drop_pp: f64,
    /// Float confusion matrix `[true][predicted]`.
    pub confusion_float: Vec<Vec<u64>>,
    /// Int8 confusion matrix `[true][predicted]`.
    pub confusion_int8: Vec<Vec<u64>>,
}

/// Accuracy figures from predictions and labels.
pub fn accuracy(
    float_pred: &[usize],
    int8_pred: &[usize],
    labels: &[usize],
    classes: usize,
) -> Accuracy {
    let images = labels.len().min(float_pred.len()).min(int8_pred.len());
    let hits = |p: &[usize]| p.iter().zip(labels).filter(|(a, b)| a == b).count();
    let frac = |h: usize| {
        if images == 0 {
            0.0
        } else {
            h as f64 / images as f64
        }
    };
    let (fa, ia) = (
        frac(hits(&float_pred[..images])),
        frac(hits(&int8_pred[..images])),
    );
    Accuracy {
        images,
        float_accuracy: fa,
        int8_accuracy: ia,
        drop_pp: (fa - ia) * 100.0,
        confusion_float: confusion(float_pred, labels, classes),
        confusion_int8: confusion(int8_pred, labels, classes),
    }
}

/// Signal-to-quantization-noise ratio in dB:
/// `10 · log10(Σ r² / Σ (r − t)²)`; `+∞` when identical, `−∞` for a zero
/// signal with noise.
pub fn sqnr_db(reference: &[f32], test: &[f32]) -> f64 {
    let (mut s, mut n) = (0f64, 0f64);
    for (&r, &t) in reference.iter().zip(test) {
        s += (r as f64).powi(2);
        n += (r as f64 - t as f64).powi(2);
    }
    crate::measure::sqnr_db(s, n).unwrap_or(f64::INFINITY)
}

/// SQNR of one layer over a batch.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LayerSqnr {
    /// Step index.
    pub step: usize,
    /// Step name.
    pub name: String,
    /// SQNR over all images, dB.
    pub sqnr_db: f64,
}

/// SQNR of a dequantized int8 map against the float map, both flattened in
/// the same element order (the caller brings float maps into HWC order).
pub fn layer_sqnr(float_map: &[f32], q: &[i8], scale: f32, zero_point: i32) -> f64 {
    sqnr_db(float_map, &dequantize(q, scale, zero_point))
}

/// Pass/fail thresholds of `ingot check`.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct Thresholds {
    /// Largest allowed accuracy drop, percentage points.
    pub max_drop_pp: Option<f64>,
    /// Smallest allowed top-1 agreement with the float reference, fraction.
    pub min_agreement: Option<f64>,
}

/// Messages for every threshold passed, each naming its figure; empty when
/// all hold. A module that is not bit-identical to the simulator always
/// fails.
pub fn check_thresholds(
    bit_exact: Option<&BitExact>,
    agreement: Option<&FloatAgreement>,
    accuracy: Option<&Accuracy>,
    t: &Thresholds,
) -> Vec<String> {
    let mut out = Vec::new();
    if let Some(b) = bit_exact {
        if !b.identical() {
            out.push(format!(
                "bit-exactness: {} of {} images differ from the integer simulator (a bug)",
                b.mismatched_images.len(),
                b.images
            ));
        }
    }
    if let (Some(max), Some(a)) = (t.max_drop_pp, accuracy) {
        // Compare in hundredths of a point so 0.1 + 0.2 style noise cannot
        // fail an equal drop.
        if (a.drop_pp * 100.0).round() > (max * 100.0).round() {
            out.push(format!(
                "accuracy drop: {:.2} pp (float {:.2}% → int8 {:.2}%) exceeds --max-drop {}",
                a.drop_pp,
                a.float_accuracy * 100.0,
                a.int8_accuracy * 100.0,
                max
            ));
        }
    }
    if let (Some(min), Some(g)) = (t.min_agreement, agreement) {
        if g.top1_agreement < min {
            out.push(format!(
                "top-1 agreement: {:.4} with the float reference is below --min-agreement {}",
                g.top1_agreement, min
            ));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn map(image: usize, step: usize, name: &str, data: &[i8]) -> TraceMap {
        TraceMap {
            image,
            step,
            name: name.into(),
            data: data.to_vec(),
        }
    }

    #[test]
    fn output_mismatch_is_located() {
        let a = vec![vec![1, 2, 3], vec![4, 5, 6]];
        assert!(compare_outputs(&a, &a).identical());
        let mut b = a.clone();
        b[1][2] = 7;
        let r = compare_outputs(&a, &b);
        assert_eq!(r.mismatched_images, vec![1]);
        assert_eq!(
            r.first,
            Some(Mismatch {
                image: 1,
                index: 2,
                module: 6,
                reference: 7
            })
        );
        assert!(
            !compare_outputs(&a[..1], &a).identical(),
            "a missing image is a mismatch"
        );
    }

    #[test]
    fn first_differing_step_is_the_earliest_over_images() {
        let good = vec![
            map(0, 0, "conv1", &[1, 2]),
            map(0, 1, "pool", &[3]),
            map(1, 0, "conv1", &[5, 6]),
            map(1, 1, "pool", &[7]),
        ];
        assert_eq!(first_differing_step(&good, &good), None);
        let mut bad = good.clone();
        bad[3].data = vec![9];
        let d = first_differing_step(&bad, &good).unwrap();
        assert_eq!(
            (d.step, d.image, d.name.as_str(), d.max_abs_diff),
            (1, 1, "pool", 2)
        );
        bad[2].data = vec![5, 0];
        let d = first_differing_step(&bad, &good).unwrap();
        assert_eq!((d.step, d.image, d.first_index, d.differing), (0, 1, 1, 1));
        let d = first_differing_step(&good[..3], &good).unwrap();
        assert!(d.shape_mismatch && d.step == 1 && d.image == 1);
    }

    #[test]
    fn float_agreement_and_accuracy_figures() {
        let q = vec![vec![10i8, 0, -10], vec![0, 20, 0]];
        let f = vec![vec![1.0f32, 0.0, -1.0], vec![0.0, 0.0, 3.0]];
        let g = compare_float(&q, 0.1, 0, &f);
        assert_eq!(g.top1_agreement, 0.5);
        assert!((g.max_abs_error - 3.0).abs() < 1e-6);
        assert!(
            (g.mean_abs_error - 5.0 / 6.0).abs() < 1e-6,
            "{}",
            g.mean_abs_error
        );

        let a = accuracy(&[0, 1, 2, 2], &[0, 1, 1, 1], &[0, 1, 2, 2], 3);
        assert_eq!(a.float_accuracy, 1.0);
        assert_eq!(a.int8_accuracy, 0.5);
        assert!((a.drop_pp - 50.0).abs() < 1e-9);
        assert_eq!(a.confusion_int8[2][1], 2);
        assert_eq!(a.confusion_float[2][2], 2);
        let msgs = check_thresholds(
            None,
            Some(&g),
            Some(&a),
            &Thresholds {
                max_drop_pp: Some(0.0),
                min_agreement: Some(0.9),
            },
        );
        assert_eq!(msgs.len(), 2);
        assert!(msgs[0].starts_with("accuracy drop: 50.00 pp"), "{msgs:?}");
        assert!(msgs[1].starts_with("top-1 agreement: 0.5000"), "{msgs:?}");
        let lenient = Thresholds {
            max_drop_pp: Some(50.0),
            min_agreement: Some(0.5),
        };
        assert!(check_thresholds(None, Some(&g), Some(&a), &lenient).is_empty());
    }

    #[test]
    fn sqnr_values() {
        assert_eq!(sqnr_db(&[1.0, 2.0], &[1.0, 2.0]), f64::INFINITY);
        // signal 1+1 = 2, noise 0.01+0.01 = 0.02 -> 20 dB
        let v = sqnr_db(&[1.0, -1.0], &[1.1, -0.9]);
        assert!((v - 20.0).abs() < 1e-4, "{v}");
        assert!((layer_sqnr(&[1.0, -1.0], &[11, -9], 0.1, 0) - 20.0).abs() < 1e-3);
        assert_eq!(argmax_f32(&[f32::NAN, 1.0, 1.0]), 1);
        assert_eq!(argmax_i8(&[3, 5, 5]), 1);
    }
}
