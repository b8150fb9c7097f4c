//! A fuzz case and its file form (the regression files under
//! `fuzz/regressions/`).
//!
//! File form: the line `ingot-fuzz case v1 KIND`, then each blob as an
//! 8-byte little-endian length and its bytes. Binary, because weights and
//! pictures are.

/// Which frontend a case feeds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Kind {
    /// Graph JSON + safetensors bytes, parsed and validated in memory, then
    /// the later stages a loaded graph reaches (checks, inspect, and when
    /// small, lowering with synthetic ranges and planning).
    Graph,
    /// The same through real files in a temporary folder
    /// (`ingot_compiler::load`), so the weights path the graph names is
    /// opened for real (`/dev/zero`, `..`, absolute paths).
    GraphFiles,
    /// Graph, weights and a ranges file.
    Ranges,
    /// A picture file for an input of the shape in the first blob
    /// (`C H W` as text).
    Image,
    /// A `.npy` sample for an input of the shape in the first blob.
    Npy,
    /// A target registered in [`crate::extra_targets`] (the ONNX importer),
    /// by name.
    Extra(String),
}

impl Kind {
    fn tag(&self) -> String {
        match self {
            Kind::Graph => "graph".into(),
            Kind::GraphFiles => "graph-files".into(),
            Kind::Ranges => "ranges".into(),
            Kind::Image => "image".into(),
            Kind::Npy => "npy".into(),
            Kind::Extra(n) => format!("extra:{n}"),
        }
    }

    fn from_tag(t: &str) -> Option<Kind> {
        Some(match t {
            "graph" => Kind::Graph,
            "graph-files" => Kind::GraphFiles,
            "ranges" => Kind::Ranges,
            "image" => Kind::Image,
            "npy" => Kind::Npy,
            t => Kind::Extra(t.strip_prefix("extra:")?.to_string()),
        })
    }
}

/// One input to one frontend.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Case {
    /// The frontend.
    pub kind: Kind,
    /// Its files' bytes, in the order the kind documents.
    pub blobs: Vec<Vec<u8>>,
}

const HEAD: &str = "ingot-fuzz case v1 ";

impl Case {
    /// The file form.
    pub fn encode(&self) -> Vec<u8> {
        let mut out = format!("{HEAD}{}\n", self.kind.tag()).into_bytes();
        for b in &self.blobs {
            out.extend_from_slice(&(b.len() as u64).to_le_bytes());
            out.extend_from_slice(b);
        }
        out
    }

    /// Parses the file form.
    pub fn decode(bytes: &[u8]) -> Result<Case, String> {
        let nl = bytes
            .iter()
            .position(|&b| b == b'\n')
            .ok_or("no header line")?;
        let head = std::str::from_utf8(&bytes[..nl]).map_err(|_| "header is not text")?;
        let tag = head.strip_prefix(HEAD).ok_or("not an ingot-fuzz case")?;
        let kind = Kind::from_tag(tag).ok_or_else(|| format!("unknown kind `{tag}`"))?;
        let mut rest = &bytes[nl + 1..];
        let mut blobs = Vec::new();
        while !rest.is_empty() {
            if rest.len() < 8 {
                return Err("truncated blob length".into());
            }
            let n = u64::from_le_bytes(rest[..8].try_into().expect("8 bytes")) as usize;
            rest = &rest[8..];
            if n > rest.len() {
                return Err("truncated blob".into());
            }
            blobs.push(rest[..n].to_vec());
            rest = &rest[n..];
        }
        Ok(Case { kind, blobs })
    }

    /// A file name for the case: kind and a hash of its bytes.
    pub fn file_name(&self) -> String {
        let mut h: u64 = 0xcbf2_9ce4_8422_2325;
        for b in self.encode() {
            h ^= b as u64;
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
        format!("{}-{h:016x}.case", self.kind.tag().replace(':', "-"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encode_decode_round_trip() {
        for kind in [Kind::Graph, Kind::Npy, Kind::Extra("onnx".into())] {
            let c = Case {
                kind,
                blobs: vec![b"{}".to_vec(), vec![0, 1, 2, 255], Vec::new()],
            };
            assert_eq!(Case::decode(&c.encode()).unwrap(), c);
        }
        assert!(Case::decode(b"junk").is_err());
    }
}
