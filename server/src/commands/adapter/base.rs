//! What the adapter commands share: reading a base model's description from its folder, the
//! package size limits as flags, and byte sizes and times written for people.

use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use switchyard_adapters::BaseSpec;
use switchyard_adapters::package::Limits;

use crate::model::embedder::Embedder;
use crate::model::generator::Generator;

/// The model families a base folder can hold, by config.json's `model_type`.
pub const KNOWN_MODEL_TYPES: &str = "bert, roberta, xlm-roberta and mpnet (encoders) and llama, mistral, qwen2, gemma and phi3 (decoders)";

/// Reads `config.json` from a model folder, or the file itself when `path` is a JSON file.
pub fn read_config(path: &Path) -> anyhow::Result<(PathBuf, serde_json::Value)> {
    let file = if path.is_dir() {
        path.join("config.json")
    } else {
        path.to_owned()
    };
    let text = std::fs::read_to_string(&file).with_context(|| {
        if path.exists() {
            format!("reading {}", file.display())
        } else {
            format!("model {} does not exist", path.display())
        }
    })?;
    let value = serde_json::from_str(&text)
        .with_context(|| format!("parsing {} as JSON", file.display()))?;
    Ok((file, value))
}

/// `model_type` of a config, or an error naming the file.
pub fn model_type(config: &serde_json::Value, file: &Path) -> anyhow::Result<String> {
    config
        .get("model_type")
        .and_then(|v| v.as_str())
        .map(str::to_owned)
        .with_context(|| format!("{} has no `model_type`", file.display()))
}

/// Loads the base model in `dir` (weights included, to compute its fingerprint) and describes
/// it: the encoder or the decoder runtime, by `model_type`.
pub fn base_spec(dir: &Path) -> anyhow::Result<BaseSpec> {
    let (file, config) = read_config(dir)?;
    let spec = match model_type(&config, &file)?.as_str() {
        t if crate::model::bert::ENCODER_TYPES.contains(&t) => Embedder::load(dir)?.spec().clone(),
        t if crate::model::llama::DECODER_TYPES.contains(&t) => {
            Generator::load(dir)?.spec().clone()
        }
        other => bail!(
            "{} has model_type {other:?}; switchyard knows {KNOWN_MODEL_TYPES}",
            file.display()
        ),
    };
    Ok(spec)
}

/// The package size limits, as flags.
#[derive(Debug, Clone, clap::Args)]
pub struct LimitArgs {
    /// Refuse package files larger than this many bytes (units allowed: 512MiB, 2GB).
    #[arg(long, value_name = "BYTES", value_parser = parse_bytes, default_value_t = Limits::default().max_file_bytes)]
    pub max_file_bytes: u64,
    /// Refuse package headers larger than this many bytes (units allowed: 64KiB).
    #[arg(long, value_name = "BYTES", value_parser = parse_bytes, default_value_t = Limits::default().max_header_bytes as u64)]
    pub max_header_bytes: u64,
    /// Refuse packages of a higher rank.
    #[arg(long, value_name = "RANK", default_value_t = Limits::default().max_rank)]
    pub max_rank: usize,
}

impl LimitArgs {
    pub fn limits(&self) -> Limits {
        Limits {
            max_header_bytes: usize::try_from(self.max_header_bytes).unwrap_or(usize::MAX),
            max_file_bytes: self.max_file_bytes,
            max_rank: self.max_rank,
        }
    }
}

/// Parses a byte count: a number with an optional unit, B, KB, MB, GB, TB (powers of 1000) or
/// KiB, MiB, GiB, TiB (powers of 1024), in any case.
pub fn parse_bytes(text: &str) -> Result<u64, String> {
    let t = text.trim();
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (number, unit) = t.split_at(split);
    let value: f64 = number
        .parse()
        .map_err(|_| format!("{text:?} is not a byte count like 4096, 512MiB or 2GB"))?;
    let scale: f64 = match unit.trim().to_ascii_lowercase().as_str() {
        "" | "b" => 1.0,
        "kb" => 1e3,
        "mb" => 1e6,
        "gb" => 1e9,
        "tb" => 1e12,
        "kib" => 1024.0,
        "mib" => 1024f64.powi(2),
        "gib" => 1024f64.powi(3),
        "tib" => 1024f64.powi(4),
        other => {
            return Err(format!(
                "unknown unit {other:?} in {text:?}; use B, KB, MB, GB, TB, KiB, MiB, GiB or TiB"
            ));
        }
    };
    let bytes = (value * scale).round();
    if !(0.0..=u64::MAX as f64).contains(&bytes) {
        return Err(format!("{text:?} is out of range"));
    }
    Ok(bytes as u64)
}

/// A byte count for people: `16.8 MB`, `1.07 GB`, `512 B`.
pub fn human_bytes(bytes: u64) -> String {
    let b = bytes as f64;
    if b < 1e3 {
        format!("{bytes} B")
    } else if b < 1e6 {
        format!("{:.1} kB", b / 1e3)
    } else if b < 1e9 {
        format!("{:.1} MB", b / 1e6)
    } else {
        format!("{:.2} GB", b / 1e9)
    }
}

/// A byte count as a person would have written it: in binary units when it is a whole number of
/// them (`1 GiB` for `--budget 1GiB`), otherwise as [`human_bytes`] does.
pub fn human_bytes_as_given(bytes: u64) -> String {
    for (unit, size) in [("TiB", 1u64 << 40), ("GiB", 1 << 30), ("MiB", 1 << 20)] {
        if bytes >= size && bytes.is_multiple_of(size) {
            return format!("{} {unit}", bytes / size);
        }
    }
    human_bytes(bytes)
}

/// A count with thousands separators: `4,194,304`.
pub fn grouped(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// A time as `YYYY-MM-DD HH:MM:SS` UTC.
pub fn utc(time: std::time::SystemTime) -> String {
    let secs = time
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs() as i64)
        .unwrap_or(0);
    let (days, rem) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    // Civil date from days since 1970-01-01 (Howard Hinnant's algorithm).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02} {:02}:{:02}:{:02}",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn byte_counts_take_decimal_and_binary_units() {
        assert_eq!(parse_bytes("4096"), Ok(4096));
        assert_eq!(parse_bytes("2GB"), Ok(2_000_000_000));
        assert_eq!(parse_bytes("1.5 KiB"), Ok(1536));
        assert_eq!(parse_bytes("4gib"), Ok(4 << 30));
        assert!(
            parse_bytes("12 parsecs")
                .unwrap_err()
                .contains("unknown unit")
        );
        assert!(
            parse_bytes("lots")
                .unwrap_err()
                .contains("not a byte count")
        );
    }

    #[test]
    fn people_numbers() {
        assert_eq!(grouped(4_194_304), "4,194,304");
        assert_eq!(grouped(999), "999");
        assert_eq!(human_bytes(16_777_216), "16.8 MB");
        // `plan --budget 1GiB` printed "1.07 GB".
        assert_eq!(human_bytes_as_given(1 << 30), "1 GiB");
        assert_eq!(human_bytes_as_given(3 << 20), "3 MiB");
        assert_eq!(human_bytes_as_given(500_000_000), "500.0 MB");
        // 2000-03-01 00:00:00 UTC is 951868800 s after the epoch (`date -u -d @951868800`).
        let t = std::time::UNIX_EPOCH + std::time::Duration::from_secs(951_868_800);
        assert_eq!(utc(t), "2000-03-01 00:00:00");
    }
}
