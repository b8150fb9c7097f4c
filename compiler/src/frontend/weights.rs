//! Reading and writing weight tensors in the safetensors format.
//!
//! Tensors are converted to f32 on load (F16 and BF16 through `half`); other
//! dtypes are refused with the tensor's name.

use super::LoadError;
use safetensors::tensor::{Dtype, TensorView};
use safetensors::SafeTensors;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// A tensor as stored: shape and f32 values.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredTensor {
    /// Dimensions, outermost first.
    pub shape: Vec<usize>,
    /// Values, row-major.
    pub data: Vec<f32>,
}

/// All tensors of one weights file, by name.
#[derive(Debug, Clone, Default)]
pub struct TensorStore {
    /// The file they came from (for error messages).
    pub path: PathBuf,
    /// Tensors by name.
    pub tensors: BTreeMap<String, StoredTensor>,
}

impl TensorStore {
    /// An empty store attributed to `path`.
    pub fn new(path: impl Into<PathBuf>) -> Self {
        TensorStore {
            path: path.into(),
            tensors: BTreeMap::new(),
        }
    }

    /// Adds or replaces a tensor.
    pub fn insert(&mut self, name: impl Into<String>, shape: Vec<usize>, data: Vec<f32>) {
        assert_eq!(
            shape.iter().product::<usize>(),
            data.len(),
            "tensor data does not match its shape"
        );
        self.tensors
            .insert(name.into(), StoredTensor { shape, data });
    }

    /// Reads a safetensors file.
    pub fn load(path: &Path) -> Result<Self, LoadError> {
        let bytes = crate::guard::read_safetensors(path, crate::guard::memory_limit()).map_err(
            |source| match source.kind() {
                // The header contradicts the file: malformed, not unreadable.
                std::io::ErrorKind::InvalidData => LoadError::Safetensors {
                    weights: path.to_path_buf(),
                    message: source.to_string(),
                },
                _ => LoadError::Io {
                    path: path.to_path_buf(),
                    source,
                },
            },
        )?;
        Self::from_bytes(&bytes, path)
    }

    /// Parses safetensors bytes; `path` names them in errors.
    pub fn from_bytes(bytes: &[u8], path: &Path) -> Result<Self, LoadError> {
        let st = SafeTensors::deserialize(bytes).map_err(|e| LoadError::Safetensors {
            weights: path.to_path_buf(),
            message: e.to_string(),
        })?;
        let mut store = TensorStore::new(path);
        for (name, view) in st.tensors() {
            let data = to_f32(&view).ok_or_else(|| LoadError::Dtype {
                weights: path.to_path_buf(),
                tensor: name.clone(),
                dtype: format!("{:?}", view.dtype()),
            })?;
            store.tensors.insert(
                name,
                StoredTensor {
                    shape: view.shape().to_vec(),
                    data,
                },
            );
        }
        Ok(store)
    }

    /// Serialises all tensors as F32 safetensors bytes (names sorted, so the
    /// bytes are deterministic).
    pub fn to_bytes(&self) -> Vec<u8> {
        let raw: Vec<(String, Vec<u8>, Vec<usize>)> = self
            .tensors
            .iter()
            .map(|(n, t)| {
                (
                    n.clone(),
                    t.data.iter().flat_map(|v| v.to_le_bytes()).collect(),
                    t.shape.clone(),
                )
            })
            .collect();
        let views: Vec<(String, TensorView<'_>)> = raw
            .iter()
            .map(|(n, b, s)| {
                (
                    n.clone(),
                    TensorView::new(Dtype::F32, s.clone(), b).expect("consistent tensor"),
                )
            })
            .collect();
        safetensors::serialize(views, None).expect("serialising f32 tensors cannot fail")
    }

    /// Writes the store as an F32 safetensors file, atomically.
    pub fn save(&self, path: &Path) -> std::io::Result<()> {
        crate::util::write_atomic(path, &self.to_bytes())
    }
}

fn to_f32(view: &TensorView<'_>) -> Option<Vec<f32>> {
    let b = view.data();
    Some(match view.dtype() {
        Dtype::F32 => b
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect(),
        Dtype::F16 => b
            .chunks_exact(2)
            .map(|c| half::f16::from_le_bytes([c[0], c[1]]).to_f32())
            .collect(),
        Dtype::BF16 => b
            .chunks_exact(2)
            .map(|c| half::bf16::from_le_bytes([c[0], c[1]]).to_f32())
            .collect(),
        _ => return None,
    })
}
