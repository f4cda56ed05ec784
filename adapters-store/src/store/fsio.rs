//! The file-system steps the store is built from: replacing a file atomically (temporary file,
//! fsync, rename, fsync of the folder) and holding the advisory lock that serialises writers of
//! one adapter across processes.

use std::fs::{File, OpenOptions};
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::sync::{AtomicU64, Ordering};

use super::StoreError;

/// Prefix of the store's temporary files; anything so named is an unfinished write.
pub const TEMP_PREFIX: &str = ".incoming-";

/// Name of the per-adapter lock file.
pub const LOCK_FILE: &str = ".lock";

fn io_err(path: &Path, action: &'static str) -> impl FnOnce(std::io::Error) -> StoreError {
    let path = path.to_owned();
    move |source| StoreError::Io {
        path,
        action,
        source,
    }
}

/// Makes a folder's entries (a rename, a new file) durable.
pub fn sync_dir(dir: &Path) -> Result<(), StoreError> {
    #[cfg(unix)]
    {
        File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(io_err(dir, "syncing the folder"))?;
    }
    #[cfg(not(unix))]
    let _ = dir;
    Ok(())
}

/// Writes `bytes` to `target` so that a reader sees either the old file or the whole new one:
/// a temporary file in the same folder, fsync, rename over `target`, fsync of the folder.
pub fn replace_atomically(target: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    static COUNTER: AtomicU64 = AtomicU64::new(0);
    let dir = target.parent().expect("store paths have a parent folder");
    let temp: PathBuf = dir.join(format!(
        "{TEMP_PREFIX}{}-{}.tmp",
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    ));
    let result = (|| {
        let mut f = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&temp)
            .map_err(io_err(&temp, "creating a temporary file"))?;
        f.write_all(bytes)
            .map_err(io_err(&temp, "writing a temporary file"))?;
        f.sync_all()
            .map_err(io_err(&temp, "syncing a temporary file"))?;
        std::fs::rename(&temp, target).map_err(io_err(target, "renaming into place"))?;
        sync_dir(dir)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&temp);
    }
    result
}

/// Removes temporary files a crashed writer left behind, and returns how many. Only called
/// while holding the adapter's lock, when no other writer of this adapter can be mid-write.
pub fn remove_stale_temps(dir: &Path) -> usize {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    let mut removed = 0;
    for entry in entries.flatten() {
        if entry.file_name().to_string_lossy().starts_with(TEMP_PREFIX)
            && std::fs::remove_file(entry.path()).is_ok()
        {
            removed += 1;
        }
    }
    if removed > 0 {
        let _ = sync_dir(dir);
    }
    removed
}

/// An exclusive advisory lock on one adapter's folder, held until dropped. Other processes (and
/// other threads, which open their own descriptor) wait for it.
#[derive(Debug)]
pub struct AdapterLock {
    _file: File,
}

impl AdapterLock {
    pub fn acquire(dir: &Path) -> Result<Self, StoreError> {
        let path = dir.join(LOCK_FILE);
        let file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(io_err(&path, "opening the lock file"))?;
        // Called through the trait: std's inherent `File::lock` is newer than this workspace's
        // minimum Rust version.
        fs4::FileExt::lock(&file).map_err(io_err(&path, "locking"))?;
        Ok(Self { _file: file })
    }
}
