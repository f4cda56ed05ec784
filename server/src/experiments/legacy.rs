//! Earlier versions kept split definitions (and nothing else: tallies lived in memory) in
//! `splits.json` in the store folder. [`migrate`] moves them into the experiment store once: each
//! split the store does not have yet is written there, then the file is renamed to
//! `splits.json.migrated`, so it is not read again. A crash between the two steps only means the
//! next start finds the file again and skips the splits already moved.

use std::path::Path;

use anyhow::Context;

use crate::splits::{Split, SplitSpec};

use super::{ExperimentStore, now_ms};

/// The file earlier versions wrote, in the store folder.
pub const LEGACY_FILE: &str = "splits.json";

/// What [`LEGACY_FILE`] is renamed to once its splits are in the experiment store.
pub const MIGRATED_FILE: &str = "splits.json.migrated";

/// Moves the splits of `<store_dir>/splits.json` into `store`; returns how many it wrote.
pub fn migrate(store_dir: &Path, store: &dyn ExperimentStore) -> anyhow::Result<usize> {
    let path = store_dir.join(LEGACY_FILE);
    if !path.is_file() {
        return Ok(0);
    }
    let text =
        std::fs::read_to_string(&path).with_context(|| format!("reading {}", path.display()))?;
    let specs: Vec<SplitSpec> = serde_json::from_str(&text)
        .with_context(|| format!("reading the splits in {}", path.display()))?;
    let mut moved = 0;
    for spec in specs {
        let split = Split::new(spec).with_context(|| format!("a split in {}", path.display()))?;
        if store.split(split.name())?.is_none() {
            store.put_split(split.spec(), None, now_ms())?;
            moved += 1;
        }
    }
    let done = store_dir.join(MIGRATED_FILE);
    std::fs::rename(&path, &done)
        .with_context(|| format!("renaming {} to {}", path.display(), done.display()))?;
    std::fs::File::open(store_dir)
        .and_then(|dir| dir.sync_all())
        .with_context(|| format!("syncing {}", store_dir.display()))?;
    tracing::info!(splits = moved, from = %path.display(), "split definitions moved into the experiment store");
    Ok(moved)
}
