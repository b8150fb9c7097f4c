//! The zoo networks lowered and simulated against the float reference, and
//! the RAM the fused pre-activation transforms save on the dense ones.

use crate::common::minmax_ranges;
use ingot_compiler::calibrate::{MapRange, Ranges};
use ingot_compiler::lower::quant::dequantize;
use ingot_compiler::lower::{fusion_savings, lower, LowerOptions, QKernel, SimInput, Simulator};
use ingot_compiler::reference::Reference;
use ingot_testkit::zoo;

fn argmax(v: &[f32]) -> usize {
    v.iter()
        .enumerate()
        .fold(0, |b, (i, &a)| if a > v[b] { i } else { b })
}

/// Lowers `net`, calibrated and checked on the same random images, and
/// returns (worst output error in output steps, arg-max agreements, images).
fn check(net: &zoo::Net, n: usize) -> (f32, usize, usize) {
    let g = net.build();
    let images: Vec<Vec<f32>> = (0..n as u64).map(|s| net.random_input(100 + s)).collect();
    let q = lower(&g, &minmax_ranges(&g, &images), &LowerOptions::default()).unwrap();
    let reference = Reference::new(&g);
    let mut sim = Simulator::new(&q);
    let qp = q.output_qp();
    let (mut worst, mut agree) = (0f32, 0);
    for x in &images {
        let codes = sim.run(SimInput::Chw(x)).unwrap();
        let float = reference.run(x).unwrap();
        let deq: Vec<f32> = codes.iter().map(|&c| dequantize(c, qp)).collect();
        for (a, b) in deq.iter().zip(&float) {
            worst = worst.max((a - b).abs() / qp.scale);
        }
        agree += usize::from(argmax(&deq) == argmax(&float));
    }
    eprintln!(
        "{}: worst output error {worst:.2} steps, arg-max {agree}/{n}",
        g.name()
    );
    (worst, agree, n)
}

#[test]
fn zoo_networks_simulate_close_to_the_float_reference() {
    // Output within a few steps of the output scale: each layer adds half a
    // step of rounding at its own scale plus its inputs' error times its
    // gain; random-weight networks of this depth stay within ~2 steps.
    for net in [
        zoo::plain_stack(&Default::default(), 1),
        zoo::residual(&Default::default(), 2),
        zoo::depthwise_separable(&Default::default(), 3),
        zoo::dense_small(4),
        zoo::inverted_residual(&Default::default(), 5),
    ] {
        let (worst, agree, n) = check(&net, 4);
        assert!(worst <= 4.0, "{}: {worst} steps", net.file.name);
        assert!(
            agree + 1 >= n,
            "{}: arg-max agrees on {agree}/{n}",
            net.file.name
        );
    }
}

#[test]
fn pre_activation_3x3_convolution_pads_with_the_transformed_zero() {
    // The demo dense network has no bottleneck: every dense layer is
    // BN-ReLU-conv3x3 with padding 1, so padded taps must take the zero point
    // of the ReLU domain, not of the stored concatenation.
    let g = zoo::dense_small(4).build();
    let q = lower(&g, &zoo_ranges(&g), &LowerOptions::default()).unwrap();
    let mut n = 0;
    for s in &q.steps {
        if let QKernel::Conv2d(c) = &s.kernel {
            if c.transform.is_some() && c.kernel == [3, 3] {
                assert_ne!(
                    c.input_zp,
                    q.map(s.inputs[0]).qp.channel(0).zero_point,
                    "{}",
                    s.name
                );
                assert_eq!(
                    c.input_zp, -128,
                    "{}: a ReLU domain's zero is code -128",
                    s.name
                );
                n += 1;
            }
        }
    }
    assert_eq!(n, 8);
}

fn zoo_ranges(g: &ingot_compiler::Graph) -> Ranges {
    let net_inputs: Vec<Vec<f32>> = (0..2u64)
        .map(|s| {
            let n = g.shape(ingot_compiler::MapId::INPUT).len();
            (0..n)
                .map(|i| (((i as u64 * 2654435761 + s) % 1000) as f32 / 500.0) - 1.0)
                .collect()
        })
        .collect();
    minmax_ranges(g, &net_inputs)
}

#[test]
fn fusion_ram_saved_on_zoo_dense_networks() {
    let synthetic = |g: &ingot_compiler::Graph| Ranges {
        graph: g.name().into(),
        graph_hash: String::new(),
        method: "synthetic".into(),
        images: 0,
        maps: vec![
            MapRange {
                min: -2.0,
                max: 2.0
            };
            g.map_count()
        ],
        bias_shifts: Default::default(),
        channels: Vec::new(),
    };
    let g = zoo::dense_small(1).build();
    let s = fusion_savings(&lower(&g, &synthetic(&g), &LowerOptions::default()).unwrap());
    eprintln!(
        "{} {}: {} fused, largest avoided map {} B, total {} B",
        g.name(),
        g.input().shape,
        s.fused,
        s.largest,
        s.total
    );
    // 8 dense layers + 1 transition; largest: 16 + 4·8 = 48 channels at 64×64.
    assert_eq!((s.fused, s.largest), (9, 48 * 64 * 64));

    let g = zoo::densenet121(1).build();
    let s = fusion_savings(&lower(&g, &synthetic(&g), &LowerOptions::default()).unwrap());
    eprintln!(
        "{} {}: {} fused, largest avoided map {} B, total {} B",
        g.name(),
        g.input().shape,
        s.fused,
        s.largest,
        s.total
    );
    // 58 dense layers + 3 transitions; largest: the first transition's input,
    // 256 channels at 56×56 (Huang et al. 2017, table 1).
    assert_eq!((s.fused, s.largest), (61, 256 * 56 * 56));
    assert_eq!(s.channels, 33_312);
}
