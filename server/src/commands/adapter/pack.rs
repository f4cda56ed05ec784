//! `switchyard adapter pack`: builds a package from any safetensors file of factor tensors. The
//! user's rename rules map their tensor names onto ours (see `switchyard_adapters::rename`), the
//! flags give the rank, alpha, task and base, and the result is checked like any package, so an
//! adapter trained elsewhere comes in without switchyard knowing the format it came from.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::PathBuf;

use anyhow::{Context, bail};
use candle_core::{DType, Device, Tensor};
use switchyard_adapters::rename::{RenameRule, rename};
use switchyard_adapters::site::Factor;
use switchyard_adapters::{AdapterPackage, PackageMeta, Site, Task};

use super::base::{LimitArgs, base_spec};
use super::rules::RuleFile;

fn parse_rule(text: &str) -> Result<RenameRule, String> {
    RenameRule::parse(text).map_err(|e| e.to_string())
}

fn parse_task(text: &str) -> Result<Task, String> {
    Task::parse(text)
        .ok_or_else(|| format!("unknown task {text:?}; use generate, embed or classify"))
}

#[derive(Debug, Clone, clap::Args)]
#[command(group = clap::ArgGroup::new("base").required(true).args(["fingerprint", "model"]))]
#[command(group = clap::ArgGroup::new("naming").required(true).multiple(true).args(["rules", "rule_file"]))]
pub struct PackArgs {
    /// A safetensors file holding the factor tensors (any names, any float dtype).
    pub input: PathBuf,
    /// Where to write the package.
    #[arg(long, short)]
    pub output: PathBuf,
    /// PATTERN=TEMPLATE: renames tensors matching PATTERN to TEMPLATE, e.g.
    /// 'blocks.{layer}.wq.down=layers.{layer}.attn.q.A'. A {word} in the pattern matches one or
    /// more characters other than '.'. Repeatable; the first matching rule wins. Targets are
    /// layers.N.MODULE.A [r, in] / .B [out, r], MODULE one of attn.q attn.k attn.v attn.o
    /// mlp.gate mlp.up mlp.down, plus head.weight and head.bias.
    #[arg(long = "rename", value_name = "PATTERN=TEMPLATE", value_parser = parse_rule)]
    pub rules: Vec<RenameRule>,
    /// A rule file for a whole layout instead of --rename flags: a built-in name (common-bert,
    /// common-llama: adapters as the common LoRA training library saves them) or a path to one (see
    /// config/rename/). Its rules apply after any --rename rules; rank and alpha come from the
    /// settings file it names beside the input (for those two: the library's JSON config) unless given here.
    #[arg(long = "rules", value_name = "NAME-OR-PATH")]
    pub rule_file: Option<String>,
    /// The rank r (rows of every A); from the rule file's settings, else the factors, when
    /// omitted.
    #[arg(long)]
    pub rank: Option<usize>,
    /// The LoRA alpha; the update is scaled by alpha / rank. Required unless the rule file
    /// reads it.
    #[arg(long)]
    pub alpha: Option<f64>,
    /// What the adapter is for: generate, embed or classify.
    #[arg(long, value_parser = parse_task)]
    pub task: Task,
    /// The base fingerprint to stamp (as `switchyard adapter inspect` shows it).
    #[arg(long)]
    pub fingerprint: Option<String>,
    /// Take the fingerprint from this base model folder, and check the package against it.
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// Comma-separated labels of a classification head, in row order.
    #[arg(long, value_delimiter = ',')]
    pub labels: Vec<String>,
    /// Free text stored with the package.
    #[arg(long, default_value = "")]
    pub description: String,
    /// Leave out input tensors no rule matches, instead of refusing them.
    #[arg(long)]
    pub drop_unmatched: bool,
    #[command(flatten)]
    pub limits: LimitArgs,
}

pub fn run(args: &PackArgs, mut out: impl Write) -> anyhow::Result<()> {
    let limits = args.limits.limits();
    let spec = match &args.model {
        Some(dir) => Some(
            base_spec(dir).with_context(|| format!("loading the base model {}", dir.display()))?,
        ),
        None => None,
    };
    let file_rules = args.rule_file.as_deref().map(RuleFile::load).transpose()?;
    let settings = match &file_rules {
        Some(f) => f.read_settings(&args.input)?,
        None => Default::default(),
    };
    let rules: Vec<RenameRule> = args
        .rules
        .iter()
        .chain(file_rules.iter().flat_map(|f| f.rules.iter()))
        .cloned()
        .collect();
    let alpha = args
        .alpha
        .or(settings.alpha)
        .with_context(|| match &file_rules {
            Some(f) => format!("give --alpha: the rule file {} does not read one", f.source),
            None => "give --alpha (or --rules with a rule file that reads it)".to_owned(),
        })?;
    let rank = args.rank.or(settings.rank);
    let input = candle_core::safetensors::load(&args.input, &Device::Cpu)
        .with_context(|| format!("reading {} as safetensors", args.input.display()))?;
    let mut names: Vec<&String> = input.keys().collect();
    names.sort();
    let mut renamed: BTreeMap<String, (String, Tensor)> = BTreeMap::new();
    let mut unmatched = Vec::new();
    for name in names {
        let Some(new) = rename(&rules, name) else {
            unmatched.push(name.as_str());
            continue;
        };
        if Site::parse_tensor_name(&new).is_none() && new != "head.weight" && new != "head.bias" {
            bail!(
                "{}: a rule renames `{name}` to `{new}`, which is not a canonical name (layers.N.MODULE.A or .B, head.weight, head.bias)",
                args.input.display()
            );
        }
        if let Some((first, _)) = renamed.get(&new) {
            bail!(
                "{}: both `{first}` and `{name}` are renamed to `{new}`",
                args.input.display()
            );
        }
        let tensor = input[name]
            .to_dtype(DType::F32)
            .with_context(|| format!("converting `{name}` to f32"))?;
        renamed.insert(new, (name.clone(), tensor));
    }
    if !unmatched.is_empty() && !args.drop_unmatched {
        let shown: Vec<&str> = unmatched.iter().take(8).copied().collect();
        bail!(
            "{}: {} tensor(s) match no rename rule: {}{}; add a rule for them or pass --drop-unmatched",
            args.input.display(),
            unmatched.len(),
            shown.join(", "),
            if unmatched.len() > shown.len() {
                ", ..."
            } else {
                ""
            }
        );
    }
    let pkg = build(
        args,
        (rank, alpha),
        renamed,
        spec.as_ref().map(|s| s.fingerprint.clone()),
    )?;
    let bytes = pkg.to_bytes()?;
    let file = args.output.display().to_string();
    // Read back as any package is, so a bad pack is refused here and not at publish time.
    let checked = AdapterPackage::from_bytes(&bytes, &file, &limits)?;
    if let Some(spec) = &spec {
        checked.validate(&file, spec, &limits)?;
    }
    std::fs::write(&args.output, &bytes)
        .with_context(|| format!("writing {}", args.output.display()))?;
    writeln!(
        out,
        "packed {} factor pairs{} from {} into {} (version {}, rank {}, alpha {}, task {}){}",
        checked.factors.len(),
        if checked.head.is_some() {
            " and a head"
        } else {
            ""
        },
        args.input.display(),
        file,
        switchyard_adapters::package::content_version(&bytes),
        checked.meta.rank,
        checked.meta.alpha,
        checked.meta.task,
        if unmatched.is_empty() {
            String::new()
        } else {
            format!("; left out {} unmatched tensor(s)", unmatched.len())
        }
    )?;
    Ok(())
}

fn build(
    args: &PackArgs,
    (rank, alpha): (Option<usize>, f64),
    renamed: BTreeMap<String, (String, Tensor)>,
    model_fingerprint: Option<String>,
) -> anyhow::Result<AdapterPackage> {
    let mut a_parts = BTreeMap::new();
    let mut b_parts = BTreeMap::new();
    let mut head_w = None;
    let mut head_b = None;
    for (new, (_, tensor)) in renamed {
        match new.as_str() {
            "head.weight" => head_w = Some(tensor),
            "head.bias" => head_b = Some(tensor),
            _ => match Site::parse_tensor_name(&new).expect("checked canonical") {
                (site, Factor::A) => {
                    a_parts.insert(site, tensor);
                }
                (site, Factor::B) => {
                    b_parts.insert(site, tensor);
                }
            },
        }
    }
    let rank = match rank {
        Some(r) => r,
        None => a_parts
            .values()
            .next()
            .and_then(|a| a.dims().first().copied())
            .context("no factor tensors after renaming; check the --rename rules")?,
    };
    let mut factors = BTreeMap::new();
    for (site, a) in a_parts {
        let b = b_parts
            .remove(&site)
            .with_context(|| format!("`{site}` has an A factor but no B after renaming"))?;
        factors.insert(site, (a, b));
    }
    if let Some(site) = b_parts.keys().next() {
        bail!("`{site}` has a B factor but no A after renaming");
    }
    let head = match (head_w, head_b) {
        (Some(w), Some(b)) => Some((w, b)),
        (None, None) => None,
        _ => bail!("a head needs both head.weight and head.bias"),
    };
    let base_fingerprint = model_fingerprint
        .or_else(|| args.fingerprint.clone())
        .expect("clap requires --fingerprint or --model");
    Ok(AdapterPackage {
        meta: PackageMeta {
            base_fingerprint,
            rank,
            alpha,
            task: args.task,
            labels: args.labels.clone(),
            description: args.description.clone(),
        },
        factors,
        head,
    })
}
