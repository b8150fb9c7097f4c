//! One scale per output channel on convolution maps whose readers absorb
//! per-channel parameters: the scales against the affine formula by hand,
//! the simulator's codes against the real accumulator, and the maps that
//! must stay per tensor.

use crate::common;

use common::{calibrate, random_input, Net, Rng};
use ingot_compiler::calibrate::MapRange;
use ingot_compiler::lower::quant::activation_qparams;
use ingot_compiler::lower::{lower, LowerOptions, MapQuant, QKernel, QParams, SimInput, Simulator};

/// `x` (one channel) → 1×1 convolution `a` with two output channels,
/// weights 0.9 and 7.5 (so on inputs in `[-1, 1]` channel 0 stays in
/// `[-1, 1]` and channel 1 in `[-8, 8]`) → the readers named.
fn net(reader: &str) -> ingot_compiler::Graph {
    let mut n = Net::new(1, 4, 4, 3);
    n.conv("a", "x", 1, 2, 1, 1, 0, 1);
    n.store.tensors.get_mut("a.weight").unwrap().data = vec![0.9, 7.5];
    n.store.tensors.get_mut("a.bias").unwrap().data = vec![0.05, -0.1];
    match reader {
        // A concatenation whose reader takes the BN-ReLU as its fused
        // input transform (a lone batch norm after `a` would fold into it).
        "fused" => {
            n.conv("b", "x", 1, 1, 1, 1, 0, 1);
            n.multi("cat", "concat", &["a", "b"]);
            n.bn("bn", "cat", 3);
            n.op("r", "relu", "bn");
            n.conv("out", "r", 3, 2, 1, 1, 0, 1)
        }
        // A plain convolution reads one parameter set.
        "plain" => n.conv("out", "a", 2, 2, 1, 1, 0, 1),
        // An average pool passes the parameters on to the concatenation.
        "pool" => {
            n.pool("p", "avg_pool2d", "a", 2, 2, 0);
            n.conv("b", "x", 1, 1, 1, 2, 0, 1);
            n.multi("cat", "concat", &["p", "b"]);
            n.bn("bn", "cat", 3);
            n.op("r", "relu", "bn");
            n.conv("out", "r", 3, 2, 1, 1, 0, 1)
        }
        // Global pooling into a linear layer: not absorbed.
        _ => {
            n.op("g", "global_avg_pool", "a");
            n.op("f", "flatten", "g");
            n.linear("out", "f", 2, 2)
        }
    };
    n.build("out")
}

/// Min/max ranges with `a` set to `[-8, 8.2]` and its channels to
/// `[-1, 1]` and `[-8, 8]`.
fn ranges(g: &ingot_compiler::Graph) -> ingot_compiler::calibrate::Ranges {
    let mut rng = Rng::new(9);
    let images: Vec<Vec<f32>> = (0..8).map(|_| random_input(g, &mut rng)).collect();
    let mut r = calibrate(g, &images);
    let a = g.find_layer("a").unwrap().output();
    r.maps[a.index()] = MapRange {
        min: -8.0,
        max: 8.2,
    };
    r.channels = vec![None; g.map_count()];
    r.channels[a.index()] = Some(vec![
        MapRange {
            min: -1.0,
            max: 1.0,
        },
        MapRange {
            min: -8.0,
            max: 8.0,
        },
    ]);
    r
}

#[test]
fn two_channel_conv_gets_its_own_scales_at_one_zero_point() {
    let g = net("fused");
    let r = ranges(&g);
    let q = lower(&g, &r, &LowerOptions::default()).unwrap();
    let a = q.maps.iter().position(|m| m.name == "a").unwrap();
    // Per tensor, [-8, 8.2] is scale 16.2/255 at zero point
    // round(-128 + 8/(16.2/255)) = round(-2.07) = -2 (Jacob et al. 2018,
    // §2.1). At that zero point channel 0's [-1, 1] needs
    // max(1/(127 + 2), 1/(-2 + 128)) = 1/126 and channel 1's [-8, 8]
    // needs 8/126, both below the per-tensor scale.
    let tensor = activation_qparams(r.maps[g.find_layer("a").unwrap().output().index()]);
    assert_eq!(tensor.zero_point, -2);
    assert!((tensor.scale as f64 - 16.2 / 255.0).abs() < 1e-7);
    let want = [
        QParams {
            scale: (1.0f64 / 126.0) as f32,
            zero_point: -2,
        },
        QParams {
            scale: (8.0f64 / 126.0) as f32,
            zero_point: -2,
        },
    ];
    assert_eq!(q.maps[a].qp.per_channel(2), want.to_vec());
    assert!(q.maps[a].qp.is_sliced());
    assert_eq!(q.verify(), Ok(()));

    // The convolution's multipliers divide by each channel's own scale.
    let st = q.steps.iter().find(|s| s.name == "a").unwrap();
    let QKernel::Conv2d(c) = &st.kernel else {
        panic!("a is a convolution")
    };
    let s_in = q.map(st.inputs[0]).qp.channel(0);
    for (o, w) in want.iter().enumerate() {
        let m = ingot_rt::Requant {
            mult: c.requant[o].mult,
            shift: c.requant[o].shift,
        }
        .to_real();
        let real = s_in.scale as f64 * c.weight_scales[o] as f64 / w.scale as f64;
        assert!((m / real - 1.0).abs() < 1e-6, "channel {o}: {m} vs {real}");
    }

    // Every code of `a` dequantized with its channel's parameters is within
    // half a step of the real value of its exact integer accumulator
    // (s_in·s_w[o]·acc; affine formula, Jacob et al. 2018, §2.1), where
    // that value is inside the channel's representable range.
    let mut sim = Simulator::new(&q);
    let mut rng = Rng::new(11);
    let mut inside = [0usize; 2];
    for _ in 0..20 {
        let x = random_input(&g, &mut rng);
        sim.run(SimInput::Chw(&x)).unwrap();
        let xin = sim.map_hwc(st.inputs[0]);
        let out = sim.map_hwc(st.output);
        for (p, &xq) in xin.iter().enumerate() {
            for o in 0..2 {
                let acc = c.bias[o] as f64 + c.weights[o] as f64 * xq as f64;
                let real = s_in.scale as f64 * c.weight_scales[o] as f64 * acc;
                let (s, z) = (want[o].scale as f64, want[o].zero_point as f64);
                if real < s * (-128.0 - z) || real > s * (127.0 - z) {
                    continue;
                }
                inside[o] += 1;
                let got = s * (out[p * 2 + o] as f64 - z);
                assert!(
                    (got - real).abs() <= 0.5 * s + 1e-6,
                    "channel {o}: {got} vs {real} (step {s})"
                );
            }
        }
    }
    assert!(inside.iter().all(|&n| n > 100), "{inside:?}");
}

#[test]
fn readers_without_absorption_keep_the_map_per_tensor() {
    for reader in ["plain", "linear"] {
        let g = net(reader);
        let r = ranges(&g);
        let q = lower(&g, &r, &LowerOptions::default()).unwrap();
        let a = q.maps.iter().find(|m| m.name == "a").unwrap();
        assert_eq!(
            a.qp,
            MapQuant::Tensor(activation_qparams(MapRange {
                min: -8.0,
                max: 8.2
            })),
            "{reader}"
        );
    }
}

#[test]
fn an_average_pool_passes_the_scales_on_and_old_ranges_lower_as_before() {
    let g = net("pool");
    let r = ranges(&g);
    let q = lower(&g, &r, &LowerOptions::default()).unwrap();
    let map = |name: &str| q.maps.iter().find(|m| m.name == name).unwrap();
    assert!(map("a").qp.is_sliced());
    assert_eq!(map("p").qp, map("a").qp, "the pool keeps a's parameters");
    assert_eq!(q.verify(), Ok(()));
    // Without per-channel ranges (a v1 or v2 file), the lowering is the
    // per-tensor one, to the byte of its serialized form.
    let mut old = r.clone();
    old.channels.clear();
    let q0 = lower(&g, &old, &LowerOptions::default()).unwrap();
    assert!(q0.maps.iter().all(|m| m.name == "cat" || !m.qp.is_sliced()));
    let mut none = r.clone();
    none.channels = vec![None; g.map_count()];
    let q1 = lower(&g, &none, &LowerOptions::default()).unwrap();
    assert_eq!(
        serde_json::to_string(&q0).unwrap(),
        serde_json::to_string(&q1).unwrap()
    );
}

#[test]
fn per_channel_ranges_round_trip_as_v3_and_are_checked() {
    let g = net("fused");
    let r = ranges(&g);
    let text = r.to_json(&g);
    let v: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert_eq!(v["format"], "ingot.ranges.v3");
    assert_eq!(v["channels"]["a"][1][1], 8.0);
    let path = std::path::Path::new("r.json");
    let back = ingot_compiler::calibrate::Ranges::parse(&g, &text, path, None).unwrap();
    assert_eq!(back, r);
    // Without per-channel ranges the file is v1, as before.
    let mut old = r.clone();
    old.channels.clear();
    assert!(old.to_json(&g).contains("\"ingot.ranges.v1\""));
    // `channels` needs v3; one range per channel.
    let v2 = text.replace("ingot.ranges.v3", "ingot.ranges.v2");
    let e = ingot_compiler::calibrate::Ranges::parse(&g, &v2, path, None).unwrap_err();
    assert!(e.to_string().contains("`channels` needs"), "{e}");
    let mut short = v.clone();
    short["channels"]["a"].as_array_mut().unwrap().pop();
    let e =
        ingot_compiler::calibrate::Ranges::parse(&g, &short.to_string(), path, None).unwrap_err();
    assert!(
        e.to_string()
            .contains("1 per-channel ranges for 2 channels"),
        "{e}"
    );
}
