//! The portable twins against the instructions' definitions, on the host.
//!
//! On the host the wrappers are the twins, so what this file checks is
//! that the twins compute what the instructions compute: each reference
//! below is written from the instruction's pseudo-code in the Arm
//! Architecture Reference Manual, ARMv7-M (sections A7.7 SMLAD, SMLABB,
//! SXTB16, PKHBT/PKHTB; from memory): operands extended to 64 bits, the
//! sum truncated to the 32-bit destination. The emulated cores compare
//! the instructions themselves with the twins
//! (`compiler/tests/dsp_emulated.rs`).

use ingot_dsp::portable;
use proptest::prelude::*;

/// Signed half `k` (0 low, 1 high) of `v`, via bytes (independent of the
/// twins' shifts).
fn half(v: u32, k: usize) -> i64 {
    let b = v.to_le_bytes();
    i16::from_le_bytes([b[2 * k], b[2 * k + 1]]) as i64
}

/// The low 32 bits of a 64-bit sum, as the destination register holds it.
fn trunc(v: i64) -> i32 {
    (v as u64 & 0xFFFF_FFFF) as u32 as i32
}

fn ref_smlad(x: u32, y: u32, a: i32) -> i32 {
    trunc(a as i64 + half(x, 0) * half(y, 0) + half(x, 1) * half(y, 1))
}

fn ref_smladx(x: u32, y: u32, a: i32) -> i32 {
    trunc(a as i64 + half(x, 0) * half(y, 1) + half(x, 1) * half(y, 0))
}

fn ref_smlabb(x: u32, y: u32, a: i32) -> i32 {
    trunc(a as i64 + half(x, 0) * half(y, 0))
}

fn ref_smlatt(x: u32, y: u32, a: i32) -> i32 {
    trunc(a as i64 + half(x, 1) * half(y, 1))
}

/// `SXTB16` with rotation `rot` bits: bytes `rot/8` and `rot/8 + 2`.
fn ref_sxtb16(x: u32, rot: u32) -> u32 {
    let b = x.rotate_right(rot).to_le_bytes();
    let lo = (b[0] as i8 as i16).to_le_bytes();
    let hi = (b[2] as i8 as i16).to_le_bytes();
    u32::from_le_bytes([lo[0], lo[1], hi[0], hi[1]])
}

/// PKHBT d, a, b, LSL #s: bits 0–15 from `a`, 16–31 from `b << s`.
fn ref_pkhbt(a: u32, b: u32, s: u32) -> u32 {
    let (a, b) = (a.to_le_bytes(), (b << s).to_le_bytes());
    u32::from_le_bytes([a[0], a[1], b[2], b[3]])
}

/// PKHTB d, a, b, ASR #s: bits 16–31 from `a`, 0–15 from `b >> s`
/// (arithmetic).
fn ref_pkhtb(a: u32, b: u32, s: u32) -> u32 {
    let (a, b) = (a.to_le_bytes(), (((b as i32) >> s) as u32).to_le_bytes());
    u32::from_le_bytes([b[0], b[1], a[2], a[3]])
}

fn check_all(x: u32, y: u32, a: i32) {
    assert_eq!(
        portable::smlad(x, y, a),
        ref_smlad(x, y, a),
        "smlad {x:#x} {y:#x} {a}"
    );
    assert_eq!(
        portable::smladx(x, y, a),
        ref_smladx(x, y, a),
        "smladx {x:#x} {y:#x} {a}"
    );
    assert_eq!(
        portable::smlabb(x, y, a),
        ref_smlabb(x, y, a),
        "smlabb {x:#x} {y:#x} {a}"
    );
    assert_eq!(
        portable::smlatt(x, y, a),
        ref_smlatt(x, y, a),
        "smlatt {x:#x} {y:#x} {a}"
    );
    assert_eq!(portable::sxtb16(x), ref_sxtb16(x, 0), "sxtb16 {x:#x}");
    assert_eq!(
        portable::sxtb16_ror8(x),
        ref_sxtb16(x, 8),
        "sxtb16 ror8 {x:#x}"
    );
    assert_eq!(
        portable::pkhbt(x, y),
        ref_pkhbt(x, y, 0),
        "pkhbt {x:#x} {y:#x}"
    );
    assert_eq!(
        portable::pkhbt_lsl16(x, y),
        ref_pkhbt(x, y, 16),
        "pkhbt lsl16"
    );
    assert_eq!(
        portable::pkhtb(x, y),
        ref_pkhtb(x, y, 0),
        "pkhtb {x:#x} {y:#x}"
    );
    assert_eq!(
        portable::pkhtb_asr16(x, y),
        ref_pkhtb(x, y, 16),
        "pkhtb asr16"
    );
    // The wrappers are the twins on the host (NATIVE is false here).
    const { assert!(!ingot_dsp::NATIVE) };
    assert_eq!(ingot_dsp::smlad(x, y, a), portable::smlad(x, y, a));
    assert_eq!(ingot_dsp::sxtb16_ror8(x), portable::sxtb16_ror8(x));
}

/// Words whose halves and bytes are the extremes of int16 and int8.
const EDGE_HALVES: [i16; 8] = [-32768, 32767, -128, 127, -1, 0, 1, 255];
const EDGE_BYTES: [i8; 5] = [-128, 127, -1, 0, 1];
const EDGE_ACC: [i32; 6] = [i32::MIN, i32::MAX, -1, 0, 1, 1 << 30];

fn edge_words() -> Vec<u32> {
    let mut w = Vec::new();
    for &l in &EDGE_HALVES {
        for &h in &EDGE_HALVES {
            w.push(portable::pack(l, h));
        }
    }
    for &a in &EDGE_BYTES {
        for &b in &EDGE_BYTES {
            w.push(u32::from_le_bytes([a as u8, b as u8, b as u8, a as u8]));
        }
    }
    w
}

#[test]
fn twins_match_the_definitions_on_edge_operands() {
    let words = edge_words();
    for &x in &words {
        for &y in &words {
            for &a in &EDGE_ACC {
                check_all(x, y, a);
            }
        }
    }
}

/// Hand-worked values (from the definitions above, by hand).
#[test]
fn worked_examples() {
    let p = portable::pack;
    // (-32768)·(-32768) + (-32768)·(-32768) = 2^31: wraps to i32::MIN.
    assert_eq!(
        portable::smlad(p(-32768, -32768), p(-32768, -32768), 0),
        i32::MIN
    );
    // 3·5 + (-2)·7 = 1; plus i32::MAX wraps to i32::MIN.
    assert_eq!(portable::smlad(p(3, -2), p(5, 7), i32::MAX), i32::MIN);
    // Exchanged: 3·7 + (-2)·5 = 11.
    assert_eq!(portable::smladx(p(3, -2), p(5, 7), 0), 11);
    assert_eq!(portable::smlabb(p(3, -2), p(5, 7), 100), 115);
    assert_eq!(portable::smlatt(p(3, -2), p(5, 7), 100), 86);
    // int8 word [-128, 127, -1, 5] (bytes 0..3).
    let w = u32::from_le_bytes([0x80, 0x7F, 0xFF, 0x05]);
    assert_eq!(portable::sxtb16(w), p(-128, -1));
    assert_eq!(portable::sxtb16_ror8(w), p(127, 5));
    assert_eq!(portable::pkhbt(0x1111_2222, 0x3333_4444), 0x3333_2222);
    assert_eq!(portable::pkhbt_lsl16(0x1111_2222, 0x3333_4444), 0x4444_2222);
    assert_eq!(portable::pkhtb(0x1111_2222, 0x3333_4444), 0x1111_4444);
    assert_eq!(portable::pkhtb_asr16(0x1111_2222, 0x8333_4444), 0x1111_8333);
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(4096))]
    #[test]
    fn twins_match_the_definitions(x in any::<u32>(), y in any::<u32>(), a in any::<i32>()) {
        check_all(x, y, a);
    }

    /// Long wrapping sums: a chain of SMLADs equals the i64 sum truncated.
    #[test]
    fn smlad_chains_wrap(words in proptest::collection::vec((any::<u32>(), any::<u32>()), 1..64), a in any::<i32>()) {
        let mut acc = a;
        let mut wide = a as i64;
        for &(x, y) in &words {
            acc = portable::smlad(x, y, acc);
            wide += half(x, 0) * half(y, 0) + half(x, 1) * half(y, 1);
        }
        prop_assert_eq!(acc, trunc(wide));
    }
}
