//! Liveness of stored buffers for an execution order.
//!
//! Time is the *position* of a step in the order (`0..n`). A step reads its
//! inputs and writes its output at its position, so an input whose last read
//! is at `t` and the output written at `t` are both alive at `t`: a kernel
//! never overwrites its own input unless the planner merged the two into one
//! buffer on purpose (element-wise steps only, see [`super`]).
//!
//! A buffer is alive from the first step writing any map stored in it (the
//! graph input: from position 0) to the last step reading or writing any
//! map stored in it (the graph output: to position `n - 1`). For a
//! concatenation region this covers every member and every concatenation of
//! the chain.

use crate::lower::QGraph;

/// How the steps touch one buffer.
#[derive(Debug, Clone, Default)]
pub(crate) struct BufUse {
    /// Steps writing a map of the buffer (step indices of the graph).
    pub writers: Vec<usize>,
    /// Steps reading or writing a map of the buffer.
    pub users: Vec<usize>,
    /// Holds the graph input (alive from the start).
    pub has_input: bool,
    /// Holds the graph output (alive to the end).
    pub has_output: bool,
}

/// Uses of every buffer, given the buffer of every map.
pub(crate) fn buffer_uses(q: &QGraph, map_buffer: &[usize], n_buffers: usize) -> Vec<BufUse> {
    let mut u = vec![BufUse::default(); n_buffers];
    for (s, st) in q.steps.iter().enumerate() {
        let ob = map_buffer[st.output.index()];
        u[ob].writers.push(s);
        u[ob].users.push(s);
        for m in &st.inputs {
            let b = map_buffer[m.index()];
            if u[b].users.last() != Some(&s) {
                u[b].users.push(s);
            }
        }
    }
    u[map_buffer[q.input.index()]].has_input = true;
    u[map_buffer[q.output.index()]].has_output = true;
    u
}

/// Inclusive live interval of every buffer for an order given as
/// `pos[step] = position`; `None` for a buffer nothing writes or reads.
pub(crate) fn intervals(uses: &[BufUse], pos: &[usize], n: usize) -> Vec<Option<(usize, usize)>> {
    let end = n.saturating_sub(1);
    uses.iter()
        .map(|u| {
            let first = if u.has_input {
                Some(0)
            } else {
                u.writers.iter().map(|&s| pos[s]).min()
            };
            let first = first?;
            let mut last = u
                .users
                .iter()
                .map(|&s| pos[s])
                .max()
                .unwrap_or(first)
                .max(first);
            if u.has_output {
                last = end.max(first);
            }
            Some((first, last))
        })
        .collect()
}

/// Live bytes at every position (at least one position, also for an empty
/// schedule).
pub(crate) fn profile(iv: &[Option<(usize, usize)>], sizes: &[u64], n: usize) -> Vec<u64> {
    let len = n.max(1);
    let mut d = vec![0i128; len + 1];
    for (i, v) in iv.iter().enumerate() {
        if let Some((a, b)) = *v {
            d[a] += sizes[i] as i128;
            d[b + 1] -= sizes[i] as i128;
        }
    }
    let mut acc = 0i128;
    (0..len)
        .map(|t| {
            acc += d[t];
            acc as u64
        })
        .collect()
}

/// `(peak, position of the first peak)`.
pub(crate) fn peak(profile: &[u64]) -> (u64, usize) {
    let mut best = (0, 0);
    for (t, &v) in profile.iter().enumerate() {
        if v > best.0 {
            best = (v, t);
        }
    }
    best
}

/// Rounds `x` up to a multiple of `a` (`a >= 1`).
pub(crate) fn align_up(x: usize, a: usize) -> usize {
    x.div_ceil(a) * a
}
