//! `switchyard adapter inspect FILE`: what a package holds, and how much of its rank each
//! update really uses.

use std::io::Write;
use std::path::PathBuf;

use anyhow::Context;
use serde_json::json;
use switchyard_adapters::spectrum::{energy_rank, singular_values};
use switchyard_adapters::{Adapter, AdapterPackage, params};

use super::base::{LimitArgs, grouped, human_bytes};

#[derive(Debug, Clone, clap::Args)]
pub struct InspectArgs {
    /// The adapter package (.safetensors) to inspect.
    pub file: PathBuf,
    /// Share of the energy (sum of squared singular values) the numerical rank must carry.
    #[arg(long, default_value_t = 0.99, value_name = "FRACTION")]
    pub energy: f64,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub limits: LimitArgs,
}

pub fn run(args: &InspectArgs, mut out: impl Write) -> anyhow::Result<()> {
    anyhow::ensure!(
        args.energy > 0.0 && args.energy <= 1.0,
        "--energy must be in (0, 1], not {}",
        args.energy
    );
    let limits = args.limits.limits();
    let (pkg, version) = AdapterPackage::read(&args.file, &limits)?;
    let file_bytes = std::fs::metadata(&args.file)?.len();
    let meta = pkg.meta.clone();
    let targets = pkg.targets();
    let adapter = Adapter::from_package(format!("inspect@{version}"), pkg)
        .with_context(|| format!("making {} resident", args.file.display()))?;
    let mut factor_params = 0u64;
    let mut full_params = 0u64;
    let mut ranks = Vec::new();
    for site in &targets {
        let lr = adapter.factors(site).expect("a listed target");
        let (inp, outp) = (lr.in_features(), lr.out_features());
        factor_params += params::factor_parameters(lr.rank(), inp, outp) as u64;
        full_params += params::full_update_parameters(inp, outp) as u64;
        let sv = singular_values(lr)
            .with_context(|| format!("singular values of {site} in {}", args.file.display()))?;
        ranks.push((site, outp, inp, energy_rank(&sv, args.energy), sv));
    }
    let share = 100.0 * factor_params as f64 / full_params.max(1) as f64;
    if args.json {
        let value = json!({
            "file": args.file.display().to_string(),
            "version": version,
            "task": meta.task.as_str(),
            "base_fingerprint": meta.base_fingerprint,
            "rank": meta.rank,
            "alpha": meta.alpha,
            "scale": meta.scale(),
            "labels": meta.labels,
            "description": meta.description,
            "targets": targets.iter().map(|s| s.to_string()).collect::<Vec<_>>(),
            "factor_parameters": factor_params,
            "full_update_parameters": full_params,
            "file_bytes": file_bytes,
            "resident_bytes": adapter.resident_bytes(),
            "energy": args.energy,
            "numerical_rank": ranks.iter().map(|(site, o, i, k, sv)| json!({
                "target": site.to_string(),
                "shape": [o, i],
                "rank": k,
                "singular_values": sv,
            })).collect::<Vec<_>>(),
        });
        writeln!(out, "{}", serde_json::to_string_pretty(&value)?)?;
        return Ok(());
    }
    writeln!(out, "adapter package {}", args.file.display())?;
    writeln!(out, "  version           {version}")?;
    writeln!(out, "  task              {}", meta.task)?;
    writeln!(out, "  base fingerprint  {}", meta.base_fingerprint)?;
    writeln!(out, "  rank              {}", meta.rank)?;
    writeln!(
        out,
        "  alpha             {} (scale s = alpha / rank = {})",
        meta.alpha,
        meta.scale()
    )?;
    if !meta.labels.is_empty() {
        writeln!(out, "  labels            {}", meta.labels.join(", "))?;
    }
    if !meta.description.is_empty() {
        writeln!(out, "  description       {}", meta.description)?;
    }
    writeln!(
        out,
        "  targets           {} matrices: {}",
        targets.len(),
        summarise_targets(&targets)
    )?;
    writeln!(
        out,
        "  parameters        {} in the factors, against {} for a full update of the same matrices ({share:.2}%)",
        grouped(factor_params),
        grouped(full_params)
    )?;
    writeln!(
        out,
        "  bytes             {} file ({}), {} resident as factors",
        grouped(file_bytes),
        human_bytes(file_bytes),
        human_bytes(adapter.resident_bytes() as u64)
    )?;
    writeln!(
        out,
        "  numerical rank of s·B·A: singular values carrying {}% of the energy",
        args.energy * 100.0
    )?;
    for (site, o, i, k, sv) in &ranks {
        let largest = sv.first().copied().unwrap_or(0.0);
        let smallest = sv.last().copied().unwrap_or(0.0);
        writeln!(
            out,
            "    {:<24} [{o} x {i}]  {k} of {}   largest σ {largest:.4}, smallest σ {smallest:.4}",
            site.to_string(),
            sv.len()
        )?;
    }
    Ok(())
}

/// `attn.q, attn.v in layers 0-5` when every module covers the same contiguous layers; the
/// plain list otherwise.
fn summarise_targets(targets: &[switchyard_adapters::Site]) -> String {
    use std::collections::BTreeMap;
    let mut by_module: BTreeMap<_, Vec<usize>> = BTreeMap::new();
    for s in targets {
        by_module.entry(s.module).or_default().push(s.layer);
    }
    let layer_sets: Vec<&Vec<usize>> = by_module.values().collect();
    let same = layer_sets.windows(2).all(|w| w[0] == w[1]);
    let first = layer_sets.first().map(|v| v.as_slice()).unwrap_or(&[]);
    let contiguous = first.windows(2).all(|w| w[1] == w[0] + 1);
    if same && contiguous && !first.is_empty() {
        let modules: Vec<String> = by_module.keys().map(|m| m.to_string()).collect();
        let layers = if first.len() == 1 {
            format!("layer {}", first[0])
        } else {
            format!("layers {}-{}", first[0], first[first.len() - 1])
        };
        format!("{} in {layers}", modules.join(", "))
    } else {
        targets
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>()
            .join(", ")
    }
}
