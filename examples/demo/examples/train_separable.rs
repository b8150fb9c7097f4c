//! Trains a depthwise-separable network (Howard et al. 2017, "MobileNets")
//! on freshly generated (invented) bracket images and exports it as
//! `ingot.graph.v1` + F32 safetensors.
//!
//! ```text
//! cargo run -p ingot-demo --example train_separable --release
//! ```
//!
//! The layout is the first seven rows of Howard et al. 2017, Table 1, at
//! width 0.25, on the 64x64 gray input: a 3x3 stride-2 stem convolution
//! (1->8) - BN - ReLU, then six depthwise-separable pairs, each a depthwise
//! 3x3 (`groups == channels`) - BN - ReLU and a pointwise 1x1 - BN - ReLU,
//! with pointwise widths 16, 32, 32, 64, 64, 128 and stride 2 in the
//! depthwise layers of pairs 2, 4 and 6 (32x32 -> 16x16 -> 8x8 -> 4x4);
//! global average pooling and a linear layer to the four classes. No
//! convolution has a bias (the batch norms carry it). The paper's ReLU6 is
//! `--act relu6`; the committed model uses ReLU (measured both ways; the
//! demo README says why).
//!
//! Options: `--train N` (training images, default 3200), `--epochs N`
//! (default 12), `--batch N` (default 16), `--lr X` (default 0.004),
//! `--seed N` (training-set seed), `--act relu6|relu` (the activation
//! after every batch norm, default relu), `--data DIR` (committed sets),
//! `--out DIR` (model folder), `--name NAME` (file stem and graph name,
//! default `separable`), `--no-export`.

mod common;

use anyhow::{bail, Context, Result};
use candle_core::{Device, Tensor, Var};
use candle_nn::{Optimizer, ParamsAdamW};
use common::*;
use ingot_compiler::frontend::{GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use ingot_demo::brackets::{render, train_sample, CLASSES, SIZE, TRAIN_SEED};
use ingot_demo::rng::Rng;
use std::path::PathBuf;
use std::time::Instant;

/// Stem output channels (Howard et al.'s 32 at width 0.25).
const STEM: usize = 8;
/// One pair per entry: (pointwise output channels, depthwise stride); Table
/// 1's 64, 128/2, 128, 256/2, 256, 512/2 at width 0.25.
const PAIRS: [(usize, usize); 6] = [(16, 1), (32, 2), (32, 1), (64, 2), (64, 1), (128, 2)];

#[derive(Clone, Copy, PartialEq)]
enum Act {
    Relu6,
    Relu,
}

impl Act {
    fn op(self) -> &'static str {
        match self {
            Act::Relu6 => "relu6",
            Act::Relu => "relu",
        }
    }
    fn apply(self, x: &Tensor) -> Result<Tensor> {
        match self {
            Act::Relu6 => relu6(x),
            Act::Relu => Ok(x.relu()?),
        }
    }
}

struct Pair {
    dw: DwConv,
    dw_bn: Bn,
    pw: Conv,
    pw_bn: Bn,
}

struct Net {
    act: Act,
    stem: Conv,
    stem_bn: Bn,
    pairs: Vec<Pair>,
    fc: Fc,
}

impl Net {
    fn new(seed: u64, act: Act) -> Result<Self> {
        let mut init = Init(Rng::new(seed));
        let i = &mut init;
        let stem = Conv::new(i, 1, STEM, 3, 1, false)?.with_stride(2);
        let stem_bn = Bn::new(i, STEM)?;
        let mut pairs = Vec::new();
        let mut c = STEM;
        for &(out, stride) in &PAIRS {
            pairs.push(Pair {
                dw: DwConv::new(i, c, 3, 1, stride)?,
                dw_bn: Bn::new(i, c)?,
                pw: Conv::new(i, c, out, 1, 0, false)?,
                pw_bn: Bn::new(i, out)?,
            });
            c = out;
        }
        Ok(Net {
            act,
            stem,
            stem_bn,
            pairs,
            fc: Fc::new(i, c, CLASSES.len())?,
        })
    }

    fn params(&self) -> Vec<Var> {
        let mut v = self.stem.params();
        v.extend(self.stem_bn.params());
        for p in &self.pairs {
            v.extend(p.dw.params());
            v.extend(p.dw_bn.params());
            v.extend(p.pw.params());
            v.extend(p.pw_bn.params());
        }
        v.extend(self.fc.params());
        v
    }

    /// Images `[N, 1, 64, 64]` to logits `[N, 4]`.
    fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let bn_act =
            |bn: &Bn, x: &Tensor| -> Result<Tensor> { self.act.apply(&bn.forward(x, train)?) };
        let x = images_to_cnhw(x)?;
        let mut x = bn_act(&self.stem_bn, &self.stem.forward(&x)?)?;
        for p in &self.pairs {
            let y = bn_act(&p.dw_bn, &p.dw.forward(&x)?)?;
            x = bn_act(&p.pw_bn, &p.pw.forward(&y)?)?;
        }
        self.fc.forward(&global_avg_pool(&x)?)
    }

    /// Graph layers and tensors, mirroring `forward` op for op; layer names
    /// follow the zoo's `depthwise_separable`.
    fn export(&self, name: &str, mean: f32, std: f32) -> Result<(GraphFile, TensorStore)> {
        let weights = format!("{name}.safetensors");
        let mut store = TensorStore::new(&weights);
        let act = self.act.op();
        let mut layers = Vec::new();
        self.stem.export(&mut store, "stem.conv")?;
        self.stem_bn.export(&mut store, "stem.bn")?;
        layers.push(LayerFile::conv2d("stem.conv", "image", false, 2, 1));
        layers.push(LayerFile::batch_norm("stem.bn", "stem.conv"));
        layers.push(LayerFile::new("stem.relu", act, "stem.bn"));
        let mut x = "stem.relu".to_string();
        for (i, p) in self.pairs.iter().enumerate() {
            let b = format!("block{}", i + 1);
            let n = |s: &str| format!("{b}.{s}");
            let c = p.dw.w.dims4()?.0;
            p.dw.export(&mut store, &n("dw"))?;
            p.dw_bn.export(&mut store, &n("dw_bn"))?;
            p.pw.export(&mut store, &n("pw"))?;
            p.pw_bn.export(&mut store, &n("pw_bn"))?;
            layers.push(LayerFile::conv2d(&n("dw"), &x, false, p.dw.stride, 1).attr("groups", c));
            layers.push(LayerFile::batch_norm(&n("dw_bn"), &n("dw")));
            layers.push(LayerFile::new(n("dw_relu"), act, n("dw_bn")));
            layers.push(LayerFile::conv2d(&n("pw"), &n("dw_relu"), false, 1, 0));
            layers.push(LayerFile::batch_norm(&n("pw_bn"), &n("pw")));
            layers.push(LayerFile::new(n("pw_relu"), act, n("pw_bn")));
            x = n("pw_relu");
        }
        self.fc.export(&mut store, "fc")?;
        layers.push(LayerFile::new("pool", "global_avg_pool", &x));
        layers.push(LayerFile::linear("fc", "pool", true));
        let graph = GraphFile {
            format: FORMAT_V1.into(),
            name: name.into(),
            weights,
            input: InputFile {
                name: "image".into(),
                shape: vec![1, SIZE, SIZE],
                pixel_scale: Some(1.0 / 255.0),
                mean: Some(vec![mean]),
                std: Some(vec![std]),
                color: Some("gray".into()),
            },
            labels: Some(CLASSES.iter().map(|s| s.to_string()).collect()),
            layers,
            output: "fc".into(),
        };
        Ok((graph, store))
    }
}

struct Args {
    train: usize,
    epochs: usize,
    batch: usize,
    lr: f64,
    seed: u64,
    act: Act,
    data: PathBuf,
    out: PathBuf,
    name: String,
    export: bool,
}

fn args() -> Result<Args> {
    let dir = ingot_demo::crate_dir();
    let mut a = Args {
        train: 3200,
        epochs: 12,
        batch: 16,
        lr: 4e-3,
        seed: TRAIN_SEED,
        act: Act::Relu,
        data: dir.join("data"),
        out: dir.join("model"),
        name: "separable".into(),
        export: true,
    };
    let mut it = std::env::args().skip(1);
    while let Some(k) = it.next() {
        let mut v = || it.next().with_context(|| format!("{k} needs a value"));
        match k.as_str() {
            "--train" => a.train = v()?.parse()?,
            "--epochs" => a.epochs = v()?.parse()?,
            "--batch" => a.batch = v()?.parse()?,
            "--lr" => a.lr = v()?.parse()?,
            "--seed" => a.seed = v()?.parse()?,
            "--act" => {
                a.act = match v()?.as_str() {
                    "relu6" => Act::Relu6,
                    "relu" => Act::Relu,
                    other => bail!("--act takes relu6 or relu, not `{other}`"),
                }
            }
            "--data" => a.data = v()?.into(),
            "--out" => a.out = v()?.into(),
            "--name" => a.name = v()?,
            "--no-export" => a.export = false,
            other => bail!("unknown argument `{other}`"),
        }
    }
    Ok(a)
}

fn main() -> Result<()> {
    default_single_thread();
    let a = args()?;
    let t_start = Instant::now();
    let img_len = SIZE * SIZE;

    // Training set, generated in memory from its own seed (never the
    // committed evaluation images).
    let mut train_px = Vec::with_capacity(a.train * img_len);
    let mut train_y = Vec::with_capacity(a.train);
    for i in 0..a.train {
        let (s, c) = train_sample(a.seed, i);
        train_px.extend(render(s, c).iter().map(|&b| b as f32));
        train_y.push(c as u32);
    }
    let scaled: Vec<f32> = train_px.iter().map(|&b| b * (1.0 / 255.0)).collect();
    let (mean, std) = mean_std(&scaled);
    // Round to values that read back identically from JSON.
    let (mean, std) = ((mean * 1e4).round() / 1e4, (std * 1e4).round() / 1e4);
    println!(
        "generated {} training images (seed {}) in {:.1}s; mean {mean}, std {std}",
        a.train,
        a.seed,
        t_start.elapsed().as_secs_f64()
    );
    let (eval_px, eval_y) = load_bracket_eval(&a.data)?;
    let eval_x = bracket_input(&eval_px, mean, std)?;
    println!(
        "eval set: {} images from {}",
        eval_y.len(),
        a.data.display()
    );

    let net = Net::new(a.seed ^ 0xD5C0, a.act)?;
    let trainable = net.params();
    let params = trainable.iter().map(|v| v.elem_count()).sum::<usize>();
    println!(
        "{} parameter tensors, {params} trainable values, activation {}",
        trainable.len(),
        a.act.op()
    );
    let mut opt = candle_nn::AdamW::new(
        trainable,
        ParamsAdamW {
            lr: a.lr,
            weight_decay: 1e-4,
            ..Default::default()
        },
    )?;

    let steps_per_epoch = a.train / a.batch;
    let total = steps_per_epoch * a.epochs;
    let mut rng = Rng::new(a.seed ^ 0x5E9A);
    let mut order: Vec<usize> = (0..a.train).collect();
    let mut step = 0;
    let t_train = Instant::now();
    for epoch in 0..a.epochs {
        rng.shuffle(&mut order);
        let (mut loss_sum, mut hits) = (0.0f64, 0usize);
        let t_epoch = Instant::now();
        for b in 0..steps_per_epoch {
            let idx = &order[b * a.batch..(b + 1) * a.batch];
            let mut px = Vec::with_capacity(a.batch * img_len);
            for &i in idx {
                px.extend_from_slice(&train_px[i * img_len..(i + 1) * img_len]);
            }
            let x = bracket_input(&px, mean, std)?;
            let y = Tensor::from_vec(
                idx.iter().map(|&i| train_y[i]).collect::<Vec<u32>>(),
                a.batch,
                &Device::Cpu,
            )?;
            let logits = net.forward(&x, true)?;
            let loss = candle_nn::loss::cross_entropy(&logits, &y)?;
            opt.set_learning_rate(cosine_lr(a.lr, step, total, steps_per_epoch / 2));
            opt.backward_step(&loss)?;
            loss_sum += loss.to_scalar::<f32>()? as f64;
            hits += argmax_rows(&logits)?
                .iter()
                .zip(idx)
                .filter(|(p, &i)| **p as u32 == train_y[i])
                .count();
            step += 1;
        }
        let (pred, _) = predict(|x| net.forward(x, false), &eval_x)?;
        let acc =
            pred.iter().zip(&eval_y).filter(|(p, t)| p == t).count() as f64 / eval_y.len() as f64;
        println!(
            "epoch {}: loss {:.4}, train acc {:.2}%, eval acc {:.2}%, {:.0}s",
            epoch + 1,
            loss_sum / steps_per_epoch as f64,
            100.0 * hits as f64 / (steps_per_epoch * a.batch) as f64,
            100.0 * acc,
            t_epoch.elapsed().as_secs_f64()
        );
    }
    let train_secs = t_train.elapsed().as_secs_f64();
    println!(
        "training took {train_secs:.0}s ({} epochs of {} images)",
        a.epochs,
        steps_per_epoch * a.batch
    );

    let labels: Vec<String> = CLASSES.iter().map(|s| s.to_string()).collect();
    let (pred, logits) = predict(|x| net.forward(x, false), &eval_x)?;
    println!("float (candle, eval mode) on the committed eval set:");
    report(&labels, &eval_y, &pred);

    if a.export {
        let (graph, store) = net.export(&a.name, mean, std)?;
        std::fs::create_dir_all(&a.out)?;
        let gpath = a.out.join(format!("{}.graph.json", a.name));
        store.save(&a.out.join(&graph.weights))?;
        std::fs::write(&gpath, serde_json::to_string_pretty(&graph)? + "\n")?;
        let g = ingot_compiler::frontend::load(&gpath)
            .map_err(|e| anyhow::anyhow!("exported graph does not load: {e}"))?;
        println!(
            "exported {} ({} layers) and its weights; it loads and validates",
            gpath.display(),
            g.layers().len()
        );
        let first: Vec<f32> = logits.get(0)?.to_vec1()?;
        println!("eval-mode logits of eval/ok/0000.png: {first:?}");
        let diff = compare_with_reference(&gpath, &a.data.join("eval"), &logits)?;
        anyhow::ensure!(
            diff < 1e-3,
            "the exported graph does not reproduce candle's outputs"
        );
    }
    println!("total time {:.0}s", t_start.elapsed().as_secs_f64());
    Ok(())
}
