//! What MPNet adds to the BERT-family encoder of [`crate::model::bert`]: its tensor names, and
//! the relative position bias every attention layer adds to its scores. The bias is one learned
//! table `[buckets, heads]` shared by all layers; the distance from a query to a key falls into
//! a bucket (exact for short distances, logarithmic for longer ones, each direction its own
//! half of the buckets), and each head reads its own column of that bucket's row. The rest of
//! MPNet is BERT's post-norm layer, so it runs on the same layers and the same adapter-aware
//! projections.

use candle_core::Result;

use crate::model::bert::{BertConfig, LayerNames};
use crate::model::checkpoint::Weights;

/// MPNet's names for a layer's parts (BERT's `attention.self.query` is `attention.attn.q`, and
/// the attention norm sits directly under `attention`).
pub(crate) const LAYER_NAMES: LayerNames = LayerNames {
    q: "attention.attn.q",
    k: "attention.attn.k",
    v: "attention.attn.v",
    o: "attention.attn.o",
    attn_norm: "attention.LayerNorm",
    up: "intermediate.dense",
    down: "output.dense",
    out_norm: "output.LayerNorm",
};

/// The farthest distance that still gets a bucket of its own range; farther ones share the
/// last. A constant of the architecture (transformers' `relative_position_bucket` default), not
/// a config field.
const MAX_DISTANCE: usize = 128;

/// The learned relative position bias of an MPNet encoder.
pub(crate) struct RelativePositionBias {
    /// `[buckets, heads]`, row by row.
    table: Vec<f32>,
    buckets: usize,
    heads: usize,
}

impl RelativePositionBias {
    /// Reads `relative_attention_bias.weight` under `vb` (the encoder's prefix).
    pub(crate) fn load(cfg: &BertConfig, vb: &Weights<'_>) -> Result<Self> {
        let buckets = cfg.relative_attention_num_buckets;
        let heads = cfg.num_attention_heads;
        let table = vb
            .pp("relative_attention_bias")
            .tensor("weight", &[buckets, heads])?
            .flatten_all()?
            .to_vec1()?;
        Ok(Self {
            table,
            buckets,
            heads,
        })
    }

    /// The bias of every query (row) and key (column) of a `t`-token sequence, head by head:
    /// `[heads, t, t]`.
    pub(crate) fn for_length(&self, t: usize) -> Vec<f32> {
        let mut out = vec![0f32; self.heads * t * t];
        for q in 0..t {
            for k in 0..t {
                let row = bucket(k as i64 - q as i64, self.buckets, MAX_DISTANCE) * self.heads;
                for h in 0..self.heads {
                    out[(h * t + q) * t + k] = self.table[row + h];
                }
            }
        }
        out
    }

    pub(crate) fn resident_bytes(&self) -> usize {
        self.table.len() * 4
    }
}

/// The bucket of a key `relative` positions after its query (negative: before it), out of
/// `buckets`: the first half for keys at or before the query, the second for keys after it;
/// within a half, distances below a quarter of `buckets` get one bucket each, longer ones share
/// buckets on a log scale up to `max_distance`, beyond which all share the last. The log runs
/// in f32, as transformers' MPNetEncoder computes it, so the edges between buckets fall on the
/// same distances.
pub(crate) fn bucket(relative: i64, buckets: usize, max_distance: usize) -> usize {
    let half = buckets / 2;
    let side = if relative > 0 { half } else { 0 };
    let n = relative.unsigned_abs() as usize;
    let max_exact = half / 2;
    if n < max_exact {
        return side + n;
    }
    let scaled = (n as f32 / max_exact as f32).ln()
        / ((max_distance as f64 / max_exact as f64).ln() as f32)
        * (half - max_exact) as f32;
    side + (max_exact + scaled as usize).min(half - 1)
}

#[cfg(test)]
mod tests {
    use super::bucket;

    /// Buckets of transformers 5.24's `MPNetEncoder.relative_position_bucket` (32 buckets,
    /// max distance 128), printed for these distances; they include each edge where the log
    /// scale moves on a bucket (16, 32, 64) and the cap (128).
    #[test]
    fn buckets_match_transformers_at_every_edge() {
        let want = [
            (-128, 15),
            (-127, 15),
            (-65, 14),
            (-64, 14),
            (-63, 13),
            (-33, 12),
            (-32, 12),
            (-31, 11),
            (-17, 10),
            (-16, 10),
            (-15, 9),
            (-7, 7),
            (0, 0),
            (1, 17),
            (7, 23),
            (15, 25),
            (16, 26),
            (17, 26),
            (31, 27),
            (32, 28),
            (33, 28),
            (63, 29),
            (64, 30),
            (65, 30),
            (127, 31),
            (128, 31),
            (600, 31),
        ];
        for (relative, b) in want {
            assert_eq!(bucket(relative, 32, 128), b, "relative position {relative}");
        }
    }
}
