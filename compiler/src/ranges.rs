//! Calibrated value ranges of every float map, and their file format
//! `ingot.ranges.v1` (v2 with bias shifts or `equalized`, v3 with
//! per-channel ranges; documented in `docs/ranges-format.md`).
//!
//! A ranges file lets `ingot build` and build scripts reuse a calibration
//! instead of reading images again. It records which graph it belongs to
//! (name and a hash of the graph file and weights) so a stale file is
//! refused rather than silently applied to a changed model.

use crate::graph::{Graph, MapId};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// Largest magnitude of a bias shift a ranges file may hold (as
/// `lower::MAX_RANGE_ABS` for range ends: larger values come from broken
/// files).
pub const MAX_BIAS_SHIFT: f32 = 1e9;

/// Format string of ranges files.
pub const RANGES_V1: &str = "ingot.ranges.v1";

/// Format string of ranges files that carry bias corrections
/// (`bias_shifts`); a file without them is still written as
/// [`RANGES_V1`], so readers of v1 keep reading it and refuse only what
/// they could not apply.
pub const RANGES_V2: &str = "ingot.ranges.v2";

/// Format string of ranges files that carry per-channel ranges
/// (`channels`); files without them keep [`RANGES_V1`] or [`RANGES_V2`].
pub const RANGES_V3: &str = "ingot.ranges.v3";

/// The real interval `[min, max]` chosen for one map.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MapRange {
    /// Lower end (at most 0 after [`MapRange::with_zero`]).
    pub min: f32,
    /// Upper end.
    pub max: f32,
}

impl MapRange {
    /// The range widened to contain 0, as affine int8 quantization needs
    /// (real zero must be exactly representable; Jacob et al. 2018, §2.1).
    pub fn with_zero(self) -> MapRange {
        MapRange {
            min: self.min.min(0.0),
            max: self.max.max(0.0),
        }
    }
}

/// Ranges of all maps of one graph: a side table indexed by [`MapId`].
#[derive(Debug, Clone, PartialEq)]
pub struct Ranges {
    /// Graph name.
    pub graph: String,
    /// Hash of the graph and weights files the ranges were computed for.
    pub graph_hash: String,
    /// Range-selection method, e.g. `minmax`, `percentile:99.99`, `mse`, `kl`.
    pub method: String,
    /// Number of images observed.
    pub images: usize,
    /// One range per map of the graph.
    pub maps: Vec<MapRange>,
    /// Bias corrections (`calibrate --bias-correction`): per convolution
    /// or linear layer, by name, a real value per output channel that
    /// lowering adds to the layer's bias (after folding batch norm) before
    /// quantizing it. Empty when not corrected.
    pub bias_shifts: BTreeMap<String, Vec<f32>>,
    /// Observed per-channel ranges, indexed by [`MapId`] (empty, or `None`
    /// for a map, when not observed): lowering clips them to the map's
    /// chosen range and may give a convolution's output one scale per
    /// channel (`docs/quantization.md`). Without them every map is
    /// quantized per tensor.
    pub channels: Vec<Option<Vec<MapRange>>>,
}

impl Ranges {
    /// The range of one map.
    pub fn get(&self, m: MapId) -> MapRange {
        self.maps[m.index()]
    }

    /// The observed per-channel ranges of one map, if any.
    pub fn channel_ranges(&self, m: MapId) -> Option<&[MapRange]> {
        self.channels.get(m.index())?.as_deref()
    }
}

/// The JSON form: maps keyed by name so a file is readable and diffable.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RangesFile {
    /// [`RANGES_V1`], [`RANGES_V2`] when `bias_shifts` is not empty (or
    /// `equalized`), [`RANGES_V3`] when `channels` is not empty.
    pub format: String,
    /// Graph name.
    pub graph: String,
    /// Hash of graph and weights (see [`crate::calibrate::ranges::graph_hash`]).
    pub graph_hash: String,
    /// Method used.
    pub method: String,
    /// Images observed.
    pub images: usize,
    /// Range per map name (the input's name or a layer name).
    pub maps: BTreeMap<String, MapRange>,
    /// Bias corrections per layer name (see [`Ranges::bias_shifts`]);
    /// absent when there are none.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub bias_shifts: BTreeMap<String, Vec<f32>>,
    /// True when the ranges were observed on the graph after cross-layer
    /// equalization (`calibrate --equalize`, see
    /// [`crate::graph::equalize`]): whoever lowers with them equalizes the
    /// graph the same way first. Absent when false.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub equalized: bool,
    /// Observed `[min, max]` of each channel, per map name (see
    /// [`Ranges::channels`]); needs [`RANGES_V3`], absent when there are
    /// none.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub channels: BTreeMap<String, Vec<[f32; 2]>>,
}

/// Why a ranges file could not be used.
#[derive(Debug, thiserror::Error)]
pub enum RangesError {
    /// Unreadable file.
    #[error("{path}: cannot read: {source}")]
    Io {
        /// The file.
        path: String,
        /// The OS error.
        source: std::io::Error,
    },
    /// Not valid JSON of this format.
    #[error("{path}: {message}")]
    Format {
        /// The file.
        path: String,
        /// What is wrong.
        message: String,
    },
    /// Written for another graph or another version of its weights.
    #[error("{path}: ranges were computed for graph `{file_graph}` (hash {file_hash}) but the graph is `{graph}` (hash {hash}); recalibrate")]
    Stale {
        /// The file.
        path: String,
        /// Graph named in the file.
        file_graph: String,
        /// Hash in the file.
        file_hash: String,
        /// Current graph.
        graph: String,
        /// Current hash.
        hash: String,
    },
    /// A map of the graph has no range, or a range is not usable.
    #[error("{path}: map `{map}`: {message}")]
    Map {
        /// The file.
        path: String,
        /// Map name.
        map: String,
        /// What is wrong.
        message: String,
    },
}

/// FNV-1a 64 of the graph file and weights file bytes, as 16 hex digits:
/// identifies the exact model a calibration or a generated module came from.
pub fn graph_hash(g: &Graph) -> std::io::Result<String> {
    let mut h = crate::util::FNV_BASIS;
    for p in [g.source(), g.weights_path()] {
        h = crate::util::fnv1a(h, &std::fs::read(p)?);
    }
    Ok(format!("{h:016x}"))
}

impl Ranges {
    /// The file form.
    pub fn to_file(&self, g: &Graph) -> RangesFile {
        let channels: BTreeMap<String, Vec<[f32; 2]>> = (0..g.map_count())
            .filter_map(|i| {
                let c = self.channel_ranges(MapId(i as u32))?;
                Some((
                    g.map_name(MapId(i as u32)).to_string(),
                    c.iter().map(|r| [r.min, r.max]).collect(),
                ))
            })
            .collect();
        RangesFile {
            format: if !channels.is_empty() {
                RANGES_V3
            } else if self.bias_shifts.is_empty() {
                RANGES_V1
            } else {
                RANGES_V2
            }
            .into(),
            graph: self.graph.clone(),
            graph_hash: self.graph_hash.clone(),
            method: self.method.clone(),
            images: self.images,
            maps: (0..g.map_count())
                .map(|i| (g.map_name(MapId(i as u32)).to_string(), self.maps[i]))
                .collect(),
            bias_shifts: self.bias_shifts.clone(),
            equalized: false,
            channels,
        }
    }

    /// The file's text for ranges observed on the equalized graph
    /// ([`RangesFile::equalized`]; format [`RANGES_V2`]), or as
    /// [`Ranges::to_json`] when `equalized` is false.
    pub fn to_json_with(&self, g: &Graph, equalized: bool) -> String {
        let mut f = self.to_file(g);
        if equalized {
            f.equalized = true;
            if f.format == RANGES_V1 {
                f.format = RANGES_V2.into();
            }
        }
        serde_json::to_string_pretty(&f).expect("ranges serialise") + "\n"
    }

    /// Whether the ranges file at `path` was observed on the equalized
    /// graph ([`RangesFile::equalized`]); read after [`Ranges::load`]
    /// accepted the file.
    pub fn file_equalized(path: &Path) -> Result<bool, RangesError> {
        let p = path.display().to_string();
        let text = crate::guard::read_text_bounded(path, crate::guard::MAX_JSON_BYTES).map_err(
            |source| RangesError::Io {
                path: p.clone(),
                source,
            },
        )?;
        let f: RangesFile = serde_json::from_str(&text).map_err(|e| RangesError::Format {
            path: p,
            message: e.to_string(),
        })?;
        Ok(f.equalized)
    }

    /// Writes the file atomically.
    pub fn save(&self, g: &Graph, path: &Path) -> std::io::Result<()> {
        crate::util::write_atomic(path, self.to_json(g).as_bytes())
    }

    /// The file's text, as [`Ranges::save`] writes it.
    pub fn to_json(&self, g: &Graph) -> String {
        serde_json::to_string_pretty(&self.to_file(g)).expect("ranges serialise") + "\n"
    }

    /// Reads a ranges file and matches it to `g`. `hash` is the current
    /// [`graph_hash`] of `g`; pass `None` to skip the staleness check.
    pub fn load(g: &Graph, path: &Path, hash: Option<&str>) -> Result<Ranges, RangesError> {
        let text = crate::guard::read_text_bounded(path, crate::guard::MAX_JSON_BYTES).map_err(
            |source| RangesError::Io {
                path: path.display().to_string(),
                source,
            },
        )?;
        Self::parse(g, &text, path, hash)
    }

    /// [`Ranges::load`] on the file's text; `path` names it in errors.
    pub fn parse(
        g: &Graph,
        text: &str,
        path: &Path,
        hash: Option<&str>,
    ) -> Result<Ranges, RangesError> {
        let p = path.display().to_string();
        let f: RangesFile = serde_json::from_str(text).map_err(|e| RangesError::Format {
            path: p.clone(),
            message: e.to_string(),
        })?;
        if f.format != RANGES_V1 && f.format != RANGES_V2 && f.format != RANGES_V3 {
            return Err(RangesError::Format {
                path: p,
                message: format!(
                    "`format` is \"{}\", expected \"{RANGES_V1}\", \"{RANGES_V2}\" or \"{RANGES_V3}\"",
                    f.format
                ),
            });
        }
        if f.format != RANGES_V3 && !f.channels.is_empty() {
            return Err(RangesError::Format {
                path: p,
                message: format!("`channels` needs `format` \"{RANGES_V3}\""),
            });
        }
        if f.format == RANGES_V1 && f.equalized {
            return Err(RangesError::Format {
                path: p,
                message: format!("`equalized` needs `format` \"{RANGES_V2}\""),
            });
        }
        if f.format == RANGES_V1 && !f.bias_shifts.is_empty() {
            return Err(RangesError::Format {
                path: p,
                message: format!("`bias_shifts` needs `format` \"{RANGES_V2}\""),
            });
        }
        if let Some(h) = hash {
            if f.graph_hash != h || f.graph != g.name() {
                return Err(RangesError::Stale {
                    path: p,
                    file_graph: f.graph,
                    file_hash: f.graph_hash,
                    graph: g.name().into(),
                    hash: h.into(),
                });
            }
        }
        let mut maps = Vec::with_capacity(g.map_count());
        for i in 0..g.map_count() {
            let name = g.map_name(MapId(i as u32));
            let r = *f.maps.get(name).ok_or_else(|| RangesError::Map {
                path: p.clone(),
                map: name.into(),
                message: "no range in the file".into(),
            })?;
            if !(r.min.is_finite() && r.max.is_finite() && r.min <= r.max) {
                return Err(RangesError::Map {
                    path: p.clone(),
                    map: name.into(),
                    message: format!("invalid range [{}, {}]", r.min, r.max),
                });
            }
            maps.push(r);
        }
        for (name, shift) in &f.bias_shifts {
            let why = match g.find_layer(name).map(|l| &g.layer(l).op) {
                Some(crate::graph::Op::Conv2d(c)) => (shift.len() != c.out_channels)
                    .then(|| format!("{} bias shifts for {} output channels", shift.len(), c.out_channels)),
                Some(crate::graph::Op::Linear(l)) => (shift.len() != l.out_features)
                    .then(|| format!("{} bias shifts for {} output features", shift.len(), l.out_features)),
                _ => Some("bias shifts for a layer that is not a convolution or linear layer of the graph".into()),
            }
            .or_else(|| {
                shift
                    .iter()
                    .any(|v| !v.is_finite() || v.abs() > MAX_BIAS_SHIFT)
                    .then(|| "a bias shift is not finite or too large".into())
            });
            if let Some(message) = why {
                return Err(RangesError::Map {
                    path: p,
                    map: name.clone(),
                    message,
                });
            }
        }
        let mut channels: Vec<Option<Vec<MapRange>>> = vec![None; g.map_count()];
        for (name, list) in &f.channels {
            let Some(i) = (0..g.map_count()).find(|&i| g.map_name(MapId(i as u32)) == name) else {
                return Err(RangesError::Map {
                    path: p,
                    map: name.clone(),
                    message: "per-channel ranges for a map that is not in the graph".into(),
                });
            };
            let want = g.shape(MapId(i as u32)).c;
            let why = if list.len() != want {
                Some(format!(
                    "{} per-channel ranges for {want} channels",
                    list.len()
                ))
            } else {
                list.iter()
                    .find(|[lo, hi]| !(lo.is_finite() && hi.is_finite() && lo <= hi))
                    .map(|[lo, hi]| format!("invalid per-channel range [{lo}, {hi}]"))
            };
            if let Some(message) = why {
                return Err(RangesError::Map {
                    path: p,
                    map: name.clone(),
                    message,
                });
            }
            channels[i] = Some(
                list.iter()
                    .map(|&[min, max]| MapRange { min, max })
                    .collect(),
            );
        }
        if channels.iter().all(Option::is_none) {
            channels.clear();
        }
        Ok(Ranges {
            channels,
            graph: f.graph,
            graph_hash: f.graph_hash,
            method: f.method,
            images: f.images,
            maps,
            bias_shifts: f.bias_shifts,
        })
    }
}
