//! Everything switchyard knows about adapters that is not HTTP: the canonical names of the
//! matrices an adapter can touch ([`site`]), the package file format ([`package`]), the low-rank
//! math that applies, merges and unmerges a factor pair ([`lowrank`]), the base-model fingerprint
//! that ties a package to its base ([`fingerprint`]), and parameter counting for capacity planning
//! ([`params`]).
//!
//! Around the format sit the parts that keep many adapters live: the rules for adapter names
//! ([`names`]), the on-disk store of versions with its live pointer ([`store`]), the registry
//! that resolves a name to a resident version, loads lazily and keeps two byte-bounded caches
//! ([`registry`]), the watcher that follows another process's changes to the store ([`watcher`]),
//! and the swap events the server turns into metrics ([`events`]). For the commands, [`spectrum`]
//! measures the numerical rank of an update and [`rename`] maps foreign tensor names onto ours.

pub mod adapter;
pub mod events;
pub mod fingerprint;
pub mod lowrank;
pub mod merged;
pub mod names;
pub mod package;
pub mod params;
pub mod registry;
pub mod rename;
pub mod site;
pub mod spectrum;
pub mod store;
mod sync;
pub mod tensors;
pub mod watcher;

// Lets unit tests share the integration tests' synthetic packages, which name this crate.
#[cfg(test)]
extern crate self as switchyard_adapters;

pub use adapter::{Adapter, TaskHead};
pub use fingerprint::{BaseSpec, base_fingerprint};
pub use lowrank::LowRank;
pub use merged::MergedWeights;
pub use names::{AdapterName, NameError};
pub use package::{AdapterPackage, PackageBytes, PackageError, PackageMeta, Task};
pub use registry::{AdapterHandle, MergedHandle, Registry, RegistryConfig, RegistryError};
pub use site::{Module, Site};
pub use store::{Store, StoreError};
