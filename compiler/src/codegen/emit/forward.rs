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

/// The statements of `forward`: each step's calls in order, `trace` after
/// each step; a row pipeline as one loop over its last step's output rows
/// where its first step stands (see [`pipeline_loop`]).
pub(super) fn forward_body(ctx: &Ctx<'_>) -> TokenStream {
    let mut body = TokenStream::new();
    let index = |st: StepId| ctx.calls.iter().position(|c| c.step == st);
    for (k, sc) in ctx.calls.iter().enumerate() {
        let traced: Vec<(usize, StepId)> =
            match ctx.s.pipelines.iter().find(|p| p.steps.contains(&sc.step)) {
                Some(p) if p.steps[0] == sc.step => {
                    body.extend(pipeline_loop(ctx, p));
                    p.steps
                        .iter()
                        .filter_map(|&st| Some((index(st)?, st)))
                        .collect()
                }
                Some(_) => continue,
                None => {
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
                    vec![(k, sc.step)]
                }
            };
        for (k, st) in traced {
            let k = us(k);
            let out = map_ref(crate::codegen::calls::trace_ref(
                ctx.q,
                ctx.s,
                ctx.q.step(st).output,
            ));
            body.extend(quote!(trace(#k, #out, arena.as_slice());));
        }
    }
    body
}

/// One row pipeline (a chain of steps, each reading the previous one's
/// output, the maps between them rings): for every output row `y` of the
/// last step, step `j` computes its rows from `d_j` (where it stopped) up
/// to `n_j`, the rows step `j + 1` reads for its rows below `n_{j+1}`
/// (`plan::stream::need_of`: `min(h, ((n − 1)·step + span) − top)`, all
/// constants), so each row is computed once, just before it is read. The
/// same calls, in the same order, as `plan::Pipeline::calls`.
fn pipeline_loop(ctx: &Ctx<'_>, p: &crate::plan::Pipeline) -> TokenStream {
    let q = ctx.q;
    let k = p.steps.len();
    let last_h = us(q.map(q.step(p.steps[k - 1]).output).shape.h);
    let d: Vec<Ident> = (0..k).map(|j| id("d", &j.to_string())).collect();
    let n: Vec<Ident> = (0..k).map(|j| id("n", &j.to_string())).collect();
    let mut needs = TokenStream::new();
    let nl = &n[k - 1];
    needs.extend(quote!(let #nl = y + 1;));
    for j in (0..k - 1).rev() {
        let (sy, top, span, h) = crate::plan::stream::row_window(q, p.steps[j + 1]);
        // max(0, (n − 1)·step + span − top) = max(0, n·step + c), written
        // without operations on 0 or 1 (the module is linted).
        let c = span as i64 - sy as i64 - top as i64;
        let (nj, next) = (&n[j], &n[j + 1]);
        // A receiver in parentheses only when it is an operation.
        let m = if sy == 1 {
            quote!(#next)
        } else {
            let sy = us(sy);
            quote!((#next * #sy))
        };
        let v = match c {
            0 => m,
            c if c > 0 => {
                let c = us(c as usize);
                let m = if sy == 1 {
                    quote!(#next)
                } else {
                    let sy = us(sy);
                    quote!(#next * #sy)
                };
                quote!((#m + #c))
            }
            c => {
                let c = us((-c) as usize);
                quote!(#m.saturating_sub(#c))
            }
        };
        let h = us(h);
        needs.extend(quote! {
            let #nj = if #next == 0 { 0 } else { #v.min(#h) };
        });
    }
    let mut runs = TokenStream::new();
    for (j, &st) in p.steps.iter().enumerate() {
        let Some(sc) = ctx.calls.iter().find(|c| c.step == st) else {
            continue;
        };
        let stem = &ctx.stems[st.index()];
        let (dj, nj) = (&d[j], &n[j]);
        let cn = sc.calls.len();
        for (c, call) in sc.calls.iter().enumerate() {
            let kid = call_id(stem, c, cn);
            runs.extend(match call {
                Call::Conv { .. } => quote!(#kid.run_rows(arena, patch, #dj, #nj);),
                _ => quote!(#kid.run_rows(arena, #dj, #nj);),
            });
        }
        runs.extend(quote!(#dj = #nj;));
    }
    quote! {
        {
            #(let mut #d = 0usize;)*
            for y in 0..#last_h {
                #needs
                #runs
            }
        }
    }
}
