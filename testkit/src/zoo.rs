//! The project's test networks, built in code with deterministic random
//! weights.
//!
//! Every builder returns a [`Net`]: a [`GraphFile`] (what would be written as
//! `*.graph.json`) and a [`TensorStore`] (what would be written as
//! `*.safetensors`). [`Net::build`] validates the pair into a checked
//! [`Graph`]; [`Net::write`] puts both files in a folder so that tests can
//! exercise the real loader.
//!
//! Weights come from a seeded splitmix64 generator (Steele, Lea & Flood 2014,
//! "Fast splittable pseudorandom number generators"), so the same seed gives
//! bit-identical files on every machine. Convolution weights are drawn from
//! `N(0, 2 / fan_in)` (He et al. 2015, "Delving deep into rectifiers"), which
//! keeps the scale of activations roughly constant through ReLU layers;
//! batch-norm layers get running statistics near the identity (mean in
//! ±0.1, variance in [0.5, 1.5], scale in [0.8, 1.2], shift in ±0.1), so
//! float activations stay in a sane range even in DenseNet-121.
//!
//! Tensor and layer names follow the dotted module paths that training
//! frameworks export (`features.denseblock1.denselayer1.conv1.weight`), and
//! dense blocks are written the way those frameworks trace them: dense layer
//! `k` reads a `concat` of *all* earlier maps of its block, one `concat`
//! layer per dense layer.

use ingot_compiler::frontend::{self, GraphFile, InputFile, LayerFile, TensorStore, FORMAT_V1};
use ingot_compiler::graph::shape::window_output;
use ingot_compiler::graph::{Graph, Padding, Shape};
use ingot_compiler::ranges::{MapRange, Ranges};
use ingot_compiler::reference::Reference;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// A small deterministic generator: splitmix64 (Steele, Lea & Flood 2014).
#[derive(Debug, Clone)]
pub struct Rng(u64);

impl Rng {
    /// A generator started from `seed`.
    pub fn new(seed: u64) -> Self {
        Rng(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `[0, 1)`, with 24 random bits.
    pub fn uniform(&mut self) -> f32 {
        (self.next_u64() >> 40) as f32 / (1u64 << 24) as f32
    }

    /// Uniform in `[lo, hi)`.
    pub fn range(&mut self, lo: f32, hi: f32) -> f32 {
        lo + (hi - lo) * self.uniform()
    }

    /// Standard normal, by the Box-Muller transform.
    pub fn normal(&mut self) -> f32 {
        let u1 = ((self.next_u64() >> 11) as f64 + 1.0) / (1u64 << 53) as f64; // (0, 1]
        let u2 = (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
        ((-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()) as f32
    }

    /// `n` values uniform in `[lo, hi)`.
    pub fn uniform_vec(&mut self, n: usize, lo: f32, hi: f32) -> Vec<f32> {
        (0..n).map(|_| self.range(lo, hi)).collect()
    }

    /// `n` values from `N(0, std^2)`.
    pub fn normal_vec(&mut self, n: usize, std: f32) -> Vec<f32> {
        (0..n).map(|_| std * self.normal()).collect()
    }
}

/// A graph file and its tensors, as a training program would export them.
#[derive(Debug, Clone)]
pub struct Net {
    /// The graph (`weights` is `{name}.safetensors`).
    pub file: GraphFile,
    /// The tensors the graph names.
    pub store: TensorStore,
}

impl Net {
    /// Validates the pair into a checked graph, as if loaded from
    /// `<zoo>/{name}.graph.json`.
    ///
    /// # Panics
    /// If the validator refuses the network, which is a bug in the zoo.
    pub fn build(&self) -> Graph {
        build(&self.file, &self.store)
    }

    /// Writes `{stem}.graph.json` and `{stem}.safetensors` into `dir` (the
    /// graph's `weights` key is set to the latter) and returns the graph
    /// file's path, ready for [`ingot_compiler::frontend::load`].
    pub fn write(&self, dir: &Path, stem: &str) -> std::io::Result<PathBuf> {
        let mut file = self.file.clone();
        file.weights = format!("{stem}.safetensors");
        let graph_path = dir.join(format!("{stem}.graph.json"));
        let mut json = serde_json::to_string_pretty(&file).map_err(std::io::Error::other)?;
        json.push('\n');
        std::fs::write(&graph_path, json.as_bytes())?;
        self.store.save(&dir.join(&file.weights))?;
        Ok(graph_path)
    }

    /// A deterministic pseudo-random input image `[C, H, W]`, values uniform
    /// in `[-1, 1)`, for tests and benchmarks.
    pub fn random_input(&self, seed: u64) -> Vec<f32> {
        let n: usize = self.file.input.shape.iter().product();
        Rng::new(seed).uniform_vec(n, -1.0, 1.0)
    }

    /// Min/max ranges of every map over the inputs
    /// [`random_input`](Self::random_input) gives for seeds 0, 1 and 2:
    /// ranges for tests that need a lowered network but no images.
    pub fn minmax_ranges(&self) -> Ranges {
        let g = self.build();
        let r = Reference::new(&g);
        let mut maps = vec![
            MapRange {
                min: f32::INFINITY,
                max: f32::NEG_INFINITY
            };
            g.map_count()
        ];
        for seed in 0..3 {
            r.run_with(&self.random_input(seed), |m, v| {
                let e = &mut maps[m.index()];
                for &a in v {
                    e.min = e.min.min(a);
                    e.max = e.max.max(a);
                }
            })
            .expect("the float reference runs every zoo network");
        }
        Ranges {
            graph: g.name().into(),
            graph_hash: String::new(),
            method: "minmax".into(),
            images: 3,
            maps,
            bias_shifts: Default::default(),
            channels: Vec::new(),
        }
    }
}

/// Writes `count` gray PGM pictures `img0.pgm`, `img1.pgm`, ... of
/// `width`×`height` into `dir` (created if missing): a diagonal gradient,
/// shifted per picture, plus seeded noise. Calibration and check images
/// for the zoo networks, whose weights are random anyway.
pub fn write_gray_pictures(
    dir: &Path,
    width: usize,
    height: usize,
    count: usize,
    seed: u64,
) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let mut rng = Rng::new(seed);
    for k in 0..count {
        let mut pgm = format!("P5\n{width} {height}\n255\n").into_bytes();
        for y in 0..height {
            for x in 0..width {
                let v = (x + y + 40 * k) as f32 + 60.0 * rng.uniform();
                pgm.push(v.min(255.0) as u8);
            }
        }
        std::fs::write(dir.join(format!("img{k}.pgm")), pgm)?;
    }
    Ok(())
}

/// Validates a graph file against its tensors, under the fake path
/// `<zoo>/{name}.graph.json`.
///
/// # Panics
/// If the validator refuses the pair; use [`frontend::validate`] to get the
/// error instead.
pub fn build(file: &GraphFile, store: &TensorStore) -> Graph {
    let path = PathBuf::from(format!("<zoo>/{}.graph.json", file.name));
    match frontend::validate(file, store, &path) {
        Ok(g) => g,
        Err(e) => panic!("zoo network `{}` does not validate: {e}", file.name),
    }
}

/// Builds a network layer by layer, tracking the shape of every map so that
/// weight tensors get the right sizes.
struct Builder {
    name: String,
    rng: Rng,
    input: InputFile,
    layers: Vec<LayerFile>,
    store: TensorStore,
    shapes: HashMap<String, Shape>,
}

impl Builder {
    fn new(name: &str, seed: u64, input: [usize; 3]) -> Self {
        let mut shapes = HashMap::new();
        shapes.insert(
            "input".to_string(),
            Shape::new(input[0], input[1], input[2]),
        );
        Builder {
            name: name.to_string(),
            rng: Rng::new(seed),
            input: InputFile {
                name: "input".into(),
                shape: input.to_vec(),
                pixel_scale: None,
                mean: None,
                std: None,
                color: None,
            },
            layers: Vec::new(),
            store: TensorStore::new(format!("<zoo>/{name}.safetensors")),
            shapes,
        }
    }

    fn shape(&self, map: &str) -> Shape {
        self.shapes[map]
    }

    fn push(&mut self, layer: LayerFile, out: Shape) -> String {
        let name = layer.name.clone();
        assert!(
            self.shapes.insert(name.clone(), out).is_none(),
            "zoo: layer name `{name}` used twice"
        );
        self.layers.push(layer);
        name
    }

    /// A convolution with He-scaled weights; optional small bias.
    #[allow(clippy::too_many_arguments)]
    fn conv(
        &mut self,
        name: &str,
        input: &str,
        out_c: usize,
        kernel: usize,
        stride: usize,
        pad: usize,
        groups: usize,
        bias: bool,
    ) -> String {
        let x = self.shape(input);
        let fan_in = x.c / groups * kernel * kernel;
        let std = (2.0 / fan_in as f32).sqrt();
        let w = self.rng.normal_vec(out_c * fan_in, std);
        self.store.insert(
            format!("{name}.weight"),
            vec![out_c, x.c / groups, kernel, kernel],
            w,
        );
        if bias {
            let b = self.rng.uniform_vec(out_c, -0.1, 0.1);
            self.store.insert(format!("{name}.bias"), vec![out_c], b);
        }
        let mut l = LayerFile::conv2d(name, input, bias, stride, pad);
        if groups != 1 {
            l = l.attr("groups", groups);
        }
        let (h, w) = window_output(
            x.h,
            x.w,
            [kernel; 2],
            [stride; 2],
            [1, 1],
            Padding::uniform(pad),
        )
        .expect("zoo: convolution window fits");
        self.push(l, Shape::new(out_c, h, w))
    }

    fn bn(&mut self, name: &str, input: &str) -> String {
        let c = self.shape(input).c;
        let gamma = self.rng.uniform_vec(c, 0.8, 1.2);
        let beta = self.rng.uniform_vec(c, -0.1, 0.1);
        let mean = self.rng.uniform_vec(c, -0.1, 0.1);
        let var = self.rng.uniform_vec(c, 0.5, 1.5);
        self.store.insert(format!("{name}.weight"), vec![c], gamma);
        self.store.insert(format!("{name}.bias"), vec![c], beta);
        self.store
            .insert(format!("{name}.running_mean"), vec![c], mean);
        self.store
            .insert(format!("{name}.running_var"), vec![c], var);
        let x = self.shape(input);
        self.push(LayerFile::batch_norm(name, input), x)
    }

    /// A layer with no tensors whose output has the input's shape.
    fn unary(&mut self, name: &str, op: &str, input: &str) -> String {
        let x = self.shape(input);
        self.push(LayerFile::new(name, op, input), x)
    }

    fn pool(
        &mut self,
        name: &str,
        op: &str,
        input: &str,
        kernel: usize,
        stride: usize,
        pad: usize,
    ) -> String {
        let x = self.shape(input);
        let mut l = LayerFile::pool(name, op, input, kernel, stride);
        if pad != 0 {
            l = l.attr("padding", pad);
        }
        let (h, w) = window_output(
            x.h,
            x.w,
            [kernel; 2],
            [stride; 2],
            [1, 1],
            Padding::uniform(pad),
        )
        .expect("zoo: pooling window fits");
        self.push(l, Shape::new(x.c, h, w))
    }

    fn global_avg_pool(&mut self, name: &str, input: &str) -> String {
        let x = self.shape(input);
        self.push(
            LayerFile::new(name, "global_avg_pool", input),
            Shape::new(x.c, 1, 1),
        )
    }

    fn flatten(&mut self, name: &str, input: &str) -> String {
        let n = self.shape(input).len();
        self.push(LayerFile::new(name, "flatten", input), Shape::flat(n))
    }

    /// A linear layer with weights from `N(0, 1 / in)` and a small bias.
    fn linear(&mut self, name: &str, input: &str, out: usize) -> String {
        let n = self.shape(input).len();
        let w = self.rng.normal_vec(out * n, (1.0 / n as f32).sqrt());
        let b = self.rng.uniform_vec(out, -0.1, 0.1);
        self.store.insert(format!("{name}.weight"), vec![out, n], w);
        self.store.insert(format!("{name}.bias"), vec![out], b);
        self.push(LayerFile::linear(name, input, true), Shape::flat(out))
    }

    fn concat(&mut self, name: &str, inputs: &[String]) -> String {
        let refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
        let first = self.shape(refs[0]);
        let c = refs.iter().map(|m| self.shape(m).c).sum();
        self.push(
            LayerFile::multi(name, "concat", &refs),
            Shape::new(c, first.h, first.w),
        )
    }

    fn add(&mut self, name: &str, a: &str, b: &str) -> String {
        let x = self.shape(a);
        self.push(LayerFile::multi(name, "add", &[a, b]), x)
    }

    fn finish(self, output: &str, classes: usize) -> Net {
        let labels = if classes <= 16 {
            Some((0..classes).map(|i| format!("class{i}")).collect())
        } else {
            None
        };
        Net {
            file: GraphFile {
                format: FORMAT_V1.into(),
                name: self.name.clone(),
                weights: format!("{}.safetensors", self.name),
                input: self.input,
                labels,
                layers: self.layers,
                output: output.into(),
            },
            store: self.store,
        }
    }
}

/// Sizes of [`plain_stack`].
#[derive(Debug, Clone, PartialEq)]
pub struct PlainStackConfig {
    /// Input `[C, H, W]`; H and W divisible by 4.
    pub input: [usize; 3],
    /// Output channels of the two 3x3 convolutions.
    pub channels: [usize; 2],
    /// Classes (outputs of the final linear layer).
    pub classes: usize,
}

impl Default for PlainStackConfig {
    /// 1x28x28 input, 8 and 16 channels, 10 classes.
    fn default() -> Self {
        PlainStackConfig {
            input: [1, 28, 28],
            channels: [8, 16],
            classes: 10,
        }
    }
}

/// Two blocks of conv3x3 (pad 1, with bias) - ReLU - maxpool 2x2, then
/// flatten and a linear classifier.
pub fn plain_stack(cfg: &PlainStackConfig, seed: u64) -> Net {
    let mut b = Builder::new("plain_stack", seed, cfg.input);
    let mut x = "input".to_string();
    for (i, &c) in cfg.channels.iter().enumerate() {
        let n = i + 1;
        x = b.conv(&format!("conv{n}"), &x, c, 3, 1, 1, 1, true);
        x = b.unary(&format!("relu{n}"), "relu", &x);
        x = b.pool(&format!("pool{n}"), "max_pool2d", &x, 2, 2, 0);
    }
    x = b.flatten("flatten", &x);
    let out = b.linear("fc", &x, cfg.classes);
    b.finish(&out, cfg.classes)
}

/// The first layers of a densely connected network.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DenseStem {
    /// One 3x3 convolution, stride 1, pad 1, no bias (the small-image form
    /// of Huang et al. 2017, section 3).
    Conv3x3 {
        /// Output channels.
        channels: usize,
    },
    /// The ImageNet form of Huang et al. 2017, table 1: 7x7 convolution
    /// stride 2 pad 3 (no bias), batch norm, ReLU, 3x3 max pooling stride 2
    /// pad 1.
    ImageNet {
        /// Output channels of the convolution.
        channels: usize,
    },
}

impl DenseStem {
    fn channels(self) -> usize {
        match self {
            DenseStem::Conv3x3 { channels } | DenseStem::ImageNet { channels } => channels,
        }
    }
}

/// Sizes of a densely connected network (Huang et al. 2017, "Densely
/// Connected Convolutional Networks").
#[derive(Debug, Clone, PartialEq)]
pub struct DenseConfig {
    /// Network name.
    pub name: String,
    /// Input `[C, H, W]`.
    pub input: [usize; 3],
    /// The first layers.
    pub stem: DenseStem,
    /// Channels each dense layer adds (k in the paper).
    pub growth: usize,
    /// Dense layers per block.
    pub blocks: Vec<usize>,
    /// `Some(m)`: each dense layer starts with BN-ReLU-conv1x1 to `m * growth`
    /// channels (the "B" of DenseNet-BC); `None`: BN-ReLU-conv3x3 only.
    pub bottleneck: Option<usize>,
    /// Transition layers keep `floor(compression * C)` channels (theta).
    pub compression: f32,
    /// Classes.
    pub classes: usize,
}

impl DenseConfig {
    /// The demo network: 1x64x64 input, 3x3 stem to 16 channels, two blocks
    /// of 4 BN-ReLU-conv3x3 layers with growth 8, no bottleneck, compression
    /// 0.5, 4 classes.
    pub fn demo() -> Self {
        DenseConfig {
            name: "dense_small".into(),
            input: [1, 64, 64],
            stem: DenseStem::Conv3x3 { channels: 16 },
            growth: 8,
            blocks: vec![4, 4],
            bottleneck: None,
            compression: 0.5,
            classes: 4,
        }
    }

    /// DenseNet-121 (Huang et al. 2017, table 1): 3x224x224 input, ImageNet
    /// stem to 64 channels, growth 32, blocks 6/12/24/16, bottleneck 4 x
    /// growth, compression 0.5, 1000 classes.
    pub fn densenet121() -> Self {
        DenseConfig {
            name: "densenet121".into(),
            input: [3, 224, 224],
            stem: DenseStem::ImageNet { channels: 64 },
            growth: 32,
            blocks: vec![6, 12, 24, 16],
            bottleneck: Some(4),
            compression: 0.5,
            classes: 1000,
        }
    }
}

/// A densely connected network: stem, dense blocks separated by transitions
/// (BN-ReLU-conv1x1-avgpool 2x2), final BN-ReLU, global average pooling,
/// flatten, linear. Convolutions have no bias; the classifier has one.
pub fn dense(cfg: &DenseConfig, seed: u64) -> Net {
    let mut b = Builder::new(&cfg.name, seed, cfg.input);
    let mut x = match cfg.stem {
        DenseStem::Conv3x3 { channels } => {
            b.conv("features.conv0", "input", channels, 3, 1, 1, 1, false)
        }
        DenseStem::ImageNet { channels } => {
            let c = b.conv("features.conv0", "input", channels, 7, 2, 3, 1, false);
            let n = b.bn("features.norm0", &c);
            let r = b.unary("features.relu0", "relu", &n);
            b.pool("features.pool0", "max_pool2d", &r, 3, 2, 1)
        }
    };
    debug_assert_eq!(b.shape(&x).c, cfg.stem.channels());
    for (bi, &n_layers) in cfg.blocks.iter().enumerate() {
        let block = format!("features.denseblock{}", bi + 1);
        let mut features = vec![x.clone()];
        for li in 0..n_layers {
            let p = format!("{block}.denselayer{}", li + 1);
            let cat = b.concat(&format!("{p}.cat"), &features);
            let mut y = cat;
            if let Some(m) = cfg.bottleneck {
                y = b.bn(&format!("{p}.norm1"), &y);
                y = b.unary(&format!("{p}.relu1"), "relu", &y);
                y = b.conv(&format!("{p}.conv1"), &y, m * cfg.growth, 1, 1, 0, 1, false);
                y = b.bn(&format!("{p}.norm2"), &y);
                y = b.unary(&format!("{p}.relu2"), "relu", &y);
                y = b.conv(&format!("{p}.conv2"), &y, cfg.growth, 3, 1, 1, 1, false);
            } else {
                y = b.bn(&format!("{p}.norm1"), &y);
                y = b.unary(&format!("{p}.relu1"), "relu", &y);
                y = b.conv(&format!("{p}.conv1"), &y, cfg.growth, 3, 1, 1, 1, false);
            }
            features.push(y);
        }
        x = b.concat(&format!("{block}.cat"), &features);
        if bi + 1 < cfg.blocks.len() {
            let t = format!("features.transition{}", bi + 1);
            let c = b.shape(&x).c;
            let out_c = ((c as f32 * cfg.compression).floor() as usize).max(1);
            let y = b.bn(&format!("{t}.norm"), &x);
            let y = b.unary(&format!("{t}.relu"), "relu", &y);
            let y = b.conv(&format!("{t}.conv"), &y, out_c, 1, 1, 0, 1, false);
            x = b.pool(&format!("{t}.pool"), "avg_pool2d", &y, 2, 2, 0);
        }
    }
    let n = cfg.blocks.len() + 1;
    x = b.bn(&format!("features.norm{n}"), &x);
    x = b.unary("features.relu_final", "relu", &x);
    x = b.global_avg_pool("features.pool_final", &x);
    x = b.flatten("flatten", &x);
    let out = b.linear("classifier", &x, cfg.classes);
    b.finish(&out, cfg.classes)
}

/// The demo network ([`DenseConfig::demo`]).
pub fn dense_small(seed: u64) -> Net {
    dense(&DenseConfig::demo(), seed)
}

/// DenseNet-121 ([`DenseConfig::densenet121`]).
pub fn densenet121(seed: u64) -> Net {
    dense(&DenseConfig::densenet121(), seed)
}

/// Sizes of [`residual`].
#[derive(Debug, Clone, PartialEq)]
pub struct ResidualConfig {
    /// Input `[C, H, W]`; H and W even.
    pub input: [usize; 3],
    /// Channels of the stem and first block; the second block doubles them.
    pub channels: usize,
    /// Classes.
    pub classes: usize,
}

impl Default for ResidualConfig {
    /// 3x32x32 input, 16 channels, 10 classes.
    fn default() -> Self {
        ResidualConfig {
            input: [3, 32, 32],
            channels: 16,
            classes: 10,
        }
    }
}

/// A residual network (He et al. 2016, "Deep Residual Learning for Image
/// Recognition"): stem conv3x3-BN-ReLU, one identity block and one block
/// with stride 2 whose shortcut is a 1x1 projection conv-BN, each block
/// conv-BN-ReLU-conv-BN then `add` and ReLU; global average pooling and a
/// linear classifier. Two `add` skip connections.
pub fn residual(cfg: &ResidualConfig, seed: u64) -> Net {
    let mut b = Builder::new("residual", seed, cfg.input);
    let c = cfg.channels;
    let x = b.conv("stem.conv", "input", c, 3, 1, 1, 1, false);
    let x = b.bn("stem.bn", &x);
    let x = b.unary("stem.relu", "relu", &x);
    // Block 1: identity shortcut.
    let y = b.conv("block1.conv1", &x, c, 3, 1, 1, 1, false);
    let y = b.bn("block1.bn1", &y);
    let y = b.unary("block1.relu1", "relu", &y);
    let y = b.conv("block1.conv2", &y, c, 3, 1, 1, 1, false);
    let y = b.bn("block1.bn2", &y);
    let y = b.add("block1.add", &y, &x);
    let x = b.unary("block1.relu2", "relu", &y);
    // Block 2: stride 2, projection shortcut.
    let y = b.conv("block2.conv1", &x, 2 * c, 3, 2, 1, 1, false);
    let y = b.bn("block2.bn1", &y);
    let y = b.unary("block2.relu1", "relu", &y);
    let y = b.conv("block2.conv2", &y, 2 * c, 3, 1, 1, 1, false);
    let y = b.bn("block2.bn2", &y);
    let s = b.conv("block2.shortcut.conv", &x, 2 * c, 1, 2, 0, 1, false);
    let s = b.bn("block2.shortcut.bn", &s);
    let y = b.add("block2.add", &y, &s);
    let x = b.unary("block2.relu2", "relu", &y);
    let x = b.global_avg_pool("pool", &x);
    let out = b.linear("fc", &x, cfg.classes);
    b.finish(&out, cfg.classes)
}

/// Sizes of [`depthwise_separable`].
#[derive(Debug, Clone, PartialEq)]
pub struct DepthwiseConfig {
    /// Input `[C, H, W]`.
    pub input: [usize; 3],
    /// Output channels of the stem (3x3 stride 2).
    pub stem: usize,
    /// One separable block per entry: (pointwise output channels, depthwise stride).
    pub blocks: Vec<(usize, usize)>,
    /// Classes.
    pub classes: usize,
}

impl Default for DepthwiseConfig {
    /// 3x32x32 input, stem 8, blocks (16, 1), (32, 2), (32, 1), 10 classes.
    fn default() -> Self {
        DepthwiseConfig {
            input: [3, 32, 32],
            stem: 8,
            blocks: vec![(16, 1), (32, 2), (32, 1)],
            classes: 10,
        }
    }
}

impl DepthwiseConfig {
    /// The layout of Howard et al. (2017), "MobileNets", Table 1, on a
    /// 96×96 gray input: stem 3×3/2 with 32 channels, then 13 depthwise +
    /// pointwise pairs (64, 128/2, 128, 256/2, 256, 512/2, 5 × 512,
    /// 1024/2, 1024), every width multiplied by `width` (at least 8
    /// channels), 10 classes.
    pub fn howard2017(width: f32) -> Self {
        let c = |n: usize| ((n as f32 * width).round() as usize).max(8);
        let mut blocks = vec![
            (c(64), 1),
            (c(128), 2),
            (c(128), 1),
            (c(256), 2),
            (c(256), 1),
        ];
        blocks.push((c(512), 2));
        blocks.extend(std::iter::repeat_n((c(512), 1), 5));
        blocks.push((c(1024), 2));
        blocks.push((c(1024), 1));
        DepthwiseConfig {
            input: [1, 96, 96],
            stem: c(32),
            blocks,
            classes: 10,
        }
    }
}

/// Depthwise separable convolutions (Howard et al. 2017, "MobileNets"):
/// stem conv3x3 stride 2 - BN - ReLU6, then blocks of depthwise 3x3
/// (`groups == channels`) - BN - ReLU6 - pointwise 1x1 - BN - ReLU6; global
/// average pooling, dropout and a linear classifier.
pub fn depthwise_separable(cfg: &DepthwiseConfig, seed: u64) -> Net {
    let mut b = Builder::new("depthwise_separable", seed, cfg.input);
    let x = b.conv("stem.conv", "input", cfg.stem, 3, 2, 1, 1, false);
    let x = b.bn("stem.bn", &x);
    let mut x = b.unary("stem.relu", "relu6", &x);
    for (i, &(out_c, stride)) in cfg.blocks.iter().enumerate() {
        let p = format!("block{}", i + 1);
        let c = b.shape(&x).c;
        let y = b.conv(&format!("{p}.dw"), &x, c, 3, stride, 1, c, false);
        let y = b.bn(&format!("{p}.dw_bn"), &y);
        let y = b.unary(&format!("{p}.dw_relu"), "relu6", &y);
        let y = b.conv(&format!("{p}.pw"), &y, out_c, 1, 1, 0, 1, false);
        let y = b.bn(&format!("{p}.pw_bn"), &y);
        x = b.unary(&format!("{p}.pw_relu"), "relu6", &y);
    }
    let x = b.global_avg_pool("pool", &x);
    let x = b.unary("dropout", "dropout", &x);
    let out = b.linear("fc", &x, cfg.classes);
    b.finish(&out, cfg.classes)
}

/// One group of bottleneck blocks of [`inverted_residual`] (a row of
/// Sandler et al. 2018, Table 2).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Bottleneck {
    /// Expansion factor `t`: the 1×1 expansion widens the input `t` times
    /// (no expansion layer when `t == 1`).
    pub expansion: usize,
    /// Output channels `c` of every block of the group.
    pub channels: usize,
    /// Blocks `n` in the group.
    pub repeats: usize,
    /// Stride `s` of the group's first block (the others have stride 1).
    pub stride: usize,
}

/// Sizes of [`inverted_residual`].
#[derive(Debug, Clone, PartialEq)]
pub struct InvertedResidualConfig {
    /// Input `[C, H, W]`.
    pub input: [usize; 3],
    /// Output channels of the stem (3×3, stride 2).
    pub stem: usize,
    /// The bottleneck groups, in order.
    pub groups: Vec<Bottleneck>,
    /// Output channels of the last 1×1 convolution.
    pub head: usize,
    /// Classes.
    pub classes: usize,
}

impl Default for InvertedResidualConfig {
    /// 3x32x32 input, stem 8; groups (t, c, n, s) = (1, 8, 1, 1),
    /// (4, 16, 2, 2), (4, 24, 2, 2); last 1×1 convolution 64 channels; 10
    /// classes. Every part of the layout (a block without expansion,
    /// strided and residual blocks) at a size quick to build and run.
    fn default() -> Self {
        let g = |t, c, n, s| Bottleneck {
            expansion: t,
            channels: c,
            repeats: n,
            stride: s,
        };
        InvertedResidualConfig {
            input: [3, 32, 32],
            stem: 8,
            groups: vec![g(1, 8, 1, 1), g(4, 16, 2, 2), g(4, 24, 2, 2)],
            head: 64,
            classes: 10,
        }
    }
}

/// `v` rounded to the nearest multiple of 8, at least 8, and never more
/// than 10% below `v`: the channel rounding of the reference code that
/// accompanies Sandler et al. (2018) (written from memory).
pub fn round_channels(v: f32) -> usize {
    let d = 8usize;
    let r = (((v + d as f32 / 2.0) as usize) / d * d).max(d);
    if (r as f32) < 0.9 * v {
        r + d
    } else {
        r
    }
}

impl InvertedResidualConfig {
    /// The layout of Sandler et al. (2018), "MobileNetV2: Inverted
    /// Residuals and Linear Bottlenecks", Table 2, on a 96×96 gray input
    /// with 10 classes: stem 3×3/2 with 32 channels; bottleneck groups
    /// (t, c, n, s) = (1, 16, 1, 1), (6, 24, 2, 2), (6, 32, 3, 2),
    /// (6, 64, 4, 2), (6, 96, 3, 1), (6, 160, 3, 2), (6, 320, 1, 1); a
    /// last 1×1 convolution with 1280 channels. The stem's and the
    /// groups' channels are multiplied by `width` and rounded by
    /// [`round_channels`]; the last convolution keeps 1280 channels when
    /// `width < 1`, as the paper does (section 6.1), and is scaled above.
    pub fn sandler2018(width: f32) -> Self {
        let c = |n: usize| round_channels(n as f32 * width);
        let g = |t, ch, n, s| Bottleneck {
            expansion: t,
            channels: c(ch),
            repeats: n,
            stride: s,
        };
        InvertedResidualConfig {
            input: [1, 96, 96],
            stem: c(32),
            groups: vec![
                g(1, 16, 1, 1),
                g(6, 24, 2, 2),
                g(6, 32, 3, 2),
                g(6, 64, 4, 2),
                g(6, 96, 3, 1),
                g(6, 160, 3, 2),
                g(6, 320, 1, 1),
            ],
            head: if width > 1.0 { c(1280) } else { 1280 },
            classes: 10,
        }
    }
}

/// Inverted residual blocks with linear bottlenecks (Sandler et al. 2018,
/// "MobileNetV2"): stem conv3×3 stride 2 - BN - ReLU6; per block a 1×1
/// expansion - BN - ReLU6 (left out when the expansion factor is 1), a
/// depthwise 3×3 - BN - ReLU6 and a 1×1 projection - BN with no activation
/// (the linear bottleneck), plus an `add` of the block's input when the
/// stride is 1 and the channels do not change; then conv1×1 - BN - ReLU6,
/// global average pooling and a linear classifier.
pub fn inverted_residual(cfg: &InvertedResidualConfig, seed: u64) -> Net {
    let mut b = Builder::new("inverted_residual", seed, cfg.input);
    let x = b.conv("stem.conv", "input", cfg.stem, 3, 2, 1, 1, false);
    let x = b.bn("stem.bn", &x);
    let mut x = b.unary("stem.relu", "relu6", &x);
    let mut k = 0;
    for g in &cfg.groups {
        for r in 0..g.repeats {
            k += 1;
            let p = format!("block{k}");
            let stride = if r == 0 { g.stride } else { 1 };
            let c_in = b.shape(&x).c;
            let mut y = x.clone();
            if g.expansion != 1 {
                let e = c_in * g.expansion;
                y = b.conv(&format!("{p}.expand"), &y, e, 1, 1, 0, 1, false);
                y = b.bn(&format!("{p}.expand_bn"), &y);
                y = b.unary(&format!("{p}.expand_relu"), "relu6", &y);
            }
            let e = b.shape(&y).c;
            y = b.conv(&format!("{p}.dw"), &y, e, 3, stride, 1, e, false);
            y = b.bn(&format!("{p}.dw_bn"), &y);
            y = b.unary(&format!("{p}.dw_relu"), "relu6", &y);
            y = b.conv(&format!("{p}.project"), &y, g.channels, 1, 1, 0, 1, false);
            y = b.bn(&format!("{p}.project_bn"), &y);
            if stride == 1 && c_in == g.channels {
                y = b.add(&format!("{p}.add"), &y, &x);
            }
            x = y;
        }
    }
    let x = b.conv("head.conv", &x, cfg.head, 1, 1, 0, 1, false);
    let x = b.bn("head.bn", &x);
    let x = b.unary("head.relu", "relu6", &x);
    let x = b.global_avg_pool("pool", &x);
    let out = b.linear("fc", &x, cfg.classes);
    b.finish(&out, cfg.classes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ingot_compiler::graph::Op;

    #[test]
    fn rng_is_deterministic_and_in_range() {
        let a: Vec<u64> = {
            let mut r = Rng::new(7);
            (0..4).map(|_| r.next_u64()).collect()
        };
        let b: Vec<u64> = {
            let mut r = Rng::new(7);
            (0..4).map(|_| r.next_u64()).collect()
        };
        assert_eq!(a, b);
        // splitmix64 reference output for seed 0: first value
        // 0xE220A8397B1DCDAF (Steele, Lea & Flood 2014; from memory of the
        // widely copied C reference implementation).
        assert_eq!(Rng::new(0).next_u64(), 0xE220_A839_7B1D_CDAF);
        let mut r = Rng::new(1);
        let u = r.uniform_vec(10_000, -1.0, 1.0);
        assert!(u.iter().all(|v| (-1.0..1.0).contains(v)));
        let n = r.normal_vec(20_000, 1.0);
        let mean = n.iter().sum::<f32>() / n.len() as f32;
        let var = n.iter().map(|v| (v - mean) * (v - mean)).sum::<f32>() / n.len() as f32;
        assert!(mean.abs() < 0.03, "mean {mean}");
        assert!((var - 1.0).abs() < 0.05, "var {var}");
    }

    #[test]
    fn all_networks_validate() {
        let nets = [
            plain_stack(&PlainStackConfig::default(), 1),
            dense_small(1),
            residual(&ResidualConfig::default(), 1),
            depthwise_separable(&DepthwiseConfig::default(), 1),
            depthwise_separable(&DepthwiseConfig::howard2017(0.25), 1),
            inverted_residual(&InvertedResidualConfig::sandler2018(0.35), 1),
            inverted_residual(&InvertedResidualConfig::default(), 1),
        ];
        for n in &nets {
            let g = n.build();
            assert!(!g.layers().is_empty());
        }
        let g = nets[0].build();
        assert_eq!(g.shape(g.output()), Shape::flat(10));
        let g = nets[1].build();
        assert_eq!(g.shape(g.output()), Shape::flat(4));
        let g = nets[2].build();
        assert_eq!(
            g.layers()
                .iter()
                .filter(|l| matches!(l.op, Op::Add))
                .count(),
            2
        );
        // Howard et al. (2017), Table 1: 13 depthwise layers, 1024
        // channels at the end (256 at width 0.25), 3×3 at stride 2 by
        // 96 → 3 pixels.
        let g = nets[4].build();
        let dw = g
            .layers()
            .iter()
            .filter(|l| matches!(&l.op, Op::Conv2d(c) if c.is_depthwise()))
            .count();
        assert_eq!(dw, 13);
        assert_eq!(
            DepthwiseConfig::howard2017(0.25).blocks.last(),
            Some(&(256, 1))
        );
        let g = nets[3].build();
        assert!(g
            .layers()
            .iter()
            .any(|l| matches!(&l.op, Op::Conv2d(c) if c.is_depthwise())));
    }

    #[test]
    fn sandler2018_channels_counts_and_shapes() {
        // Rounding at width 0.35, by hand: 32·0.35 = 11.2 → 8 is more than
        // 10% below, so 16; 16·0.35 = 5.6 → 8; 24·0.35 = 8.4 → 8;
        // 11.2 → 16; 22.4 → 24; 33.6 → 32; 56 → 56; 112 → 112.
        let cfg = InvertedResidualConfig::sandler2018(0.35);
        assert_eq!(cfg.stem, 16);
        let chans: Vec<usize> = cfg.groups.iter().map(|g| g.channels).collect();
        assert_eq!(chans, [8, 8, 16, 24, 32, 56, 112]);
        assert_eq!(cfg.head, 1280);
        // At width 1 the rule must give back Table 2's channels.
        let full = InvertedResidualConfig::sandler2018(1.0);
        let chans: Vec<usize> = full.groups.iter().map(|g| g.channels).collect();
        assert_eq!(chans, [16, 24, 32, 64, 96, 160, 320]);
        assert_eq!((full.stem, full.head), (32, 1280));
        assert_eq!(round_channels(1.0), 8);

        let net = inverted_residual(&cfg, 1);
        let g = net.build();
        let count = |f: &dyn Fn(&Op) -> bool| g.layers().iter().filter(|l| f(&l.op)).count();
        // 17 blocks (1 + 2 + 3 + 4 + 3 + 3 + 1, Table 2); block 1 has no
        // expansion (t = 1). Layers: stem 3, block 1 5 (dw, bn, relu6,
        // project, bn), 16 blocks × 8, 10 adds, head 3, pool, fc = 151.
        assert_eq!(g.layers().len(), 151);
        assert_eq!(
            count(&|op| matches!(op, Op::Conv2d(c) if c.is_depthwise())),
            17
        );
        assert_eq!(count(&|op| matches!(op, Op::Conv2d(_))), 52);
        // Residual adds where stride 1 and channels unchanged: groups 2..6
        // contribute 1 + 2 + 3 + 2 + 2 (group 5's first block goes 24 → 32
        // channels, group 7's 56 → 112).
        assert_eq!(count(&|op| matches!(op, Op::Add)), 10);

        let shape_of = |n: &str| g.shape(g.find_layer(n).unwrap().output());
        assert_eq!(shape_of("stem.relu"), Shape::new(16, 48, 48));
        assert_eq!(shape_of("block1.project_bn"), Shape::new(8, 48, 48));
        // The 6× expansion at 48×48 that the depthwise 3×3/2 reads.
        assert_eq!(shape_of("block2.expand_relu"), Shape::new(48, 48, 48));
        assert_eq!(shape_of("block2.dw_relu"), Shape::new(48, 24, 24));
        assert_eq!(shape_of("block7.project_bn"), Shape::new(24, 6, 6));
        assert_eq!(shape_of("block17.project_bn"), Shape::new(112, 3, 3));
        assert_eq!(shape_of("head.relu"), Shape::new(1280, 3, 3));
        assert_eq!(g.shape(g.output()), Shape::flat(10));

        // Counts by hand, (H_out·W_out)·C_out·k²·C_in/groups per convolution;
        // blocks as (C_in, t, C_out, s, H_in):
        // stem 48²·16·9 = 331,776;
        // expansions Σ H_in²·C_in·tC_in: 48²·8·48 = 884,736;
        //   24²·8·48 = 221,184 ×2 (blocks 3, 4); 12²·16·96 = 221,184 ×3;
        //   6²·24·144 = 124,416 ×4; 6²·32·192 = 221,184 ×3;
        //   3²·56·336 = 169,344 ×3 → 3,659,904;
        // depthwise Σ H_out²·e·9: 48²·16·9 = 331,776; 24²·48·9 = 248,832 ×2;
        //   12²·48·9 = 62,208; 12²·96·9 = 124,416 ×2; 6²·96·9 = 31,104;
        //   6²·144·9 = 46,656 ×4; 6²·192·9 = 62,208 ×2; 3²·192·9 = 15,552;
        //   3²·336·9 = 27,216 ×3 → 1,579,824;
        // projections Σ H_out²·e·C_out: 48²·16·8 = 294,912;
        //   24²·48·8 = 221,184 ×2; 12²·48·16 = 110,592;
        //   12²·96·16 = 221,184 ×2; 6²·96·24 = 82,944; 6²·144·24 = 124,416 ×3;
        //   6²·144·32 = 165,888; 6²·192·32 = 221,184 ×2; 3²·192·56 = 96,768;
        //   3²·336·56 = 169,344 ×2; 3²·336·112 = 338,688 → 3,128,832;
        // head 3²·112·1280 = 1,290,240; fc 1280·10 = 12,800.
        // Total 331,776 + 3,659,904 + 1,579,824 + 3,128,832 + 1,290,240
        //   + 12,800 = 10,003,376.
        // Parameters: convolution and linear weights 144 + 94,464
        // (expansions) + 23,472 (depthwise) + 120,320 (projections)
        // + 143,360 (head) + 12,800 (fc) = 394,560; fc bias 10; batch-norm
        // γ and β 2 × (16 + 2,592 + 2,608 + 544 + 1,280) = 14,080
        // (stem; Σ widths of the expansions, 48 + 48·2 + 96·3 + 144·4
        // + 192·3 + 336·3 = 2,592; of the depthwise layers, 16 more;
        // Σ projection outputs 8·3 + 16·3 + 24·4 + 32·3 + 56·3 + 112 = 544;
        // head) → 408,650.
        let r = ingot_compiler::inspect::report(&g);
        assert_eq!(r.totals.macs, 10_003_376);
        assert_eq!(r.totals.params, 408_650);
        assert_eq!(r.totals.buffers, 14_080);
    }

    #[test]
    fn demo_dense_small_shapes() {
        let g = dense_small(3).build();
        // Block 1 ends with 16 + 4*8 = 48 channels at 64x64, the transition
        // halves them to 24 at 32x32, block 2 ends with 24 + 4*8 = 56.
        let shape_of = |n: &str| g.shape(g.find_layer(n).unwrap().output());
        assert_eq!(shape_of("features.denseblock1.cat"), Shape::new(48, 64, 64));
        assert_eq!(
            shape_of("features.transition1.pool"),
            Shape::new(24, 32, 32)
        );
        assert_eq!(shape_of("features.denseblock2.cat"), Shape::new(56, 32, 32));
        // One concat per dense layer, reading all earlier maps of the block.
        let l3 = g.layer(
            g.find_layer("features.denseblock1.denselayer3.cat")
                .unwrap(),
        );
        assert_eq!(l3.inputs.len(), 3);
        assert_eq!(
            shape_of("features.denseblock1.denselayer3.cat"),
            Shape::new(32, 64, 64)
        );
    }

    #[test]
    fn same_seed_same_bytes_other_seed_other_bytes() {
        let a = plain_stack(&PlainStackConfig::default(), 5);
        let b = plain_stack(&PlainStackConfig::default(), 5);
        let c = plain_stack(&PlainStackConfig::default(), 6);
        assert_eq!(a.store.to_bytes(), b.store.to_bytes());
        assert_ne!(a.store.to_bytes(), c.store.to_bytes());
        assert_eq!(
            serde_json::to_string(&a.file).unwrap(),
            serde_json::to_string(&b.file).unwrap()
        );
    }

    #[test]
    fn write_then_load_round_trips() {
        let dir = tempfile::tempdir().unwrap();
        let net = residual(&ResidualConfig::default(), 2);
        let path = net.write(dir.path(), "res").unwrap();
        let g = frontend::load(&path).unwrap();
        let h = net.build();
        assert_eq!(g.layers(), h.layers());
        assert_eq!(g.weights_path(), dir.path().join("res.safetensors"));
    }
}
