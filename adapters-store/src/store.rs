//! The adapter store on local disk: every version of every adapter, and which version is live.
//!
//! ```text
//! <store>/<name>/<version>.safetensors   one immutable file per version (version = content hash)
//! <store>/<name>/live                    the pointer: live version and rollback history
//! <store>/<name>/.lock                   advisory lock serialising writers of this adapter
//! ```
//!
//! Writers (publish, set live, rollback, retire) take the adapter's lock, so two processes never
//! interleave their steps; every file they write is replaced atomically (`fsio`), and a version
//! file is in place and synced before any pointer names it. Readers take no lock: the rename
//! guarantees they see one whole pointer, and the pointer only ever names versions on disk.
//! Retiring the live version is refused, and retiring an older one drops it from the history.
//!
//! The same operations run against an S3-compatible object store (`store::remote`), for several
//! replicas sharing one store: there the pointer is replaced by a conditional write instead of
//! under a lock, and reads go through a byte-bounded local cache of package files (`store::cache`).
//! [`Store::open`] and [`Store::create`] give the disk store, [`Store::open_remote`] the other.

mod cache;
mod fsio;
mod pointer;
mod remote;

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::SystemTime;

use crate::fingerprint::BaseSpec;
use crate::names::{AdapterName, NameError, is_version};
use crate::package::{
    AdapterPackage, Limits, PackageBytes, PackageError, PackageMeta, content_version,
};
use crate::site::Site;

pub use cache::CacheStats;
pub use fsio::{LOCK_FILE, TEMP_PREFIX};
pub use pointer::{HISTORY_LEN, Pointer};
pub use remote::{CONFLICT_ATTEMPTS, RemoteConfig};

use cache::PackageCache;
use remote::Remote;

use fsio::{AdapterLock, remove_stale_temps, replace_atomically, sync_dir};

/// Name of the pointer file in each adapter's folder.
pub const POINTER_FILE: &str = "live";

/// Extension of a version file.
pub const VERSION_EXT: &str = "safetensors";

/// Why a store operation was refused.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error(transparent)]
    Name(#[from] NameError),
    #[error(
        "{version:?} is not a version; a version is 16 lowercase hex digits, as `switchyard adapter list` prints them"
    )]
    BadVersion { version: String },
    #[error("the store folder {path} does not exist")]
    NoStore { path: PathBuf },
    #[error("no adapter {name:?} in the store {store}")]
    UnknownAdapter { name: String, store: PathBuf },
    #[error("adapter {name:?} has no version {version} in the store {store}")]
    UnknownVersion {
        name: String,
        version: String,
        store: PathBuf,
    },
    #[error("adapter {name:?} has no earlier live version to roll back to")]
    NothingToRollBack { name: String },
    #[error(
        "version {version} of {name:?} is live; set another version live (or roll back) before retiring it"
    )]
    RetireLive { name: String, version: String },
    #[error("pointer file {path}: line {line}: {problem}")]
    CorruptPointer {
        path: PathBuf,
        line: usize,
        problem: String,
    },
    #[error("{path}: {action}: {source}")]
    Io {
        path: PathBuf,
        action: &'static str,
        source: std::io::Error,
    },
    #[error(transparent)]
    Package(#[from] PackageError),
    #[error("{location}: {action}: {source}")]
    Remote {
        location: String,
        action: &'static str,
        source: Box<object_store::Error>,
    },
    #[error(
        "adapter {name:?} was changed by another writer {attempts} times while this change was applied; nothing was changed, try again"
    )]
    Conflict { name: String, attempts: usize },
    #[error("{location}: {problem}")]
    CorruptObject { location: String, problem: String },
}

impl StoreError {
    /// True when a write failed because the disk (or the writer's quota) is full.
    pub fn is_storage_full(&self) -> bool {
        matches!(
            self,
            StoreError::Io { source, .. }
                if matches!(
                    source.kind(),
                    std::io::ErrorKind::StorageFull | std::io::ErrorKind::QuotaExceeded
                )
        )
    }
}

/// What a publish did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Published {
    pub name: AdapterName,
    pub version: String,
    /// The version this one replaced as live; `None` when there was none, or when these bytes
    /// were live already.
    pub replaced: Option<String>,
    /// False when these exact bytes were already stored (the file was not written again).
    pub new_file: bool,
    /// These exact bytes were live already: nothing changed.
    pub unchanged: bool,
}

/// One stored version, as listed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct VersionInfo {
    pub version: String,
    pub bytes: u64,
    pub stored_at: SystemTime,
    pub live: bool,
    /// Position in the rollback history (0 = the next rollback's target).
    pub history_index: Option<usize>,
}

/// One stored version with its package metadata.
#[derive(Debug, Clone)]
pub struct VersionDetails {
    pub info: VersionInfo,
    pub meta: PackageMeta,
    pub targets: Vec<Site>,
}

/// The store: a folder on local disk, or an object store (with a local cache folder).
#[derive(Debug, Clone)]
pub struct Store {
    /// The store folder; for an object store, the package cache folder.
    root: PathBuf,
    limits: Limits,
    remote: Option<Arc<Remote>>,
}

impl Store {
    /// Opens an existing store folder.
    pub fn open(root: &Path, limits: Limits) -> Result<Self, StoreError> {
        if !root.is_dir() {
            return Err(StoreError::NoStore {
                path: root.to_owned(),
            });
        }
        Ok(Self {
            root: root.to_owned(),
            limits,
            remote: None,
        })
    }

    /// Opens the store on an object store, with a local cache of package files in `cache_dir`
    /// (created when missing) holding at most `cache_bytes`. Fails when the bucket cannot be
    /// listed, so a wrong endpoint, bucket or key shows at start.
    pub fn open_remote(
        config: &RemoteConfig,
        cache_dir: &Path,
        cache_bytes: u64,
        limits: Limits,
    ) -> Result<Self, StoreError> {
        let cache = PackageCache::open(cache_dir, cache_bytes)?;
        let remote = Remote::open(config, cache)?;
        tracing::info!(store = %remote.url(), cache = %cache_dir.display(), cache_bytes, "object store opened");
        Ok(Self {
            root: cache_dir.to_owned(),
            limits,
            remote: Some(Arc::new(remote)),
        })
    }

    /// The package cache's counters; `None` for a disk store, which needs no cache.
    pub fn cache_stats(&self) -> Option<CacheStats> {
        self.remote.as_ref().map(|r| r.cache_stats())
    }

    /// Where the store is, for messages: its folder, or `s3://bucket/prefix`.
    pub fn location(&self) -> String {
        match &self.remote {
            Some(r) => r.url().to_owned(),
            None => self.root.display().to_string(),
        }
    }

    /// Opens a store folder, creating it (and its parents) when missing.
    pub fn create(root: &Path, limits: Limits) -> Result<Self, StoreError> {
        std::fs::create_dir_all(root).map_err(|source| StoreError::Io {
            path: root.to_owned(),
            action: "creating the store folder",
            source,
        })?;
        Self::open(root, limits)
    }

    /// The store folder; for an object store, its local package cache folder.
    pub fn root(&self) -> &Path {
        &self.root
    }

    pub fn limits(&self) -> &Limits {
        &self.limits
    }

    fn adapter_dir(&self, name: &AdapterName) -> PathBuf {
        self.root.join(name.as_str())
    }

    fn pointer_path(&self, name: &AdapterName) -> PathBuf {
        self.adapter_dir(name).join(POINTER_FILE)
    }

    /// Path of one version's file on local disk (which may not exist; for an object store, the
    /// place in the cache).
    pub fn version_path(&self, name: &AdapterName, version: &str) -> Result<PathBuf, StoreError> {
        check_version(version)?;
        Ok(self
            .adapter_dir(name)
            .join(format!("{version}.{VERSION_EXT}")))
    }

    /// Validates and stores the package at `path` as a version of `name`, and makes it live.
    /// With `base`, the package is also checked against that base model.
    pub fn publish_file(
        &self,
        name: &AdapterName,
        path: &Path,
        base: Option<&BaseSpec>,
    ) -> Result<Published, StoreError> {
        let bytes = PackageBytes::read(path, &self.limits)?;
        self.publish(name, bytes, &path.display().to_string(), base)
    }

    /// Validates and stores package bytes as a version of `name`, and makes it live; `source`
    /// names the bytes in errors.
    pub fn publish(
        &self,
        name: &AdapterName,
        bytes: PackageBytes,
        source: &str,
        base: Option<&BaseSpec>,
    ) -> Result<Published, StoreError> {
        let version = bytes.version();
        let pkg = AdapterPackage::parse(&bytes, source, &self.limits)?;
        if let Some(base) = base {
            pkg.validate(source, base, &self.limits)?;
        }
        drop(pkg);
        if let Some(remote) = &self.remote {
            let published = remote.publish(name, &version, &bytes)?;
            tracing::info!(adapter = %name, version = %published.version, new_file = published.new_file, store = %remote.url(), "published");
            return Ok(published);
        }
        let dir = self.adapter_dir(name);
        let new_dir = !dir.is_dir();
        if new_dir {
            std::fs::create_dir_all(&dir).map_err(|source| StoreError::Io {
                path: dir.clone(),
                action: "creating the adapter folder",
                source,
            })?;
        }
        let result = self.publish_into(name, &dir, &version, &bytes, new_dir);
        if result.is_err() && new_dir {
            // A first publish that failed (a full disk, say) leaves no empty adapter behind.
            remove_empty_adapter_dir(&self.root, &dir);
        }
        let published = result?;
        tracing::info!(adapter = %name, version = %published.version, new_file = published.new_file, "published");
        Ok(published)
    }

    /// The steps of [`Store::publish`] once the package is valid and the folder exists, under the
    /// adapter's lock. On failure the store is as it was: a version file written by this call is
    /// removed again, and the pointer only changes as the last step.
    fn publish_into(
        &self,
        name: &AdapterName,
        dir: &Path,
        version: &str,
        bytes: &PackageBytes,
        new_dir: bool,
    ) -> Result<Published, StoreError> {
        if new_dir {
            sync_dir(&self.root)?;
        }
        let _lock = AdapterLock::acquire(dir)?;
        remove_stale_temps(dir);
        let target = self.version_path(name, version)?;
        let new_file = !target.is_file();
        if new_file {
            replace_atomically(&target, bytes.as_bytes())?;
        }
        let flipped = (|| {
            let old = self.pointer(name)?;
            let replaced = old
                .as_ref()
                .map(|p| p.live.clone())
                .filter(|live| live != version);
            let next = Pointer::next_live(old.as_ref(), version);
            let unchanged = next.is_none();
            if let Some(next) = next {
                self.write_pointer(name, &next)?;
            }
            Ok((replaced, unchanged))
        })();
        match flipped {
            Ok((replaced, unchanged)) => Ok(Published {
                name: name.clone(),
                version: version.to_owned(),
                replaced,
                new_file,
                unchanged,
            }),
            Err(e) => {
                if new_file {
                    // No pointer names it (the pointer write failed before its rename).
                    let _ = std::fs::remove_file(&target);
                    let _ = sync_dir(dir);
                }
                Err(e)
            }
        }
    }

    /// Removes files that writes interrupted by a crash left behind (temporary files, named
    /// [`TEMP_PREFIX`]...) in every adapter folder, each under its adapter's lock so that no
    /// writer of another process is mid-write. Returns how many it removed.
    pub fn remove_unfinished_writes(&self) -> Result<usize, StoreError> {
        if self.remote.is_some() {
            // Object writes are whole or absent; the cache cleaned its own folder on opening.
            return Ok(0);
        }
        let entries = std::fs::read_dir(&self.root).map_err(|source| StoreError::Io {
            path: self.root.clone(),
            action: "listing the store",
            source,
        })?;
        let mut removed = 0;
        for entry in entries.flatten() {
            let dir = entry.path();
            if !dir.is_dir() || AdapterName::new(&entry.file_name().to_string_lossy()).is_err() {
                continue;
            }
            let _lock = AdapterLock::acquire(&dir)?;
            removed += remove_stale_temps(&dir);
        }
        Ok(removed)
    }

    /// The adapter's pointer, or `None` when the adapter has never been published.
    pub fn pointer(&self, name: &AdapterName) -> Result<Option<Pointer>, StoreError> {
        if let Some(remote) = &self.remote {
            return remote.pointer(name);
        }
        let path = self.pointer_path(name);
        match std::fs::read_to_string(&path) {
            Ok(text) => Pointer::parse(&text, &path).map(Some),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
            Err(source) => Err(StoreError::Io {
                path,
                action: "reading the pointer",
                source,
            }),
        }
    }

    /// The live version of `name`.
    pub fn live(&self, name: &AdapterName) -> Result<String, StoreError> {
        self.pointer(name)?
            .map(|p| p.live)
            .ok_or_else(|| self.unknown(name))
    }

    /// Makes a stored version live; the version live before heads the rollback history.
    pub fn set_live(&self, name: &AdapterName, version: &str) -> Result<Pointer, StoreError> {
        if let Some(remote) = &self.remote {
            check_version(version)?;
            return remote.set_live(name, version, || self.unknown_version(name, version));
        }
        let dir = self.existing_dir(name)?;
        let _lock = AdapterLock::acquire(&dir)?;
        self.require_version(name, version)?;
        let old = self.pointer(name)?;
        match Pointer::next_live(old.as_ref(), version) {
            Some(next) => {
                self.write_pointer(name, &next)?;
                Ok(next)
            }
            None => Ok(old.expect("an unchanged pointer exists")),
        }
    }

    /// Makes the most recent earlier live version live again and drops it from the history.
    pub fn rollback(&self, name: &AdapterName) -> Result<Pointer, StoreError> {
        if let Some(remote) = &self.remote {
            return remote.rollback(
                name,
                || self.unknown(name),
                |v| self.unknown_version(name, v),
            );
        }
        let dir = self.existing_dir(name)?;
        let _lock = AdapterLock::acquire(&dir)?;
        let old = self.pointer(name)?.ok_or_else(|| self.unknown(name))?;
        let next = old
            .rolled_back()
            .ok_or_else(|| StoreError::NothingToRollBack {
                name: name.to_string(),
            })?;
        self.require_version(name, &next.live)?;
        self.write_pointer(name, &next)?;
        Ok(next)
    }

    /// Deletes a stored version that is not live, and drops it from the rollback history.
    pub fn retire(&self, name: &AdapterName, version: &str) -> Result<(), StoreError> {
        if let Some(remote) = &self.remote {
            check_version(version)?;
            return remote.retire(name, version, || self.unknown_version(name, version));
        }
        let dir = self.existing_dir(name)?;
        let _lock = AdapterLock::acquire(&dir)?;
        let path = self.require_version(name, version)?;
        if let Some(p) = self.pointer(name)? {
            if p.live == version {
                return Err(StoreError::RetireLive {
                    name: name.to_string(),
                    version: version.to_owned(),
                });
            }
            if let Some(next) = p.without_history(version) {
                self.write_pointer(name, &next)?;
            }
        }
        std::fs::remove_file(&path).map_err(|source| StoreError::Io {
            path: path.clone(),
            action: "removing the version file",
            source,
        })?;
        sync_dir(&dir)
    }

    /// Every adapter with a pointer, in name order.
    pub fn names(&self) -> Result<Vec<AdapterName>, StoreError> {
        if let Some(remote) = &self.remote {
            return remote.names();
        }
        let entries = std::fs::read_dir(&self.root).map_err(|source| StoreError::Io {
            path: self.root.clone(),
            action: "listing the store",
            source,
        })?;
        let mut names: Vec<AdapterName> = entries
            .flatten()
            .filter_map(|e| AdapterName::new(&e.file_name().to_string_lossy()).ok())
            .filter(|n| self.pointer_path(n).is_file())
            .collect();
        names.sort();
        Ok(names)
    }

    /// Every stored version of `name`, oldest first.
    pub fn versions(&self, name: &AdapterName) -> Result<Vec<VersionInfo>, StoreError> {
        if let Some(remote) = &self.remote {
            return remote.versions(name)?.ok_or_else(|| self.unknown(name));
        }
        let dir = self.existing_dir(name)?;
        let pointer = self.pointer(name)?;
        let entries = std::fs::read_dir(&dir).map_err(|source| StoreError::Io {
            path: dir.clone(),
            action: "listing the adapter's versions",
            source,
        })?;
        let mut out = Vec::new();
        for entry in entries.flatten() {
            let file_name = entry.file_name().to_string_lossy().into_owned();
            let Some(version) = file_name.strip_suffix(&format!(".{VERSION_EXT}")) else {
                continue;
            };
            if !is_version(version) {
                continue;
            }
            let Ok(md) = entry.metadata() else { continue };
            out.push(VersionInfo {
                version: version.to_owned(),
                bytes: md.len(),
                stored_at: md.modified().unwrap_or(SystemTime::UNIX_EPOCH),
                live: pointer.as_ref().is_some_and(|p| p.live == version),
                history_index: pointer
                    .as_ref()
                    .and_then(|p| p.previous.iter().position(|v| v == version)),
            });
        }
        out.sort_by(|a, b| (a.stored_at, &a.version).cmp(&(b.stored_at, &b.version)));
        Ok(out)
    }

    /// One stored version with its metadata and targets.
    pub fn show(&self, name: &AdapterName, version: &str) -> Result<VersionDetails, StoreError> {
        self.has_version(name, version)?
            .then_some(())
            .ok_or_else(|| self.unknown_version(name, version))?;
        let info = self
            .versions(name)?
            .into_iter()
            .find(|v| v.version == version)
            .ok_or_else(|| self.unknown_version(name, version))?;
        let (pkg, _) = self.read_package(name, version)?;
        Ok(VersionDetails {
            info,
            targets: pkg.targets(),
            meta: pkg.meta,
        })
    }

    /// Whether `name` has a stored `version`.
    pub fn has_version(&self, name: &AdapterName, version: &str) -> Result<bool, StoreError> {
        check_version(version)?;
        match &self.remote {
            Some(remote) => remote.has_version(name, version),
            None => Ok(self.version_path(name, version)?.is_file()),
        }
    }

    /// Reads and structurally checks one stored version (not against a base: that is
    /// [`AdapterPackage::validate`]); returns the package and the content version of its bytes.
    /// From an object store the bytes come through the package cache.
    pub fn read_package(
        &self,
        name: &AdapterName,
        version: &str,
    ) -> Result<(AdapterPackage, String), StoreError> {
        let path = self.version_path(name, version)?;
        match &self.remote {
            None => {
                if !path.is_file() {
                    return Err(self.unknown_version(name, version));
                }
                Ok(AdapterPackage::read(&path, &self.limits)?)
            }
            Some(remote) => {
                let bytes =
                    remote.read_version(name, version, || self.unknown_version(name, version))?;
                let file = format!("{}/{name}@{version}", remote.url());
                let pkg = AdapterPackage::from_bytes(&bytes, &file, &self.limits)?;
                Ok((pkg, content_version(&bytes)))
            }
        }
    }

    /// Reads one stored version for loading, as [`Store::read_package`] does but without
    /// hashing a local file again; returns the package and how errors name its file.
    pub fn load_package(
        &self,
        name: &AdapterName,
        version: &str,
    ) -> Result<(AdapterPackage, String), StoreError> {
        let path = self.version_path(name, version)?;
        match &self.remote {
            None => {
                let file = path.display().to_string();
                Ok((AdapterPackage::load(&path, &self.limits)?, file))
            }
            Some(remote) => {
                let bytes =
                    remote.read_version(name, version, || self.unknown_version(name, version))?;
                let file = format!("{}/{name}@{version}", remote.url());
                let pkg = AdapterPackage::from_bytes(&bytes, &file, &self.limits)?;
                Ok((pkg, file))
            }
        }
    }

    fn write_pointer(&self, name: &AdapterName, pointer: &Pointer) -> Result<(), StoreError> {
        replace_atomically(&self.pointer_path(name), pointer.render().as_bytes())?;
        tracing::info!(adapter = %name, live = %pointer.live, "pointer flipped");
        Ok(())
    }

    fn existing_dir(&self, name: &AdapterName) -> Result<PathBuf, StoreError> {
        let dir = self.adapter_dir(name);
        if dir.is_dir() {
            Ok(dir)
        } else {
            Err(self.unknown(name))
        }
    }

    fn require_version(&self, name: &AdapterName, version: &str) -> Result<PathBuf, StoreError> {
        let path = self.version_path(name, version)?;
        if path.is_file() {
            Ok(path)
        } else {
            Err(self.unknown_version(name, version))
        }
    }

    fn unknown(&self, name: &AdapterName) -> StoreError {
        StoreError::UnknownAdapter {
            name: name.to_string(),
            store: self.store_path(),
        }
    }

    fn unknown_version(&self, name: &AdapterName, version: &str) -> StoreError {
        StoreError::UnknownVersion {
            name: name.to_string(),
            version: version.to_owned(),
            store: self.store_path(),
        }
    }

    fn store_path(&self) -> PathBuf {
        match &self.remote {
            Some(r) => r.store_path(),
            None => self.root.clone(),
        }
    }
}

/// Removes an adapter folder that holds nothing but its lock file (and unfinished temporary
/// files), as a failed first publish leaves it. A second first publish of the same name racing
/// this one may then find its folder gone and fail too; it can simply be retried.
fn remove_empty_adapter_dir(root: &Path, dir: &Path) {
    let Ok(_lock) = AdapterLock::acquire(dir) else {
        return;
    };
    let only_leftovers = std::fs::read_dir(dir).is_ok_and(|entries| {
        entries.flatten().all(|e| {
            let name = e.file_name().to_string_lossy().into_owned();
            name == LOCK_FILE || name.starts_with(TEMP_PREFIX)
        })
    });
    if only_leftovers {
        remove_stale_temps(dir);
        let _ = std::fs::remove_file(dir.join(LOCK_FILE));
        let _ = std::fs::remove_dir(dir);
        let _ = sync_dir(root);
    }
}

fn check_version(version: &str) -> Result<(), StoreError> {
    if is_version(version) {
        Ok(())
    } else {
        Err(StoreError::BadVersion {
            version: version.to_owned(),
        })
    }
}
