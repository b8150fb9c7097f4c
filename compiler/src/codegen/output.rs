//! Writing generated files into an output folder, all or nothing, without
//! clobbering files ingot did not write.
//!
//! Every file is first written into a fresh temporary folder next to the
//! output folder (same parent, so the same file system); only when all of
//! them were written are they renamed into place one by one (each rename
//! is atomic). Any failure before that point leaves the output folder
//! untouched. The output folder keeps a `.ingot-manifest` listing the files
//! ingot wrote there; an existing file not listed is never overwritten
//! unless forced.

use std::collections::BTreeSet;
use std::io::Write;
use std::path::{Path, PathBuf};

/// Name of the manifest file in an output folder.
pub const MANIFEST: &str = ".ingot-manifest";
const MANIFEST_HEADER: &str =
    "# Files written by ingot into this folder; `ingot build` may overwrite them.";

/// Why the files could not be written.
#[derive(Debug, thiserror::Error)]
pub enum OutputError {
    /// A file exists that ingot did not write.
    #[error("{0}: exists and was not written by ingot (not listed in {MANIFEST}); pass --force to overwrite it")]
    Foreign(PathBuf),
    /// The output path is one of the command's own input files.
    #[error("{path}: is the {what} this command reads; refusing to write over an input")]
    Input {
        /// The output path.
        path: PathBuf,
        /// Which input it is (`graph file`, `weights file`, ...).
        what: String,
    },
    /// The output path is not a regular file.
    #[error("{0}: not a regular file; refusing to write over it")]
    NotFile(PathBuf),
    /// The output path is not a folder.
    #[error("{0}: not a directory")]
    NotDir(PathBuf),
    /// File system error.
    #[error("{path}: {source}")]
    Io {
        /// Path involved.
        path: PathBuf,
        /// The error.
        source: std::io::Error,
    },
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> OutputError + '_ {
    move |source| OutputError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Files listed in `dir`'s manifest.
pub fn manifest(dir: &Path) -> BTreeSet<String> {
    std::fs::read_to_string(dir.join(MANIFEST))
        .map(|t| {
            t.lines()
                .filter(|l| !l.starts_with('#') && !l.is_empty())
                .map(str::to_string)
                .collect()
        })
        .unwrap_or_default()
}

/// Writes `files` (`(name, bytes)`, plain file names) into `out`, all or
/// nothing; refuses to replace a file not in the manifest unless `force`.
pub fn write_all(out: &Path, files: &[(String, Vec<u8>)], force: bool) -> Result<(), OutputError> {
    if out.exists() && !out.is_dir() {
        return Err(OutputError::NotDir(out.to_path_buf()));
    }
    let mut listed = manifest(out);
    for (name, _) in files {
        let p = out.join(name);
        if p.exists() && !listed.contains(name) && !force {
            return Err(OutputError::Foreign(p));
        }
    }
    let parent = match out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    std::fs::create_dir_all(&parent).map_err(io(out))?;
    let stamp = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos())
        .unwrap_or(0);
    let tmp = parent.join(format!(".ingot-tmp-{}-{stamp}", std::process::id()));
    let result = (|| {
        // Errors name the output folder the user chose, not the temporary
        // folder beside it.
        std::fs::create_dir(&tmp).map_err(io(out))?;
        for (name, bytes) in files {
            write_synced(&tmp.join(name), bytes).map_err(|e| e.at(&out.join(name)))?;
            listed.insert(name.clone());
        }
        let mut m = String::from(MANIFEST_HEADER);
        m.push('\n');
        for n in &listed {
            m.push_str(n);
            m.push('\n');
        }
        write_synced(&tmp.join(MANIFEST), m.as_bytes()).map_err(|e| e.at(&out.join(MANIFEST)))?;
        std::fs::create_dir_all(out).map_err(io(out))?;
        for name in files.iter().map(|(n, _)| n.as_str()).chain([MANIFEST]) {
            std::fs::rename(tmp.join(name), out.join(name)).map_err(io(&out.join(name)))?;
        }
        Ok(())
    })();
    let _ = std::fs::remove_dir_all(&tmp);
    result
}

impl OutputError {
    /// The same error attributed to `path`.
    fn at(self, path: &Path) -> OutputError {
        match self {
            OutputError::Io { source, .. } => OutputError::Io {
                path: path.to_path_buf(),
                source,
            },
            e => e,
        }
    }
}

/// Writes one file atomically (`util::write_atomic`) under the same rule as
/// [`write_all`]: never over one of `inputs` (`(what, path)`, compared by
/// canonical path, so a second name of the same file is caught too), and
/// over an existing file only if the folder's manifest lists it or `force`.
/// The file is then added to the manifest of its folder.
pub fn write_file(
    path: &Path,
    bytes: &[u8],
    inputs: &[(&str, &Path)],
    force: bool,
) -> Result<(), OutputError> {
    for (what, input) in inputs {
        if crate::guard::same_file(path, input) {
            return Err(OutputError::Input {
                path: path.to_path_buf(),
                what: (*what).to_string(),
            });
        }
    }
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .ok_or_else(|| OutputError::NotFile(path.to_path_buf()))?;
    if name == MANIFEST {
        return Err(OutputError::NotFile(path.to_path_buf()));
    }
    let mut listed = manifest(&dir);
    if let Ok(m) = std::fs::symlink_metadata(path) {
        if !m.is_file() {
            return Err(OutputError::NotFile(path.to_path_buf()));
        }
        if !listed.contains(&name) && !force {
            return Err(OutputError::Foreign(path.to_path_buf()));
        }
    }
    crate::util::write_atomic(path, bytes).map_err(io(path))?;
    if listed.insert(name) {
        let mut m = String::from(MANIFEST_HEADER);
        m.push('\n');
        for n in &listed {
            m.push_str(n);
            m.push('\n');
        }
        let mpath = dir.join(MANIFEST);
        crate::util::write_atomic(&mpath, m.as_bytes()).map_err(io(&mpath))?;
    }
    Ok(())
}

fn write_synced(path: &Path, bytes: &[u8]) -> Result<(), OutputError> {
    let mut f = std::fs::File::create(path).map_err(io(path))?;
    f.write_all(bytes).map_err(io(path))?;
    f.sync_all().map_err(io(path))
}
