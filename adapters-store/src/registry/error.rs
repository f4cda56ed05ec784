//! Why the registry could not hand out a version. Cloneable, because one failed load is
//! reported to every request that waited on it.

use std::sync::Arc;

use crate::names::NameError;
use crate::package::PackageError;
use crate::store::StoreError;

/// Why a resolve, a merge or a pin failed.
#[derive(Debug, Clone, thiserror::Error)]
pub enum RegistryError {
    #[error(transparent)]
    Name(#[from] NameError),
    #[error(transparent)]
    Store(Arc<StoreError>),
    #[error(transparent)]
    Package(Arc<PackageError>),
    #[error("making {id} resident: {message}")]
    Convert { id: String, message: String },
    #[error("merging {id}: {message}")]
    Merge { id: String, message: String },
    #[error("{id} cannot be merged: the registry was given no base weights")]
    NoBaseWeights { id: String },
    #[error("{id} cannot be merged: merging is off (the merged budget is 0 bytes)")]
    MergingOff { id: String },
    #[error(
        "pinning {name} would keep {needed} bytes of factors pinned, over the factor budget of {budget} bytes"
    )]
    PinOverBudget {
        name: String,
        needed: usize,
        budget: usize,
    },
    #[error(
        "{id} needs {needed} bytes of {tier} memory, but requests in flight and pins hold {kept} of the {budget}-byte budget; retry shortly"
    )]
    TierFull {
        id: String,
        tier: &'static str,
        needed: usize,
        kept: usize,
        budget: usize,
    },
    #[error("loading {id} panicked")]
    Panicked { id: String },
}

impl From<StoreError> for RegistryError {
    fn from(e: StoreError) -> Self {
        match e {
            StoreError::Package(p) => RegistryError::Package(Arc::new(p)),
            StoreError::Name(n) => RegistryError::Name(n),
            other => RegistryError::Store(Arc::new(other)),
        }
    }
}

impl From<PackageError> for RegistryError {
    fn from(e: PackageError) -> Self {
        RegistryError::Package(Arc::new(e))
    }
}

impl RegistryError {
    /// True when the store has no such adapter (or no such version).
    pub fn is_unknown_adapter(&self) -> bool {
        matches!(
            self,
            RegistryError::Store(s) if matches!(
                **s,
                StoreError::UnknownAdapter { .. } | StoreError::UnknownVersion { .. }
            )
        )
    }

    /// The tier's budget is held by versions in use: a retry after they finish may succeed.
    pub fn is_tier_full(&self) -> bool {
        matches!(self, RegistryError::TierFull { .. })
    }

    /// The package refusal behind this error, if it is one.
    pub fn package_error(&self) -> Option<&PackageError> {
        match self {
            RegistryError::Package(p) => Some(p),
            _ => None,
        }
    }

    /// A version file vanished between reading the pointer and opening it (it was retired).
    pub(crate) fn is_missing_file(&self) -> bool {
        matches!(
            self.package_error(),
            Some(PackageError::Io { source, .. }) if source.kind() == std::io::ErrorKind::NotFound
        )
    }

    /// A refusal that loading the same bytes again would repeat.
    pub(crate) fn is_permanent(&self) -> bool {
        matches!(self, RegistryError::Convert { .. })
            || self
                .package_error()
                .is_some_and(|p| !matches!(p, PackageError::Io { .. }))
    }
}
