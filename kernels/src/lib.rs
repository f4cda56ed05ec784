//! switchyard's CPU kernels on plain slices, used by the models and by the adapter math.
//!
//! Laid out as a BLIS-style product is: [`pack`] holds weights packed once in the order the
//! inner loop reads them (and packs input rows per call), [`matmul`] is the macro loop (blocking
//! for the caches, splitting across threads, fusing low-rank terms), `micro` holds one
//! micro-kernel per instruction set that only does register-tile arithmetic, and `dispatch` is
//! the one place that picks the micro-kernel for this CPU at run time
//! (`SWITCHYARD_KERNELS=portable` forces the portable one). [`vector`] holds the vectorised
//! pieces around the product (dot, axpy, softmax, GELU, residual add with layer norm).
//!
//! Every `unsafe` block is preceded by the asserts that bound what it reads and writes.

pub mod dispatch;
pub mod matmul;
mod micro;
pub mod onednn;
pub mod pack;
#[cfg(test)]
mod test_values;
mod threads;
pub mod vector;

pub use dispatch::{Path, PathError};
pub use matmul::{
    RowTerm, RowsDone, add_rank_update, add_rank_update_on, packed_matmul, packed_matmul_on,
    packed_matmul_strided, packed_matmul_then, packed_matmul_then_on, packed_matmul_with,
};
pub use micro::Inputs;
pub use pack::{PANEL, PackedWeight, QuantError, WeightFormat};
pub use vector::{
    AttendScratch, Head, add_layer_norm_in_place, attend_head, attend_head_rounded, axpy, dot,
    dot_portable, erf_fast, exp_fast, gelu_erf_in_place, prefetch_to_l2, softmax_rows_in_place,
};
