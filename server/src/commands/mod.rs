//! The offline commands of the `switchyard` binary; each takes its parsed options and the
//! standard streams, so tests can drive them without a process.

pub mod adapter;
pub mod config;
pub mod embed;
pub mod generate;
pub mod plan;
pub mod serve;
pub mod similarity;
pub mod tour;

use switchyard_kernels::WeightFormat;

/// The help text of every command's `--weights` flag.
pub const WEIGHTS_HELP: &str = "Format the base model's weights are held in, converted at load \
from the checkpoint's own dtype: f32 (exact), bf16, int8 (one scale per output row), \
int8-g32|g64|g128 (per group of inputs), int4 (groups of 32, symmetric, f16 scales), int4-g64, \
with -zero (a zero point) and -f32 (f32 scales) combinable, e.g. int4-g64-zero-f32";

/// The one line the offline commands print on stderr about the model they loaded: the weight
/// format, the kernel path and the bytes the weights hold.
pub fn model_line(format: WeightFormat, weight_bytes: usize, secs: f64) -> String {
    let path = switchyard_kernels::dispatch::active();
    let library = switchyard_kernels::onednn::in_use(path, format)
        .map(|l| format!(", {l}"))
        .unwrap_or_default();
    format!(
        "model loaded in {secs:.2} s: weights {format} ({}), kernels {path}{library}",
        crate::commands::adapter::base::human_bytes(weight_bytes as u64),
    )
}
