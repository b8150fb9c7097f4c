//! The error type every kernel returns.

/// Why a kernel refused to run.
///
/// Kernels validate every shape, length and parameter before touching the
/// arena, so a returned error means nothing was written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Error {
    /// A [`MapRef`](crate::MapRef) has `stride < c` or reaches past the end
    /// of the arena.
    MapOutOfBounds,
    /// Map shapes do not agree with each other or with the parameters.
    ShapeMismatch,
    /// A weight, bias, requantization, table or scratch slice is too short.
    BufferTooSmall,
    /// A parameter is out of its documented range (zero stride, zero group
    /// count, invalid [`Requant`](crate::Requant), shift too large, ...).
    BadParams,
    /// The output map shares bytes with an input map in a way the kernel does
    /// not support.
    Overlap,
}
