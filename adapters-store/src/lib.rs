//! Everything switchyard knows about adapters that is not HTTP: the canonical names of the
//! matrices an adapter can touch ([`site`]), the package file format ([`package`]), the low-rank
//! math that applies, merges and unmerges a factor pair ([`lowrank`]), the base-model fingerprint
//! that ties a package to its base ([`fingerprint`]), and parameter counting for capacity planning
//! ([`params`]).

pub mod adapter;
pub mod fingerprint;
pub mod lowrank;
pub mod merged;
pub mod package;
pub mod params;
pub mod site;

pub use adapter::{Adapter, TaskHead};
pub use fingerprint::{BaseSpec, base_fingerprint};
pub use lowrank::LowRank;
pub use merged::MergedWeights;
pub use package::{AdapterPackage, PackageError, PackageMeta, Task};
pub use site::{Module, Site};
