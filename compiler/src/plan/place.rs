//! Placement: an arena offset for every buffer so that buffers alive at the
//! same step never overlap.
//!
//! Every heuristic visits the buffers in some order and puts each at an
//! offset among the buffers already placed that overlap it in time, using a
//! *best fit* (the smallest gap that holds it) or a *first fit* (the lowest
//! gap that holds it); when no gap holds it, it goes on top of them. Visiting
//! orders:
//!
//! - `greedy-by-size`: largest first (Pisarchyk & Lee 2020, "Efficient
//!   Memory Management for Deep Neural Net Inference", greedy by size for
//!   offset calculation);
//! - `greedy-by-breadth`: steps by decreasing breadth (live bytes at the
//!   step), each step's unplaced buffers largest first (same paper, greedy by
//!   breadth);
//! - `longest-lifetime`: longest live interval first;
//! - `by-start`: earliest first write first (the left-edge order of interval
//!   colouring);
//! - `perturbed-size-<k>`: sizes scaled by a seeded random factor in
//!   `[0.75, 1.25)`, a cheap restart when none of the above reached the
//!   lower bound.
//!
//! The best result (smallest arena, then the first in the list) is kept.

/// One buffer to place: padded size and inclusive live interval.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Item {
    pub size: u64,
    pub first: usize,
    pub last: usize,
}

fn conflicts(a: &Item, b: &Item) -> bool {
    a.first <= b.last && b.first <= a.last
}

/// Places items in `visit` order; returns offsets and arena size.
fn place_in_order(items: &[Item], visit: &[usize], best_fit: bool) -> (Vec<u64>, u64) {
    let mut off: Vec<Option<u64>> = vec![None; items.len()];
    let mut arena = 0;
    let mut near: Vec<(u64, u64)> = Vec::new();
    for &i in visit {
        let it = &items[i];
        near.clear();
        for (j, o) in off.iter().enumerate() {
            if let Some(o) = *o {
                if conflicts(it, &items[j]) && items[j].size > 0 {
                    near.push((o, o + items[j].size));
                }
            }
        }
        near.sort_unstable();
        let mut prev_end = 0u64;
        let mut pick: Option<(u64, u64)> = None; // (gap, offset)
        for &(o, e) in &near {
            if o > prev_end {
                let gap = o - prev_end;
                if gap >= it.size {
                    let better = match pick {
                        None => true,
                        Some((g, _)) => best_fit && gap < g,
                    };
                    if better {
                        pick = Some((gap, prev_end));
                    }
                }
            }
            prev_end = prev_end.max(e);
        }
        let o = pick.map_or(prev_end, |p| p.1);
        off[i] = Some(o);
        arena = arena.max(o + it.size);
    }
    (off.into_iter().map(|o| o.unwrap_or(0)).collect(), arena)
}

/// Best placement over all heuristics: `(offsets, arena, heuristic name)`.
/// Stops early when an arena equals `lower_bound`.
pub(crate) fn place(
    items: &[Item],
    n_steps: usize,
    lower_bound: u64,
    trials: usize,
) -> (Vec<u64>, u64, String) {
    let idx: Vec<usize> = (0..items.len()).collect();
    let len = |i: usize| items[i].last - items[i].first;
    let mut orders: Vec<(String, Vec<usize>)> = Vec::new();
    let mut by_size = idx.clone();
    by_size.sort_by_key(|&i| {
        (
            std::cmp::Reverse(items[i].size),
            std::cmp::Reverse(len(i)),
            items[i].first,
            i,
        )
    });
    orders.push(("greedy-by-size".into(), by_size));
    // Breadth of every step.
    let mut breadth = vec![0u64; n_steps.max(1)];
    for it in items {
        for b in &mut breadth[it.first..=it.last] {
            *b += it.size;
        }
    }
    let mut steps: Vec<usize> = (0..breadth.len()).collect();
    steps.sort_by_key(|&t| (std::cmp::Reverse(breadth[t]), t));
    let mut seen = vec![false; items.len()];
    let mut by_breadth = Vec::with_capacity(items.len());
    for t in steps {
        let mut here: Vec<usize> = idx
            .iter()
            .copied()
            .filter(|&i| !seen[i] && items[i].first <= t && t <= items[i].last)
            .collect();
        here.sort_by_key(|&i| (std::cmp::Reverse(items[i].size), i));
        for i in here {
            seen[i] = true;
            by_breadth.push(i);
        }
    }
    orders.push(("greedy-by-breadth".into(), by_breadth));
    let mut by_len = idx.clone();
    by_len.sort_by_key(|&i| {
        (
            std::cmp::Reverse(len(i)),
            std::cmp::Reverse(items[i].size),
            i,
        )
    });
    orders.push(("longest-lifetime".into(), by_len));
    let mut by_start = idx.clone();
    by_start.sort_by_key(|&i| (items[i].first, std::cmp::Reverse(items[i].size), i));
    orders.push(("by-start".into(), by_start));

    let mut best: Option<(Vec<u64>, u64, String)> = None;
    let consider = |name: &str, visit: &[usize], best: &mut Option<(Vec<u64>, u64, String)>| {
        for best_fit in [true, false] {
            let (o, a) = place_in_order(items, visit, best_fit);
            if best.as_ref().is_none_or(|b| a < b.1) {
                let fit = if best_fit { "best-fit" } else { "first-fit" };
                *best = Some((o, a, format!("{name}/{fit}")));
            }
        }
    };
    for (name, visit) in &orders {
        consider(name, visit, &mut best);
        if best.as_ref().is_some_and(|b| b.1 <= lower_bound) {
            return best.expect("set above");
        }
    }
    let mut rng = crate::util::splitmix::SplitMix64::new(0x1A2B_3C4D_u64 ^ items.len() as u64);
    for k in 0..trials {
        let keys: Vec<u64> = items
            .iter()
            .map(|it| {
                let f = 0.75 + (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64 * 0.5;
                (it.size as f64 * f) as u64
            })
            .collect();
        let mut v = idx.clone();
        v.sort_by_key(|&i| (std::cmp::Reverse(keys[i]), i));
        consider(&format!("perturbed-size-{k}"), &v, &mut best);
        if best.as_ref().is_some_and(|b| b.1 <= lower_bound) {
            break;
        }
    }
    best.unwrap_or_else(|| (Vec::new(), 0, "empty".into()))
}
