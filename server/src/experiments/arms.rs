//! Arm identity across edits, and the check that every arm serves something that exists.
//!
//! [`plan_arms`] is the one rule every store applies when a split is edited: an arm record goes
//! on when the edited split has an arm of the same name serving the same thing (adapter and held
//! version); anything else starts a new record. A weight change keeps the record, since the
//! treatment is the same; a changed adapter or held version does not, so that two treatments
//! never share one tally.

use switchyard_adapters::AdapterName;
use switchyard_adapters::store::{Store, StoreError};

use crate::splits::{ArmSpec, BASE_MODEL, Split};

use super::records::ArmRecord;

/// Whether `old` and `new` serve the same thing under the same name, both as answering arms or
/// both as shadows (a shadow's outcomes are agreement figures, not outcomes).
pub fn same_treatment(old: &ArmSpec, new: &ArmSpec) -> bool {
    old.name == new.name
        && old.adapter == new.adapter
        && old.version == new.version
        && old.shadow.is_some() == new.shadow.is_some()
}

/// For each arm of the edited split, the id of the current arm record it continues, or `None`
/// when it starts a new one.
pub fn plan_arms(current: &[ArmRecord], edited: &[ArmSpec]) -> Vec<Option<i64>> {
    edited
        .iter()
        .map(|new| {
            current
                .iter()
                .find(|old| same_treatment(&old.spec, new))
                .map(|old| old.id)
        })
        .collect()
}

/// An arm that names something the adapter store cannot serve.
#[derive(Debug, thiserror::Error)]
pub enum ArmProblem {
    #[error("{field}: {problem}")]
    InvalidName { field: String, problem: String },
    #[error("{field}: adapter {adapter:?} has no live version in the store")]
    UnknownAdapter { field: String, adapter: String },
    #[error("{field}: adapter {adapter:?} has no version {version:?} in the store")]
    UnknownVersion {
        field: String,
        adapter: String,
        version: String,
    },
    #[error("{field}: {problem}")]
    InvalidVersion { field: String, problem: String },
    #[error("{field}: reading the adapter store: {problem}")]
    Store { field: String, problem: String },
}

/// Checks that every arm of `split` serves something the store has: the base model, an adapter
/// with a live version, or a stored version it holds.
pub fn check_arms(store: &Store, split: &Split) -> Result<(), ArmProblem> {
    for (index, arm) in split.arms().iter().enumerate() {
        if arm.adapter == BASE_MODEL {
            continue;
        }
        let field = format!("arms[{index}].adapter");
        let name = AdapterName::new(&arm.adapter).map_err(|e| ArmProblem::InvalidName {
            field: field.clone(),
            problem: e.to_string(),
        })?;
        let store_problem = |e: StoreError| ArmProblem::Store {
            field: field.clone(),
            problem: e.to_string(),
        };
        if store.pointer(&name).map_err(store_problem)?.is_none() {
            return Err(ArmProblem::UnknownAdapter {
                field,
                adapter: arm.adapter.clone(),
            });
        }
        if let Some(version) = &arm.version {
            let field = format!("arms[{index}].version");
            let stored =
                store
                    .has_version(&name, version)
                    .map_err(|e| ArmProblem::InvalidVersion {
                        field: field.clone(),
                        problem: e.to_string(),
                    })?;
            if !stored {
                return Err(ArmProblem::UnknownVersion {
                    field,
                    adapter: arm.adapter.clone(),
                    version: version.clone(),
                });
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn arm(name: &str, adapter: &str, version: Option<&str>, weight: f64) -> ArmSpec {
        ArmSpec {
            name: name.to_owned(),
            adapter: adapter.to_owned(),
            version: version.map(str::to_owned),
            weight,
            shadow: None,
        }
    }

    #[test]
    fn an_edit_keeps_an_arm_record_only_when_name_and_treatment_stay() {
        let current = vec![
            ArmRecord {
                id: 11,
                spec: arm("incumbent", "fork-advice", Some("00000000000000aa"), 0.8),
            },
            ArmRecord {
                id: 12,
                spec: arm("candidate", "fork-advice-v2", None, 0.2),
            },
        ];
        let edited = vec![
            // Reordered and reweighted, same treatment: goes on.
            arm("candidate", "fork-advice-v2", None, 0.5),
            // Same name, another held version: a new record.
            arm("incumbent", "fork-advice", Some("00000000000000bb"), 0.5),
            // New arm serving what another arm served: a new record too.
            arm("challenger", "fork-advice-v2", None, 0.1),
        ];
        assert_eq!(plan_arms(&current, &edited), vec![Some(12), None, None]);
        // Changing the adapter under the same name starts afresh as well.
        let swapped = vec![arm("candidate", "base", None, 0.2)];
        assert_eq!(plan_arms(&current, &swapped), vec![None]);
    }
}
