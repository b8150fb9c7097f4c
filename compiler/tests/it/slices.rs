//! Per-slice quantization of concatenation regions: the fused transform of a
//! region's reader against the affine quantization formula, and the
//! fallback to one shared parameter set when a reader cannot absorb
//! per-channel parameters.

use crate::common;

use common::{calibrate, random_input, Net, Rng};
use ingot_compiler::graph::Op;
use ingot_compiler::lower::quant::{activation_qparams, apply_transform};
use ingot_compiler::lower::{
    lower, ChannelTransform, LowerOptions, MapQuant, QGraphError, QKernel, QParams,
};

/// `x` → convolutions `a` (small weights) and `b` (weights ×`wide`) →
/// `cat` → batch norm → ReLU → `reader` (a 1×1 convolution, which takes the
/// BN-ReLU as its fused input transform, or the op named).
fn two_member_region(reader: &str, wide: f32) -> ingot_compiler::Graph {
    let mut n = Net::new(3, 6, 6, 21);
    n.conv("a", "x", 3, 2, 1, 1, 0, 1);
    n.conv("b", "x", 3, 3, 1, 1, 0, 1);
    n.store
        .tensors
        .get_mut("b.weight")
        .unwrap()
        .data
        .iter_mut()
        .for_each(|v| *v *= wide);
    n.multi("cat", "concat", &["a", "b"]);
    n.bn("bn", "cat", 5);
    n.op("r", "relu", "bn");
    match reader {
        "conv" => n.conv("out", "r", 5, 2, 1, 1, 0, 1),
        op => n.op("out", op, "r"),
    };
    n.build("out")
}

fn images(g: &ingot_compiler::Graph) -> Vec<Vec<f32>> {
    let mut rng = Rng::new(5);
    (0..6).map(|_| random_input(g, &mut rng)).collect()
}

#[test]
fn fused_transform_of_a_two_member_region_follows_the_affine_formula() {
    let g = two_member_region("conv", 8.0);
    let ranges = calibrate(&g, &images(&g));
    let q = lower(&g, &ranges, &LowerOptions::default()).unwrap();
    let qp_of = |layer: &str| activation_qparams(ranges.get(g.find_layer(layer).unwrap().output()));
    let (qa, qb) = (qp_of("a"), qp_of("b"));
    assert_ne!(
        qa, qb,
        "the members' ranges differ, so must their parameters"
    );
    let map = |name: &str| q.maps.iter().find(|m| m.name == name).unwrap();
    assert_eq!(map("a").qp.tensor(), Some(qa));
    assert_eq!(map("b").qp.tensor(), Some(qb));
    let cat = map("cat");
    assert_eq!(
        cat.qp.per_channel(5),
        vec![qa, qa, qb, qb, qb],
        "the region's output carries each member's parameters on its slice"
    );

    let step = q.steps.iter().find(|s| s.name == "out").unwrap();
    let QKernel::Conv2d(c) = &step.kernel else {
        panic!("out is a convolution")
    };
    let Some(t @ ChannelTransform::Affine { zp_in, .. }) = &c.transform else {
        panic!("the BN-ReLU is fused into out's input read")
    };
    assert_eq!(*zp_in, 0, "per-channel zero points are folded into add");
    let Op::BatchNorm(bn) = &g.layer(g.find_layer("bn").unwrap()).op else {
        panic!()
    };
    let dom: QParams = activation_qparams(ranges.get(g.find_layer("r").unwrap().output()));
    let (mut exact, mut total) = (0, 0);
    for (ch, &(a, b)) in bn.affine().iter().enumerate() {
        let s = if ch < 2 { qa } else { qb };
        for code in -128..=127i32 {
            // By hand: q' = round((a·s_c·(q − z_c) + b)/s_out) + z_out, then
            // the ReLU clamp at z_out (Jacob et al. 2018, §2.1; rounding half
            // up, as the runtime).
            let real = a as f64 * s.scale as f64 * (code - s.zero_point) as f64 + b as f64;
            let want = ((real / dom.scale as f64 + 0.5).floor() as i32 + dom.zero_point)
                .clamp(dom.zero_point, 127);
            let got = apply_transform(t, ch, code as i8) as i32;
            assert!(
                (got - want).abs() <= 1,
                "channel {ch} code {code}: {got} vs {want}"
            );
            exact += usize::from(got == want);
            total += 1;
        }
    }
    // Only a real value within the rounding of `mul` and `add` of a half
    // step may land on the other side.
    assert!(exact * 100 >= total * 99, "{exact}/{total} exact");
}

#[test]
fn a_region_read_by_a_per_tensor_reader_shares_one_quantization() {
    // A global average pool reading the BN-ReLU map is no fallback (the
    // BN-ReLU is a channel step, which absorbs the slices) ...
    let g = two_member_region("global_avg_pool", 8.0);
    let q = lower(&g, &calibrate(&g, &images(&g)), &LowerOptions::default()).unwrap();
    let map = |name: &str| q.maps.iter().find(|m| m.name == name).unwrap().clone();
    assert!(map("cat").qp.is_sliced());
    assert!(matches!(
        q.steps.iter().find(|s| s.name == "bn").unwrap().kernel,
        QKernel::Channel(_)
    ));

    // ... but a pool reading the concatenation itself is.
    let mut n = Net::new(3, 6, 6, 21);
    n.conv("a", "x", 3, 2, 1, 1, 0, 1);
    n.conv("b", "x", 3, 3, 1, 1, 0, 1);
    n.multi("cat", "concat", &["a", "b"]);
    n.op("out", "global_avg_pool", "cat");
    let g = n.build("out");
    let q = lower(&g, &calibrate(&g, &images(&g)), &LowerOptions::default()).unwrap();
    let map = |name: &str| q.maps.iter().find(|m| m.name == name).unwrap().clone();
    let shared = map("cat").qp.tensor().expect("shared parameters");
    assert_eq!(map("a").qp.tensor(), Some(shared));
    assert_eq!(map("b").qp.tensor(), Some(shared));
    q.verify().unwrap();
}

#[test]
fn verify_refuses_slices_a_step_cannot_carry() {
    let g = two_member_region("conv", 8.0);
    let q = lower(&g, &calibrate(&g, &images(&g)), &LowerOptions::default()).unwrap();
    q.verify().unwrap();
    let cat = q.maps.iter().position(|m| m.name == "cat").unwrap();
    let reader = q.steps.iter().position(|s| s.name == "out").unwrap();

    // A concatenation output whose slices are not its inputs' parameters.
    let mut bad = q.clone();
    bad.maps[cat].qp = bad.maps[cat].qp.channel(0).into();
    assert_eq!(bad.verify(), Err(QGraphError::Concat("cat".into())));

    // A convolution without a per-channel input transform reading slices.
    let mut bad = q.clone();
    if let QKernel::Conv2d(c) = &mut bad.steps[reader].kernel {
        c.transform = None;
    }
    assert_eq!(
        bad.verify(),
        Err(QGraphError::SlicedAccess {
            step: "out".into(),
            map: "cat".into()
        })
    );

    // Slices that do not add up to the map's channels.
    let mut bad = q.clone();
    let mut qps = bad.maps[cat].qp.per_channel(5);
    qps.pop();
    bad.maps[cat].qp = MapQuant::from_channels(&qps).unwrap();
    assert_eq!(bad.verify(), Err(QGraphError::Slices("cat".into())));
}
