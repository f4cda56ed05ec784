//! The CPU fast-path benchmark: every figure is a ratio of two timings taken side by side in
//! one run, interleaved round by round, so the shared machine's noise hits both sides alike.
//!
//!   cargo bench -p switchyard-server --bench cpu_paths [-- --rounds N] [-- --skip-decoder]
//!
//! Sections: the MiniLM encoder at batch 32 x 64 tokens (base, merged, unmerged adapters of
//! several shapes, eight adapters mixed); merging a rank-16 adapter into a 2048 x 2048 matrix in
//! place against B·A alone; and a synthetic 2048-wide, 16-layer Llama-family decoder at batch 1
//! (against weight bytes / measured read bandwidth) and batch 16. Results go to stdout as a
//! table and to target/bench/cpu_paths.json; scripts/bench-cpu adds torch's figures.

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

fn encoder_section(report: &mut Report, rounds: usize) {
    let dir = std::env::var("SWITCHYARD_BASE_MODEL_DIR").unwrap_or_else(|_| {
        concat!(env!("CARGO_MANIFEST_DIR"), "/../models/all-minilm-l6-v2").to_owned()
    });
    let e = Embedder::load(std::path::Path::new(&dir))
        .expect("load MiniLM (run scripts/fetch-base-model.sh)");
    let inputs = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../tests/reference/fixtures/bench-inputs.txt"
    ))
    .unwrap();
    let texts: Vec<&str> = inputs.lines().take(32).collect();
    let mut ids = e.tokenize(&texts).unwrap();
    for seq in &mut ids {
        // Exactly 64 tokens per row: the shape the goal names.
        seq.resize(64, seq[seq.len() - 2]);
    }
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

    let b = ids.len();
    let t = 64;
    let dev = Device::Cpu;
    let flat: Vec<u32> = ids.iter().flatten().copied().collect();
    let ids_t = Tensor::from_vec(flat, (b, t), &dev).unwrap();
    let mask = Tensor::ones((b, t), DType::U32, &dev).unwrap();
    let run = |rows: &RowAdapters| {
        let start = Instant::now();
        let h = e.model().forward(&ids_t, &mask, rows).unwrap();
        let _ = switchyard_server::model::bert::mean_pool_normalise(&h, &mask).unwrap();
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
    for _ in 0..rounds.max(5) * 4 {
        let s = Instant::now();
        lr.merge_in_place(&mut w).unwrap();
        merge.push(s.elapsed().as_secs_f64());
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

fn decoder_section(report: &mut Report, rounds: usize) {
    let cfg: LlamaConfig = serde_json::from_value(serde_json::json!({
        "vocab_size": 8192, "hidden_size": 2048, "intermediate_size": 5632,
        "num_hidden_layers": 16, "num_attention_heads": 16, "num_key_value_heads": 4,
        "rms_norm_eps": 1e-5, "max_position_embeddings": 1024, "rope_theta": 10000.0
    }))
    .unwrap();
    let (h, i, kv) = (2048usize, 5632usize, 4 * 128usize);
    let mut tensors = std::collections::HashMap::new();
    let mut seed = 100;
    let mut put = |name: String, shape: &[usize], scale: f32| {
        seed += 1;
        tensors.insert(name, tensor(shape, seed, scale));
    };
    put("model.embed_tokens.weight".into(), &[8192, h], 0.5);
    put("lm_head.weight".into(), &[8192, h], 0.02);
    put("model.norm.weight".into(), &[h], 1.0);
    for l in 0..16 {
        let p = format!("model.layers.{l}");
        for (n, shape) in [
            ("self_attn.q_proj", vec![h, h]),
            ("self_attn.k_proj", vec![kv, h]),
            ("self_attn.v_proj", vec![kv, h]),
            ("self_attn.o_proj", vec![h, h]),
            ("mlp.gate_proj", vec![i, h]),
            ("mlp.up_proj", vec![i, h]),
            ("mlp.down_proj", vec![h, i]),
        ] {
            let scale = 1.0 / (shape[1] as f32).sqrt();
            put(format!("{p}.{n}.weight"), &shape, scale);
        }
        put(format!("{p}.input_layernorm.weight"), &[h], 1.0);
        put(format!("{p}.post_attention_layernorm.weight"), &[h], 1.0);
    }
    let weight_bytes: usize = tensors
        .iter()
        .filter(|(n, _)| !n.contains("embed_tokens"))
        .map(|(_, t)| t.elem_count() * 4)
        .sum();
    let ckpt = Checkpoint::from_tensors(serde_json::Value::Null, &tensors).unwrap();
    drop(tensors);
    let model = LlamaModel::new(&cfg, &Weights::new(&ckpt, WeightFormat::F32)).unwrap();
    drop(ckpt);
    let bw = read_bandwidth();
    let floor = weight_bytes as f64 / bw;
    report.add(
        "read_bandwidth_gbs",
        format!(
            "decoder 2048 wide, 16 layers: read bandwidth {:.1} GB/s, weights {:.2} GB",
            bw / 1e9,
            weight_bytes as f64 / 1e9
        ),
        bw / 1e9,
    );

    let prompt: Vec<u32> = (0..32).map(|t| (t * 37 % 8192) as u32).collect();
    let steps = 8;
    let decode = |batch: usize| -> f64 {
        let mut caches: Vec<_> = (0..batch).map(|_| model.new_cache()).collect();
        // Every sequence's prompt in one prefill call (not timed).
        let prompts: Vec<&[u32]> = (0..batch).map(|_| prompt.as_slice()).collect();
        let mut cache_refs: Vec<_> = caches.iter_mut().collect();
        model
            .forward_last(
                &prompts,
                &mut cache_refs,
                &RowAdapters::base(batch * prompt.len()),
            )
            .unwrap();
        let start = Instant::now();
        for step in 0..steps {
            let toks: Vec<[u32; 1]> = (0..batch)
                .map(|b| [((step * 31 + b * 7) % 8192) as u32])
                .collect();
            let refs: Vec<&[u32]> = toks.iter().map(|t| t.as_slice()).collect();
            let mut cache_refs: Vec<_> = caches.iter_mut().collect();
            model
                .forward_last(&refs, &mut cache_refs, &RowAdapters::base(batch))
                .unwrap();
        }
        start.elapsed().as_secs_f64() / steps as f64
    };
    let mut one = Vec::new();
    let mut sixteen = Vec::new();
    for _ in 0..rounds.clamp(1, 3) {
        one.push(decode(1));
        sixteen.push(decode(16));
    }
    let (t1, t16) = (median(one), median(sixteen));
    report.add(
        "decode_b1_ms_per_token",
        format!(
            "  batch 1: {:.1} ms per token, {:.2}x the bandwidth floor ({:.1} ms)",
            t1 * 1e3,
            t1 / floor,
            floor * 1e3
        ),
        t1 * 1e3,
    );
    report.add(
        "decode_b1_floor_ratio",
        format!("  batch 1 / floor: {:.3}", t1 / floor),
        t1 / floor,
    );
    let speedup = (16.0 / t16) / (1.0 / t1);
    report.add(
        "decode_b16_speedup",
        format!(
            "  batch 16: {:.1} tokens/s, {:.2}x the tokens/s of batch 1",
            16.0 / t16,
            speedup
        ),
        speedup,
    );
}

fn main() {
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
    println!(
        "switchyard CPU paths ({} threads, {rounds} interleaved rounds; lower ratios are better)",
        rayon::current_num_threads()
    );
    if !args.iter().any(|a| a == "--skip-encoder") {
        encoder_section(&mut report, rounds);
    }
    merge_section(&mut report, rounds);
    if !args.iter().any(|a| a == "--skip-decoder") {
        decoder_section(&mut report, rounds);
    }
    let out = concat!(env!("CARGO_MANIFEST_DIR"), "/../target/bench");
    std::fs::create_dir_all(out).unwrap();
    std::fs::write(
        format!("{out}/cpu_paths.json"),
        serde_json::to_string_pretty(&report.json).unwrap(),
    )
    .unwrap();
}
