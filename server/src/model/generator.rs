//! Text generation from a decoder checkpoint: tokenise, prefill each prompt into its own KV
//! cache, then decode all live sequences together, one batched step per token.

use std::path::Path;
use std::sync::Arc;

use anyhow::Context;
use switchyard_adapters::{Adapter, BaseSpec, base_fingerprint};
use switchyard_kernels::WeightFormat;
use tokenizers::Tokenizer;

use crate::model::checkpoint::{Checkpoint, Weights, load_tokenizer};
use crate::model::llama::{KvCache, LlamaConfig, LlamaModel};
use crate::model::rows_for_sequences;
use crate::model::sampling::{Sampler, SamplingParams};

/// One sequence to generate.
#[derive(Debug, Clone)]
pub struct GenerateRequest {
    pub prompt_ids: Vec<u32>,
    pub adapter: Option<Arc<Adapter>>,
    pub limit: usize,
    pub sampling: SamplingParams,
    /// Stop at the checkpoint's end-of-sequence token.
    pub stop_at_eos: bool,
    /// Stop when one of these texts appears in the output, or one of these tokens is sampled
    /// (the caller cuts them off: see [`crate::engine::end_at`]).
    pub end_at: crate::engine::end_at::EndAt,
}

/// A decoder checkpoint ready to generate.
pub struct Generator {
    model: LlamaModel,
    tokenizer: Tokenizer,
    spec: BaseSpec,
    format: WeightFormat,
    /// The checkpoint's chat template, where it has one.
    chat: Option<crate::model::chat::ChatTemplate>,
}

impl Generator {
    /// Loads a decoder checkpoint with its weights as f32.
    pub fn load(dir: &Path) -> anyhow::Result<Self> {
        Self::load_as(dir, WeightFormat::F32)
    }

    /// Loads a decoder checkpoint with its weights held in `format`.
    pub fn load_as(dir: &Path, format: WeightFormat) -> anyhow::Result<Self> {
        let ckpt = Checkpoint::open(dir)?;
        let cfg: LlamaConfig = serde_json::from_value(ckpt.config.clone()).with_context(|| {
            format!("reading {}/config.json as a decoder config", dir.display())
        })?;
        let model = LlamaModel::new(&cfg, &Weights::new(&ckpt, format))
            .with_context(|| format!("building the decoder from {}", dir.display()))?;
        let fingerprint = base_fingerprint(ckpt.model_type(), &ckpt.tensor_shapes());
        let spec = model.spec(ckpt.model_type(), fingerprint);
        let tokenizer = load_tokenizer(&ckpt.tokenizer_path())?;
        let chat = crate::model::chat::ChatTemplate::load(dir)?;
        Ok(Self {
            model,
            tokenizer,
            spec,
            format,
            chat,
        })
    }

    /// The format the base weights are held in.
    pub fn weights_format(&self) -> WeightFormat {
        self.format
    }

    pub fn spec(&self) -> &BaseSpec {
        &self.spec
    }

    pub fn model(&self) -> &LlamaModel {
        &self.model
    }

    pub fn encode(&self, text: &str) -> anyhow::Result<Vec<u32>> {
        let enc = self
            .tokenizer
            .encode(text, true)
            .map_err(|e| anyhow::anyhow!("tokenising the prompt: {e}"))?;
        Ok(enc.get_ids().to_vec())
    }

    /// The checkpoint's chat template, where it has one.
    pub fn chat_template(&self) -> Option<&crate::model::chat::ChatTemplate> {
        self.chat.as_ref()
    }

    /// Token ids of a rendered chat prompt: no special tokens added (the template wrote them).
    pub fn encode_rendered(&self, text: &str) -> anyhow::Result<Vec<u32>> {
        let enc = self
            .tokenizer
            .encode(text, false)
            .map_err(|e| anyhow::anyhow!("tokenising the rendered chat prompt: {e}"))?;
        Ok(enc.get_ids().to_vec())
    }

    pub fn decode(&self, ids: &[u32]) -> anyhow::Result<String> {
        self.tokenizer
            .decode(ids, true)
            .map_err(|e| anyhow::anyhow!("detokenising: {e}"))
    }

    /// Generates every request together: each prompt is prefilled into its own cache, then
    /// the live sequences advance one token per batched step until each reaches its limit (or
    /// its end-of-sequence token). Returns the new token ids of each request.
    /// Whether a sequence whose output is `out` (its last token just sampled) stops here.
    fn ends(&self, req: &GenerateRequest, out: &[u32], eos: &[u32]) -> bool {
        let last = out.last().copied().unwrap_or_default();
        out.len() >= req.limit
            || (req.stop_at_eos && eos.contains(&last))
            || req.end_at.token_ids.contains(&last)
            || (!req.end_at.texts.is_empty() && {
                let text = self.decode(out).unwrap_or_default();
                req.end_at.texts.iter().any(|t| text.contains(t.as_str()))
            })
    }

    pub fn generate(&self, requests: &[GenerateRequest]) -> anyhow::Result<Vec<Vec<u32>>> {
        let eos = self.model.config.eos_ids();
        let mut caches: Vec<KvCache> = requests.iter().map(|_| self.model.new_cache()).collect();
        let mut samplers: Vec<Sampler> =
            requests.iter().map(|r| Sampler::new(r.sampling)).collect();
        let mut outputs: Vec<Vec<u32>> = vec![Vec::new(); requests.len()];
        let mut live: Vec<usize> = Vec::new();
        for (i, req) in requests.iter().enumerate() {
            anyhow::ensure!(
                !req.prompt_ids.is_empty(),
                "request {i} has an empty prompt"
            );
            if req.limit == 0 {
                continue;
            }
            let rows =
                rows_for_sequences(std::slice::from_ref(&req.adapter), &[req.prompt_ids.len()]);
            let logits =
                self.model
                    .forward_last(&[&req.prompt_ids], &mut [&mut caches[i]], &rows)?;
            let token = samplers[i].next(&logits.get(0)?.to_vec1::<f32>()?);
            outputs[i].push(token);
            if !self.ends(req, &outputs[i], &eos) {
                live.push(i);
            }
        }
        while !live.is_empty() {
            let last: Vec<[u32; 1]> = live
                .iter()
                .map(|&i| [*outputs[i].last().unwrap()])
                .collect();
            let tokens: Vec<&[u32]> = last.iter().map(|t| t.as_slice()).collect();
            let adapters: Vec<Option<Arc<Adapter>>> =
                live.iter().map(|&i| requests[i].adapter.clone()).collect();
            let rows = rows_for_sequences(&adapters, &vec![1; live.len()]);
            let mut cache_refs: Vec<&mut KvCache> = Vec::with_capacity(live.len());
            // Borrow the live sequences' caches mutably, in `live` order.
            let mut rest: &mut [KvCache] = &mut caches;
            let mut offset = 0;
            for &i in &live {
                let (_, tail) = rest.split_at_mut(i - offset);
                let (one, tail) = tail.split_at_mut(1);
                cache_refs.push(&mut one[0]);
                rest = tail;
                offset = i + 1;
            }
            let logits = self
                .model
                .forward_last(&tokens, &mut cache_refs, &rows)?
                .to_vec2::<f32>()?;
            let mut still = Vec::with_capacity(live.len());
            for (row, &i) in live.iter().enumerate() {
                let token = samplers[i].next(&logits[row]);
                outputs[i].push(token);
                if !self.ends(&requests[i], &outputs[i], &eos) {
                    still.push(i);
                }
            }
            live = still;
        }
        Ok(outputs)
    }
}
