//! Training helpers shared by the demo's training programs (candle on CPU).
//!
//! Feature maps are kept **channel-major**, `[C, N, H, W]`, so that a
//! convolution is one large matrix product `W[O, C*k*k] x cols[C*k*k, N*H*W]`
//! (im2col) whose result is again `[O, N, H, W]`, and batch normalisation
//! reduces over one contiguous row per channel. On candle's CPU backend this
//! is several times faster than its direct convolution for these small
//! channel counts.
//!
//! Batch normalisation (Ioffe & Szegedy 2015) is implemented here with candle
//! ops: batch statistics while training, running mean and (unbiased)
//! variance updated with momentum 0.1, running statistics at evaluation.
//! The optimiser is candle-nn's AdamW (Adam, Kingma & Ba 2015, with
//! decoupled weight decay).

#![allow(dead_code)]

use anyhow::Result;
use candle_core::{DType, Device, Tensor, Var};
use ingot_compiler::frontend::TensorStore;
use ingot_demo::rng::Rng;

/// Batch-norm epsilon (the graph format's default).
pub const BN_EPS: f64 = 1e-5;
/// Running-statistics momentum.
pub const BN_MOMENTUM: f64 = 0.1;

/// Seeded parameter initialisation.
pub struct Init(pub Rng);

impl Init {
    /// He-normal convolution weight `[o, c, k, k]` (He et al. 2015).
    pub fn conv(&mut self, o: usize, c: usize, k: usize) -> Result<Var> {
        let std = (2.0 / (c * k * k) as f64).sqrt();
        let v: Vec<f32> = (0..o * c * k * k)
            .map(|_| (self.0.gaussish() * std) as f32)
            .collect();
        Ok(Var::from_tensor(&Tensor::from_vec(
            v,
            (o, c, k, k),
            &Device::Cpu,
        )?)?)
    }
    /// Uniform(+-1/sqrt(i)) linear weight `[o, i]`.
    pub fn linear(&mut self, o: usize, i: usize) -> Result<Var> {
        let b = 1.0 / (i as f64).sqrt();
        let v: Vec<f32> = (0..o * i).map(|_| self.0.range(-b, b) as f32).collect();
        Ok(Var::from_tensor(&Tensor::from_vec(
            v,
            (o, i),
            &Device::Cpu,
        )?)?)
    }
    /// A constant vector.
    pub fn constant(&mut self, n: usize, value: f32) -> Result<Var> {
        Ok(Var::from_tensor(&Tensor::from_vec(
            vec![value; n],
            n,
            &Device::Cpu,
        )?)?)
    }
}

/// Stride-1 convolution with square zero padding, on channel-major maps.
pub struct Conv {
    /// `[O, C, k, k]`.
    pub w: Var,
    /// `[O]`.
    pub b: Option<Var>,
    /// Zero padding on every side.
    pub pad: usize,
    /// Stride (both axes).
    pub stride: usize,
}

impl Conv {
    /// A convolution `c -> o` with a `k x k` kernel.
    pub fn new(
        init: &mut Init,
        c: usize,
        o: usize,
        k: usize,
        pad: usize,
        bias: bool,
    ) -> Result<Self> {
        Ok(Conv {
            w: init.conv(o, c, k)?,
            b: if bias {
                Some(init.constant(o, 0.0)?)
            } else {
                None
            },
            pad,
            stride: 1,
        })
    }

    /// The same convolution with stride `s`.
    pub fn with_stride(mut self, s: usize) -> Self {
        self.stride = s;
        self
    }

    /// `x` `[C, N, H, W]` to `[O, N, OH, OW]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (c, n, h, wd) = x.dims4()?;
        let (o, ci, kh, kw) = self.w.dims4()?;
        anyhow::ensure!(ci == c, "conv: weight has {ci} input channels, map has {c}");
        let p = self.pad;
        let (oh, ow) = (h + 2 * p + 1 - kh, wd + 2 * p + 1 - kw);
        let cols = if kh == 1 && kw == 1 && p == 0 {
            x.reshape((c, n * h * wd))?
        } else {
            let xp = if p > 0 {
                x.pad_with_zeros(2, p, p)?.pad_with_zeros(3, p, p)?
            } else {
                x.clone()
            };
            let mut taps = Vec::with_capacity(kh * kw);
            for ky in 0..kh {
                for kx in 0..kw {
                    taps.push(xp.narrow(2, ky, oh)?.narrow(3, kx, ow)?);
                }
            }
            // [C, k*k, N, OH, OW]: rows ordered (c, ky, kx) like the weight.
            Tensor::stack(&taps, 1)?.reshape((c * kh * kw, n * oh * ow))?
        };
        let y = self
            .w
            .as_tensor()
            .reshape((o, c * kh * kw))?
            .matmul(&cols)?;
        let y = match &self.b {
            Some(b) => y.broadcast_add(&b.as_tensor().reshape((o, 1))?)?,
            None => y,
        };
        let y = y.reshape((o, n, oh, ow))?;
        if self.stride == 1 {
            return Ok(y);
        }
        // A stride-s output is the stride-1 output at every s-th position
        // (same padding); computing all of it costs little on the thin
        // layers this is used for and keeps one im2col path.
        let s = self.stride;
        let pick = |len: usize| -> Result<Tensor> {
            let idx: Vec<u32> = (0..len).step_by(s).map(|i| i as u32).collect();
            let n = idx.len();
            Ok(Tensor::from_vec(idx, n, &Device::Cpu)?)
        };
        Ok(y.index_select(&pick(oh)?, 2)?.index_select(&pick(ow)?, 3)?)
    }

    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        let mut v = vec![self.w.clone()];
        v.extend(self.b.clone());
        v
    }

    /// Stores `{name}.weight` (and `{name}.bias`).
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())?;
        if let Some(b) = &self.b {
            put(store, &format!("{name}.bias"), b.as_tensor())?;
        }
        Ok(())
    }
}

/// Depthwise 3x3-style convolution (`groups == channels`: each channel is
/// filtered by its own `k x k` kernel) with square zero padding, on
/// channel-major maps; no bias (a batch norm follows).
pub struct DwConv {
    /// `[C, 1, k, k]`, the graph format's depthwise weight shape.
    pub w: Var,
    /// Zero padding on every side.
    pub pad: usize,
    /// Stride (both axes).
    pub stride: usize,
}

impl DwConv {
    /// A depthwise convolution over `c` channels, He-normal weights (fan-in `k * k`).
    pub fn new(init: &mut Init, c: usize, k: usize, pad: usize, stride: usize) -> Result<Self> {
        Ok(DwConv {
            w: init.conv(c, 1, k)?,
            pad,
            stride,
        })
    }

    /// `x` `[C, N, H, W]` to `[C, N, OH, OW]`: the `k * k` shifted (and, for
    /// stride `s`, subsampled) views of the padded map, weighted per channel
    /// and summed.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (c, n, h, wd) = x.dims4()?;
        let (o, one, kh, kw) = self.w.dims4()?;
        anyhow::ensure!(
            o == c && one == 1,
            "depthwise conv: weight [{o}, {one}, ..], map has {c} channels"
        );
        let (p, s) = (self.pad, self.stride);
        let (oh, ow) = ((h + 2 * p - kh) / s + 1, (wd + 2 * p - kw) / s + 1);
        let xp = if p > 0 {
            x.pad_with_zeros(2, p, p)?.pad_with_zeros(3, p, p)?
        } else {
            x.clone()
        };
        let pick = |first: usize, len: usize| -> Result<Tensor> {
            let idx: Vec<u32> = (0..len).map(|i| (first + i * s) as u32).collect();
            Ok(Tensor::from_vec(idx, len, &Device::Cpu)?)
        };
        let mut taps = Vec::with_capacity(kh * kw);
        for ky in 0..kh {
            let rows = if s == 1 {
                xp.narrow(2, ky, oh)?
            } else {
                xp.index_select(&pick(ky, oh)?, 2)?
            };
            for kx in 0..kw {
                taps.push(if s == 1 {
                    rows.narrow(3, kx, ow)?
                } else {
                    rows.index_select(&pick(kx, ow)?, 3)?
                });
            }
        }
        // [C, k*k, N*OH*OW] weighted by [C, k*k, 1], summed over the taps.
        let cols = Tensor::stack(&taps, 1)?.reshape((c, kh * kw, n * oh * ow))?;
        let w = self.w.as_tensor().reshape((c, kh * kw, 1))?;
        Ok(cols.broadcast_mul(&w)?.sum(1)?.reshape((c, n, oh, ow))?)
    }

    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        vec![self.w.clone()]
    }

    /// Stores `{name}.weight`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())
    }
}

/// Batch normalisation over the channels of channel-major maps.
pub struct Bn {
    /// Scale.
    pub gamma: Var,
    /// Shift.
    pub beta: Var,
    /// Running mean (not trained; updated in training passes).
    pub running_mean: Var,
    /// Running variance.
    pub running_var: Var,
}

impl Bn {
    /// A batch norm over `c` channels: scale 1, shift 0, running stats 0 / 1.
    pub fn new(init: &mut Init, c: usize) -> Result<Self> {
        Ok(Bn {
            gamma: init.constant(c, 1.0)?,
            beta: init.constant(c, 0.0)?,
            running_mean: init.constant(c, 0.0)?,
            running_var: init.constant(c, 1.0)?,
        })
    }

    /// `x` `[C, N, H, W]` (or `[C, N]`), normalised per channel.
    pub fn forward(&self, x: &Tensor, train: bool) -> Result<Tensor> {
        let dims = x.dims().to_vec();
        let c = dims[0];
        let xf = x.reshape((c, ()))?;
        let (xc, inv) = if train {
            let m = xf.dim(1)? as f64;
            let mean = xf.mean_keepdim(1)?;
            let xc = xf.broadcast_sub(&mean)?;
            let var = xc.sqr()?.mean_keepdim(1)?;
            let rm = ((self.running_mean.as_tensor().detach() * (1.0 - BN_MOMENTUM))?
                + (mean.detach().flatten_all()? * BN_MOMENTUM)?)?;
            let unbiased = (var.detach().flatten_all()? * (m / (m - 1.0).max(1.0)))?;
            let rv = ((self.running_var.as_tensor().detach() * (1.0 - BN_MOMENTUM))?
                + (unbiased * BN_MOMENTUM)?)?;
            self.running_mean.set(&rm)?;
            self.running_var.set(&rv)?;
            (xc, (var + BN_EPS)?.sqrt()?.recip()?)
        } else {
            let rm = self.running_mean.as_tensor().detach().reshape((c, 1))?;
            let rv = self.running_var.as_tensor().detach().reshape((c, 1))?;
            (xf.broadcast_sub(&rm)?, (rv + BN_EPS)?.sqrt()?.recip()?)
        };
        let scale = inv.broadcast_mul(&self.gamma.as_tensor().reshape((c, 1))?)?;
        let y = xc
            .broadcast_mul(&scale)?
            .broadcast_add(&self.beta.as_tensor().reshape((c, 1))?)?;
        Ok(y.reshape(dims)?)
    }

    /// Trainable tensors (not the running statistics).
    pub fn params(&self) -> Vec<Var> {
        vec![self.gamma.clone(), self.beta.clone()]
    }

    /// Stores `{name}.weight/.bias/.running_mean/.running_var`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.gamma.as_tensor())?;
        put(store, &format!("{name}.bias"), self.beta.as_tensor())?;
        put(
            store,
            &format!("{name}.running_mean"),
            self.running_mean.as_tensor(),
        )?;
        put(
            store,
            &format!("{name}.running_var"),
            self.running_var.as_tensor(),
        )?;
        Ok(())
    }
}

/// `relu(bn(x))`.
pub fn bn_relu(bn: &Bn, x: &Tensor, train: bool) -> Result<Tensor> {
    Ok(bn.forward(x, train)?.relu()?)
}

/// `min(max(x, 0), 6)` as `relu(x) - relu(x - 6)` (cheap to differentiate).
pub fn relu6(x: &Tensor) -> Result<Tensor> {
    Ok((x.relu()? - (x - 6.0)?.relu()?)?)
}

/// Fully connected layer on `[N, I]` rows.
pub struct Fc {
    /// `[O, I]`.
    pub w: Var,
    /// `[O]`.
    pub b: Var,
}

impl Fc {
    /// A linear layer `i -> o` with bias.
    pub fn new(init: &mut Init, i: usize, o: usize) -> Result<Self> {
        Ok(Fc {
            w: init.linear(o, i)?,
            b: init.constant(o, 0.0)?,
        })
    }
    /// `[N, I]` to `[N, O]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        Ok(x.matmul(&self.w.as_tensor().t()?)?
            .broadcast_add(self.b.as_tensor())?)
    }
    /// Trainable tensors.
    pub fn params(&self) -> Vec<Var> {
        vec![self.w.clone(), self.b.clone()]
    }
    /// Stores `{name}.weight` and `{name}.bias`.
    pub fn export(&self, store: &mut TensorStore, name: &str) -> Result<()> {
        put(store, &format!("{name}.weight"), self.w.as_tensor())?;
        put(store, &format!("{name}.bias"), self.b.as_tensor())?;
        Ok(())
    }
}

/// `[C, N, H, W]` to per-image `[N, C*H*W]` in C, H, W order (the graph
/// format's `flatten`).
pub fn flatten_chw(x: &Tensor) -> Result<Tensor> {
    let (c, n, h, w) = x.dims4()?;
    Ok(x.transpose(0, 1)?.contiguous()?.reshape((n, c * h * w))?)
}

/// `[C, N, H, W]` to `[N, C]` channel means (the graph format's `global_avg_pool`).
pub fn global_avg_pool(x: &Tensor) -> Result<Tensor> {
    let (c, n, h, w) = x.dims4()?;
    Ok(x.reshape((c, n, h * w))?.mean(2)?.t()?)
}

/// Images `[N, 1, H, W]` as a channel-major batch `[1, N, H, W]`.
pub fn images_to_cnhw(x: &Tensor) -> Result<Tensor> {
    let (n, c, h, w) = x.dims4()?;
    Ok(x.transpose(0, 1)?.contiguous()?.reshape((c, n, h, w))?)
}

fn put(store: &mut TensorStore, name: &str, t: &Tensor) -> Result<()> {
    let t = t.to_dtype(DType::F32)?;
    store.insert(name, t.dims().to_vec(), t.flatten_all()?.to_vec1::<f32>()?);
    Ok(())
}

/// Index of the largest value of each row of a `[N, K]` tensor.
pub fn argmax_rows(logits: &Tensor) -> Result<Vec<usize>> {
    let v = logits.to_vec2::<f32>()?;
    Ok(v.iter()
        .map(|r| {
            r.iter()
                .enumerate()
                .fold(
                    (0, f32::NEG_INFINITY),
                    |b, (i, &x)| if x > b.1 { (i, x) } else { b },
                )
                .0
        })
        .collect())
}

/// Learning rate of a cosine schedule with a short linear warm-up.
pub fn cosine_lr(base: f64, step: usize, total: usize, warmup: usize) -> f64 {
    if step < warmup {
        return base * (step + 1) as f64 / warmup as f64;
    }
    let t = (step - warmup) as f64 / (total - warmup).max(1) as f64;
    base * 0.5 * (1.0 + (std::f64::consts::PI * t).cos())
}

/// Mean and standard deviation of a list of values.
pub fn mean_std(values: &[f32]) -> (f32, f32) {
    let n = values.len() as f64;
    let mean = values.iter().map(|&v| v as f64).sum::<f64>() / n;
    let var = values
        .iter()
        .map(|&v| (v as f64 - mean).powi(2))
        .sum::<f64>()
        / n;
    (mean as f32, var.sqrt() as f32)
}

/// Per-class and overall accuracy lines.
pub fn report(labels: &[String], truth: &[usize], pred: &[usize]) -> (f64, Vec<f64>) {
    let k = labels.len();
    let mut hit = vec![0usize; k];
    let mut tot = vec![0usize; k];
    let mut confusion = vec![vec![0usize; k]; k];
    for (&t, &p) in truth.iter().zip(pred) {
        tot[t] += 1;
        confusion[t][p] += 1;
        if t == p {
            hit[t] += 1;
        }
    }
    let overall = hit.iter().sum::<usize>() as f64 / truth.len().max(1) as f64;
    let per: Vec<f64> = (0..k)
        .map(|c| hit[c] as f64 / tot[c].max(1) as f64)
        .collect();
    println!(
        "accuracy {:.2}% ({} / {})",
        100.0 * overall,
        hit.iter().sum::<usize>(),
        truth.len()
    );
    for c in 0..k {
        println!(
            "  {:>8}: {:6.2}% ({:3} / {:3})   predicted as {:?}",
            labels[c],
            100.0 * per[c],
            hit[c],
            tot[c],
            confusion[c]
        );
    }
    (overall, per)
}

/// Makes candle run on one thread unless `CANDLE_NUM_THREADS` or
/// `RAYON_NUM_THREADS` says otherwise. On a shared two-core machine its
/// spinning thread pool is slower than one thread; call this first in `main`.
pub fn default_single_thread() {
    if std::env::var_os("CANDLE_NUM_THREADS").is_none()
        && std::env::var_os("RAYON_NUM_THREADS").is_none()
    {
        std::env::set_var("CANDLE_NUM_THREADS", "1");
        std::env::set_var("RAYON_NUM_THREADS", "1");
    }
}

/// Compares candle's eval-mode logits (`[N, K]`, images in folder order)
/// with the compiler's f32 reference run on the exported graph over the
/// same folder tree; prints and returns the largest absolute difference.
pub fn compare_with_reference(
    graph: &std::path::Path,
    dir: &std::path::Path,
    candle_logits: &Tensor,
) -> Result<f32> {
    let acc = ingot_demo::reference_accuracy(graph, dir, usize::MAX)?;
    let ours = candle_logits.to_vec2::<f32>()?;
    anyhow::ensure!(
        ours.len() == acc.outputs.len(),
        "{} candle rows, {} reference outputs",
        ours.len(),
        acc.outputs.len()
    );
    let diff = ours
        .iter()
        .zip(&acc.outputs)
        .flat_map(|(a, b)| a.iter().zip(b).map(|(x, y)| (x - y).abs()))
        .fold(0.0f32, f32::max);
    println!(
        "f32 reference on the exported graph: accuracy {:.2}%; largest |candle - reference| logit difference over {} images: {diff:.2e}",
        100.0 * acc.overall(),
        ours.len()
    );
    Ok(diff)
}

/// The committed bracket evaluation set (`DIR/eval/CLASS/*.png`, classes
/// in `CLASSES` order): pixels (0..=255 as f32) and labels.
pub fn load_bracket_eval(dir: &std::path::Path) -> Result<(Vec<f32>, Vec<usize>)> {
    use ingot_demo::brackets::{CLASSES, SIZE};
    let (mut px, mut labels) = (Vec::new(), Vec::new());
    for (c, name) in CLASSES.iter().enumerate() {
        for p in ingot_demo::png_files(&dir.join("eval").join(name))? {
            let (w, h, bytes) = ingot_demo::read_gray(&p)?;
            anyhow::ensure!(
                (w as usize, h as usize) == (SIZE, SIZE),
                "{}: {w}x{h}",
                p.display()
            );
            px.extend(bytes.iter().map(|&b| b as f32));
            labels.push(c);
        }
    }
    Ok((px, labels))
}

/// Normalised `[n, 1, 64, 64]` bracket images from raw byte values.
pub fn bracket_input(bytes: &[f32], mean: f32, std: f32) -> Result<Tensor> {
    use ingot_demo::brackets::SIZE;
    let n = bytes.len() / (SIZE * SIZE);
    let v: Vec<f32> = bytes
        .iter()
        .map(|&b| (b * (1.0 / 255.0) - mean) / std)
        .collect();
    Ok(Tensor::from_vec(v, (n, 1, SIZE, SIZE), &Device::Cpu)?)
}

/// Eval-mode predictions and logits of `forward` over `x` `[N, ..]`, 50
/// images at a time.
pub fn predict(
    forward: impl Fn(&Tensor) -> Result<Tensor>,
    x: &Tensor,
) -> Result<(Vec<usize>, Tensor)> {
    let n = x.dim(0)?;
    let mut outs = Vec::new();
    for s in (0..n).step_by(50) {
        // Detached: a result keeps its whole autograd graph (every
        // activation of the pass) alive otherwise.
        outs.push(forward(&x.narrow(0, s, 50.min(n - s))?)?.detach());
    }
    let logits = Tensor::cat(&outs, 0)?;
    Ok((argmax_rows(&logits)?, logits))
}

/// The bracket training set (generated in memory from its own seed, never
/// the committed evaluation images), its normalisation and the committed
/// evaluation set, as both bracket trainers use them.
pub struct BracketSets {
    /// Training pixels, 0..=255 as f32, `SIZE * SIZE` per image.
    pub train_px: Vec<f32>,
    /// Training labels.
    pub train_y: Vec<u32>,
    /// Mean of the training pixels scaled to 0..=1 (rounded to 4 places).
    pub mean: f32,
    /// Their standard deviation (rounded to 4 places).
    pub std: f32,
    /// Normalised evaluation images `[N, 1, SIZE, SIZE]`.
    pub eval_x: Tensor,
    /// Evaluation labels.
    pub eval_y: Vec<usize>,
}

/// Generates `train` training images from `seed` and loads `DIR/eval`.
pub fn bracket_sets(train: usize, seed: u64, data: &std::path::Path) -> Result<BracketSets> {
    use ingot_demo::brackets::{render, train_sample, SIZE};
    let t = std::time::Instant::now();
    let mut train_px = Vec::with_capacity(train * SIZE * SIZE);
    let mut train_y = Vec::with_capacity(train);
    for i in 0..train {
        let (s, c) = train_sample(seed, i);
        train_px.extend(render(s, c).iter().map(|&b| b as f32));
        train_y.push(c as u32);
    }
    let scaled: Vec<f32> = train_px.iter().map(|&b| b * (1.0 / 255.0)).collect();
    let (mean, std) = mean_std(&scaled);
    // Round to values that read back identically from JSON.
    let (mean, std) = ((mean * 1e4).round() / 1e4, (std * 1e4).round() / 1e4);
    println!(
        "generated {train} training images (seed {seed}) in {:.1}s; mean {mean}, std {std}",
        t.elapsed().as_secs_f64()
    );
    let (eval_px, eval_y) = load_bracket_eval(data)?;
    let eval_x = bracket_input(&eval_px, mean, std)?;
    println!("eval set: {} images from {}", eval_y.len(), data.display());
    Ok(BracketSets {
        train_px,
        train_y,
        mean,
        std,
        eval_x,
        eval_y,
    })
}

/// How [`fit_brackets`] trains.
pub struct Fit {
    /// Epochs.
    pub epochs: usize,
    /// Images per step.
    pub batch: usize,
    /// Peak learning rate of the cosine schedule.
    pub lr: f64,
    /// Seed of the shuffling order.
    pub shuffle_seed: u64,
}

/// Trains `forward` (`train = true` for batch statistics) on the bracket
/// sets with AdamW (weight decay 1e-4) and a cosine schedule with half an
/// epoch of warm-up, printing progress and the evaluation accuracy after
/// every epoch.
pub fn fit_brackets(
    forward: impl Fn(&Tensor, bool) -> Result<Tensor>,
    params: Vec<Var>,
    sets: &BracketSets,
    fit: &Fit,
) -> Result<()> {
    use candle_nn::Optimizer;
    use ingot_demo::brackets::SIZE;
    let img_len = SIZE * SIZE;
    let n = sets.train_y.len();
    let count = params.iter().map(|v| v.elem_count()).sum::<usize>();
    println!(
        "{} parameter tensors, {count} trainable values",
        params.len()
    );
    let mut opt = candle_nn::AdamW::new(
        params,
        candle_nn::ParamsAdamW {
            lr: fit.lr,
            weight_decay: 1e-4,
            ..Default::default()
        },
    )?;
    let steps_per_epoch = n / fit.batch;
    let total = steps_per_epoch * fit.epochs;
    let mut rng = Rng::new(fit.shuffle_seed);
    let mut order: Vec<usize> = (0..n).collect();
    let mut step = 0;
    let t_train = std::time::Instant::now();
    for epoch in 0..fit.epochs {
        rng.shuffle(&mut order);
        let (mut loss_sum, mut hits) = (0.0f64, 0usize);
        let t_epoch = std::time::Instant::now();
        for b in 0..steps_per_epoch {
            let idx = &order[b * fit.batch..(b + 1) * fit.batch];
            let mut px = Vec::with_capacity(fit.batch * img_len);
            for &i in idx {
                px.extend_from_slice(&sets.train_px[i * img_len..(i + 1) * img_len]);
            }
            let x = bracket_input(&px, sets.mean, sets.std)?;
            let y = Tensor::from_vec(
                idx.iter().map(|&i| sets.train_y[i]).collect::<Vec<u32>>(),
                fit.batch,
                &Device::Cpu,
            )?;
            let logits = forward(&x, true)?;
            let loss = candle_nn::loss::cross_entropy(&logits, &y)?;
            opt.set_learning_rate(cosine_lr(fit.lr, step, total, steps_per_epoch / 2));
            opt.backward_step(&loss)?;
            loss_sum += loss.to_scalar::<f32>()? as f64;
            hits += argmax_rows(&logits)?
                .iter()
                .zip(idx)
                .filter(|(p, &i)| **p as u32 == sets.train_y[i])
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
        let (pred, _) = predict(|x| forward(x, false), &sets.eval_x)?;
        let acc = pred
            .iter()
            .zip(&sets.eval_y)
            .filter(|(p, t)| p == t)
            .count() as f64
            / sets.eval_y.len() as f64;
        println!(
            "epoch {}: loss {:.4}, train acc {:.2}%, eval acc {:.2}%, {:.0}s",
            epoch + 1,
            loss_sum / steps_per_epoch as f64,
            100.0 * hits as f64 / (steps_per_epoch * fit.batch) as f64,
            100.0 * acc,
            t_epoch.elapsed().as_secs_f64()
        );
    }
    println!(
        "training took {:.0}s ({} epochs of {} images)",
        t_train.elapsed().as_secs_f64(),
        fit.epochs,
        steps_per_epoch * fit.batch
    );
    Ok(())
}

/// Prints the float network's evaluation report and, with `export`, writes
/// `OUT/STEM.graph.json` and its weights (the file the graph names), loads
/// them back and checks that the compiler's float reference reproduces
/// candle's evaluation logits.
pub fn report_and_export(
    forward: impl Fn(&Tensor) -> Result<Tensor>,
    sets: &BracketSets,
    data: &std::path::Path,
    export: Option<(
        ingot_compiler::frontend::GraphFile,
        TensorStore,
        &std::path::Path,
        &str,
    )>,
) -> Result<()> {
    let labels: Vec<String> = ingot_demo::brackets::CLASSES
        .iter()
        .map(|s| s.to_string())
        .collect();
    let (pred, logits) = predict(forward, &sets.eval_x)?;
    println!("float (candle, eval mode) on the committed eval set:");
    report(&labels, &sets.eval_y, &pred);
    let Some((graph, store, out, stem)) = export else {
        return Ok(());
    };
    std::fs::create_dir_all(out)?;
    let gpath = out.join(format!("{stem}.graph.json"));
    store.save(&out.join(&graph.weights))?;
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
    let diff = compare_with_reference(&gpath, &data.join("eval"), &logits)?;
    anyhow::ensure!(
        diff < 1e-3,
        "the exported graph does not reproduce candle's outputs"
    );
    Ok(())
}

/// The graph file of a bracket classifier: 64×64 gray input normalised
/// with the training set's `mean` and `std`, the four classes, `fc` the
/// output layer.
pub fn bracket_graph(
    name: &str,
    weights: String,
    layers: Vec<ingot_compiler::frontend::LayerFile>,
    mean: f32,
    std: f32,
) -> ingot_compiler::frontend::GraphFile {
    use ingot_demo::brackets::{CLASSES, SIZE};
    ingot_compiler::frontend::GraphFile {
        format: ingot_compiler::frontend::FORMAT_V1.into(),
        name: name.into(),
        weights,
        input: ingot_compiler::frontend::InputFile {
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
    }
}
