//! How sure an accuracy comparison is: the statistics behind the accuracy
//! figures of `calibrate` (held-out images) and `check`.
//!
//! Float and int8 classify the *same* images, so their accuracies are
//! paired: what carries the evidence about a drop are the discordant
//! images, those float got right and int8 wrong (`b`) and the reverse
//! (`c`). From them come the exact McNemar test (McNemar 1947), a 95%
//! interval for the paired accuracy difference (Newcombe 1998, method 10)
//! and the number of images that would pin the difference down. For
//! inspection, where one class (or several) means "good part", escapes
//! (a defect passed as good) and overkill (a good part rejected) are
//! counted apart, because an escape usually costs far more.
//!
//! Everything here is a pure function of predictions and labels, so it
//! sits before every stage that reports accuracy.

use serde::Serialize;

/// The standard normal quantile for a two-sided 95% interval,
/// `Φ⁻¹(0.975)`.
pub const Z95: f64 = 1.959_963_984_540_054;

/// A closed interval `[lo, hi]`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Interval {
    /// Lower end.
    pub lo: f64,
    /// Upper end.
    pub hi: f64,
}

impl Interval {
    /// Both ends multiplied by `k` (fractions to percent, say).
    pub fn scaled(self, k: f64) -> Interval {
        Interval {
            lo: self.lo * k,
            hi: self.hi * k,
        }
    }

    /// True when `x` lies inside (ends included).
    pub fn contains(self, x: f64) -> bool {
        self.lo <= x && x <= self.hi
    }
}

/// Wilson score interval (Wilson 1927) for `successes` of `n` at the
/// normal quantile `z`; `None` when `n` is 0.
pub fn wilson_z(successes: u64, n: u64, z: f64) -> Option<Interval> {
    if n == 0 {
        return None;
    }
    let (x, n) = (successes.min(n) as f64, n as f64);
    let z2 = z * z;
    let centre = (x + z2 / 2.0) / (n + z2);
    let half = z * (x * (n - x) / n + z2 / 4.0).sqrt() / (n + z2);
    Some(Interval {
        lo: (centre - half).max(0.0),
        hi: (centre + half).min(1.0),
    })
}

/// 95% Wilson score interval for `successes` of `n`; `None` when `n` is 0.
pub fn wilson(successes: u64, n: u64) -> Option<Interval> {
    wilson_z(successes, n, Z95)
}

/// A paired 2×2 table: outcome of a first and a second classifier on the
/// same items.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct PairedTable {
    /// Both right (`a`).
    pub both: u64,
    /// First right, second wrong (`b`).
    pub first_only: u64,
    /// First wrong, second right (`c`).
    pub second_only: u64,
    /// Both wrong (`d`).
    pub neither: u64,
}

impl PairedTable {
    /// Counts the table from per-item outcomes (`true` = right).
    pub fn count(outcomes: impl IntoIterator<Item = (bool, bool)>) -> PairedTable {
        let mut t = PairedTable::default();
        for o in outcomes {
            match o {
                (true, true) => t.both += 1,
                (true, false) => t.first_only += 1,
                (false, true) => t.second_only += 1,
                (false, false) => t.neither += 1,
            }
        }
        t
    }

    /// Items.
    pub fn n(&self) -> u64 {
        self.both + self.first_only + self.second_only + self.neither
    }

    /// Discordant items, `b + c`.
    pub fn discordant(&self) -> u64 {
        self.first_only + self.second_only
    }
}

/// McNemar's statistic `(b − c)² / (b + c)` (McNemar 1947), without
/// continuity correction; `None` when there is no discordant pair.
pub fn mcnemar_statistic(b: u64, c: u64) -> Option<f64> {
    let n = b + c;
    (n > 0).then(|| {
        let d = b as f64 - c as f64;
        d * d / n as f64
    })
}

/// `ln P(X ≤ k)` for `X ~ Binomial(n, ½)`, in log space so that neither
/// `C(n, k)` nor `2⁻ⁿ` is ever formed: no overflow or underflow for any
/// `n` a `u64` holds, `O(min(k, n − k))` steps.
///
/// `ln(C(n, k) 2⁻ⁿ)` is a sum of `k` logarithms less `n ln 2`, two numbers
/// near `n ln 2` that nearly cancel; a plain sum would lose about `1e-8` of
/// relative precision at `n = 10⁶`, so it is summed with compensation
/// (Neumaier 1974) and `ln 2` split in two parts (as in common `log`
/// implementations). The tail is then summed downwards relative to its
/// largest term `t_k`.
pub fn ln_binomial_half_cdf(k: u64, n: u64) -> f64 {
    if k >= n {
        return 0.0;
    }
    if 2 * k > n {
        // Symmetry at p = ½: P(X ≤ k) = 1 − P(X ≤ n − k − 1).
        return (-ln_binomial_half_cdf(n - k - 1, n).exp_m1()).ln();
    }
    // ln 2 = LN2_HI + LN2_LO with LN2_HI's low 21 bits zero, so n · LN2_HI
    // is exact for n < 2²¹ and nearly so beyond.
    const LN2_HI: f64 = 6.931_471_803_691_238e-1;
    const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
    let (mut sum, mut comp) = (0.0f64, 0.0f64);
    let mut add = |x: f64| {
        let t = sum + x;
        comp += if sum.abs() >= x.abs() {
            (sum - t) + x
        } else {
            (x - t) + sum
        };
        sum = t;
    };
    for i in 0..k {
        add(((n - i) as f64 / (i + 1) as f64).ln());
    }
    let nf = n as f64;
    add(-nf * LN2_HI);
    add(-nf * LN2_LO);
    let ln_tk = sum + comp;
    // t_{i−1} / t_i = i / (n − i + 1) < 1 for i ≤ n/2: terms fall going
    // down, so the sum stops once they no longer change it.
    let (mut r, mut acc) = (1.0f64, 1.0f64);
    let mut i = k;
    while i > 0 {
        r *= i as f64 / (n - i + 1) as f64;
        acc += r;
        if r < acc * 1e-17 {
            break;
        }
        i -= 1;
    }
    (ln_tk + acc.ln()).min(0.0)
}

/// Natural logarithm of the exact McNemar test's two-sided p-value: the
/// two-sided binomial test of `b` successes in `b + c` trials with
/// `p = ½`, `min(1, 2 · P(X ≤ min(b, c)))` (McNemar 1947; the exact form
/// as in Agresti 2002, section 10.1). 0 (p = 1) without discordant pairs.
pub fn mcnemar_exact_ln_p(b: u64, c: u64) -> f64 {
    let n = b + c;
    if n == 0 {
        return 0.0;
    }
    (std::f64::consts::LN_2 + ln_binomial_half_cdf(b.min(c), n)).min(0.0)
}

/// The exact McNemar test's two-sided p-value (see
/// [`mcnemar_exact_ln_p`]); underflows to 0 only below `1e-308`.
pub fn mcnemar_exact_p(b: u64, c: u64) -> f64 {
    mcnemar_exact_ln_p(b, c).exp()
}

/// 95% interval for the paired difference `p₁ − p₂` of the two
/// classifiers' accuracies, `p₁ = (a + b)/n`, `p₂ = (a + c)/n`: Newcombe
/// (1998), "Improved confidence intervals for the difference between
/// binomial proportions based on paired data", method 10 (Wilson score
/// intervals of both proportions combined with the correlation
/// correction φ). `None` for an empty table.
pub fn newcombe_paired(t: &PairedTable) -> Option<Interval> {
    let n = t.n();
    let (a, b, c, d) = (
        t.both as f64,
        t.first_only as f64,
        t.second_only as f64,
        t.neither as f64,
    );
    let nf = n as f64;
    let (x1, x2) = (t.both + t.first_only, t.both + t.second_only);
    let (p1, p2) = (x1 as f64 / nf, x2 as f64 / nf);
    let w1 = wilson(x1, n)?;
    let w2 = wilson(x2, n)?;
    // Marginals e, f (rows) and g, h (columns); φ is 0 when one is empty.
    let (e, f, g, h) = (a + b, c + d, a + c, b + d);
    let prod = e * f * g * h;
    let phi = if prod == 0.0 {
        0.0
    } else {
        let num = a * d - b * c;
        // Newcombe's method 10 shrinks a positive a·d − b·c by n/2
        // (but not below 0) and keeps a negative one.
        let num = if num > nf / 2.0 {
            num - nf / 2.0
        } else if num >= 0.0 {
            0.0
        } else {
            num
        };
        num / prod.sqrt()
    };
    let (dl1, du1) = (p1 - w1.lo, w1.hi - p1);
    let (dl2, du2) = (p2 - w2.lo, w2.hi - p2);
    let diff = p1 - p2;
    let delta = (dl1 * dl1 - 2.0 * phi * dl1 * du2 + du2 * du2)
        .max(0.0)
        .sqrt();
    let eps = (du1 * du1 - 2.0 * phi * du1 * dl2 + dl2 * dl2)
        .max(0.0)
        .sqrt();
    Some(Interval {
        lo: (diff - delta).max(-1.0),
        hi: (diff + eps).min(1.0),
    })
}

/// Labelled items needed for a 95% interval of the paired difference to
/// have half-width `half_width` (a fraction): `z² (ψ − θ²) / h²`, with
/// `ψ` the share of discordant items and `θ` the difference, from the
/// normal approximation of the paired difference's standard error
/// `√((ψ − θ²)/n)` (common practice; the variance is that of the
/// per-item difference, which is ±1 on discordant items and 0 elsewhere).
pub fn images_needed(discordance: f64, difference: f64, half_width: f64) -> u64 {
    let var = (discordance - difference * difference).max(0.0);
    if half_width <= 0.0 {
        return u64::MAX;
    }
    (Z95 * Z95 * var / (half_width * half_width))
        .ceil()
        .max(1.0) as u64
}

/// Float against int8 on the same labelled images.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PairedAccuracy {
    /// Labelled images.
    pub images: u64,
    /// Both right.
    pub both_right: u64,
    /// Float right, int8 wrong (`b`: what int8 lost).
    pub float_only: u64,
    /// Int8 right, float wrong (`c`: what int8 gained).
    pub int8_only: u64,
    /// Both wrong.
    pub both_wrong: u64,
    /// McNemar's statistic `(b − c)²/(b + c)`, without discordant pairs
    /// none.
    pub mcnemar_statistic: Option<f64>,
    /// Exact McNemar two-sided p-value.
    pub mcnemar_p: f64,
    /// `log10` of the p-value (readable where the p-value underflows).
    pub mcnemar_log10_p: f64,
    /// Float accuracy, fraction.
    pub float_accuracy: f64,
    /// Its 95% Wilson interval.
    pub float_interval: Interval,
    /// Int8 accuracy, fraction.
    pub int8_accuracy: f64,
    /// Its 95% Wilson interval.
    pub int8_interval: Interval,
    /// Accuracy drop float − int8, percentage points.
    pub drop_pp: f64,
    /// 95% interval of the drop, percentage points (Newcombe 1998,
    /// method 10).
    pub drop_interval_pp: Interval,
    /// Share of discordant images `(b + c)/n`.
    pub discordance: f64,
    /// The share the image counts below are planned with: the observed
    /// one, or its 95% Wilson upper end when no image is discordant.
    pub planning_discordance: f64,
    /// Labelled images for a ±1 pp interval of the drop.
    pub images_for_1pp: u64,
    /// Labelled images for a ±0.5 pp interval of the drop.
    pub images_for_half_pp: u64,
}

/// The paired comparison of float and int8 predictions against labels;
/// `None` without labelled images. The three slices are read up to the
/// shortest.
pub fn paired_accuracy(
    float_pred: &[usize],
    int8_pred: &[usize],
    labels: &[usize],
) -> Option<PairedAccuracy> {
    let t = PairedTable::count(
        float_pred
            .iter()
            .zip(int8_pred)
            .zip(labels)
            .map(|((f, i), l)| (f == l, i == l)),
    );
    let n = t.n();
    let drop = newcombe_paired(&t)?;
    let nf = n as f64;
    let (fa, ia) = (
        (t.both + t.first_only) as f64 / nf,
        (t.both + t.second_only) as f64 / nf,
    );
    let diff = fa - ia;
    let discordance = t.discordant() as f64 / nf;
    let planning = if t.discordant() == 0 {
        wilson(0, n).map_or(1.0, |w| w.hi)
    } else {
        discordance
    };
    let ln_p = mcnemar_exact_ln_p(t.first_only, t.second_only);
    Some(PairedAccuracy {
        images: n,
        both_right: t.both,
        float_only: t.first_only,
        int8_only: t.second_only,
        both_wrong: t.neither,
        mcnemar_statistic: mcnemar_statistic(t.first_only, t.second_only),
        mcnemar_p: ln_p.exp(),
        mcnemar_log10_p: ln_p / std::f64::consts::LN_10,
        float_accuracy: fa,
        float_interval: wilson(t.both + t.first_only, n)?,
        int8_accuracy: ia,
        int8_interval: wilson(t.both + t.second_only, n)?,
        drop_pp: 100.0 * diff,
        drop_interval_pp: drop.scaled(100.0),
        discordance,
        planning_discordance: planning,
        images_for_1pp: images_needed(planning, diff, 0.01),
        images_for_half_pp: images_needed(planning, diff, 0.005),
    })
}

impl PairedAccuracy {
    /// Whether these images settle `drop ≤ max_pp`: `Some(true)` when the
    /// whole interval is at or below it, `Some(false)` when the whole
    /// interval is above it, `None` when the interval straddles it.
    pub fn settles(&self, max_pp: f64) -> Option<bool> {
        let i = self.drop_interval_pp;
        if i.hi <= max_pp {
            Some(true)
        } else if i.lo > max_pp {
            Some(false)
        } else {
            None
        }
    }

    /// The advice printed when the images cannot settle `--max-drop`,
    /// in plain words; `None` when they do.
    pub fn advice(&self, max_pp: f64) -> Option<String> {
        if self.settles(max_pp).is_some() {
            return None;
        }
        // Targets already reached by the approximation are no advice: the
        // score interval is wider than the approximation when
        // disagreements are rare, so then ask for twice the images.
        let targets: Vec<String> = [
            (self.images_for_1pp, "±1 pp"),
            (self.images_for_half_pp, "±0.5 pp"),
        ]
        .iter()
        .filter(|(n, _)| *n > self.images)
        .map(|(n, w)| format!("about {n} in all for a {w} interval"))
        .collect();
        let more = if targets.is_empty() {
            format!(
                "at least {} in all (disagreements are too rare here for the usual estimate)",
                2 * self.images
            )
        } else {
            targets.join(", ")
        };
        Some(format!(
            "the drop's 95% interval ({}) includes the --max-drop limit of {} pp, so these {} images cannot tell whether int8 stays within it; \
             label more images: {more}",
            interval_pp(self.drop_interval_pp),
            max_pp,
            self.images,
        ))
    }
}

/// Escapes of one defect class.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ClassEscapes {
    /// Class name.
    pub class: String,
    /// Images of the class.
    pub images: u64,
    /// Of them predicted as a good class.
    pub escapes: u64,
    /// `escapes / images`.
    pub rate: f64,
    /// 95% Wilson interval of the rate (`None` without images).
    pub interval: Option<Interval>,
}

/// Escapes and overkill of one classifier.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Sorting {
    /// Labelled defect images (true class not good).
    pub defects: u64,
    /// Defects predicted as a good class.
    pub escapes: u64,
    /// `escapes / defects`.
    pub escape_rate: f64,
    /// 95% Wilson interval of the escape rate.
    pub escape_interval: Option<Interval>,
    /// Labelled good images.
    pub good: u64,
    /// Good images predicted as a defect class.
    pub overkill: u64,
    /// `overkill / good`.
    pub overkill_rate: f64,
    /// 95% Wilson interval of the overkill rate.
    pub overkill_interval: Option<Interval>,
    /// Escapes per defect class, in class order.
    pub per_class: Vec<ClassEscapes>,
}

/// Escapes and overkill of float and int8, and what int8 changed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Escapes {
    /// The good classes.
    pub good_classes: Vec<String>,
    /// Float reference.
    pub float: Sorting,
    /// Int8.
    pub int8: Sorting,
    /// Defects int8 passed as good that float caught.
    pub added_escapes: u64,
    /// Defects float passed as good that int8 caught.
    pub removed_escapes: u64,
    /// Good images int8 rejected that float passed.
    pub added_overkill: u64,
    /// Good images float rejected that int8 passed.
    pub removed_overkill: u64,
}

fn rate(k: u64, n: u64) -> f64 {
    if n == 0 {
        0.0
    } else {
        k as f64 / n as f64
    }
}

fn sorting(pred: &[usize], labels: &[usize], good: &[usize], names: &[String]) -> Sorting {
    let is_good = |c: &usize| good.contains(c);
    let classes = names
        .len()
        .max(labels.iter().map(|&l| l + 1).max().unwrap_or(0));
    let mut per = vec![(0u64, 0u64); classes];
    let (mut defects, mut escapes, mut goods, mut overkill) = (0u64, 0u64, 0u64, 0u64);
    for (p, l) in pred.iter().zip(labels) {
        if is_good(l) {
            goods += 1;
            overkill += !is_good(p) as u64;
        } else {
            defects += 1;
            escapes += is_good(p) as u64;
            per[*l].0 += 1;
            per[*l].1 += is_good(p) as u64;
        }
    }
    let per_class = (0..classes)
        .filter(|c| !is_good(c))
        .map(|c| ClassEscapes {
            class: names.get(c).cloned().unwrap_or_else(|| c.to_string()),
            images: per[c].0,
            escapes: per[c].1,
            rate: rate(per[c].1, per[c].0),
            interval: wilson(per[c].1, per[c].0),
        })
        .collect();
    Sorting {
        defects,
        escapes,
        escape_rate: rate(escapes, defects),
        escape_interval: wilson(escapes, defects),
        good: goods,
        overkill,
        overkill_rate: rate(overkill, goods),
        overkill_interval: wilson(overkill, goods),
        per_class,
    }
}

/// Escapes and overkill of float and int8 predictions against labels,
/// with the classes in `good` meaning "good part" (class indices into
/// `names`).
pub fn escapes(
    float_pred: &[usize],
    int8_pred: &[usize],
    labels: &[usize],
    good: &[usize],
    names: &[String],
) -> Escapes {
    let n = labels.len().min(float_pred.len()).min(int8_pred.len());
    let (fp, ip, labels) = (&float_pred[..n], &int8_pred[..n], &labels[..n]);
    let is_good = |c: &usize| good.contains(c);
    let (mut ae, mut re, mut ao, mut ro) = (0, 0, 0, 0);
    for ((f, i), l) in fp.iter().zip(ip).zip(labels) {
        let (fg, ig) = (is_good(f), is_good(i));
        if is_good(l) {
            ao += (fg && !ig) as u64;
            ro += (!fg && ig) as u64;
        } else {
            ae += (!fg && ig) as u64;
            re += (fg && !ig) as u64;
        }
    }
    Escapes {
        good_classes: good
            .iter()
            .map(|&c| names.get(c).cloned().unwrap_or_else(|| c.to_string()))
            .collect(),
        float: sorting(fp, labels, good, names),
        int8: sorting(ip, labels, good, names),
        added_escapes: ae,
        removed_escapes: re,
        added_overkill: ao,
        removed_overkill: ro,
    }
}

/// Class indices of the names in `good` (comma-separated lists are split),
/// or an error naming the unknown class and the known ones.
pub fn good_classes(good: &[String], labels: &[String]) -> Result<Vec<usize>, String> {
    let mut out = Vec::new();
    for name in good.iter().flat_map(|g| g.split(',')).map(str::trim) {
        if name.is_empty() {
            continue;
        }
        let Some(i) = labels.iter().position(|l| l == name) else {
            return Err(format!(
                "good class `{name}` is not one of the graph's labels ({})",
                labels.join(", ")
            ));
        };
        if !out.contains(&i) {
            out.push(i);
        }
    }
    Ok(out)
}

/// Gates on the statistics (besides `--max-drop` on the point estimate).
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct Gates {
    /// Largest allowed upper end of the drop's 95% interval, pp.
    pub max_drop_upper_pp: Option<f64>,
    /// Largest allowed number of int8 escapes.
    pub max_escapes: Option<u64>,
    /// Largest allowed number of escapes int8 adds to float's.
    pub max_added_escapes: Option<u64>,
}

impl Gates {
    /// True when no gate is set.
    pub fn is_empty(&self) -> bool {
        *self == Gates::default()
    }

    /// A message for every gate not met, each naming its figure and
    /// option; a gate whose figure is missing (no labels, no good class)
    /// fails too, since it cannot be shown to hold.
    pub fn failures(&self, paired: Option<&PairedAccuracy>, esc: Option<&Escapes>) -> Vec<String> {
        let mut out = Vec::new();
        if let Some(max) = self.max_drop_upper_pp {
            match paired {
                // Hundredths of a point, as for --max-drop.
                Some(p) if (p.drop_interval_pp.hi * 100.0).round() > (max * 100.0).round() => {
                    out.push(format!(
                        "accuracy drop: the 95% interval reaches {:.2} pp (drop {:.2} pp, interval {}), above --max-drop-upper {}",
                        p.drop_interval_pp.hi,
                        p.drop_pp,
                        interval_pp(p.drop_interval_pp),
                        max
                    ));
                }
                Some(_) => {}
                None => {
                    out.push("--max-drop-upper needs labelled images (one folder per class)".into())
                }
            }
        }
        for (limit, what, option) in [
            (self.max_escapes, "escapes", "--max-escapes"),
            (
                self.max_added_escapes,
                "escapes added by int8",
                "--max-added-escapes",
            ),
        ] {
            let Some(max) = limit else { continue };
            match esc {
                Some(e) => {
                    let v = if option == "--max-escapes" {
                        e.int8.escapes
                    } else {
                        e.added_escapes
                    };
                    if v > max {
                        out.push(format!(
                            "{what}: {v} (int8 passed {} of {} defects as good) exceeds {option} {max}",
                            e.int8.escapes, e.int8.defects
                        ));
                    }
                }
                None => out.push(format!("{option} needs labelled images and --good CLASS")),
            }
        }
        out
    }
}

/// A p-value for people: 2 significant digits, scientific below 0.001.
pub fn p_value(p: f64, log10_p: f64) -> String {
    if p >= 0.001 {
        format!("{p:.2}")
    } else if p > 0.0 {
        format!("{p:.1e}")
    } else {
        format!("1e{}", log10_p.floor())
    }
}

/// An interval in percentage points, e.g. `-0.12 to 1.80 pp`.
pub fn interval_pp(i: Interval) -> String {
    format!("{:.2} to {:.2} pp", i.lo, i.hi)
}

/// A fraction's interval in percent, e.g. `98.1–99.9%`.
pub fn interval_pct(i: Option<Interval>) -> String {
    match i {
        Some(i) => format!("{:.2}–{:.2}%", 100.0 * i.lo, 100.0 * i.hi),
        None => crate::util::MISSING.into(),
    }
}
