//! Shadow traffic: a split's shadow arm answers nobody; a share of the requests its first arm
//! answers is run through it again, after the answer has left, and how the two answers agree is
//! recorded as the shadow arm's outcomes (the readout shows them like any arm's):
//!
//! - `/embed`: the cosine of each text's two embeddings, averaged over the texts (a number);
//! - `/classify`: whether every text got the same label (yes/no);
//! - `/generate`: whether the two outputs are the same tokens (yes/no), and the first position
//!   where they differ (a number: the tokens that agree before it; the output's length when
//!   they are the same); the share of agreeing positions is logged at debug.
//!
//! Shadow work runs in an engine lane of its own, behind the tenants' lanes, only while the
//! queue holds at most `experiments.shadow_max_queued` jobs and at most
//! `experiments.shadow_max_in_flight` shadow jobs run: under load it stops (counted as
//! `skipped_busy`). It never counts against a tenant's quota, and its failures never reach a
//! client (`failed`). `switchyard_shadow_requests_total{split, result}` counts each.

use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use rand::Rng;
use tokio::sync::{mpsc, oneshot};

use crate::engine::end_at::EndAt;
use crate::engine::{EmbedJob, GenEvent, GenerateJob, Job};
use crate::experiments::OutcomeValue;
use crate::experiments::book::ShadowArm;
use crate::http::SharedState;
use crate::model::sampling::SamplingParams;

/// What to run through the shadow arm, and the first arm's answer to compare with.
pub enum Mirror {
    Embed {
        ids: Vec<Vec<u32>>,
        answer: Vec<Vec<f32>>,
    },
    Classify {
        ids: Vec<Vec<u32>>,
        labels: Vec<String>,
    },
    Generate {
        prompt_ids: Vec<u32>,
        sampling: SamplingParams,
        limit: usize,
        end_at: EndAt,
        answer: Vec<u32>,
    },
}

/// A request's inputs kept for its mirror, taken before the engine consumed them.
#[derive(Clone)]
pub enum MirrorInput {
    Texts(Vec<Vec<u32>>),
    Prompt {
        prompt_ids: Vec<u32>,
        sampling: SamplingParams,
        limit: usize,
        end_at: EndAt,
    },
}

/// Whether this request is mirrored: the arm has a shadow and the draw falls in its share.
pub fn draw(shadow: Option<&ShadowArm>) -> bool {
    shadow.is_some_and(|s| rand::rng().random::<f64>() < s.share)
}

fn count(state: &SharedState, split: &str, result: &str) {
    state.metrics.count_shadow(split, result);
}

/// Runs `mirror` through `shadow` of split `split` in the background, unless the server is
/// busy. Returns at once.
pub fn run(state: &SharedState, split: &str, shadow: ShadowArm, mirror: Mirror) {
    if state.engine.queued() > state.shadow.max_queued
        || state.shadow.in_flight.load(Ordering::SeqCst) >= state.shadow.max_in_flight
    {
        count(state, split, "skipped_busy");
        return;
    }
    state.shadow.in_flight.fetch_add(1, Ordering::SeqCst);
    let (state, split) = (state.clone(), split.to_owned());
    tokio::spawn(async move {
        let result = mirror_once(&state, &shadow, mirror).await;
        state.shadow.in_flight.fetch_sub(1, Ordering::SeqCst);
        match result {
            Ok((values, note)) => {
                count(&state, &split, "ran");
                if let Some(note) = note {
                    tracing::debug!(split, shadow_arm = %shadow.arm.name, note, "shadow answer");
                }
                let shared = state.clone();
                let _ = tokio::task::spawn_blocking(move || {
                    for value in values {
                        shared.splits.record_agreement(shadow.arm_id, value);
                    }
                })
                .await;
            }
            Err(why) => {
                count(&state, &split, "failed");
                tracing::warn!(split, shadow_arm = %shadow.arm.name, why, "a shadow request failed; no client saw it");
            }
        }
    });
}

/// The cosine of two vectors; 0 when either is all zero.
pub fn cosine(a: &[f32], b: &[f32]) -> f64 {
    let (mut dot, mut na, mut nb) = (0.0f64, 0.0f64, 0.0f64);
    for (x, y) in a.iter().zip(b) {
        let (x, y) = (f64::from(*x), f64::from(*y));
        dot += x * y;
        na += x * x;
        nb += y * y;
    }
    if na == 0.0 || nb == 0.0 {
        0.0
    } else {
        (dot / (na.sqrt() * nb.sqrt())).clamp(-1.0, 1.0)
    }
}

/// The share of positions where two token sequences agree, counted up to the longer one (a
/// position only one of them reached disagrees), and the first position where they differ.
pub fn token_agreement(a: &[u32], b: &[u32]) -> (f64, Option<usize>) {
    let longer = a.len().max(b.len());
    if longer == 0 {
        return (1.0, None);
    }
    let same = a.iter().zip(b).filter(|(x, y)| x == y).count();
    let first = (0..longer).find(|&i| a.get(i) != b.get(i));
    (same as f64 / longer as f64, first)
}

async fn mirror_once(
    state: &SharedState,
    shadow: &ShadowArm,
    mirror: Mirror,
) -> Result<(Vec<OutcomeValue>, Option<String>), String> {
    let (adapter, version) = (
        shadow.arm.adapter.clone(),
        shadow.arm.version.clone().unwrap_or_default(),
    );
    let registry = state.registry.clone();
    let handle = tokio::task::spawn_blocking(move || registry.resolve_version(&adapter, &version))
        .await
        .map_err(|e| format!("resolving the shadow version: {e}"))?
        .map_err(|e| format!("resolving the shadow version: {e}"))?;
    let lane = state.shadow.lane;
    let admitted = Instant::now();
    let deadline = admitted + state.bounds.timeout;
    match mirror {
        Mirror::Embed { ids, answer } => {
            let out = embed(state, lane, ids, handle, admitted, deadline).await?;
            let n = answer.len().max(1) as f64;
            let mean = answer
                .iter()
                .zip(&out)
                .map(|(a, b)| cosine(a, b))
                .sum::<f64>()
                / n;
            Ok((vec![OutcomeValue::Number(mean)], None))
        }
        Mirror::Classify { ids, labels } => {
            let head = handle
                .adapter()
                .head
                .clone()
                .ok_or("the shadow version carries no classification head")?;
            let out = embed(state, lane, ids, handle, admitted, deadline).await?;
            let same = labels.iter().zip(&out).all(|(label, e)| {
                let scores = crate::model::classify::scores(e, &head).unwrap_or_default();
                let best = crate::model::sampling::argmax(&scores) as usize;
                head.labels.get(best) == Some(label)
            });
            Ok((vec![OutcomeValue::YesNo(same)], None))
        }
        Mirror::Generate {
            prompt_ids,
            sampling,
            limit,
            end_at,
            answer,
        } => {
            let tokens = (prompt_ids.len() + limit) as u64;
            let ticket = state
                .engine
                .reserve(lane, tokens)
                .map_err(|e| e.to_string())?;
            let (tx, mut rx) = mpsc::unbounded_channel();
            state
                .engine
                .try_submit(Job::Generate(GenerateJob {
                    ticket,
                    prompt_ids,
                    adapter: Some(handle),
                    sampling,
                    limit,
                    end_at,
                    admitted,
                    swap: Duration::ZERO,
                    deadline,
                    events: tx,
                }))
                .map_err(|e| e.to_string())?;
            let mut tokens = Vec::new();
            loop {
                match rx.recv().await {
                    Some(GenEvent::Token { id, .. }) => tokens.push(id),
                    Some(GenEvent::Done(_)) => break,
                    Some(GenEvent::Failed(e)) => return Err(e.to_string()),
                    None => return Err("the engine dropped the shadow generation".into()),
                }
            }
            let (share, first) = token_agreement(&answer, &tokens);
            let divergence = first.unwrap_or(answer.len());
            Ok((
                vec![
                    OutcomeValue::YesNo(first.is_none()),
                    OutcomeValue::Number(divergence as f64),
                ],
                Some(match first {
                    Some(i) => format!("tokens agree on {share:.3}; first differ at {i}"),
                    None => "tokens identical".to_owned(),
                }),
            ))
        }
    }
}

async fn embed(
    state: &SharedState,
    lane: usize,
    ids: Vec<Vec<u32>>,
    handle: switchyard_adapters::registry::AdapterHandle,
    admitted: Instant,
    deadline: Instant,
) -> Result<Vec<Vec<f32>>, String> {
    let tokens = ids.iter().map(|t| t.len() as u64).sum();
    let ticket = state
        .engine
        .reserve(lane, tokens)
        .map_err(|e| e.to_string())?;
    let (reply, rx) = oneshot::channel();
    state
        .engine
        .try_submit(Job::Embed(EmbedJob {
            ticket,
            ids,
            adapter: Some(handle),
            admitted,
            swap: Duration::ZERO,
            deadline,
            reply,
        }))
        .map_err(|e| e.to_string())?;
    let out = rx
        .await
        .map_err(|_| "the engine dropped the shadow job".to_owned())?
        .map_err(|e| e.to_string())?;
    Ok(out.embeddings)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn agreement_figures() {
        assert!((cosine(&[1.0, 0.0], &[1.0, 0.0]) - 1.0).abs() < 1e-12);
        assert!(cosine(&[1.0, 0.0], &[0.0, 1.0]).abs() < 1e-12);
        assert_eq!(cosine(&[0.0, 0.0], &[1.0, 0.0]), 0.0);
        assert_eq!(token_agreement(&[1, 2, 3], &[1, 2, 3]), (1.0, None));
        assert_eq!(
            token_agreement(&[1, 2, 3, 4], &[1, 2, 9, 4]),
            (0.75, Some(2))
        );
        // A shorter output disagrees at every position it did not reach.
        assert_eq!(token_agreement(&[1, 2], &[1, 2, 3, 4]), (0.5, Some(2)));
        assert_eq!(token_agreement(&[], &[]), (1.0, None));
    }
}
