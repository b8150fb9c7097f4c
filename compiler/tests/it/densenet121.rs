//! DenseNet-121 (Huang et al. 2017, "Densely Connected Convolutional
//! Networks", table 1) built by the zoo, written to disk and loaded back
//! through the real loader, then counted.

use ingot_compiler::frontend::{self, GraphFile};
use ingot_compiler::graph::cost::total_cost;
use ingot_compiler::graph::{Op, Shape};
use ingot_testkit::zoo;

#[test]
fn densenet121_parameters_and_macs() {
    let dir = tempfile::tempdir().unwrap();
    let net = zoo::densenet121(121);
    let path = net.write(dir.path(), "densenet121").unwrap();
    let g = frontend::load(&path).unwrap();
    let t = total_cost(&g);
    // 7,978,856 trained parameters: the figure torchvision publishes for its
    // densenet121 (model card; from memory). Convention: conv and linear
    // weights and biases plus batch-norm scale and shift; running statistics
    // are buffers, not parameters.
    assert_eq!(t.params, 7_978_856);
    // 2,834,161,664 multiply-accumulates of convolutions and the linear
    // layer: torchvision's model card lists 2.83 "GFLOPS" for densenet121,
    // which are MACs in this convention (from memory for the exact digits).
    assert_eq!(t.macs, 2_834_161_664);
    // Buffers are the batch norms' running mean and variance: 2 * C per
    // batch norm, as many as their trained scale and shift.
    let bn_params: u64 = g
        .layers()
        .iter()
        .filter_map(|l| match &l.op {
            Op::BatchNorm(b) => Some((b.gamma.len() + b.beta.len()) as u64),
            _ => None,
        })
        .sum();
    assert_eq!(t.buffers, bn_params);
    // 41,824 batch-norm channels in all (sum over table 1 of Huang et al.
    // 2017, computed by hand), so 83,648 buffer values.
    assert_eq!(t.buffers, 83_648);
    // 120 convolutions + 1 linear layer = the "121" of the name.
    let convs = g
        .layers()
        .iter()
        .filter(|l| matches!(l.op, Op::Conv2d(_)))
        .count();
    let linears = g
        .layers()
        .iter()
        .filter(|l| matches!(l.op, Op::Linear(_)))
        .count();
    assert_eq!((convs, linears), (120, 1));
    // Huang et al. 2017, table 1: the last dense block ends at 7x7 with
    // 1024 channels.
    let last = g.find_layer("features.denseblock4.cat").unwrap();
    assert_eq!(g.shape(last.output()), Shape::new(1024, 7, 7));
    assert_eq!(g.shape(g.output()), Shape::flat(1000));
}

#[test]
fn densenet121_json_round_trips() {
    let net = zoo::densenet121(1);
    let json = serde_json::to_string_pretty(&net.file).unwrap();
    let back: GraphFile =
        frontend::parse(&json, std::path::Path::new("densenet121.graph.json")).unwrap();
    assert_eq!(back, net.file);
    assert_eq!(serde_json::to_string_pretty(&back).unwrap(), json);
    // One concat per dense layer plus one closing each block.
    let concats = back.layers.iter().filter(|l| l.op == "concat").count();
    assert_eq!(concats, 6 + 12 + 24 + 16 + 4);
}
