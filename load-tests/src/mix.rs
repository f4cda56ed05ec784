//! The request mix: which inference endpoint each request goes to, drawn by weight
//! (`embed=8,classify=1,generate=1`). A server runs one model, so an encoder serves embed and
//! classify, a decoder serves generate; the mix must fit the server it is aimed at.

use std::fmt;

use rand::Rng;

/// One inference endpoint of the server.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Kind {
    Embed,
    Classify,
    Generate,
}

impl Kind {
    pub const ALL: [Kind; 3] = [Kind::Embed, Kind::Classify, Kind::Generate];

    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Embed => "embed",
            Kind::Classify => "classify",
            Kind::Generate => "generate",
        }
    }

    /// The endpoint's path.
    pub fn path(self) -> &'static str {
        match self {
            Kind::Embed => "/embed",
            Kind::Classify => "/classify",
            Kind::Generate => "/generate",
        }
    }
}

impl fmt::Display for Kind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Endpoints with their weights; only positive weights are kept.
#[derive(Debug, Clone, PartialEq)]
pub struct Mix {
    entries: Vec<(Kind, f64)>,
}

impl Mix {
    /// Only `kind`.
    pub fn only(kind: Kind) -> Self {
        Self {
            entries: vec![(kind, 1.0)],
        }
    }

    /// Parses `name=weight` pairs separated by commas; a name alone has weight 1.
    pub fn parse(text: &str) -> Result<Self, String> {
        let mut entries: Vec<(Kind, f64)> = Vec::new();
        for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            let (name, weight) = match part.split_once('=') {
                Some((n, w)) => (n.trim(), w.trim()),
                None => (part, "1"),
            };
            let kind = Kind::ALL
                .into_iter()
                .find(|k| k.as_str() == name)
                .ok_or_else(|| {
                    format!("unknown mix entry {name:?}: use embed, classify or generate")
                })?;
            let weight: f64 = weight
                .parse()
                .ok()
                .filter(|w: &f64| w.is_finite() && *w >= 0.0)
                .ok_or_else(|| {
                    format!("the weight of {name} must be a number ≥ 0, got {weight:?}")
                })?;
            if entries.iter().any(|(k, _)| *k == kind) {
                return Err(format!("mix entry {name} is given twice"));
            }
            if weight > 0.0 {
                entries.push((kind, weight));
            }
        }
        if entries.is_empty() {
            return Err(format!(
                "the mix {text:?} has no entry with a positive weight (example: embed=8,classify=2)"
            ));
        }
        Ok(Self { entries })
    }

    /// The endpoints in the mix.
    pub fn kinds(&self) -> Vec<Kind> {
        self.entries.iter().map(|(k, _)| *k).collect()
    }

    /// The share of requests that go to `kind`.
    pub fn share(&self, kind: Kind) -> f64 {
        let total: f64 = self.entries.iter().map(|(_, w)| w).sum();
        self.entries
            .iter()
            .find(|(k, _)| *k == kind)
            .map_or(0.0, |(_, w)| w / total)
    }

    pub fn sample(&self, rng: &mut impl Rng) -> Kind {
        let total: f64 = self.entries.iter().map(|(_, w)| w).sum();
        let mut u = rng.random::<f64>() * total;
        for (kind, w) in &self.entries {
            if u < *w {
                return *kind;
            }
            u -= w;
        }
        self.entries.last().expect("a mix is never empty").0
    }
}

impl fmt::Display for Mix {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let parts: Vec<String> = self
            .entries
            .iter()
            .map(|(k, w)| format!("{k}={w}"))
            .collect();
        f.write_str(&parts.join(","))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    #[test]
    fn weights_become_shares() {
        let mix = Mix::parse("embed=8, classify=1,generate=1").unwrap();
        assert_eq!(
            mix.kinds(),
            vec![Kind::Embed, Kind::Classify, Kind::Generate]
        );
        assert!((mix.share(Kind::Embed) - 0.8).abs() < 1e-12);
        assert!((mix.share(Kind::Generate) - 0.1).abs() < 1e-12);
        assert_eq!(mix.to_string(), "embed=8,classify=1,generate=1");
        // A bare name weighs 1; a zero weight drops the entry.
        let mix = Mix::parse("classify,embed=0").unwrap();
        assert_eq!(mix.kinds(), vec![Kind::Classify]);
        assert_eq!(mix.share(Kind::Embed), 0.0);
    }

    #[test]
    fn sampling_follows_the_weights() {
        let mix = Mix::parse("embed=3,classify=1").unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        let n = 40_000;
        let embeds = (0..n)
            .filter(|_| mix.sample(&mut rng) == Kind::Embed)
            .count();
        let share = embeds as f64 / n as f64;
        assert!((share - 0.75).abs() < 0.01, "embed share {share}");
    }

    #[test]
    fn bad_mixes_are_refused_with_the_entry_named() {
        let e = Mix::parse("embed=8,summarise=1").unwrap_err();
        assert!(e.contains("unknown mix entry \"summarise\""), "{e}");
        let e = Mix::parse("embed=lots").unwrap_err();
        assert!(e.contains("weight of embed"), "{e}");
        let e = Mix::parse("embed=-1").unwrap_err();
        assert!(e.contains("weight of embed"), "{e}");
        let e = Mix::parse("embed=1,embed=2").unwrap_err();
        assert!(e.contains("twice"), "{e}");
        let e = Mix::parse("embed=0").unwrap_err();
        assert!(e.contains("no entry with a positive weight"), "{e}");
        assert!(Mix::parse("").is_err());
    }
}
