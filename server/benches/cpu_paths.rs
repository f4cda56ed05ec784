//! The CPU fast-path benchmark: every figure is a ratio of two timings taken side by side in
//! one run, interleaved round by round, so the shared machine's noise hits both sides alike.
//!
//!   cargo bench -p switchyard-server --bench cpu_paths -- [--rounds N] [--skip-encoder]
//!       [--skip-decoder] [--small-decoder]
//!
//! Sections: the MiniLM encoder at batch 32 x 64 tokens (base, merged, unmerged adapters of
//! several shapes, eight adapters mixed), then the same batch with the weights held as f32, bf16,
//! int8 and int4; merging a rank-16 adapter into a 2048 x 2048 matrix in place against B·A alone;
//! and a synthetic Llama-family decoder of the 1B class (seeded pattern weights, about 4.2 GB in
//! f32; `--small-decoder` for a narrower one) in each format at batch 1 (against resident bytes /
//! measured read bandwidth), batch 16, and batch 8 with eight adapters. Results go to stdout and
//! to target/bench/cpu_paths.json; scripts/bench-cpu adds torch's figures.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Instant;

use candle_core::{DType, Device, Tensor};
use switchyard_adapters::{
    Adapter, AdapterPackage, LowRank, MergedWeights, Module, PackageMeta, Task,
};
use switchyard_kernels::WeightFormat;
use switchyard_server::model::checkpoint::{Checkpoint, Weights};
use switchyard_server::model::embedder::Embedder;
use switchyard_server::model::linear::RowAdapters;
use switchyard_server::model::llama::{LlamaConfig, LlamaModel};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Cheap deterministic values in ±scale (a hash of the index), for synthetic weights.
fn pattern(n: usize, seed: u64, scale: f32) -> Vec<f32> {
    let mut x = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    (0..n)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            ((x >> 40) as f32 / (1u64 << 24) as f32 * 2.0 - 1.0) * scale
        })
        .collect()
}

fn tensor(shape: &[usize], seed: u64, scale: f32) -> Tensor {
    let n = shape.iter().product();
    Tensor::from_vec(pattern(n, seed, scale), shape, &Device::Cpu).unwrap()
}

fn synthetic_adapter(
    spec: &switchyard_adapters::BaseSpec,
    rank: usize,
    modules: &[Module],
    seed: u64,
) -> Arc<Adapter> {
    let mut factors = BTreeMap::new();
    for (i, (site, &(out, inp))) in spec.targets.iter().enumerate() {
        if modules.contains(&site.module) {
            let s = seed * 1000 + i as u64;
            factors.insert(
                *site,
                (
                    tensor(&[rank, inp], s, 0.05),
                    tensor(&[out, rank], s + 7, 0.05),
                ),
            );
        }
    }
    let pkg = AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: spec.fingerprint.clone(),
            rank,
            alpha: 2.0 * rank as f64,
            task: Task::Embed,
            labels: Vec::new(),
            description: String::new(),
        },
        factors,
        head: None,
    };
    Arc::new(Adapter::from_package(format!("bench-{seed}@r{rank}"), pkg).unwrap())
}

struct Report {
    json: serde_json::Map<String, serde_json::Value>,
}

impl Report {
    fn add(&mut self, key: &str, label: String, value: f64) {
        println!("{label}");
        self.json.insert(key.to_owned(), serde_json::json!(value));
    }
}

/// The MiniLM folder: `SWITCHYARD_BASE_MODEL_DIR`, or models/all-minilm-l6-v2.
fn minilm_dir() -> std::path::PathBuf {
    std::env::var("SWITCHYARD_BASE_MODEL_DIR")
        .unwrap_or_else(|_| {
            concat!(env!("CARGO_MANIFEST_DIR"), "/../models/all-minilm-l6-v2").to_owned()
        })
        .into()
}

/// The benchmark's batch: the first 32 lines of bench-inputs.txt, each exactly 64 tokens (the
/// shape the goal names; padding repeats the token before the last), as ids and an all-ones mask.
fn bench_batch(e: &Embedder) -> (Tensor, Tensor) {
    let inputs = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../tests/reference/fixtures/bench-inputs.txt"
    ))
    .unwrap();
    let texts: Vec<&str> = inputs.lines().take(32).collect();
    let mut ids = e.tokenize(&texts).unwrap();
    for seq in &mut ids {
        seq.resize(64, seq[seq.len() - 2]);
    }
    let (b, t) = (ids.len(), 64);
    let flat: Vec<u32> = ids.iter().flatten().copied().collect();
    let ids_t = Tensor::from_vec(flat, (b, t), &Device::Cpu).unwrap();
    let mask = Tensor::ones((b, t), DType::U32, &Device::Cpu).unwrap();
    (ids_t, mask)
}

fn encoder_section(report: &mut Report, rounds: usize) {
    let e = Embedder::load(&minilm_dir()).expect("load MiniLM (run scripts/fetch-base-model.sh)");
    let (ids_t, mask) = bench_batch(&e);
    let spec = e.spec().clone();
    let qv = [Module::AttnQ, Module::AttnV];
    let all = [
        Module::AttnQ,
        Module::AttnK,
        Module::AttnV,
        Module::AttnO,
        Module::MlpUp,
        Module::MlpDown,
    ];
    let r8qv = synthetic_adapter(&spec, 8, &qv, 1);
    let r16qv = synthetic_adapter(&spec, 16, &qv, 2);
    let r8all = synthetic_adapter(&spec, 8, &all, 3);
    // Eight distinct adapters of one kind, for the batches that mix them.
    let eight = |rank: usize, modules: &[Module], seed: u64| -> Vec<Arc<Adapter>> {
        (0..8)
            .map(|i| synthetic_adapter(&spec, rank, modules, seed + i))
            .collect()
    };
    let mixed_sets = [eight(8, &qv, 10), eight(16, &qv, 20), eight(8, &all, 30)];
    let merged =
        Arc::new(MergedWeights::build_packed(&r16qv, |s| e.model().base_weight(s)).unwrap());

    let (b, t) = ids_t.dims2().unwrap();
    let run = |rows: &RowAdapters| {
        let start = Instant::now();
        let h = e.model().forward(&ids_t, &mask, rows).unwrap();
        let _ = switchyard_server::model::embedder::Pooling::default()
            .apply(&h, &mask)
            .unwrap();
        start.elapsed().as_secs_f64()
    };
    let n = b * t;
    // Sequence i runs adapter i % 8 of the set.
    let mixed = |set: &[Arc<Adapter>]| {
        let rows: Vec<Option<Arc<Adapter>>> = (0..b).map(|i| Some(set[i % 8].clone())).collect();
        RowAdapters::per_sequence(&rows, &vec![t; b])
    };
    let variants: Vec<(&str, &str, RowAdapters)> = vec![
        ("base", "base only", RowAdapters::base(n)),
        (
            "merged_r16_qv",
            "merged rank-16 q,v",
            RowAdapters::merged(merged, n),
        ),
        (
            "r8_qv",
            "unmerged rank-8 q,v, one adapter",
            RowAdapters::uniform(Some(r8qv), n),
        ),
        (
            "r16_qv",
            "unmerged rank-16 q,v, one adapter",
            RowAdapters::uniform(Some(r16qv), n),
        ),
        (
            "r8_all",
            "unmerged rank-8 all projections",
            RowAdapters::uniform(Some(r8all), n),
        ),
        (
            "r8_qv_mixed8",
            "unmerged rank-8 q,v, 8 adapters mixed",
            mixed(&mixed_sets[0]),
        ),
        (
            "r16_qv_mixed8",
            "unmerged rank-16 q,v, 8 adapters mixed",
            mixed(&mixed_sets[1]),
        ),
        (
            "r8_all_mixed8",
            "unmerged rank-8 all projections, 8 adapters mixed",
            mixed(&mixed_sets[2]),
        ),
    ];
    run(&variants[0].2);
    let mut times: Vec<Vec<f64>> = vec![Vec::new(); variants.len()];
    for _ in 0..rounds {
        for (i, v) in variants.iter().enumerate() {
            times[i].push(run(&v.2));
        }
    }
    let base = median(times[0].clone());
    let rows_per_s = b as f64 / base;
    report.add(
        "encoder_rows_per_s",
        format!(
            "encoder batch 32 x 64 tokens, base: {rows_per_s:.1} rows/s ({:.1} ms per batch)",
            base * 1e3
        ),
        rows_per_s,
    );
    let flops = 2.0 * n as f64 * (4.0 * 384.0 * 384.0 + 2.0 * 384.0 * 1536.0) * 6.0;
    report.add(
        "encoder_linear_gflops",
        format!(
            "  projections alone would be {:.1} GFLOP/s at that time",
            flops / base / 1e9
        ),
        flops / base / 1e9,
    );
    for (i, (key, label, _)) in variants.iter().enumerate().skip(1) {
        let ratio = median(times[i].clone()) / base;
        report.add(
            &format!("encoder_{key}_ratio"),
            format!("  {label}: {ratio:.3}x base time"),
            ratio,
        );
    }
}

fn merge_section(report: &mut Report, rounds: usize) {
    let (out, inp, r) = (2048, 2048, 16);
    let lr = LowRank::new(tensor(&[r, inp], 5, 0.05), tensor(&[out, r], 6, 0.05), 2.0).unwrap();
    let mut w = pattern(out * inp, 7, 0.02);
    let mut merge = Vec::new();
    let mut ba = Vec::new();
    let mut scratch = vec![0f32; out * inp];
    // The merges one after another on the same weight, as the torch script times `addmm_`
    // (each timing loop on its own: a 16 MB buffer written between two merges would push the
    // weight out of the caches the other side keeps it in).
    // A warm-up of ten merges, and many timed: in some processes the first few dozen merges
    // ran at half speed (1.3 against 0.7 ms; cause not found, the median of a longer run is
    // not moved by it).
    for _ in 0..10 {
        lr.merge_in_place(&mut w).unwrap();
    }
    // 100 merges at the default 5 rounds (about 70 ms), as many as the torch script times.
    for _ in 0..rounds.max(5) * 20 {
        let s = Instant::now();
        lr.merge_in_place(&mut w).unwrap();
        merge.push(s.elapsed().as_secs_f64());
    }
    for _ in 0..rounds.max(5) * 4 {
        let s = Instant::now();
        // B·A alone: the same product written to a buffer, nothing read or added.
        scratch.fill(0.0);
        let _ = lr.update().unwrap();
        ba.push(s.elapsed().as_secs_f64());
    }
    let (m, b) = (median(merge), median(ba));
    report.add(
        "merge_2048_r16_ms",
        format!("merge rank-16 into 2048x2048 in place: {:.3} ms", m * 1e3),
        m * 1e3,
    );
    report.add(
        "merge_vs_ba_ratio",
        format!("  against B·A alone ({:.3} ms): {:.3}x", b * 1e3, m / b),
        m / b,
    );
}

fn read_bandwidth() -> f64 {
    // Sums a 1 GiB buffer on every core: the access pattern of a matrix-vector product.
    use rayon::prelude::*;
    let data = pattern(1 << 28, 9, 1.0);
    let mut best: f64 = 0.0;
    for _ in 0..3 {
        let s = Instant::now();
        // Sixteen independent sums per chunk, so the loop vectorises and memory is the limit.
        let total: f32 = data
            .par_chunks(1 << 16)
            .map(|c| {
                let mut acc = [0f32; 16];
                for block in c.chunks_exact(16) {
                    for (a, x) in acc.iter_mut().zip(block) {
                        *a += x;
                    }
                }
                acc.iter().sum::<f32>()
            })
            .sum();
        std::hint::black_box(total);
        best = best.max((data.len() * 4) as f64 / s.elapsed().as_secs_f64());
    }
    best
}

/// The formats the per-format rows measure, f32 first (the other rows' reference).
fn formats() -> Vec<(&'static str, WeightFormat)> {
    ["f32", "bf16", "int8", "int4"]
        .into_iter()
        .map(|n| (n, WeightFormat::parse(n).expect("a format name")))
        .collect()
}

/// The MiniLM encoder with its weights held in each format: base rows/s against f32's (same
/// batch, rounds interleaved), and eight mixed rank-16 q,v adapters against each format's base.
fn encoder_formats_section(report: &mut Report, rounds: usize) {
    let dir = minilm_dir();
    let models: Vec<(&str, Embedder)> = formats()
        .into_iter()
        .map(|(name, f)| (name, Embedder::load_as(&dir, f).unwrap()))
        .collect();
    let e = &models[0].1;
    let (ids_t, mask) = bench_batch(e);
    let spec = e.spec().clone();
    let qv = [Module::AttnQ, Module::AttnV];
    let set: Vec<Arc<Adapter>> = (0..8)
        .map(|i| synthetic_adapter(&spec, 16, &qv, 20 + i))
        .collect();
    let (b, t) = ids_t.dims2().unwrap();
    let rows: Vec<Option<Arc<Adapter>>> = (0..b).map(|i| Some(set[i % 8].clone())).collect();
    let mixed = RowAdapters::per_sequence(&rows, &vec![t; b]);
    let base = RowAdapters::base(b * t);
    let run = |m: &Embedder, rows: &RowAdapters| {
        let start = Instant::now();
        let h = m.model().forward(&ids_t, &mask, rows).unwrap();
        let _ = switchyard_server::model::embedder::Pooling::default()
            .apply(&h, &mask)
            .unwrap();
        start.elapsed().as_secs_f64()
    };
    for (_, m) in &models {
        run(m, &base);
    }
    let mut times = vec![(Vec::new(), Vec::new()); models.len()];
    for _ in 0..rounds {
        for (i, (_, m)) in models.iter().enumerate() {
            times[i].0.push(run(m, &base));
            times[i].1.push(run(m, &mixed));
        }
    }
    let f32_time = median(times[0].0.clone());
    println!(
        "encoder batch 32 x 64 tokens per weight format (kernel path {}):",
        switchyard_kernels::dispatch::active()
    );
    for (i, (name, _)) in models.iter().enumerate() {
        let t_base = median(times[i].0.clone());
        let t_mixed = median(times[i].1.clone());
        report.add(
            &format!("encoder_{name}_rows_per_s"),
            format!(
                "  {name}: {:.1} rows/s, {:.3}x the f32 time; 8 mixed rank-16 q,v adapters {:.3}x its base",
                b as f64 / t_base,
                t_base / f32_time,
                t_mixed / t_base
            ),
            b as f64 / t_base,
        );
        report.json.insert(
            format!("encoder_{name}_mixed8_r16_ratio"),
            serde_json::json!(t_mixed / t_base),
        );
    }
}

/// The decoder shape of the measurement: the 1B class (hidden 2048, 16 layers, intermediate
/// 8192, 32 heads over 8 key-value heads, vocabulary 32000, tied embeddings), or with `--small`
/// a narrower one (intermediate 5632, vocabulary 8192) that fits a small machine's memory twice.
fn decoder_checkpoint(small: bool) -> (LlamaConfig, Checkpoint) {
    let (h, inter, vocab, heads, kv_heads) = if small {
        (2048usize, 5632usize, 8192usize, 16usize, 4usize)
    } else {
        (2048, 8192, 32000, 32, 8)
    };
    let cfg: LlamaConfig = serde_json::from_value(serde_json::json!({
        "vocab_size": vocab, "hidden_size": h, "intermediate_size": inter,
        "num_hidden_layers": 16, "num_attention_heads": heads, "num_key_value_heads": kv_heads,
        "rms_norm_eps": 1e-5, "max_position_embeddings": 1024, "rope_theta": 10000.0,
        "tie_word_embeddings": true
    }))
    .unwrap();
    let kv = kv_heads * (h / heads);
    let mut tensors = std::collections::HashMap::new();
    let mut seed = 100;
    let mut put = |name: String, shape: &[usize], scale: f32| {
        seed += 1;
        tensors.insert(name, tensor(shape, seed, scale));
    };
    put("model.embed_tokens.weight".into(), &[vocab, h], 0.02);
    put("model.norm.weight".into(), &[h], 1.0);
    for l in 0..16 {
        let p = format!("model.layers.{l}");
        for (n, shape) in [
            ("self_attn.q_proj", vec![h, h]),
            ("self_attn.k_proj", vec![kv, h]),
            ("self_attn.v_proj", vec![kv, h]),
            ("self_attn.o_proj", vec![h, h]),
            ("mlp.gate_proj", vec![inter, h]),
            ("mlp.up_proj", vec![inter, h]),
            ("mlp.down_proj", vec![h, inter]),
        ] {
            let scale = 1.0 / (shape[1] as f32).sqrt();
            put(format!("{p}.{n}.weight"), &shape, scale);
        }
        put(format!("{p}.input_layernorm.weight"), &[h], 1.0);
        put(format!("{p}.post_attention_layernorm.weight"), &[h], 1.0);
    }
    let ckpt = Checkpoint::from_tensors(serde_json::Value::Null, &tensors).unwrap();
    (cfg, ckpt)
}

/// Time per decoded token of `batch` sequences (each after an untimed 8-token prompt), with the
/// adapters `adapters(batch)` picks for a step of one token per sequence.
fn decode_time(
    model: &LlamaModel,
    batch: usize,
    steps: usize,
    adapters: &dyn Fn(usize, usize) -> RowAdapters,
) -> f64 {
    let vocab = model.config().vocab_size;
    let prompt: Vec<u32> = (0..8).map(|t| (t * 37 % vocab) as u32).collect();
    let mut caches: Vec<_> = (0..batch).map(|_| model.new_cache()).collect();
    let prompts: Vec<&[u32]> = (0..batch).map(|_| prompt.as_slice()).collect();
    let mut cache_refs: Vec<_> = caches.iter_mut().collect();
    model
        .forward_last(&prompts, &mut cache_refs, &adapters(batch, prompt.len()))
        .unwrap();
    let start = Instant::now();
    for step in 0..steps {
        let toks: Vec<[u32; 1]> = (0..batch)
            .map(|b| [((step * 31 + b * 7) % vocab) as u32])
            .collect();
        let refs: Vec<&[u32]> = toks.iter().map(|t| t.as_slice()).collect();
        let mut cache_refs: Vec<_> = caches.iter_mut().collect();
        model
            .forward_last(&refs, &mut cache_refs, &adapters(batch, 1))
            .unwrap();
    }
    start.elapsed().as_secs_f64() / steps as f64
}

/// The decoder in each weight format: batch-1 time per token against that format's resident
/// bytes over the measured read bandwidth, batch 16 against batch 1, and eight sequences with
/// eight different rank-16 q,v adapters against eight on the base.
fn decoder_section(report: &mut Report, rounds: usize, small: bool) {
    let (cfg, ckpt) = decoder_checkpoint(small);
    let bw = read_bandwidth();
    report.add(
        "read_bandwidth_gbs",
        format!(
            "decoder {} (hidden 2048, 16 layers, intermediate {}, vocabulary {}, tied head), kernel path {}: read bandwidth {:.1} GB/s",
            if small { "small shape" } else { "1B-class shape" },
            cfg.intermediate_size,
            cfg.vocab_size,
            switchyard_kernels::dispatch::active(),
            bw / 1e9,
        ),
        bw / 1e9,
    );
    let rounds = rounds.clamp(1, 3);
    for (name, format) in formats() {
        let model = LlamaModel::new(&cfg, &Weights::new(&ckpt, format)).unwrap();
        let bytes = model.resident_bytes();
        let floor = bytes as f64 / bw;
        let spec = model.spec("llama", format!("bench-decoder-{name}"));
        let set: Vec<Arc<Adapter>> = (0..8)
            .map(|i| synthetic_adapter(&spec, 16, &[Module::AttnQ, Module::AttnV], 40 + i))
            .collect();
        let base = |_: usize, rows: usize| RowAdapters::base(rows);
        let base = |batch: usize, per: usize| base(batch, batch * per);
        let mixed = |batch: usize, per: usize| {
            let rows: Vec<Option<Arc<Adapter>>> = (0..batch)
                .map(|i| Some(set[i % set.len()].clone()))
                .collect();
            RowAdapters::per_sequence(&rows, &vec![per; batch])
        };
        let (mut one, mut sixteen, mut eight, mut eight_mixed) =
            (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        for _ in 0..rounds {
            one.push(decode_time(&model, 1, 8, &base));
            sixteen.push(decode_time(&model, 16, 8, &base));
            eight.push(decode_time(&model, 8, 8, &base));
            eight_mixed.push(decode_time(&model, 8, 8, &mixed));
        }
        let (t1, t16) = (median(one), median(sixteen));
        let (t8, t8m) = (median(eight), median(eight_mixed));
        let speedup = (16.0 / t16) / (1.0 / t1);
        report.add(
            &format!("decode_{name}_b1_ms_per_token"),
            format!(
                "  {name}: {:.2} GB resident; batch 1 {:.1} ms per token = {:.2}x the floor ({:.1} ms); batch 16 {:.1} tokens/s = {:.2}x batch 1; 8 mixed rank-16 q,v adapters {:.3}x base at batch 8",
                bytes as f64 / 1e9,
                t1 * 1e3,
                t1 / floor,
                floor * 1e3,
                16.0 / t16,
                speedup,
                t8m / t8
            ),
            t1 * 1e3,
        );
        for (key, value) in [
            ("resident_gb", bytes as f64 / 1e9),
            ("b1_floor_ratio", t1 / floor),
            ("b16_speedup", speedup),
            ("mixed8_r16_ratio", t8m / t8),
        ] {
            report
                .json
                .insert(format!("decode_{name}_{key}"), serde_json::json!(value));
        }
        if name == "f32" {
            // The keys earlier reports used.
            report.json.insert(
                "decode_b1_floor_ratio".into(),
                serde_json::json!(t1 / floor),
            );
            report
                .json
                .insert("decode_b16_speedup".into(), serde_json::json!(speedup));
        }
    }
}

fn main() {
    // As the server does at start: oneDNN (where found) loaded before any thread starts.
    // SAFETY: no other thread has started yet.
    #[allow(unsafe_code)]
    let library = unsafe { switchyard_kernels::onednn::load_at_start() };
    println!("{library}");
    let args: Vec<String> = std::env::args().collect();
    let rounds = args
        .iter()
        .position(|a| a == "--rounds")
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(5);
    let mut report = Report {
        json: serde_json::Map::new(),
    };
    report.json.insert(
        "kernel_path".into(),
        serde_json::json!(switchyard_kernels::dispatch::active().name()),
    );
    println!(
        "switchyard CPU paths ({} threads, {rounds} interleaved rounds; lower ratios are better)",
        rayon::current_num_threads()
    );
    let flag = |name: &str| args.iter().any(|a| a == name);
    if !flag("--skip-encoder") {
        encoder_section(&mut report, rounds);
        encoder_formats_section(&mut report, rounds);
    }
    merge_section(&mut report, rounds);
    if !flag("--skip-decoder") {
        decoder_section(&mut report, rounds, flag("--small-decoder"));
    }
    let out = concat!(env!("CARGO_MANIFEST_DIR"), "/../target/bench");
    std::fs::create_dir_all(out).unwrap();
    std::fs::write(
        format!("{out}/cpu_paths.json"),
        serde_json::to_string_pretty(&report.json).unwrap(),
    )
    .unwrap();
}
