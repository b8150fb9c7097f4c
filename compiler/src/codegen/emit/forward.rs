//! The forward function of the generated module: one compile-time
//! checked static per kernel call, and the statements of `forward` that
//! run them in step order.

use super::*;

/// Identifier of the checked call `k` of a step with `n` calls.
fn call_id(stem: &str, k: usize, n: usize) -> Ident {
    if n == 1 {
        id("K", stem)
    } else {
        id("K", &format!("{stem}_{k}"))
    }
}

/// `static K_*: ingot_rt::checked::*` of every call: built by a `const fn`
/// that runs all of the kernel's checks while rustc compiles the module, so
/// a call `ingot-rt` would refuse is a compile error naming the static,
/// never a runtime event (see `ingot_rt::checked`).
pub(super) fn checked_calls(ctx: &Ctx<'_>) -> TokenStream {
    let mut items = TokenStream::new();
    let (a, p) = (quote!({ super::ARENA_BYTES }), quote!({ super::PATCH_LEN }));
    for sc in ctx.calls {
        let stem = &ctx.stems[sc.step.index()];
        let n = sc.calls.len();
        for (k, c) in sc.calls.iter().enumerate() {
            let (ty, new) = match c {
                Call::Conv {
                    input,
                    output,
                    conv,
                    form,
                    ..
                } => {
                    let (i, o) = (map_ref(*input), map_ref(*output));
                    let (w, b, r, pp) =
                        (id("W", stem), id("B", stem), id("RQ", stem), id("P", stem));
                    let t = if conv.transform.is_some() {
                        let t = id("T", stem);
                        quote!(Some(#t))
                    } else {
                        quote!(None)
                    };
                    let (kind, w) = match form {
                        WeightForm::Pairs => (quote!(Conv2dPaired), quote!(&#w)),
                        // The aligned wrapper's bytes.
                        WeightForm::Words => (quote!(Conv2dWords), quote!(&#w.0)),
                        WeightForm::Int8 => (quote!(Conv2d), quote!(&#w)),
                    };
                    // Int8 weights from the weights file are its bytes.
                    let new = match (form, ctx.opt.weights) {
                        (WeightForm::Int8, WeightsMode::IncludeBytes) => quote!(new_bytes),
                        _ => quote!(new),
                    };
                    (
                        quote!(ingot_rt::checked::#kind<'static, #a, #p>),
                        quote!(ingot_rt::checked::#kind::#new(#i, #o, #w, &#b, &#r, #pp, #t)),
                    )
                }
                Call::Linear {
                    input, output, out, ..
                } => {
                    let (i, o) = (map_ref(*input), map_ref(*output));
                    let (w, b, r) = (id("W", stem), id("B", stem), id("RQ", stem));
                    let oq = out_quant(out);
                    let new = match ctx.opt.weights {
                        WeightsMode::IncludeBytes => quote!(new_bytes),
                        WeightsMode::Literal => quote!(new),
                    };
                    (
                        quote!(ingot_rt::checked::Linear<'static, #a>),
                        quote!(ingot_rt::checked::Linear::#new(#i, #o, &#w, &#b, &#r, #oq)),
                    )
                }
                Call::MaxPool { input, output, .. } | Call::AvgPool { input, output, .. } => {
                    let kind = if matches!(c, Call::MaxPool { .. }) {
                        quote!(MaxPool2d)
                    } else {
                        quote!(AvgPool2d)
                    };
                    let (i, o) = (map_ref(*input), map_ref(*output));
                    let (pw, pq) = (id("PW", stem), id("PQ", stem));
                    (
                        quote!(ingot_rt::checked::#kind<#a>),
                        quote!(ingot_rt::checked::#kind::new(#i, #o, #pw, #pq)),
                    )
                }
                Call::GlobalAvgPool { input, output, .. } => {
                    let (i, o) = (map_ref(*input), map_ref(*output));
                    let pq = id("PQ", stem);
                    (
                        quote!(ingot_rt::checked::GlobalAvgPool<#a>),
                        quote!(ingot_rt::checked::GlobalAvgPool::new(#i, #o, #pq)),
                    )
                }
                Call::Add {
                    a: x, b: y, output, ..
                } => {
                    let (x, y, o) = (map_ref(*x), map_ref(*y), map_ref(*output));
                    let ap = id("AP", stem);
                    (
                        quote!(ingot_rt::checked::Add<#a>),
                        quote!(ingot_rt::checked::Add::new(#x, #y, #o, #ap)),
                    )
                }
                Call::Copy { src, dst } => {
                    let (x, d) = (map_ref(*src), map_ref(*dst));
                    (
                        quote!(ingot_rt::checked::CopyChannels<#a>),
                        quote!(ingot_rt::checked::CopyChannels::new(#x, #d)),
                    )
                }
                Call::Channel { input, output, .. } => {
                    let (i, o) = (map_ref(*input), map_ref(*output));
                    let t = id("T", stem);
                    (
                        quote!(ingot_rt::checked::ChannelTransform<'static, #a>),
                        quote!(ingot_rt::checked::ChannelTransform::new(#i, #o, #t)),
                    )
                }
                Call::Wide(w) => super::wide::checked(ctx, stem, w),
            };
            let k = call_id(stem, k, n);
            items.extend(quote! {
                pub(super) static #k: #ty = match #new { Ok(k) => k, Err(e) => e.refuse() };
            });
        }
    }
    let q = ctx.q;
    let input = q.map(q.input);
    let (ih, iw, ic) = (us(input.shape.h), us(input.shape.w), us(input.shape.c));
    let in_view = map_ref(crate::codegen::calls::map_ref(q, ctx.s, q.input));
    let out_view = map_ref(crate::codegen::calls::map_ref(q, ctx.s, q.output));
    items.extend(quote! {
        pub(super) static COPY_IN: ingot_rt::checked::CopyIn<#a, { super::INPUT_LEN }> =
            match ingot_rt::checked::CopyIn::new(#in_view) { Ok(k) => k, Err(e) => e.refuse() };
        pub(super) static COPY_OUT: ingot_rt::checked::CopyOut<#a, { super::OUTPUT_LEN }> =
            match ingot_rt::checked::CopyOut::new(#out_view) { Ok(k) => k, Err(e) => e.refuse() };
        pub(super) static QUANTIZE: ingot_rt::checked::QuantizePixels<'static, { super::INPUT_LEN }> =
            match ingot_rt::checked::QuantizePixels::new(ingot_rt::MapRef::new(0, #ih, #iw, #ic), &PIXEL_TABLE) {
                Ok(k) => k,
                Err(e) => e.refuse(),
            };
    });
    items
}

/// The statements of `forward`.
pub(super) fn forward_body(ctx: &Ctx<'_>) -> TokenStream {
    let mut body = TokenStream::new();
    for (k, sc) in ctx.calls.iter().enumerate() {
        let stem = &ctx.stems[sc.step.index()];
        let n = sc.calls.len();
        for (j, c) in sc.calls.iter().enumerate() {
            let kid = call_id(stem, j, n);
            body.extend(match c {
                Call::Conv { .. } => quote!(#kid.run(arena, patch);),
                Call::Wide(w) => super::wide::run(&kid, w),
                _ => quote!(#kid.run(arena);),
            });
        }
        let k = us(k);
        let out = map_ref(crate::codegen::calls::trace_ref(
            ctx.q,
            ctx.s,
            ctx.q.step(sc.step).output,
        ));
        body.extend(quote!(trace(#k, #out, arena.as_slice());));
    }
    body
}
