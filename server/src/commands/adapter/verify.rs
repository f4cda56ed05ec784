//! `switchyard adapter verify FILE --model DIR`: checks a package against every rule of the
//! format and against the base model it will run on. Exit status 0 when it passes, 1 when it
//! does not; the refusal names the file, the tensor and the rule.

use std::io::Write;
use std::path::PathBuf;

use anyhow::Context;
use switchyard_adapters::AdapterPackage;
use switchyard_adapters::package::RULES;

use super::base::{LimitArgs, base_spec};

#[derive(Debug, Clone, clap::Args)]
pub struct VerifyArgs {
    /// The adapter package (.safetensors) to check.
    pub file: PathBuf,
    /// The base model folder it must fit (config.json, *.safetensors, tokenizer.json; an
    /// encoder with model_type bert or a decoder with model_type llama).
    #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
    pub model: PathBuf,
    #[command(flatten)]
    pub limits: LimitArgs,
}

pub fn run(args: &VerifyArgs, mut out: impl Write) -> anyhow::Result<()> {
    let limits = args.limits.limits();
    let spec = base_spec(&args.model)
        .with_context(|| format!("loading the base model {}", args.model.display()))?;
    let file = args.file.display().to_string();
    let (pkg, version) = AdapterPackage::read(&args.file, &limits)?;
    pkg.validate(&file, &spec, &limits)?;
    writeln!(
        out,
        "ok: {file} (version {version}, rank {}, {} targets) fits base {} ({}, fingerprint {})",
        pkg.meta.rank,
        pkg.factors.len(),
        args.model.display(),
        spec.model_type,
        spec.fingerprint
    )?;
    writeln!(out, "rules passed: {}", RULES.join(", "))?;
    Ok(())
}
