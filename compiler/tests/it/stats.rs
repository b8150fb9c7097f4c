//! The accuracy statistics (`ingot_compiler::stats`) against published
//! worked examples and an independent statistics library.

use ingot_compiler::stats::{
    self, escapes, images_needed, ln_binomial_half_cdf, mcnemar_exact_ln_p, mcnemar_exact_p,
    mcnemar_statistic, newcombe_paired, paired_accuracy, wilson, Gates, PairedTable, Z95,
};
use proptest::prelude::*;
use statrs::distribution::{Binomial, DiscreteCDF};

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

/// Agresti, "Categorical Data Analysis" (2002), section 10.1: presidential
/// approval ratings of the same 1600 people in two surveys, table
/// (794, 150, 86, 570); McNemar's statistic (150 − 86)²/(150 + 86) = 17.36
/// (from memory, recomputed here).
#[test]
fn mcnemar_statistic_on_agrestis_approval_table() {
    let z2 = mcnemar_statistic(150, 86).unwrap();
    assert!(close(z2, 64.0 * 64.0 / 236.0, 1e-12), "{z2}");
    assert!(close(z2, 17.36, 0.005), "{z2}");
    assert_eq!(mcnemar_statistic(0, 0), None);
    // With 236 discordant pairs the exact p-value is far below 0.001, as
    // the chi-squared approximation (17.36 on 1 df, p ≈ 3e-5) says.
    let p = mcnemar_exact_p(150, 86);
    assert!(p < 1e-4 && p > 1e-6, "{p}");
}

/// The exact McNemar p-value is the two-sided binomial test of b of b + c
/// with p = ½: checked against `statrs`' binomial distribution function
/// (an independent implementation, through the regularised incomplete
/// beta function).
#[test]
fn mcnemar_exact_p_matches_statrs_on_worked_values() {
    for (b, c) in [(0, 1), (1, 1), (2, 0), (5, 1), (13, 3), (150, 86), (40, 60)] {
        let n = b + c;
        let tail = Binomial::new(0.5, n).unwrap().cdf(b.min(c));
        let want = (2.0 * tail).min(1.0);
        let got = mcnemar_exact_p(b, c);
        assert!(
            close(got, want, 1e-9 * want.max(1e-300)),
            "b={b} c={c}: {got} vs {want}"
        );
    }
    assert_eq!(mcnemar_exact_p(0, 0), 1.0);
    assert_eq!(mcnemar_exact_p(7, 7), 1.0);
    // Exact binomial test of 13 of 16 against ½: P = 0.02127, as printed by
    // the `contingencytables` R package (Fagerland, Lydersen & Laake 2017,
    // "Statistical Analysis of Contingency Tables", its chapter-2 tests).
    assert!(close(mcnemar_exact_p(13, 3), 0.02127, 5e-6));
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    /// Many random (b, c) against `statrs`.
    #[test]
    fn mcnemar_exact_p_matches_statrs(b in 0u64..4000, c in 0u64..4000) {
        let n = b + c;
        prop_assume!(n > 0);
        let tail = Binomial::new(0.5, n).unwrap().cdf(b.min(c));
        // Below ~1e-290 the reference itself loses digits to underflow.
        prop_assume!(tail > 1e-290);
        let want = (2.0 * tail).min(1.0);
        let got = mcnemar_exact_p(b, c);
        prop_assert!(
            (got - want).abs() <= 1e-8 * want,
            "b={} c={}: {} vs statrs {}", b, c, got, want
        );
        prop_assert_eq!(mcnemar_exact_p(b, c), mcnemar_exact_p(c, b));
    }
}

/// Large tables neither overflow nor underflow: for even n,
/// P(X ≤ n/2 − 1) = (1 − P(X = n/2))/2 with the central term
/// P(X = n/2) ≈ √(2/(πn))·(1 − 1/(4n)) (Stirling's series, common
/// practice); and one-sided extremes are exactly 2⁻ⁿ.
#[test]
fn exact_p_is_finite_for_a_million_discordant_pairs() {
    let n = 1_000_000u64;
    let central = (2.0 / (std::f64::consts::PI * n as f64)).sqrt() * (1.0 - 1.0 / (4.0 * n as f64));
    let want = ((1.0 - central) / 2.0).ln();
    let got = ln_binomial_half_cdf(n / 2 - 1, n);
    assert!(close(got, want, 1e-12), "{got} vs {want}");
    assert!(close(mcnemar_exact_p(n / 2, n / 2), 1.0, 1e-12));
    let ln_p = mcnemar_exact_ln_p(n, 0);
    let exact = (1.0 - n as f64) * std::f64::consts::LN_2;
    assert!(close(ln_p, exact, 1e-9 * exact.abs()), "{ln_p} vs {exact}");
    assert_eq!(
        mcnemar_exact_p(n, 0),
        0.0,
        "underflows in linear space only"
    );
    // 2000 images float got right and int8 wrong: p = 2^-1999, below the
    // smallest f64, still reported through its logarithm.
    let p = paired_accuracy(&[0; 2000], &[1; 2000], &[0; 2000]).unwrap();
    assert!(
        close(p.mcnemar_log10_p, -1999.0 * 2f64.log10(), 1e-9),
        "{}",
        p.mcnemar_log10_p
    );
    assert_eq!(p.mcnemar_p, 0.0);
    assert_eq!(stats::p_value(p.mcnemar_p, p.mcnemar_log10_p), "1e-602");
}

/// Wilson (1927) score interval, 13 of 16: 0.5699 to 0.9341, as printed
/// by the `contingencytables` R package (Fagerland, Lydersen & Laake 2017,
/// chapter-2 tests).
#[test]
fn wilson_interval_on_a_published_example() {
    let w = wilson(13, 16).unwrap();
    assert!(
        close(w.lo, 0.5699, 5e-5) && close(w.hi, 0.9341, 5e-5),
        "{w:?}"
    );
    // No successes: the upper end is z²/(n + z²) (the closed form of the
    // score interval at x = 0).
    let w = wilson(0, 400).unwrap();
    assert_eq!(w.lo, 0.0);
    assert!(close(w.hi, Z95 * Z95 / (400.0 + Z95 * Z95), 1e-12));
    assert_eq!(wilson(1, 0), None);
}

/// Newcombe (1998) method 10 for paired data on Cavo et al. (2012),
/// complete response before and after consolidation therapy, table
/// (59, 6, 16, 80): difference −0.0621, 95% interval −0.1186 to −0.0046,
/// as printed by the `contingencytables` R package (Fagerland, Lydersen &
/// Laake 2017, "Newcombe square-and-add" interval, chapter-8 tests).
#[test]
fn newcombe_paired_interval_on_a_published_example() {
    let t = PairedTable {
        both: 59,
        first_only: 6,
        second_only: 16,
        neither: 80,
    };
    let i = newcombe_paired(&t).unwrap();
    assert!(
        close(i.lo, -0.1186, 5e-5) && close(i.hi, -0.0046, 5e-5),
        "{i:?}"
    );
    // Swapping the classifiers mirrors the interval.
    let s = PairedTable {
        first_only: 16,
        second_only: 6,
        ..t
    };
    let m = newcombe_paired(&s).unwrap();
    assert!(close(m.lo, -i.hi, 1e-12) && close(m.hi, -i.lo, 1e-12));
    // A table with an empty margin (all right in both) uses φ = 0 and
    // still contains 0.
    let all = PairedTable {
        both: 50,
        ..PairedTable::default()
    };
    let a = newcombe_paired(&all).unwrap();
    assert!(
        a.lo < 0.0 && a.hi > 0.0 && close(a.lo, -a.hi, 1e-12),
        "{a:?}"
    );
    assert_eq!(newcombe_paired(&PairedTable::default()), None);
}

/// The paired figures from predictions, on a table small enough to count
/// by hand: 10 images, float right on 9, int8 on 7; b = 3 (float only),
/// c = 1 (int8 only).
#[test]
fn paired_accuracy_counts_and_plans() {
    let labels = [0, 0, 0, 0, 0, 1, 1, 1, 1, 1];
    let float = [0, 0, 0, 0, 0, 1, 1, 1, 1, 0];
    let int8 = [0, 0, 1, 1, 0, 0, 1, 1, 1, 1];
    let p = paired_accuracy(&float, &int8, &labels).unwrap();
    assert_eq!(
        (p.both_right, p.float_only, p.int8_only, p.both_wrong),
        (6, 3, 1, 0)
    );
    assert!(close(p.drop_pp, 20.0, 1e-9));
    assert!(p.drop_interval_pp.contains(p.drop_pp));
    // Exact p: 2·P(X ≤ 1 | n = 4, ½) = 2·5/16.
    assert!(close(p.mcnemar_p, 0.625, 1e-12));
    // Images for ±1 pp: z²(ψ − θ²)/h² with ψ = 0.4, θ = 0.2.
    let want = (Z95 * Z95 * (0.4 - 0.04) / 1e-4).ceil() as u64;
    assert_eq!(p.images_for_1pp, want);
    assert_eq!(p.images_for_half_pp, images_needed(0.4, 0.2, 0.005));
    // At the planned size the normal-approximation half-width is at most
    // 0.5 pp, one image fewer it is more.
    let hw = |n: u64| Z95 * ((0.4f64 - 0.04) / n as f64).sqrt();
    assert!(hw(p.images_for_half_pp) <= 0.005 && hw(p.images_for_half_pp - 1) > 0.005);
    assert_eq!(p.settles(100.0), Some(true));
    assert_eq!(p.settles(-50.0), Some(false));
    assert_eq!(p.settles(20.0), None);
    let advice = p.advice(20.0).unwrap();
    assert!(
        advice.contains("cannot tell") && advice.contains(&p.images_for_half_pp.to_string()),
        "{advice}"
    );
    assert!(p.advice(100.0).is_none());
    // No discordant image: planned with the Wilson upper end of 0 of n.
    let same = paired_accuracy(&[0; 400], &[0; 400], &[0; 400]).unwrap();
    assert_eq!(
        (same.float_only, same.int8_only, same.mcnemar_p),
        (0, 0, 1.0)
    );
    assert!(close(
        same.planning_discordance,
        wilson(0, 400).unwrap().hi,
        1e-15
    ));
    assert_eq!(paired_accuracy(&[], &[], &[]), None);
}

/// Escapes and overkill on a hand-made confusion set: classes ok (good),
/// scratch, pit; 4 ok, 3 scratch, 3 pit images.
#[test]
fn escapes_and_overkill_on_a_hand_made_set() {
    let names: Vec<String> = ["ok", "scratch", "pit"].map(String::from).to_vec();
    //             ok ok ok ok | scratch  | pit
    let labels = [0, 0, 0, 0, 1, 1, 1, 2, 2, 2];
    // float: one scratch passed as ok (escape), one ok rejected as pit.
    let float = [0, 0, 0, 2, 1, 0, 1, 2, 2, 2];
    // int8: the same scratch escape, a new pit escape, the ok rejection
    // gone but another ok rejected as scratch; a scratch called pit (a
    // defect still rejected: neither escape nor overkill).
    let int8 = [0, 1, 0, 0, 2, 0, 1, 2, 0, 2];
    let e = escapes(&float, &int8, &labels, &[0], &names);
    assert_eq!(e.good_classes, ["ok"]);
    assert_eq!(
        (
            e.float.defects,
            e.float.escapes,
            e.float.good,
            e.float.overkill
        ),
        (6, 1, 4, 1)
    );
    assert_eq!(
        (e.int8.defects, e.int8.escapes, e.int8.good, e.int8.overkill),
        (6, 2, 4, 1)
    );
    assert!(close(e.int8.escape_rate, 2.0 / 6.0, 1e-12));
    assert_eq!(e.int8.escape_interval, wilson(2, 6));
    assert_eq!((e.added_escapes, e.removed_escapes), (1, 0));
    assert_eq!((e.added_overkill, e.removed_overkill), (1, 1));
    let per: Vec<(&str, u64, u64)> = e
        .int8
        .per_class
        .iter()
        .map(|c| (c.class.as_str(), c.images, c.escapes))
        .collect();
    assert_eq!(per, [("scratch", 3, 1), ("pit", 3, 1)]);
    assert_eq!(e.float.per_class[1].escapes, 0);
    // Two good classes: a pit called scratch is no escape, an ok called
    // scratch no overkill.
    let two = escapes(&float, &int8, &labels, &[0, 1], &names);
    assert_eq!((two.int8.defects, two.int8.escapes), (3, 1));
    assert_eq!((two.int8.good, two.int8.overkill), (7, 1));

    let gates = Gates {
        max_escapes: Some(1),
        max_added_escapes: Some(0),
        max_drop_upper_pp: None,
    };
    let f = gates.failures(None, Some(&e));
    assert_eq!(f.len(), 2, "{f:?}");
    assert!(
        f[0].starts_with("escapes: 2") && f[0].contains("--max-escapes 1"),
        "{f:?}"
    );
    assert!(
        f[1].starts_with("escapes added by int8: 1") && f[1].contains("--max-added-escapes 0"),
        "{f:?}"
    );
    assert!(Gates {
        max_escapes: Some(2),
        ..Gates::default()
    }
    .failures(None, Some(&e))
    .is_empty());
    let no_good = Gates {
        max_escapes: Some(2),
        ..Gates::default()
    }
    .failures(None, None);
    assert!(no_good[0].contains("--good"), "{no_good:?}");
}

#[test]
fn drop_upper_gate_and_good_class_names() {
    let labels = [0usize; 100];
    let mut int8 = [0usize; 100];
    int8[0] = 1;
    let p = paired_accuracy(&labels, &int8, &labels).unwrap();
    let g = Gates {
        max_drop_upper_pp: Some(1.0),
        ..Gates::default()
    };
    let f = g.failures(Some(&p), None);
    assert!(p.drop_interval_pp.hi > 1.0, "{p:?}");
    assert!(f[0].contains("--max-drop-upper 1"), "{f:?}");
    assert!(Gates {
        max_drop_upper_pp: Some(10.0),
        ..g
    }
    .failures(Some(&p), None)
    .is_empty());

    let names: Vec<String> = ["ok", "pit"].map(String::from).to_vec();
    assert_eq!(stats::good_classes(&["ok".into()], &names), Ok(vec![0]));
    assert_eq!(
        stats::good_classes(&["pit,ok".into(), "ok".into()], &names),
        Ok(vec![1, 0])
    );
    let e = stats::good_classes(&["fine".into()], &names).unwrap_err();
    assert!(e.contains("`fine`") && e.contains("ok, pit"), "{e}");
}
