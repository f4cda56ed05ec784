//! Why a package was refused: one variant per validation rule, each naming the file, the tensor
//! where there is one, and the rule, so a user can fix the package from the message alone.

/// Why a package was refused. Every variant names the file it came from.
#[derive(Debug, thiserror::Error)]
pub enum PackageError {
    #[error("{file}: cannot read the package: {source} (rule: readable file)")]
    Io {
        file: String,
        source: std::io::Error,
    },
    #[error("{file}: file is {size} bytes, over the limit of {limit} bytes (rule: file size)")]
    FileTooLarge { file: String, size: u64, limit: u64 },
    #[error("{file}: header is {size} bytes, over the limit of {limit} bytes (rule: header size)")]
    HeaderTooLarge {
        file: String,
        size: u64,
        limit: usize,
    },
    #[error("{file}: not a readable safetensors file: {reason} (rule: safetensors structure)")]
    NotSafetensors { file: String, reason: String },
    #[error("{file}: metadata `{key}`: {problem} (rule: metadata)")]
    Metadata {
        file: String,
        key: String,
        problem: String,
    },
    #[error(
        "{file}: tensor `{tensor}` is not a canonical name; expected layers.N.MODULE.A or .B with MODULE one of attn.q, attn.k, attn.v, attn.o, mlp.gate, mlp.up, mlp.down, or head.weight / head.bias (rule: tensor names)"
    )]
    UnknownTensor { file: String, tensor: String },
    #[error("{file}: the package holds no factor tensors (rule: tensor names)")]
    Empty { file: String },
    #[error("{file}: tensor `{tensor}` has dtype {dtype}, only F32 is accepted (rule: dtype)")]
    Dtype {
        file: String,
        tensor: String,
        dtype: String,
    },
    #[error(
        "{file}: `{site}` has factor {present} but not its pair {missing} (rule: factor pairs)"
    )]
    MissingFactor {
        file: String,
        site: String,
        present: String,
        missing: String,
    },
    #[error("{file}: tensor `{tensor}` {problem} (rule: shapes)")]
    Shape {
        file: String,
        tensor: String,
        problem: String,
    },
    #[error(
        "{file}: tensor `{tensor}` targets a matrix the base model does not have (rule: shapes)"
    )]
    NoSuchTarget { file: String, tensor: String },
    #[error("{file}: tensor `{tensor}`: rank {rank} {problem} (rule: rank)")]
    Rank {
        file: String,
        tensor: String,
        rank: usize,
        problem: String,
    },
    #[error(
        "{file}: metadata `alpha` is {value}; it must be a finite, positive number (rule: alpha)"
    )]
    Alpha { file: String, value: String },
    #[error(
        "{file}: tensor `{tensor}` holds a non-finite value at flat index {index} (rule: finite values)"
    )]
    NonFinite {
        file: String,
        tensor: String,
        index: usize,
    },
    #[error(
        "{file}: built for base model {found}, but the loaded base is {expected} (rule: base fingerprint)"
    )]
    Fingerprint {
        file: String,
        expected: String,
        found: String,
    },
    #[error("{file}: tensor `{tensor}` {problem} (rule: head shape)")]
    HeadShape {
        file: String,
        tensor: String,
        problem: String,
    },
}

/// Every rule a package is checked against, in the order a reader meets them.
pub const RULES: [&str; 14] = [
    "readable file",
    "file size",
    "header size",
    "safetensors structure",
    "metadata",
    "tensor names",
    "dtype",
    "factor pairs",
    "shapes",
    "rank",
    "alpha",
    "finite values",
    "base fingerprint",
    "head shape",
];

impl PackageError {
    /// The rule this refusal is about, one of [`RULES`].
    pub fn rule(&self) -> &'static str {
        match self {
            PackageError::Io { .. } => "readable file",
            PackageError::FileTooLarge { .. } => "file size",
            PackageError::HeaderTooLarge { .. } => "header size",
            PackageError::NotSafetensors { .. } => "safetensors structure",
            PackageError::Metadata { .. } => "metadata",
            PackageError::UnknownTensor { .. } | PackageError::Empty { .. } => "tensor names",
            PackageError::Dtype { .. } => "dtype",
            PackageError::MissingFactor { .. } => "factor pairs",
            PackageError::Shape { .. } | PackageError::NoSuchTarget { .. } => "shapes",
            PackageError::Rank { .. } => "rank",
            PackageError::Alpha { .. } => "alpha",
            PackageError::NonFinite { .. } => "finite values",
            PackageError::Fingerprint { .. } => "base fingerprint",
            PackageError::HeadShape { .. } => "head shape",
        }
    }

    /// The file the refusal is about.
    pub fn file(&self) -> &str {
        match self {
            PackageError::Io { file, .. }
            | PackageError::FileTooLarge { file, .. }
            | PackageError::HeaderTooLarge { file, .. }
            | PackageError::NotSafetensors { file, .. }
            | PackageError::Metadata { file, .. }
            | PackageError::UnknownTensor { file, .. }
            | PackageError::Empty { file }
            | PackageError::Dtype { file, .. }
            | PackageError::MissingFactor { file, .. }
            | PackageError::Shape { file, .. }
            | PackageError::NoSuchTarget { file, .. }
            | PackageError::Rank { file, .. }
            | PackageError::Alpha { file, .. }
            | PackageError::NonFinite { file, .. }
            | PackageError::Fingerprint { file, .. }
            | PackageError::HeadShape { file, .. } => file,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_message_ends_with_its_rule() {
        let e = PackageError::Alpha {
            file: "f.safetensors".to_owned(),
            value: "-1".to_owned(),
        };
        assert!(RULES.contains(&e.rule()));
        assert!(e.to_string().ends_with("(rule: alpha)"), "{e}");
        assert_eq!(e.file(), "f.safetensors");
    }
}
