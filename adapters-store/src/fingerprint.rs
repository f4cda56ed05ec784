//! The base-model fingerprint ties an adapter package to the base it was trained on, and
//! [`BaseSpec`] is what validation needs to know about that base.
//!
//! The fingerprint is the first 16 hex digits of the sha256 of the text
//! `"{model_type}\n"` followed by one `"{tensor name}:{d0}x{d1}...\n"` line per checkpoint tensor,
//! sorted by name. It depends on architecture, shapes and tensor names only, not on dtype or
//! values, so a checkpoint re-saved in another precision keeps its adapters.
//! tests/reference/generate.py computes the same function in Python.

use std::collections::BTreeMap;

use sha2::{Digest, Sha256};

use crate::site::Site;

/// Computes the fingerprint of a base checkpoint from its `model_type` and its tensors' names and
/// shapes (in any order).
pub fn base_fingerprint(model_type: &str, tensors: &[(String, Vec<usize>)]) -> String {
    let mut sorted: Vec<&(String, Vec<usize>)> = tensors.iter().collect();
    sorted.sort_by(|a, b| a.0.cmp(&b.0));
    let mut text = String::with_capacity(64 * sorted.len());
    text.push_str(model_type);
    text.push('\n');
    for (name, shape) in sorted {
        text.push_str(name);
        text.push(':');
        let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
        text.push_str(&dims.join("x"));
        text.push('\n');
    }
    let digest = Sha256::digest(text.as_bytes());
    digest.iter().take(8).map(|b| format!("{b:02x}")).collect()
}

/// What a package is validated against: the base's fingerprint and the shape `[out, in]` of every
/// matrix an adapter may target.
#[derive(Debug, Clone, PartialEq)]
pub struct BaseSpec {
    pub model_type: String,
    pub fingerprint: String,
    pub num_layers: usize,
    pub hidden_size: usize,
    pub targets: BTreeMap<Site, (usize, usize)>,
}

impl BaseSpec {
    /// Shape `[out, in]` of the targeted matrix, if the base has one at `site`.
    pub fn shape(&self, site: &Site) -> Option<(usize, usize)> {
        self.targets.get(site).copied()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fingerprint_ignores_order_and_depends_on_shapes_and_names() {
        let a = vec![("w.b".to_owned(), vec![4, 3]), ("w.a".to_owned(), vec![2])];
        let b = vec![("w.a".to_owned(), vec![2]), ("w.b".to_owned(), vec![4, 3])];
        assert_eq!(base_fingerprint("bert", &a), base_fingerprint("bert", &b));
        let c = vec![("w.a".to_owned(), vec![2]), ("w.b".to_owned(), vec![4, 4])];
        assert_ne!(base_fingerprint("bert", &a), base_fingerprint("bert", &c));
        assert_ne!(base_fingerprint("bert", &a), base_fingerprint("llama", &a));
        assert_eq!(base_fingerprint("bert", &a).len(), 16);
    }

    #[test]
    fn fingerprint_matches_a_hand_computed_digest() {
        // sha256("m\nx:2x3\n") computed with coreutils: `printf 'm\nx:2x3\n' | sha256sum`.
        let fp = base_fingerprint("m", &[("x".to_owned(), vec![2, 3])]);
        assert_eq!(fp, EXPECTED_M_X_2X3);
    }

    const EXPECTED_M_X_2X3: &str = "b0276408b0973dbd";
}
