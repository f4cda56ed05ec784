//! The portable micro-kernels: plain Rust the compiler vectorises for the baseline target, and
//! the reference every fast path is checked against. f32 has its own loop ([`f32`]); the
//! reduced formats decode each input's 16 values by the format's one definition
//! (`Block::decode`) and run the same sums ([`reduced`]).

mod f32;
mod reduced;

use super::{Inputs, MicroKernel};
use crate::pack::FormatKind;

/// Rows per register tile: 6 rows of 16 partial sums.
const ROWS: usize = 6;

/// The portable micro-kernel for a format.
pub(crate) fn kernel(format: FormatKind) -> MicroKernel {
    MicroKernel {
        rows: ROWS,
        run: match format {
            FormatKind::F32 => f32::run,
            _ => reduced::run,
        },
        inputs: Inputs::F32,
    }
}
