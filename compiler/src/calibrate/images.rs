//! Sample images for calibration and evaluation.
//!
//! An [`ImageSet`] is a listing of a folder: image files (PNG, JPEG, BMP,
//! PGM/PPM/PBM) or `.npy` arrays, either directly in the folder or in one
//! sub-folder per class (the folder name is the class label and must be one
//! of the graph's `labels`). Only paths are listed up front; every sample is
//! decoded on demand by [`ImageSet::load`], so memory does not grow with the
//! number of images.
//!
//! Order is deterministic: entries are sorted by their path relative to the
//! folder, compared byte-wise (`cat/img10.png` sorts before `cat/img2.png`).
//!
//! Turning a picture file into the graph input:
//! 1. decode (the format is guessed from the file contents, not its name);
//! 2. convert to the graph's colour: `gray` uses the image crate's luminance,
//!    `L = (2126 R + 7152 G + 722 B) / 10000` (Rec. 709 weights, no gamma
//!    handling); `rgb` drops any alpha channel and repeats a gray channel;
//! 3. if the size differs from the input's `H × W`, stretch (no cropping, no
//!    aspect-ratio preservation) to `H × W` with
//!    [`image::imageops::FilterType::Triangle`] (bilinear);
//! 4. keep those bytes in HWC order ([`Sample::pixels`]): the int8 path
//!    quantizes exactly these bytes through a table;
//! 5. `x[c][y][x] = (pixel * pixel_scale - mean[c]) / std[c]`
//!    ([`InputSpec::preprocess`]), in `[C, H, W]` order ([`Sample::input`]).
//!
//! An `.npy` file (NumPy format versions 1–3, little-endian `float32`, C
//! order) must already hold the preprocessed input of shape exactly
//! `[C, H, W]`; it has no pixel bytes.
//!
//! With a camera ([`ImageSet::open_camera`]) pictures take the device's
//! path instead of steps 2–3, and raw frame dumps (`.raw`, `.bin`) are
//! read too: see [`super::frames`].

use super::frames::{self, CameraPath};
use crate::camera::Camera;
use crate::graph::{Color, Graph, InputSpec, Shape};
use image::imageops::FilterType;
use std::path::{Path, PathBuf};

/// File-name extensions read as pictures (compared case-insensitively).
pub const PICTURE_EXTENSIONS: &[&str] = &["png", "jpg", "jpeg", "bmp", "pgm", "ppm", "pbm", "pnm"];

/// The resize filter used when a picture's size differs from the input's.
pub const RESIZE_FILTER: FilterType = FilterType::Triangle;

/// Why a sample folder or file could not be read.
#[derive(Debug, thiserror::Error)]
pub enum ImageError {
    /// The folder or a file cannot be read.
    #[error("{path}: cannot read: {source}")]
    Io {
        /// Folder or file.
        path: PathBuf,
        /// The OS error.
        source: std::io::Error,
    },
    /// A picture file cannot be decoded.
    #[error("{path}: cannot decode image: {message}")]
    Decode {
        /// The file.
        path: PathBuf,
        /// Decoder message.
        message: String,
    },
    /// A `.npy` file is malformed or does not match the input.
    #[error("{path}: bad .npy file: {message}")]
    Npy {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// A class folder's name is not one of the graph's labels.
    #[error("{path}: folder `{name}` is not a class of the graph (labels: {labels})")]
    UnknownClass {
        /// The folder.
        path: PathBuf,
        /// Its name.
        name: String,
        /// The graph's labels, comma-separated, or `none`.
        labels: String,
    },
    /// A raw frame dump does not hold exactly one camera frame.
    #[error("{path}: a raw frame of {size} bytes, but the camera's frames have {expected} bytes")]
    FrameSize {
        /// The file.
        path: PathBuf,
        /// Its size in bytes.
        size: u64,
        /// The camera's frame size in bytes.
        expected: usize,
    },
    /// The camera does not fit the network's input.
    #[error("{path}: {message}")]
    Camera {
        /// The folder.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// The folder holds no readable sample.
    #[error("{path}: no images found (looked for {extensions} and .npy files)")]
    Empty {
        /// The folder.
        path: PathBuf,
        /// Extensions looked for.
        extensions: String,
    },
}

impl ImageError {
    /// The file or folder the error is about.
    pub fn path(&self) -> &Path {
        match self {
            ImageError::Io { path, .. }
            | ImageError::Decode { path, .. }
            | ImageError::Npy { path, .. }
            | ImageError::FrameSize { path, .. }
            | ImageError::Camera { path, .. }
            | ImageError::UnknownClass { path, .. }
            | ImageError::Empty { path, .. } => path,
        }
    }
}

/// What kind of file an entry is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SampleKind {
    /// A picture decoded by the image crate.
    Picture,
    /// A preprocessed `float32` array.
    Npy,
    /// A raw camera frame (only with a camera).
    Frame,
}

/// One listed sample file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Entry {
    /// Full path.
    pub path: PathBuf,
    /// Path relative to the folder, with `/` separators: the sample's name
    /// in reports.
    pub name: String,
    /// Index into the graph's labels, when the file is in a class folder.
    pub label: Option<usize>,
    /// Picture or array.
    pub kind: SampleKind,
}

/// One decoded sample.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    /// Position in the [`ImageSet`].
    pub index: usize,
    /// Class index, if known.
    pub label: Option<usize>,
    /// Pixel bytes after colour conversion and resizing, HWC order
    /// (`None` for `.npy` samples).
    pub pixels: Option<Vec<u8>>,
    /// The preprocessed graph input, `[C, H, W]` order.
    pub input: Vec<f32>,
}

/// A sorted listing of a sample folder, bound to one graph's input.
#[derive(Debug, Clone)]
pub struct ImageSet {
    root: PathBuf,
    spec: InputSpec,
    entries: Vec<Entry>,
    ignored: Vec<PathBuf>,
    camera: Option<CameraPath>,
}

fn extension_kind(path: &Path, frames: bool) -> Option<SampleKind> {
    let ext = path.extension()?.to_str()?.to_ascii_lowercase();
    if ext == "npy" {
        Some(SampleKind::Npy)
    } else if frames && frames::FRAME_EXTENSIONS.contains(&ext.as_str()) {
        Some(SampleKind::Frame)
    } else if PICTURE_EXTENSIONS.contains(&ext.as_str()) {
        Some(SampleKind::Picture)
    } else {
        None
    }
}

fn read_dir_sorted(dir: &Path) -> Result<Vec<(String, PathBuf, bool)>, ImageError> {
    let io = |source| ImageError::Io {
        path: dir.to_path_buf(),
        source,
    };
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).map_err(io)? {
        let e = e.map_err(io)?;
        let path = e.path();
        // Follows symbolic links, so a linked class folder works.
        let is_dir = std::fs::metadata(&path)
            .map_err(|source| ImageError::Io {
                path: path.clone(),
                source,
            })?
            .is_dir();
        out.push((e.file_name().to_string_lossy().into_owned(), path, is_dir));
    }
    out.sort_by(|a, b| a.0.as_bytes().cmp(b.0.as_bytes()));
    Ok(out)
}

impl ImageSet {
    /// Lists `dir` for `graph`'s input. Files with other extensions, and
    /// folders inside class folders, are not read; they are listed in
    /// [`ImageSet::ignored`] so callers can report them.
    pub fn open(dir: &Path, graph: &Graph) -> Result<ImageSet, ImageError> {
        ImageSet::open_for(dir, graph.input(), graph.labels())
    }

    /// [`ImageSet::open`] from an input description and class labels.
    pub fn open_for(
        dir: &Path,
        spec: &InputSpec,
        labels: &[String],
    ) -> Result<ImageSet, ImageError> {
        ImageSet::open_with(dir, spec, labels, None)
    }

    /// [`ImageSet::open`] through a camera (`None`: no camera): every
    /// sample takes the device's path ([`super::frames`]) and raw frame
    /// dumps are listed too.
    pub fn open_camera(
        dir: &Path,
        graph: &Graph,
        camera: Option<&Camera>,
    ) -> Result<ImageSet, ImageError> {
        ImageSet::open_with(dir, graph.input(), graph.labels(), camera)
    }

    /// [`ImageSet::open_camera`] from an input description and labels.
    pub fn open_with(
        dir: &Path,
        spec: &InputSpec,
        labels: &[String],
        camera: Option<&Camera>,
    ) -> Result<ImageSet, ImageError> {
        let camera = match camera {
            None => None,
            Some(cam) => {
                let n = |v: usize| u32::try_from(v).unwrap_or(u32::MAX);
                let s = spec.shape;
                let params =
                    cam.params(n(s.w), n(s.h), n(s.c))
                        .map_err(|e| ImageError::Camera {
                            path: dir.to_path_buf(),
                            message: e.to_string(),
                        })?;
                Some(CameraPath {
                    camera: cam.clone(),
                    params,
                })
            }
        };
        let with_frames = camera.is_some();
        let mut entries = Vec::new();
        let mut ignored = Vec::new();
        let mut push =
            |name: String, path: PathBuf, label: Option<usize>, ignored: &mut Vec<PathBuf>| {
                match extension_kind(&path, with_frames) {
                    Some(kind) => entries.push(Entry {
                        path,
                        name,
                        label,
                        kind,
                    }),
                    None => ignored.push(path),
                }
            };
        for (name, path, is_dir) in read_dir_sorted(dir)? {
            if !is_dir {
                push(name, path, None, &mut ignored);
                continue;
            }
            let label =
                labels
                    .iter()
                    .position(|l| *l == name)
                    .ok_or_else(|| ImageError::UnknownClass {
                        path: path.clone(),
                        name: name.clone(),
                        labels: if labels.is_empty() {
                            "none".into()
                        } else {
                            labels.join(", ")
                        },
                    })?;
            for (file, fpath, fis_dir) in read_dir_sorted(&path)? {
                if fis_dir {
                    ignored.push(fpath);
                } else {
                    push(format!("{name}/{file}"), fpath, Some(label), &mut ignored);
                }
            }
        }
        entries.sort_by(|a, b| a.name.as_bytes().cmp(b.name.as_bytes()));
        if entries.is_empty() {
            return Err(ImageError::Empty {
                path: dir.to_path_buf(),
                extensions: PICTURE_EXTENSIONS.join(", "),
            });
        }
        Ok(ImageSet {
            root: dir.to_path_buf(),
            spec: spec.clone(),
            entries,
            ignored,
            camera,
        })
    }

    /// The camera samples go through, if any.
    pub fn camera(&self) -> Option<&CameraPath> {
        self.camera.as_ref()
    }

    /// The folder.
    pub fn root(&self) -> &Path {
        &self.root
    }
    /// Number of listed samples.
    pub fn len(&self) -> usize {
        self.entries.len()
    }
    /// True when nothing is listed (never, for a set built by `open`).
    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }
    /// The listed samples, sorted.
    pub fn entries(&self) -> &[Entry] {
        &self.entries
    }
    /// Paths not read (other extensions, nested folders), sorted.
    pub fn ignored(&self) -> &[PathBuf] {
        &self.ignored
    }
    /// True when at least one sample has a class label.
    pub fn has_labels(&self) -> bool {
        self.entries.iter().any(|e| e.label.is_some())
    }

    /// Decodes sample `index`.
    pub fn load(&self, index: usize) -> Result<Sample, ImageError> {
        let e = &self.entries[index];
        if let Some(cam) = &self.camera {
            return self.load_camera(index, cam);
        }
        match e.kind {
            SampleKind::Picture | SampleKind::Frame => {
                let pixels = load_pixels(&e.path, &self.spec)?;
                let input = preprocess(&self.spec, &pixels);
                Ok(Sample {
                    index,
                    label: e.label,
                    pixels: Some(pixels),
                    input,
                })
            }
            SampleKind::Npy => {
                let input = read_npy(&e.path, self.spec.shape)?;
                Ok(Sample {
                    index,
                    label: e.label,
                    pixels: None,
                    input,
                })
            }
        }
    }

    /// Sample `index` through the camera: the frame (encoded from the
    /// picture, or read raw) and the samples `convert_frame` makes of it.
    fn load_camera(&self, index: usize, cam: &CameraPath) -> Result<Sample, ImageError> {
        let e = &self.entries[index];
        let frame = self.frame(index)?;
        match frame {
            None => {
                let input = read_npy(&e.path, self.spec.shape)?;
                Ok(Sample {
                    index,
                    label: e.label,
                    pixels: None,
                    input,
                })
            }
            Some(frame) => {
                let pixels = cam.samples(&frame);
                let input = preprocess(&self.spec, &pixels);
                Ok(Sample {
                    index,
                    label: e.label,
                    pixels: Some(pixels),
                    input,
                })
            }
        }
    }

    /// The camera frame of sample `index` (`None` for `.npy` samples or
    /// without a camera): a raw dump as read, or a picture placed so the
    /// region of interest covers it ([`frames::place_picture`]) and encoded
    /// in the camera's format.
    pub fn frame(&self, index: usize) -> Result<Option<Vec<u8>>, ImageError> {
        let Some(cam) = &self.camera else {
            return Ok(None);
        };
        let e = &self.entries[index];
        let expected = cam.frame_bytes();
        let io = |source| ImageError::Io {
            path: e.path.clone(),
            source,
        };
        match e.kind {
            SampleKind::Npy => Ok(None),
            SampleKind::Frame => {
                let size = std::fs::metadata(&e.path).map_err(io)?.len();
                if size != expected as u64 {
                    return Err(ImageError::FrameSize {
                        path: e.path.clone(),
                        size,
                        expected,
                    });
                }
                let bytes = crate::guard::read_bounded(&e.path, expected as u64).map_err(io)?;
                if bytes.len() != expected {
                    return Err(ImageError::FrameSize {
                        path: e.path.clone(),
                        size: bytes.len() as u64,
                        expected,
                    });
                }
                Ok(Some(bytes))
            }
            SampleKind::Picture => {
                let c = cam.params.config();
                let rgb_spec = InputSpec {
                    shape: Shape {
                        c: 3,
                        h: c.roi.h as usize,
                        w: c.roi.w as usize,
                    },
                    color: Color::Rgb,
                    ..self.spec.clone()
                };
                let roi = load_pixels(&e.path, &rgb_spec)?;
                let rgb = frames::place_picture(&cam.params, &roi);
                Ok(Some(frames::encode_frame(&cam.camera, &rgb)))
            }
        }
    }

    /// Decodes every sample in order, one at a time.
    pub fn iter(&self) -> impl Iterator<Item = Result<Sample, ImageError>> + '_ {
        (0..self.len()).map(move |i| self.load(i))
    }
}

/// Decodes a picture file to `spec`'s colour and size: HWC bytes.
pub fn load_pixels(path: &Path, spec: &InputSpec) -> Result<Vec<u8>, ImageError> {
    let bytes =
        crate::guard::read_bounded(path, crate::guard::MAX_IMAGE_BYTES).map_err(|source| {
            ImageError::Io {
                path: path.to_path_buf(),
                source,
            }
        })?;
    decode_pixels(&bytes, path, spec)
}

/// [`load_pixels`] on a picture file's bytes; `path` names it in errors.
pub fn decode_pixels(bytes: &[u8], path: &Path, spec: &InputSpec) -> Result<Vec<u8>, ImageError> {
    let decode = |message: String| ImageError::Decode {
        path: path.to_path_buf(),
        message,
    };
    let reader = image::ImageReader::new(std::io::Cursor::new(bytes))
        .with_guessed_format()
        .map_err(|source| ImageError::Io {
            path: path.to_path_buf(),
            source,
        })?;
    let img = reader.decode().map_err(|e| decode(tidy(&e.to_string())))?;
    let (w, h) = (spec.shape.w as u32, spec.shape.h as u32);
    let resize = |iw: u32, ih: u32| iw != w || ih != h;
    Ok(match spec.color {
        Color::Gray => {
            let mut buf = img.to_luma8();
            if resize(buf.width(), buf.height()) {
                buf = image::imageops::resize(&buf, w, h, RESIZE_FILTER);
            }
            buf.into_raw()
        }
        Color::Rgb => {
            let mut buf = img.to_rgb8();
            if resize(buf.width(), buf.height()) {
                buf = image::imageops::resize(&buf, w, h, RESIZE_FILTER);
            }
            buf.into_raw()
        }
    })
}

/// A decoder message as one readable line: the PNG decoder prints chunk
/// types as a Rust debug dump (`ChunkType { type: IHDR, critical: true,
/// ... }`), which is reduced to the chunk's name.
fn tidy(message: &str) -> String {
    const DUMP: &str = "ChunkType { type: ";
    let mut s = message.replace(['\n', '\r'], " ");
    while let Some(start) = s.find(DUMP) {
        let name: String = s[start + DUMP.len()..]
            .chars()
            .take_while(char::is_ascii_alphanumeric)
            .collect();
        let end = s[start..].find('}').map_or(s.len(), |e| start + e + 1);
        s.replace_range(start..end, &name);
    }
    s
}

/// HWC bytes to the `[C, H, W]` float input.
pub fn preprocess(spec: &InputSpec, pixels: &[u8]) -> Vec<f32> {
    let Shape { c, h, w } = spec.shape;
    debug_assert_eq!(pixels.len(), c * h * w);
    // One table per channel: 256 entries, the exact values the int8 path's
    // input table is built from.
    let tables: Vec<[f32; 256]> = (0..c)
        .map(|ch| std::array::from_fn(|p| spec.preprocess(ch, p as u8)))
        .collect();
    let mut out = vec![0.0f32; c * h * w];
    for (ch, table) in tables.iter().enumerate() {
        let plane = &mut out[ch * h * w..(ch + 1) * h * w];
        for (i, v) in plane.iter_mut().enumerate() {
            *v = table[pixels[i * c + ch] as usize];
        }
    }
    out
}

/// Reads a `.npy` file holding little-endian `float32` values in C order,
/// of shape exactly `[C, H, W]` of `shape`.
pub fn read_npy(path: &Path, shape: Shape) -> Result<Vec<f32>, ImageError> {
    let bytes =
        crate::guard::read_bounded(path, crate::guard::MAX_IMAGE_BYTES).map_err(|source| {
            ImageError::Io {
                path: path.to_path_buf(),
                source,
            }
        })?;
    parse_npy(&bytes, shape).map_err(|message| ImageError::Npy {
        path: path.to_path_buf(),
        message,
    })
}

/// The `.npy` parser behind [`read_npy`]: NumPy format 1.0, 2.0 or 3.0.
pub fn parse_npy(bytes: &[u8], shape: Shape) -> Result<Vec<f32>, String> {
    const MAGIC: &[u8] = b"\x93NUMPY";
    if bytes.len() < 10 || &bytes[..6] != MAGIC {
        return Err("not a NumPy array file (missing the \\x93NUMPY magic)".into());
    }
    let major = bytes[6];
    let (header_len, start): (usize, usize) = match major {
        1 => (u16::from_le_bytes([bytes[8], bytes[9]]) as usize, 10),
        2 | 3 => {
            if bytes.len() < 12 {
                return Err("truncated header".into());
            }
            (
                u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]) as usize,
                12,
            )
        }
        v => return Err(format!("unsupported format version {v}.{}", bytes[7])),
    };
    let end = start
        .checked_add(header_len)
        .filter(|&e| e <= bytes.len())
        .ok_or("truncated header")?;
    let header = std::str::from_utf8(&bytes[start..end]).map_err(|_| "header is not text")?;
    let dict = parse_header(header)?;
    let descr = dict
        .iter()
        .find(|(k, _)| k == "descr")
        .map(|(_, v)| v.as_str())
        .ok_or("header has no 'descr'")?;
    if descr != "'<f4'" {
        return Err(format!(
            "dtype {descr} is not supported; expected little-endian float32 ('<f4')"
        ));
    }
    match dict
        .iter()
        .find(|(k, _)| k == "fortran_order")
        .map(|(_, v)| v.as_str())
    {
        Some("False") => {}
        Some("True") => {
            return Err("Fortran (column-major) order is not supported; save in C order".into())
        }
        other => return Err(format!("bad 'fortran_order': {other:?}")),
    }
    let shape_text = dict
        .iter()
        .find(|(k, _)| k == "shape")
        .map(|(_, v)| v.as_str())
        .ok_or("header has no 'shape'")?;
    let dims = parse_shape(shape_text)?;
    let want = [shape.c, shape.h, shape.w];
    if dims != want {
        return Err(format!(
            "shape {dims:?} does not match the graph input [C, H, W] = {want:?}"
        ));
    }
    let n = shape.len();
    let data = &bytes[end..];
    if data.len() != n * 4 {
        return Err(format!(
            "expected {} bytes of data for {n} float32 values, found {}",
            n * 4,
            data.len()
        ));
    }
    let values: Vec<f32> = data
        .chunks_exact(4)
        .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
        .collect();
    if let Some(i) = values.iter().position(|v| !v.is_finite()) {
        return Err(format!("value {i} is not finite ({})", values[i]));
    }
    Ok(values)
}

/// Splits a Python dict literal `{'k': v, ...}` into `(k, v)` text pairs
/// (values trimmed, keys unquoted). Only the shapes NumPy writes are handled.
fn parse_header(header: &str) -> Result<Vec<(String, String)>, String> {
    let t = header.trim();
    let inner = t
        .strip_prefix('{')
        .and_then(|s| s.strip_suffix('}'))
        .ok_or("header is not a dict literal")?;
    let mut items = Vec::new();
    let (mut depth, mut quote, mut from) = (0i32, None::<char>, 0usize);
    let mut parts = Vec::new();
    for (i, ch) in inner.char_indices() {
        match (quote, ch) {
            (Some(q), c) if c == q => quote = None,
            (Some(_), _) => {}
            (None, '\'' | '"') => quote = Some(ch),
            (None, '(' | '[') => depth += 1,
            (None, ')' | ']') => depth -= 1,
            (None, ',') if depth == 0 => {
                parts.push(&inner[from..i]);
                from = i + 1;
            }
            _ => {}
        }
    }
    parts.push(&inner[from..]);
    for p in parts.into_iter().map(str::trim).filter(|p| !p.is_empty()) {
        let (k, v) = p
            .split_once(':')
            .ok_or_else(|| format!("bad header entry `{p}`"))?;
        let k = k.trim().trim_matches(|c| c == '\'' || c == '"').to_string();
        items.push((k, v.trim().to_string()));
    }
    Ok(items)
}

fn parse_shape(text: &str) -> Result<Vec<usize>, String> {
    let inner = text
        .strip_prefix('(')
        .and_then(|s| s.strip_suffix(')'))
        .ok_or_else(|| format!("bad shape `{text}`"))?;
    inner
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|s| {
            s.parse::<usize>()
                .map_err(|_| format!("bad shape `{text}`"))
        })
        .collect()
}

/// Writes `values` as a NumPy 1.0 `.npy` file of little-endian `float32`
/// (for tests and tools that prepare preprocessed inputs).
pub fn npy_bytes(values: &[f32], dims: &[usize]) -> Vec<u8> {
    let shape = match dims {
        [d] => format!("({d},)"),
        _ => format!(
            "({})",
            dims.iter()
                .map(|d| d.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut header = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {shape}, }}");
    // Pad with spaces so the data starts on a 64-byte boundary; end with '\n'.
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    for v in values {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Issue 14, defect 10: a corrupt PNG gave a debug dump.
    #[test]
    fn decoder_messages_are_one_plain_line() {
        let m = "Format error decoding Png: CRC error: expected 0x1 have 0x2 while decoding ChunkType { type: IHDR, critical: true, private: false, reserved: false, safecopy: false } chunk.";
        assert_eq!(
            tidy(m),
            "Format error decoding Png: CRC error: expected 0x1 have 0x2 while decoding IHDR chunk."
        );
        assert_eq!(tidy("a\nb"), "a b");
    }
    use image::{GrayImage, Luma, Rgb, RgbImage};

    fn spec(c: usize, h: usize, w: usize) -> InputSpec {
        InputSpec {
            name: "input".into(),
            shape: Shape::new(c, h, w),
            pixel_scale: 1.0 / 255.0,
            mean: vec![0.5; c],
            std: vec![0.25; c],
            color: if c == 1 { Color::Gray } else { Color::Rgb },
        }
    }

    fn replace(mut bytes: Vec<u8>, from: &[u8], to: &[u8]) -> Vec<u8> {
        assert_eq!(from.len(), to.len());
        let at = bytes.windows(from.len()).position(|w| w == from).unwrap();
        bytes[at..at + from.len()].copy_from_slice(to);
        bytes
    }

    fn gradient(w: u32, h: u32) -> GrayImage {
        GrayImage::from_fn(w, h, |x, y| Luma([(x * 16 + y * 2) as u8]))
    }

    #[test]
    fn reads_png_bmp_pgm_jpeg_in_sorted_order() {
        let dir = tempfile::tempdir().unwrap();
        let img = gradient(8, 8);
        for name in ["b.png", "a.bmp", "c.pgm", "d.jpg"] {
            img.save(dir.path().join(name)).unwrap();
        }
        std::fs::write(dir.path().join("README.txt"), "not an image").unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(1, 8, 8), &[]).unwrap();
        let names: Vec<&str> = set.entries().iter().map(|e| e.name.as_str()).collect();
        assert_eq!(names, ["a.bmp", "b.png", "c.pgm", "d.jpg"]);
        assert_eq!(set.ignored(), [dir.path().join("README.txt")]);
        for i in 0..3 {
            // Lossless formats give back the bytes written.
            let s = set.load(i).unwrap();
            assert_eq!(
                s.pixels.as_deref(),
                Some(img.as_raw().as_slice()),
                "{}",
                set.entries()[i].name
            );
            assert_eq!(s.input.len(), 64);
            assert_eq!(s.input[9], (img.as_raw()[9] as f32 / 255.0 - 0.5) / 0.25);
            assert_eq!(s.label, None);
        }
        // JPEG is lossy: close to the gradient.
        let s = set.load(3).unwrap();
        let px = s.pixels.unwrap();
        let worst = px
            .iter()
            .zip(img.as_raw())
            .map(|(a, b)| (*a as i32 - *b as i32).abs())
            .max()
            .unwrap();
        assert!(worst <= 12, "{worst}");
    }

    #[test]
    fn converts_colour_with_rec709_luma() {
        // The image crate's luminance uses the Rec. 709 weights
        // (ITU-R BT.709: 0.2126 R + 0.7152 G + 0.0722 B): pure red 255 gives
        // 54, pure green 182, pure blue 18.
        let dir = tempfile::tempdir().unwrap();
        let img = RgbImage::from_fn(3, 1, |x, _| {
            Rgb(match x {
                0 => [255, 0, 0],
                1 => [0, 255, 0],
                _ => [0, 0, 255],
            })
        });
        img.save(dir.path().join("rgb.png")).unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(1, 1, 3), &[]).unwrap();
        assert_eq!(set.load(0).unwrap().pixels.unwrap(), [54, 182, 18]);
        // RGB graphs keep the channels; the input is planar [C, H, W].
        let set = ImageSet::open_for(dir.path(), &spec(3, 1, 3), &[]).unwrap();
        let s = set.load(0).unwrap();
        assert_eq!(s.pixels.as_deref().unwrap(), img.as_raw().as_slice());
        let hi = (1.0 - 0.5) / 0.25;
        let lo = (0.0 - 0.5) / 0.25;
        assert_eq!(s.input, [hi, lo, lo, lo, hi, lo, lo, lo, hi]);
    }

    #[test]
    fn resizes_to_the_input_size() {
        let dir = tempfile::tempdir().unwrap();
        // 32x16: left half black, right half white; the graph wants 8x4.
        GrayImage::from_fn(32, 16, |x, _| Luma([if x < 16 { 0 } else { 255 }]))
            .save(dir.path().join("half.png"))
            .unwrap();
        GrayImage::from_pixel(5, 7, Luma([77]))
            .save(dir.path().join("flat.png"))
            .unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(1, 4, 8), &[]).unwrap();
        let half = set.load(1).unwrap().pixels.unwrap();
        assert_eq!(half.len(), 32);
        for row in half.chunks(8) {
            assert!(row[0] < 10 && row[7] > 245, "{row:?}");
        }
        // A flat picture stays flat through the bilinear filter.
        assert_eq!(set.load(0).unwrap().pixels.unwrap(), vec![77u8; 32]);
    }

    #[test]
    fn class_folders_give_labels() {
        let dir = tempfile::tempdir().unwrap();
        let labels = vec!["cat".to_string(), "dog".to_string()];
        for (class, file) in [("dog", "x.png"), ("cat", "b.png"), ("cat", "a.png")] {
            std::fs::create_dir_all(dir.path().join(class)).unwrap();
            gradient(4, 4)
                .save(dir.path().join(class).join(file))
                .unwrap();
        }
        gradient(4, 4).save(dir.path().join("loose.png")).unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(1, 4, 4), &labels).unwrap();
        let got: Vec<(&str, Option<usize>)> = set
            .entries()
            .iter()
            .map(|e| (e.name.as_str(), e.label))
            .collect();
        assert_eq!(
            got,
            [
                ("cat/a.png", Some(0)),
                ("cat/b.png", Some(0)),
                ("dog/x.png", Some(1)),
                ("loose.png", None)
            ]
        );
        assert!(set.has_labels());
        assert_eq!(set.load(2).unwrap().label, Some(1));
    }

    #[test]
    fn unknown_class_folder_is_an_error_naming_it() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("cat")).unwrap();
        std::fs::create_dir_all(dir.path().join("zebra")).unwrap();
        let labels = vec!["cat".to_string(), "dog".to_string()];
        let e = ImageSet::open_for(dir.path(), &spec(1, 4, 4), &labels).unwrap_err();
        assert!(
            matches!(e, ImageError::UnknownClass { ref name, .. } if name == "zebra"),
            "{e}"
        );
        let msg = e.to_string();
        assert!(msg.contains("`zebra`") && msg.contains("cat, dog"), "{msg}");
        let e = ImageSet::open_for(dir.path(), &spec(1, 4, 4), &[]).unwrap_err();
        assert!(e.to_string().contains("labels: none"), "{e}");
    }

    #[test]
    fn corrupt_file_error_names_it() {
        let dir = tempfile::tempdir().unwrap();
        gradient(4, 4).save(dir.path().join("good.png")).unwrap();
        std::fs::write(
            dir.path().join("broken.png"),
            b"\x89PNG\r\n\x1a\nthis is not a png",
        )
        .unwrap();
        let set = ImageSet::open_for(dir.path(), &spec(1, 4, 4), &[]).unwrap();
        let e = set.load(0).unwrap_err();
        assert!(matches!(e, ImageError::Decode { .. }), "{e}");
        assert_eq!(e.path(), dir.path().join("broken.png"));
        assert!(e.to_string().contains("broken.png"), "{e}");
        assert!(set.load(1).is_ok());
    }

    #[test]
    fn empty_folder_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("notes.txt"), "x").unwrap();
        let e = ImageSet::open_for(dir.path(), &spec(1, 4, 4), &[]).unwrap_err();
        assert!(matches!(e, ImageError::Empty { .. }), "{e}");
    }

    #[test]
    fn npy_round_trip_and_version_2_header() {
        let dir = tempfile::tempdir().unwrap();
        let values: Vec<f32> = (0..12).map(|i| i as f32 * 0.5 - 2.0).collect();
        std::fs::write(dir.path().join("a.npy"), npy_bytes(&values, &[3, 2, 2])).unwrap();
        let mut set_spec = spec(3, 2, 2);
        set_spec.color = Color::Rgb;
        let set = ImageSet::open_for(dir.path(), &set_spec, &[]).unwrap();
        let s = set.load(0).unwrap();
        assert_eq!(s.input, values);
        assert_eq!(s.pixels, None);
        assert_eq!(set.entries()[0].kind, SampleKind::Npy);
        // Format 2.0: a 4-byte header length, as NumPy writes for large headers.
        let header = "{'descr': '<f4', 'fortran_order': False, 'shape': (1, 1, 2), }\n";
        let mut v2 = b"\x93NUMPY\x02\x00".to_vec();
        v2.extend_from_slice(&(header.len() as u32).to_le_bytes());
        v2.extend_from_slice(header.as_bytes());
        v2.extend_from_slice(&1.5f32.to_le_bytes());
        v2.extend_from_slice(&(-3.0f32).to_le_bytes());
        assert_eq!(parse_npy(&v2, Shape::new(1, 1, 2)).unwrap(), [1.5, -3.0]);
    }

    #[test]
    fn bad_npy_errors_name_file_and_problem() {
        let dir = tempfile::tempdir().unwrap();
        let shape = Shape::new(1, 2, 2);
        let f8 = replace(npy_bytes(&[0.0; 4], &[1, 2, 2]), b"'<f4'", b"'<f8'");
        let cases: Vec<(&str, Vec<u8>, &str)> = vec![
            ("dtype.npy", f8, "'<f8'"),
            ("shape.npy", npy_bytes(&[0.0; 4], &[4]), "does not match"),
            (
                "short.npy",
                {
                    let full = npy_bytes(&[0.0; 4], &[1, 2, 2]);
                    full[..full.len() - 8].to_vec()
                },
                "expected 16 bytes of data for 4 float32 values, found 8",
            ),
            (
                "magic.npy",
                b"PK\x03\x04 not numpy at all".to_vec(),
                "magic",
            ),
            (
                "nan.npy",
                npy_bytes(&[0.0, f32::NAN, 0.0, 0.0], &[1, 2, 2]),
                "not finite",
            ),
        ];
        for (name, bytes, needle) in cases {
            let path = dir.path().join(name);
            std::fs::write(&path, bytes).unwrap();
            let e = read_npy(&path, shape).unwrap_err();
            let msg = e.to_string();
            assert!(matches!(e, ImageError::Npy { .. }), "{msg}");
            assert!(msg.contains(name) && msg.contains(needle), "{name}: {msg}");
        }
        let fortran = replace(
            npy_bytes(&[0.0; 4], &[1, 2, 2]),
            b"'fortran_order': False",
            b"'fortran_order': True ",
        );
        assert!(parse_npy(&fortran, shape).unwrap_err().contains("Fortran"));
    }
}
