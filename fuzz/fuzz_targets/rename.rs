//! The rename rules of `switchyard adapter pack` (`switchyard_adapters::rename`), fed rule text
//! and tensor names. An input is rules, one per line, then a line `--`, then tensor names, one
//! per line (seeds: `fuzz/seeds/rename`).
//!
//! Properties, beyond "no panic, no overflow, no unbounded allocation, no hang":
//! - compiling is a function of the text: a rule that compiles keeps its text, and compiling
//!   that text again gives an equal rule; a refusal quotes the rule;
//! - renaming is deterministic: the same rules give the same answer for a name every time, and
//!   the answer is the first rule's that matches;
//! - a rule never produces a name that breaks the canonical-name rule: every result that `pack`
//!   takes as a factor name (`Site::parse_tensor_name` accepts it) is spelled exactly as the
//!   package writer spells that site and factor, so two different results never land on one
//!   tensor of the package;
//! - a match is what the rule says: the name begins and ends with the pattern's literal text and
//!   has exactly the pattern's dots (a placeholder matches no '.'), and the result likewise with
//!   the template's.
#![no_main]

use libfuzzer_sys::fuzz_target;
use switchyard_adapters::Site;
use switchyard_adapters::rename::{RenameRule, rename};

use switchyard_fuzz::split_at_line;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let (rule_text, names) = split_at_line(text, "--");
    let mut rules = Vec::new();
    for line in rule_text.lines() {
        match RenameRule::parse(line) {
            Ok(rule) => {
                assert_eq!(rule.as_str(), line);
                assert_eq!(RenameRule::parse(rule.as_str()).as_ref(), Ok(&rule));
                rules.push(rule);
            }
            Err(e) => assert_eq!(e.rule, line, "a refusal quotes the rule"),
        }
    }
    for name in names.unwrap_or("").lines() {
        let first = rename(&rules, name);
        assert_eq!(rename(&rules, name), first, "renaming is deterministic");
        let by_rule = rules.iter().find_map(|r| r.apply(name));
        assert_eq!(by_rule, first, "the first matching rule wins");
        let Some(new) = first else { continue };
        if let Some((site, factor)) = Site::parse_tensor_name(&new) {
            assert_eq!(
                site.tensor_name(factor),
                new,
                "a result taken as a factor name is spelled canonically"
            );
        }
        let rule = rules
            .iter()
            .find(|r| r.apply(name).is_some())
            .expect("one matched");
        let (pattern, template) = rule
            .as_str()
            .split_once('=')
            .expect("a compiled rule has '='");
        for (side, text) in [(pattern, name), (template, new.as_str())] {
            let pieces = literal_pieces(side);
            let dots: usize = pieces.iter().map(|p| p.matches('.').count()).sum();
            assert_eq!(
                text.matches('.').count(),
                dots,
                "{text:?} against {side:?}: a placeholder holds no '.'"
            );
            assert!(text.starts_with(pieces[0]) && text.ends_with(pieces[pieces.len() - 1]));
        }
    }
});

/// The literal text around the placeholders of one side of a compiled rule: the text before the
/// first `{`, between each `}` and the next `{`, and after the last `}` (empty where a
/// placeholder starts or ends the side).
fn literal_pieces(side: &str) -> Vec<&str> {
    let mut pieces = Vec::new();
    let mut parts = side.split('{');
    pieces.push(parts.next().unwrap_or(""));
    for part in parts {
        let (_, text) = part
            .split_once('}')
            .expect("a compiled rule closes every '{'");
        pieces.push(text);
    }
    pieces
}
