//! The local disk cache of package files in front of an object store: the tier between the
//! object store and resident factors (object store → disk → factors → merged).
//!
//! ```text
//! <cache>/<name>/<version>.safetensors   a copy of one stored version, checked against its hash
//! ```
//!
//! A file is fetched on the first read of its version and kept while the cache holds at most
//! `max_bytes`; past that the least recently read files are removed. Versions are immutable, so a
//! cached file never goes stale: it is only ever evicted. Every file enters through
//! [`replace_atomically`] after its content hash matched its version, so a crash leaves at worst a
//! temporary file, removed when the cache opens. A reader opens the file while the cache's lock
//! is held and reads it after, so an eviction in between cannot pull it away.

use std::collections::HashMap;
use std::io::Read;
use std::path::{Path, PathBuf};

use crate::names::{AdapterName, is_version};
use crate::package::content_version;
use crate::sync::{AtomicU64, Mutex, Ordering};

use super::fsio::{remove_stale_temps, replace_atomically};
use super::{StoreError, VERSION_EXT};

/// What the cache holds and has done, for metrics.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct CacheStats {
    /// Reads served from a cached file.
    pub hits: u64,
    /// Reads that fetched the file from the object store.
    pub misses: u64,
    /// Files removed to stay within the budget.
    pub evictions: u64,
    /// Bytes fetched from the object store.
    pub fetched_bytes: u64,
    /// Files cached now.
    pub files: u64,
    /// Bytes cached now.
    pub bytes: u64,
    /// The budget.
    pub max_bytes: u64,
}

type Key = (String, String);

struct Entry {
    bytes: u64,
    last_read: u64,
}

#[derive(Default)]
struct Index {
    entries: HashMap<Key, Entry>,
    bytes: u64,
    clock: u64,
}

/// A byte-bounded folder of package files, least recently read evicted first.
pub struct PackageCache {
    dir: PathBuf,
    max_bytes: u64,
    index: Mutex<Index>,
    hits: AtomicU64,
    misses: AtomicU64,
    evictions: AtomicU64,
    fetched_bytes: AtomicU64,
}

impl std::fmt::Debug for PackageCache {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PackageCache")
            .field("dir", &self.dir)
            .field("max_bytes", &self.max_bytes)
            .finish_non_exhaustive()
    }
}

impl PackageCache {
    /// Opens (creating it when missing) the cache folder, indexes the files a previous run left,
    /// removes unfinished writes, and trims to `max_bytes`.
    pub fn open(dir: &Path, max_bytes: u64) -> Result<Self, StoreError> {
        std::fs::create_dir_all(dir).map_err(|source| StoreError::Io {
            path: dir.to_owned(),
            action: "creating the package cache folder",
            source,
        })?;
        let cache = Self {
            dir: dir.to_owned(),
            max_bytes,
            index: Mutex::new(Index::default()),
            hits: AtomicU64::new(0),
            misses: AtomicU64::new(0),
            evictions: AtomicU64::new(0),
            fetched_bytes: AtomicU64::new(0),
        };
        let mut index = cache.index.lock();
        for adapter in std::fs::read_dir(dir).into_iter().flatten().flatten() {
            let name = adapter.file_name().to_string_lossy().into_owned();
            if AdapterName::new(&name).is_err() || !adapter.path().is_dir() {
                continue;
            }
            remove_stale_temps(&adapter.path());
            for file in std::fs::read_dir(adapter.path())
                .into_iter()
                .flatten()
                .flatten()
            {
                let file_name = file.file_name().to_string_lossy().into_owned();
                let Some(version) = file_name.strip_suffix(&format!(".{VERSION_EXT}")) else {
                    continue;
                };
                let Ok(md) = file.metadata() else { continue };
                if is_version(version) {
                    index.bytes += md.len();
                    index.entries.insert(
                        (name.clone(), version.to_owned()),
                        Entry {
                            bytes: md.len(),
                            last_read: 0,
                        },
                    );
                }
            }
        }
        cache.trim(&mut index, None);
        drop(index);
        Ok(cache)
    }

    fn path(&self, name: &str, version: &str) -> PathBuf {
        self.dir.join(name).join(format!("{version}.{VERSION_EXT}"))
    }

    /// The bytes of `name@version`: from the cached file, or else from `download`, whose bytes
    /// must hash to `version` (they are refused otherwise) and are then cached.
    pub fn read(
        &self,
        name: &AdapterName,
        version: &str,
        download: impl FnOnce() -> Result<Vec<u8>, StoreError>,
    ) -> Result<Vec<u8>, StoreError> {
        let key = (name.as_str().to_owned(), version.to_owned());
        let path = self.path(&key.0, &key.1);
        {
            let mut index = self.index.lock();
            index.clock += 1;
            let now = index.clock;
            if let Some(entry) = index.entries.get_mut(&key) {
                // Opened under the lock: an eviction after this point unlinks a file we hold.
                if let Ok(mut file) = std::fs::File::open(&path) {
                    entry.last_read = now;
                    drop(index);
                    let mut bytes = Vec::new();
                    file.read_to_end(&mut bytes)
                        .map_err(|source| StoreError::Io {
                            path: path.clone(),
                            action: "reading a cached package",
                            source,
                        })?;
                    self.hits.fetch_add(1, Ordering::Relaxed);
                    return Ok(bytes);
                }
                // Removed behind our back: forget it and fetch again.
                let gone = index.entries.remove(&key).map_or(0, |e| e.bytes);
                index.bytes -= gone;
            }
        }
        self.misses.fetch_add(1, Ordering::Relaxed);
        let bytes = download()?;
        self.fetched_bytes
            .fetch_add(bytes.len() as u64, Ordering::Relaxed);
        let actual = content_version(&bytes);
        if actual != version {
            return Err(StoreError::CorruptObject {
                location: format!("{name}@{version}"),
                problem: format!("its bytes hash to {actual}"),
            });
        }
        let folder = self.dir.join(name.as_str());
        std::fs::create_dir_all(&folder).map_err(|source| StoreError::Io {
            path: folder.clone(),
            action: "creating a package cache folder",
            source,
        })?;
        replace_atomically(&path, &bytes)?;
        let mut index = self.index.lock();
        index.clock += 1;
        let now = index.clock;
        let size = bytes.len() as u64;
        let old = index.entries.insert(
            key.clone(),
            Entry {
                bytes: size,
                last_read: now,
            },
        );
        index.bytes = index.bytes - old.map_or(0, |e| e.bytes) + size;
        self.trim(&mut index, Some(&key));
        Ok(bytes)
    }

    /// Removes least recently read files until the cache fits its budget, keeping `keep` (the
    /// file just fetched, which its reader holds in memory already).
    fn trim(&self, index: &mut Index, keep: Option<&Key>) {
        while index.bytes > self.max_bytes {
            let Some(victim) = index
                .entries
                .iter()
                .filter(|(k, _)| Some(*k) != keep)
                .min_by_key(|(_, e)| e.last_read)
                .map(|(k, _)| k.clone())
            else {
                break;
            };
            let entry = index.entries.remove(&victim).expect("victim is indexed");
            index.bytes -= entry.bytes;
            let _ = std::fs::remove_file(self.path(&victim.0, &victim.1));
            self.evictions.fetch_add(1, Ordering::Relaxed);
        }
        if keep.is_some_and(|k| index.bytes > self.max_bytes && index.entries.contains_key(k)) {
            // One file over the whole budget: served from memory this once, not kept.
            let k = keep.expect("checked");
            let entry = index.entries.remove(k).expect("checked");
            index.bytes -= entry.bytes;
            let _ = std::fs::remove_file(self.path(&k.0, &k.1));
            self.evictions.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// Forgets and removes a cached version (it was retired).
    pub fn forget(&self, name: &AdapterName, version: &str) {
        let mut index = self.index.lock();
        let key = (name.as_str().to_owned(), version.to_owned());
        if let Some(entry) = index.entries.remove(&key) {
            index.bytes -= entry.bytes;
            let _ = std::fs::remove_file(self.path(&key.0, &key.1));
        }
    }

    pub fn stats(&self) -> CacheStats {
        let index = self.index.lock();
        CacheStats {
            hits: self.hits.load(Ordering::Relaxed),
            misses: self.misses.load(Ordering::Relaxed),
            evictions: self.evictions.load(Ordering::Relaxed),
            fetched_bytes: self.fetched_bytes.load(Ordering::Relaxed),
            files: index.entries.len() as u64,
            bytes: index.bytes,
            max_bytes: self.max_bytes,
        }
    }
}
