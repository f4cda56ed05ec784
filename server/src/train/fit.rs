//! The training loop: a zero head, seeded factors, a seeded shuffle per epoch, mini-batches
//! of cross-entropy on `softmax(W e + b)`, two AdamW optimisers (one for the factors, one for the
//! head, which needs a larger step: its input is unit-length, so its weights must grow to an
//! order of ten before the probabilities can be confident), and accuracy on the training and
//! held-out examples after every epoch.

use std::collections::BTreeMap;

use candle_core::{Device, Tensor, Var};
use candle_nn::optim::{AdamW, Optimizer, ParamsAdamW};
use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;
use switchyard_adapters::{Module, Site};

use super::encoder::{Deltas, FrozenEncoder, LowRankVars};
use super::{argmax, batch_tensors, initial_head};

/// Everything a run depends on besides the data.
#[derive(Debug, Clone)]
pub struct Settings {
    pub modules: Vec<Module>,
    pub rank: usize,
    pub alpha: f64,
    pub epochs: usize,
    /// Step size of the low-rank factors.
    pub lr: f64,
    /// Step size of the head.
    pub head_lr: f64,
    pub batch: usize,
    pub weight_decay: f64,
    pub seed: u64,
}

/// Token ids and label of each example, with the indices to train on and to hold out.
pub struct Examples<'a> {
    pub ids: &'a [Vec<u32>],
    pub labels: &'a [usize],
    pub train: &'a [usize],
    pub holdout: &'a [usize],
    pub num_labels: usize,
}

/// What one epoch did.
#[derive(Debug, Clone, PartialEq)]
pub struct EpochReport {
    pub epoch: usize,
    /// Mean cross-entropy over the epoch's mini-batches.
    pub loss: f64,
    pub train_accuracy: f64,
    pub holdout_accuracy: f64,
}

/// What the run reports while it goes.
pub enum Event<'a> {
    /// One mini-batch done, with its loss.
    Step {
        loss: f64,
    },
    Epoch(&'a EpochReport),
}

/// The trained factors and head, as plain tensors.
pub struct Trained {
    pub factors: BTreeMap<Site, (Tensor, Tensor)>,
    pub head: (Tensor, Tensor),
    pub epochs: Vec<EpochReport>,
}

/// Mini-batches per epoch for `train` examples.
pub fn steps_per_epoch(train: usize, batch: usize) -> usize {
    train.div_ceil(batch.max(1))
}

/// Runs the training.
pub fn train(
    encoder: &FrozenEncoder,
    data: &Examples,
    settings: &Settings,
    mut observe: impl FnMut(Event),
) -> anyhow::Result<Trained> {
    anyhow::ensure!(settings.batch > 0, "the batch size must be at least 1");
    let mut rng = ChaCha8Rng::seed_from_u64(settings.seed);
    let hidden = encoder.hidden_size;
    let (w, b) = initial_head(data.num_labels, hidden);
    let head_w = Var::from_tensor(&Tensor::from_vec(
        w,
        (data.num_labels, hidden),
        &Device::Cpu,
    )?)?;
    let head_b = Var::from_tensor(&Tensor::from_vec(b, data.num_labels, &Device::Cpu)?)?;
    let lowrank = LowRankVars::init(
        encoder,
        &settings.modules,
        settings.rank,
        settings.alpha,
        &mut rng,
    )?;
    let scale = settings.alpha / settings.rank as f64;
    let params = |lr: f64| ParamsAdamW {
        lr,
        weight_decay: settings.weight_decay,
        ..Default::default()
    };
    let mut factor_opt = AdamW::new(lowrank.vars(), params(settings.lr))?;
    let mut head_opt = AdamW::new(
        vec![head_w.clone(), head_b.clone()],
        params(settings.head_lr),
    )?;

    let mut order: Vec<usize> = data.train.to_vec();
    let mut epochs = Vec::with_capacity(settings.epochs);
    for epoch in 1..=settings.epochs {
        order.shuffle(&mut rng);
        let mut loss_sum = 0.0;
        let mut batches = 0;
        for chunk in order.chunks(settings.batch) {
            let ids: Vec<Vec<u32>> = chunk.iter().map(|&i| data.ids[i].clone()).collect();
            let targets: Vec<u32> = chunk.iter().map(|&i| data.labels[i] as u32).collect();
            let (ids_t, mask_t) = batch_tensors(&ids)?;
            let factors: BTreeMap<Site, (Tensor, Tensor)> = lowrank
                .factors
                .iter()
                .map(|(s, (a, b))| (*s, (a.as_tensor().clone(), b.as_tensor().clone())))
                .collect();
            let pooled = encoder.forward(
                &ids_t,
                &mask_t,
                &Deltas {
                    factors: &factors,
                    scale,
                },
            )?;
            let logits = head_logits(&pooled, head_w.as_tensor(), head_b.as_tensor())?;
            let target_t = Tensor::from_vec(targets, chunk.len(), &Device::Cpu)?;
            let loss = candle_nn::loss::cross_entropy(&logits, &target_t)?;
            let grads = loss.backward()?;
            factor_opt.step(&grads)?;
            head_opt.step(&grads)?;
            let value = f64::from(loss.to_scalar::<f32>()?);
            loss_sum += value;
            batches += 1;
            observe(Event::Step { loss: value });
        }
        let factors = lowrank.detached();
        let head = (head_w.as_tensor().detach(), head_b.as_tensor().detach());
        let accuracy = |indices: &[usize]| -> anyhow::Result<f64> {
            let predicted = predict(encoder, &factors, scale, &head, data.ids, indices)?;
            let right = indices
                .iter()
                .zip(&predicted)
                .filter(|(i, p)| data.labels[**i] == **p)
                .count();
            Ok(right as f64 / indices.len().max(1) as f64)
        };
        let report = EpochReport {
            epoch,
            loss: loss_sum / f64::from(batches.max(1)),
            train_accuracy: accuracy(data.train)?,
            holdout_accuracy: accuracy(data.holdout)?,
        };
        observe(Event::Epoch(&report));
        epochs.push(report);
    }
    Ok(Trained {
        factors: lowrank.detached(),
        head: (head_w.as_tensor().detach(), head_b.as_tensor().detach()),
        epochs,
    })
}

/// `W e + b` for each row `e` of `pooled [b, hidden]`: the logits whose softmax
/// [`crate::model::classify::scores`] serves.
pub fn head_logits(pooled: &Tensor, w: &Tensor, b: &Tensor) -> candle_core::Result<Tensor> {
    pooled.matmul(&w.t()?)?.broadcast_add(b)
}

/// The predicted label of each of `indices`, with the given factors and head (no graph built).
fn predict(
    encoder: &FrozenEncoder,
    factors: &BTreeMap<Site, (Tensor, Tensor)>,
    scale: f64,
    head: &(Tensor, Tensor),
    ids: &[Vec<u32>],
    indices: &[usize],
) -> anyhow::Result<Vec<usize>> {
    let mut out = Vec::with_capacity(indices.len());
    for chunk in indices.chunks(64) {
        let batch: Vec<Vec<u32>> = chunk.iter().map(|&i| ids[i].clone()).collect();
        let (ids_t, mask_t) = batch_tensors(&batch)?;
        let pooled = encoder.forward(&ids_t, &mask_t, &Deltas { factors, scale })?;
        let logits = head_logits(&pooled, &head.0, &head.1)?;
        let rows = logits.to_vec2::<f32>()?;
        out.extend(rows.iter().map(|r| argmax(r)));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use switchyard_adapters::TaskHead;

    use super::*;
    use crate::model::classify;

    /// The probabilities training optimises (softmax of [`head_logits`]) are the ones
    /// `/classify` serves (`classify::scores`), to f32 rounding.
    #[test]
    fn training_head_computes_what_classify_serves() {
        let e = [0.6f32, -0.8, 0.0, 0.0, 0.3, -0.1];
        let w: Vec<f32> = (0..18).map(|i| ((i * 7 % 11) as f32 - 5.0) * 0.3).collect();
        let b = vec![0.5f32, -1.0, 0.25];
        let head = TaskHead {
            weight: Tensor::from_vec(w, (3, 6), &Device::Cpu).unwrap(),
            bias: Tensor::from_vec(b, 3, &Device::Cpu).unwrap(),
            labels: vec!["a".into(), "b".into(), "c".into()],
        };
        let served = classify::scores(&e, &head).unwrap();
        let pooled = Tensor::from_vec(e.to_vec(), (1, 6), &Device::Cpu).unwrap();
        let logits = head_logits(&pooled, &head.weight, &head.bias).unwrap();
        let trained = candle_nn::ops::softmax(&logits, candle_core::D::Minus1)
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        for (s, t) in served.iter().zip(&trained[0]) {
            assert!((s - t).abs() < 1e-6, "{served:?} against {trained:?}");
        }
        assert!(
            served.iter().all(|p| *p > 0.01),
            "not a one-hot case: {served:?}"
        );
    }
}
