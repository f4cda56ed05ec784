//! The adapter store on an S3-compatible object store, for several replicas sharing adapters.
//!
//! ```text
//! <prefix>/<name>/<version>.safetensors   one immutable object per version (version = content hash)
//! <prefix>/<name>/live                    the pointer, in the disk store's text format
//! ```
//!
//! A version object is written (and, when it already exists, left alone: same name, same bytes)
//! before any pointer names it, so a reader never follows a pointer to a missing version. The
//! pointer is only ever replaced by a conditional write: `If-Match` with the e-tag read with it,
//! or `If-None-Match: *` for an adapter's first pointer. A writer that loses the race re-reads the
//! pointer, re-applies its change and tries again, a bounded number of times, then reports
//! [`StoreError::Conflict`]; so no update is lost while its writer is told it succeeded, as long
//! as the server evaluates the condition atomically with the write (S3 does; see the README for
//! what the test server does). Reads go through the local [`PackageCache`].

use std::future::Future;
use std::path::{Path as FsPath, PathBuf};
use std::sync::Arc;
use std::time::{Duration, SystemTime};

use object_store::aws::AmazonS3Builder;
use object_store::path::Path;
use object_store::{ObjectStore, ObjectStoreExt, PutMode, PutOptions, PutPayload, UpdateVersion};

use crate::names::{AdapterName, is_version};
use crate::package::PackageBytes;

use super::cache::{CacheStats, PackageCache};
use super::{POINTER_FILE, Pointer, Published, StoreError, VERSION_EXT, VersionInfo};

/// How many times a pointer change is re-applied after losing a conditional write.
pub const CONFLICT_ATTEMPTS: usize = 32;

/// Where the object store is and how to reach it.
#[derive(Clone, PartialEq, Eq)]
pub struct RemoteConfig {
    /// The S3 endpoint, `http://127.0.0.1:9000` say; `None` for Amazon S3 itself.
    pub endpoint: Option<String>,
    pub bucket: String,
    /// Key prefix under which the store lives ('' for the bucket's root).
    pub prefix: String,
    pub region: String,
    pub access_key_id: Option<String>,
    pub secret_access_key: Option<String>,
}

impl std::fmt::Debug for RemoteConfig {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        // The secret never reaches a log line.
        f.debug_struct("RemoteConfig")
            .field("endpoint", &self.endpoint)
            .field("bucket", &self.bucket)
            .field("prefix", &self.prefix)
            .field("region", &self.region)
            .field("access_key_id", &self.access_key_id)
            .field(
                "secret_access_key",
                &self.secret_access_key.as_ref().map(|_| "<set>"),
            )
            .finish()
    }
}

impl RemoteConfig {
    /// `s3://bucket/prefix`, as errors and logs name the store.
    pub fn url(&self) -> String {
        let prefix = self.prefix.trim_matches('/');
        if prefix.is_empty() {
            format!("s3://{}", self.bucket)
        } else {
            format!("s3://{}/{prefix}", self.bucket)
        }
    }
}

/// The object-store backend: the client, the runtime its calls run on, and the package cache.
pub(crate) struct Remote {
    objects: Arc<dyn ObjectStore>,
    runtime: tokio::runtime::Runtime,
    bucket: String,
    prefix: String,
    url: String,
    pub(crate) cache: PackageCache,
}

impl std::fmt::Debug for Remote {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Remote")
            .field("url", &self.url)
            .field("cache", &self.cache)
            .finish_non_exhaustive()
    }
}

/// The pointer as read, with the e-tag and version its conditional replacement must match.
struct ReadPointer {
    pointer: Option<Pointer>,
    update: Option<UpdateVersion>,
}

impl Remote {
    pub(crate) fn open(config: &RemoteConfig, cache: PackageCache) -> Result<Self, StoreError> {
        let mut builder = AmazonS3Builder::new()
            .with_bucket_name(&config.bucket)
            .with_region(&config.region);
        if let Some(endpoint) = &config.endpoint {
            builder = builder
                .with_endpoint(endpoint)
                .with_allow_http(endpoint.starts_with("http://"));
        }
        if let Some(key) = &config.access_key_id {
            builder = builder.with_access_key_id(key);
        }
        if let Some(secret) = &config.secret_access_key {
            builder = builder.with_secret_access_key(secret);
        }
        let url = config.url();
        let objects = builder.build().map_err(|source| StoreError::Remote {
            location: url.clone(),
            action: "configuring the object store",
            source: Box::new(source),
        })?;
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(1)
            .thread_name("switchyard-object-store")
            .enable_all()
            .build()
            .map_err(|source| StoreError::Io {
                path: PathBuf::from(&url),
                action: "starting the object store client",
                source,
            })?;
        let remote = Self {
            objects: Arc::new(objects),
            runtime,
            bucket: config.bucket.clone(),
            prefix: config.prefix.trim_matches('/').to_owned(),
            url,
            cache,
        };
        // Reach the bucket once now, so a wrong endpoint, bucket or key fails at start.
        let root = remote.key(&[]);
        remote
            .run(remote.objects.list_with_delimiter(Some(&root)))
            .map_err(|e| remote.error(&root, "listing the bucket", e))?;
        Ok(remote)
    }

    pub(crate) fn url(&self) -> &str {
        &self.url
    }

    /// Runs one client call to completion from synchronous code. Inside another runtime (an
    /// async caller) the call runs on a scoped thread, as blocking there would panic.
    fn run<F: Future + Send>(&self, future: F) -> F::Output
    where
        F::Output: Send,
    {
        if tokio::runtime::Handle::try_current().is_ok() {
            std::thread::scope(|s| {
                s.spawn(|| self.runtime.block_on(future))
                    .join()
                    .expect("object store call panicked")
            })
        } else {
            self.runtime.block_on(future)
        }
    }

    fn key(&self, parts: &[&str]) -> Path {
        let mut all: Vec<&str> = Vec::new();
        if !self.prefix.is_empty() {
            all.extend(self.prefix.split('/').filter(|p| !p.is_empty()));
        }
        all.extend_from_slice(parts);
        Path::from_iter(all)
    }

    fn pointer_key(&self, name: &AdapterName) -> Path {
        self.key(&[name.as_str(), POINTER_FILE])
    }

    fn version_key(&self, name: &AdapterName, version: &str) -> Path {
        self.key(&[name.as_str(), &format!("{version}.{VERSION_EXT}")])
    }

    fn error(&self, key: &Path, action: &'static str, source: object_store::Error) -> StoreError {
        StoreError::Remote {
            location: format!("s3://{}/{key}", self.bucket),
            action,
            source: Box::new(source),
        }
    }

    pub(crate) fn store_path(&self) -> PathBuf {
        PathBuf::from(&self.url)
    }

    fn read_pointer(&self, name: &AdapterName) -> Result<ReadPointer, StoreError> {
        let key = self.pointer_key(name);
        let got = self.run(async {
            let got = self.objects.get(&key).await?;
            let meta = got.meta.clone();
            let bytes = got.bytes().await?;
            Ok::<_, object_store::Error>((meta, bytes))
        });
        match got {
            Ok((meta, bytes)) => {
                let text = String::from_utf8_lossy(&bytes);
                let pointer = Pointer::parse(&text, FsPath::new(&key.to_string()))?;
                Ok(ReadPointer {
                    pointer: Some(pointer),
                    update: Some(UpdateVersion {
                        e_tag: meta.e_tag,
                        version: meta.version,
                    }),
                })
            }
            Err(object_store::Error::NotFound { .. }) => Ok(ReadPointer {
                pointer: None,
                update: None,
            }),
            Err(e) => Err(self.error(&key, "reading the pointer", e)),
        }
    }

    pub(crate) fn pointer(&self, name: &AdapterName) -> Result<Option<Pointer>, StoreError> {
        Ok(self.read_pointer(name)?.pointer)
    }

    /// Reads the pointer, lets `change` compute the next one (`None`: nothing to write) and what
    /// to answer, and replaces the pointer conditionally on the e-tag it was read with; on a lost
    /// race, reads again and re-applies `change` (which re-checks its preconditions against the
    /// pointer now there). Answers what the `change` whose write succeeded answered.
    fn update_pointer<T>(
        &self,
        name: &AdapterName,
        mut change: impl FnMut(Option<&Pointer>) -> Result<(Option<Pointer>, T), StoreError>,
    ) -> Result<T, StoreError> {
        let key = self.pointer_key(name);
        let mut backoff = Duration::from_millis(2);
        for _ in 0..CONFLICT_ATTEMPTS {
            let read = self.read_pointer(name)?;
            let (next, out) = change(read.pointer.as_ref())?;
            let Some(next) = next else {
                return Ok(out);
            };
            let mode = match read.update {
                Some(update) => PutMode::Update(update),
                None => PutMode::Create,
            };
            let payload = PutPayload::from(next.render().into_bytes());
            let result = self.run(self.objects.put_opts(&key, payload, PutOptions::from(mode)));
            match result {
                Ok(_) => {
                    tracing::info!(adapter = %name, live = %next.live, store = %self.url, "pointer flipped");
                    return Ok(out);
                }
                Err(object_store::Error::Precondition { .. })
                | Err(object_store::Error::AlreadyExists { .. }) => {
                    tracing::debug!(adapter = %name, "pointer changed under us; retrying");
                    std::thread::sleep(backoff);
                    backoff = (backoff * 2).min(Duration::from_millis(100));
                }
                Err(e) => return Err(self.error(&key, "replacing the pointer", e)),
            }
        }
        Err(StoreError::Conflict {
            name: name.to_string(),
            attempts: CONFLICT_ATTEMPTS,
        })
    }

    pub(crate) fn has_version(
        &self,
        name: &AdapterName,
        version: &str,
    ) -> Result<bool, StoreError> {
        let key = self.version_key(name, version);
        match self.run(self.objects.head(&key)) {
            Ok(_) => Ok(true),
            Err(object_store::Error::NotFound { .. }) => Ok(false),
            Err(e) => Err(self.error(&key, "looking up a version", e)),
        }
    }

    pub(crate) fn require_version(
        &self,
        name: &AdapterName,
        version: &str,
        unknown: impl FnOnce() -> StoreError,
    ) -> Result<(), StoreError> {
        if self.has_version(name, version)? {
            Ok(())
        } else {
            Err(unknown())
        }
    }

    fn put_version(
        &self,
        name: &AdapterName,
        version: &str,
        bytes: &PackageBytes,
    ) -> Result<(), StoreError> {
        let key = self.version_key(name, version);
        let payload = PutPayload::from(bytes.as_bytes().to_vec());
        self.run(self.objects.put(&key, payload))
            .map(|_| ())
            .map_err(|e| self.error(&key, "writing a version", e))
    }

    /// Stores a validated package and makes it live.
    pub(crate) fn publish(
        &self,
        name: &AdapterName,
        version: &str,
        bytes: &PackageBytes,
    ) -> Result<Published, StoreError> {
        // Version objects are named by their content: an existing one holds these bytes.
        let new_file = !self.has_version(name, version)?;
        if new_file {
            self.put_version(name, version, bytes)?;
        }
        // If the flip fails (a conflict, the store unreachable) the version object stays: no
        // pointer names it, `adapter list` shows it, and a retry finds it in place.
        let (replaced, unchanged) = self.update_pointer(name, |old| {
            let replaced = old.map(|p| p.live.clone()).filter(|live| live != version);
            let next = Pointer::next_live(old, version);
            let unchanged = next.is_none();
            Ok((next, (replaced, unchanged)))
        })?;
        // A retire of these same bytes (then not live) may have deleted the object between our
        // look-up and the flip; the pointer now names it, so put it back.
        if !new_file && !self.has_version(name, version)? {
            self.put_version(name, version, bytes)?;
        }
        Ok(Published {
            name: name.clone(),
            version: version.to_owned(),
            replaced,
            new_file,
            unchanged,
        })
    }

    pub(crate) fn set_live(
        &self,
        name: &AdapterName,
        version: &str,
        unknown_version: impl Fn() -> StoreError,
    ) -> Result<Pointer, StoreError> {
        self.require_version(name, version, &unknown_version)?;
        self.update_pointer(name, |old| {
            let next = Pointer::next_live(old, version);
            let now = next
                .clone()
                .or_else(|| old.cloned())
                .expect("a pointer exists when unchanged");
            Ok((next, now))
        })
    }

    pub(crate) fn rollback(
        &self,
        name: &AdapterName,
        unknown: impl Fn() -> StoreError,
        unknown_version: impl Fn(&str) -> StoreError,
    ) -> Result<Pointer, StoreError> {
        self.update_pointer(name, |old| {
            let old = old.ok_or_else(&unknown)?;
            let next = old
                .rolled_back()
                .ok_or_else(|| StoreError::NothingToRollBack {
                    name: name.to_string(),
                })?;
            self.require_version(name, &next.live, || unknown_version(&next.live))?;
            Ok((Some(next.clone()), next))
        })
    }

    pub(crate) fn retire(
        &self,
        name: &AdapterName,
        version: &str,
        unknown_version: impl Fn() -> StoreError,
    ) -> Result<(), StoreError> {
        self.require_version(name, version, &unknown_version)?;
        self.update_pointer(name, |old| match old {
            Some(p) if p.live == version => Err(StoreError::RetireLive {
                name: name.to_string(),
                version: version.to_owned(),
            }),
            Some(p) => Ok((p.without_history(version), ())),
            None => Ok((None, ())),
        })?;
        let key = self.version_key(name, version);
        self.run(self.objects.delete(&key))
            .map_err(|e| self.error(&key, "removing the version", e))?;
        self.cache.forget(name, version);
        Ok(())
    }

    /// Every adapter with a pointer, in name order.
    pub(crate) fn names(&self) -> Result<Vec<AdapterName>, StoreError> {
        let root = self.key(&[]);
        let listed = self
            .run(self.objects.list_with_delimiter(Some(&root)))
            .map_err(|e| self.error(&root, "listing the store", e))?;
        let mut names = Vec::new();
        for prefix in listed.common_prefixes {
            let Some(last) = prefix.filename() else {
                continue;
            };
            let Ok(name) = AdapterName::new(last) else {
                continue;
            };
            let key = self.pointer_key(&name);
            match self.run(self.objects.head(&key)) {
                Ok(_) => names.push(name),
                Err(object_store::Error::NotFound { .. }) => {}
                Err(e) => return Err(self.error(&key, "looking up a pointer", e)),
            }
        }
        names.sort();
        Ok(names)
    }

    /// Every stored version of `name`, oldest first; `None` when the adapter has no objects.
    pub(crate) fn versions(
        &self,
        name: &AdapterName,
    ) -> Result<Option<Vec<VersionInfo>>, StoreError> {
        let pointer = self.pointer(name)?;
        let folder = self.key(&[name.as_str()]);
        let listed = self
            .run(self.objects.list_with_delimiter(Some(&folder)))
            .map_err(|e| self.error(&folder, "listing the adapter's versions", e))?;
        if listed.objects.is_empty() && pointer.is_none() {
            return Ok(None);
        }
        let mut out = Vec::new();
        for object in listed.objects {
            let Some(file_name) = object.location.filename() else {
                continue;
            };
            let Some(version) = file_name.strip_suffix(&format!(".{VERSION_EXT}")) else {
                continue;
            };
            if !is_version(version) {
                continue;
            }
            out.push(VersionInfo {
                version: version.to_owned(),
                bytes: object.size,
                stored_at: SystemTime::from(object.last_modified),
                live: pointer.as_ref().is_some_and(|p| p.live == version),
                history_index: pointer
                    .as_ref()
                    .and_then(|p| p.previous.iter().position(|v| v == version)),
            });
        }
        out.sort_by(|a, b| (a.stored_at, &a.version).cmp(&(b.stored_at, &b.version)));
        Ok(Some(out))
    }

    /// The bytes of one version, through the package cache.
    pub(crate) fn read_version(
        &self,
        name: &AdapterName,
        version: &str,
        unknown_version: impl Fn() -> StoreError,
    ) -> Result<Vec<u8>, StoreError> {
        self.cache.read(name, version, || {
            let key = self.version_key(name, version);
            let got = self.run(async {
                let got = self.objects.get(&key).await?;
                got.bytes().await
            });
            match got {
                Ok(bytes) => Ok(bytes.to_vec()),
                Err(object_store::Error::NotFound { .. }) => Err(unknown_version()),
                Err(e) => Err(self.error(&key, "reading a version", e)),
            }
        })
    }

    pub(crate) fn cache_stats(&self) -> CacheStats {
        self.cache.stats()
    }
}
