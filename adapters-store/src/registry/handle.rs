//! Handles: what a request holds while it uses a version. A handle keeps its version resident
//! (the caches never evict an entry someone holds), and when the last handle goes, the registry
//! gets the chance to bring its tiers back within budget at once, under the same lock a snapshot
//! takes, so no snapshot ever sees released memory over budget.

use std::fmt;
use std::ops::Deref;
use std::sync::Arc;

use crate::names::AdapterName;
use crate::{Adapter, MergedWeights};

use super::Inner;

/// A shared handle to one resident version (`name@version`) of something the registry holds.
pub struct Handle<T> {
    name: AdapterName,
    version: String,
    value: Option<Arc<T>>,
    /// The version was resident when this handle was asked for (a cache hit).
    hit: bool,
    registry: Arc<Inner>,
}

/// A resolved adapter version's factors.
pub type AdapterHandle = Handle<Adapter>;

/// A merged variant of one adapter version.
pub type MergedHandle = Handle<MergedWeights>;

impl<T> Handle<T> {
    pub(crate) fn new(
        name: AdapterName,
        version: String,
        value: Arc<T>,
        hit: bool,
        registry: Arc<Inner>,
    ) -> Self {
        Self {
            name,
            version,
            value: Some(value),
            hit,
            registry,
        }
    }

    /// Whether the version was already resident when the handle was resolved (a cache hit), or
    /// had to be loaded or built for it (a miss, also when it waited on another caller's load).
    pub fn was_resident(&self) -> bool {
        self.hit
    }

    pub fn name(&self) -> &AdapterName {
        &self.name
    }

    pub fn version(&self) -> &str {
        &self.version
    }

    /// `name@version`.
    pub fn id(&self) -> String {
        format!("{}@{}", self.name, self.version)
    }

    /// The shared value. A clone of this `Arc` also keeps the version resident, but only dropping
    /// the handle itself lets the registry trim right away; hold the handle for the request.
    pub fn shared(&self) -> &Arc<T> {
        self.value.as_ref().expect("present until drop")
    }
}

impl AdapterHandle {
    /// The resident adapter, in the form the model's linear layers take.
    pub fn adapter(&self) -> &Arc<Adapter> {
        self.shared()
    }
}

impl MergedHandle {
    /// The merged weights, in the form the model's linear layers take.
    pub fn weights(&self) -> &Arc<MergedWeights> {
        self.shared()
    }
}

impl<T> Deref for Handle<T> {
    type Target = T;
    fn deref(&self) -> &T {
        self.shared()
    }
}

impl<T> Clone for Handle<T> {
    fn clone(&self) -> Self {
        Self {
            name: self.name.clone(),
            version: self.version.clone(),
            value: self.value.clone(),
            hit: self.hit,
            registry: self.registry.clone(),
        }
    }
}

impl<T> fmt::Debug for Handle<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Handle({}@{})", self.name, self.version)
    }
}

impl<T> Drop for Handle<T> {
    fn drop(&mut self) {
        if let Some(value) = self.value.take() {
            self.registry.release(value);
        }
    }
}
