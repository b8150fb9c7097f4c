//! Helpers of the CLI tests under the repository's `tests/`.
//!
//! Cargo tells only the root package's integration tests where the `ingot`
//! binary is (`CARGO_BIN_EXE_ingot` at compile time), so the command is a
//! macro expanded in the test crate rather than a function of this crate.

use std::path::{Path, PathBuf};
use std::process::Output;

/// A [`std::process::Command`] running the `ingot` binary; use only in the
/// root package's integration tests.
#[macro_export]
macro_rules! ingot {
    () => {
        ::std::process::Command::new(env!("CARGO_BIN_EXE_ingot"))
    };
}

/// The repository root (the workspace folder).
pub fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("testkit/ lies in the repository")
        .to_path_buf()
}

/// The standard error of a finished command, as text.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// True when snapshot files should be rewritten (`INGOT_BLESS=1`).
pub fn bless() -> bool {
    std::env::var("INGOT_BLESS").is_ok_and(|v| v == "1")
}
