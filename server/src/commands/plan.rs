//! `switchyard plan`: what one adapter of a given rank and targets costs on a base model, in
//! parameters and bytes, unmerged (resident factors) and merged (a copy of each targeted
//! matrix), and how many fit in a memory budget in each tier. Shapes come from config.json
//! alone, so a model can be planned for before its weights are downloaded.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use candle_core::{DType, Device, Tensor};
use serde_json::json;
use switchyard_adapters::{LowRank, Module, params};

use crate::commands::adapter::base::{
    KNOWN_MODEL_TYPES, grouped, human_bytes, human_bytes_as_given, model_type, parse_bytes,
    read_config,
};

/// A comma-separated target list, as one flag value.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Targets(pub Vec<Module>);

fn parse_targets(text: &str) -> Result<Targets, String> {
    Module::parse_list(text).map(Targets)
}

#[derive(Debug, Clone, clap::Args)]
pub struct PlanArgs {
    /// A model folder holding config.json (weights are not needed), or a config.json file.
    #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
    pub model: PathBuf,
    /// The adapter rank r.
    #[arg(long)]
    pub rank: usize,
    /// Modules adapted in every layer, comma-separated: attn.q, attn.k, attn.v, attn.o,
    /// mlp.gate, mlp.up, mlp.down.
    #[arg(long, value_parser = parse_targets)]
    pub targets: Targets,
    /// Memory to plan for, in bytes (units allowed: 8GiB, 500MB): how many adapters fit in it
    /// unmerged, and how many merged variants.
    #[arg(long, value_parser = parse_bytes, value_name = "BYTES")]
    pub budget: Option<u64>,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
}

/// The adaptable matrices of a model, from its config.json.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigShapes {
    pub model_type: String,
    pub layers: usize,
    pub hidden: usize,
    /// `[out, in]` of each module, the same in every layer.
    pub shapes: BTreeMap<Module, (usize, usize)>,
}

fn field(config: &serde_json::Value, key: &str, file: &Path) -> anyhow::Result<usize> {
    config
        .get(key)
        .and_then(|v| v.as_u64())
        .map(|v| v as usize)
        .with_context(|| format!("{} has no `{key}` (a whole number)", file.display()))
}

/// Shapes of every adaptable matrix of a bert or llama-family config (the layouts our encoder and
/// decoder runtimes build).
pub fn shapes_from_config(config: &serde_json::Value, file: &Path) -> anyhow::Result<ConfigShapes> {
    let kind = model_type(config, file)?;
    let encoder = crate::model::bert::ENCODER_TYPES.contains(&kind.as_str());
    if !encoder && !crate::model::llama::DECODER_TYPES.contains(&kind.as_str()) {
        bail!(
            "{} has model_type {kind:?}; switchyard plans for {KNOWN_MODEL_TYPES}",
            file.display()
        );
    }
    let hidden = field(config, "hidden_size", file)?;
    let inter = field(config, "intermediate_size", file)?;
    let layers = field(config, "num_hidden_layers", file)?;
    let mut shapes = BTreeMap::new();
    match encoder {
        true => {
            for m in [Module::AttnQ, Module::AttnK, Module::AttnV, Module::AttnO] {
                shapes.insert(m, (hidden, hidden));
            }
            shapes.insert(Module::MlpUp, (inter, hidden));
            shapes.insert(Module::MlpDown, (hidden, inter));
        }
        false => {
            let heads = field(config, "num_attention_heads", file)?;
            let kv_heads = match config.get("num_key_value_heads") {
                Some(serde_json::Value::Null) | None => heads,
                Some(_) => field(config, "num_key_value_heads", file)?,
            };
            let head_dim = match config.get("head_dim") {
                Some(serde_json::Value::Null) | None => hidden / heads.max(1),
                Some(_) => field(config, "head_dim", file)?,
            };
            shapes.insert(Module::AttnQ, (heads * head_dim, hidden));
            shapes.insert(Module::AttnK, (kv_heads * head_dim, hidden));
            shapes.insert(Module::AttnV, (kv_heads * head_dim, hidden));
            shapes.insert(Module::AttnO, (hidden, heads * head_dim));
            shapes.insert(Module::MlpGate, (inter, hidden));
            shapes.insert(Module::MlpUp, (inter, hidden));
            shapes.insert(Module::MlpDown, (hidden, inter));
        }
    }
    Ok(ConfigShapes {
        model_type: kind,
        layers,
        hidden,
        shapes,
    })
}

/// The cost of one adapter.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Plan {
    pub matrices: usize,
    pub factor_parameters: u64,
    pub full_update_parameters: u64,
    /// Resident factors, as the registry counts them.
    pub unmerged_bytes: u64,
    /// A merged variant: every targeted matrix, f32.
    pub merged_bytes: u64,
    /// The package file, about (the header is estimated).
    pub file_bytes: u64,
}

/// Costs one adapter of `rank` on `targets` in every layer.
pub fn plan(shapes: &ConfigShapes, rank: usize, targets: &[Module]) -> anyhow::Result<Plan> {
    anyhow::ensure!(rank >= 1, "--rank must be at least 1");
    let mut per_layer = Vec::new();
    let mut unmerged_per_layer = 0u64;
    for &m in targets {
        let &(out, inp) = shapes
            .shapes
            .get(&m)
            .with_context(|| format!("a {} model has no {m} matrix", shapes.model_type))?;
        if rank > out.min(inp) {
            bail!(
                "rank {rank} is above min(in, out) = {} for {m} ([{out} x {inp}])",
                out.min(inp)
            );
        }
        per_layer.push((out, inp));
        // Counted by the same code the registry uses, so the plan matches what it will hold.
        let zeros = |r, c| Tensor::zeros((r, c), DType::F32, &Device::Cpu);
        let lr = LowRank::new(zeros(rank, inp)?, zeros(out, rank)?, 1.0)?;
        unmerged_per_layer += lr.resident_bytes() as u64;
    }
    let layers = shapes.layers as u64;
    let factor_parameters = params::trainable_parameters(rank, shapes.layers, &per_layer) as u64;
    let full_update_parameters = layers
        * per_layer
            .iter()
            .map(|&(o, i)| params::full_update_parameters(i, o) as u64)
            .sum::<u64>();
    let matrices = shapes.layers * per_layer.len();
    // Header: about 90 bytes per tensor entry plus the metadata.
    let header = 2 * matrices as u64 * 90 + 300;
    Ok(Plan {
        matrices,
        factor_parameters,
        full_update_parameters,
        unmerged_bytes: layers * unmerged_per_layer,
        merged_bytes: full_update_parameters * 4,
        file_bytes: factor_parameters * 4 + header,
    })
}

pub fn run(args: &PlanArgs, mut out: impl Write) -> anyhow::Result<()> {
    let (file, config) = read_config(&args.model)?;
    let shapes = shapes_from_config(&config, &file)?;
    let targets = &args.targets.0;
    let p = plan(&shapes, args.rank, targets)?;
    let fits = |bytes: u64| args.budget.map(|b| b / bytes.max(1));
    let names: Vec<String> = targets.iter().map(|m| m.to_string()).collect();
    if args.json {
        let value = json!({
            "config": file.display().to_string(),
            "model_type": shapes.model_type,
            "layers": shapes.layers,
            "hidden_size": shapes.hidden,
            "rank": args.rank,
            "targets": names,
            "matrices": p.matrices,
            "factor_parameters": p.factor_parameters,
            "full_update_parameters": p.full_update_parameters,
            "unmerged_bytes": p.unmerged_bytes,
            "merged_bytes": p.merged_bytes,
            "file_bytes_about": p.file_bytes,
            "budget_bytes": args.budget,
            "fit_unmerged": fits(p.unmerged_bytes),
            "fit_merged": fits(p.merged_bytes),
        });
        writeln!(out, "{}", serde_json::to_string_pretty(&value)?)?;
        return Ok(());
    }
    writeln!(
        out,
        "base: {} from {} ({} layers, hidden {})",
        shapes.model_type,
        file.display(),
        shapes.layers,
        shapes.hidden
    )?;
    writeln!(
        out,
        "adapter: rank {} on {} in each layer ({} matrices)",
        args.rank,
        names.join(", "),
        p.matrices
    )?;
    let share = 100.0 * p.factor_parameters as f64 / p.full_update_parameters.max(1) as f64;
    writeln!(
        out,
        "  factor parameters   {}  (a full update of the same matrices: {}; {share:.2}%)",
        grouped(p.factor_parameters),
        grouped(p.full_update_parameters)
    )?;
    writeln!(
        out,
        "  package file        about {}",
        human_bytes(p.file_bytes)
    )?;
    writeln!(
        out,
        "  unmerged            {} resident per adapter ({} bytes of factors)",
        human_bytes(p.unmerged_bytes),
        grouped(p.unmerged_bytes)
    )?;
    writeln!(
        out,
        "  merged              {} per merged variant ({} bytes: each targeted matrix, f32; the rest is shared with the base)",
        human_bytes(p.merged_bytes),
        grouped(p.merged_bytes)
    )?;
    if let Some(budget) = args.budget {
        writeln!(
            out,
            "budget {} ({} bytes):",
            human_bytes_as_given(budget),
            grouped(budget)
        )?;
        writeln!(
            out,
            "  unmerged tier       {} adapters",
            grouped(fits(p.unmerged_bytes).unwrap_or(0))
        )?;
        writeln!(
            out,
            "  merged tier         {} merged variants",
            grouped(fits(p.merged_bytes).unwrap_or(0))
        )?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn config(text: &str) -> ConfigShapes {
        let v: serde_json::Value = serde_json::from_str(text).unwrap();
        shapes_from_config(&v, Path::new("config.json")).unwrap()
    }

    /// A 2048-wide, 16-layer decoder with full attention heads: rank 16 on q, k, v, o holds
    /// 16 × 4 × 16 × (2048 + 2048) = 4,194,304 parameters, against 16 × 4 × 2048² =
    /// 268,435,456 for the full update (worked by hand from r·(in + out) and in·out).
    #[test]
    fn decoder_plan_from_config_fields_alone() {
        let shapes = config(
            r#"{"model_type":"llama","hidden_size":2048,"intermediate_size":5632,
                "num_hidden_layers":16,"num_attention_heads":32}"#,
        );
        let targets = Module::parse_list("attn.q,attn.k,attn.v,attn.o").unwrap();
        let p = plan(&shapes, 16, &targets).unwrap();
        assert_eq!(p.matrices, 64);
        assert_eq!(p.factor_parameters, 4_194_304);
        assert_eq!(p.full_update_parameters, 268_435_456);
        assert_eq!(p.merged_bytes, 268_435_456 * 4);
        assert_eq!(p.unmerged_bytes, p.factor_parameters * 4);
    }

    /// The low-rank factors were held with A padded to 16 rows, so a rank-8 adapter held 1.5x
    /// its bytes and a rank-4 one 2.5x, and the plan reported that; the factors now hold
    /// exactly r * (in + out) f32 values, and the plan says so.
    #[test]
    fn low_rank_factors_below_rank_sixteen_are_planned_without_padding() {
        let bert = config(
            r#"{"model_type":"bert","hidden_size":384,"intermediate_size":1536,"num_hidden_layers":6}"#,
        );
        let targets = Module::parse_list("attn.q,attn.v,mlp.up").unwrap();
        for rank in [1, 4, 8, 12, 20] {
            let p = plan(&bert, rank, &targets).unwrap();
            // 6 layers x (q: 384 + 384, v: 384 + 384, up: 384 + 1536) x rank, 4 bytes each.
            assert_eq!(p.factor_parameters, 6 * (768 + 768 + 1920) * rank as u64);
            assert_eq!(p.unmerged_bytes, p.factor_parameters * 4, "rank {rank}");
        }
    }

    #[test]
    fn grouped_query_attention_and_explicit_head_dim_shape_k_and_v() {
        let shapes = config(
            r#"{"model_type":"llama","hidden_size":64,"intermediate_size":128,
                "num_hidden_layers":2,"num_attention_heads":4,"num_key_value_heads":2,
                "head_dim":32}"#,
        );
        assert_eq!(shapes.shapes[&Module::AttnQ], (128, 64));
        assert_eq!(shapes.shapes[&Module::AttnK], (64, 64));
        assert_eq!(shapes.shapes[&Module::AttnO], (64, 128));
    }

    #[test]
    fn refusals_name_what_is_wrong() {
        let bert = config(
            r#"{"model_type":"bert","hidden_size":384,"intermediate_size":1536,"num_hidden_layers":6}"#,
        );
        let e = plan(&bert, 8, &[Module::MlpGate]).unwrap_err().to_string();
        assert!(e.contains("bert model has no mlp.gate"), "{e}");
        let e = plan(&bert, 400, &[Module::AttnQ]).unwrap_err().to_string();
        assert!(e.contains("rank 400 is above min(in, out) = 384"), "{e}");
        let v: serde_json::Value = serde_json::from_str(r#"{"model_type":"gpt9"}"#).unwrap();
        let e = shapes_from_config(&v, Path::new("c.json"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("model_type \"gpt9\""), "{e}");
        let v: serde_json::Value = serde_json::from_str(r#"{"model_type":"bert"}"#).unwrap();
        let e = shapes_from_config(&v, Path::new("c.json"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("no `hidden_size`"), "{e}");
    }
}
