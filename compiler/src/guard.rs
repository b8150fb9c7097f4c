//! Guards against hostile or careless input: bounded reads of files a user
//! points ingot at, names made safe for paths, and a memory estimate made
//! from the shapes before a command allocates.
//!
//! Every stage reads its files through [`read_bounded`], so a path to
//! `/dev/zero`, a FIFO or an oversized file is refused with a message
//! instead of growing memory until the machine gives up.

use std::io::Read;
use std::path::Path;

/// Largest JSON file ingot reads (graph, ranges, target profile): 64 MiB.
/// The largest graph in the zoo is under 100 KiB; a graph file holds no
/// weights, so anything near this size is not a graph.
pub const MAX_JSON_BYTES: u64 = 64 << 20;

/// Largest image or `.npy` sample file: 256 MiB.
pub const MAX_IMAGE_BYTES: u64 = 256 << 20;

/// Largest safetensors header (the JSON after the 8-byte length): 100 MB,
/// the limit of the safetensors format itself.
pub const MAX_SAFETENSORS_HEADER: u64 = 100_000_000;

/// Default memory a command may plan to use ([`memory_limit`]): 4 GiB.
pub const DEFAULT_MEMORY_LIMIT: u64 = 4 << 30;

/// Environment variable that overrides [`DEFAULT_MEMORY_LIMIT`], in bytes
/// (also `K`, `M`, `G` suffixes, powers of 1024).
pub const MEMORY_LIMIT_ENV: &str = "INGOT_MEMORY_LIMIT";

/// A file whose content contradicts itself (a header that promises more
/// than the file holds): `ErrorKind::InvalidData`, which callers report as
/// a malformed file rather than an unreadable one.
fn malformed(message: String) -> std::io::Error {
    std::io::Error::new(std::io::ErrorKind::InvalidData, message)
}

fn invalid(message: String) -> std::io::Error {
    std::io::Error::new(std::io::ErrorKind::InvalidInput, message)
}

/// Opens `path` for reading, refusing anything but a regular file (a
/// device such as `/dev/zero`, a FIFO or a folder would otherwise be read
/// forever or block), and returns the file and its size.
pub fn open_regular(path: &Path) -> std::io::Result<(std::fs::File, u64)> {
    // Metadata of the path first: opening a FIFO for reading blocks until a
    // writer appears, so it must be refused before `open`.
    let meta = std::fs::metadata(path)?;
    if !meta.is_file() {
        return Err(invalid(format!("not a regular file ({})", kind(&meta))));
    }
    let f = std::fs::File::open(path)?;
    let meta = f.metadata()?;
    if !meta.is_file() {
        return Err(invalid(format!("not a regular file ({})", kind(&meta))));
    }
    Ok((f, meta.len()))
}

fn kind(meta: &std::fs::Metadata) -> &'static str {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        let t = meta.file_type();
        if t.is_char_device() {
            return "a character device";
        }
        if t.is_block_device() {
            return "a block device";
        }
        if t.is_fifo() {
            return "a FIFO";
        }
        if t.is_socket() {
            return "a socket";
        }
    }
    if meta.is_dir() {
        "a folder"
    } else {
        "not a file"
    }
}

/// Reads a whole regular file of at most `limit` bytes. The read is capped
/// at the size the file had when opened, so a file that grows meanwhile
/// cannot make it unbounded.
pub fn read_bounded(path: &Path, limit: u64) -> std::io::Result<Vec<u8>> {
    let (f, len) = open_regular(path)?;
    if len > limit {
        return Err(invalid(format!(
            "{len} bytes, larger than the limit of {limit} bytes for this kind of file"
        )));
    }
    let mut bytes = Vec::with_capacity(len as usize);
    f.take(len).read_to_end(&mut bytes)?;
    Ok(bytes)
}

/// [`read_bounded`] for UTF-8 text.
pub fn read_text_bounded(path: &Path, limit: u64) -> std::io::Result<String> {
    String::from_utf8(read_bounded(path, limit)?)
        .map_err(|_| std::io::Error::new(std::io::ErrorKind::InvalidData, "not UTF-8 text"))
}

/// Reads a safetensors file, checking what its header declares before
/// reading the tensor data: the header length against the format's limit
/// and the file size, and the end of the last tensor against the file size
/// and `limit`. Only as many bytes as the header promises are read.
pub fn read_safetensors(path: &Path, limit: u64) -> std::io::Result<Vec<u8>> {
    let (f, len) = open_regular(path)?;
    let mut f = f.take(len);
    let mut n_bytes = [0u8; 8];
    if len < 8 {
        return Err(malformed(format!(
            "{len} bytes, too short for a safetensors header"
        )));
    }
    f.read_exact(&mut n_bytes)?;
    let n = u64::from_le_bytes(n_bytes);
    if n > MAX_SAFETENSORS_HEADER {
        return Err(malformed(format!(
            "the header claims {n} bytes; safetensors headers are at most {MAX_SAFETENSORS_HEADER}"
        )));
    }
    if 8 + n > len {
        return Err(malformed(format!(
            "the header claims {n} bytes but the file has only {len}"
        )));
    }
    let mut bytes = Vec::with_capacity((8 + n) as usize);
    bytes.extend_from_slice(&n_bytes);
    (&mut f).take(n).read_to_end(&mut bytes)?;
    // The end of the tensor data as declared; the safetensors parser checks
    // the details (overlaps, dtype sizes) once the bytes are in memory.
    // A header that does not parse is left to the parser's message; the
    // read is then bounded by the file size and `limit` alone.
    let data_end = declared_data_end(&bytes[8..]).unwrap_or(len - 8 - n);
    let total = (8 + n).saturating_add(data_end);
    if total != len {
        return Err(malformed(format!(
            "the header declares {data_end} bytes of tensor data after a {n}-byte header ({total} bytes in all) but the file has {len}"
        )));
    }
    if total > limit {
        return Err(invalid(format!(
            "{total} bytes, larger than the limit of {limit} bytes (set {MEMORY_LIMIT_ENV} to raise it)"
        )));
    }
    bytes.reserve_exact(data_end as usize);
    f.read_to_end(&mut bytes)?;
    Ok(bytes)
}

/// The largest `data_offsets` end in a safetensors header, if it parses.
fn declared_data_end(header: &[u8]) -> Option<u64> {
    let v: serde_json::Value = serde_json::from_slice(header).ok()?;
    let mut end = 0u64;
    for (k, t) in v.as_object()? {
        if k == "__metadata__" {
            continue;
        }
        if let Some(e) = t
            .get("data_offsets")
            .and_then(|o| o.get(1))
            .and_then(serde_json::Value::as_u64)
        {
            end = end.max(e);
        }
    }
    Some(end)
}

/// A name from a graph file made safe as one file-name component: only
/// ASCII letters, digits, `-`, `_` and inner `.` are kept (others become
/// `_`), so it holds no separator, no `..`, no drive or root, and no control
/// character; empty or all-dots names become `model`.
pub fn file_stem(name: &str) -> String {
    let mut s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .take(100)
        .collect();
    while s.starts_with('.') {
        s.remove(0);
    }
    while s.contains("..") {
        s = s.replace("..", ".");
    }
    if s.is_empty() {
        s = "model".into();
    }
    s
}

/// The memory limit in force: `INGOT_MEMORY_LIMIT` if set and readable,
/// else [`DEFAULT_MEMORY_LIMIT`].
pub fn memory_limit() -> u64 {
    std::env::var(MEMORY_LIMIT_ENV)
        .ok()
        .and_then(|v| parse_bytes(&v))
        .unwrap_or(DEFAULT_MEMORY_LIMIT)
}

/// `123`, `64K`, `512M`, `8G` (powers of 1024) as bytes.
pub fn parse_bytes(s: &str) -> Option<u64> {
    let s = s.trim();
    let (num, mul) = match s.char_indices().last()? {
        (i, 'k' | 'K') => (&s[..i], 1u64 << 10),
        (i, 'm' | 'M') => (&s[..i], 1 << 20),
        (i, 'g' | 'G') => (&s[..i], 1 << 30),
        _ => (s, 1),
    };
    num.trim().parse::<u64>().ok()?.checked_mul(mul)
}

/// True when `a` and `b` name the same existing file (by canonical path).
pub fn same_file(a: &Path, b: &Path) -> bool {
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn file_stem_keeps_plain_names_and_defuses_paths() {
        assert_eq!(file_stem("demo_net-2"), "demo_net-2");
        assert_eq!(file_stem("v1.2"), "v1.2");
        for bad in [
            "../../esc",
            "/etc/passwd",
            "a/b",
            "a\\b",
            "..",
            ".",
            "",
            "\u{202e}x\n",
        ] {
            let s = file_stem(bad);
            assert!(!s.is_empty(), "{bad:?}");
            assert!(
                !s.contains('/') && !s.contains('\\') && !s.contains(".."),
                "{bad:?} -> {s}"
            );
            assert!(!s.starts_with('.'), "{bad:?} -> {s}");
            assert!(s.chars().all(|c| c.is_ascii_graphic()), "{bad:?} -> {s}");
            assert_eq!(Path::new(&s).components().count(), 1, "{bad:?} -> {s}");
        }
        assert_eq!(file_stem("../../esc"), "_._esc");
    }

    #[test]
    fn bytes_with_suffixes() {
        assert_eq!(parse_bytes("4096"), Some(4096));
        assert_eq!(parse_bytes("64K"), Some(64 << 10));
        assert_eq!(parse_bytes("2g"), Some(2 << 30));
        assert_eq!(parse_bytes("x"), None);
        assert_eq!(parse_bytes(""), None);
    }

    #[cfg(unix)]
    #[test]
    fn devices_are_refused_without_reading() {
        let e = read_bounded(Path::new("/dev/zero"), MAX_JSON_BYTES).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        let e = read_safetensors(Path::new("/dev/zero"), u64::MAX).unwrap_err();
        assert!(e.to_string().contains("character device"), "{e}");
    }

    #[test]
    fn oversized_and_inconsistent_files_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("big.json");
        std::fs::write(&p, vec![b' '; 1000]).unwrap();
        assert!(read_bounded(&p, 999).is_err());
        assert_eq!(read_bounded(&p, 1000).unwrap().len(), 1000);
        // A safetensors header that claims more than the file holds.
        let w = dir.path().join("w.safetensors");
        let mut b = 1_000_000u64.to_le_bytes().to_vec();
        b.extend_from_slice(b"{}");
        std::fs::write(&w, &b).unwrap();
        let e = read_safetensors(&w, u64::MAX).unwrap_err();
        assert!(e.to_string().contains("claims 1000000 bytes"), "{e}");
        // Tensor data declared past the end of the file.
        let h = br#"{"t":{"dtype":"F32","shape":[1000000],"data_offsets":[0,4000000]}}"#;
        let mut b = (h.len() as u64).to_le_bytes().to_vec();
        b.extend_from_slice(h);
        b.extend_from_slice(&[0u8; 16]);
        std::fs::write(&w, &b).unwrap();
        let e = read_safetensors(&w, u64::MAX).unwrap_err();
        assert!(e.to_string().contains("declares 4000000 bytes"), "{e}");
    }
}
