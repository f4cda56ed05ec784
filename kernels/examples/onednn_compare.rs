//! Our projection kernel against oneDNN on the same products, side by side in one run (a
//! measurement, not a test): the comparison that decides whether a compute-bound product should
//! go to a library or stay ours.
//!
//! oneDNN is loaded at run time by `switchyard_kernels::onednn` (see there for where it looks;
//! `scripts/bench-onednn` fetches Debian's `libdnnl2` into `target/tools` and runs this).
//!
//! Rows, per weight format and shape, as GFLOP/s (the median of the repeats; the columns
//! alternate within each repeat so load on a shared machine hits them alike):
//! - `ours`: our kernel alone (`packed_matmul_on` on the best path, oneDNN turned off).
//! - `product`: `packed_matmul_on` as the models call it, which hands the product to oneDNN
//!   where `kernels::onednn` takes it (reading our packed weights in place) and runs ours
//!   elsewhere; `-` marks rows where it is ours anyway.
//! - `oneDNN`: oneDNN on its own terms: f32 `dnnl_sgemm` on the plain row-major weight; bf16
//!   the matmul primitive with the weight reordered once into the layout it prefers and input
//!   rows already in bf16 (ours rounds its f32 rows inside the product); int8
//!   `dnnl_gemm_s8s8s32`, which takes the input rows already in int8 and gives int32 sums, so
//!   one scale per input row at most. Ours on the `avx512-vnni` paths and above also rounds
//!   its rows to int8 (inside the product), but with a scale per group of 32 inputs, which a
//!   single call of that function cannot express; below those paths ours keeps f32 rows. The
//!   same integer work, then, but not the same rounding of the inputs.
//!
//! Run: `scripts/bench-onednn` (or `cargo run --release -p switchyard-kernels --example
//! onednn-compare -- [--repeats N] [--only TEXT]`).

#![allow(unsafe_code)]

use std::ffi::{c_char, c_void};
use std::time::Instant;

use rand::{Rng, SeedableRng};
use switchyard_kernels::{PackedWeight, Path, WeightFormat, onednn, packed_matmul_on};

use switchyard_kernels::onednn::{
    ALLOCATE, ARG_DST, ARG_SRC, ARG_WEIGHTS, BF16, ExecArg, F32, OneDnn, QUERY_WEIGHTS_MD, TAG_AB,
    TAG_ANY, TAG_BA,
};

type Handle = *mut c_void;

fn check(r: Result<(), String>) {
    if let Err(e) = r {
        panic!("{e}");
    }
}

/// A bf16 matmul primitive with the weights reordered into the layout oneDNN prefers.
struct Bf16Matmul {
    primitive: Handle,
    src: Handle,
    dst: Handle,
    weights: Vec<Handle>,
    impl_name: String,
}

impl Bf16Matmul {
    /// `w` holds `copies` f32 weights of `n` rows of `k`, one after another.
    fn new(d: &OneDnn, m: usize, k: usize, n: usize, w: &[f32], copies: usize) -> Bf16Matmul {
        let (mi, ki, ni) = (m as i64, k as i64, n as i64);
        let md = |dims, t, tag| d.md(dims, t, tag).unwrap();
        let (src_md, w_any, dst_md) = (
            md([mi, ki], BF16, TAG_AB),
            md([ki, ni], BF16, TAG_ANY),
            md([mi, ni], F32, TAG_AB),
        );
        let pd = d.matmul_pd(&src_md, &w_any, None, &dst_md, false).unwrap();
        // SAFETY: a descriptor just made (never destroyed here).
        let impl_name = unsafe { d.impl_name(pd) };
        let mut primitive = std::ptr::null_mut();
        // SAFETY: a descriptor made by the library; an out-pointer to a local.
        check(switchyard_kernels::onednn::check(
            unsafe { (d.primitive_create)(&mut primitive, pd) },
            "primitive_create",
        ));
        // SAFETY: the matmul's own weights descriptor, alive as long as pd (never destroyed).
        let w_md = unsafe { &*(d.pd_query_md)(pd, QUERY_WEIGHTS_MD, 0) };
        // The user's weight: f32, k x n with n outermost (our row-major n x k).
        let user_md = md([ki, ni], F32, TAG_BA);
        let (mut reorder_pd, mut reorder) = (std::ptr::null_mut(), std::ptr::null_mut());
        // SAFETY: descriptors from the library; out-pointers to locals.
        unsafe {
            check(switchyard_kernels::onednn::check(
                (d.reorder_pd_create)(
                    &mut reorder_pd,
                    &*user_md,
                    d.engine,
                    w_md,
                    d.engine,
                    std::ptr::null_mut(),
                ),
                "reorder_primitive_desc_create",
            ));
            check(switchyard_kernels::onednn::check(
                (d.primitive_create)(&mut reorder, reorder_pd),
                "reorder create",
            ));
        }
        let weights = (0..copies)
            .map(|c| {
                // SAFETY: w holds weight c (n x k f32, the size of user_md) for the reorder
                // below; the destination is allocated by the library.
                let (from, to) = unsafe {
                    (
                        d.memory(&user_md, w[c * n * k..].as_ptr() as *mut c_void)
                            .unwrap(),
                        d.memory(w_md, ALLOCATE).unwrap(),
                    )
                };
                let args = [
                    ExecArg {
                        arg: ARG_SRC,
                        memory: from,
                    },
                    ExecArg {
                        arg: ARG_DST,
                        memory: to,
                    },
                ];
                // SAFETY: the reorder made above, with its source and destination.
                check(unsafe { d.run(reorder, &args) });
                to
            })
            .collect();
        Bf16Matmul {
            primitive,
            // SAFETY: buffers the library allocates.
            src: unsafe { d.memory(&src_md, ALLOCATE) }.unwrap(),
            // SAFETY: as above.
            dst: unsafe { d.memory(&dst_md, ALLOCATE) }.unwrap(),
            weights,
            impl_name,
        }
    }

    /// Points the source at `x` (which must outlive every call).
    fn set_input(&self, d: &OneDnn, x: &mut [u16]) {
        // SAFETY: a memory object of this library; x holds m x k bf16 values.
        check(switchyard_kernels::onednn::check(
            unsafe { (d.memory_set_handle)(self.src, x.as_mut_ptr().cast()) },
            "set src",
        ));
    }

    fn call(&self, d: &OneDnn, which: usize) {
        let args = [
            ExecArg {
                arg: ARG_SRC,
                memory: self.src,
            },
            ExecArg {
                arg: ARG_WEIGHTS,
                memory: self.weights[which % self.weights.len()],
            },
            ExecArg {
                arg: ARG_DST,
                memory: self.dst,
            },
        ];
        // SAFETY: the matmul made in `new`, with memories of its descriptors (the source set
        // by `set_input` to rows that outlive the calls).
        check(unsafe { d.run(self.primitive, &args) });
    }
}

fn bf16_bits(v: f32) -> u16 {
    // Round to nearest even (finite inputs only here).
    let b = v.to_bits();
    ((b + 0x7fff + ((b >> 16) & 1)) >> 16) as u16
}

struct Shape {
    what: &'static str,
    m: usize,
    k: usize,
    n: usize,
    /// Distinct weights cycled through (enough that they come from memory).
    weights: usize,
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn flag<'a>(args: &'a [String], name: &str) -> Option<&'a str> {
    let at = args.iter().position(|a| a == name)?;
    args.get(at + 1).map(String::as_str)
}

/// Seconds per call of `f(c)` over `calls` calls.
fn per_call(calls: usize, mut f: impl FnMut(usize)) -> f64 {
    let start = Instant::now();
    for c in 0..calls {
        f(c);
    }
    start.elapsed().as_secs_f64() / calls as f64
}

const SHAPES: [Shape; 7] = [
    Shape {
        what: "encoder q/k/v/o, 32 x 64 tokens",
        m: 2048,
        k: 384,
        n: 384,
        weights: 1,
    },
    Shape {
        what: "encoder up",
        m: 2048,
        k: 384,
        n: 1536,
        weights: 1,
    },
    Shape {
        what: "encoder down",
        m: 2048,
        k: 1536,
        n: 384,
        weights: 1,
    },
    Shape {
        what: "encoder q, one 64-token sequence",
        m: 64,
        k: 384,
        n: 384,
        weights: 1,
    },
    Shape {
        what: "decoder prefill 256 x 2048 x 2048",
        m: 256,
        k: 2048,
        n: 2048,
        weights: 4,
    },
    Shape {
        what: "decoder 2048 x 2048, batch 16",
        m: 16,
        k: 2048,
        n: 2048,
        weights: 32,
    },
    Shape {
        what: "decoder 2048 x 2048, batch 1",
        m: 1,
        k: 2048,
        n: 2048,
        weights: 32,
    },
];

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let repeats = flag(&args, "--repeats")
        .and_then(|v| v.parse().ok())
        .unwrap_or(7usize);
    let only = flag(&args, "--only").unwrap_or_default();
    let path = Path::best();
    let Some(dnnl) = onednn::loaded_library() else {
        println!(
            "onednn-compare: not run: {} (scripts/bench-onednn fetches it)",
            onednn::status()
        );
        return;
    };
    println!(
        "onednn-compare: ours on path {path} ({} rayon threads); {}; median of {repeats}",
        rayon::current_num_threads(),
        onednn::status(),
    );
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    println!(
        "\nGFLOP/s                              {:>4} {:>5} {:>5} {:>6} {:>8} {:>8} {:>8} {:>8}  oneDNN's own",
        "m", "k", "n", "format", "ours", "product", "oneDNN", "prod/ours"
    );
    for shape in SHAPES.iter().filter(|s| s.what.contains(only)) {
        let (m, k, n) = (shape.m, shape.k, shape.n);
        let x: Vec<f32> = (0..m * k).map(|_| rng.random_range(-1.0..1.0)).collect();
        let w: Vec<f32> = (0..shape.weights * n * k)
            .map(|_| rng.random_range(-0.1..0.1))
            .collect();
        let mut y = vec![0f32; m * n];
        let flops = 2.0 * (m * k * n) as f64;
        let calls = ((2.5e9 / flops) as usize).max(shape.weights * 2);
        let pack = |format| -> Vec<PackedWeight> {
            (0..shape.weights)
                .map(|c| PackedWeight::pack_as(&w[c * n * k..(c + 1) * n * k], n, k, format))
                .collect::<Result<_, _>>()
                .unwrap()
        };
        let ours = |ws: &[PackedWeight], y: &mut [f32], library: bool| {
            onednn::set_enabled(library);
            per_call(calls, |c| {
                packed_matmul_on(path, y, &x, m, &ws[c % ws.len()], false, None, &[])
            })
        };
        let report = |format: &str, own: Vec<f64>, via: Vec<f64>, lib: Vec<f64>, name: &str| {
            let (own, lib) = (median(own), median(lib));
            let rate = |t: f64| flops / t / 1e9;
            let (via, ratio) = if via.is_empty() {
                ("-".to_string(), "-".to_string())
            } else {
                let v = median(via);
                (format!("{:.1}", rate(v)), format!("{:.2}", own / v))
            };
            println!(
                "{:<36} {:>4} {:>5} {:>5} {:>6} {:>8.1} {:>8} {:>8.1} {:>8}  {name}",
                shape.what,
                m,
                k,
                n,
                format,
                rate(own),
                via,
                rate(lib),
                ratio
            );
        };
        let takes = |format: WeightFormat| match format {
            WeightFormat::F32 => path >= Path::Avx512 && m >= 64 && k % 16 == 0 && n % 16 == 0,
            _ => false,
        };

        // f32
        let ws = pack(WeightFormat::F32);
        let (mut a, mut v, mut b) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..repeats {
            a.push(ours(&ws, &mut y, false));
            if takes(WeightFormat::F32) {
                v.push(ours(&ws, &mut y, true));
            }
            b.push(per_call(calls, |c| {
                let wc = &w[(c % shape.weights) * n * k..];
                // SAFETY: row-major x (m x k), w (n x k, transposed), y (m x n).
                check(onednn::check(
                    unsafe {
                        (dnnl.sgemm)(
                            b'N' as c_char,
                            b'T' as c_char,
                            m as i64,
                            n as i64,
                            k as i64,
                            1.0,
                            x.as_ptr(),
                            k as i64,
                            wc.as_ptr(),
                            k as i64,
                            0.0,
                            y.as_mut_ptr(),
                            n as i64,
                        )
                    },
                    "sgemm",
                ))
            }));
        }
        report("f32", a, v, b, "dnnl_sgemm");
        drop(ws);

        // bf16
        let ws = pack(WeightFormat::Bf16);
        let mm = Bf16Matmul::new(dnnl, m, k, n, &w, shape.weights);
        let mut xb: Vec<u16> = x.iter().map(|&v| bf16_bits(v)).collect();
        mm.set_input(dnnl, &mut xb);
        let (mut a, mut v, mut b) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..repeats {
            a.push(ours(&ws, &mut y, false));
            if takes(WeightFormat::Bf16) {
                v.push(ours(&ws, &mut y, true));
            }
            b.push(per_call(calls, |c| mm.call(dnnl, c)));
        }
        report("bf16", a, v, b, &format!("matmul {}", mm.impl_name));
        drop(ws);

        // int8
        let ws = pack(WeightFormat::parse("int8").unwrap());
        let xq: Vec<i8> = x.iter().map(|&v| (v * 127.0).round() as i8).collect();
        let wq: Vec<i8> = w.iter().map(|&v| (v * 1270.0).round() as i8).collect();
        let mut yi = vec![0i32; m * n];
        let (mut a, mut b) = (Vec::new(), Vec::new());
        for _ in 0..repeats {
            a.push(ours(&ws, &mut y, false));
            b.push(per_call(calls, |c| {
                let wc = &wq[(c % shape.weights) * n * k..];
                let zero = 0i32;
                // SAFETY: row-major xq (m x k), wq (n x k, transposed), yi (m x n); one fixed
                // offset of 0 for C.
                check(onednn::check(
                    unsafe {
                        (dnnl.gemm_s8s8s32)(
                            b'N' as c_char,
                            b'T' as c_char,
                            b'F' as c_char,
                            m as i64,
                            n as i64,
                            k as i64,
                            1.0,
                            xq.as_ptr(),
                            k as i64,
                            0,
                            wc.as_ptr(),
                            k as i64,
                            0,
                            0.0,
                            yi.as_mut_ptr(),
                            n as i64,
                            &zero,
                        )
                    },
                    "gemm_s8s8s32",
                ))
            }));
        }
        report(
            "int8",
            a,
            Vec::new(),
            b,
            "dnnl_gemm_s8s8s32 (rows in int8 beforehand, one scale per row)",
        );
        std::hint::black_box((&y, &yi));
    }
    onednn::set_enabled(true);
}
