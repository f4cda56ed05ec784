//! The one place that decides which code path the kernels run on this CPU, and which
//! micro-kernel serves each weight format on that path.
//!
//! A path is an instruction-set level. It is detected once, at first use, unless
//! `SWITCHYARD_KERNELS` names one (`portable`, `avx2`, `avx512`, `avx512-vnni`, `avx512-bf16`,
//! `amx`): an unknown name, or a path this CPU cannot run, is refused with a message that lists
//! the valid names (see [`chosen`]). Adding an instruction set is one new micro-kernel file under `micro/` and
//! one line of `micro_kernel`.

use crate::micro::{self, Inputs, MicroKernel};
use crate::pack::FormatKind;

/// An instruction-set level the kernels can run at, lowest first.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Path {
    /// Plain Rust that the compiler vectorises for the baseline target: the reference every
    /// other path is checked against.
    Portable,
    /// AVX2 with FMA and F16C.
    Avx2,
    /// AVX-512F (f32 tiles of up to 12 rows, weights converted in registers).
    Avx512,
    /// AVX-512F, AVX-512BW, AVX-512-VBMI and AVX-512-VNNI (Ice Lake, Sapphire Rapids and
    /// Zen 4 have all four; Cascade Lake lacks VBMI and runs `avx512`): int8 and int4 weights
    /// multiplied by `vpdpbusd` (four byte products per lane and instruction) against each
    /// row's inputs rounded to int8 in groups of 32 (f32 and bf16 as on `avx512`).
    Avx512Vnni,
    /// `avx512-vnni` plus AVX-512-BF16: bf16 weights multiplied by `vdpbf16ps`, with each row's
    /// inputs rounded to bf16 (every other format as on `avx512`).
    Avx512Bf16,
    /// `avx512-bf16` plus Intel's tile unit (AMX): bf16 weights multiplied 16 rows by 16 columns
    /// by 32 inputs per instruction once a product has at least 8 rows (fewer, and every other
    /// format, as on `avx512-bf16`). Needs the operating system's leave to use the tile state,
    /// which the process asks for on first use.
    Amx,
}

/// Every feature a path needs, in the order the paths add them (see [`Path::features`]).
const FEATURES: [&str; 11] = [
    "avx2",
    "fma",
    "f16c",
    "avx512f",
    "avx512bw",
    "avx512vbmi",
    "avx512_vnni",
    "avx512_bf16",
    "avx512vl",
    "amx_bf16",
    "amx_tile",
];

/// `SWITCHYARD_KERNELS` named no path, or one this CPU cannot run.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PathError {
    #[error(
        "SWITCHYARD_KERNELS={0:?} is not a kernel path; the valid values are {names}",
        names = Path::names()
    )]
    Unknown(String),
    #[error("SWITCHYARD_KERNELS={name}: this CPU lacks {feature}, which that path needs")]
    Unsupported {
        name: &'static str,
        feature: &'static str,
    },
}

impl Path {
    /// Every path, lowest first.
    pub const ALL: [Path; 6] = [
        Path::Portable,
        Path::Avx2,
        Path::Avx512,
        Path::Avx512Vnni,
        Path::Avx512Bf16,
        Path::Amx,
    ];

    /// The name `SWITCHYARD_KERNELS` takes and reports print.
    pub fn name(self) -> &'static str {
        match self {
            Path::Portable => "portable",
            Path::Avx2 => "avx2",
            Path::Avx512 => "avx512",
            Path::Avx512Vnni => "avx512-vnni",
            Path::Avx512Bf16 => "avx512-bf16",
            Path::Amx => "amx",
        }
    }

    /// The valid names, comma-separated.
    pub fn names() -> String {
        Path::ALL.map(Path::name).join(", ")
    }

    /// The CPU features the path needs, as `/proc/cpuinfo` spells them: each path needs what
    /// the one below it does and more, so each is a prefix of one ordered list.
    pub fn features(self) -> &'static [&'static str] {
        let n = match self {
            Path::Portable => 0,
            Path::Avx2 => 3,
            Path::Avx512 => 4,
            Path::Avx512Vnni => 7,
            Path::Avx512Bf16 => 8,
            Path::Amx => FEATURES.len(),
        };
        &FEATURES[..n]
    }

    /// The first feature the path needs that this CPU lacks; `None` when it can run here.
    pub fn missing_feature(self) -> Option<&'static str> {
        self.features().iter().copied().find(|f| !has_feature(f))
    }

    /// Whether this CPU can run the path.
    pub fn available(self) -> bool {
        self.missing_feature().is_none()
    }

    /// The path a name stands for.
    pub fn parse(name: &str) -> Result<Path, PathError> {
        Path::ALL
            .into_iter()
            .find(|p| p.name() == name)
            .ok_or_else(|| PathError::Unknown(name.to_owned()))
    }

    /// The highest path this CPU can run.
    pub fn best() -> Path {
        Path::ALL
            .into_iter()
            .rev()
            .find(|p| p.available())
            .unwrap_or(Path::Portable)
    }

    /// How a product with a weight held in `format` reads its input rows on this path: as f32,
    /// rounded to bf16 (bf16 on avx512-bf16 and amx, whose instructions take bf16 on both
    /// sides) or to int8 in groups (int8 and int4 from avx512-vnni up). Read from the micro-kernel
    /// table, so tests and tolerances follow what the kernels do.
    pub fn inputs(self, format: crate::WeightFormat) -> Inputs {
        micro_kernel(self, format.kind()).inputs
    }

    /// True when the AVX2+FMA vector pieces (softmax, GELU, layer norm, dot) run.
    pub(crate) fn avx2(self) -> bool {
        self >= Path::Avx2
    }
}

impl std::fmt::Display for Path {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

fn has_feature(name: &str) -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        match name {
            "avx2" => std::arch::is_x86_feature_detected!("avx2"),
            "fma" => std::arch::is_x86_feature_detected!("fma"),
            "f16c" => std::arch::is_x86_feature_detected!("f16c"),
            "avx512f" => std::arch::is_x86_feature_detected!("avx512f"),
            "avx512vl" => std::arch::is_x86_feature_detected!("avx512vl"),
            "avx512bw" => std::arch::is_x86_feature_detected!("avx512bw"),
            "avx512_vnni" => std::arch::is_x86_feature_detected!("avx512vnni"),
            "avx512vbmi" => std::arch::is_x86_feature_detected!("avx512vbmi"),
            "avx512_bf16" => std::arch::is_x86_feature_detected!("avx512bf16"),
            "amx_bf16" => crate::matmul::amx::cpu_has_amx_bf16(),
            // The tile instructions, the operating system saving their state, and its leave
            // for this process to use them.
            "amx_tile" => crate::matmul::amx::tiles_granted(),
            _ => false,
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = name;
        false
    }
}

/// The path `SWITCHYARD_KERNELS` asks for (validated against this CPU), or the best one this
/// CPU has when it is unset. The server calls this at start-up, so a bad value stops it with
/// the message before anything runs.
pub fn chosen() -> Result<Path, PathError> {
    match std::env::var("SWITCHYARD_KERNELS") {
        Err(_) => Ok(Path::best()),
        Ok(name) => {
            let path = Path::parse(name.trim())?;
            match path.missing_feature() {
                Some(feature) => Err(PathError::Unsupported {
                    name: path.name(),
                    feature,
                }),
                None => Ok(path),
            }
        }
    }
}

/// The path every kernel call runs on, decided once per process by [`chosen`].
///
/// # Panics
/// When `SWITCHYARD_KERNELS` is invalid; programs check [`chosen`] first to report it.
pub fn active() -> Path {
    static ACTIVE: std::sync::OnceLock<Path> = std::sync::OnceLock::new();
    *ACTIVE.get_or_init(|| chosen().unwrap_or_else(|e| panic!("{e}")))
}

/// The micro-kernel that multiplies weights of `format` on `path`: one line per instruction set
/// and format. Formats without a kernel of their own on a path use the next path down.
pub(crate) fn micro_kernel(path: Path, format: FormatKind) -> MicroKernel {
    #[cfg(target_arch = "x86_64")]
    match (path, format) {
        (Path::Portable, _) => {}
        (Path::Avx2, FormatKind::F32) => return micro::avx2::F32,
        (Path::Avx2, FormatKind::Bf16) => return micro::avx2::BF16,
        (Path::Avx2, FormatKind::Int8) => return micro::avx2::INT8,
        (Path::Avx2, FormatKind::Int4) => return micro::avx2::INT4,
        (Path::Avx512 | Path::Avx512Vnni | Path::Avx512Bf16 | Path::Amx, FormatKind::F32) => {
            return micro::avx512::F32;
        }
        (Path::Avx512 | Path::Avx512Vnni, FormatKind::Bf16) => return micro::avx512::BF16,
        (Path::Avx512Bf16 | Path::Amx, FormatKind::Bf16) => return micro::avx512bf16::BF16,
        (Path::Avx512, FormatKind::Int8) => return micro::avx512::INT8,
        (Path::Avx512Vnni | Path::Avx512Bf16 | Path::Amx, FormatKind::Int8) => {
            return micro::avx512vnni::INT8;
        }
        (Path::Avx512, FormatKind::Int4) => return micro::avx512::INT4,
        (Path::Avx512Vnni | Path::Avx512Bf16 | Path::Amx, FormatKind::Int4) => {
            return micro::avx512vnni::INT4;
        }
    }
    let _ = path;
    micro::portable::kernel(format)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_path_name_parses_back_and_unknown_names_list_the_valid_ones() {
        for p in Path::ALL {
            assert_eq!(Path::parse(p.name()), Ok(p));
        }
        let err = Path::parse("avx1024").unwrap_err().to_string();
        assert!(
            err.contains("\"avx1024\"")
                && err.contains("portable, avx2, avx512, avx512-vnni, avx512-bf16, amx"),
            "{err}"
        );
    }

    #[test]
    fn the_portable_path_needs_nothing_and_the_best_path_runs_here() {
        assert!(Path::Portable.available());
        assert!(Path::best().available());
        for p in Path::ALL {
            match p.missing_feature() {
                None => println!("path {p}: this CPU has {:?}", p.features()),
                Some(f) => println!("path {p}: not run: {f} absent"),
            }
        }
    }
}
