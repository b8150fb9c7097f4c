//! The `data` part of the generated module: weight and parameter tables
//! (statics, or literals spliced in after formatting) and the per-step
//! parameter sets.

use super::forward::checked_calls;
use super::*;

fn array_text(blob: &Blob, e: &Entry) -> String {
    let b = &blob.bytes[e.offset..e.offset + e.len * e.elem.size()];
    let mut s = String::with_capacity(b.len() * 4 + 16);
    let per_line = 24;
    match e.elem {
        Elem::I8 => {
            s.push('[');
            for (i, &x) in b.iter().enumerate() {
                if i % per_line == 0 {
                    s.push_str("\n    ");
                }
                let _ = write!(s, "{}, ", x as i8);
            }
            s.push_str("\n]");
        }
        Elem::I32 => {
            s.push('[');
            for (i, c) in b.chunks_exact(4).enumerate() {
                if i % per_line == 0 {
                    s.push_str("\n    ");
                }
                let _ = write!(s, "{}, ", i32::from_le_bytes([c[0], c[1], c[2], c[3]]));
            }
            s.push_str("\n]");
        }
        Elem::Requant => {
            let _ = write!(s, "rql::<{}>([", e.len);
            for (i, c) in b.chunks_exact(8).enumerate() {
                if i % 8 == 0 {
                    s.push_str("\n    ");
                }
                let m = i32::from_le_bytes([c[0], c[1], c[2], c[3]]);
                let sh = i32::from_le_bytes([c[4], c[5], c[6], c[7]]);
                let _ = write!(s, "[{m}, {sh}], ");
            }
            s.push_str("\n])");
        }
    }
    s
}

/// One `static` holding a stored tensor.
fn tensor_static(ctx: &Ctx<'_>, lits: &mut Literals, name: &Ident, e: &Entry) -> TokenStream {
    let n = us(e.len);
    let at = us(e.offset);
    let off = format_ident!("OFF_{}", name);
    // Int8 weights from the weights file stay its bytes (`new_bytes` calls
    // read them as they are): a sub-array, no loop for rustc to evaluate
    // per weight.
    let file_bytes = e.elem == Elem::I8
        && e.role == Some(Role::Weights)
        && ctx.opt.weights == WeightsMode::IncludeBytes;
    let ty = match e.elem {
        Elem::I8 if file_bytes => quote!([u8; #n]),
        Elem::I8 => quote!([i8; #n]),
        Elem::I32 => quote!([i32; #n]),
        Elem::Requant => quote!([ingot_rt::Requant; #n]),
    };
    let init = match ctx.opt.weights {
        WeightsMode::IncludeBytes => match e.elem {
            Elem::I8 if file_bytes => quote!(*bytes::<#n>(#off)),
            Elem::I8 => quote!(i8s::<#n>(#off)),
            Elem::I32 => quote!(i32s::<#n>(#off)),
            Elem::Requant => quote!(rqs::<#n>(#off)),
        },
        WeightsMode::Literal => lits.marker(array_text(ctx.blob, e)),
    };
    let what = format!(
        "{} elements at byte {} of the weights file.",
        e.len, e.offset
    );
    let off_item = match ctx.opt.weights {
        WeightsMode::IncludeBytes => quote!(const #off: usize = #at;),
        WeightsMode::Literal => quote!(),
    };
    quote! {
        #off_item
        #[doc = #what]
        pub(super) static #name: #ty = #init;
    }
}

/// A convolution's weights in the paired layout: the int8 rows of the
/// weights file, rearranged by `ingot_rt::pair_rows` at compile time.
fn paired_static(
    ctx: &Ctx<'_>,
    lits: &mut Literals,
    name: &Ident,
    e: &Entry,
    (rows, k): (usize, usize),
) -> TokenStream {
    let words = ingot_rt::paired_len(rows, k);
    let (n, np, r, kk, at) = (us(e.len), us(words), us(rows), us(k), us(e.offset));
    let off = format_ident!("OFF_{}", name);
    let bytes = format_ident!("I8_{}", name);
    let (off_item, src) = match ctx.opt.weights {
        WeightsMode::IncludeBytes => (quote!(const #off: usize = #at;), quote!(i8s::<#n>(#off))),
        WeightsMode::Literal => (quote!(), lits.marker(array_text(ctx.blob, e))),
    };
    // A `const`, not a `static`: only the paired words reach flash.
    let bytes_item = quote!(const #bytes: [i8; #n] = #src;);
    let what = format!(
        "{} int8 weights at byte {} of the weights file ({rows} rows of {k}), \
         as {words} words of two `i16` for `ingot_rt::conv2d_paired`.",
        e.len, e.offset
    );
    quote! {
        #off_item
        #bytes_item
        #[doc = #what]
        pub(super) static #name: [u32; #np] = ingot_rt::pair_rows::<#np>(&#bytes, #r, #kk);
    }
}

/// A convolution's weights in the word layout, as the weights file holds
/// them: its bytes, 4-byte aligned (the kernel reads them a word at a
/// time), with no conversion at compile time.
fn words_static(ctx: &Ctx<'_>, lits: &mut Literals, name: &Ident, e: &Entry) -> TokenStream {
    let (n, at) = (us(e.len), us(e.offset));
    let off = format_ident!("OFF_{}", name);
    let (off_item, init) = match ctx.opt.weights {
        WeightsMode::IncludeBytes => (
            quote!(const #off: usize = #at;),
            quote!(Words(*bytes::<#n>(#off))),
        ),
        WeightsMode::Literal => {
            let b = &ctx.blob.bytes[e.offset..e.offset + e.len];
            let mut t = String::with_capacity(b.len() * 4 + 16);
            t.push_str("Words([");
            for (i, x) in b.iter().enumerate() {
                if i % 24 == 0 {
                    t.push_str("\n    ");
                }
                let _ = write!(t, "{x}, ");
            }
            t.push_str("\n])");
            (quote!(), lits.marker(t))
        }
    };
    let what = format!(
        "{} bytes at byte {} of the weights file: int8 weights in the word layout \
         of `ingot_rt::word_rows_into`, for `ingot_rt::conv2d_words`.",
        e.len, e.offset
    );
    quote! {
        #off_item
        #[doc = #what]
        pub(super) static #name: Words<#n> = #init;
    }
}

/// The private data module: weights, parameters.
pub(super) fn data_module(ctx: &Ctx<'_>, lits: &mut Literals) -> TokenStream {
    let q = ctx.q;
    let mut items = TokenStream::new();
    let with_form = |f: WeightForm| -> Vec<usize> {
        ctx.calls
            .iter()
            .filter(|sc| {
                sc.calls
                    .iter()
                    .any(|c| matches!(c, Call::Conv { form, .. } if *form == f))
            })
            .map(|sc| sc.step.index())
            .collect()
    };
    let (paired, words) = (with_form(WeightForm::Pairs), with_form(WeightForm::Words));
    for (i, st) in q.steps.iter().enumerate() {
        let stem = &ctx.stems[i];
        if let (true, Some(e), QKernel::Conv2d(c)) = (
            paired.contains(&i),
            ctx.blob.find(i, Role::Weights),
            &st.kernel,
        ) {
            items.extend(paired_static(
                ctx,
                lits,
                &id(Role::Weights.prefix(), stem),
                e,
                crate::codegen::calls::weight_rows(c),
            ));
        }
        for role in [
            Role::Weights,
            Role::Bias,
            Role::Requant,
            Role::TransformMul,
            Role::TransformAdd,
            Role::TransformTable,
        ] {
            if role == Role::Weights && paired.contains(&i) {
                continue;
            }
            if let (Role::Weights, true, Some(e)) =
                (role, words.contains(&i), ctx.blob.find(i, role))
            {
                items.extend(words_static(ctx, lits, &id(role.prefix(), stem), e));
                continue;
            }
            if let Some(e) = ctx.blob.find(i, role) {
                items.extend(tensor_static(ctx, lits, &id(role.prefix(), stem), e));
            }
        }
        let transform = match &st.kernel {
            QKernel::Conv2d(c) => c.transform.as_ref(),
            QKernel::Channel(t) => Some(t),
            _ => None,
        };
        if let Some(t) = transform {
            let tid = id("T", stem);
            let v = match t {
                ChannelTransform::Affine {
                    shift,
                    zp_in,
                    zp_out,
                    clamp,
                    ..
                } => {
                    let (tm, ta) = (id("TM", stem), id("TA", stem));
                    let (sh, zi, zo, mn, mx) = (
                        int(*shift as i64),
                        int(*zp_in as i64),
                        int(*zp_out as i64),
                        int(clamp.min as i64),
                        int(clamp.max as i64),
                    );
                    quote!(ingot_rt::InputTransform::Affine(ingot_rt::AffineTransform {
                        mul: &#tm, add: &#ta, shift: #sh, zp_in: #zi, zp_out: #zo, min: #mn, max: #mx,
                    }))
                }
                ChannelTransform::Table(_) => {
                    let tt = id("TT", stem);
                    quote!(ingot_rt::InputTransform::Table(&#tt))
                }
            };
            items.extend(quote!(pub(super) static #tid: ingot_rt::InputTransform<'static> = #v;));
        }
    }
    // Parameter sets of the calls.
    for sc in ctx.calls {
        let stem = &ctx.stems[sc.step.index()];
        for c in &sc.calls {
            match c {
                Call::Conv { params, .. } => {
                    let p = id("P", stem);
                    let (w, g, zp, o) = (
                        window(&params.window),
                        us(params.groups),
                        int(params.input_zp as i64),
                        out_quant(&params.out),
                    );
                    items.extend(quote!(pub(super) const #p: ingot_rt::ConvParams = ingot_rt::ConvParams { window: #w, groups: #g, input_zp: #zp, out: #o };));
                }
                Call::MaxPool {
                    window: w, q: pq, ..
                }
                | Call::AvgPool {
                    window: w, q: pq, ..
                } => {
                    let (pw, pqi) = (id("PW", stem), id("PQ", stem));
                    let w = window(w);
                    let pqt = pool_quant(pq);
                    items.extend(quote! {
                        pub(super) const #pw: ingot_rt::Window = #w;
                        pub(super) const #pqi: ingot_rt::PoolQuant = #pqt;
                    });
                }
                Call::GlobalAvgPool { q: pq, .. } => {
                    let pqi = id("PQ", stem);
                    let pqt = pool_quant(pq);
                    items.extend(quote!(pub(super) const #pqi: ingot_rt::PoolQuant = #pqt;));
                }
                Call::Add { p, .. } => {
                    let ap = id("AP", stem);
                    let (az, bz, ar, br, or, ls, o) = (
                        int(p.a_zp as i64),
                        int(p.b_zp as i64),
                        requant(&p.a_rq),
                        requant(&p.b_rq),
                        requant(&p.out_rq),
                        us(p.left_shift as usize),
                        out_quant(&p.out),
                    );
                    items.extend(quote!(pub(super) const #ap: ingot_rt::AddParams = ingot_rt::AddParams {
                        a_zp: #az, b_zp: #bz, a_rq: #ar, b_rq: #br, out_rq: #or, left_shift: #ls, out: #o,
                    };));
                }
                Call::Linear { .. } | Call::Copy { .. } | Call::Channel { .. } | Call::Wide(_) => {}
            }
        }
    }
    items.extend(checked_calls(ctx));
    let pt = ctx.blob.pixel_table();
    items.extend(tensor_static(
        ctx,
        lits,
        &Ident::new("PIXEL_TABLE", Span::call_site()),
        pt,
    ));

    let decoders = match ctx.opt.weights {
        WeightsMode::IncludeBytes => {
            let file = format!("{}.weights.bin", ctx.opt.module);
            let n = us(ctx.blob.bytes.len());
            quote! {
                /// The weights file, read by the `const fn`s below at compile time only.
                const BLOB: &[u8; #n] = include_bytes!(#file);

                /// `N` bytes of the weights file from byte `at`, as they are
                /// (a sub-array of the included bytes: no loop to evaluate).
                const fn bytes<const N: usize>(at: usize) -> &'static [u8; N] {
                    match BLOB.split_at(at).1.first_chunk::<N>() {
                        Some(b) => b,
                        None => panic!("a tensor reaches past the weights file"),
                    }
                }


                const fn i32_at(at: usize) -> i32 {
                    i32::from_le_bytes([BLOB[at], BLOB[at + 1], BLOB[at + 2], BLOB[at + 3]])
                }

                const fn i8s<const N: usize>(at: usize) -> [i8; N] {
                    let mut v = [0i8; N];
                    let mut i = 0;
                    while i < N {
                        v[i] = BLOB[at + i] as i8;
                        i += 1;
                    }
                    v
                }

                const fn i32s<const N: usize>(at: usize) -> [i32; N] {
                    let mut v = [0i32; N];
                    let mut i = 0;
                    while i < N {
                        v[i] = i32_at(at + 4 * i);
                        i += 1;
                    }
                    v
                }

                const fn rqs<const N: usize>(at: usize) -> [ingot_rt::Requant; N] {
                    let mut v = [ingot_rt::Requant { mult: 0, shift: 0 }; N];
                    let mut i = 0;
                    while i < N {
                        v[i] = ingot_rt::Requant { mult: i32_at(at + 8 * i), shift: i32_at(at + 8 * i + 4) };
                        i += 1;
                    }
                    v
                }
            }
        }
        WeightsMode::Literal => quote! {
            const fn rql<const N: usize>(p: [[i32; 2]; N]) -> [ingot_rt::Requant; N] {
                let mut v = [ingot_rt::Requant { mult: 0, shift: 0 }; N];
                let mut i = 0;
                while i < N {
                    v[i] = ingot_rt::Requant { mult: p[i][0], shift: p[i][1] };
                    i += 1;
                }
                v
            }
        },
    };
    let words_ty = if words.is_empty() {
        quote!()
    } else {
        quote! {
            /// Bytes of word-form weights, aligned for 32-bit loads.
            #[repr(align(4))]
            pub(super) struct Words<const N: usize>(pub(super) [u8; N]);
        }
    };
    quote! {
        /// Weights and kernel parameters (private). Every tensor is a `static`
        /// built at compile time; nothing is decoded at run time.
        #[allow(dead_code, clippy::unreadable_literal)]
        mod ingot_data {
            #decoders
            #words_ty
            #items
        }
    }
}

/// `Some(requant)` or `None`: a pooling's optional rescale, int8 or int16.
pub(super) fn opt_requant(r: Option<&ingot_rt::Requant>) -> TokenStream {
    match r {
        Some(r) => {
            let r = requant(r);
            quote!(Some(#r))
        }
        None => quote!(None),
    }
}

fn pool_quant(p: &ingot_rt::PoolQuant) -> TokenStream {
    let z = int(p.in_zp as i64);
    let r = opt_requant(p.requant.as_ref());
    let o = out_quant(&p.out);
    quote!(ingot_rt::PoolQuant { in_zp: #z, requant: #r, out: #o })
}
