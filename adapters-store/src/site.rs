//! Canonical names for the matrices an adapter may target. Every checkpoint loader maps its own
//! tensor names onto a [`Site`]: a transformer layer index and a [`Module`].

use std::fmt;
use std::str::FromStr;

/// One projection inside a transformer layer, under our canonical name.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Module {
    AttnQ,
    AttnK,
    AttnV,
    AttnO,
    MlpGate,
    MlpUp,
    MlpDown,
}

impl Module {
    pub const ALL: [Module; 7] = [
        Module::AttnQ,
        Module::AttnK,
        Module::AttnV,
        Module::AttnO,
        Module::MlpGate,
        Module::MlpUp,
        Module::MlpDown,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Module::AttnQ => "attn.q",
            Module::AttnK => "attn.k",
            Module::AttnV => "attn.v",
            Module::AttnO => "attn.o",
            Module::MlpGate => "mlp.gate",
            Module::MlpUp => "mlp.up",
            Module::MlpDown => "mlp.down",
        }
    }

    /// Parses a comma-separated target list such as `attn.q,attn.v`.
    pub fn parse_list(list: &str) -> Result<Vec<Module>, String> {
        let mut out = Vec::new();
        for part in list.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            let m: Module = part.parse()?;
            if !out.contains(&m) {
                out.push(m);
            }
        }
        if out.is_empty() {
            return Err("the target list is empty".to_owned());
        }
        Ok(out)
    }
}

impl fmt::Display for Module {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for Module {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Module::ALL
            .into_iter()
            .find(|m| m.as_str() == s)
            .ok_or_else(|| {
                let known: Vec<&str> = Module::ALL.iter().map(|m| m.as_str()).collect();
                format!("unknown module {s:?}; known modules: {}", known.join(", "))
            })
    }
}

/// A matrix an adapter can target: layer `layer`'s `module`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Site {
    pub layer: usize,
    pub module: Module,
}

/// Which of the two factors a tensor holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Factor {
    A,
    B,
}

impl Site {
    pub fn new(layer: usize, module: Module) -> Self {
        Self { layer, module }
    }

    /// The package tensor name of one factor, e.g. `layers.3.attn.q.A`.
    pub fn tensor_name(&self, factor: Factor) -> String {
        let f = match factor {
            Factor::A => "A",
            Factor::B => "B",
        };
        format!("layers.{}.{}.{f}", self.layer, self.module)
    }

    /// Parses a package tensor name back into its site and factor; `None` when the name is not
    /// in the canonical set.
    pub fn parse_tensor_name(name: &str) -> Option<(Site, Factor)> {
        let rest = name.strip_prefix("layers.")?;
        let (layer, rest) = rest.split_once('.')?;
        if layer.is_empty() || !layer.bytes().all(|b| b.is_ascii_digit()) || layer.len() > 6 {
            return None;
        }
        // One spelling per site: `layers.07` would be a second name for `layers.7`.
        if layer.len() > 1 && layer.starts_with('0') {
            return None;
        }
        let (module, factor) = rest.rsplit_once('.')?;
        let factor = match factor {
            "A" => Factor::A,
            "B" => Factor::B,
            _ => return None,
        };
        Some((Site::new(layer.parse().ok()?, module.parse().ok()?), factor))
    }
}

impl fmt::Display for Site {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "layers.{}.{}", self.layer, self.module)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tensor_names_round_trip() {
        for m in Module::ALL {
            let site = Site::new(11, m);
            for f in [Factor::A, Factor::B] {
                assert_eq!(
                    Site::parse_tensor_name(&site.tensor_name(f)),
                    Some((site, f))
                );
            }
        }
    }

    #[test]
    fn foreign_names_are_not_canonical() {
        for bad in [
            "layers.0.attn.q.C",
            "layers.x.attn.q.A",
            "layers.0.attn.query.A",
            "model.layers.0.attn.q.A",
            "layers..attn.q.A",
            "head.weight",
        ] {
            assert_eq!(Site::parse_tensor_name(bad), None, "{bad}");
        }
    }

    #[test]
    fn layer_with_a_leading_zero_was_a_second_name_for_the_same_site() {
        // Found by the `rename` fuzz target: `layers.09.attn.v.B` was taken for layer 9, so a
        // package (or an `adapter pack` input renamed to it) could hold two tensors for one
        // site, and one of them was silently dropped.
        assert_eq!(Site::parse_tensor_name("layers.09.attn.v.B"), None);
        assert_eq!(Site::parse_tensor_name("layers.00.attn.q.A"), None);
        let nine = Site::new(9, Module::AttnV);
        assert_eq!(
            Site::parse_tensor_name("layers.9.attn.v.B"),
            Some((nine, Factor::B))
        );
        assert_eq!(
            Site::parse_tensor_name("layers.0.attn.q.A"),
            Some((Site::new(0, Module::AttnQ), Factor::A))
        );
    }

    #[test]
    fn target_list_parses_and_names_the_unknown_entry() {
        assert_eq!(
            Module::parse_list("attn.q, attn.v").unwrap(),
            vec![Module::AttnQ, Module::AttnV]
        );
        let err = Module::parse_list("attn.q,attn.x").unwrap_err();
        assert!(err.contains("attn.x"), "{err}");
    }
}
