//! The checked statics of calls touching int16 maps
//! (`ingot_rt::wide::checked`): the same weight, bias, multiplier and
//! transform statics as the int8 calls, the parameters of
//! [`WideOp`](crate::lower::WideOp) written out.

use super::*;
use crate::codegen::wide::WideCall;
use crate::lower::WideOp;
use ingot_rt::wide::{Elem, PoolKind, TypedMap, WideAffine, WideOut, WideTransform};

fn typed(t: &TypedMap) -> TokenStream {
    let m = map_ref(t.map);
    match t.elem {
        Elem::I8 => quote!(ingot_rt::wide::TypedMap::i8(#m)),
        Elem::I16 => quote!(ingot_rt::wide::TypedMap::i16(#m)),
    }
}

fn wide_out(o: &WideOut) -> TokenStream {
    let (z, mn, mx) = (
        int(o.zero_point as i64),
        int(o.min as i64),
        int(o.max as i64),
    );
    quote!(ingot_rt::wide::WideOut { zero_point: #z, min: #mn, max: #mx })
}

fn affine(stem: &str, a: &WideAffine<'_>) -> TokenStream {
    let (tm, ta) = (id("TM", stem), id("TA", stem));
    let (sh, zi, zo, mn, mx) = (
        int(a.shift as i64),
        int(a.zp_in as i64),
        int(a.zp_out as i64),
        int(a.min as i64),
        int(a.max as i64),
    );
    quote!(ingot_rt::wide::WideAffine {
        mul: &#tm, add: &#ta, shift: #sh, zp_in: #zi, zp_out: #zo, min: #mn, max: #mx,
    })
}

/// `new` for weights in the module's `i8` statics, `new_bytes` for the
/// weights file's bytes (as the int8 calls choose).
fn new_fn(ctx: &Ctx<'_>) -> TokenStream {
    match ctx.opt.weights {
        WeightsMode::IncludeBytes => quote!(new_bytes),
        WeightsMode::Literal => quote!(new),
    }
}

/// The checked type and its constructor call of one wide call.
pub(super) fn checked(ctx: &Ctx<'_>, stem: &str, w: &WideCall<'_>) -> (TokenStream, TokenStream) {
    let a = quote!({ super::ARENA_BYTES });
    let o = typed(&w.output);
    let i = w.inputs.first().map(typed).unwrap_or_default();
    match &w.op {
        WideOp::Conv {
            params, transform, ..
        } => {
            let p = quote!({ super::PATCH_LEN });
            let (wt, b, r) = (id("W", stem), id("B", stem), id("RQ", stem));
            let (win, g, zp, out) = (
                window(&params.window),
                us(params.groups),
                int(params.input_zp as i64),
                wide_out(&params.out),
            );
            let pp = quote!(ingot_rt::wide::WideConvParams { window: #win, groups: #g, input_zp: #zp, out: #out });
            let t = match transform {
                None => quote!(None),
                Some(WideTransform::Int8(_)) => {
                    let t = id("T", stem);
                    quote!(Some(ingot_rt::wide::WideTransform::Int8(#t)))
                }
                Some(WideTransform::Affine(x)) => {
                    let x = affine(stem, x);
                    quote!(Some(ingot_rt::wide::WideTransform::Affine(#x)))
                }
            };
            let new = new_fn(ctx);
            (
                quote!(ingot_rt::wide::checked::Conv2d<'static, #a, #p>),
                quote!(ingot_rt::wide::checked::Conv2d::#new(#i, #o, &#wt, &#b, &#r, #pp, #t)),
            )
        }
        WideOp::Linear { out, .. } => {
            let (wt, b, r) = (id("W", stem), id("B", stem), id("RQ", stem));
            let out = wide_out(out);
            let new = new_fn(ctx);
            (
                quote!(ingot_rt::wide::checked::Linear<'static, #a>),
                quote!(ingot_rt::wide::checked::Linear::#new(#i, #o, &#wt, &#b, &#r, #out)),
            )
        }
        WideOp::Pool {
            kind,
            window: win,
            q,
        } => {
            let kind = match kind {
                PoolKind::Max => quote!(ingot_rt::wide::PoolKind::Max),
                PoolKind::Avg => quote!(ingot_rt::wide::PoolKind::Avg),
                PoolKind::Global => quote!(ingot_rt::wide::PoolKind::Global),
            };
            let win = window(win);
            let z = int(q.in_zp as i64);
            let r = super::data::opt_requant(q.requant.as_ref());
            let out = wide_out(&q.out);
            (
                quote!(ingot_rt::wide::checked::Pool<#a>),
                quote!(ingot_rt::wide::checked::Pool::new(#i, #o, #kind, #win,
                    ingot_rt::wide::WidePool { in_zp: #z, requant: #r, out: #out })),
            )
        }
        WideOp::Add(p) => {
            let b = w.inputs.get(1).map(typed).unwrap_or_default();
            let (az, bz, ar, br, or, ls, out) = (
                int(p.a_zp as i64),
                int(p.b_zp as i64),
                requant(&p.a_rq),
                requant(&p.b_rq),
                requant(&p.out_rq),
                us(p.left_shift as usize),
                wide_out(&p.out),
            );
            (
                quote!(ingot_rt::wide::checked::Add<#a>),
                quote!(ingot_rt::wide::checked::Add::new(#i, #b, #o, ingot_rt::wide::WideAdd {
                    a_zp: #az, b_zp: #bz, a_rq: #ar, b_rq: #br, out_rq: #or, left_shift: #ls, out: #out,
                })),
            )
        }
        WideOp::Concat => (
            quote!(ingot_rt::wide::checked::Copy<#a>),
            quote!(ingot_rt::wide::checked::Copy::new(#i, #o)),
        ),
        WideOp::Channel(t) => {
            let t = affine(stem, t);
            (
                quote!(ingot_rt::wide::checked::Channel<'static, #a>),
                quote!(ingot_rt::wide::checked::Channel::new(#i, #o, #t)),
            )
        }
    }
}

/// The statement of `forward` running wide call `kid`.
pub(super) fn run(kid: &Ident, w: &WideCall<'_>) -> TokenStream {
    match w.op {
        WideOp::Conv { .. } => quote!(#kid.run(arena, patch);),
        _ => quote!(#kid.run(arena);),
    }
}
