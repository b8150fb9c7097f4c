//! Procedural, **invented** photos of brushed aluminium brackets, 64x64
//! grayscale, in four classes.
//!
//! Every image is a pure function of one 64-bit seed and its class. The
//! drawing uses only `+ - * /` and `sqrt` on `f64` (no `sin`, `exp` or `ln`
//! from the platform's maths library), so the bytes are the same everywhere.
//!
//! What the classes look like:
//! - every image: a base grey level, fine brushing streaks along a random
//!   near-horizontal direction (the texture's small rotation), a linear
//!   lighting gradient of random direction and strength, sometimes a soft
//!   elongated sheen band along the brushing, and sensor noise;
//! - `ok`: nothing else;
//! - `scratch`: a thin anti-aliased line, 15-45 px long, 1-2 px wide, at any
//!   angle, brighter or darker than the metal, moderate contrast;
//! - `pit`: a small dark disc, radius 1.5-3.5 px, with a bright rim on the
//!   side facing the light;
//! - `stain`: a soft, low-contrast, roughly round blob, radius 6-14 px, flat
//!   in the middle with a soft edge (super-Gaussian falloff), usually
//!   darker, sometimes slightly brighter.

use crate::rng::{derive, mix, Rng};

/// Image side in pixels.
pub const SIZE: usize = 64;

/// Class names, in output order.
pub const CLASSES: [&str; 4] = ["ok", "scratch", "pit", "stain"];

/// Seed of the committed calibration and evaluation sets.
pub const COMMITTED_SEED: u64 = 2026;

/// Default seed of the training set (generated in memory, never committed).
pub const TRAIN_SEED: u64 = 777_001;

/// Tags that keep the three sets' seed streams apart.
const TAG_EVAL: u64 = 1;
const TAG_CALIBRATION: u64 = 2;
const TAG_TRAIN: u64 = 3;

/// Seed and class of evaluation image `index` of class `class`.
pub fn eval_sample(seed: u64, class: usize, index: usize) -> u64 {
    derive(&[seed, TAG_EVAL, class as u64, index as u64])
}

/// Seed and class of (unlabelled) calibration image `index`.
pub fn calibration_sample(seed: u64, index: usize) -> (u64, usize) {
    let s = derive(&[seed, TAG_CALIBRATION, index as u64]);
    (s, Rng::new(s ^ 0xC1A5_5000).below(CLASSES.len()))
}

/// Seed and class of training image `index` (classes in turn).
pub fn train_sample(seed: u64, index: usize) -> (u64, usize) {
    (
        derive(&[seed, TAG_TRAIN, index as u64]),
        index % CLASSES.len(),
    )
}

/// `exp(-x)` for `x >= 0` from basic arithmetic only (relative error
/// about 1e-9 over the range used here).
fn exp_neg(x: f64) -> f64 {
    if x > 40.0 {
        return 0.0;
    }
    // exp(-x) = exp(-x / 1024)^1024, the small power by a Taylor series.
    let y = -x / 1024.0;
    let mut e = 1.0 + y * (1.0 + y * (0.5 + y * (1.0 / 6.0 + y * (1.0 / 24.0))));
    for _ in 0..10 {
        e *= e;
    }
    e
}

fn smooth(t: f64) -> f64 {
    t * t * (3.0 - 2.0 * t)
}

/// Lattice value noise in `[-1, 1]`, bilinear with smoothstep weights.
struct ValueNoise {
    seed: u64,
}

impl ValueNoise {
    fn lattice(&self, i: i64, j: i64) -> f64 {
        let h = mix(self.seed
            ^ mix((i as u64).wrapping_mul(0x1F1F_1F1F) ^ (j as u64).wrapping_mul(0x9E37_79B9)));
        (h >> 11) as f64 * (2.0 / (1u64 << 53) as f64) - 1.0
    }

    fn at(&self, x: f64, y: f64) -> f64 {
        let (fx, fy) = (x.floor(), y.floor());
        let (i, j) = (fx as i64, fy as i64);
        let (tx, ty) = (smooth(x - fx), smooth(y - fy));
        let a = self.lattice(i, j) + tx * (self.lattice(i + 1, j) - self.lattice(i, j));
        let b = self.lattice(i, j + 1) + tx * (self.lattice(i + 1, j + 1) - self.lattice(i, j + 1));
        a + ty * (b - a)
    }
}

/// Distance from point `p` to segment `a`-`b`, and the position along it in `[0, 1]`.
fn segment_distance(p: (f64, f64), a: (f64, f64), b: (f64, f64)) -> (f64, f64) {
    let (dx, dy) = (b.0 - a.0, b.1 - a.1);
    let len2 = dx * dx + dy * dy;
    let t = (((p.0 - a.0) * dx + (p.1 - a.1) * dy) / len2).clamp(0.0, 1.0);
    let (qx, qy) = (a.0 + t * dx - p.0, a.1 + t * dy - p.1);
    ((qx * qx + qy * qy).sqrt(), t)
}

/// Renders one image of class `class` (index into [`CLASSES`]) from `seed`:
/// `SIZE * SIZE` bytes, row-major.
pub fn render(seed: u64, class: usize) -> Vec<u8> {
    assert!(class < CLASSES.len(), "class {class} out of range");
    let mut rng = Rng::new(seed);
    let n = SIZE as f64;
    let mut img = vec![0.0f64; SIZE * SIZE];

    // Metal: base level, brushing, lighting, sheen band.
    let base = rng.range(0.33, 0.67);
    // Near-horizontal brushing direction: slope up to about +-0.25 rad.
    let slope = rng.range(-0.26, 0.26);
    let norm = (1.0 + slope * slope).sqrt();
    let (cu, su) = (1.0 / norm, slope / norm); // along the streaks
    let fine = ValueNoise {
        seed: rng.next_u64(),
    };
    let coarse = ValueNoise {
        seed: rng.next_u64(),
    };
    let fine_amp = rng.range(0.015, 0.03);
    let coarse_amp = rng.range(0.006, 0.016);
    let fine_len = rng.range(12.0, 30.0);
    let (ox, oy) = (rng.range(0.0, 1000.0), rng.range(0.0, 1000.0));
    let light = rng.unit_vector();
    let grad = rng.range(0.0, 0.10);
    let band = if rng.chance(0.5) {
        rng.range(0.01, 0.035)
    } else {
        0.0
    };
    let band_pos = rng.range(8.0, 56.0);
    let band_w = rng.range(6.0, 16.0);
    for y in 0..SIZE {
        for x in 0..SIZE {
            let (px, py) = (x as f64 + 0.5, y as f64 + 0.5);
            let u = px * cu + py * su; // along the streaks
            let v = -px * su + py * cu; // across them
            let streak = fine_amp * fine.at(u / fine_len + ox, v / 0.9 + oy)
                + coarse_amp * coarse.at(u / (2.5 * fine_len) + oy, v / 3.0 + ox);
            let lit = grad * ((px - n / 2.0) * light.0 + (py - n / 2.0) * light.1) / (n / 2.0);
            let dv = v - band_pos;
            let sheen = band * exp_neg(dv * dv / (2.0 * band_w * band_w));
            img[y * SIZE + x] = base + streak + lit + sheen;
        }
    }

    // Defect.
    match CLASSES[class] {
        "ok" => {}
        "scratch" => {
            let len = rng.range(15.0, 45.0);
            let dir = rng.unit_vector();
            let (hx, hy) = (dir.0 * len / 2.0, dir.1 * len / 2.0);
            let (cx, cy) = (
                rng.range(4.0 + hx.abs(), n - 4.0 - hx.abs()),
                rng.range(4.0 + hy.abs(), n - 4.0 - hy.abs()),
            );
            let (a, b) = ((cx - hx, cy - hy), (cx + hx, cy + hy));
            let width = rng.range(1.0, 2.0);
            let contrast = rng.sign() * rng.range(0.12, 0.25);
            let taper = rng.range(2.0, 6.0);
            for y in 0..SIZE {
                for x in 0..SIZE {
                    let (d, t) = segment_distance((x as f64 + 0.5, y as f64 + 0.5), a, b);
                    let cover = (width / 2.0 + 0.5 - d).clamp(0.0, 1.0);
                    if cover > 0.0 {
                        let ends = (t * len / taper).min((1.0 - t) * len / taper).min(1.0);
                        img[y * SIZE + x] += contrast * cover * (0.35 + 0.65 * ends);
                    }
                }
            }
        }
        "pit" => {
            let r = rng.range(1.5, 3.5);
            let (cx, cy) = (rng.range(6.0, n - 6.0), rng.range(6.0, n - 6.0));
            let depth = rng.range(0.18, 0.35);
            let rim = rng.range(0.10, 0.22);
            // The rim faces the light, give or take.
            let side = {
                let j = rng.unit_vector();
                let (sx, sy) = (light.0 + 0.4 * j.0, light.1 + 0.4 * j.1);
                let l = (sx * sx + sy * sy).sqrt().max(1e-6);
                (sx / l, sy / l)
            };
            for y in 0..SIZE {
                for x in 0..SIZE {
                    let (dx, dy) = (x as f64 + 0.5 - cx, y as f64 + 0.5 - cy);
                    let d = (dx * dx + dy * dy).sqrt();
                    let cover = (r + 0.5 - d).clamp(0.0, 1.0);
                    // Deeper in the middle.
                    let bowl = 1.0 - 0.4 * (d / r).min(1.0);
                    let mut delta = -depth * cover * bowl;
                    let ring = (1.0 - (d - r - 0.5).abs() / 1.2).clamp(0.0, 1.0);
                    if ring > 0.0 && d > 1e-9 {
                        let facing = ((dx * side.0 + dy * side.1) / d).max(0.0);
                        delta += rim * ring * facing;
                    }
                    img[y * SIZE + x] += delta;
                }
            }
        }
        "stain" => {
            let radius = rng.range(6.0, 14.0);
            let sigma = radius / 2.0;
            let (cx, cy) = (
                rng.range(radius * 0.6, n - radius * 0.6),
                rng.range(radius * 0.6, n - radius * 0.6),
            );
            let amp = if rng.chance(0.75) {
                -rng.range(0.10, 0.16)
            } else {
                rng.range(0.08, 0.12)
            };
            let aspect = rng.range(0.7, 1.0);
            let axis = rng.unit_vector();
            let edge = ValueNoise {
                seed: rng.next_u64(),
            };
            for y in 0..SIZE {
                for x in 0..SIZE {
                    let (dx, dy) = (x as f64 + 0.5 - cx, y as f64 + 0.5 - cy);
                    let a = dx * axis.0 + dy * axis.1;
                    let b = (-dx * axis.1 + dy * axis.0) / aspect;
                    let q = (a * a + b * b) / (sigma * sigma);
                    let wobble = 0.8 + 0.2 * edge.at(x as f64 / 5.0, y as f64 / 5.0);
                    // A dried film: flat in the middle, soft at the edge
                    // (a super-Gaussian), unlike the smooth lighting.
                    img[y * SIZE + x] += amp * wobble * exp_neg(q * q / 8.0);
                }
            }
        }
        other => unreachable!("class {other}"),
    }

    // Sensor noise and quantisation.
    let noise = rng.range(0.006, 0.02);
    img.iter()
        .map(|&v| {
            let v = v + noise * rng.gaussish();
            (v.clamp(0.0, 1.0) * 255.0).round() as u8
        })
        .collect()
}

/// File name of image `index` in a set.
pub fn file_name(index: usize) -> String {
    format!("{index:04}.png")
}
