//! In-place concatenation: which maps share one *region* of the arena.
//!
//! A concatenation whose inputs are written straight into its output costs
//! no copy. The output is then a region of `C_total` channels, every input
//! is a channel slice of it (pixel stride `C_total`), and concatenations of
//! a chain built the way frameworks export dense blocks (`cat[x0]`,
//! `cat[x0, x1]`, `cat[x0, x1, x2]`, …) all become channel prefixes of the
//! largest one, so every map is stored exactly once.
//!
//! The analysis works on *leaves*: a map that is not the output of an
//! in-place concatenation. The leaf sequence of an in-place concatenation is
//! the concatenation of its inputs' leaf sequences. Concatenations that share
//! a leaf form a group; a group is valid when one of them (the *root*, the
//! one with most leaves) contains every leaf of the group exactly once and
//! every other member concatenation is a contiguous run of the root's
//! leaves. Whatever breaks these rules is *demoted* to a copying
//! concatenation and the analysis is repeated (each round demotes at least
//! one step, so it terminates). Demoted when:
//!
//! - an input is the graph input (it is written by the caller's pixel
//!   conversion before step 0, densely);
//! - a leaf appears twice in the root (`cat[x, x]`, or a map reached through
//!   two nested concatenations);
//! - a member concatenation is not a contiguous run of the root in the same
//!   order (a map used by two unrelated concatenations, or at different
//!   channel positions);
//! - the planner asked for it: [`super::plan`] gives up a whole region
//!   when copying its concatenations gives a smaller arena (a region is
//!   reserved whole from its first member's write, which can cost more
//!   than the copies save, e.g. for many small branches of large
//!   intermediate maps);
//! - a member whose stride would differ from its channel count is read by a
//!   kernel kind listed in [`PlanOptions::contiguous_kinds`](super::PlanOptions::contiguous_kinds)
//!   (the concatenations that take that map as a direct input are demoted).

use super::PlanOptions;
use crate::lower::{QGraph, QKernel, QMapId, StepId};
use std::collections::HashMap;

/// Where a map lives inside its buffer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Slot {
    /// Buffer index.
    pub buffer: usize,
    /// Channel (= byte) offset of element (0,0,0) inside the buffer.
    pub chan: usize,
    /// Pixel stride.
    pub stride: usize,
}

/// Order-independent storage assignment: buffers and the slot of every map.
#[derive(Debug, Clone)]
pub(crate) struct Storage {
    /// Per map.
    pub slots: Vec<Slot>,
    /// Maps stored in each buffer (the first one covers the whole buffer).
    pub buffers: Vec<Vec<QMapId>>,
    /// Bytes of each buffer (unpadded).
    pub bytes: Vec<usize>,
    /// True for concatenation regions.
    pub is_region: Vec<bool>,
    /// Concatenation steps that must copy.
    pub copy_concat: Vec<StepId>,
}

fn find(p: &mut [usize], mut x: usize) -> usize {
    while p[x] != x {
        p[x] = p[p[x]];
        x = p[x];
    }
    x
}

/// Runs the analysis.
pub(crate) fn analyze(q: &QGraph, opts: &PlanOptions, forced_copy: &[bool]) -> Storage {
    let nm = q.maps.len();
    let concat_steps: Vec<usize> = (0..q.steps.len())
        .filter(|&s| matches!(q.steps[s].kernel, QKernel::Concat))
        .collect();
    let mut inplace = vec![false; q.steps.len()];
    if opts.inplace_concat {
        for &s in &concat_steps {
            inplace[s] = !forced_copy[s];
        }
    }
    let mut consumers: Vec<Vec<usize>> = vec![Vec::new(); nm];
    for (s, st) in q.steps.iter().enumerate() {
        for m in &st.inputs {
            consumers[m.index()].push(s);
        }
    }
    let chans = |m: QMapId| q.map(m).shape.c;

    // Final groups: (root step, member steps) once the analysis is stable.
    let groups: Vec<(usize, Vec<usize>, Vec<QMapId>)> = loop {
        let live: Vec<usize> = concat_steps
            .iter()
            .copied()
            .filter(|&s| inplace[s])
            .collect();
        let mut demote: Vec<usize> = Vec::new();
        // Rule: the graph input is never a member.
        for &s in &live {
            if q.steps[s].inputs.contains(&q.input) {
                demote.push(s);
            }
        }
        if !demote.is_empty() {
            for s in demote {
                inplace[s] = false;
            }
            continue;
        }
        // Leaf sequences, in step order (a valid order: inputs first).
        let mut concat_of: Vec<Option<usize>> = vec![None; nm];
        for &s in &live {
            concat_of[q.steps[s].output.index()] = Some(s);
        }
        let mut leaves: HashMap<usize, Vec<QMapId>> = HashMap::new();
        for &s in &live {
            let mut l = Vec::new();
            for &m in &q.steps[s].inputs {
                match concat_of[m.index()] {
                    Some(c) => l.extend_from_slice(&leaves[&c]),
                    None => l.push(m),
                }
            }
            leaves.insert(s, l);
        }
        // Groups by shared leaves.
        let mut parent: Vec<usize> = (0..live.len()).collect();
        let mut owner: HashMap<QMapId, usize> = HashMap::new();
        for (i, &s) in live.iter().enumerate() {
            for &m in &leaves[&s] {
                match owner.get(&m) {
                    Some(&j) => {
                        let (a, b) = (find(&mut parent, i), find(&mut parent, j));
                        parent[a] = b;
                    }
                    None => {
                        owner.insert(m, i);
                    }
                }
            }
        }
        let mut by_root: HashMap<usize, Vec<usize>> = HashMap::new();
        for (i, &s) in live.iter().enumerate() {
            let r = find(&mut parent, i);
            by_root.entry(r).or_default().push(s);
        }
        let mut found: Vec<(usize, Vec<usize>, Vec<QMapId>)> = Vec::new();
        let mut keys: Vec<usize> = by_root.keys().copied().collect();
        keys.sort_unstable();
        for k in keys {
            let members = &by_root[&k];
            let root = *members
                .iter()
                .max_by_key(|&&s| (leaves[&s].len(), chans(q.steps[s].output), s))
                .expect("group is not empty");
            let rl = &leaves[&root];
            let mut pos: HashMap<QMapId, usize> = HashMap::new();
            let mut dup = false;
            for (i, &m) in rl.iter().enumerate() {
                if pos.insert(m, i).is_some() {
                    dup = true;
                }
            }
            if dup {
                demote.push(root);
                continue;
            }
            for &g in members {
                if g == root {
                    continue;
                }
                let gl = &leaves[&g];
                let ok = match pos.get(&gl[0]) {
                    Some(&p0) => p0 + gl.len() <= rl.len() && rl[p0..p0 + gl.len()] == gl[..],
                    None => false,
                };
                if !ok {
                    demote.push(g);
                }
            }
            found.push((root, members.clone(), rl.clone()));
        }
        if !demote.is_empty() {
            for s in demote {
                inplace[s] = false;
            }
            continue;
        }
        // Rule: a strided member must not feed a kernel that needs dense input.
        for (root, members, rl) in &found {
            let total = chans(q.steps[*root].output);
            let inner = members
                .iter()
                .filter(|&&s| s != *root)
                .map(|&s| q.steps[s].output);
            for m in rl.iter().copied().chain(inner) {
                if chans(m) == total {
                    continue;
                }
                let strict = consumers[m.index()].iter().any(|&c| {
                    !(inplace[c] && matches!(q.steps[c].kernel, QKernel::Concat))
                        && opts
                            .contiguous_kinds
                            .iter()
                            .any(|k| k == q.steps[c].kernel.kind())
                });
                if strict {
                    demote.extend(
                        members
                            .iter()
                            .copied()
                            .filter(|&s| q.steps[s].inputs.contains(&m)),
                    );
                }
            }
        }
        if !demote.is_empty() {
            for s in demote {
                inplace[s] = false;
            }
            continue;
        }
        break found;
    };

    // Build buffers.
    let mut slots: Vec<Option<Slot>> = vec![None; nm];
    let mut buffers: Vec<Vec<QMapId>> = Vec::new();
    let mut bytes = Vec::new();
    let mut is_region = Vec::new();
    let mut sorted = groups;
    sorted.sort_by_key(|g| g.0);
    for (root, members, rl) in &sorted {
        let b = buffers.len();
        let out = q.steps[*root].output;
        let total = chans(out);
        let mut maps = vec![out];
        let mut at: HashMap<QMapId, usize> = HashMap::new();
        let mut c0 = 0;
        for &m in rl {
            at.insert(m, c0);
            slots[m.index()] = Some(Slot {
                buffer: b,
                chan: c0,
                stride: total,
            });
            c0 += chans(m);
        }
        slots[out.index()] = Some(Slot {
            buffer: b,
            chan: 0,
            stride: total,
        });
        let mut ms = members.clone();
        ms.sort_unstable();
        for &g in &ms {
            if g == *root {
                continue;
            }
            let o = q.steps[g].output;
            let first = q.steps[g].inputs[0];
            // The first leaf of `g` is the first leaf of its first input.
            let mut f = first;
            while let Some(s) = ms.iter().copied().find(|&s| q.steps[s].output == f) {
                f = q.steps[s].inputs[0];
            }
            slots[o.index()] = Some(Slot {
                buffer: b,
                chan: at[&f],
                stride: total,
            });
            maps.push(o);
        }
        maps.extend_from_slice(rl);
        buffers.push(maps);
        bytes.push(q.map(out).shape.len() * q.value_bytes(out));
        is_region.push(true);
    }
    for (i, slot) in slots.iter_mut().enumerate() {
        if slot.is_none() {
            let m = QMapId(i as u32);
            *slot = Some(Slot {
                buffer: buffers.len(),
                chan: 0,
                stride: chans(m),
            });
            buffers.push(vec![m]);
            bytes.push(q.map(m).shape.len() * q.value_bytes(m));
            is_region.push(false);
        }
    }
    let copy_concat = concat_steps
        .iter()
        .copied()
        .filter(|&s| !inplace[s])
        .map(|s| StepId(s as u32))
        .collect();
    Storage {
        slots: slots
            .into_iter()
            .map(|s| s.expect("every map has a slot"))
            .collect(),
        buffers,
        bytes,
        is_region,
        copy_concat,
    }
}
