//! External accuracy check on an open data set nobody on this project made:
//! UCI Machine Learning Repository, "Optical Recognition of Handwritten
//! Digits", E. Alpaydin and C. Kaynak, 1998 (CC BY 4.0); the copy, its
//! fixed held-out split and pixel convention are described in
//! `tests/data/optdigits/README.md`.
//!
//! The float model is calibrated on `tests/data/optdigits/calibration`,
//! lowered to int8 and run by the integer simulator (`lower::sim`, bit-exact
//! with the generated module) on the 360 held-out images. Floors: float
//! accuracy ≥ 95% (simple classifiers reach about 97–99% on this set),
//! int8 top-1 agreement with float ≥ 98%, int8 accuracy drop ≤ 1.0
//! percentage point. Per-channel weight scales must do no worse than
//! per-tensor ones (Krishnamoorthi 2018, "Quantizing deep convolutional
//! networks for efficient inference: A whitepaper", §3).

use ingot_compiler::calibrate::Method;
use ingot_compiler::check::compare;
use ingot_compiler::check::prepare::{self, PrepareOptions};
use ingot_compiler::driver::RangesSource;
use std::path::{Path, PathBuf};

fn data() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/optdigits")
}

struct Figures {
    images: usize,
    float_acc: f64,
    int8_acc: f64,
    drop_pp: f64,
    agreement: f64,
}

fn figures(per_channel: bool) -> Figures {
    let d = data();
    let p = prepare::prepare(&d.join("model/digits.graph.json"), &d.join("heldout"), &{
        let mut o = PrepareOptions::default();
        o.ranges = RangesSource::Images(d.join("calibration"), Method::MinMax);
        o.per_channel = per_channel;
        o
    })
    .unwrap();
    let sim = p.data.sim_outputs.as_ref().unwrap();
    let float = p.data.float_outputs.as_ref().unwrap();
    let labels = p
        .data
        .labels
        .as_ref()
        .expect("held-out images are labelled");
    let ip: Vec<usize> = sim.iter().map(|v| compare::argmax_i8(v)).collect();
    let fp: Vec<usize> = float.iter().map(|v| compare::argmax_f32(v)).collect();
    let acc = compare::accuracy(&fp, &ip, labels, 10);
    let agreement =
        compare::compare_float(sim, p.data.output_scale, p.data.output_zero_point, float)
            .top1_agreement;
    Figures {
        images: labels.len(),
        float_acc: acc.float_accuracy,
        int8_acc: acc.int8_accuracy,
        drop_pp: acc.drop_pp,
        agreement,
    }
}

#[test]
fn digits_heldout_int8_accuracy_and_agreement_meet_the_floors() {
    let f = figures(true);
    eprintln!(
        "digits held-out ({} images): float {:.2}%, int8 {:.2}%, drop {:.2} pp, agreement {:.2}%",
        f.images,
        100.0 * f.float_acc,
        100.0 * f.int8_acc,
        f.drop_pp,
        100.0 * f.agreement
    );
    assert_eq!(f.images, 360, "the README's split holds out 360 rows");
    assert!(f.float_acc >= 0.95, "float accuracy {}", f.float_acc);
    assert!(f.agreement >= 0.98, "int8/float agreement {}", f.agreement);
    assert!(f.drop_pp <= 1.0, "int8 accuracy drop {} pp", f.drop_pp);
}

#[test]
fn digits_per_channel_is_no_worse_than_per_tensor() {
    let pc = figures(true);
    let pt = figures(false);
    eprintln!(
        "per-channel: int8 {:.2}%, agreement {:.2}%; per-tensor: int8 {:.2}%, agreement {:.2}%",
        100.0 * pc.int8_acc,
        100.0 * pc.agreement,
        100.0 * pt.int8_acc,
        100.0 * pt.agreement
    );
    assert_eq!(pc.float_acc, pt.float_acc, "same float model");
    assert!(pc.int8_acc >= pt.int8_acc, "accuracy");
    assert!(pc.agreement >= pt.agreement, "agreement");
}
