//! The store commands: `publish`, `list`, `live`, `rollback` and `retire`, each on a store
//! folder (`--store`, or `SWITCHYARD_STORE_DIR`). A server watching the same folder follows
//! every change within a second.

use std::io::Write;
use std::path::PathBuf;

use anyhow::Context;
use switchyard_adapters::AdapterName;
use switchyard_adapters::store::Store;

use super::base::{LimitArgs, base_spec, grouped, utc};

/// The store folder and the adapter name every store command takes.
#[derive(Debug, Clone, clap::Args)]
pub struct Target {
    /// The store folder: one folder per adapter, one file per version.
    #[arg(long, env = "SWITCHYARD_STORE_DIR", value_name = "DIR")]
    pub store: PathBuf,
    /// The adapter: lowercase letters, digits and '-', at most 64 characters, not `base`.
    #[arg(long, value_parser = parse_name)]
    pub name: AdapterName,
}

fn parse_name(text: &str) -> Result<AdapterName, String> {
    AdapterName::new(text).map_err(|e| e.to_string())
}

#[derive(Debug, Clone, clap::Args)]
pub struct PublishArgs {
    /// The package (.safetensors) to store as a new version and make live.
    pub file: PathBuf,
    #[command(flatten)]
    pub target: Target,
    /// Also check the package against this base model folder before storing it.
    #[arg(long)]
    pub model: Option<PathBuf>,
    #[command(flatten)]
    pub limits: LimitArgs,
}

#[derive(Debug, Clone, clap::Args)]
pub struct ListArgs {
    /// The store folder.
    #[arg(long, env = "SWITCHYARD_STORE_DIR", value_name = "DIR")]
    pub store: PathBuf,
    /// List this adapter's versions instead of every adapter.
    #[arg(long, value_parser = parse_name)]
    pub name: Option<AdapterName>,
}

#[derive(Debug, Clone, clap::Args)]
pub struct LiveArgs {
    #[command(flatten)]
    pub target: Target,
    /// Make this stored version live (the one live now becomes the rollback target).
    #[arg(long, value_name = "VERSION")]
    pub set: Option<String>,
}

#[derive(Debug, Clone, clap::Args)]
pub struct RetireArgs {
    #[command(flatten)]
    pub target: Target,
    /// The version to delete; refused while it is live.
    pub version: String,
}

fn open(store: &std::path::Path) -> anyhow::Result<Store> {
    Store::open(store, Default::default()).map_err(anyhow::Error::from)
}

pub fn publish(args: &PublishArgs, mut out: impl Write) -> anyhow::Result<()> {
    let limits = args.limits.limits();
    let spec = match &args.model {
        Some(dir) => Some(
            base_spec(dir).with_context(|| format!("loading the base model {}", dir.display()))?,
        ),
        None => None,
    };
    let store = Store::create(&args.target.store, limits)?;
    let published = store
        .publish_file(&args.target.name, &args.file, spec.as_ref())
        .with_context(|| {
            format!(
                "publishing {} as {} in {}",
                args.file.display(),
                args.target.name,
                args.target.store.display()
            )
        })?;
    writeln!(out, "published {}@{}", published.name, published.version)?;
    match (&published.replaced, published.new_file) {
        (Some(old), _) => writeln!(out, "live now; replaced {old}, which `rollback` returns to")?,
        (None, true) => writeln!(out, "live now; the first version of {}", published.name)?,
        (None, false) => writeln!(out, "already stored and live; nothing changed")?,
    }
    Ok(())
}

pub fn list(args: &ListArgs, mut out: impl Write) -> anyhow::Result<()> {
    let store = open(&args.store)?;
    match &args.name {
        None => {
            let names = store.names()?;
            if names.is_empty() {
                writeln!(out, "no adapters in {}", args.store.display())?;
                return Ok(());
            }
            writeln!(
                out,
                "{:<32} {:<18} {:>8}",
                "ADAPTER", "LIVE VERSION", "VERSIONS"
            )?;
            for name in names {
                let live = store.live(&name)?;
                let count = store.versions(&name)?.len();
                writeln!(out, "{:<32} {live:<18} {count:>8}", name.as_str())?;
            }
        }
        Some(name) => {
            writeln!(
                out,
                "{:<18} {:>14}  {:<21} STATE",
                "VERSION", "BYTES", "STORED (UTC)"
            )?;
            for v in store.versions(name)? {
                let state = match (v.live, v.history_index) {
                    (true, _) => "live".to_owned(),
                    (false, Some(0)) => "next rollback".to_owned(),
                    (false, Some(i)) => format!("rollback {}", i + 1),
                    (false, None) => String::new(),
                };
                writeln!(
                    out,
                    "{:<18} {:>14}  {:<21} {state}",
                    v.version,
                    grouped(v.bytes),
                    utc(v.stored_at)
                )?;
            }
        }
    }
    Ok(())
}

pub fn live(args: &LiveArgs, mut out: impl Write) -> anyhow::Result<()> {
    let store = open(&args.target.store)?;
    let name = &args.target.name;
    match &args.set {
        None => writeln!(out, "{name}@{}", store.live(name)?)?,
        Some(version) => {
            let before = store.live(name)?;
            let pointer = store.set_live(name, version)?;
            if before == pointer.live {
                writeln!(out, "{name}@{} was live already", pointer.live)?;
            } else {
                writeln!(out, "{name}@{} is live (was {before})", pointer.live)?;
            }
        }
    }
    Ok(())
}

pub fn rollback(args: &Target, mut out: impl Write) -> anyhow::Result<()> {
    let store = open(&args.store)?;
    let before = store.live(&args.name)?;
    let pointer = store.rollback(&args.name)?;
    writeln!(
        out,
        "{}@{} is live (rolled back from {before})",
        args.name, pointer.live
    )?;
    Ok(())
}

pub fn retire(args: &RetireArgs, mut out: impl Write) -> anyhow::Result<()> {
    let store = open(&args.target.store)?;
    store.retire(&args.target.name, &args.version)?;
    writeln!(out, "retired {}@{}", args.target.name, args.version)?;
    Ok(())
}
