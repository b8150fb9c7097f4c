//! Range choosers: how one map's int8 range is chosen from what the
//! observers of [`super::observe`] recorded.
//!
//! Methods (compared, among others, by Wu et al. 2020, "Integer
//! Quantization for Deep Learning Inference: Principles and Empirical
//! Evaluation"):
//! - `minmax`: the observed minimum and maximum.
//! - `percentile:P`: on each side, the smallest bin edge such that at most
//!   `(100 - P)%` of all the map's values lie beyond it.
//! - `mse`: the pair of ends minimising the expected squared error of
//!   quantizing the histogram: values inside the range contribute the
//!   rounding noise `Δ²/12` of the 256-code grid `Δ = (max - min) / 255`,
//!   values beyond an end contribute their squared distance to it (the
//!   trade-off analysed by Banner et al. 2019, "Post-training 4-bit
//!   quantization of convolution networks for rapid-deployment"). The two
//!   ends are coupled through `Δ`; they are found by alternating exact
//!   one-sided searches (coordinate descent, [`MSE_ROUNDS`] rounds).
//! - `kl`: on each side, the bin edge minimising the Kullback–Leibler
//!   divergence (Kullback & Leibler 1951) between the observed distribution
//!   clipped at that edge (the clipped mass kept in the last bin) and its
//!   quantized version, in which the bins are merged into as many groups as
//!   the side has int8 codes and each group's mass is spread evenly over its
//!   non-empty bins (see [`kl_threshold`]).
//!
//! Candidate ends of the histogram methods are bin edges `k * width`;
//! the last edge is the exact observed extreme.

use super::observe::{MapHist, MinMax};
use crate::calibrate::MapRange;
use std::fmt;
use std::str::FromStr;

/// Floor of the normalised quantized distribution in the `kl` method.
pub const KL_EPSILON: f64 = 1e-4;

/// Coordinate-descent rounds of the `mse` search.
pub const MSE_ROUNDS: usize = 4;

/// How a map's range is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Method {
    /// Observed minimum and maximum.
    MinMax,
    /// Clip `(100 - P)%` of the values on each side; `P` in `(0, 100]`.
    Percentile(f64),
    /// Minimise the expected squared quantization error.
    Mse,
    /// Minimise the KL divergence to the quantized histogram.
    Kl,
    /// Try each of [`Method::AUTO_CANDIDATES`] and keep the one whose int8
    /// network agrees best with the float network on the calibration
    /// images (ties go to the earlier candidate).
    Auto,
}

impl Method {
    /// The methods [`Method::Auto`] chooses from, in order of preference.
    pub const AUTO_CANDIDATES: [Method; 6] = [
        Method::MinMax,
        Method::Percentile(99.99),
        Method::Percentile(99.95),
        Method::Percentile(99.9),
        Method::Mse,
        Method::Kl,
    ];

    /// True when the method needs the histogram pass.
    pub fn needs_histogram(self) -> bool {
        !matches!(self, Method::MinMax)
    }
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Method::MinMax => f.write_str("minmax"),
            Method::Auto => f.write_str("auto"),
            Method::Percentile(p) => write!(f, "percentile:{p}"),
            Method::Mse => f.write_str("mse"),
            Method::Kl => f.write_str("kl"),
        }
    }
}

impl FromStr for Method {
    type Err = String;
    fn from_str(s: &str) -> Result<Method, String> {
        match s {
            "minmax" => Ok(Method::MinMax),
            "mse" => Ok(Method::Mse),
            "kl" => Ok(Method::Kl),
            "auto" => Ok(Method::Auto),
            _ => {
                let p = s.strip_prefix("percentile:").ok_or_else(|| {
                    format!("unknown method `{s}`; expected minmax, percentile:P (e.g. percentile:99.99), mse, kl or auto")
                })?;
                let v: f64 = p
                    .parse()
                    .map_err(|_| format!("percentile `{p}` is not a number"))?;
                if !(v > 0.0 && v <= 100.0) {
                    return Err(format!("percentile {v} is not in (0, 100]"));
                }
                Ok(Method::Percentile(v))
            }
        }
    }
}

/// The range chosen for one map and what it costs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Choice {
    /// Chosen range (contains 0).
    pub range: MapRange,
    /// Share of the observed values beyond the range, at bin resolution
    /// (0 for `minmax`).
    pub clipped: f64,
}

/// Chooses one map's range. `hist` is required for every method but
/// `minmax`.
pub fn choose(method: Method, mm: &MinMax, hist: Option<&MapHist>) -> Choice {
    let observed = mm.range();
    let h = match (method, hist) {
        // `Auto` is resolved by the caller; alone it means the observed range.
        (Method::MinMax | Method::Auto, _) | (_, None) => {
            return Choice {
                range: observed,
                clipped: 0.0,
            }
        }
        (_, Some(h)) => h,
    };
    let bins = h.pos.counts.len();
    let total = h.pos.total() + h.neg.total();
    if total == 0 {
        return Choice {
            range: observed,
            clipped: 0.0,
        };
    }
    let (kp, kn) = match method {
        Method::MinMax | Method::Auto => unreachable!(),
        Method::Percentile(p) => {
            let allowed = ((1.0 - p / 100.0) * total as f64).floor() as u64;
            (
                percentile_edge(&h.pos.counts, allowed),
                percentile_edge(&h.neg.counts, allowed),
            )
        }
        Method::Mse => mse_edges(h),
        Method::Kl => {
            let (np, nn) = (h.pos.total(), h.neg.total());
            let levels = |other: u64| if other == 0 { 256 } else { 128 };
            let kp = if np == 0 {
                bins
            } else {
                kl_threshold(&h.pos.counts, levels(nn))
            };
            let kn = if nn == 0 {
                bins
            } else {
                kl_threshold(&h.neg.counts, levels(np))
            };
            (kp, kn)
        }
    };
    let clipped = (h.pos.beyond(kp) + h.neg.beyond(kn)) as f64 / total as f64;
    Choice {
        range: MapRange {
            min: -h.neg.edge(kn),
            max: h.pos.edge(kp),
        }
        .with_zero(),
        clipped,
    }
}

/// The smallest edge `k` in `0..=bins` such that at most `allowed` values lie
/// in bins `k..`.
pub fn percentile_edge(counts: &[u64], allowed: u64) -> usize {
    let mut beyond = 0u64;
    for k in (0..counts.len()).rev() {
        beyond += counts[k];
        if beyond > allowed {
            return k + 1;
        }
    }
    0
}

/// Integer moments of one side for the exact squared clipping error.
///
/// In half-bin units a value of bin `i` sits at `2i + 1` and edge `k` at
/// `2k`, so `4 · Σ_{i ≥ k} h_i ((i + ½) - k)² = S2(k) - 4k·S1(k) + 4k²·S0(k)`
/// with suffix sums `S0 = Σ h_i`, `S1 = Σ h_i (2i+1)`, `S2 = Σ h_i (2i+1)²`,
/// computed exactly in integers (no cancellation).
struct Moments {
    s0: Vec<i128>,
    s1: Vec<i128>,
    s2: Vec<i128>,
}

impl Moments {
    fn new(counts: &[u64]) -> Self {
        let n = counts.len();
        let (mut s0, mut s1, mut s2) = (vec![0i128; n + 1], vec![0i128; n + 1], vec![0i128; n + 1]);
        for i in (0..n).rev() {
            let h = counts[i] as i128;
            let d = 2 * i as i128 + 1;
            s0[i] = s0[i + 1] + h;
            s1[i] = s1[i + 1] + h * d;
            s2[i] = s2[i + 1] + h * d * d;
        }
        Moments { s0, s1, s2 }
    }
    /// Squared clipping error at edge `k`, in squared bin widths.
    fn clip(&self, k: usize) -> f64 {
        let t = 2 * k as i128;
        let four = self.s2[k] - 2 * t * self.s1[k] + t * t * self.s0[k];
        four as f64 / 4.0
    }
    /// Values inside edge `k` (bins `..k`).
    fn inside(&self, k: usize) -> f64 {
        (self.s0[0] - self.s0[k]) as f64
    }
}

/// Expected squared error of quantizing the map to `[-edge(kn), edge(kp)]`
/// with 256 codes: rounding noise `Δ²/12` for every value inside, squared
/// distance to the end for every value beyond (values at bin centres).
fn mse_error(h: &MapHist, mp: &Moments, mn: &Moments, kp: usize, kn: usize) -> f64 {
    let (wp, wn) = (h.pos.width(), h.neg.width());
    let delta = (h.pos.edge(kp) as f64 + h.neg.edge(kn) as f64) / 255.0;
    let inside = mp.inside(kp) + mn.inside(kn);
    delta * delta / 12.0 * inside + mp.clip(kp) * wp * wp + mn.clip(kn) * wn * wn
}

/// The `mse` edges `(kp, kn)`.
fn mse_edges(h: &MapHist) -> (usize, usize) {
    let bins = h.pos.counts.len();
    let (mp, mn) = (Moments::new(&h.pos.counts), Moments::new(&h.neg.counts));
    let (has_p, has_n) = (
        h.pos.total() > 0 && h.pos.limit > 0.0,
        h.neg.total() > 0 && h.neg.limit > 0.0,
    );
    let (mut kp, mut kn) = (if has_p { bins } else { 0 }, if has_n { bins } else { 0 });
    // First-minimum searches over one end with the other fixed; each round
    // cannot increase the error, and the rounds are few and deterministic.
    let best = |f: &dyn Fn(usize) -> f64| {
        let (mut bk, mut be) = (bins, f(bins));
        for k in 1..bins {
            let e = f(k);
            if e < be {
                (bk, be) = (k, e);
            }
        }
        bk
    };
    for _ in 0..MSE_ROUNDS {
        let (op, on) = (kp, kn);
        if has_p {
            kp = best(&|k| mse_error(h, &mp, &mn, k, kn));
        }
        if has_n {
            kn = best(&|k| mse_error(h, &mp, &mn, kp, k));
        }
        if (kp, kn) == (op, on) {
            break;
        }
    }
    (kp, kn)
}

/// The KL edge of one histogram side quantized to `levels` codes: the `k`
/// in `levels..=bins` minimising `KL(P‖Q)`, first minimum on ties (`bins`
/// when there are no more bins than levels).
///
/// For a candidate `k`:
/// - `P` is bins `0..k` with all the mass of bins `k..` added to bin `k-1`
///   (clipped values land on the end of the range);
/// - `Q` merges bins `0..k` (without the clipped mass) into `levels` groups,
///   group `j` being bins `[j·k/levels, (j+1)·k/levels)`, and spreads each
///   group's mass evenly over the group's bins where `P > 0` (bins where
///   `P = 0` stay 0);
/// - both are normalised, and `KL(P‖Q) = Σ_{P_i > 0} p_i ln(p_i / q_i)`
///   where `Q` is first floored at [`KL_EPSILON`] (after normalising) in
///   the bins where `P > 0` and renormalised, so that an end whose last
///   group holds no unclipped value is penalised rather than excluded.
pub fn kl_threshold(counts: &[u64], levels: usize) -> usize {
    let bins = counts.len();
    if bins <= levels {
        return bins;
    }
    let mut best = (bins, f64::INFINITY);
    let mut p = vec![0f64; bins];
    let mut q = vec![0f64; bins];
    let mut beyond: u64 = counts.iter().sum();
    // `beyond` = Σ counts[k-1..] at the top of each iteration.
    beyond -= counts[..levels - 1].iter().sum::<u64>();
    for k in levels..=bins {
        let kl = kl_at(counts, levels, k, beyond, &mut p, &mut q);
        if kl < best.1 {
            best = (k, kl);
        }
        beyond -= counts[k - 1];
    }
    best.0
}

fn kl_at(
    counts: &[u64],
    levels: usize,
    k: usize,
    beyond: u64,
    p: &mut [f64],
    q: &mut [f64],
) -> f64 {
    for i in 0..k - 1 {
        p[i] = counts[i] as f64;
    }
    p[k - 1] = beyond as f64;
    for j in 0..levels {
        let (a, b) = (j * k / levels, (j + 1) * k / levels);
        let mass: u64 = counts[a..b].iter().sum();
        let nonzero = p[a..b].iter().filter(|&&v| v > 0.0).count();
        for i in a..b {
            q[i] = if p[i] > 0.0 {
                mass as f64 / nonzero as f64
            } else {
                0.0
            };
        }
    }
    let (sp, sq): (f64, f64) = (p[..k].iter().sum(), q[..k].iter().sum());
    if sp == 0.0 || sq == 0.0 {
        return f64::INFINITY;
    }
    // Normalise Q, floor it at KL_EPSILON where P > 0 (a group emptied by
    // the clipping cannot represent the clipped mass), and renormalise.
    let mut sq2 = 0.0;
    for i in 0..k {
        if p[i] > 0.0 {
            q[i] = (q[i] / sq).max(KL_EPSILON);
            sq2 += q[i];
        }
    }
    let mut kl = 0.0;
    for i in 0..k {
        if p[i] > 0.0 {
            let (pi, qi) = (p[i] / sp, q[i] / sq2);
            kl += pi * (pi / qi).ln();
        }
    }
    kl
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::calibrate::observe::SideHist;

    fn hist_of(values: &[f32], bins: usize) -> (MinMax, MapHist) {
        let mut mm = MinMax::default();
        mm.observe(values);
        let mut h = MapHist::new(&mm, bins);
        h.observe(values);
        (mm, h)
    }

    #[test]
    fn method_parses_and_prints() {
        assert_eq!("minmax".parse::<Method>().unwrap(), Method::MinMax);
        assert_eq!(
            "percentile:99.99".parse::<Method>().unwrap(),
            Method::Percentile(99.99)
        );
        assert_eq!("mse".parse::<Method>().unwrap(), Method::Mse);
        assert_eq!("kl".parse::<Method>().unwrap(), Method::Kl);
        assert_eq!(Method::Percentile(99.9).to_string(), "percentile:99.9");
        assert!("percentile:0".parse::<Method>().is_err());
        assert!("percentile:101".parse::<Method>().is_err());
        assert!("entropy"
            .parse::<Method>()
            .unwrap_err()
            .contains("unknown method `entropy`"));
    }

    #[test]
    fn minmax_merge_is_exact_and_ignores_nonfinite() {
        let (mut a, mut b) = (MinMax::default(), MinMax::default());
        a.observe(&[1.0, -2.0, f32::NAN]);
        b.observe(&[5.0, f32::INFINITY, 0.5]);
        a.merge(&b);
        assert_eq!((a.min, a.max, a.count, a.nonfinite), (-2.0, 5.0, 4, 2));
        assert_eq!(MinMax::default().range(), MapRange { min: 0.0, max: 0.0 });
        // A positive-only map's range is widened down to 0.
        let mut c = MinMax::default();
        c.observe(&[0.5, 3.0]);
        assert_eq!(c.range(), MapRange { min: 0.0, max: 3.0 });
    }

    #[test]
    fn histogram_bins_both_sides() {
        // limit 4 on each side, 4 bins of width 1.
        let (_, h) = hist_of(&[-4.0, -0.5, 0.0, 0.5, 1.5, 3.99, 4.0], 4);
        assert_eq!(h.pos.counts, vec![2, 1, 0, 2]);
        assert_eq!(h.neg.counts, vec![1, 0, 0, 1]);
        assert_eq!(h.pos.edge(2), 2.0);
        assert_eq!(h.pos.edge(4), 4.0);
    }

    /// KL choice on a histogram small enough to compute by hand.
    ///
    /// counts h = [6, 2, 1, 1], 2 levels; candidates k = 2, 3, 4.
    ///
    /// k = 2: P = [6, 2+1+1] = [6, 4]; groups {0}, {1}: Q = [6, 2].
    ///   p = [0.6, 0.4], q = [0.75, 0.25];
    ///   KL = 0.6 ln(0.8) + 0.4 ln(1.6) = -0.133886 + 0.188001 = 0.054115.
    /// k = 3: P = [6, 2, 1+1] = [6, 2, 2]; groups [0,1) and [1,3):
    ///   Q = [6, 3/2, 3/2]; p = [0.6, 0.2, 0.2], q = [6/9, 1/6, 1/6];
    ///   KL = 0.6 ln(0.9) + 0.4 ln(1.2) = -0.063216 + 0.072929 = 0.009713.
    /// k = 4: P = [6, 2, 1, 1]; groups [0,2) and [2,4): Q = [4, 4, 1, 1];
    ///   p = [0.6, 0.2, 0.1, 0.1], q = [0.4, 0.4, 0.1, 0.1];
    ///   KL = 0.6 ln(1.5) + 0.2 ln(0.5) = 0.243279 - 0.138629 = 0.104650.
    /// Smallest: k = 3.
    #[test]
    fn kl_threshold_matches_hand_computation() {
        let h = [6u64, 2, 1, 1];
        let (mut p, mut q) = (vec![0.0; 4], vec![0.0; 4]);
        let expect = [(2, 4u64, 0.054115), (3, 2, 0.009713), (4, 1, 0.104650)];
        for (k, beyond, kl) in expect {
            let got = kl_at(&h, 2, k, beyond, &mut p, &mut q);
            assert!((got - kl).abs() < 1e-5, "k = {k}: {got} vs {kl}");
        }
        assert_eq!(kl_threshold(&h, 2), 3);
        // With no more bins than levels nothing is clipped.
        assert_eq!(kl_threshold(&h, 4), 4);
    }

    /// Exponential quantiles `-ln(1 - (i + ½)/n)`: a long, thinning tail.
    fn exponential(n: usize) -> Vec<f32> {
        (0..n)
            .map(|i| -(1.0 - (i as f64 + 0.5) / n as f64).ln() as f32)
            .collect()
    }

    #[test]
    fn kl_clips_a_long_tail_and_outliers() {
        // 100,000 exponential values (max ≈ 12.2) and 5 outliers near 100.
        // Spread over 2048 bins, the bulk needs fine bins to keep its shape,
        // so the KL end lies far below the outliers, yet above the bulk's
        // 99th percentile (ln 100 ≈ 4.6).
        let mut v = exponential(100_000);
        v.extend([96.0, 97.0, 98.0, 99.0, 100.0]);
        let (mm, h) = hist_of(&v, 2048);
        let kl = choose(Method::Kl, &mm, Some(&h));
        assert!(kl.range.max > 4.6 && kl.range.max < 20.0, "{:?}", kl.range);
        // Without the outliers the tail alone is clipped, less hard.
        let (mm2, h2) = hist_of(&exponential(100_000), 2048);
        let kl2 = choose(Method::Kl, &mm2, Some(&h2));
        assert!(
            kl2.range.max > 4.6 && kl2.range.max < mm2.max,
            "{:?} vs {}",
            kl2.range,
            mm2.max
        );
        assert_eq!(kl.range.min, 0.0);
        assert!(kl.clipped > 0.0 && kl.clipped < 0.01, "{}", kl.clipped);
        assert_eq!(choose(Method::MinMax, &mm, Some(&h)).range.max, 100.0);
    }

    /// Percentile ends on a histogram given bin by bin (limit 10, width 1):
    /// counts [50, 20, 10, 8, 5, 3, 2, 1, 0, 1], 100 values.
    /// P = 95 allows 5 values beyond: from the top the suffix counts are
    /// 1, 1, 2, 4, 7 (bins 9..5), so the edge is 6 (4 values clipped).
    /// P = 99 allows 1: suffix counts 1, 1, 2 → edge 8 (1 value clipped).
    /// P = 100 allows none: the edge is the maximum, 10.
    #[test]
    fn percentile_on_known_histogram() {
        let counts = vec![50u64, 20, 10, 8, 5, 3, 2, 1, 0, 1];
        assert_eq!(percentile_edge(&counts, 5), 6);
        assert_eq!(percentile_edge(&counts, 1), 8);
        assert_eq!(percentile_edge(&counts, 0), 10);
        assert_eq!(percentile_edge(&counts, 100), 0);
        let h = MapHist {
            pos: SideHist {
                limit: 10.0,
                counts,
            },
            neg: SideHist {
                limit: 0.0,
                counts: vec![0; 10],
            },
        };
        let mm = MinMax {
            min: 0.0,
            max: 10.0,
            count: 100,
            nonfinite: 0,
        };
        let c = choose(Method::Percentile(95.0), &mm, Some(&h));
        assert_eq!(c.range, MapRange { min: 0.0, max: 6.0 });
        assert!((c.clipped - 0.04).abs() < 1e-12);
        let c = choose(Method::Percentile(99.0), &mm, Some(&h));
        assert_eq!(c.range, MapRange { min: 0.0, max: 8.0 });
        assert!((c.clipped - 0.01).abs() < 1e-12);
        assert_eq!(
            choose(Method::Percentile(100.0), &mm, Some(&h)).range.max,
            10.0
        );
    }

    #[test]
    fn percentile_is_asymmetric() {
        // 1000 values in [0, 1), 1000 in (-3, 0], and one at -50: the
        // 99.9th percentile drops the outlier but keeps both bulk ends.
        let mut v: Vec<f32> = (0..1000).map(|i| i as f32 / 1000.0).collect();
        v.extend((0..1000).map(|i| -3.0 * i as f32 / 1000.0));
        v.push(-50.0);
        let (mm, h) = hist_of(&v, 2048);
        let c = choose(Method::Percentile(99.9), &mm, Some(&h));
        assert!(c.range.min > -3.1 && c.range.min < -2.9, "{:?}", c.range);
        assert!(c.range.max > 0.95 && c.range.max <= 1.0, "{:?}", c.range);
    }

    /// 1,000,000 values uniform in [0, 1] and one outlier at 10. Keeping
    /// the whole range costs rounding noise `N·Δ²/12` with `Δ = t/255`,
    /// i.e. `1.2816·t²` for `N = 10⁶`; clipping at `t ≥ 1` costs `(10 - t)²`
    /// for the outlier. The sum is smallest at `t = 10 / (1 + 1.2816) ≈ 4.38`
    /// (error ≈ 56, against 128 at `t = 10` and 82 at `t = 1`).
    #[test]
    fn mse_clips_an_outlier_minmax_does_not() {
        let mut v: Vec<f32> = (0..1_000_000).map(|i| i as f32 / 999_999.0).collect();
        v.push(10.0);
        let (mm, h) = hist_of(&v, 2048);
        let mse = choose(Method::Mse, &mm, Some(&h));
        let minmax = choose(Method::MinMax, &mm, Some(&h));
        assert_eq!(minmax.range.max, 10.0);
        assert_eq!(minmax.clipped, 0.0);
        assert!((mse.range.max - 4.38).abs() < 0.05, "{:?}", mse.range);
        assert_eq!(mse.range.min, 0.0);
        assert!(
            (mse.clipped - 1.0 / 1_000_001.0).abs() < 1e-12,
            "{}",
            mse.clipped
        );
    }

    #[test]
    fn mse_keeps_a_uniform_range_whole() {
        // Clipping a uniform distribution only adds error: the end stays at
        // the maximum (within a bin or two).
        let v: Vec<f32> = (-5000..=5000).map(|i| i as f32 / 5000.0).collect();
        let (mm, h) = hist_of(&v, 2048);
        let c = choose(Method::Mse, &mm, Some(&h));
        assert!(c.range.max > 0.99 && c.range.min < -0.99, "{:?}", c.range);
    }

    #[test]
    fn mse_two_sided_outlier() {
        // 10⁶ values in [-1, 1] and one at -10: the negative end is clipped
        // (same trade-off as above with Δ = (t + 1)/255), the positive end
        // kept.
        let mut v: Vec<f32> = (0..=1_000_000)
            .map(|i| i as f32 / 500_000.0 - 1.0)
            .collect();
        v.push(-10.0);
        let (mm, h) = hist_of(&v, 2048);
        let c = choose(Method::Mse, &mm, Some(&h));
        assert!(c.range.min > -6.0 && c.range.min < -1.0, "{:?}", c.range);
        assert!(c.range.max > 0.99, "{:?}", c.range);
    }

    #[test]
    fn exact_clip_error_matches_direct_sum() {
        let counts = [3u64, 0, 7, 1, 4, 2];
        let m = Moments::new(&counts);
        for k in 0..=counts.len() {
            let direct: f64 = (k..counts.len())
                .map(|i| counts[i] as f64 * (i as f64 + 0.5 - k as f64).powi(2))
                .sum();
            assert!((m.clip(k) - direct).abs() < 1e-9, "k = {k}");
        }
        assert_eq!(m.inside(2), 3.0);
    }
}
