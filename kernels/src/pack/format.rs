//! The weight formats a [`super::PackedWeight`] can hold, and their names.

/// How a weight's values are held.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum WeightFormat {
    /// 32-bit floats, as loaded.
    F32,
    /// bfloat16: the top 16 bits of an f32, rounded to nearest, ties to even.
    Bf16,
    /// 8-bit signed integers in [-127, 127], symmetric (no zero point), with f32 scales.
    Int8 { scales: Int8Scales },
    /// 4-bit integers in groups along the input, each group with a scale (and, optionally, a
    /// zero point).
    Int4 {
        /// Inputs per group: 32 or 64.
        group: usize,
        /// With a zero point per group (unsigned values 0..=15 and `z`), or symmetric (-8..=7).
        zero_point: bool,
        scale: ScaleType,
    },
}

/// Where an int8 weight's scales apply.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Int8Scales {
    /// One scale per output row, over all its inputs.
    PerRow,
    /// One scale per output row and run of this many inputs (32, 64 or 128).
    PerGroup(usize),
}

/// How the scales of an int4 weight are stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ScaleType {
    F32,
    /// IEEE half precision: half the bytes; the quantised values are computed against the scale
    /// as rounded to f16, so they agree with it.
    F16,
}

/// The format's family, which picks the micro-kernel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FormatKind {
    F32,
    Bf16,
    Int8,
    Int4,
}

/// A format name that is none of [`WeightFormat::NAMES`].
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{0:?} is not a weight format; the formats are {names}", names = WeightFormat::NAMES.join(", "))]
pub struct UnknownFormat(pub String);

impl WeightFormat {
    /// The names [`WeightFormat::parse`] takes: `int8` has one scale per output row, `int8-gN`
    /// one per N inputs; `int4` is `int4-g32` (symmetric, f16 scales); `-zero` adds a zero
    /// point, `-f32` keeps the scales in f32.
    pub const NAMES: [&'static str; 12] = [
        "f32",
        "bf16",
        "int8",
        "int8-g32",
        "int8-g64",
        "int8-g128",
        "int4",
        "int4-g64",
        "int4-zero",
        "int4-g64-zero",
        "int4-f32",
        "int4-g64-zero-f32",
    ];

    /// The format a name stands for (see [`WeightFormat::NAMES`]; the `-g`, `-zero` and `-f32`
    /// parts of an int4 name combine in that order).
    pub fn parse(name: &str) -> Result<Self, UnknownFormat> {
        let unknown = || UnknownFormat(name.to_owned());
        match name {
            "f32" => return Ok(WeightFormat::F32),
            "bf16" => return Ok(WeightFormat::Bf16),
            "int8" => {
                return Ok(WeightFormat::Int8 {
                    scales: Int8Scales::PerRow,
                });
            }
            _ => {}
        }
        if let Some(g) = name.strip_prefix("int8-g") {
            return match g {
                "32" | "64" | "128" => Ok(WeightFormat::Int8 {
                    scales: Int8Scales::PerGroup(g.parse().unwrap()),
                }),
                _ => Err(unknown()),
            };
        }
        let mut rest = name.strip_prefix("int4").ok_or_else(unknown)?;
        let mut group = 32;
        for (suffix, g) in [("-g32", 32), ("-g64", 64)] {
            if let Some(r) = rest.strip_prefix(suffix) {
                (rest, group) = (r, g);
            }
        }
        let zero_point = match rest.strip_prefix("-zero") {
            Some(r) => {
                rest = r;
                true
            }
            None => false,
        };
        let scale = match rest {
            "" => ScaleType::F16,
            "-f32" => ScaleType::F32,
            _ => return Err(unknown()),
        };
        Ok(WeightFormat::Int4 {
            group,
            zero_point,
            scale,
        })
    }

    pub fn kind(self) -> FormatKind {
        match self {
            WeightFormat::F32 => FormatKind::F32,
            WeightFormat::Bf16 => FormatKind::Bf16,
            WeightFormat::Int8 { .. } => FormatKind::Int8,
            WeightFormat::Int4 { .. } => FormatKind::Int4,
        }
    }

    /// Inputs per group of scales, for an inner dimension `inp`: the whole row for f32, bf16
    /// and per-row int8.
    pub fn group(self, inp: usize) -> usize {
        match self {
            WeightFormat::Int8 {
                scales: Int8Scales::PerGroup(g),
            }
            | WeightFormat::Int4 { group: g, .. } => g,
            _ => inp.max(1),
        }
    }
}

impl std::fmt::Display for WeightFormat {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match *self {
            WeightFormat::F32 => f.write_str("f32"),
            WeightFormat::Bf16 => f.write_str("bf16"),
            WeightFormat::Int8 {
                scales: Int8Scales::PerRow,
            } => f.write_str("int8"),
            WeightFormat::Int8 {
                scales: Int8Scales::PerGroup(g),
            } => write!(f, "int8-g{g}"),
            WeightFormat::Int4 {
                group,
                zero_point,
                scale,
            } => {
                f.write_str("int4")?;
                if group != 32 {
                    write!(f, "-g{group}")?;
                }
                if zero_point {
                    f.write_str("-zero")?;
                }
                if scale == ScaleType::F32 {
                    f.write_str("-f32")?;
                }
                Ok(())
            }
        }
    }
}

impl std::str::FromStr for WeightFormat {
    type Err = UnknownFormat;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Self::parse(s)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_listed_name_parses_and_prints_back() {
        for name in WeightFormat::NAMES {
            let f = WeightFormat::parse(name).unwrap();
            assert_eq!(f.to_string(), name);
        }
        assert_eq!(
            WeightFormat::parse("int4-g64-f32").unwrap().to_string(),
            "int4-g64-f32"
        );
        let err = WeightFormat::parse("int3").unwrap_err().to_string();
        assert!(
            err.contains("\"int3\"") && err.contains("bf16, int8"),
            "{err}"
        );
        assert!(WeightFormat::parse("int8-g48").is_err());
        assert!(WeightFormat::parse("int4-g128").is_err());
    }
}
