//! Constant folding: evaluates nodes whose inputs are all known constants
//! (shape computations such as `Shape`→`Gather`→`Unsqueeze`→`Concat`, which
//! exporters write in front of `Reshape`), so that only layers ingot runs
//! remain.
//!
//! Errors are plain sentences; the caller adds file, node and op.

use super::tensor::{element_count, Const, Data};

/// Op types this module evaluates on constants.
pub const FOLDABLE: &[&str] = &[
    "Identity",
    "Dropout",
    "Cast",
    "Gather",
    "Unsqueeze",
    "Squeeze",
    "Concat",
    "Reshape",
    "Flatten",
    "Add",
    "Sub",
    "Mul",
    "Div",
    "Neg",
    "Slice",
    "ConstantOfShape",
];

/// Attributes of a node, already read by the caller.
pub trait Attrs {
    /// An integer attribute.
    fn int(&self, name: &str) -> Option<i64>;
    /// An integer-list attribute.
    fn ints(&self, name: &str) -> Option<Vec<i64>>;
}

fn norm_axis(axis: i64, rank: usize) -> Result<usize, String> {
    let r = rank as i64;
    let a = if axis < 0 { axis + r } else { axis };
    if a < 0 || a >= r.max(1) && !(rank == 0 && a == 0) {
        return Err(format!("axis {axis} is out of range for rank {rank}"));
    }
    Ok(a as usize)
}

fn strides(dims: &[usize]) -> Vec<usize> {
    let mut s = vec![1; dims.len()];
    for i in (0..dims.len().saturating_sub(1)).rev() {
        s[i] = s[i + 1] * dims[i + 1];
    }
    s
}

fn map_data(c: &Const, f: impl Fn(usize) -> usize, n: usize) -> Data {
    match &c.data {
        Data::F(v) => Data::F((0..n).map(|i| v[f(i)]).collect()),
        Data::I(v) => Data::I((0..n).map(|i| v[f(i)]).collect()),
    }
}

/// Evaluates `op` on constant inputs (`None` for an omitted optional
/// input). `opset` selects between attribute and input forms.
pub fn eval(
    op: &str,
    inputs: &[Option<&Const>],
    attrs: &dyn Attrs,
    opset: i64,
) -> Result<Const, String> {
    let x = inputs
        .first()
        .copied()
        .flatten()
        .ok_or("the first input is missing")?;
    let input = |i: usize| inputs.get(i).copied().flatten();
    match op {
        "Identity" | "Dropout" => Ok(x.clone()),
        "Cast" => {
            let to = attrs.int("to").ok_or("`to` is missing")? as i32;
            use super::proto::data_type as dt;
            Ok(Const {
                dims: x.dims.clone(),
                data: match to {
                    dt::FLOAT | dt::DOUBLE | dt::FLOAT16 | dt::BFLOAT16 => Data::F(x.floats()),
                    dt::BOOL => Data::I(x.floats().iter().map(|&v| (v != 0.0) as i64).collect()),
                    _ => Data::I(x.ints()),
                },
            })
        }
        "Neg" => Ok(Const {
            dims: x.dims.clone(),
            data: match &x.data {
                Data::F(v) => Data::F(v.iter().map(|a| -a).collect()),
                Data::I(v) => Data::I(v.iter().map(|a| -a).collect()),
            },
        }),
        "Gather" => {
            let idx = input(1).ok_or("`indices` is missing")?;
            let axis = norm_axis(attrs.int("axis").unwrap_or(0), x.dims.len())?;
            let n_axis = *x
                .dims
                .get(axis)
                .ok_or("gathers from a scalar; `data` must have rank 1 or more")?
                as i64;
            let ids: Vec<usize> = idx
                .ints()
                .iter()
                .map(|&i| {
                    let j = if i < 0 { i + n_axis } else { i };
                    if j < 0 || j >= n_axis {
                        Err(format!(
                            "index {i} is out of range for a dimension of {n_axis}"
                        ))
                    } else {
                        Ok(j as usize)
                    }
                })
                .collect::<Result<_, _>>()?;
            let outer: usize = x.dims[..axis].iter().product();
            let inner: usize = x.dims[axis + 1..].iter().product();
            let mut dims = x.dims[..axis].to_vec();
            dims.extend(&idx.dims);
            dims.extend(&x.dims[axis + 1..]);
            let n = outer * ids.len() * inner;
            let src = |o: usize| {
                let (a, rest) = (o / (ids.len() * inner), o % (ids.len() * inner));
                let (k, b) = (rest / inner, rest % inner);
                (a * x.dims[axis] + ids[k]) * inner + b
            };
            Ok(Const {
                data: map_data(x, src, n),
                dims,
            })
        }
        "Unsqueeze" => {
            let axes = axes_of(inputs, attrs, opset, 13)?.ok_or("`axes` is missing")?;
            let rank = x.dims.len() + axes.len();
            let mut axes: Vec<usize> = axes
                .iter()
                .map(|&a| norm_axis(a, rank))
                .collect::<Result<_, _>>()?;
            axes.sort_unstable();
            let mut dims = x.dims.clone();
            for a in axes {
                dims.insert(a.min(dims.len()), 1);
            }
            Ok(Const {
                dims,
                data: x.data.clone(),
            })
        }
        "Squeeze" => {
            let dims = squeeze_dims(&x.dims, axes_of(inputs, attrs, opset, 13)?)?;
            Ok(Const {
                dims,
                data: x.data.clone(),
            })
        }
        "Flatten" => {
            let axis = norm_axis(attrs.int("axis").unwrap_or(1), x.dims.len() + 1)?;
            let a: usize = x.dims[..axis].iter().product();
            let b: usize = x.dims[axis..].iter().product();
            Ok(Const {
                dims: vec![a, b],
                data: x.data.clone(),
            })
        }
        "Reshape" => {
            let shape = input(1).ok_or("`shape` is missing")?.ints();
            let dims = reshape_dims(&x.dims, &shape, attrs.int("allowzero").unwrap_or(0) != 0)?;
            Ok(Const {
                dims,
                data: x.data.clone(),
            })
        }
        "Concat" => {
            let parts: Vec<&Const> = inputs.iter().flatten().copied().collect();
            let rank = parts.first().ok_or("has no inputs")?.dims.len();
            if rank == 0 {
                return Err("concatenates scalars; inputs must have rank 1 or more".into());
            }
            let axis = norm_axis(attrs.int("axis").ok_or("`axis` is missing")?, rank)?;
            for p in &parts {
                if p.dims.len() != rank
                    || p.dims[..axis] != parts[0].dims[..axis]
                    || p.dims[axis + 1..] != parts[0].dims[axis + 1..]
                {
                    return Err(format!(
                        "inputs of shapes {:?} and {:?} cannot be concatenated on axis {axis}",
                        parts[0].dims, p.dims
                    ));
                }
            }
            let outer: usize = parts[0].dims[..axis].iter().product();
            let inner: usize = parts[0].dims[axis + 1..].iter().product();
            let float = parts.iter().any(|p| matches!(p.data, Data::F(_)));
            let mut fo = Vec::new();
            let mut io = Vec::new();
            for o in 0..outer {
                for p in &parts {
                    let chunk = p.dims[axis] * inner;
                    let r = o * chunk..(o + 1) * chunk;
                    if float {
                        fo.extend_from_slice(&p.floats()[r]);
                    } else {
                        io.extend_from_slice(&p.ints()[r]);
                    }
                }
            }
            let mut dims = parts[0].dims.clone();
            dims[axis] = parts.iter().map(|p| p.dims[axis]).sum();
            Ok(Const {
                dims,
                data: if float { Data::F(fo) } else { Data::I(io) },
            })
        }
        "Add" | "Sub" | "Mul" | "Div" => {
            let y = input(1).ok_or("the second input is missing")?;
            binary(op, x, y)
        }
        "Slice" => slice(inputs),
        "ConstantOfShape" => {
            let dims: Vec<usize> = x
                .ints()
                .iter()
                .map(|&d| usize::try_from(d).map_err(|_| format!("dimension {d} is negative")))
                .collect::<Result<_, _>>()?;
            let n = element_count(&x.ints())?;
            Ok(Const {
                dims,
                // The default value is a float zero; a given `value`
                // attribute is read by the caller and passed as input 1.
                data: match input(1) {
                    Some(v) => match &v.data {
                        Data::F(f) => Data::F(vec![f[0]; n]),
                        Data::I(i) => Data::I(vec![i[0]; n]),
                    },
                    None => Data::F(vec![0.0; n]),
                },
            })
        }
        _ => Err(format!("{op} cannot be evaluated on constants")),
    }
}

/// The `axes` of `Squeeze`/`Unsqueeze`/`ReduceMean`: an attribute before
/// `input_from`, the second input from then on.
pub fn axes_of(
    inputs: &[Option<&Const>],
    attrs: &dyn Attrs,
    opset: i64,
    input_from: i64,
) -> Result<Option<Vec<i64>>, String> {
    Ok(if opset >= input_from {
        inputs.get(1).copied().flatten().map(|c| c.ints())
    } else {
        attrs.ints("axes")
    })
}

/// Dimensions after removing `axes` (all unit dimensions when `None`).
pub fn squeeze_dims(dims: &[usize], axes: Option<Vec<i64>>) -> Result<Vec<usize>, String> {
    match axes {
        None => Ok(dims.iter().copied().filter(|&d| d != 1).collect()),
        Some(axes) => {
            let axes: Vec<usize> = axes
                .iter()
                .map(|&a| norm_axis(a, dims.len()))
                .collect::<Result<_, _>>()?;
            if let Some(&a) = axes.iter().find(|&&a| dims.get(a) != Some(&1)) {
                return Err(format!(
                    "cannot squeeze axis {a} of shape {dims:?}: it is not 1"
                ));
            }
            Ok(dims
                .iter()
                .enumerate()
                .filter(|(i, _)| !axes.contains(i))
                .map(|(_, &d)| d)
                .collect())
        }
    }
}

/// The target dimensions of `Reshape` (0 copies the input's dimension unless
/// `allowzero`, one -1 is inferred).
pub fn reshape_dims(from: &[usize], shape: &[i64], allowzero: bool) -> Result<Vec<usize>, String> {
    let total: usize = from.iter().product();
    let mut dims = Vec::with_capacity(shape.len());
    let mut infer = None;
    for (i, &s) in shape.iter().enumerate() {
        match s {
            0 if !allowzero => dims.push(*from.get(i).ok_or_else(|| {
                format!("target shape {shape:?} copies dimension {i}, which {from:?} lacks")
            })?),
            -1 if infer.is_none() => {
                infer = Some(i);
                dims.push(1);
            }
            s if s >= 0 => dims.push(s as usize),
            _ => return Err(format!("target shape {shape:?} is invalid")),
        }
    }
    let known = dims
        .iter()
        .try_fold(1usize, |a, &d| a.checked_mul(d))
        .ok_or_else(|| format!("target shape {shape:?} overflows"))?;
    if let Some(i) = infer {
        if known == 0 || total % known != 0 {
            return Err(format!(
                "target shape {shape:?} does not fit {total} elements of {from:?}"
            ));
        }
        dims[i] = total / known;
    } else if known != total {
        return Err(format!(
            "target shape {shape:?} holds {known} elements but the input {from:?} holds {total}"
        ));
    }
    Ok(dims)
}

/// Numpy-style broadcast of two shapes.
pub fn broadcast(a: &[usize], b: &[usize]) -> Result<Vec<usize>, String> {
    let r = a.len().max(b.len());
    (0..r)
        .map(|i| {
            let da = if i + a.len() >= r {
                a[i + a.len() - r]
            } else {
                1
            };
            let db = if i + b.len() >= r {
                b[i + b.len() - r]
            } else {
                1
            };
            match (da, db) {
                (x, y) if x == y => Ok(x),
                (1, y) => Ok(y),
                (x, 1) => Ok(x),
                _ => Err(format!("shapes {a:?} and {b:?} do not broadcast")),
            }
        })
        .collect()
}

/// Flat index into `src` (of dimensions `dims`) for each element of the
/// broadcast shape `out`.
pub fn broadcast_index(dims: &[usize], out: &[usize]) -> Vec<usize> {
    let n: usize = out.iter().product();
    let off = out.len() - dims.len();
    let s = strides(dims);
    let os = strides(out);
    (0..n)
        .map(|flat| {
            let mut idx = 0;
            for (k, &d) in dims.iter().enumerate() {
                let coord = (flat / os[k + off]) % out[k + off];
                if d != 1 {
                    idx += coord * s[k];
                }
            }
            idx
        })
        .collect()
}

fn binary(op: &str, x: &Const, y: &Const) -> Result<Const, String> {
    let dims = broadcast(&x.dims, &y.dims)?;
    element_count(&dims.iter().map(|&d| d as i64).collect::<Vec<_>>())?;
    let ix = broadcast_index(&x.dims, &dims);
    let iy = broadcast_index(&y.dims, &dims);
    let data = match (&x.data, &y.data) {
        (Data::I(a), Data::I(b)) => Data::I(
            ix.iter()
                .zip(&iy)
                .map(|(&i, &j)| {
                    let (p, q) = (a[i], b[j]);
                    match op {
                        "Add" => Ok(p.wrapping_add(q)),
                        "Sub" => Ok(p.wrapping_sub(q)),
                        "Mul" => Ok(p.wrapping_mul(q)),
                        _ => p
                            .checked_div(q)
                            .ok_or_else(|| "integer division by zero".to_string()),
                    }
                })
                .collect::<Result<_, _>>()?,
        ),
        _ => {
            let (a, b) = (x.floats(), y.floats());
            Data::F(
                ix.iter()
                    .zip(&iy)
                    .map(|(&i, &j)| {
                        let (p, q) = (a[i], b[j]);
                        match op {
                            "Add" => p + q,
                            "Sub" => p - q,
                            "Mul" => p * q,
                            _ => p / q,
                        }
                    })
                    .collect(),
            )
        }
    };
    Ok(Const { dims, data })
}

fn slice(inputs: &[Option<&Const>]) -> Result<Const, String> {
    let x = inputs[0].expect("checked by the caller");
    let get = |i: usize| inputs.get(i).copied().flatten().map(|c| c.ints());
    let starts = get(1).ok_or("`starts` is missing")?;
    let ends = get(2).ok_or("`ends` is missing")?;
    let rank = x.dims.len();
    let axes = get(3).unwrap_or_else(|| (0..starts.len() as i64).collect());
    let steps = get(4).unwrap_or_else(|| vec![1; starts.len()]);
    if ends.len() != starts.len() || axes.len() != starts.len() || steps.len() != starts.len() {
        return Err("`starts`, `ends`, `axes` and `steps` differ in length".into());
    }
    let mut ranges: Vec<Vec<usize>> = x.dims.iter().map(|&d| (0..d).collect()).collect();
    for k in 0..starts.len() {
        let a = norm_axis(axes[k], rank)?;
        let d = x.dims[a] as i64;
        let step = steps[k];
        if step == 0 {
            return Err("a step of 0".into());
        }
        let clampi = |v: i64, lo: i64, hi: i64| v.clamp(lo, hi);
        let fix = |v: i64| if v < 0 { v + d } else { v };
        let mut v = Vec::new();
        if step > 0 {
            let (s, e) = (clampi(fix(starts[k]), 0, d), clampi(fix(ends[k]), 0, d));
            let mut i = s;
            while i < e {
                v.push(i as usize);
                i += step;
            }
        } else {
            let (s, e) = (
                clampi(fix(starts[k]), -1, d - 1),
                clampi(fix(ends[k]), -1, d - 1),
            );
            let mut i = s;
            while i > e {
                v.push(i as usize);
                i += step;
            }
        }
        ranges[a] = v;
    }
    let dims: Vec<usize> = ranges.iter().map(Vec::len).collect();
    let n: usize = dims.iter().product();
    let os = strides(&dims);
    let s = strides(&x.dims);
    let src = |flat: usize| {
        (0..rank)
            .map(|k| ranges[k][(flat / os[k]) % dims[k]] * s[k])
            .sum()
    };
    Ok(Const {
        data: map_data(x, src, n),
        dims,
    })
}
