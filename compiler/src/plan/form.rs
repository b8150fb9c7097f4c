//! What a target core implies for the module: the form its convolution
//! weights take, and the patch and row buffers that form needs. The planner
//! sizes the scratch with it and the generator emits it, so both read it
//! here.

use crate::lower::{QConv, QGraph, QKernel};

/// How convolution weights are stored in the module.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub enum WeightForm {
    /// int8, as in the weights file; `ingot_rt::conv2d` (every core).
    #[default]
    Int8,
    /// Pairs of `i16` in 32-bit words, rows interleaved in blocks of four
    /// (`ingot_rt::pair_rows`), for `ingot_rt::conv2d_paired`: cores with
    /// the DSP extension's 16-bit multiply-accumulates (Cortex-M4, M7) run
    /// about half the instructions per MAC, for twice the flash of those
    /// weights. Depthwise and grouped convolutions and linear layers stay
    /// int8.
    Pairs,
    /// int8, one byte per weight, in the word layout of
    /// `ingot_rt::word_rows_into` (four weights of a row per 32-bit word,
    /// rows in blocks of four), for `ingot_rt::conv2d_words`: cores with
    /// the DSP extension widen each loaded word into two 16-bit pairs in
    /// registers (`sxtb16`) and multiply-accumulate them with `smlad`.
    /// The weights file holds them in that layout, so the module reads its
    /// bytes with no conversion. One-group convolutions only, as
    /// [`WeightForm::Pairs`]; the rest stay int8.
    Words,
}

impl WeightForm {
    /// The form for a core name as the target profiles spell it
    /// (`cortex-m4f`, `cortex-m7`, `m4`...): words where every variant of
    /// the core has the DSP extension (Cortex-M4 and M7), int8 elsewhere
    /// (on the M33 the extension is optional, on the M0+ and M3 absent).
    /// Words rather than pairs: one byte per weight in flash instead of
    /// two; pairs stay available by name (`--weight-form pairs`), a few
    /// instructions per MAC faster in the inner loop (README, "Figures").
    pub fn for_core(core: &str) -> WeightForm {
        let c = core.trim().to_ascii_lowercase();
        let c = c.strip_prefix("cortex-").unwrap_or(&c);
        if c.starts_with("m4") || c.starts_with("m7") {
            WeightForm::Words
        } else {
            WeightForm::Int8
        }
    }

    /// True for the forms that rearrange one-group convolutions' weights
    /// (pairs, words).
    pub fn packs(self) -> bool {
        self != WeightForm::Int8
    }

    /// The form a convolution `c` takes under the module's form `self`:
    /// the packed forms apply to one-group convolutions only; depthwise
    /// and grouped ones stay int8.
    pub fn for_conv(self, c: &QConv) -> WeightForm {
        if uses_pairs(c) {
            self
        } else {
            WeightForm::Int8
        }
    }

    /// Name in reports and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            WeightForm::Int8 => "int8",
            WeightForm::Pairs => "pairs",
            WeightForm::Words => "words",
        }
    }
}

impl std::str::FromStr for WeightForm {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "int8" => Ok(WeightForm::Int8),
            "pairs" => Ok(WeightForm::Pairs),
            "words" => Ok(WeightForm::Words),
            _ => Err(format!("unknown weight form `{s}` (int8, pairs or words)")),
        }
    }
}

/// True when a convolution can take a packed weight layout, paired or
/// words (one group).
pub fn uses_pairs(c: &QConv) -> bool {
    c.groups == 1
}

/// `(rows, k)` of a convolution's weights: one row of `k` weights per
/// output channel.
pub fn weight_rows(c: &QConv) -> (usize, usize) {
    (c.out_channels, c.weights.len() / c.out_channels.max(1))
}

/// Bytes the paired weights of `q` take in flash beyond their int8 bytes in
/// the weights file (0 for the other forms: words are stored in the
/// weights file as they are read, see [`word_padding`]).
pub fn pair_growth(q: &QGraph, form: WeightForm) -> usize {
    if form != WeightForm::Pairs {
        return 0;
    }
    packed_growth(q, |rows, k| 4 * ingot_rt::paired_len(rows, k))
}

/// Zero bytes the word layout adds to the weights of `q` (rows padded to
/// whole words; 0 for the other forms).
pub fn word_padding(q: &QGraph, form: WeightForm) -> usize {
    if form != WeightForm::Words {
        return 0;
    }
    packed_growth(q, ingot_rt::words_len)
}

/// Σ over the convolutions a packed form applies to of `packed(rows, k)`
/// (the bytes of their packed weights) less their int8 bytes.
fn packed_growth(q: &QGraph, packed: impl Fn(usize, usize) -> usize) -> usize {
    q.steps
        .iter()
        .filter_map(|st| match &st.kernel {
            QKernel::Conv2d(c) if uses_pairs(c) => {
                let (rows, k) = weight_rows(c);
                Some(packed(rows, k) - c.weights.len())
            }
            _ => None,
        })
        .sum()
}

/// Bytes of convolution patch scratch the graph needs with int8 weights:
/// the patch holds `ingot_rt::conv_patch_len` elements of `i16`, two bytes
/// each.
pub fn patch_bytes(q: &QGraph) -> usize {
    patch_bytes_for(q, WeightForm::Int8)
}

/// [`patch_bytes`] for a weight form: with paired weights or words, a
/// convolution that can run from whole input rows
/// (`ingot_rt::conv_rows_apply`, `conv_rows_apply_words`) gets room for
/// `ingot_rt::conv_rows_len` elements instead; with words, a 1×1
/// convolution (`ingot_rt::pointwise_applies`) room for four staged
/// pixels (`ingot_rt::pointwise_patch_len`).
pub fn patch_bytes_for(q: &QGraph, form: WeightForm) -> usize {
    q.steps
        .iter()
        .filter_map(|s| match &s.kernel {
            QKernel::Conv2d(c) => {
                let input = q.map(s.inputs[0]).shape;
                let patch = ingot_rt::conv_patch_len(c.kernel[0], c.kernel[1], input.c);
                let w = c.runtime_window();
                let ring = match form {
                    WeightForm::Int8 => false,
                    WeightForm::Pairs => ingot_rt::conv_rows_apply(&w, c.groups, input.c),
                    WeightForm::Words => ingot_rt::conv_rows_apply_words(&w, c.groups, input.c),
                };
                let rows = if ring && uses_pairs(c) {
                    ingot_rt::conv_rows_len(&w, input.w, input.c)
                } else {
                    0
                };
                // Words: 1×1 convolutions stage four input pixels at a time.
                let four = if form == WeightForm::Words && ingot_rt::pointwise_applies(&w, c.groups)
                {
                    ingot_rt::pointwise_patch_len(input.c)
                } else {
                    0
                };
                Some(2 * patch.max(rows).max(four))
            }
            _ => None,
        })
        .max()
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::WeightForm;

    /// Cortex-M4 and M7 always have the DSP extension's 16-bit
    /// multiply-accumulates (common practice: Arm's core summaries); the
    /// M0+ and M3 never, the M33 only as an option.
    #[test]
    fn packed_only_where_every_variant_has_the_dsp_extension() {
        for core in ["cortex-m4", "cortex-m4f", "Cortex-M7", "m4", "m7"] {
            assert_eq!(WeightForm::for_core(core), WeightForm::Words, "{core}");
        }
        for core in [
            "cortex-m0+",
            "m0plus",
            "cortex-m3",
            "cortex-m33",
            "xtensa-lx7",
            "",
        ] {
            assert_eq!(WeightForm::for_core(core), WeightForm::Int8, "{core}");
        }
        assert_eq!("pairs".parse::<WeightForm>(), Ok(WeightForm::Pairs));
        assert_eq!("words".parse::<WeightForm>(), Ok(WeightForm::Words));
        assert!("i16".parse::<WeightForm>().is_err());
    }
}
