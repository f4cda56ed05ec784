//! Running guarded rollouts: [`Experiments::run_rollouts`] reads every split that carries a
//! rollout policy, asks [`crate::splits::rollout::decide`] what to do, and applies the answer
//! through the store (once, however many replicas read the same state: the store's
//! [`ExperimentStore::change_rollout`](super::ExperimentStore::change_rollout) writes only over
//! the state it was given) and the registry (a flip sets the candidate's version live; a
//! rollback may set the live version back). [`Experiments::operator_rollout`] is a person's
//! pause, resume, promote or roll back, recorded the same way.

use switchyard_adapters::AdapterName;
use switchyard_adapters::registry::Registry;

use crate::splits::ReadoutSettings;
use crate::splits::rollout::{
    Actor, Decision, Evidence, GuardReading, Rollout, RolloutAction, RolloutEvent, RolloutStatus,
    decide, read_guards,
};

use super::records::{ArmTally, SplitState};
use super::{ExperimentError, Experiments, now_ms};

/// An action a rollout took.
#[derive(Debug, Clone, PartialEq)]
pub struct Applied {
    pub split: String,
    pub event: RolloutEvent,
}

/// A person's instruction to a rollout (`POST /admin/splits/{name}/rollout`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum OperatorAction {
    /// Stop automatic actions.
    Pause,
    /// Let them act again.
    Resume,
    /// Take the next step now (or flip live after the last), whatever the evidence says.
    Promote,
    /// Roll the candidate back now.
    RollBack,
}

/// Why an operator's instruction was not carried out.
#[derive(Debug, thiserror::Error)]
pub enum RolloutRefused {
    #[error("no split named {0:?}")]
    UnknownSplit(String),
    #[error("split {0:?} has no rollout policy")]
    NoPolicy(String),
    #[error("the rollout of split {split:?} is {status}; {action} does not apply")]
    NotApplicable {
        split: String,
        status: &'static str,
        action: &'static str,
    },
    #[error(
        "the rollout changed while this was decided (another replica or person acted); read it again"
    )]
    Raced,
    #[error("setting the live version: {0}")]
    Live(String),
    #[error(transparent)]
    Store(#[from] ExperimentError),
}

/// The readings and decision of one split's rollout, for the readout.
#[derive(Debug, Clone)]
pub struct RolloutReading {
    pub guards: Vec<GuardReading>,
    pub decision: Decision,
}

fn evidence(arm: &ArmTally) -> Evidence<'_> {
    Evidence {
        health: &arm.health,
        numeric: &arm.numeric,
        yes_no: &arm.yes_no,
    }
}

/// The guards and decision of `split`'s rollout now; `None` without a policy or two arms.
pub fn reading(split: &SplitState, settings: &ReadoutSettings) -> Option<RolloutReading> {
    let rollout = split.rollout.as_ref()?;
    let [incumbent, candidate] = split.arms.as_slice() else {
        return None;
    };
    let guards = read_guards(
        &rollout.policy.guards,
        evidence(incumbent),
        evidence(candidate),
        settings.mixing_variance,
    );
    let decision = decide(rollout, evidence(incumbent), evidence(candidate), &guards);
    Some(RolloutReading { guards, decision })
}

fn status_name(status: RolloutStatus) -> &'static str {
    match status {
        RolloutStatus::Watching => "watching",
        RolloutStatus::Paused => "paused",
        RolloutStatus::RolledBack => "rolled_back",
        RolloutStatus::Flipped => "flipped",
    }
}

impl Experiments {
    /// Applies what every split's rollout policy says now; returns the actions taken. Reads only
    /// the splits that carry a policy (as the in-memory definitions say; on a shared database
    /// they are read again every second). Blocking.
    pub fn run_rollouts(&self, registry: &Registry, settings: &ReadoutSettings) -> Vec<Applied> {
        let mut applied = Vec::new();
        for name in self.rollout_splits() {
            let split = match self.store.split(&name) {
                Ok(Some(split)) => split,
                Ok(None) => continue,
                Err(e) => {
                    tracing::warn!(split = %name, error = %e, "reading a split for its rollout failed");
                    continue;
                }
            };
            let Some(reading) = reading(&split, settings) else {
                continue;
            };
            let action = match reading.decision {
                Decision::Wait(_) => continue,
                Decision::RollBack(why) => (RolloutAction::RolledBack, why),
                Decision::Promote { reason, .. } => (RolloutAction::Promoted, reason),
                Decision::Flip(why) => (RolloutAction::Flipped, why),
            };
            match self.act(&split, action.0, Actor::Policy, action.1, registry) {
                Ok(Some(done)) => applied.push(done),
                Ok(None) => {}
                Err(e) => {
                    tracing::error!(split = %split.name, error = %e, "a rollout action failed; it is tried again at the next check")
                }
            }
        }
        applied
    }

    /// A person's instruction to the rollout of split `name`.
    pub fn operator_rollout(
        &self,
        name: &str,
        action: OperatorAction,
        reason: Option<String>,
        registry: &Registry,
    ) -> Result<Applied, RolloutRefused> {
        let split = self
            .store
            .split(name)?
            .ok_or_else(|| RolloutRefused::UnknownSplit(name.to_owned()))?;
        let rollout = split
            .rollout
            .as_ref()
            .ok_or_else(|| RolloutRefused::NoPolicy(name.to_owned()))?;
        let status = rollout.state.status;
        let (kind, allowed, word) = match action {
            OperatorAction::Pause => (
                RolloutAction::Paused,
                status == RolloutStatus::Watching,
                "pause",
            ),
            OperatorAction::Resume => (
                RolloutAction::Resumed,
                status == RolloutStatus::Paused,
                "resume",
            ),
            OperatorAction::Promote => {
                let last = rollout.state.step >= rollout.policy.steps.len();
                (
                    if last {
                        RolloutAction::Flipped
                    } else {
                        RolloutAction::Promoted
                    },
                    matches!(status, RolloutStatus::Watching | RolloutStatus::Paused),
                    "promote",
                )
            }
            OperatorAction::RollBack => (
                RolloutAction::RolledBack,
                matches!(status, RolloutStatus::Watching | RolloutStatus::Paused),
                "roll_back",
            ),
        };
        if !allowed {
            return Err(RolloutRefused::NotApplicable {
                split: name.to_owned(),
                status: status_name(status),
                action: word,
            });
        }
        let reason = reason.unwrap_or_else(|| format!("{word} by an operator"));
        self.act(&split, kind, Actor::Operator, reason, registry)?
            .ok_or(RolloutRefused::Raced)
    }

    /// Carries out `action` on `split`'s rollout as read; `None` when the rollout changed since
    /// it was read (another replica acted first).
    fn act(
        &self,
        split: &SplitState,
        action: RolloutAction,
        by: Actor,
        reason: String,
        registry: &Registry,
    ) -> Result<Option<Applied>, RolloutRefused> {
        let Some(old) = split.rollout.as_ref() else {
            return Ok(None);
        };
        let [incumbent, candidate] = split.arms.as_slice() else {
            return Ok(None);
        };
        let mut new: Rollout = old.clone();
        new.state.revision += 1;
        let total: f64 = split.arms.iter().map(|a| a.arm.spec.weight).sum();
        let mut share = if total > 0.0 {
            candidate.arm.spec.weight / total
        } else {
            0.0
        };
        let mut weights = None;
        match action {
            RolloutAction::Paused => new.state.status = RolloutStatus::Paused,
            RolloutAction::Resumed => new.state.status = RolloutStatus::Watching,
            RolloutAction::Started => return Ok(None),
            RolloutAction::Promoted => {
                share = old.policy.steps[old.state.step.min(old.policy.steps.len() - 1)];
                new.state.step += 1;
                new.state.step_began_at = candidate.health.finished;
                weights = Some(vec![1.0 - share, share]);
            }
            RolloutAction::RolledBack => {
                share = 0.0;
                new.state.status = RolloutStatus::RolledBack;
                weights = Some(vec![1.0, 0.0]);
            }
            RolloutAction::Flipped => {
                // Live first: if that fails nothing else changes, and the next check tries
                // again. Setting a version that is already live changes nothing, so a replica
                // that loses the race below did no harm.
                let adapter = AdapterName::new(&candidate.arm.spec.adapter)
                    .map_err(|e| RolloutRefused::Live(e.to_string()))?;
                let version = candidate.arm.spec.version.clone().unwrap_or_default();
                let live = registry.store().live(&adapter).ok();
                if live.as_deref() != Some(version.as_str()) {
                    registry
                        .store()
                        .set_live(&adapter, &version)
                        .map_err(|e| RolloutRefused::Live(e.to_string()))?;
                    registry.poll_once();
                }
                share = 1.0;
                new.state.status = RolloutStatus::Flipped;
                weights = Some(vec![0.0, 1.0]);
            }
        }
        let event = RolloutEvent {
            at_ms: now_ms(),
            action,
            by,
            candidate_share: share,
            reason,
        };
        if !self.store.change_rollout(
            &split.name,
            split.generation,
            old,
            &new,
            weights.as_deref(),
            &event,
        )? {
            return Ok(None);
        }
        self.reload();
        if action == RolloutAction::RolledBack && old.policy.roll_back_live {
            roll_back_live(registry, incumbent, candidate, &split.name);
        }
        match action {
            RolloutAction::RolledBack => {
                tracing::warn!(split = %split.name, by = ?by, reason = %event.reason, "rollout: candidate rolled back")
            }
            _ => {
                tracing::info!(split = %split.name, action = action.as_str(), by = ?by, candidate_share = share, reason = %event.reason, "rollout")
            }
        }
        Ok(Some(Applied {
            split: split.name.clone(),
            event,
        }))
    }
}

/// Sets the candidate adapter's live version back when it is the candidate's: to the
/// incumbent's held version of the same adapter, else to the version live before.
fn roll_back_live(registry: &Registry, incumbent: &ArmTally, candidate: &ArmTally, split: &str) {
    let Ok(adapter) = AdapterName::new(&candidate.arm.spec.adapter) else {
        return;
    };
    let store = registry.store();
    if store.live(&adapter).ok() != candidate.arm.spec.version {
        return;
    }
    let result = match (
        &incumbent.arm.spec.version,
        incumbent.arm.spec.adapter == candidate.arm.spec.adapter,
    ) {
        (Some(version), true) => store.set_live(&adapter, version),
        _ => store.rollback(&adapter),
    };
    match result {
        Ok(pointer) => {
            registry.poll_once();
            tracing::warn!(split, adapter = %adapter, live = %pointer.live, "rollout: live version set back")
        }
        Err(e) => {
            tracing::error!(split, adapter = %adapter, error = %e, "rollout: setting the live version back failed")
        }
    }
}
