//! Calibration: observe every float map on sample images and choose int8
//! ranges.
//!
//! [`run`] reads an [`ImageSet`], runs every calibration image through a
//! [`MapSource`] (the float reference), records each map with the
//! observers of [`observe`] and returns [`Ranges`] plus per-map statistics.
//! A `holdout` share of the images is kept apart for evaluation.

pub mod choose;
pub mod frames;
pub mod images;
pub mod observe;
pub use crate::ranges;
pub mod report;

pub use images::{ImageError, ImageSet, Sample};
pub use observe::{Method, DEFAULT_BINS};
pub use ranges::{MapRange, Ranges, RangesError};
pub use report::{LayerRow, OutputAgreement, Report};

use crate::graph::{Graph, MapId};
use indicatif::{ProgressBar, ProgressStyle};
use observe::{Extremes, Histograms};
use rayon::prelude::*;
use serde::Serialize;
use std::io::IsTerminal;
use std::sync::atomic::{AtomicBool, Ordering};

/// Something that runs one preprocessed input `[C, H, W]` and shows every
/// map it computes (the graph input included) to `visit`, in any order.
pub trait MapSource: Sync {
    /// Number of maps (`Graph::map_count`).
    fn map_count(&self) -> usize;
    /// Runs one input.
    fn run(&self, input: &[f32], visit: &mut dyn FnMut(MapId, &[f32]));
    /// Channel count of map `m` when calibration should also observe it
    /// per channel (`[C, H, W]` values); `None` (the default) for none.
    fn channels(&self, _m: MapId) -> Option<usize> {
        None
    }
}

impl MapSource for crate::reference::Reference<'_> {
    fn map_count(&self) -> usize {
        self.graph().map_count()
    }
    fn run(&self, input: &[f32], visit: &mut dyn FnMut(MapId, &[f32])) {
        // Inputs come from an `ImageSet` bound to this graph, so their
        // length always matches and the reference cannot refuse them.
        self.run_with(input, visit)
            .expect("sample has the input's length");
    }
    /// The outputs of the layers that may end a step writing a
    /// per-channel map (`docs/quantization.md`): convolutions, batch
    /// norms and ReLUs fused after them, and poolings, which pass a
    /// convolution's per-channel parameters on.
    fn channels(&self, m: MapId) -> Option<usize> {
        let g = self.graph();
        let l = m.producer()?;
        use crate::graph::Op;
        matches!(
            g.layer(l).op,
            Op::Conv2d(_)
                | Op::BatchNorm(_)
                | Op::Relu
                | Op::Relu6
                | Op::MaxPool2d(_)
                | Op::AvgPool2d(_)
                | Op::GlobalAvgPool
        )
        .then(|| g.shape(m).c)
    }
}

/// Calibrates `graph` on `images` with its float reference. Under
/// [`Method::Auto`] the candidates are left in [`Calibration::candidates`]
/// for `agree::choose` (choosing needs the lowered network);
/// `agree::run` does both.
pub fn run(
    graph: &Graph,
    images: &ImageSet,
    opts: &CalibOptions,
) -> Result<Calibration, CalibError> {
    run_with_source(
        graph,
        &crate::reference::Reference::new(graph),
        images,
        opts,
    )
}

/// Options of a calibration run.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibOptions {
    /// Range-selection method.
    pub method: Method,
    /// Histogram bins per side (default [`DEFAULT_BINS`]).
    pub bins: usize,
    /// Share of the images kept for evaluation, in `[0, 1)`.
    pub holdout: f64,
    /// Skip and count unreadable images instead of failing.
    pub skip_bad: bool,
    /// Show a progress bar on standard error (only when it is a terminal).
    pub progress: bool,
    /// After choosing ranges, correct the biases of convolution and linear
    /// layers for the mean shift int8 causes (`agree::bias`).
    pub bias_correction: bool,
}

impl Default for CalibOptions {
    fn default() -> Self {
        CalibOptions {
            method: Method::MinMax,
            bins: DEFAULT_BINS,
            holdout: 0.0,
            skip_bad: false,
            progress: false,
            bias_correction: false,
        }
    }
}

/// Why calibration failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CalibError {
    /// An image could not be read (and `skip_bad` was off).
    #[error(transparent)]
    Image(#[from] ImageError),
    /// The held-out share is not in `[0, 1)`.
    #[error("holdout {0} is not in [0, 1)")]
    Holdout(f64),
    /// Fewer than two histogram bins.
    #[error("{0} histogram bins; need at least 2")]
    Bins(usize),
    /// No image was left to calibrate on.
    #[error("no calibration image left: {listed} listed, {held_out} held out for evaluation, {skipped} unreadable")]
    NoImages {
        /// Images listed.
        listed: usize,
        /// Held out.
        held_out: usize,
        /// Skipped as unreadable.
        skipped: usize,
    },
    /// The graph or weights file could not be hashed.
    #[error("cannot hash the graph files: {0}")]
    Hash(std::io::Error),
}

/// Statistics of one map over the calibration images.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MapStats {
    /// Observed minimum and maximum (widened to contain 0).
    pub observed: MapRange,
    /// Share of the observed values beyond the chosen range, at histogram
    /// bin resolution (0 for `minmax`).
    pub clipped: f64,
    /// Finite values observed.
    pub values: u64,
    /// Non-finite values observed (ignored by the ranges).
    pub nonfinite: u64,
}

/// An image that could not be read and was skipped.
#[derive(Debug, Clone, PartialEq)]
pub struct Skipped {
    /// Index in the [`ImageSet`].
    pub index: usize,
    /// The error message (names the file).
    pub reason: String,
}

/// The result of [`run`].
#[derive(Debug, Clone)]
pub struct Calibration {
    /// Chosen ranges, ready to save or lower.
    pub ranges: Ranges,
    /// Per-map statistics, indexed by `MapId`.
    pub stats: Vec<MapStats>,
    /// Indices (into the [`ImageSet`]) of the images observed.
    pub calibration: Vec<usize>,
    /// Indices of the images held out for evaluation (not observed).
    pub evaluation: Vec<usize>,
    /// Unreadable images skipped (only with `skip_bad`), by index.
    pub skipped: Vec<Skipped>,
    /// With [`Method::Auto`]: every candidate's int8 top-1 agreement with
    /// float on the calibration images, in the order tried, and the one
    /// kept.
    pub auto: Option<AutoChoice>,
    /// With [`Method::Auto`], until `agree::choose` has chosen: every
    /// candidate method's ranges and clipped shares (`ranges` holds the
    /// first's). Empty otherwise.
    pub candidates: Vec<(Method, Vec<MapRange>, Vec<f64>)>,
}

/// How [`Method::Auto`] chose.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AutoChoice {
    /// `(method, top-1 agreement)` per candidate.
    pub tried: Vec<(String, f64)>,
    /// The method kept.
    pub chosen: String,
    /// Images the candidates were compared on.
    pub images: usize,
}

/// The deterministic holdout split: image `i` of `n` is held out when
/// `floor((i + 1)·f) > floor(i·f)`, which spreads exactly `floor(n·f)`
/// held-out images evenly through the sorted list (every `1/f`-th image).
/// Returns `(calibration, evaluation)` indices.
pub fn split(n: usize, fraction: f64) -> (Vec<usize>, Vec<usize>) {
    let (mut cal, mut eval) = (Vec::new(), Vec::new());
    for i in 0..n {
        if ((i + 1) as f64 * fraction).floor() > (i as f64 * fraction).floor() {
            eval.push(i);
        } else {
            cal.push(i);
        }
    }
    (cal, eval)
}

/// A progress bar for `len` steps: hidden unless wanted and standard error
/// is a terminal.
pub fn progress_bar(len: u64, wanted: bool, message: &str) -> ProgressBar {
    if !wanted || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let pb = ProgressBar::new(len);
    if let Ok(style) =
        ProgressStyle::with_template("{msg} [{bar:30}] {pos}/{len} images ({per_sec}, eta {eta})")
    {
        pb.set_style(style.progress_chars("=> "));
    }
    pb.set_message(message.to_string());
    pb
}

/// What a calibration pass accumulates per map.
pub trait Accumulate: Send {
    /// Adds one map's values of one image.
    fn observe(&mut self, m: MapId, values: &[f32]);
    /// Combines two partial accumulations. Must be exact and order-free
    /// (counts, minima, maxima) so results do not depend on threads.
    fn merge(self, other: &Self) -> Self;
}

impl Accumulate for Extremes {
    fn observe(&mut self, m: MapId, values: &[f32]) {
        Extremes::observe(self, m, values)
    }
    fn merge(self, other: &Self) -> Self {
        Extremes::merge(self, other)
    }
}

impl Accumulate for Histograms {
    fn observe(&mut self, m: MapId, values: &[f32]) {
        Histograms::observe(self, m, values)
    }
    fn merge(self, other: &Self) -> Self {
        Histograms::merge(self, other)
    }
}

/// One pass over `indices`: loads each image, runs it through `src`, and
/// folds every map into accumulators made by `init`, combined with
/// [`Accumulate::merge`] (exact, so the result does not depend on the
/// thread count). Unreadable images are
/// returned sorted by index when `skip_bad`; otherwise the first one (by
/// index, among those met) is the error.
pub fn pass<S, A>(
    src: &S,
    set: &ImageSet,
    indices: &[usize],
    skip_bad: bool,
    pb: &ProgressBar,
    init: impl Fn() -> A + Sync + Send,
) -> Result<(A, Vec<(usize, ImageError)>), ImageError>
where
    S: MapSource + ?Sized,
    A: Accumulate,
{
    let failed = AtomicBool::new(false);
    let (acc, mut bad) = indices
        .par_iter()
        .fold(
            || (init(), Vec::new()),
            |(mut acc, mut bad), &i| {
                if !skip_bad && failed.load(Ordering::Relaxed) {
                    return (acc, bad);
                }
                match set.load(i) {
                    Ok(sample) => src.run(&sample.input, &mut |m, v| acc.observe(m, v)),
                    Err(e) => {
                        failed.store(true, Ordering::Relaxed);
                        bad.push((i, e));
                    }
                }
                pb.inc(1);
                (acc, bad)
            },
        )
        .reduce(
            || (init(), Vec::new()),
            |(a, mut ba), (b, bb)| {
                ba.extend(bb);
                (a.merge(&b), ba)
            },
        );
    bad.sort_by_key(|(i, _)| *i);
    if !skip_bad {
        if let Some((_, e)) = bad.into_iter().next() {
            return Err(e);
        }
        return Ok((acc, Vec::new()));
    }
    Ok((acc, bad))
}

/// What [`observe_set`] finds: a chosen range and statistics per map, and
/// which images were used for what.
#[derive(Debug, Clone, PartialEq)]
pub struct Observed {
    /// Chosen range per map.
    pub ranges: Vec<MapRange>,
    /// Observed per-channel ranges ([`Ranges::channels`]).
    pub channels: Vec<Option<Vec<MapRange>>>,
    /// Statistics per map.
    pub stats: Vec<MapStats>,
    /// Indices of the images observed.
    pub calibration: Vec<usize>,
    /// Indices held out for evaluation.
    pub evaluation: Vec<usize>,
    /// Unreadable images skipped.
    pub skipped: Vec<Skipped>,
    /// With [`Method::Auto`]: the ranges and clipped shares of every
    /// candidate method (`ranges`/`stats` hold the first's).
    pub candidates: Vec<(Method, Vec<MapRange>, Vec<f64>)>,
}

/// Calibrates `graph` on `images` through `src` (normally the float
/// reference of `graph`; see [`run`]).
pub fn run_with_source<S: MapSource + ?Sized>(
    graph: &Graph,
    src: &S,
    images: &ImageSet,
    opts: &CalibOptions,
) -> Result<Calibration, CalibError> {
    debug_assert_eq!(src.map_count(), graph.map_count());
    let o = observe_set(src, images, opts)?;
    let cal = Calibration {
        ranges: Ranges {
            graph: graph.name().to_string(),
            graph_hash: ranges::graph_hash(graph).map_err(CalibError::Hash)?,
            method: opts.method.to_string(),
            images: o.calibration.len(),
            maps: o.ranges,
            bias_shifts: Default::default(),
            channels: o.channels,
        },
        stats: o.stats,
        calibration: o.calibration,
        evaluation: o.evaluation,
        skipped: o.skipped,
        auto: None,
        candidates: o.candidates,
    };
    Ok(cal)
}

/// The graph-independent core of calibration: both passes over the
/// calibration images of `images` and the choice of every map's range.
pub fn observe_set<S: MapSource + ?Sized>(
    src: &S,
    images: &ImageSet,
    opts: &CalibOptions,
) -> Result<Observed, CalibError> {
    if !(0.0..1.0).contains(&opts.holdout) {
        return Err(CalibError::Holdout(opts.holdout));
    }
    if opts.bins < 2 {
        return Err(CalibError::Bins(opts.bins));
    }
    let n_maps = src.map_count();
    let (cal_all, evaluation) = split(images.len(), opts.holdout);
    let passes = if opts.method.needs_histogram() { 2 } else { 1 };
    let pb = progress_bar(
        (passes * cal_all.len()) as u64,
        opts.progress,
        "calibrating",
    );

    let per_channel: Vec<Option<usize>> =
        (0..n_maps).map(|i| src.channels(MapId(i as u32))).collect();
    let (ext, bad) = pass(src, images, &cal_all, opts.skip_bad, &pb, || {
        Extremes::with_channels(n_maps, &per_channel)
    })?;
    let bad_set: std::collections::BTreeSet<usize> = bad.iter().map(|(i, _)| *i).collect();
    let calibration: Vec<usize> = cal_all
        .iter()
        .copied()
        .filter(|i| !bad_set.contains(i))
        .collect();
    let skipped: Vec<Skipped> = bad
        .into_iter()
        .map(|(index, e)| Skipped {
            index,
            reason: e.to_string(),
        })
        .collect();
    if calibration.is_empty() {
        return Err(CalibError::NoImages {
            listed: images.len(),
            held_out: evaluation.len(),
            skipped: skipped.len(),
        });
    }

    let hist = if opts.method.needs_histogram() {
        pb.set_message("histograms");
        let (h, _) = pass(src, images, &calibration, opts.skip_bad, &pb, || {
            Histograms::new(&ext, opts.bins)
        })?;
        Some(h)
    } else {
        None
    };
    pb.finish_and_clear();

    // Every map's range and clipped share under one method.
    let choose_all = |method: Method| -> (Vec<MapRange>, Vec<f64>) {
        let c: Vec<observe::Choice> = (0..n_maps)
            .into_par_iter()
            .map(|i| observe::choose(method, &ext.maps[i], hist.as_ref().map(|h| &h.maps[i])))
            .collect();
        (
            c.iter().map(|c| c.range).collect(),
            c.iter().map(|c| c.clipped).collect(),
        )
    };
    let candidates: Vec<(Method, Vec<MapRange>, Vec<f64>)> = if opts.method == Method::Auto {
        Method::AUTO_CANDIDATES
            .iter()
            .map(|&m| {
                let (r, c) = choose_all(m);
                (m, r, c)
            })
            .collect()
    } else {
        Vec::new()
    };
    // Until `auto` has chosen, it holds its first candidate (min/max, what
    // `choose` gives `Auto` alone), so that one is not computed twice.
    let (ranges, clipped) = match candidates.first() {
        Some((_, r, c)) => (r.clone(), c.clone()),
        None => choose_all(opts.method),
    };
    let stats = clipped
        .iter()
        .zip(&ext.maps)
        .map(|(&clipped, mm)| MapStats {
            observed: mm.range(),
            clipped,
            values: mm.count,
            nonfinite: mm.nonfinite,
        })
        .collect();
    let channels: Vec<Option<Vec<MapRange>>> = (0..n_maps).map(|i| ext.channel_ranges(i)).collect();
    let channels = if channels.iter().all(Option::is_none) {
        Vec::new()
    } else {
        channels
    };
    Ok(Observed {
        channels,
        ranges,
        stats,
        calibration,
        evaluation,
        skipped,
        candidates,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::graph::{Color, InputSpec, Shape};
    use crate::util::test_rng::Rng;
    use image::{GrayImage, Luma};

    /// A stand-in network: the input, a two-sided map and a ReLU map with a
    /// long tail.
    struct Fake;
    impl MapSource for Fake {
        fn map_count(&self) -> usize {
            3
        }
        fn run(&self, input: &[f32], visit: &mut dyn FnMut(MapId, &[f32])) {
            visit(MapId(0), input);
            let a: Vec<f32> = input
                .iter()
                .map(|x| 3.0 * x - 0.2 + (7.0 * x).sin())
                .collect();
            visit(MapId(1), &a);
            let b: Vec<f32> = a.iter().map(|x| (x * x * x).max(0.0)).collect();
            visit(MapId(2), &b);
        }
    }

    fn spec() -> InputSpec {
        InputSpec {
            name: "input".into(),
            shape: Shape::new(1, 8, 8),
            pixel_scale: 1.0 / 255.0,
            mean: vec![0.5],
            std: vec![0.5],
            color: Color::Gray,
        }
    }

    fn write_images(dir: &std::path::Path, n: usize) {
        let mut rng = Rng::new(7);
        for i in 0..n {
            let img = GrayImage::from_fn(8, 8, |_, _| Luma([(rng.next_u64() >> 56) as u8]));
            img.save(dir.join(format!("img{i:03}.png"))).unwrap();
        }
    }

    fn in_pool<T: Send>(threads: usize, f: impl FnOnce() -> T + Send) -> T {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(f)
    }

    #[test]
    fn holdout_split_is_even_and_exact() {
        assert_eq!(
            split(10, 0.2),
            ((0..10).filter(|i| *i != 4 && *i != 9).collect(), vec![4, 9])
        );
        assert_eq!(split(5, 0.0), (vec![0, 1, 2, 3, 4], vec![]));
        let (cal, eval) = split(1000, 0.25);
        assert_eq!((cal.len(), eval.len()), (750, 250));
        assert!(eval.iter().all(|i| i % 4 == 3));
    }

    #[test]
    fn identical_ranges_with_one_and_two_threads() {
        let dir = tempfile::tempdir().unwrap();
        write_images(dir.path(), 40);
        let set = ImageSet::open_for(dir.path(), &spec(), &[]).unwrap();
        for method in [
            Method::MinMax,
            Method::Percentile(99.0),
            Method::Mse,
            Method::Kl,
        ] {
            let opts = CalibOptions {
                method,
                holdout: 0.1,
                ..CalibOptions::default()
            };
            let one = in_pool(1, || observe_set(&Fake, &set, &opts).unwrap());
            let two = in_pool(2, || observe_set(&Fake, &set, &opts).unwrap());
            assert_eq!(one, two, "{method}");
            // Bit-identical, not merely close.
            for (a, b) in one.ranges.iter().zip(&two.ranges) {
                assert_eq!(
                    (a.min.to_bits(), a.max.to_bits()),
                    (b.min.to_bits(), b.max.to_bits())
                );
            }
            assert_eq!((one.calibration.len(), one.evaluation.len()), (36, 4));
            assert!(
                one.ranges[1].min < 0.0 && one.ranges[1].max > 0.0,
                "{method}: {:?}",
                one.ranges[1]
            );
            assert_eq!(
                one.ranges[2].min, 0.0,
                "{method}: a ReLU map gets a one-sided range"
            );
            assert_eq!(one.stats[0].values, 36 * 64);
        }
    }

    #[test]
    fn skip_bad_counts_unreadable_images() {
        let dir = tempfile::tempdir().unwrap();
        write_images(dir.path(), 5);
        std::fs::write(dir.path().join("img001.png"), b"garbage").unwrap();
        std::fs::write(dir.path().join("img003.png"), b"more garbage").unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(), &[]).unwrap();
        let opts = CalibOptions {
            method: Method::Kl,
            skip_bad: true,
            ..CalibOptions::default()
        };
        let o = observe_set(&Fake, &set, &opts).unwrap();
        assert_eq!(o.calibration, [0, 2, 4]);
        assert_eq!(
            o.skipped.iter().map(|s| s.index).collect::<Vec<_>>(),
            [1, 3]
        );
        assert!(
            o.skipped[0].reason.contains("img001.png"),
            "{}",
            o.skipped[0].reason
        );
        assert_eq!(o.stats[0].values, 3 * 64);
        // Without skip_bad the first bad file is the error.
        let e = observe_set(&Fake, &set, &CalibOptions::default()).unwrap_err();
        assert!(e.to_string().contains("img001.png"), "{e}");
    }

    #[test]
    fn minmax_ranges_match_direct_computation() {
        let dir = tempfile::tempdir().unwrap();
        write_images(dir.path(), 6);
        let set = ImageSet::open_for(dir.path(), &spec(), &[]).unwrap();
        let o = observe_set(&Fake, &set, &CalibOptions::default()).unwrap();
        let (mut lo, mut hi) = (0.0f32, 0.0f32);
        for i in 0..set.len() {
            Fake.run(&set.load(i).unwrap().input, &mut |m, v| {
                if m == MapId(1) {
                    lo = v.iter().fold(lo, |a, &b| a.min(b));
                    hi = v.iter().fold(hi, |a, &b| a.max(b));
                }
            });
        }
        assert_eq!(o.ranges[1], MapRange { min: lo, max: hi });
        assert!(o.stats.iter().all(|s| s.clipped == 0.0));
    }

    #[test]
    fn bad_options_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        write_images(dir.path(), 2);
        let set = ImageSet::open_for(dir.path(), &spec(), &[]).unwrap();
        let e = observe_set(
            &Fake,
            &set,
            &CalibOptions {
                holdout: 1.0,
                ..CalibOptions::default()
            },
        )
        .unwrap_err();
        assert!(e.to_string().contains("holdout 1"), "{e}");
        // Holding out every other image of two leaves one.
        let o = observe_set(
            &Fake,
            &set,
            &CalibOptions {
                holdout: 0.5,
                ..CalibOptions::default()
            },
        )
        .unwrap();
        assert_eq!((o.calibration, o.evaluation), (vec![0], vec![1]));
    }
}
