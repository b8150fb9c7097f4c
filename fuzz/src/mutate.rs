//! Structure-aware mutations: JSON documents are mutated as trees (values
//! replaced by boundary values, keys dropped or added, arrays grown or
//! shrunk, types swapped), safetensors files through their header, and
//! any file also as raw bytes, so both deep and shallow parser paths run.

use crate::rng::Rng;
use serde_json::{json, Map, Value};

/// Numbers at the edges of what the frontends check: zero, signs, the
/// limits of i32/u32/u64/f32, subnormals, huge dimensions.
const NUMBERS: &[f64] = &[
    0.0,
    -0.0,
    1.0,
    -1.0,
    2.0,
    3.0,
    7.0,
    255.0,
    256.0,
    65535.0,
    65536.0,
    2147483647.0,
    2147483648.0,
    4294967295.0,
    4294967296.0,
    9.007199254740993e15,
    1.8446744073709552e19,
    1e38,
    -1e38,
    3.4028235e38,
    1e300,
    1e-45,
    1e-38,
    0.5,
    -0.5,
    100000.0,
    5000.0,
    3000.0,
];

/// Strings that meet the frontends' special cases: paths, names of other
/// things, control and bidi characters, op names.
const STRINGS: &[&str] = &[
    "",
    "../../esc",
    "/dev/zero",
    "/dev/urandom",
    "/etc/passwd",
    ".",
    "..",
    "input",
    "image",
    "conv1",
    "fc",
    "x\u{202e}y",
    "a\u{2066}b\u{2069}",
    "nul\u{0}",
    "line\nbreak",
    "\"; panic!(\"x\"); \"",
    "*/",
    "same",
    "valid",
    "gray",
    "rgb",
    "F32",
    "F16",
    "BF16",
    "I64",
    "U8",
    "ingot.graph.v1",
    "ingot.ranges.v1",
    "conv2d",
    "batch_norm",
    "relu",
    "relu6",
    "max_pool2d",
    "avg_pool2d",
    "global_avg_pool",
    "flatten",
    "linear",
    "concat",
    "add",
    "softmax",
    "dropout",
];

/// A random "interesting" JSON value.
fn any_value(r: &mut Rng, depth: usize) -> Value {
    match r.below(if depth > 2 { 4 } else { 7 }) {
        0 => json!(*r.pick(NUMBERS)),
        1 => json!(r.next_u64() as i64 % 100_000),
        2 => json!(*r.pick(STRINGS)),
        3 => [Value::Null, json!(true), json!(false)][r.below(3)].clone(),
        4 => Value::Array((0..r.below(5)).map(|_| any_value(r, depth + 1)).collect()),
        5 => {
            let mut m = Map::new();
            for _ in 0..r.below(4) {
                m.insert(r.pick(STRINGS).to_string(), any_value(r, depth + 1));
            }
            Value::Object(m)
        }
        _ => json!([r.pick(NUMBERS), r.pick(NUMBERS), r.pick(NUMBERS)]),
    }
}

/// Counts the nodes of `v` (itself included).
fn count(v: &Value) -> usize {
    1 + match v {
        Value::Array(a) => a.iter().map(count).sum(),
        Value::Object(m) => m.values().map(count).sum(),
        _ => 0,
    }
}

/// Calls `f` on the `n`-th node of `v` in pre-order; false if there is
/// none.
fn with_nth(v: &mut Value, n: &mut usize, f: &mut dyn FnMut(&mut Value)) -> bool {
    if *n == 0 {
        f(v);
        return true;
    }
    *n -= 1;
    match v {
        Value::Array(a) => a.iter_mut().any(|c| with_nth(c, n, f)),
        Value::Object(m) => m.values_mut().any(|c| with_nth(c, n, f)),
        _ => false,
    }
}

/// Applies one tree mutation to a random node of `v`. `names` are strings
/// taken from the seed (layer and tensor names), so references between
/// parts of a document are rewired, not only broken.
pub fn mutate_value(v: &mut Value, r: &mut Rng, names: &[String]) {
    let mut n = r.below(count(v));
    with_nth(v, &mut n, &mut |node| mutate_node(node, r, names));
}

fn mutate_node(node: &mut Value, r: &mut Rng, names: &[String]) {
    match r.below(10) {
        0 | 1 => {
            // Same type, boundary value.
            *node = match node {
                Value::Number(_) => json!(*r.pick(NUMBERS)),
                Value::String(_) if !names.is_empty() && r.one_in(2) => {
                    json!(r.pick(names).clone())
                }
                Value::String(_) => json!(*r.pick(STRINGS)),
                Value::Bool(b) => json!(!*b),
                _ => any_value(r, 0),
            }
        }
        2 => *node = any_value(r, 0),
        3 => {
            if let Value::Object(m) = node {
                if !m.is_empty() {
                    let k = m.keys().nth(r.below(m.len())).cloned().expect("key");
                    m.remove(&k);
                }
            }
        }
        4 => {
            if let Value::Object(m) = node {
                let key = if !m.is_empty() && r.one_in(2) {
                    m.keys().nth(r.below(m.len())).cloned().expect("key")
                } else {
                    r.pick(STRINGS).to_string()
                };
                m.insert(key, any_value(r, 1));
            }
        }
        5 => {
            if let Value::Array(a) = node {
                if !a.is_empty() {
                    let i = r.below(a.len());
                    if r.one_in(2) {
                        a.remove(i);
                    } else {
                        let c = a[i].clone();
                        a.insert(r.below(a.len() + 1), c);
                    }
                }
            }
        }
        6 => {
            if let Value::Array(a) = node {
                if a.len() > 1 {
                    let (i, j) = (r.below(a.len()), r.below(a.len()));
                    a.swap(i, j);
                }
            }
        }
        7 => {
            if let Value::Number(x) = node {
                let f = x.as_f64().unwrap_or(0.0);
                *node = json!(match r.below(4) {
                    0 => f + 1.0,
                    1 => f - 1.0,
                    2 => f * 2.0,
                    _ => -f,
                });
            }
        }
        8 => {
            if let Value::Array(a) = node {
                a.clear();
            } else if let Value::Object(m) = node {
                m.clear();
            }
        }
        _ => {
            if let Value::String(s) = node {
                let extra = *r.pick(STRINGS);
                s.push_str(extra);
            }
        }
    }
}

/// Raw byte mutations: flips, boundary bytes, truncation, duplication,
/// insertion of random or boundary bytes.
pub fn mutate_bytes(b: &mut Vec<u8>, r: &mut Rng) {
    if b.is_empty() {
        b.extend((0..r.below(16)).map(|_| r.next_u64() as u8));
        return;
    }
    match r.below(7) {
        0 => {
            let i = r.below(b.len());
            b[i] ^= 1 << r.below(8);
        }
        1 => {
            let i = r.below(b.len());
            b[i] = *r.pick(&[0u8, 1, 0x7f, 0x80, 0xff, b'0', b'9', b' ', b'\n']);
        }
        2 => {
            let n = r.below(b.len());
            b.truncate(n);
        }
        3 => {
            let i = r.below(b.len());
            let n = r.below(64).min(b.len() - i);
            let chunk = b[i..i + n].to_vec();
            let at = r.below(b.len() + 1);
            b.splice(at..at, chunk);
        }
        4 => {
            let at = r.below(b.len() + 1);
            let n = r.below(16);
            let ins: Vec<u8> = (0..n).map(|_| r.next_u64() as u8).collect();
            b.splice(at..at, ins);
        }
        5 => {
            // Overwrite a little-endian word with a boundary value (sizes,
            // lengths and dimensions in binary headers).
            if b.len() >= 4 {
                let i = r.below(b.len() - 3);
                let v: u32 = *r.pick(&[
                    0u32,
                    1,
                    0x7fff_ffff,
                    0x8000_0000,
                    0xffff_ffff,
                    65535,
                    100_000,
                ]);
                b[i..i + 4].copy_from_slice(&v.to_le_bytes());
            }
        }
        _ => {
            let i = r.below(b.len());
            let n = r.below(32).min(b.len() - i);
            b.drain(i..i + n);
        }
    }
}

/// Mutates a JSON document as a tree (if it parses) or as bytes.
pub fn mutate_json(text: &[u8], r: &mut Rng, names: &[String]) -> Vec<u8> {
    match serde_json::from_slice::<Value>(text) {
        Ok(mut v) if !r.one_in(8) => {
            for _ in 0..1 + r.below(3) {
                mutate_value(&mut v, r, names);
            }
            let mut out = if r.one_in(2) {
                serde_json::to_vec_pretty(&v)
            } else {
                serde_json::to_vec(&v)
            }
            .expect("a Value serialises");
            if r.one_in(16) {
                mutate_bytes(&mut out, r);
            }
            out
        }
        _ => {
            let mut out = text.to_vec();
            mutate_bytes(&mut out, r);
            out
        }
    }
}

/// Mutates a safetensors file: its header as a JSON tree (the header
/// length rewritten to match, or not), its tensor data (special floats),
/// or its bytes.
pub fn mutate_safetensors(file: &[u8], r: &mut Rng, names: &[String]) -> Vec<u8> {
    let parsed = (file.len() >= 8)
        .then(|| u64::from_le_bytes(file[..8].try_into().expect("8 bytes")) as usize)
        .filter(|&n| n <= file.len() - 8)
        .map(|n| (&file[8..8 + n], &file[8 + n..]));
    match (parsed, r.below(4)) {
        (Some((header, data)), 0 | 1) => {
            let h = mutate_json(header, r, names);
            let mut out = (h.len() as u64).to_le_bytes().to_vec();
            if r.one_in(8) {
                out = ((h.len() as u64).wrapping_add(r.next_u64() % 64))
                    .to_le_bytes()
                    .to_vec();
            }
            out.extend_from_slice(&h);
            out.extend_from_slice(data);
            if r.one_in(4) {
                // Grow or shrink the data to follow a changed shape, or not.
                let n = r.below(4096);
                if r.one_in(2) {
                    out.extend((0..n).map(|_| r.next_u64() as u8));
                } else {
                    out.truncate(out.len().saturating_sub(n));
                }
            }
            out
        }
        (Some((header, data)), 2) if data.len() >= 4 => {
            let mut out = file.to_vec();
            let base = 8 + header.len();
            for _ in 0..1 + r.below(4) {
                let i = base + 4 * r.below(data.len() / 4);
                let v: f32 = *r.pick(&[
                    f32::NAN,
                    f32::INFINITY,
                    f32::NEG_INFINITY,
                    f32::MAX,
                    f32::MIN_POSITIVE,
                    1e-45,
                    0.0,
                    -0.0,
                    1e30,
                ]);
                out[i..i + 4].copy_from_slice(&v.to_le_bytes());
            }
            out
        }
        _ => {
            let mut out = file.to_vec();
            mutate_bytes(&mut out, r);
            out
        }
    }
}
