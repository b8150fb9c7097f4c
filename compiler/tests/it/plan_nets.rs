//! Plans of the test-set networks (hand-built QGraphs with the structure of
//! the zoo networks until lowering lands): verified, tight, in place.

use ingot_compiler::plan::{plan, verify, PlanOptions};
use ingot_testkit::synth;
use std::time::Instant;

fn opts() -> PlanOptions {
    PlanOptions {
        verify: true,
        ..PlanOptions::default()
    }
}

/// [`opts`] without row streaming, for the figures of the unfused plan.
fn unfused() -> PlanOptions {
    PlanOptions {
        stream: false,
        ..opts()
    }
}

#[test]
fn every_network_verifies_and_is_near_its_lower_bound() {
    for q in synth::zoo_lowered().into_iter().chain(synth::test_set()) {
        let t = Instant::now();
        let p = plan(&q, &opts()).unwrap_or_else(|e| panic!("{}: {e}", q.name));
        let secs = t.elapsed().as_secs_f64();
        verify(&q, &p).expect("verifier passes");
        // Every map touched by a step lies inside the arena (its stored
        // rows: a ring holds fewer than its height).
        let rows = p.stored_rows(&q);
        for (i, m) in q.maps.iter().enumerate() {
            let v = p.map_views[i];
            let end = v.offset + (rows[i] * m.shape.w - 1) * v.stride + m.shape.c;
            assert!(
                end <= p.arena_bytes,
                "{}: map `{}` ends at {end} > {}",
                q.name,
                m.name,
                p.arena_bytes
            );
        }
        assert!(p.lower_bound <= p.arena_bytes);
        assert!(p.arena_bytes <= p.naive_bytes);
        println!(
            "{:<20} arena {:>9} lower bound {:>9} ratio {:.4} naive {:>9} copying {:>9} ({:.1}%) order peak {} -> {} ({}) {} in {:.1} ms",
            q.name,
            p.arena_bytes,
            p.lower_bound,
            p.ratio(),
            p.naive_bytes,
            p.copying_bytes,
            100.0 * p.arena_bytes as f64 / p.copying_bytes as f64,
            p.order_peak_before,
            p.order_peak_after,
            if p.order_exact { "exact" } else { "beam" },
            p.heuristic,
            secs * 1e3
        );
        assert!(
            p.ratio() <= 1.05,
            "{}: ratio {:.4} above the 1.05 goal",
            q.name,
            p.ratio()
        );
    }
}

/// Dense networks: in place beats the best copying plan clearly, and all
/// concatenations of the frameworks-style chains run in place.
///
/// The brief's goal was ≤ 60 % of the copying plan. It is not reachable on
/// these networks with these kernels: at a transition the whole block
/// region (B bytes) and the transition convolution's output (B/2, the
/// compression) are both alive, since a convolution may not overwrite its
/// input, so in place costs at least 1.5·B there, while copying costs about
/// 2·B at the block's last concat: 75 %. We assert the achieved bound.
#[test]
fn in_place_concat_beats_copying_on_dense_networks() {
    for q in [
        synth::dense(&synth::DenseCfg::small()),
        synth::dense(&synth::DenseCfg::densenet121()),
    ] {
        let p = plan(&q, &unfused()).expect("plan");
        assert!(
            p.copy_concat.is_empty(),
            "{}: {:?} copy",
            q.name,
            p.copy_concat
        );
        let pct = p.arena_bytes as f64 / p.copying_bytes as f64;
        println!(
            "{}: in place {} / copying {} = {:.1}%",
            q.name,
            p.arena_bytes,
            p.copying_bytes,
            100.0 * pct
        );
        assert!(
            pct <= 0.85,
            "{}: in place is {:.1}% of copying",
            q.name,
            100.0 * pct
        );
        // Every map stored once: buffers hold each map exactly once.
        let mut seen = vec![0; q.maps.len()];
        for b in &p.buffers {
            for m in &b.maps {
                seen[m.index()] += 1;
            }
        }
        assert!(
            seen.iter().all(|&k| k == 1),
            "{}: a map is stored twice or not at all",
            q.name
        );
        // One region per dense block.
        let regions = p.buffers.iter().filter(|b| b.region).count();
        assert_eq!(
            regions,
            if q.name.ends_with("densenet121") {
                4
            } else {
                2
            },
            "{}",
            q.name
        );
    }
}

/// A branchy cell written as all expansions first: the order search runs
/// each expand–reduce pair back to back, exactly.
#[test]
fn reorder_cuts_the_peak() {
    let q = synth::branchy(6);
    let p = plan(&q, &opts()).expect("plan");
    println!(
        "branchy6 peak: file order {} -> searched {}",
        p.order_peak_before, p.order_peak_after
    );
    // File order: the input (2 KiB) and six 16 KiB expansions alive at once.
    assert!(p.order_peak_before >= 6 * 16384);
    assert!(p.order_peak_after < p.order_peak_before / 3);
    assert!(p.order_exact);
    // A beam of one set per layer is a heuristic but still valid.
    let b = plan(
        &q,
        &PlanOptions {
            max_order_states: 1,
            ..opts()
        },
    )
    .expect("plan");
    assert!(!b.order_exact);
    assert!(b.order_peak_after <= b.order_peak_before);
    let off = plan(
        &q,
        &PlanOptions {
            reorder: false,
            ..opts()
        },
    )
    .expect("plan");
    assert_eq!(off.order_peak_after, off.order_peak_before);
    assert!(off.order.iter().enumerate().all(|(i, s)| s.index() == i));
}

/// DenseNet-121 at 224×224: planning time printed (budget 2 s in release;
/// not asserted here since tests are not built in release).
#[test]
fn densenet121_planning_time() {
    let q = synth::dense(&synth::DenseCfg::densenet121());
    let t = Instant::now();
    let p = plan(
        &q,
        &PlanOptions {
            verify: false,
            ..PlanOptions::default()
        },
    )
    .expect("plan");
    println!(
        "densenet121: {} steps planned in {:.1} ms (arena {} B)",
        q.steps.len(),
        t.elapsed().as_secs_f64() * 1e3,
        p.arena_bytes
    );
    assert!(q.steps.len() > 180);
}

/// The picture and the report carry the headline figures.
#[test]
fn svg_and_report() {
    let q = synth::dense(&synth::DenseCfg::small());
    let p = plan(&q, &unfused()).expect("plan");
    let svg = ingot_compiler::plan::render_svg(&q, &p).expect("svg");
    assert!(svg.starts_with("<svg"));
    assert!(
        svg.contains("dense_small: arena 288.0 KiB, lower bound 288.0 KiB, ratio 1.000"),
        "title"
    );
    assert!(
        svg.contains("step (position in execution order)") && svg.contains("arena offset (KiB)")
    );
    assert!(svg.matches("<rect").count() >= p.buffers.len());
    let r = ingot_compiler::plan::report(&q, &p, None);
    let text = r.to_string();
    assert!(
        text.contains("block1.layer1.cat") && text.contains("no-op"),
        "{text}"
    );
    assert!(text.contains(&format!("arena        {:>10} B", p.arena_bytes)));
    let json = serde_json::to_value(&r).expect("json");
    assert_eq!(json["arena_bytes"], p.arena_bytes);
    assert_eq!(json["maps"].as_array().map(Vec::len), Some(q.maps.len()));
}
