//! The AVX2+FMA f32 micro-kernel.

use super::Tile;
use crate::pack::PANEL;

/// The AVX2+FMA tile. With fewer than four rows the fused multiply-adds of one accumulator would
/// wait on each other (a chain as long as the inner dimension) and a single stream through
/// memory would leave bandwidth unused, so the block is cut into `S` segments (4 for one row, 2
/// for two or three) that run side by side, each with its own accumulators, summed at the end.
#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
pub(super) unsafe fn packed_tile<const R: usize, const FETCH: bool, const PACKED: bool>(
    t: &Tile<'_>,
    c: &mut [f32],
) {
    match R {
        1 => unsafe { streams::<R, 4, FETCH, PACKED>(t, c) },
        2 | 3 => unsafe { streams::<R, 2, FETCH, PACKED>(t, c) },
        _ => unsafe { streams::<R, 1, FETCH, PACKED>(t, c) },
    }
}

#[allow(unsafe_code)]
#[target_feature(enable = "avx2,fma")]
unsafe fn streams<const R: usize, const S: usize, const FETCH: bool, const PACKED: bool>(
    t: &Tile<'_>,
    c: &mut [f32],
) {
    use std::arch::x86_64::*;
    let (pa, pb, pn, kb) = (t.a.as_ptr(), t.b.as_ptr(), t.next.as_ptr(), t.kb);
    // Input q of row i is at pa[q * step + i * lda]: packed, or rows lda apart.
    let (step, lda) = if PACKED {
        (R, 1)
    } else {
        (1, t.lda.unwrap_or(0))
    };
    let mut lo = [[_mm256_setzero_ps(); R]; S];
    let mut hi = [[_mm256_setzero_ps(); R]; S];
    let seg = kb / S;
    for p in 0..seg {
        for s in 0..S {
            let q = p + s * seg;
            // SAFETY: q < S * seg <= kb, so the panel row q, the row q of next and the inputs
            // q of every row are in bounds (asserted by the caller).
            unsafe {
                if FETCH {
                    _mm_prefetch::<_MM_HINT_T1>(pn.add(q * PANEL) as *const i8);
                }
                let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
                let a = pa.add(q * step);
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*a.add(i * lda));
                    lo[s][i] = _mm256_fmadd_ps(x, b0, lo[s][i]);
                    hi[s][i] = _mm256_fmadd_ps(x, b1, hi[s][i]);
                }
            }
        }
    }
    for q in S * seg..kb {
        // SAFETY: q < kb: in bounds as above.
        unsafe {
            let b0 = _mm256_loadu_ps(pb.add(q * PANEL));
            let b1 = _mm256_loadu_ps(pb.add(q * PANEL + 8));
            let a = pa.add(q * step);
            for i in 0..R {
                let x = _mm256_broadcast_ss(&*a.add(i * lda));
                lo[0][i] = _mm256_fmadd_ps(x, b0, lo[0][i]);
                hi[0][i] = _mm256_fmadd_ps(x, b1, hi[0][i]);
            }
        }
    }
    if let Some((z, zb, rank)) = t.low {
        let (pz, pzb) = (z.as_ptr(), zb.as_ptr());
        for q in 0..rank {
            // SAFETY: q < rank: z holds rank * R values and zb rank * 16 (asserted by the
            // caller).
            unsafe {
                let b0 = _mm256_loadu_ps(pzb.add(q * PANEL));
                let b1 = _mm256_loadu_ps(pzb.add(q * PANEL + 8));
                let a = pz.add(q * R);
                for i in 0..R {
                    let x = _mm256_broadcast_ss(&*a.add(i));
                    lo[0][i] = _mm256_fmadd_ps(x, b0, lo[0][i]);
                    hi[0][i] = _mm256_fmadd_ps(x, b1, hi[0][i]);
                }
            }
        }
    }
    for s in 1..S {
        for i in 0..R {
            lo[0][i] = _mm256_add_ps(lo[0][i], lo[s][i]);
            hi[0][i] = _mm256_add_ps(hi[0][i], hi[s][i]);
        }
    }
    let (mut lo, mut hi) = (lo[0], hi[0]);
    let (ldc, cols) = (t.ldc, t.cols);
    let pc = c.as_mut_ptr();
    if let (Some(bias), true) = (t.bias, cols == PANEL) {
        // SAFETY: bias holds cols = 16 values (asserted by the caller).
        let (b0, b1) = unsafe {
            (
                _mm256_loadu_ps(bias.as_ptr()),
                _mm256_loadu_ps(bias.as_ptr().add(8)),
            )
        };
        for i in 0..R {
            lo[i] = _mm256_add_ps(lo[i], b0);
            hi[i] = _mm256_add_ps(hi[i], b1);
        }
    }
    if cols == PANEL {
        for i in 0..R {
            // SAFETY: (R - 1) * ldc + 16 <= c.len() (asserted by the caller).
            unsafe {
                let d = pc.add(i * ldc);
                let (mut v0, mut v1) = (lo[i], hi[i]);
                if t.acc {
                    v0 = _mm256_add_ps(v0, _mm256_loadu_ps(d));
                    v1 = _mm256_add_ps(v1, _mm256_loadu_ps(d.add(8)));
                }
                _mm256_storeu_ps(d, v0);
                _mm256_storeu_ps(d.add(8), v1);
            }
        }
    } else {
        let mut tmp = [0f32; PANEL];
        for i in 0..R {
            // SAFETY: tmp holds 16 floats.
            unsafe {
                _mm256_storeu_ps(tmp.as_mut_ptr(), lo[i]);
                _mm256_storeu_ps(tmp.as_mut_ptr().add(8), hi[i]);
            }
            if let Some(bias) = t.bias {
                tmp.iter_mut().zip(bias).for_each(|(d, s)| *d += s);
            }
            let dst = &mut c[i * ldc..i * ldc + cols];
            if t.acc {
                dst.iter_mut().zip(&tmp).for_each(|(d, s)| *d += s);
            } else {
                dst.copy_from_slice(&tmp[..cols]);
            }
        }
    }
}
