//! The per-op part of validation: attribute readers and one arm per op
//! that checks a layer's attributes, tensors and input shapes and gives
//! its [`Op`] and output shape.

use super::*;

impl Validator<'_> {
    fn str_attr(&self, cx: &Ctx, lf: &LayerFile, key: &str) -> Result<Option<String>, LoadError> {
        match lf.attrs.get(key) {
            None => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.clone())),
            Some(v) => {
                Err(self.attr_err(cx, key, format!("expected a tensor name (string), got {v}")))
            }
        }
    }

    fn uint(&self, cx: &Ctx, key: &str, v: &Value) -> Result<usize, LoadError> {
        v.as_u64()
            .and_then(|n| usize::try_from(n).ok())
            .ok_or_else(|| {
                self.attr_err(cx, key, format!("expected a non-negative integer, got {v}"))
            })
    }

    /// An int or `[h, w]` attribute; `positive` refuses zero.
    fn pair(
        &self,
        cx: &Ctx,
        lf: &LayerFile,
        key: &str,
        default: Option<[usize; 2]>,
        positive: bool,
    ) -> Result<[usize; 2], LoadError> {
        let v = match lf.attrs.get(key) {
            None => return default.ok_or_else(|| self.attr_err(cx, key, "missing")),
            Some(v) => v,
        };
        let p = match v {
            Value::Array(a) if a.len() == 2 => {
                [self.uint(cx, key, &a[0])?, self.uint(cx, key, &a[1])?]
            }
            Value::Array(a) => {
                return Err(self.attr_err(
                    cx,
                    key,
                    format!("expected an integer or [h, w], got {} values", a.len()),
                ))
            }
            v => {
                let n = self.uint(cx, key, v)?;
                [n, n]
            }
        };
        if positive && (p[0] == 0 || p[1] == 0) {
            return Err(self.attr_err(cx, key, format!("must be at least 1, got {v}")));
        }
        Ok(p)
    }

    fn padding(
        &self,
        cx: &Ctx,
        lf: &LayerFile,
        input: Shape,
        kernel: [usize; 2],
        stride: [usize; 2],
        dilation: [usize; 2],
    ) -> Result<Padding, LoadError> {
        let key = "padding";
        match lf.attrs.get(key) {
            None => Ok(Padding::default()),
            Some(Value::String(s)) if s == "valid" => Ok(Padding::default()),
            Some(Value::String(s)) if s == "same" => {
                let (top, bottom) = Window::same_padding(input.h, kernel[0], stride[0], dilation[0])
                    .ok_or_else(|| self.attr_err(cx, key, "\"same\" padding cannot be computed for these sizes"))?;
                let (left, right) = Window::same_padding(input.w, kernel[1], stride[1], dilation[1])
                    .ok_or_else(|| self.attr_err(cx, key, "\"same\" padding cannot be computed for these sizes"))?;
                Ok(Padding { top, left, bottom, right })
            }
            Some(Value::Array(a)) if a.len() == 4 => Ok(Padding {
                top: self.uint(cx, key, &a[0])?,
                left: self.uint(cx, key, &a[1])?,
                bottom: self.uint(cx, key, &a[2])?,
                right: self.uint(cx, key, &a[3])?,
            }),
            Some(Value::Array(a)) if a.len() == 2 => {
                let (h, w) = (self.uint(cx, key, &a[0])?, self.uint(cx, key, &a[1])?);
                Ok(Padding { top: h, left: w, bottom: h, right: w })
            }
            Some(v @ Value::Number(_)) => Ok(Padding::uniform(self.uint(cx, key, v)?)),
            Some(v) => Err(self.attr_err(cx, key, format!("expected an integer, [h, w], [top, left, bottom, right], \"same\" or \"valid\"; got {v}"))),
        }
    }

    /// Why a window does not fit: overflowing size arithmetic (huge padding
    /// or dilation), or a kernel larger than the padded input.
    fn window_err(
        &self,
        cx: &Ctx,
        x: Shape,
        kernel: [usize; 2],
        dilation: [usize; 2],
        padding: Padding,
    ) -> LoadError {
        let padded =
            |i: usize, lo: usize, hi: usize| i.checked_add(lo).and_then(|v| v.checked_add(hi));
        let extent = |k: usize, d: usize| {
            d.checked_mul(k.saturating_sub(1))
                .and_then(|v| v.checked_add(1))
        };
        let overflow = padded(x.h, padding.top, padding.bottom).is_none()
            || padded(x.w, padding.left, padding.right).is_none()
            || extent(kernel[0], dilation[0]).is_none()
            || extent(kernel[1], dilation[1]).is_none();
        let [kh, kw] = kernel;
        if overflow {
            self.shape_err(
                cx,
                format!("padding {padding} or dilation {dilation:?} on input {x} makes the window size arithmetic overflow"),
            )
        } else {
            self.shape_err(cx, format!("kernel {kh}x{kw} (dilation {dilation:?}, padding {padding}) does not fit input {x}"))
        }
    }

    fn one_input(&self, cx: &Ctx, ins: &[Shape]) -> Shape {
        debug_assert_eq!(ins.len(), 1, "layer {} has one input", cx.layer);
        ins[0]
    }

    pub(super) fn layer(
        &self,
        cx: &Ctx,
        lf: &LayerFile,
        ins: &[Shape],
    ) -> Result<(Op, Shape), LoadError> {
        match lf.op.as_str() {
            "conv2d" => {
                self.check_attrs(
                    cx,
                    lf,
                    &["weight", "bias", "stride", "padding", "dilation", "groups"],
                )?;
                let x = self.one_input(cx, ins);
                let wname = self
                    .str_attr(cx, lf, "weight")?
                    .ok_or_else(|| self.attr_err(cx, "weight", "missing"))?;
                let weight = self.tensor(cx, &wname)?;
                let groups = match lf.attrs.get("groups") {
                    None => 1,
                    Some(v) => self.uint(cx, "groups", v)?,
                };
                if groups == 0 {
                    return Err(self.attr_err(cx, "groups", "must be at least 1"));
                }
                self.expect_shape(
                    cx,
                    &weight,
                    weight.shape.len() == 4,
                    "4 dimensions [O, I/groups, kH, kW]",
                )?;
                let (o, ig, kh, kw) = (
                    weight.shape[0],
                    weight.shape[1],
                    weight.shape[2],
                    weight.shape[3],
                );
                if x.c % groups != 0 {
                    return Err(self.shape_err(
                        cx,
                        format!(
                            "input {x} has {} channels, not divisible by groups = {groups}",
                            x.c
                        ),
                    ));
                }
                self.expect_shape(
                    cx,
                    &weight,
                    ig == x.c / groups && o % groups == 0 && o > 0 && kh > 0 && kw > 0,
                    format!(
                        "[O, {}, kH, kW] with O divisible by groups = {groups} (input {x})",
                        x.c / groups
                    ),
                )?;
                let bias = match self.str_attr(cx, lf, "bias")? {
                    None => None,
                    Some(b) => {
                        let t = self.tensor(cx, &b)?;
                        self.expect_shape(cx, &t, t.shape == [o], format!("[{o}]"))?;
                        Some(t)
                    }
                };
                let stride = self.pair(cx, lf, "stride", Some([1, 1]), true)?;
                let dilation = self.pair(cx, lf, "dilation", Some([1, 1]), true)?;
                let kernel = [kh, kw];
                let padding = self.padding(cx, lf, x, kernel, stride, dilation)?;
                let (oh, ow) = window_output(x.h, x.w, kernel, stride, dilation, padding)
                    .ok_or_else(|| self.window_err(cx, x, kernel, dilation, padding))?;
                let conv = Conv2d {
                    weight,
                    bias,
                    out_channels: o,
                    in_channels: x.c,
                    kernel,
                    stride,
                    padding,
                    dilation,
                    groups,
                };
                Ok((Op::Conv2d(conv), Shape::new(o, oh, ow)))
            }
            "batch_norm" => {
                self.check_attrs(cx, lf, &["prefix", "eps", "momentum"])?;
                let x = self.one_input(cx, ins);
                let prefix = self
                    .str_attr(cx, lf, "prefix")?
                    .ok_or_else(|| self.attr_err(cx, "prefix", "missing"))?;
                let eps = match lf.attrs.get("eps") {
                    None => 1e-5,
                    Some(v) => v
                        .as_f64()
                        .filter(|e| e.is_finite() && *e >= 0.0)
                        .ok_or_else(|| {
                            self.attr_err(
                                cx,
                                "eps",
                                format!("expected a non-negative number, got {v}"),
                            )
                        })? as f32,
                };
                let get = |suffix: &str| -> Result<Tensor, LoadError> {
                    let t = self.tensor(cx, &format!("{prefix}.{suffix}"))?;
                    self.expect_shape(
                        cx,
                        &t,
                        t.shape == [x.c],
                        format!("[{}] (one per channel of input {x})", x.c),
                    )?;
                    Ok(t)
                };
                let (gamma, beta, mean, var) = (
                    get("weight")?,
                    get("bias")?,
                    get("running_mean")?,
                    get("running_var")?,
                );
                if let Some((i, v)) = var.data.iter().enumerate().find(|(_, v)| **v + eps <= 0.0) {
                    return Err(LoadError::TensorShape {
                        weights: self.store.path.clone(),
                        layer: cx.layer.into(),
                        op: cx.op.into(),
                        tensor: var.name.clone(),
                        got: var.shape.clone(),
                        expected: format!("variances + eps > 0 (channel {i} has {v})"),
                    });
                }
                Ok((
                    Op::BatchNorm(BatchNorm {
                        prefix,
                        gamma,
                        beta,
                        mean,
                        var,
                        eps,
                    }),
                    x,
                ))
            }
            "relu" | "relu6" | "flatten" | "softmax" | "global_avg_pool" => {
                self.check_attrs(cx, lf, &[])?;
                let x = self.one_input(cx, ins);
                Ok(match lf.op.as_str() {
                    "relu" => (Op::Relu, x),
                    "relu6" => (Op::Relu6, x),
                    "flatten" => (Op::Flatten, Shape::flat(x.len())),
                    "softmax" => (Op::Softmax, x),
                    _ => (Op::GlobalAvgPool, Shape::new(x.c, 1, 1)),
                })
            }
            "dropout" => {
                self.check_attrs(cx, lf, &["p"])?;
                Ok((Op::Dropout, self.one_input(cx, ins)))
            }
            "max_pool2d" | "avg_pool2d" => {
                self.check_attrs(cx, lf, &["kernel", "stride", "padding"])?;
                let x = self.one_input(cx, ins);
                let kernel = self.pair(cx, lf, "kernel", None, true)?;
                let stride = self.pair(cx, lf, "stride", Some(kernel), true)?;
                let padding = self.padding(cx, lf, x, kernel, stride, [1, 1])?;
                if padding.top.max(padding.bottom) >= kernel[0]
                    || padding.left.max(padding.right) >= kernel[1]
                {
                    return Err(self.attr_err(
                        cx,
                        "padding",
                        format!("{padding} must be smaller than the kernel {kernel:?}"),
                    ));
                }
                let (oh, ow) = window_output(x.h, x.w, kernel, stride, [1, 1], padding)
                    .ok_or_else(|| self.window_err(cx, x, kernel, [1, 1], padding))?;
                let p = Pool2d {
                    kernel,
                    stride,
                    padding,
                };
                let op = if lf.op == "max_pool2d" {
                    Op::MaxPool2d(p)
                } else {
                    Op::AvgPool2d(p)
                };
                Ok((op, Shape::new(x.c, oh, ow)))
            }
            "linear" => {
                self.check_attrs(cx, lf, &["weight", "bias"])?;
                let x = self.one_input(cx, ins);
                let n = x.len();
                if x.h != 1 || x.w != 1 {
                    return Err(self.shape_err(cx, format!("input {x} is not flat; add a `flatten` or `global_avg_pool` layer before it")));
                }
                let wname = self
                    .str_attr(cx, lf, "weight")?
                    .ok_or_else(|| self.attr_err(cx, "weight", "missing"))?;
                let weight = self.tensor(cx, &wname)?;
                self.expect_shape(
                    cx,
                    &weight,
                    weight.shape.len() == 2 && weight.shape[1] == n && weight.shape[0] > 0,
                    format!("[out, {n}] (input {x})"),
                )?;
                let o = weight.shape[0];
                let bias = match self.str_attr(cx, lf, "bias")? {
                    None => None,
                    Some(b) => {
                        let t = self.tensor(cx, &b)?;
                        self.expect_shape(cx, &t, t.shape == [o], format!("[{o}]"))?;
                        Some(t)
                    }
                };
                Ok((
                    Op::Linear(Linear {
                        weight,
                        bias,
                        out_features: o,
                        in_features: n,
                    }),
                    Shape::flat(o),
                ))
            }
            "concat" => {
                self.check_attrs(cx, lf, &["axis"])?;
                if let Some(v) = lf.attrs.get("axis") {
                    if v.as_u64() != Some(0) {
                        return Err(self.attr_err(cx, "axis", format!("only channel concatenation (axis 0 of [C, H, W]) is supported, got {v}")));
                    }
                }
                let first = ins[0];
                let mut c = 0usize;
                for (k, s) in ins.iter().enumerate() {
                    if (s.h, s.w) != (first.h, first.w) {
                        return Err(self.shape_err(cx, format!("input {k} has shape {s} but input 0 has {first}; concatenated maps need the same height and width")));
                    }
                    c = c
                        .checked_add(s.c)
                        .ok_or_else(|| self.shape_err(cx, "channel count overflows"))?;
                }
                Ok((Op::Concat, Shape::new(c, first.h, first.w)))
            }
            "add" => {
                self.check_attrs(cx, lf, &[])?;
                if ins[0] != ins[1] {
                    return Err(self.shape_err(
                        cx,
                        format!(
                            "inputs have shapes {} and {}; `add` needs equal shapes",
                            ins[0], ins[1]
                        ),
                    ));
                }
                Ok((Op::Add, ins[0]))
            }
            other => unreachable!("op {other} is in OPS but not handled"),
        }
    }
}
