//! Trains the demo network on freshly generated (invented) bracket images
//! and exports it as `ingot.graph.v1` + F32 safetensors.
//!
//! ```text
//! cargo run -p ingot-demo --example train_brackets --release
//! ```
//!
//! The network is a small densely connected CNN (Huang et al. 2017,
//! "Densely Connected Convolutional Networks"): a 3x3 stride-2 stem
//! convolution (1->16), two dense blocks of four BN-ReLU-conv3x3 layers with growth rate
//! 8 (16->48 and 24->56 channels), a BN-ReLU-conv1x1 transition with
//! compression 0.5 and 2x2 average pooling between them, then BN-ReLU,
//! global average pooling and a linear layer to the four classes.
//!
//! Options: `--train N` (training images, default 3200), `--epochs N`
//! (default 10), `--batch N` (default 16), `--lr X` (default 0.004),
//! `--seed N` (training-set seed), `--data DIR` (committed sets),
//! `--out DIR` (model folder), `--init FILE` (start from an exported
//! `brackets.safetensors` instead of the seeded initialisation, to continue
//! training), `--no-export`.

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

const GROWTH: usize = 8;
const LAYERS_PER_BLOCK: usize = 4;
const STEM: usize = 16;
/// The stem halves the resolution: block 1 runs at 32x32, a quarter of the
/// work and RAM of full resolution, and the smallest defects (pits of
/// radius 1.5 px) still span a stem output pixel.
const STEM_STRIDE: usize = 2;

struct DenseLayer {
    bn: Bn,
    conv: Conv,
}

struct Net {
    stem: Conv,
    blocks: [Vec<DenseLayer>; 2],
    trans_bn: Bn,
    trans_conv: Conv,
    final_bn: Bn,
    fc: Fc,
}

fn block(init: &mut Init, c0: usize) -> Result<Vec<DenseLayer>> {
    (0..LAYERS_PER_BLOCK)
        .map(|k| {
            let c = c0 + k * GROWTH;
            Ok(DenseLayer {
                bn: Bn::new(init, c)?,
                conv: Conv::new(init, c, GROWTH, 3, 1, false)?,
            })
        })
        .collect()
}

/// Channel counts: block 1 in/out, block 2 in/out.
const B1_OUT: usize = STEM + LAYERS_PER_BLOCK * GROWTH; // 48
const B2_IN: usize = B1_OUT / 2; // 24
const B2_OUT: usize = B2_IN + LAYERS_PER_BLOCK * GROWTH; // 56

impl Net {
    fn new(seed: u64) -> Result<Self> {
        let mut init = Init(Rng::new(seed));
        let init = &mut init;
        Ok(Net {
            stem: Conv::new(init, 1, STEM, 3, 1, true)?.with_stride(STEM_STRIDE),
            blocks: [block(init, STEM)?, block(init, B2_IN)?],
            trans_bn: Bn::new(init, B1_OUT)?,
            trans_conv: Conv::new(init, B1_OUT, B2_IN, 1, 0, false)?,
            final_bn: Bn::new(init, B2_OUT)?,
            fc: Fc::new(init, B2_OUT, CLASSES.len())?,
        })
    }

    fn params(&self) -> Vec<Var> {
        let mut v = self.stem.params();
        for l in self.blocks.iter().flatten() {
            v.extend(l.bn.params());
            v.extend(l.conv.params());
        }
        v.extend(self.trans_bn.params());
        v.extend(self.trans_conv.params());
        v.extend(self.final_bn.params());
        v.extend(self.fc.params());
        v
    }

    /// Every tensor (trainable or not) under its exported name.
    fn named_vars(&self) -> Vec<(String, Var)> {
        let mut v = Vec::new();
        let conv = |v: &mut Vec<(String, Var)>, n: &str, c: &Conv| {
            v.push((format!("{n}.weight"), c.w.clone()));
            if let Some(b) = &c.b {
                v.push((format!("{n}.bias"), b.clone()));
            }
        };
        let bn = |v: &mut Vec<(String, Var)>, n: &str, b: &Bn| {
            v.push((format!("{n}.weight"), b.gamma.clone()));
            v.push((format!("{n}.bias"), b.beta.clone()));
            v.push((format!("{n}.running_mean"), b.running_mean.clone()));
            v.push((format!("{n}.running_var"), b.running_var.clone()));
        };
        conv(&mut v, "stem", &self.stem);
        for (bi, blk) in self.blocks.iter().enumerate() {
            for (k, l) in blk.iter().enumerate() {
                bn(&mut v, &format!("b{}.l{k}.bn", bi + 1), &l.bn);
                conv(&mut v, &format!("b{}.l{k}.conv", bi + 1), &l.conv);
            }
        }
        bn(&mut v, "t1.bn", &self.trans_bn);
        conv(&mut v, "t1.conv", &self.trans_conv);
        bn(&mut v, "final.bn", &self.final_bn);
        v.push(("fc.weight".into(), self.fc.w.clone()));
        v.push(("fc.bias".into(), self.fc.b.clone()));
        v
    }

    /// Starts from an exported weights file instead of the seeded init.
    fn load(&self, path: &std::path::Path) -> Result<()> {
        let store = TensorStore::load(path).map_err(|e| anyhow::anyhow!("{e}"))?;
        for (name, var) in self.named_vars() {
            let t = store
                .tensors
                .get(&name)
                .with_context(|| format!("{}: no tensor `{name}`", path.display()))?;
            var.set(&Tensor::from_vec(
                t.data.clone(),
                t.shape.as_slice(),
                &Device::Cpu,
            )?)?;
        }
        Ok(())
    }

    fn dense_block(layers: &[DenseLayer], x0: Tensor, train: bool) -> Result<Tensor> {
        let mut feats = vec![x0];
        for l in layers {
            let inp = if feats.len() == 1 {
                feats[0].clone()
            } else {
                Tensor::cat(&feats, 0)?
            };
            let h = l.conv.forward(&bn_relu(&l.bn, &inp, train)?)?;
            feats.push(h);
        }
        Ok(Tensor::cat(&feats, 0)?)
    }

    /// Images `[N, 1, 64, 64]` to logits `[N, 4]`.
    fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let x = images_to_cnhw(x)?;
        let x0 = self.stem.forward(&x)?;
        let b1 = Self::dense_block(&self.blocks[0], x0, train)?;
        let t = self
            .trans_conv
            .forward(&bn_relu(&self.trans_bn, &b1, train)?)?
            .avg_pool2d(2)?;
        let b2 = Self::dense_block(&self.blocks[1], t, train)?;
        let f = global_avg_pool(&bn_relu(&self.final_bn, &b2, train)?)?;
        self.fc.forward(&f)
    }

    /// Graph layers and tensors, mirroring `forward` op for op.
    fn export(&self, mean: f32, std: f32) -> Result<(GraphFile, TensorStore)> {
        let mut store = TensorStore::new("brackets.safetensors");
        let mut layers = Vec::new();
        self.stem.export(&mut store, "stem")?;
        layers.push(LayerFile::conv2d("stem", "image", true, STEM_STRIDE, 1));
        let mut x0 = "stem".to_string();
        for (bi, blk) in self.blocks.iter().enumerate() {
            let b = format!("b{}", bi + 1);
            let mut feats = vec![x0.clone()];
            for (k, l) in blk.iter().enumerate() {
                let inp = if feats.len() == 1 {
                    feats[0].clone()
                } else {
                    let name = format!("{b}.cat{k}");
                    let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
                    layers.push(LayerFile::multi(&name, "concat", &refs));
                    name
                };
                let (bn_name, relu_name, conv_name) = (
                    format!("{b}.l{k}.bn"),
                    format!("{b}.l{k}.relu"),
                    format!("{b}.l{k}.conv"),
                );
                l.bn.export(&mut store, &bn_name)?;
                l.conv.export(&mut store, &conv_name)?;
                layers.push(LayerFile::batch_norm(&bn_name, &inp));
                layers.push(LayerFile::new(&relu_name, "relu", &bn_name));
                layers.push(LayerFile::conv2d(&conv_name, &relu_name, false, 1, 1));
                feats.push(conv_name);
            }
            let out = format!("{b}.cat{LAYERS_PER_BLOCK}");
            let refs: Vec<&str> = feats.iter().map(String::as_str).collect();
            layers.push(LayerFile::multi(&out, "concat", &refs));
            if bi == 0 {
                self.trans_bn.export(&mut store, "t1.bn")?;
                self.trans_conv.export(&mut store, "t1.conv")?;
                layers.push(LayerFile::batch_norm("t1.bn", &out));
                layers.push(LayerFile::new("t1.relu", "relu", "t1.bn"));
                layers.push(LayerFile::conv2d("t1.conv", "t1.relu", false, 1, 0));
                layers.push(LayerFile::pool("t1.pool", "avg_pool2d", "t1.conv", 2, 2));
                x0 = "t1.pool".into();
            } else {
                x0 = out;
            }
        }
        self.final_bn.export(&mut store, "final.bn")?;
        self.fc.export(&mut store, "fc")?;
        layers.push(LayerFile::batch_norm("final.bn", &x0));
        layers.push(LayerFile::new("final.relu", "relu", "final.bn"));
        layers.push(LayerFile::new("gap", "global_avg_pool", "final.relu"));
        layers.push(LayerFile::linear("fc", "gap", true));
        let graph = GraphFile {
            format: FORMAT_V1.into(),
            name: "brackets".into(),
            weights: "brackets.safetensors".into(),
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
    data: PathBuf,
    out: PathBuf,
    init: Option<PathBuf>,
    export: bool,
}

fn args() -> Result<Args> {
    let dir = ingot_demo::crate_dir();
    let mut a = Args {
        train: 3200,
        epochs: 10,
        batch: 16,
        lr: 4e-3,
        seed: TRAIN_SEED,
        data: dir.join("data"),
        out: dir.join("model"),
        init: None,
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
            "--data" => a.data = v()?.into(),
            "--out" => a.out = v()?.into(),
            "--init" => a.init = Some(v()?.into()),
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

    // Training set, generated in memory from its own seed.
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

    let net = Net::new(a.seed ^ 0x5EED)?;
    if let Some(p) = &a.init {
        net.load(p)?;
        println!("starting from {}", p.display());
    }
    let trainable = net.params();
    let params = trainable.iter().map(|v| v.elem_count()).sum::<usize>();
    println!(
        "{} parameter tensors, {params} trainable values",
        trainable.len()
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
    let mut rng = Rng::new(a.seed ^ 0xBA7C4);
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
            if step % 20 == 0 {
                println!(
                    "  step {step}/{total}: mean loss {:.4} over this epoch, {:.0}s",
                    loss_sum / (b + 1) as f64,
                    t_epoch.elapsed().as_secs_f64()
                );
            }
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
        let (graph, store) = net.export(mean, std)?;
        std::fs::create_dir_all(&a.out)?;
        let gpath = a.out.join("brackets.graph.json");
        store.save(&a.out.join("brackets.safetensors"))?;
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
