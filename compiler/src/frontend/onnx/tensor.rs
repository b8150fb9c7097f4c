//! Constant tensors: decoding `TensorProto` (raw bytes, typed fields,
//! external data files) into values ingot can compute with.
//!
//! Floating-point types (FLOAT, FLOAT16, BFLOAT16, DOUBLE) become f32, as
//! the rest of ingot computes in f32; integer and boolean types become i64
//! (they only appear in shape computations). Every size is checked against
//! the bytes actually present before anything is allocated, so a file that
//! declares huge dimensions is refused instead of exhausting memory.

use super::proto::{data_type as dt, TensorProto, DATA_LOCATION_EXTERNAL};
use std::path::{Component, Path};

/// The values of a constant.
#[derive(Debug, Clone, PartialEq)]
pub enum Data {
    /// Floating point, converted to f32.
    F(Vec<f32>),
    /// Integers and booleans, widened to i64.
    I(Vec<i64>),
}

/// A constant tensor: dimensions and row-major values.
#[derive(Debug, Clone, PartialEq)]
pub struct Const {
    /// Dimensions, outermost first (empty for a scalar).
    pub dims: Vec<usize>,
    /// The values; their count is the product of `dims`.
    pub data: Data,
}

impl Const {
    /// Number of elements.
    pub fn len(&self) -> usize {
        match &self.data {
            Data::F(v) => v.len(),
            Data::I(v) => v.len(),
        }
    }

    /// True when the tensor holds no element.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The values as f32.
    pub fn floats(&self) -> Vec<f32> {
        match &self.data {
            Data::F(v) => v.clone(),
            Data::I(v) => v.iter().map(|&x| x as f32).collect(),
        }
    }

    /// The values as i64 (floats truncated toward zero, as `Cast` does).
    pub fn ints(&self) -> Vec<i64> {
        match &self.data {
            Data::F(v) => v.iter().map(|&x| x as i64).collect(),
            Data::I(v) => v.clone(),
        }
    }

    /// An i64 vector constant.
    pub fn int_vec(v: Vec<i64>) -> Const {
        Const {
            dims: vec![v.len()],
            data: Data::I(v),
        }
    }
}

/// Largest number of elements ingot accepts in one tensor (2^31): far
/// beyond any microcontroller network, small enough that a hostile header
/// cannot make the importer allocate without bound.
pub const MAX_ELEMENTS: usize = 1 << 31;

/// Element count of `dims`, refusing negative dimensions and overflow.
pub fn element_count(dims: &[i64]) -> Result<usize, String> {
    let mut n: usize = 1;
    for &d in dims {
        let d = usize::try_from(d).map_err(|_| format!("dimension {d} is negative"))?;
        n = n
            .checked_mul(d)
            .filter(|&n| n <= MAX_ELEMENTS)
            .ok_or_else(|| format!("dimensions {dims:?} hold more than {MAX_ELEMENTS} elements"))?;
    }
    Ok(n)
}

fn byte_width(t: i32) -> Option<usize> {
    Some(match t {
        dt::FLOAT | dt::INT32 | dt::UINT32 => 4,
        dt::DOUBLE | dt::INT64 | dt::UINT64 => 8,
        dt::FLOAT16 | dt::BFLOAT16 | dt::INT16 | dt::UINT16 => 2,
        dt::INT8 | dt::UINT8 | dt::BOOL => 1,
        _ => return None,
    })
}

/// Decodes one tensor. `model_dir` is the folder of the model file, where
/// external data must lie. Errors are plain sentences; the caller adds the
/// file and tensor name.
pub fn decode(t: &TensorProto, model_dir: &Path) -> Result<Const, String> {
    let n = element_count(&t.dims)?;
    let dims: Vec<usize> = t.dims.iter().map(|&d| d as usize).collect();
    let width = byte_width(t.data_type).ok_or_else(|| {
        format!(
            "has data type {}; ingot reads FLOAT, FLOAT16, BFLOAT16, DOUBLE and integer tensors",
            dt::name(t.data_type)
        )
    })?;
    let external;
    let raw: Option<&[u8]> = if t.data_location == DATA_LOCATION_EXTERNAL {
        external = read_external(t, model_dir, n * width)?;
        Some(&external)
    } else if !t.raw_data.is_empty() || (n == 0 && typed_len(t) == 0) {
        Some(&t.raw_data)
    } else {
        None
    };
    let data = match raw {
        Some(b) => {
            if b.len() != n * width {
                return Err(format!(
                    "raw data holds {} bytes but dimensions {:?} of {} need {}",
                    b.len(),
                    t.dims,
                    dt::name(t.data_type),
                    n * width
                ));
            }
            from_raw(t.data_type, b)
        }
        None => {
            let have = typed_len(t);
            if have != n {
                return Err(format!(
                    "holds {have} values but dimensions {:?} need {n}",
                    t.dims
                ));
            }
            from_typed(t)
        }
    };
    Ok(Const { dims, data })
}

fn typed_len(t: &TensorProto) -> usize {
    match t.data_type {
        dt::FLOAT => t.float_data.len(),
        dt::DOUBLE => t.double_data.len(),
        dt::INT64 => t.int64_data.len(),
        dt::UINT32 | dt::UINT64 => t.uint64_data.len(),
        _ => t.int32_data.len(),
    }
}

fn from_raw(ty: i32, b: &[u8]) -> Data {
    match ty {
        dt::FLOAT => Data::F(
            b.chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect(),
        ),
        dt::DOUBLE => Data::F(
            b.chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")) as f32)
                .collect(),
        ),
        dt::FLOAT16 => Data::F(
            b.chunks_exact(2)
                .map(|c| half::f16::from_le_bytes([c[0], c[1]]).to_f32())
                .collect(),
        ),
        dt::BFLOAT16 => Data::F(
            b.chunks_exact(2)
                .map(|c| half::bf16::from_le_bytes([c[0], c[1]]).to_f32())
                .collect(),
        ),
        dt::INT64 => Data::I(
            b.chunks_exact(8)
                .map(|c| i64::from_le_bytes(c.try_into().expect("8 bytes")))
                .collect(),
        ),
        dt::UINT64 => Data::I(
            b.chunks_exact(8)
                .map(|c| u64::from_le_bytes(c.try_into().expect("8 bytes")) as i64)
                .collect(),
        ),
        dt::INT32 => Data::I(
            b.chunks_exact(4)
                .map(|c| i32::from_le_bytes([c[0], c[1], c[2], c[3]]) as i64)
                .collect(),
        ),
        dt::UINT32 => Data::I(
            b.chunks_exact(4)
                .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]) as i64)
                .collect(),
        ),
        dt::INT16 => Data::I(
            b.chunks_exact(2)
                .map(|c| i16::from_le_bytes([c[0], c[1]]) as i64)
                .collect(),
        ),
        dt::UINT16 => Data::I(
            b.chunks_exact(2)
                .map(|c| u16::from_le_bytes([c[0], c[1]]) as i64)
                .collect(),
        ),
        dt::INT8 => Data::I(b.iter().map(|&x| x as i8 as i64).collect()),
        _ => Data::I(b.iter().map(|&x| x as i64).collect()),
    }
}

fn from_typed(t: &TensorProto) -> Data {
    match t.data_type {
        dt::FLOAT => Data::F(t.float_data.clone()),
        dt::DOUBLE => Data::F(t.double_data.iter().map(|&x| x as f32).collect()),
        // The specification keeps 16-bit floats' bit patterns in int32_data.
        dt::FLOAT16 => Data::F(
            t.int32_data
                .iter()
                .map(|&x| half::f16::from_bits(x as u16).to_f32())
                .collect(),
        ),
        dt::BFLOAT16 => Data::F(
            t.int32_data
                .iter()
                .map(|&x| half::bf16::from_bits(x as u16).to_f32())
                .collect(),
        ),
        dt::INT64 => Data::I(t.int64_data.clone()),
        dt::UINT32 | dt::UINT64 => Data::I(t.uint64_data.iter().map(|&x| x as i64).collect()),
        _ => Data::I(t.int32_data.iter().map(|&x| x as i64).collect()),
    }
}

/// Reads external data: `location` relative to the model's folder, which it
/// may not leave (no absolute path, no `..`, no symbolic link pointing out).
fn read_external(t: &TensorProto, model_dir: &Path, need: usize) -> Result<Vec<u8>, String> {
    let get = |k: &str| {
        t.external_data
            .iter()
            .find(|e| e.key == k)
            .map(|e| e.value.as_str())
    };
    let location = get("location").ok_or("is stored externally but names no `location`")?;
    let rel = Path::new(location);
    if rel.as_os_str().is_empty()
        || rel
            .components()
            .any(|c| !matches!(c, Component::Normal(_) | Component::CurDir))
    {
        return Err(format!(
            "external data location `{location}` must be a path inside the model's folder (no absolute path, no `..`)"
        ));
    }
    let parse = |k: &str| -> Result<Option<u64>, String> {
        get(k)
            .map(|v| {
                v.parse::<u64>()
                    .map_err(|_| format!("external data `{k}` is `{v}`, not a number"))
            })
            .transpose()
    };
    let offset = parse("offset")?.unwrap_or(0);
    let path = model_dir.join(rel);
    let dir = model_dir
        .canonicalize()
        .map_err(|e| format!("cannot resolve the model's folder: {e}"))?;
    let real = path.canonicalize().map_err(|e| {
        format!(
            "external data file `{}` cannot be read ({e}); it must sit next to the model",
            path.display()
        )
    })?;
    if !real.starts_with(&dir) {
        return Err(format!(
            "external data file `{location}` resolves outside the model's folder"
        ));
    }
    let file_len = std::fs::metadata(&real)
        .map_err(|e| format!("external data file `{}`: {e}", path.display()))?
        .len();
    let length = parse("length")?.unwrap_or(need as u64);
    if length != need as u64 || offset.checked_add(length).is_none_or(|e| e > file_len) {
        return Err(format!(
            "external data in `{location}` at offset {offset}, length {length}: the tensor needs {need} bytes and the file has {file_len}"
        ));
    }
    use std::io::{Read, Seek, SeekFrom};
    let mut f = std::fs::File::open(&real)
        .map_err(|e| format!("external data file `{}`: {e}", path.display()))?;
    let mut buf = vec![0u8; need];
    f.seek(SeekFrom::Start(offset))
        .and_then(|_| f.read_exact(&mut buf))
        .map_err(|e| format!("external data file `{}`: {e}", path.display()))?;
    Ok(buf)
}
