//! The binary weights file: every tensor of the network, little-endian, in
//! sections (int8 weights, i32 biases, requantization multipliers, channel
//! transforms, pixel table), with the byte offset of every tensor. With the
//! word weight form the one-group convolutions' int8 weights are stored in
//! the kernel's word layout, first in the file (see [`build`]).

use crate::lower::{ChannelTransform, QGraph, QKernel};
use crate::plan::WeightForm;

/// Element type of a stored tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub enum Elem {
    /// One byte per element.
    I8,
    /// Four bytes, little-endian.
    I32,
    /// A multiplier: mantissa then shift, four bytes each, little-endian.
    Requant,
}

impl Elem {
    /// Bytes per element.
    pub fn size(self) -> usize {
        match self {
            Elem::I8 => 1,
            Elem::I32 => 4,
            Elem::Requant => 8,
        }
    }
}

/// What a tensor is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
pub enum Role {
    /// Convolution or linear weights.
    Weights,
    /// Folded biases.
    Bias,
    /// Per-channel multipliers.
    Requant,
    /// Affine transform multipliers.
    TransformMul,
    /// Affine transform additive terms.
    TransformAdd,
    /// Transform lookup table.
    TransformTable,
}

impl Role {
    /// Identifier prefix of the tensor's static.
    pub fn prefix(self) -> &'static str {
        match self {
            Role::Weights => "W",
            Role::Bias => "B",
            Role::Requant => "RQ",
            Role::TransformMul => "TM",
            Role::TransformAdd => "TA",
            Role::TransformTable => "TT",
        }
    }
}

/// Report sections of the weights file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub enum Section {
    /// int8 weights.
    Weights,
    /// i32 biases.
    Biases,
    /// Multipliers.
    Multipliers,
    /// Channel transforms.
    Transforms,
    /// The camera pixel table.
    PixelTable,
}

/// One tensor in the file.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Entry {
    /// Step index in the graph (`None` for the pixel table).
    pub step: Option<usize>,
    /// Role within the step.
    pub role: Option<Role>,
    /// Element type.
    pub elem: Elem,
    /// Number of elements.
    pub len: usize,
    /// Byte offset in the file.
    pub offset: usize,
    /// Section.
    pub section: Section,
}

/// The file's bytes and table of contents.
#[derive(Debug, Clone)]
pub struct Blob {
    /// File contents.
    pub bytes: Vec<u8>,
    /// Tensors, in file order.
    pub entries: Vec<Entry>,
}

impl Blob {
    /// The entry of a step's tensor.
    pub fn find(&self, step: usize, role: Role) -> Option<&Entry> {
        self.entries
            .iter()
            .find(|e| e.step == Some(step) && e.role == Some(role))
    }

    /// The pixel table entry.
    pub fn pixel_table(&self) -> &Entry {
        self.entries
            .iter()
            .find(|e| e.section == Section::PixelTable)
            .expect("pixel table is always stored")
    }

    /// Bytes per section, in file order.
    pub fn section_bytes(&self) -> Vec<(Section, usize)> {
        let mut v: Vec<(Section, usize)> = Vec::new();
        for s in [
            Section::Weights,
            Section::Biases,
            Section::Multipliers,
            Section::Transforms,
            Section::PixelTable,
        ] {
            let n = self
                .entries
                .iter()
                .filter(|e| e.section == s)
                .map(|e| e.len * e.elem.size())
                .sum();
            v.push((s, n));
        }
        v
    }
}

struct Writer {
    bytes: Vec<u8>,
    entries: Vec<Entry>,
}

impl Writer {
    fn start(
        &mut self,
        step: Option<usize>,
        role: Option<Role>,
        elem: Elem,
        len: usize,
        section: Section,
    ) {
        self.entries.push(Entry {
            step,
            role,
            elem,
            len,
            offset: self.bytes.len(),
            section,
        });
    }
    fn i8s(&mut self, step: usize, role: Role, v: &[i8], section: Section) {
        self.start(Some(step), Some(role), Elem::I8, v.len(), section);
        self.bytes.extend(v.iter().map(|&x| x as u8));
    }
    fn i32s(&mut self, step: usize, role: Role, v: &[i32], section: Section) {
        self.start(Some(step), Some(role), Elem::I32, v.len(), section);
        for x in v {
            self.bytes.extend_from_slice(&x.to_le_bytes());
        }
    }
}

/// Lays out every tensor of `q` for the module's weight form `form`.
///
/// With [`WeightForm::Words`] the one-group convolutions' weights are
/// stored in the word layout the kernel reads (`ingot_rt::word_rows_into`;
/// each a whole number of 32-bit words, rows padded with zero weights) and
/// come first, so each starts on a 4-byte boundary of the file; the module
/// then uses those bytes as they are.
pub fn build(q: &QGraph, form: WeightForm) -> Blob {
    let mut w = Writer {
        bytes: Vec::new(),
        entries: Vec::new(),
    };
    // The int16 kernels read int8 rows: a wide step keeps int8 weights.
    let words = |s: &crate::lower::QStep| {
        !q.step_is_wide(s)
            && matches!(&s.kernel, QKernel::Conv2d(c) if form.for_conv(c) == WeightForm::Words)
    };
    for (i, s) in q.steps.iter().enumerate() {
        if let (QKernel::Conv2d(c), true) = (&s.kernel, words(s)) {
            let v = super::calls::word_weights(c);
            w.start(
                Some(i),
                Some(Role::Weights),
                Elem::I8,
                v.len(),
                Section::Weights,
            );
            w.bytes.extend_from_slice(&v);
        }
    }
    for (i, s) in q.steps.iter().enumerate() {
        match &s.kernel {
            _ if words(s) => {}
            QKernel::Conv2d(c) => w.i8s(i, Role::Weights, &c.weights, Section::Weights),
            QKernel::Linear(l) => w.i8s(i, Role::Weights, &l.weights, Section::Weights),
            _ => {}
        }
    }
    for (i, s) in q.steps.iter().enumerate() {
        match &s.kernel {
            QKernel::Conv2d(c) => w.i32s(i, Role::Bias, &c.bias, Section::Biases),
            QKernel::Linear(l) => w.i32s(i, Role::Bias, &l.bias, Section::Biases),
            _ => {}
        }
    }
    for (i, s) in q.steps.iter().enumerate() {
        let rq = match &s.kernel {
            QKernel::Conv2d(c) => &c.requant,
            QKernel::Linear(l) => &l.requant,
            _ => continue,
        };
        w.start(
            Some(i),
            Some(Role::Requant),
            Elem::Requant,
            rq.len(),
            Section::Multipliers,
        );
        for m in rq {
            w.bytes.extend_from_slice(&m.mult.to_le_bytes());
            w.bytes.extend_from_slice(&m.shift.to_le_bytes());
        }
    }
    for (i, s) in q.steps.iter().enumerate() {
        let t = match &s.kernel {
            QKernel::Conv2d(c) => match &c.transform {
                Some(t) => t,
                None => continue,
            },
            QKernel::Channel(t) => t,
            _ => continue,
        };
        match t {
            ChannelTransform::Affine { mul, add, .. } => {
                w.i32s(i, Role::TransformMul, mul, Section::Transforms);
                w.i32s(i, Role::TransformAdd, add, Section::Transforms);
            }
            ChannelTransform::Table(t) => w.i8s(i, Role::TransformTable, t, Section::Transforms),
        }
    }
    w.start(
        None,
        None,
        Elem::I8,
        q.pixel_table.len(),
        Section::PixelTable,
    );
    w.bytes.extend(q.pixel_table.iter().map(|&x| x as u8));
    Blob {
        bytes: w.bytes,
        entries: w.entries,
    }
}
