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

impl Error {
    /// Stops constant evaluation with the reason: the compile-time refusal
    /// of a [`checked`](crate::checked) call, whose error rustc reports at
    /// the `static` being built (named after the step in generated
    /// modules). Meant for `const` and `static` initializers only, where
    /// the panic is a compile error; inlined, so it leaves no code in a
    /// binary that uses it that way.
    #[inline(always)]
    pub const fn refuse(self) -> ! {
        match self {
            Error::MapOutOfBounds => {
                panic!("ingot-rt refuses the call: a map reaches past the arena or has stride < c")
            }
            Error::ShapeMismatch => {
                panic!("ingot-rt refuses the call: map shapes do not agree with the parameters")
            }
            Error::BufferTooSmall => panic!(
                "ingot-rt refuses the call: a weight, bias, requantization, table or scratch slice is too short"
            ),
            Error::BadParams => {
                panic!("ingot-rt refuses the call: a parameter is out of its documented range")
            }
            Error::Overlap => {
                panic!("ingot-rt refuses the call: the output shares bytes with an input")
            }
        }
    }
}

impl Error {
    /// What the kernel found wrong, in a few words (the text of
    /// [`Display`](core::fmt::Display)).
    pub const fn message(self) -> &'static str {
        match self {
            Error::MapOutOfBounds => "a map reaches past the arena or has stride < c",
            Error::ShapeMismatch => "map shapes do not agree with the parameters",
            Error::BufferTooSmall => {
                "a weight, bias, requantization, table or scratch slice is too short"
            }
            Error::BadParams => "a parameter is out of its documented range",
            Error::Overlap => "the output shares bytes with an input",
        }
    }
}

impl core::fmt::Display for Error {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.write_str(self.message())
    }
}

impl core::error::Error for Error {}
