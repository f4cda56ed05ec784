//! Rename rules that map a foreign file's tensor names onto our canonical ones, so adapters
//! trained elsewhere come in without this crate knowing any foreign format.
//!
//! A rule is `PATTERN=TEMPLATE`. Both are literal text with placeholders in braces: `{layer}`,
//! `{x}`, any lowercase word. In the pattern a placeholder matches one or more characters other
//! than `.`; the same placeholder used twice must match the same text. The template may use only
//! placeholders the pattern captured. For example
//! `blocks.{layer}.attention.wq.down=layers.{layer}.attn.q.A` renames `blocks.3.attention.wq.down`
//! to `layers.3.attn.q.A`. Rules are tried in order; the first that matches a name wins.

use std::collections::HashMap;

/// A rule that could not be parsed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("rename rule {rule:?}: {problem}")]
pub struct RenameError {
    pub rule: String,
    pub problem: String,
}

#[derive(Debug, Clone, PartialEq, Eq)]
enum Part {
    Text(String),
    Slot(String),
}

/// One `PATTERN=TEMPLATE` rule.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RenameRule {
    text: String,
    pattern: Vec<Part>,
    template: Vec<Part>,
}

impl RenameRule {
    pub fn parse(rule: &str) -> Result<Self, RenameError> {
        let err = |problem: String| RenameError {
            rule: rule.to_owned(),
            problem,
        };
        let (from, to) = rule
            .split_once('=')
            .ok_or_else(|| err("has no '='; write PATTERN=TEMPLATE".to_owned()))?;
        if from.is_empty() || to.is_empty() {
            return Err(err("needs text on both sides of '='".to_owned()));
        }
        let pattern = parse_parts(from).map_err(&err)?;
        let template = parse_parts(to).map_err(&err)?;
        if pattern
            .windows(2)
            .any(|w| matches!(w, [Part::Slot(_), Part::Slot(_)]))
        {
            return Err(err(
                "two placeholders in a row cannot be told apart; put text between them".to_owned(),
            ));
        }
        for part in &template {
            if let Part::Slot(s) = part
                && !pattern.contains(part)
            {
                return Err(err(format!(
                    "the template uses {{{s}}}, which the pattern does not capture"
                )));
            }
        }
        Ok(Self {
            text: rule.to_owned(),
            pattern,
            template,
        })
    }

    /// The rule as written.
    pub fn as_str(&self) -> &str {
        &self.text
    }

    /// The renamed tensor, if the pattern matches all of `name`.
    pub fn apply(&self, name: &str) -> Option<String> {
        let mut captures = HashMap::new();
        if !match_parts(&self.pattern, name, &mut captures) {
            return None;
        }
        let mut out = String::new();
        for part in &self.template {
            match part {
                Part::Text(t) => out.push_str(t),
                Part::Slot(s) => out.push_str(captures.get(s.as_str())?),
            }
        }
        Some(out)
    }
}

/// The first rule's rename of `name`, if any rule matches.
pub fn rename(rules: &[RenameRule], name: &str) -> Option<String> {
    rules.iter().find_map(|r| r.apply(name))
}

fn parse_parts(text: &str) -> Result<Vec<Part>, String> {
    let mut parts = Vec::new();
    let mut rest = text;
    while !rest.is_empty() {
        match rest.find(['{', '}']) {
            None => {
                parts.push(Part::Text(rest.to_owned()));
                break;
            }
            Some(i) if rest.as_bytes()[i] == b'}' => {
                return Err(format!("'}}' without '{{' in {text:?}"));
            }
            Some(i) => {
                if i > 0 {
                    parts.push(Part::Text(rest[..i].to_owned()));
                }
                let close = rest[i..]
                    .find('}')
                    .ok_or_else(|| format!("'{{' without '}}' in {text:?}"))?;
                let slot = &rest[i + 1..i + close];
                if slot.is_empty() || !slot.bytes().all(|b| b.is_ascii_lowercase() || b == b'_') {
                    return Err(format!(
                        "placeholder {{{slot}}} must be a lowercase word, like {{layer}}"
                    ));
                }
                parts.push(Part::Slot(slot.to_owned()));
                rest = &rest[i + close + 1..];
            }
        }
    }
    Ok(parts)
}

fn match_parts(parts: &[Part], input: &str, captures: &mut HashMap<String, String>) -> bool {
    match parts.split_first() {
        None => input.is_empty(),
        Some((Part::Text(t), rest)) => input
            .strip_prefix(t.as_str())
            .is_some_and(|tail| match_parts(rest, tail, captures)),
        Some((Part::Slot(slot), rest)) => {
            let limit = input.find('.').unwrap_or(input.len());
            // A name may hold any character; a slot ends only between two of them.
            for end in (1..=limit).rev().filter(|&end| input.is_char_boundary(end)) {
                let (value, tail) = input.split_at(end);
                match captures.get(slot) {
                    Some(seen) if seen != value => continue,
                    Some(_) => {
                        if match_parts(rest, tail, captures) {
                            return true;
                        }
                    }
                    None => {
                        captures.insert(slot.clone(), value.to_owned());
                        if match_parts(rest, tail, captures) {
                            return true;
                        }
                        captures.remove(slot);
                    }
                }
            }
            false
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_rule_renames_a_matching_name_and_skips_others() {
        let rule =
            RenameRule::parse("blocks.{layer}.attention.wq.down=layers.{layer}.attn.q.A").unwrap();
        assert_eq!(
            rule.apply("blocks.3.attention.wq.down").as_deref(),
            Some("layers.3.attn.q.A")
        );
        assert_eq!(rule.apply("blocks.3.attention.wk.down"), None);
        assert_eq!(
            rule.apply("blocks.3.4.attention.wq.down"),
            None,
            "a slot holds no '.'"
        );
        assert_eq!(
            rule.apply("xblocks.3.attention.wq.down"),
            None,
            "the whole name must match"
        );
    }

    #[test]
    fn slots_can_carry_module_names_and_repeat() {
        let rule =
            RenameRule::parse("m.{layer}.{mod}_a.{layer}=layers.{layer}.attn.{mod}.A").unwrap();
        assert_eq!(
            rule.apply("m.2.q_a.2").as_deref(),
            Some("layers.2.attn.q.A")
        );
        assert_eq!(
            rule.apply("m.2.q_a.3"),
            None,
            "a repeated slot must match the same text"
        );
        // The slot takes the longest text that still lets the rest match.
        let rule = RenameRule::parse("{a}_b=x.{a}").unwrap();
        assert_eq!(rule.apply("one_two_b").as_deref(), Some("x.one_two"));
    }

    #[test]
    fn slot_over_a_non_ascii_name_panicked_inside_a_character() {
        // Found by the `rename` fuzz target: trying every byte length for `{a}` split "é" inside
        // its two bytes, and `adapter pack` panicked on a file with such a tensor name.
        let rule = RenameRule::parse("{a}_b=x.{a}").unwrap();
        assert_eq!(rule.apply("é"), None);
        assert_eq!(rule.apply("é_b").as_deref(), Some("x.é"));
        assert_eq!(rule.apply("dé_jà_b").as_deref(), Some("x.dé_jà"));
    }

    #[test]
    fn first_matching_rule_wins() {
        let rules = [
            RenameRule::parse("{x}.wq.down=layers.{x}.attn.q.A").unwrap(),
            RenameRule::parse("{x}.wq.down=never").unwrap(),
        ];
        assert_eq!(
            rename(&rules, "7.wq.down").as_deref(),
            Some("layers.7.attn.q.A")
        );
        assert_eq!(rename(&rules, "7.wq.up"), None);
    }

    #[test]
    fn malformed_rules_are_refused_with_the_reason() {
        for (bad, reason) in [
            ("no-equals-sign", "has no '='"),
            ("a.{layer=b", "'{' without '}'"),
            ("a}=b", "'}' without '{'"),
            ("a.{Layer}=b", "lowercase word"),
            ("a.{x}{y}=b", "two placeholders in a row"),
            ("a.{x}=b.{y}", "does not capture"),
            ("=b", "both sides"),
        ] {
            let e = RenameRule::parse(bad).unwrap_err().to_string();
            assert!(e.contains(reason) && e.contains(bad), "{bad}: {e}");
        }
    }
}
