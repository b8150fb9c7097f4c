//! Kernel benchmark on shapes typical of a 96×96 grayscale camera network.
//!
//! Usage (built with `cargo bench -p ingot-rt --bench kernels --no-run`):
//!
//! * `kernels` (or `kernels --bench`, as `cargo bench` passes): time every
//!   kernel and print kernel, shape, MACs, median time and MAC/s.
//! * `kernels list`: print `name macs` per kernel (used by `callgrind.sh`).
//! * `kernels run NAME ITERS`: set up NAME and call it exactly ITERS times,
//!   untimed (used under callgrind: the difference between ITERS = N and
//!   ITERS = 0 is the cost of N calls).
//!
//! "MACs" for pooling, add and copy kernels count one per input tap or
//! element touched, so MAC/s there means taps or elements per second.

use ingot_rt::*;
use std::hint::black_box;
use std::time::Instant;

struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        self.0
    }
    fn i8(&mut self) -> i8 {
        self.next() as i8
    }
    fn w8(&mut self) -> i8 {
        (self.next() % 255) as i8 as i16 as i8 / 4
    }
}

/// One prepared kernel invocation.
struct Case {
    name: &'static str,
    shape: String,
    macs: u64,
    run: Box<dyn FnMut()>,
}

fn conv_case(
    name: &'static str,
    h: usize,
    w: usize,
    cin: usize,
    cout: usize,
    k: usize,
    step: usize,
    groups: usize,
    transform: bool,
) -> Case {
    let mut rng = Rng(0x9e37_79b9_7f4a_7c15 ^ (cin * 131 + cout) as u64);
    let win = Window::square(k, step, if k > 1 { k / 2 } else { 0 });
    let (oh, ow) = (win.out_h(h).unwrap(), win.out_w(w).unwrap());
    let input = MapRef::new(0, h, w, cin);
    let output = MapRef::new(input.len(), oh, ow, cout);
    let mut arena: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
    let cpg = cin / groups;
    let weights: Vec<i8> = (0..cout * k * k * cpg).map(|_| rng.w8()).collect();
    let bias: Vec<i32> = (0..cout).map(|i| i as i32 * 37 - 500).collect();
    let rq: Vec<Requant> = (0..cout)
        .map(|i| Requant::from_real(0.0007 + 0.00001 * i as f64).unwrap())
        .collect();
    let p = ConvParams {
        window: win,
        groups,
        input_zp: -3,
        out: OutputQuant::relu(-128),
    };
    let mut patch = vec![0i16; conv_patch_len(k, k, cin)];
    let mul: Vec<i32> = (0..cin).map(|i| 900 + i as i32).collect();
    let addv: Vec<i32> = (0..cin).map(|i| i as i32 * 100 - 800).collect();
    let macs = (oh * ow * cout * k * k * cpg) as u64;
    let shape = format!(
        "{h}x{w}x{cin} -> {oh}x{ow}x{cout}, {k}x{k}/{step}, g={groups}{}",
        if transform { ", +BN-ReLU" } else { "" }
    );
    Case {
        name,
        shape,
        macs,
        run: Box::new(move || {
            let tr = InputTransform::Affine(AffineTransform {
                mul: &mul,
                add: &addv,
                shift: 10,
                zp_in: 5,
                zp_out: -3,
                min: -3,
                max: 127,
            });
            conv2d(
                black_box(&mut arena),
                input,
                output,
                &weights,
                &bias,
                &rq,
                &p,
                if transform { Some(&tr) } else { None },
                &mut patch,
            )
            .unwrap();
        }),
    }
}

fn cases() -> Vec<Case> {
    let mut v = vec![
        conv_case("conv3x3_1to8", 96, 96, 1, 8, 3, 1, 1, false),
        conv_case("conv3x3_16to16", 48, 48, 16, 16, 3, 1, 1, false),
        conv_case("conv3x3_32to32", 24, 24, 32, 32, 3, 1, 1, false),
        conv_case("conv3x3_16to16_bnrelu", 48, 48, 16, 16, 3, 1, 1, true),
        conv_case("conv3x3_s2_8to16", 96, 96, 8, 16, 3, 2, 1, false),
        conv_case("dw3x3_32", 24, 24, 32, 32, 3, 1, 32, false),
        conv_case("pw1x1_32to64", 24, 24, 32, 64, 1, 1, 1, false),
    ];
    let mut rng = Rng(12345);
    // Pools.
    {
        let (h, w, c) = (48, 48, 16);
        let input = MapRef::new(0, h, w, c);
        let win = Window::square(2, 2, 0);
        let output = MapRef::new(input.len(), h / 2, w / 2, c);
        let mut arena: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
        let q = PoolQuant {
            in_zp: -128,
            requant: None,
            out: OutputQuant::linear(-128),
        };
        v.push(Case {
            name: "maxpool2x2",
            shape: format!("{h}x{w}x{c} -> 24x24x{c}"),
            macs: (output.len() * 4) as u64,
            run: Box::new(move || {
                max_pool2d(black_box(&mut arena), input, output, &win, &q).unwrap()
            }),
        });
    }
    {
        let (h, w, c) = (24, 24, 32);
        let input = MapRef::new(0, h, w, c);
        let win = Window::square(2, 2, 0);
        let output = MapRef::new(input.len(), h / 2, w / 2, c);
        let mut arena: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
        let q = PoolQuant {
            in_zp: -20,
            requant: Some(Requant::from_real(0.9 / 4.0).unwrap()),
            out: OutputQuant::linear(-10),
        };
        v.push(Case {
            name: "avgpool2x2",
            shape: format!("{h}x{w}x{c} -> 12x12x{c}"),
            macs: (output.len() * 4) as u64,
            run: Box::new(move || {
                avg_pool2d(black_box(&mut arena), input, output, &win, &q).unwrap()
            }),
        });
    }
    {
        let (h, w, c) = (12, 12, 64);
        let input = MapRef::new(0, h, w, c);
        let output = MapRef::new(input.len(), 1, 1, c);
        let mut arena: Vec<i8> = (0..input.len() + output.len()).map(|_| rng.i8()).collect();
        let q = PoolQuant {
            in_zp: -20,
            requant: Some(Requant::from_real(1.3 / 144.0).unwrap()),
            out: OutputQuant::linear(3),
        };
        v.push(Case {
            name: "global_avg_pool",
            shape: format!("{h}x{w}x{c} -> 1x1x{c}"),
            macs: input.len() as u64,
            run: Box::new(move || {
                global_avg_pool(black_box(&mut arena), input, output, &q).unwrap()
            }),
        });
    }
    {
        let (i, o) = (64, 4);
        let input = MapRef::new(0, 1, 1, i);
        let output = MapRef::new(i, 1, 1, o);
        let mut arena: Vec<i8> = (0..i + o).map(|_| rng.i8()).collect();
        let weights: Vec<i8> = (0..i * o).map(|_| rng.w8()).collect();
        let bias = vec![100i32; o];
        let rq = vec![Requant::from_real(0.003).unwrap(); o];
        v.push(Case {
            name: "linear_64to4",
            shape: format!("{i} -> {o}"),
            macs: (i * o) as u64,
            run: Box::new(move || {
                linear(
                    black_box(&mut arena),
                    input,
                    output,
                    &weights,
                    &bias,
                    &rq,
                    OutputQuant::linear(0),
                )
                .unwrap()
            }),
        });
    }
    {
        let (h, w, c) = (24, 24, 32);
        let a = MapRef::new(0, h, w, c);
        let b = MapRef::new(a.len(), h, w, c);
        let mut arena: Vec<i8> = (0..2 * a.len()).map(|_| rng.i8()).collect();
        let p = AddParams::from_scales(0.05, -3, 0.07, 10, 0.09, OutputQuant::relu(-128)).unwrap();
        v.push(Case {
            name: "add_inplace",
            shape: format!("{h}x{w}x{c} (+)= {h}x{w}x{c}"),
            macs: a.len() as u64,
            run: Box::new(move || add(black_box(&mut arena), a, b, a, &p).unwrap()),
        });
    }
    {
        let (h, w) = (96, 96);
        let out = MapRef::new(0, h, w, 1);
        let mut arena = vec![0i8; out.len()];
        let pixels: Vec<u8> = (0..h * w).map(|_| rng.next() as u8).collect();
        let table: Vec<i8> = (0..256).map(|i| (i as i32 - 128) as i8).collect();
        v.push(Case {
            name: "quantize_pixels",
            shape: format!("{h}x{w}x1 gray"),
            macs: out.len() as u64,
            run: Box::new(move || {
                quantize_pixels(black_box(&pixels), black_box(&mut arena), out, &table).unwrap()
            }),
        });
    }
    v
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut all = cases();
    match args.first().map(String::as_str) {
        Some("list") => {
            for c in &all {
                println!("{} {}", c.name, c.macs);
            }
        }
        Some("run") => {
            let name = args.get(1).expect("run NAME ITERS");
            let iters: u64 = args.get(2).expect("run NAME ITERS").parse().unwrap();
            let c = all
                .iter_mut()
                .find(|c| c.name == name)
                .expect("unknown kernel");
            for _ in 0..iters {
                (c.run)();
            }
        }
        _ => {
            println!(
                "{:<24} {:<44} {:>10} {:>12} {:>10}",
                "kernel", "shape", "MACs", "median", "MAC/s"
            );
            for c in &mut all {
                // Calibrate to ~10 ms per sample, take the median of 15.
                (c.run)();
                let t0 = Instant::now();
                (c.run)();
                let one = t0.elapsed().as_secs_f64().max(1e-9);
                let reps = ((0.01 / one) as u64).clamp(1, 1_000_000);
                let mut samples: Vec<f64> = (0..15)
                    .map(|_| {
                        let t = Instant::now();
                        for _ in 0..reps {
                            (c.run)();
                        }
                        t.elapsed().as_secs_f64() / reps as f64
                    })
                    .collect();
                samples.sort_by(|a, b| a.partial_cmp(b).unwrap());
                let med = samples[samples.len() / 2];
                println!(
                    "{:<24} {:<44} {:>10} {:>9.1} us {:>8.2} G",
                    c.name,
                    c.shape,
                    c.macs,
                    med * 1e6,
                    c.macs as f64 / med / 1e9
                );
            }
        }
    }
}
