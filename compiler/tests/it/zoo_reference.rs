//! Float reference and `inspect` figures on the zoo networks of
//! `ingot-testkit` (moved out of the library's unit tests, which cannot use
//! the dev crate).

use ingot_compiler::inspect::report;
use ingot_compiler::reference::{Reference, ReferenceError};
use ingot_compiler::{MapId, Shape};
use ingot_testkit::zoo;

#[test]
fn run_all_and_visitor_agree_with_run() {
    let net = zoo::dense_small(11);
    let g = net.build();
    let r = Reference::new(&g);
    let x = net.random_input(1);
    let out = r.run(&x).unwrap();
    let all = r.run_all(&x).unwrap();
    assert_eq!(all.len(), g.map_count());
    assert_eq!(all[0], x);
    assert_eq!(all[g.output().index()], out);
    for (i, m) in all.iter().enumerate() {
        assert_eq!(m.len(), g.shape(MapId(i as u32)).len(), "map {i}");
        assert!(m.iter().all(|v| v.is_finite()), "map {i}");
    }
    let mut seen = Vec::new();
    r.run_with(&x, |id, m| seen.push((id, m.len()))).unwrap();
    let want: Vec<(MapId, usize)> = (0..g.map_count())
        .map(|i| (MapId(i as u32), all[i].len()))
        .collect();
    assert_eq!(seen, want);
    // A dense block's closing concat is the stem output followed by the four
    // dense layers' outputs.
    let cat = g.find_layer("features.denseblock1.cat").unwrap();
    let parts: Vec<f32> = g
        .layer(cat)
        .inputs
        .iter()
        .flat_map(|m| all[m.index()].clone())
        .collect();
    assert_eq!(all[cat.output().index()], parts);
}

#[test]
fn batch_is_deterministic_and_equals_single_runs() {
    let net = zoo::residual(&zoo::ResidualConfig::default(), 4);
    let g = net.build();
    let r = Reference::new(&g);
    let xs: Vec<Vec<f32>> = (0..6).map(|s| net.random_input(s)).collect();
    let batch = r.run_batch(&xs).unwrap();
    for (x, y) in xs.iter().zip(&batch) {
        assert_eq!(&r.run(x).unwrap(), y);
    }
    assert_eq!(r.run_batch(&xs).unwrap(), batch);
    assert_ne!(batch[0], batch[1]);
}

#[test]
fn wrong_input_length_names_the_shapes() {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 1);
    let g = net.build();
    let r = Reference::new(&g);
    let e = r.run(&[0.0; 10]).unwrap_err();
    assert_eq!(
        e,
        ReferenceError::InputLength {
            graph: "plain_stack".into(),
            expected: Shape::new(1, 28, 28),
            got: 10
        }
    );
    let msg = e.to_string();
    assert!(
        msg.contains("[1, 28, 28]") && msg.contains("784") && msg.contains("10 values"),
        "{msg}"
    );
    let e = r.run_batch(&[vec![0.0; 784], vec![0.0; 3]]).unwrap_err();
    assert!(
        e.to_string()
            .starts_with("image 1 of the batch: input has 3 values"),
        "{e}"
    );
}

#[test]
fn zoo_networks_keep_activations_in_a_sane_range() {
    for net in [
        zoo::dense_small(1),
        zoo::residual(&zoo::ResidualConfig::default(), 1),
        zoo::depthwise_separable(&zoo::DepthwiseConfig::default(), 1),
        zoo::plain_stack(&zoo::PlainStackConfig::default(), 1),
    ] {
        let g = net.build();
        let mut worst = 0.0f32;
        Reference::new(&g)
            .run_with(&net.random_input(9), |_, m| {
                worst = m.iter().fold(worst, |a, v| a.max(v.abs()))
            })
            .unwrap();
        assert!(
            worst > 0.1 && worst < 100.0,
            "{}: max |activation| {worst}",
            g.name()
        );
    }
}

#[test]
fn plain_stack_counts_by_hand() {
    let g = zoo::plain_stack(&zoo::PlainStackConfig::default(), 1).build();
    let r = report(&g);
    // conv1: 8 x 1 x 3 x 3 + 8 = 80 params, 28*28*8 outputs x 9 taps.
    assert_eq!(r.layers[0].params, 80);
    assert_eq!(r.layers[0].macs, 28 * 28 * 8 * 9);
    // conv2: 16 x 8 x 9 + 16 = 1168 params, 14*14*16 outputs x 72 taps.
    assert_eq!(r.layers[3].params, 1168);
    assert_eq!(r.layers[3].macs, 14 * 14 * 16 * 72);
    // fc: 10 x 784 + 10.
    assert_eq!(r.layers[7].params, 7850);
    assert_eq!(r.totals.params, 80 + 1168 + 7850);
    assert_eq!(r.totals.macs, 56_448 + 225_792 + 7840);
    assert_eq!(r.totals.weight_bytes_f32, 4 * 9098);
    // int8: (72 + 1152 + 7840) weight bytes + 4 * (8 + 16 + 10) bias bytes.
    assert_eq!(r.totals.weight_bytes_int8, 9064 + 136);
    let text = r.to_text();
    assert!(text.contains("conv2d") && text.contains("9,098"), "{text}");
}
