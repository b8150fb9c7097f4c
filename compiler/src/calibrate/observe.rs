//! Observers: what calibration records about each map. How a range is
//! chosen from it is in [`super::choose`].
//!
//! Calibration reads the images twice. Pass 1 keeps a running minimum and
//! maximum per map ([`Extremes`]). When the method needs a histogram, pass 2
//! fills one per map ([`MapHist`]) over the range fixed by pass 1, so the
//! bins never move and never need re-binning.
//!
//! A map's histogram has two one-sided halves of [`DEFAULT_BINS`] bins each:
//! `pos` counts the values `v >= 0` by `v`, `neg` counts the values `v < 0`
//! by `-v`; each half spans `[0, largest magnitude on that side]`. The two
//! ends of the range are chosen per side, so asymmetric maps get asymmetric
//! ranges, and a map that is never negative (after ReLU) gets a one-sided
//! search with its lower end at 0.
//!
//! Both passes only add integers (counts) and take minima and maxima, which
//! are exact and do not depend on order: the result is bit-identical for any
//! thread count and any split of the images among threads. Memory per map is
//! fixed by the bin count, not by the number of images.

pub use super::choose::{
    choose, kl_threshold, percentile_edge, Choice, Method, KL_EPSILON, MSE_ROUNDS,
};
use crate::calibrate::MapRange;
use crate::graph::MapId;

/// Bins per histogram side.
pub const DEFAULT_BINS: usize = 2048;

/// Running extremes of one map (pass 1). Non-finite values are counted and
/// otherwise ignored.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MinMax {
    /// Smallest finite value seen (`+inf` before any).
    pub min: f32,
    /// Largest finite value seen (`-inf` before any).
    pub max: f32,
    /// Finite values seen.
    pub count: u64,
    /// Non-finite values seen.
    pub nonfinite: u64,
}

impl Default for MinMax {
    fn default() -> Self {
        MinMax {
            min: f32::INFINITY,
            max: f32::NEG_INFINITY,
            count: 0,
            nonfinite: 0,
        }
    }
}

impl MinMax {
    /// Adds values.
    pub fn observe(&mut self, values: &[f32]) {
        let (mut lo, mut hi, mut bad) = (self.min, self.max, 0u64);
        for &v in values {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            } else {
                bad += 1;
            }
        }
        self.min = lo;
        self.max = hi;
        self.nonfinite += bad;
        self.count += values.len() as u64 - bad;
    }

    /// Combines two partial observations (exact, order-free).
    pub fn merge(&mut self, o: &MinMax) {
        self.min = self.min.min(o.min);
        self.max = self.max.max(o.max);
        self.count += o.count;
        self.nonfinite += o.nonfinite;
    }

    /// The observed range widened to contain 0 (`[0, 0]` when nothing was seen).
    pub fn range(&self) -> MapRange {
        if self.count == 0 {
            MapRange { min: 0.0, max: 0.0 }
        } else {
            MapRange {
                min: self.min,
                max: self.max,
            }
            .with_zero()
        }
    }
}

/// Pass-1 state: [`MinMax`] per map, and per channel for the maps that
/// may be quantized per channel.
#[derive(Debug, Clone, PartialEq)]
pub struct Extremes {
    /// Indexed by `MapId`.
    pub maps: Vec<MinMax>,
    /// Per-channel `(min, max)` of finite values, indexed by `MapId`
    /// (`None`: not observed per channel). Values are `[C, H, W]`, so
    /// channel `c` is the `c`-th equal run of a map's values.
    pub channels: Vec<Option<Vec<(f32, f32)>>>,
}

impl Extremes {
    /// Nothing seen yet, for `n` maps.
    pub fn new(n: usize) -> Self {
        Extremes {
            maps: vec![MinMax::default(); n],
            channels: vec![None; n],
        }
    }
    /// Nothing seen yet, for `n` maps, also per channel for each map with
    /// `Some(channel count)` in `per_channel`.
    pub fn with_channels(n: usize, per_channel: &[Option<usize>]) -> Self {
        let mut e = Extremes::new(n);
        for (slot, c) in e.channels.iter_mut().zip(per_channel) {
            *slot = c
                .filter(|&c| c > 0)
                .map(|c| vec![(f32::INFINITY, f32::NEG_INFINITY); c]);
        }
        e
    }
    /// Adds one map's values.
    pub fn observe(&mut self, m: MapId, values: &[f32]) {
        self.maps[m.index()].observe(values);
        if let Some(ch) = self.channels.get_mut(m.index()).and_then(Option::as_mut) {
            let n = ch.len();
            if n > 0 && values.len() % n == 0 {
                for (run, (lo, hi)) in values.chunks(values.len() / n).zip(ch.iter_mut()) {
                    for &v in run.iter().filter(|v| v.is_finite()) {
                        *lo = lo.min(v);
                        *hi = hi.max(v);
                    }
                }
            }
        }
    }
    /// Combines partial observations.
    pub fn merge(mut self, o: &Extremes) -> Self {
        for (a, b) in self.maps.iter_mut().zip(&o.maps) {
            a.merge(b);
        }
        for (a, b) in self.channels.iter_mut().zip(&o.channels) {
            if let (Some(a), Some(b)) = (a.as_mut(), b.as_ref()) {
                for (x, y) in a.iter_mut().zip(b) {
                    x.0 = x.0.min(y.0);
                    x.1 = x.1.max(y.1);
                }
            }
        }
        self
    }
    /// The observed per-channel ranges of map `i` (a channel never seen
    /// finite gets `[0, 0]`).
    pub fn channel_ranges(&self, i: usize) -> Option<Vec<MapRange>> {
        let ch = self.channels.get(i)?.as_ref()?;
        Some(
            ch.iter()
                .map(|&(min, max)| {
                    if min <= max {
                        MapRange { min, max }
                    } else {
                        MapRange { min: 0.0, max: 0.0 }
                    }
                })
                .collect(),
        )
    }
}

/// One side of a map's histogram: counts of magnitudes in `[0, limit]`.
#[derive(Debug, Clone, PartialEq)]
pub struct SideHist {
    /// Largest magnitude on this side (from pass 1); 0 for an empty side.
    pub limit: f32,
    /// Counts per bin; bin `i` holds magnitudes in `[i, i + 1) * limit / bins`
    /// (the last bin also holds `limit`).
    pub counts: Vec<u64>,
}

impl SideHist {
    fn new(limit: f32, bins: usize) -> Self {
        SideHist {
            limit: limit.max(0.0),
            counts: vec![0; bins],
        }
    }

    /// Number of values.
    pub fn total(&self) -> u64 {
        self.counts.iter().sum()
    }

    /// Bin width.
    pub fn width(&self) -> f64 {
        self.limit as f64 / self.counts.len() as f64
    }

    /// The real threshold of bin edge `k` (`k == bins` is exactly `limit`).
    pub fn edge(&self, k: usize) -> f32 {
        if k >= self.counts.len() {
            self.limit
        } else {
            (k as f64 * self.width()) as f32
        }
    }

    #[inline]
    fn bin(&self, a: f32, scale: f64) -> usize {
        let n = self.counts.len();
        ((a as f64 * scale) as usize).min(n - 1)
    }

    /// Values in bins `k..`: those clipped by the edge `k` (at bin resolution).
    pub fn beyond(&self, k: usize) -> u64 {
        self.counts[k.min(self.counts.len())..].iter().sum()
    }
}

/// Pass-2 state of one map.
#[derive(Debug, Clone, PartialEq)]
pub struct MapHist {
    /// Values `>= 0`.
    pub pos: SideHist,
    /// Values `< 0`, by magnitude.
    pub neg: SideHist,
}

impl MapHist {
    /// Empty histogram over the range of `mm` with `bins` bins per side.
    pub fn new(mm: &MinMax, bins: usize) -> Self {
        let r = mm.range();
        MapHist {
            pos: SideHist::new(r.max, bins),
            neg: SideHist::new(-r.min, bins),
        }
    }

    /// Adds values (non-finite ones are skipped, as in pass 1).
    pub fn observe(&mut self, values: &[f32]) {
        let n = self.pos.counts.len() as f64;
        let sp = if self.pos.limit > 0.0 {
            n / self.pos.limit as f64
        } else {
            0.0
        };
        let sn = if self.neg.limit > 0.0 {
            n / self.neg.limit as f64
        } else {
            0.0
        };
        for &v in values {
            if !v.is_finite() {
                continue;
            }
            if v >= 0.0 {
                let b = self.pos.bin(v, sp);
                self.pos.counts[b] += 1;
            } else {
                let b = self.neg.bin(-v, sn);
                self.neg.counts[b] += 1;
            }
        }
    }

    /// Adds another partial histogram over the same bins.
    pub fn merge(&mut self, o: &MapHist) {
        for (a, b) in self.pos.counts.iter_mut().zip(&o.pos.counts) {
            *a += b;
        }
        for (a, b) in self.neg.counts.iter_mut().zip(&o.neg.counts) {
            *a += b;
        }
    }
}

/// Pass-2 state: [`MapHist`] per map.
#[derive(Debug, Clone, PartialEq)]
pub struct Histograms {
    /// Indexed by `MapId`.
    pub maps: Vec<MapHist>,
}

impl Histograms {
    /// Empty histograms over the pass-1 ranges.
    pub fn new(ext: &Extremes, bins: usize) -> Self {
        Histograms {
            maps: ext.maps.iter().map(|m| MapHist::new(m, bins)).collect(),
        }
    }
    /// Adds one map's values.
    pub fn observe(&mut self, m: MapId, values: &[f32]) {
        self.maps[m.index()].observe(values);
    }
    /// Combines partial observations.
    pub fn merge(mut self, o: &Histograms) -> Self {
        for (a, b) in self.maps.iter_mut().zip(&o.maps) {
            a.merge(b);
        }
        self
    }
}
