//! Writes a Llama-family decoder checkpoint of a given size with seeded pattern weights, for
//! measuring loading and decoding on a model of real size (nothing is learned; the text it
//! generates means nothing, but prompts tokenise as real text does). The folder gets
//! `config.json`, a copy of the `tokenizer.json` given (scripts/fetch-tokenizer.sh fetches the
//! 32,000-token Llama-2 vocabulary one these shapes are sized for), and the weights as one
//! safetensors file or as shards with `model.safetensors.index.json`, in f32 or bf16, written
//! tensor by tensor (at most one shard's tensors in memory).
//!
//!   cargo run --release -p switchyard-server --example make_decoder -- --shape 1b --dtype f32 \
//!       --tokenizer models/l2-tokenizer/tokenizer.json --out target/decoders/1b-f32
//!   cargo run --release -p switchyard-server --example make_decoder -- --shape 7b --dtype bf16 \
//!       --shard-gb 2 --tokenizer models/l2-tokenizer/tokenizer.json --out target/decoders/7b-bf16
//!
//! Shapes: `1b` (hidden 2048, 16 layers, intermediate 8192, 32 heads over 8 key-value heads,
//! vocabulary 32000, tied embeddings: 1.1 billion weights, 4.2 GB in f32) and `7b` (hidden 4096,
//! 32 layers, intermediate 11008, 32 heads, vocabulary 32000, separate output head: 6.7 billion
//! weights, 13.5 GB in bf16).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use safetensors::Dtype;
use safetensors::tensor::TensorView;

struct Shape {
    hidden: usize,
    layers: usize,
    intermediate: usize,
    heads: usize,
    kv_heads: usize,
    vocab: usize,
    tied: bool,
}

const ONE_B: Shape = Shape {
    hidden: 2048,
    layers: 16,
    intermediate: 8192,
    heads: 32,
    kv_heads: 8,
    vocab: 32000,
    tied: true,
};

const SEVEN_B: Shape = Shape {
    hidden: 4096,
    layers: 32,
    intermediate: 11008,
    heads: 32,
    kv_heads: 32,
    vocab: 32000,
    tied: false,
};

/// Values in ±scale from a xorshift generator seeded per tensor: cheap, and the same every run.
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

/// Every tensor of the checkpoint in file order: name, shape and the scale of its values.
fn tensors(s: &Shape) -> Vec<(String, Vec<usize>, f32)> {
    let head_dim = s.hidden / s.heads;
    let kv = s.kv_heads * head_dim;
    let mut out = vec![(
        "model.embed_tokens.weight".to_owned(),
        vec![s.vocab, s.hidden],
        0.02,
    )];
    for l in 0..s.layers {
        let p = format!("model.layers.{l}");
        for (n, shape) in [
            ("self_attn.q_proj", vec![s.hidden, s.hidden]),
            ("self_attn.k_proj", vec![kv, s.hidden]),
            ("self_attn.v_proj", vec![kv, s.hidden]),
            ("self_attn.o_proj", vec![s.hidden, s.hidden]),
            ("mlp.gate_proj", vec![s.intermediate, s.hidden]),
            ("mlp.up_proj", vec![s.intermediate, s.hidden]),
            ("mlp.down_proj", vec![s.hidden, s.intermediate]),
        ] {
            let scale = 1.0 / (shape[1] as f32).sqrt();
            out.push((format!("{p}.{n}.weight"), shape, scale));
        }
        out.push((format!("{p}.input_layernorm.weight"), vec![s.hidden], 0.0));
        out.push((
            format!("{p}.post_attention_layernorm.weight"),
            vec![s.hidden],
            0.0,
        ));
    }
    out.push(("model.norm.weight".to_owned(), vec![s.hidden], 0.0));
    if !s.tied {
        out.push(("lm_head.weight".to_owned(), vec![s.vocab, s.hidden], 0.02));
    }
    out
}

/// The bytes of one tensor in `dtype`; a scale of 0 stands for a norm weight, all ones.
fn bytes_of(n: usize, seed: u64, scale: f32, dtype: Dtype) -> Vec<u8> {
    let values = if scale == 0.0 {
        vec![1.0f32; n]
    } else {
        pattern(n, seed, scale)
    };
    match dtype {
        Dtype::BF16 => values
            .iter()
            .flat_map(|v| bf16_bits(*v).to_le_bytes())
            .collect(),
        _ => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
    }
}

/// An f32 rounded to bfloat16 (nearest, ties to even; the values here are finite).
fn bf16_bits(v: f32) -> u16 {
    let b = v.to_bits();
    ((b + 0x7FFF + ((b >> 16) & 1)) >> 16) as u16
}

fn config_json(s: &Shape, dtype: &str) -> serde_json::Value {
    serde_json::json!({
        "architectures": ["LlamaForCausalLM"],
        "model_type": "llama",
        "hidden_size": s.hidden,
        "intermediate_size": s.intermediate,
        "num_hidden_layers": s.layers,
        "num_attention_heads": s.heads,
        "num_key_value_heads": s.kv_heads,
        "vocab_size": s.vocab,
        "max_position_embeddings": 2048,
        "rms_norm_eps": 1e-5,
        "rope_theta": 10000.0,
        "hidden_act": "silu",
        "tie_word_embeddings": s.tied,
        "bos_token_id": 1,
        "eos_token_id": 2,
        "torch_dtype": dtype,
    })
}

fn write_shard(
    path: &Path,
    shard: &[(String, Vec<usize>, Vec<u8>)],
    dtype: Dtype,
) -> anyhow::Result<()> {
    let views: Vec<(&str, TensorView<'_>)> = shard
        .iter()
        .map(|(n, shape, b)| Ok((n.as_str(), TensorView::new(dtype, shape.clone(), b)?)))
        .collect::<anyhow::Result<_>>()?;
    safetensors::serialize_to_file(views, None, path)
        .with_context(|| format!("writing {}", path.display()))
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let value = |flag: &str| {
        args.iter()
            .position(|a| a == flag)
            .and_then(|i| args.get(i + 1))
            .cloned()
    };
    let shape = match value("--shape").as_deref() {
        Some("1b") => ONE_B,
        Some("7b") => SEVEN_B,
        other => bail!("--shape must be 1b or 7b, got {other:?}"),
    };
    let (dtype, dtype_name) = match value("--dtype").as_deref().unwrap_or("f32") {
        "f32" => (Dtype::F32, "float32"),
        "bf16" => (Dtype::BF16, "bfloat16"),
        other => bail!("--dtype must be f32 or bf16, got {other:?}"),
    };
    let out = PathBuf::from(value("--out").context("--out DIR is required")?);
    let tokenizer_file = PathBuf::from(
        value("--tokenizer").context("--tokenizer FILE (a tokenizer.json) is required")?,
    );
    // Every id the tokenizer can produce must have an embedding row.
    let tokens =
        switchyard_server::model::checkpoint::load_tokenizer(&tokenizer_file)?.get_vocab_size(true);
    if tokens > shape.vocab {
        bail!(
            "{} has {tokens} tokens, more than the {} rows of the model's vocabulary",
            tokenizer_file.display(),
            shape.vocab
        );
    }
    // 0: one file.
    let shard_bytes: f64 = value("--shard-gb")
        .map(|v| v.parse::<f64>().context("--shard-gb is a number of GB"))
        .transpose()?
        .unwrap_or(0.0)
        * 1e9;
    std::fs::create_dir_all(&out).with_context(|| format!("creating {}", out.display()))?;
    let elem = if dtype == Dtype::BF16 { 2 } else { 4 };
    let all = tensors(&shape);
    let total: usize = all
        .iter()
        .map(|(_, s, _)| s.iter().product::<usize>() * elem)
        .sum();
    // Tensors into shards of about `shard_bytes` (one shard when 0).
    let mut shards: Vec<Vec<usize>> = vec![Vec::new()];
    let mut size = 0usize;
    for (i, (_, s, _)) in all.iter().enumerate() {
        let b = s.iter().product::<usize>() * elem;
        if shard_bytes > 0.0 && size > 0 && (size + b) as f64 > shard_bytes {
            shards.push(Vec::new());
            size = 0;
        }
        shards.last_mut().expect("a shard").push(i);
        size += b;
    }
    let count = shards.len();
    let mut weight_map = BTreeMap::new();
    for (k, members) in shards.iter().enumerate() {
        let file = if count == 1 {
            "model.safetensors".to_owned()
        } else {
            format!("model-{:05}-of-{count:05}.safetensors", k + 1)
        };
        let shard: Vec<(String, Vec<usize>, Vec<u8>)> = members
            .iter()
            .map(|&i| {
                let (name, s, scale) = &all[i];
                let n = s.iter().product();
                (
                    name.clone(),
                    s.clone(),
                    bytes_of(n, 1000 + i as u64, *scale, dtype),
                )
            })
            .collect();
        write_shard(&out.join(&file), &shard, dtype)?;
        eprintln!("make_decoder: wrote {file} ({} tensors)", members.len());
        for &i in members {
            weight_map.insert(all[i].0.clone(), file.clone());
        }
    }
    if count > 1 {
        let index =
            serde_json::json!({"metadata": {"total_size": total}, "weight_map": weight_map});
        std::fs::write(
            out.join("model.safetensors.index.json"),
            serde_json::to_string_pretty(&index)?,
        )?;
    }
    std::fs::write(
        out.join("config.json"),
        serde_json::to_string_pretty(&config_json(&shape, dtype_name))?,
    )?;
    std::fs::copy(&tokenizer_file, out.join("tokenizer.json"))
        .with_context(|| format!("copying {}", tokenizer_file.display()))?;
    println!(
        "{}: {:.2} GB of {} weights in {count} file(s)",
        out.display(),
        total as f64 / 1e9,
        dtype_name
    );
    Ok(())
}
