//! Small helpers shared by several passes.

use std::io::Write;
use std::path::Path;

/// Writes `bytes` to `path` atomically: a temporary file in the same folder,
/// flushed, then renamed over the target, so readers never see half a file.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    std::fs::create_dir_all(dir)?;
    let file_name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{file_name}.{}.tmp", std::process::id()));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// FNV-1a offset basis (64 bit).
pub const FNV_BASIS: u64 = 0xcbf2_9ce4_8422_2325;

/// FNV-1a, 64 bit (Fowler, Noll and Vo; constants from memory, checked by
/// the module hashes of the snapshot tests): `h` continued over `bytes`;
/// start from [`FNV_BASIS`]. The one stable hash of the crate: file
/// identities in ranges files, `MODEL_HASH`, runner project names.
pub fn fnv1a(h: u64, bytes: &[u8]) -> u64 {
    let mut h = h;
    for &b in bytes {
        h ^= b as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// How every report prints a missing value (an en dash).
pub(crate) const MISSING: &str = "–";

/// `1234567` as `1,234,567`: the one thousands separator of the reports.
pub fn group_digits(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::group_digits;

    #[test]
    fn groups_digits() {
        assert_eq!(group_digits(0), "0");
        assert_eq!(group_digits(999), "999");
        assert_eq!(group_digits(1000), "1,000");
        assert_eq!(group_digits(7_978_856), "7,978,856");
    }
}

pub(crate) mod bars;
pub(crate) mod splitmix;
#[cfg(test)]
pub(crate) mod test_rng;
