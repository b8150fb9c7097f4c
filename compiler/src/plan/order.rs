//! Execution-order search: the topological order with the lowest peak of
//! live bytes.
//!
//! Dynamic programming over the sets of executed steps, after Ahn et al.
//! (2020), "Ordering Chaos: Memory-Aware Scheduling of Irregularly Wired
//! Neural Networks for Edge Devices": the live bytes after a set `S` of
//! executed steps depend only on `S` (not on the order inside it), so the
//! best peak reachable with `S` done is
//! `f(S ∪ {v}) = min(max(f(S), mem(S, v)))` over ready steps `v`, where
//! `mem(S, v)` counts every buffer started and not finished, plus those `v`
//! starts. Sets are explored layer by layer (`|S| = 0, 1, …, n`) and
//! deduplicated, which is exact. When a layer holds more than
//! `max_states` sets, only the best `max_states` by `(peak so far, live
//! now)` are kept (a beam): the search is then a heuristic, and says so.
//! Ties keep the file order first.

use super::liveness::BufUse;
use std::collections::HashMap;

/// Result of the search.
pub(crate) struct Found {
    /// Step indices in execution order.
    pub order: Vec<usize>,
    /// True when no layer was cut: the peak is the optimum.
    pub exact: bool,
}

struct State {
    set: Vec<u64>,
    live: u64,
    peak: u64,
    parent: u32,
    step: u32,
}

fn has(set: &[u64], i: usize) -> bool {
    set[i / 64] >> (i % 64) & 1 == 1
}

/// Searches orders of `n` steps with predecessor lists `preds`.
pub(crate) fn search(
    n: usize,
    preds: &[Vec<usize>],
    uses: &[BufUse],
    sizes: &[u64],
    max_states: usize,
) -> Found {
    let words = n.div_ceil(64).max(1);
    let mut writes: Vec<Vec<usize>> = vec![Vec::new(); n];
    let mut touches: Vec<Vec<usize>> = vec![Vec::new(); n];
    for (b, u) in uses.iter().enumerate() {
        for &s in &u.writers {
            if !writes[s].contains(&b) {
                writes[s].push(b);
            }
        }
        for &s in &u.users {
            if !touches[s].contains(&b) {
                touches[s].push(b);
            }
        }
    }
    let live0: u64 = uses
        .iter()
        .zip(sizes)
        .filter(|(u, _)| u.has_input)
        .map(|(_, &s)| s)
        .sum();
    let mut layer = vec![State {
        set: vec![0; words],
        live: live0,
        peak: 0,
        parent: 0,
        step: 0,
    }];
    // Back pointers of every layer: (parent index, step).
    let mut back: Vec<Vec<(u32, u32)>> = Vec::with_capacity(n);
    let mut exact = true;
    for _ in 0..n {
        let mut next: Vec<State> = Vec::new();
        let mut index: HashMap<Vec<u64>, usize> = HashMap::new();
        for (pi, st) in layer.iter().enumerate() {
            for v in 0..n {
                if has(&st.set, v) || !preds[v].iter().all(|&p| has(&st.set, p)) {
                    continue;
                }
                let mut mem = st.live;
                for &b in &writes[v] {
                    let u = &uses[b];
                    if !u.has_input && !u.writers.iter().any(|&w| has(&st.set, w)) {
                        mem += sizes[b];
                    }
                }
                let mut live = mem;
                for &b in &touches[v] {
                    let u = &uses[b];
                    if !u.has_output && u.users.iter().all(|&x| x == v || has(&st.set, x)) {
                        live -= sizes[b];
                    }
                }
                let peak = st.peak.max(mem);
                let mut set = st.set.clone();
                set[v / 64] |= 1 << (v % 64);
                match index.get(&set) {
                    Some(&i) => {
                        if peak < next[i].peak {
                            next[i].peak = peak;
                            next[i].parent = pi as u32;
                            next[i].step = v as u32;
                        }
                    }
                    None => {
                        index.insert(set.clone(), next.len());
                        next.push(State {
                            set,
                            live,
                            peak,
                            parent: pi as u32,
                            step: v as u32,
                        });
                    }
                }
            }
        }
        if next.len() > max_states.max(1) {
            exact = false;
            let mut idx: Vec<usize> = (0..next.len()).collect();
            idx.sort_by_key(|&i| (next[i].peak, next[i].live, i));
            idx.truncate(max_states.max(1));
            idx.sort_unstable();
            let mut keep: Vec<Option<State>> = next.into_iter().map(Some).collect();
            next = idx
                .into_iter()
                .map(|i| keep[i].take().expect("kept once"))
                .collect();
        }
        back.push(next.iter().map(|s| (s.parent, s.step)).collect());
        layer = next;
    }
    let best = (0..layer.len())
        .min_by_key(|&i| (layer[i].peak, i))
        .unwrap_or(0);
    let mut order = vec![0usize; n];
    let mut at = best as u32;
    for l in (0..n).rev() {
        let (p, s) = back[l][at as usize];
        order[l] = s as usize;
        at = p;
    }
    Found { order, exact }
}
