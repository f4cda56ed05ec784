//! Packing a weight from a source of rows, panel by panel across the thread pool: what
//! [`super::PackedWeight::pack_rows`] (and so `pack_as`) runs. Each task owns one panel's part
//! of every output buffer (values, scales, zero points), asks the source for the panel's 16 rows
//! one at a time into a buffer it reuses, and quantises them by the rules of [`super::quant`].

use rayon::prelude::*;

use super::quant::{self, QuantError};
use super::{Lines, PANEL, ScaleType, Scales, Values, WeightFormat};

/// `v` cut into `panels` consecutive parts of `each` values (all empty when `v` is empty, as
/// the scales of a format that has none).
fn per_panel<T>(v: &mut [T], each: usize, panels: usize) -> Vec<&mut [T]> {
    if v.is_empty() || each == 0 {
        return (0..panels).map(|_| <&mut [T]>::default()).collect();
    }
    v.chunks_mut(each).collect()
}

/// Row `j` from the source into `buf`, refused when an integer format meets a value it cannot
/// represent.
fn fetch<F: Fn(usize, &mut [f32])>(
    row: &F,
    j: usize,
    buf: &mut [f32],
    check: bool,
) -> Result<(), QuantError> {
    row(j, buf);
    if check && let Some(at) = first_not_finite(buf) {
        return Err(QuantError::NotFinite {
            value: buf[at],
            row: j,
            input: at,
        });
    }
    Ok(())
}

/// Where the first value that is not finite lies, if any: one branch-free pass that vectorises
/// even on the baseline target (a value is not finite when its bits less the sign exceed the
/// largest finite f32's; a signed compare, since those bits are below 2^31), and the search for
/// the first such value only when there is one.
pub(super) fn first_not_finite(v: &[f32]) -> Option<usize> {
    let bad: i32 = v
        .iter()
        .map(|x| i32::from((x.to_bits() & 0x7fff_ffff) as i32 > 0x7f7f_ffff))
        .sum();
    if bad == 0 {
        return None;
    }
    v.iter().position(|x| !x.is_finite())
}

/// The packed values of `W [out, inp]` in `format` (see the layouts in the module doc of
/// [`super`]).
pub(super) fn values<F>(
    out: usize,
    inp: usize,
    format: WeightFormat,
    row: &F,
) -> Result<Values, QuantError>
where
    F: Fn(usize, &mut [f32]) + Sync,
{
    let panels = out.div_ceil(PANEL);
    let pairs = inp.div_ceil(2);
    let group = format.group(inp);
    let groups = inp.div_ceil(group);
    let rows_in = |p: usize| (p * PANEL..((p + 1) * PANEL).min(out)).enumerate();
    let new_buf = || vec![0f32; inp];
    Ok(match format {
        WeightFormat::F32 => {
            let mut d = Lines::<f32>::zeroed(out * inp);
            d.par_chunks_mut((PANEL * inp).max(1))
                .enumerate()
                .try_for_each_init(new_buf, |buf, (p, panel)| {
                    let width = PANEL.min(out - p * PANEL);
                    for (c, j) in rows_in(p) {
                        fetch(row, j, buf, false)?;
                        for (kk, &v) in buf.iter().enumerate() {
                            panel[kk * width + c] = v;
                        }
                    }
                    Ok(())
                })?;
            Values::F32(d)
        }
        WeightFormat::Bf16 => {
            let mut v = Lines::<u32>::zeroed(panels * pairs * PANEL);
            v.par_chunks_mut((pairs * PANEL).max(1))
                .enumerate()
                .take(panels)
                .try_for_each_init(new_buf, |buf, (p, panel)| {
                    for (c, j) in rows_in(p) {
                        fetch(row, j, buf, false)?;
                        for (q, &x) in buf.iter().enumerate() {
                            let b = quant::bf16_from_f32(x) as u32;
                            panel[q / 2 * PANEL + c] |= b << (16 * (q % 2));
                        }
                    }
                    Ok(())
                })?;
            Values::Bf16(v)
        }
        WeightFormat::Int8 { .. } => {
            let mut q = Lines::<i8>::zeroed(panels * inp * PANEL);
            let mut scales = Lines::<f32>::zeroed(panels * groups * PANEL);
            let parts: Vec<_> = per_panel(&mut q, inp * PANEL, panels)
                .into_iter()
                .zip(per_panel(&mut scales, groups * PANEL, panels))
                .enumerate()
                .collect();
            parts.into_par_iter().try_for_each_init(
                || (new_buf(), vec![0i8; group]),
                |(buf, tmp), (p, (qp, sp))| {
                    for (c, j) in rows_in(p) {
                        fetch(row, j, buf, true)?;
                        for (g, vals) in buf.chunks(group).enumerate() {
                            sp[g * PANEL + c] = quant::quantise_int8(vals, tmp);
                            for (i, &v) in tmp[..vals.len()].iter().enumerate() {
                                qp[(g * group + i) * PANEL + c] = v;
                            }
                        }
                    }
                    Ok(())
                },
            )?;
            Values::Int8 { q, scales }
        }
        WeightFormat::Int4 {
            zero_point, scale, ..
        } => {
            let f16 = scale == ScaleType::F16;
            let n_scales = panels * groups * PANEL;
            let mut q = Lines::<u8>::zeroed(panels * pairs * PANEL);
            let mut s32 = Lines::<f32>::zeroed(if f16 { 0 } else { n_scales });
            let mut s16 = Lines::<u16>::zeroed(if f16 { n_scales } else { 0 });
            let mut zeros = Lines::<u8>::zeroed(if zero_point { n_scales } else { 0 });
            let each = groups * PANEL;
            assert!(
                group.is_multiple_of(2) || groups == 1,
                "an int4 group starts inside a pair"
            );
            let parts: Vec<_> = per_panel(&mut q, pairs * PANEL, panels)
                .into_iter()
                .zip(per_panel(&mut s32, each, panels))
                .zip(per_panel(&mut s16, each, panels))
                .zip(per_panel(&mut zeros, each, panels))
                .enumerate()
                .collect();
            parts.into_par_iter().try_for_each_init(
                || (new_buf(), vec![0u8; group]),
                |(buf, tmp), (p, (((qp, s32p), s16p), zp))| {
                    for c in 0..PANEL {
                        let j = p * PANEL + c;
                        if j >= out {
                            // Padding rows hold the zero nibble of a symmetric weight (8):
                            // value 0.
                            if !zero_point {
                                for pair in 0..pairs {
                                    qp[pair * PANEL + c] = 0x88;
                                }
                            }
                            continue;
                        }
                        fetch(row, j, buf, true)?;
                        for (g, vals) in buf.chunks(group).enumerate() {
                            let at = g * PANEL + c;
                            let (s, h, z) = quant::quantise_int4(vals, tmp, zero_point, f16)
                                .ok_or(QuantError::ScaleOverflow {
                                    scale: vals.iter().fold(0f32, |m, v| m.max(v.abs())) / 7.0,
                                    row: j,
                                    input: g * group,
                                })?;
                            if f16 {
                                s16p[at] = h;
                            } else {
                                s32p[at] = s;
                            }
                            if zero_point {
                                zp[at] = z;
                            }
                            // A group starts a pair (groups are 32 or 64 inputs, or one
                            // group is the whole row): one byte per pair, stored once.
                            let first = g * group / 2;
                            let n = vals.len();
                            for (i, two) in tmp[..n].chunks_exact(2).enumerate() {
                                qp[(first + i) * PANEL + c] = two[0] | two[1] << 4;
                            }
                            if n % 2 == 1 {
                                // The unused high half of an odd last pair: the zero point.
                                qp[(first + n / 2) * PANEL + c] = tmp[n - 1] | z << 4;
                            }
                        }
                    }
                    Ok(())
                },
            )?;
            let scales = if f16 {
                Scales::F16(s16)
            } else {
                Scales::F32(s32)
            };
            Values::Int4 { q, scales, zeros }
        }
    })
}

#[cfg(test)]
mod tests {
    use super::first_not_finite;

    #[test]
    fn the_first_value_that_is_not_finite_is_found_and_every_finite_one_passes() {
        let finite = [
            0.0,
            -0.0,
            1.0,
            f32::MAX,
            -f32::MAX,
            f32::MIN_POSITIVE,
            f32::from_bits(1),
            -f32::from_bits(1),
        ];
        let row: Vec<f32> = finite.iter().copied().cycle().take(37).collect();
        assert_eq!(first_not_finite(&row), None);
        for bad in [f32::NAN, -f32::NAN, f32::INFINITY, f32::NEG_INFINITY] {
            for at in [0, 5, 36] {
                let mut r = row.clone();
                r[at] = bad;
                // A second one later: the first is named.
                r[36.min(at + 3)] = bad;
                assert_eq!(first_not_finite(&r), Some(at), "{bad} at {at}");
            }
        }
    }
}
