//! One module per subcommand.

pub mod build;
pub mod calibrate;
pub mod camera;
pub mod check;
pub mod import;
pub mod inspect;
pub mod plan;

/// `--method` of `calibrate`, `build` and `check`: minmax, percentile:P,
/// mse, kl or auto.
/// Prints the library's warnings about a loaded graph on standard error.
pub(crate) fn print_warnings(g: &ingot_compiler::Graph) {
    for w in ingot_compiler::frontend::checks::warnings(g) {
        eprintln!("ingot: warning: {}: {w}", g.source().display());
    }
}

pub(crate) fn parse_method(s: &str) -> Result<ingot_compiler::calibrate::Method, String> {
    s.parse()
}
