//! The one rule for the names users give things (adapters, splits, arms, tenants), for the
//! tenant patterns that match those names, and for the versions the store gives packages. The
//! config reader, the adapter store and the split book all check through here, so a name that
//! one part accepts every other part accepts too.
//!
//! A name is 1 to [`MAX_NAME_LEN`] characters, each a lowercase ASCII letter, a digit or '-',
//! neither starting nor ending with '-' and never holding "--". The dash rules keep every name
//! addressable from the command line (`-lead` would read as a flag) and readable in a file name.
//! Because an adapter name becomes a folder of the store, anything that could climb out of it (a
//! path separator, `..`) breaks the same rule. A version is [`VERSION_LEN`] lowercase hex digits:
//! the start of the sha256 of the package's bytes.

use thiserror::Error;

/// Longest name accepted, in characters.
pub const MAX_NAME_LEN: usize = 64;

/// The name that addresses the base model itself; no adapter or split may take it.
pub const BASE_MODEL: &str = "base";

/// Length of a version: 16 hex digits (8 bytes of a sha256).
pub const VERSION_LEN: usize = 16;

/// The characters a name may hold, as messages spell them.
pub const NAME_CHARACTERS: &str = "lowercase letters, digits and '-'";

/// Why a name (or a pattern) breaks the rule. The message is the tail of a sentence that names
/// the refused value first ("\"-lead\" is not a valid name: it starts with '-'").
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum NameProblem {
    #[error("it is empty; use {NAME_CHARACTERS}")]
    Empty,
    #[error("it has {len} characters, more than {MAX_NAME_LEN}")]
    TooLong { len: usize },
    #[error("it contains a path separator {found:?}; use {NAME_CHARACTERS}")]
    PathSeparator { found: char },
    #[error("it contains {found:?}; only {allowed} are allowed")]
    Character { found: char, allowed: &'static str },
    #[error("it starts with '-'; a name starts with a letter or a digit")]
    LeadingDash,
    #[error("it ends with '-'; a name ends with a letter or a digit")]
    TrailingDash,
    #[error("it holds \"--\"; use single dashes between words")]
    DoubleDash,
    #[error("{BASE_MODEL:?} is reserved for the base model")]
    Reserved,
}

fn name_char(c: char) -> bool {
    c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-'
}

/// Checks `text` against the name rule (the reserved word `base` included: use
/// [`check_name_or_base`] where `base` addresses the base model).
pub fn check_name(text: &str) -> Result<(), NameProblem> {
    check_name_or_base(text)?;
    if text == BASE_MODEL {
        return Err(NameProblem::Reserved);
    }
    Ok(())
}

/// The name rule, with `base` accepted: for fields that may address the base model (a request's
/// adapter, a split arm's adapter) or that live in a namespace of their own (arm names, tenant
/// names).
pub fn check_name_or_base(text: &str) -> Result<(), NameProblem> {
    check_shape(text, NAME_CHARACTERS, name_char)?;
    if text.starts_with('-') {
        return Err(NameProblem::LeadingDash);
    }
    if text.ends_with('-') {
        return Err(NameProblem::TrailingDash);
    }
    if text.contains("--") {
        return Err(NameProblem::DoubleDash);
    }
    Ok(())
}

/// Checks a tenant pattern: a name that may hold `*` wildcards, each standing for any run of
/// characters (the empty one included). Dashes are not checked at the ends, since `north-*`
/// legitimately ends its fixed part with one.
pub fn check_pattern(text: &str) -> Result<(), NameProblem> {
    check_shape(
        text,
        "lowercase letters, digits, '-' and the wildcard '*'",
        |c| name_char(c) || c == '*',
    )?;
    if text.contains("--") {
        return Err(NameProblem::DoubleDash);
    }
    Ok(())
}

fn check_shape(
    text: &str,
    allowed: &'static str,
    ok: impl Fn(char) -> bool,
) -> Result<(), NameProblem> {
    if text.is_empty() {
        return Err(NameProblem::Empty);
    }
    if let Some(found) = text.chars().find(|c| matches!(c, '/' | '\\')) {
        return Err(NameProblem::PathSeparator { found });
    }
    if let Some(found) = text.chars().find(|&c| !ok(c)) {
        return Err(NameProblem::Character { found, allowed });
    }
    // Every character is ASCII here, so bytes count characters.
    if text.len() > MAX_NAME_LEN {
        return Err(NameProblem::TooLong { len: text.len() });
    }
    Ok(())
}

/// Whether `text` has the shape of a version ([`VERSION_LEN`] lowercase hex digits), so it is
/// safe to use as a file name in the store.
pub fn is_version(text: &str) -> bool {
    text.len() == VERSION_LEN
        && text
            .bytes()
            .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
}

/// Why a text is not a version, as the tail of a message.
pub const VERSION_RULE: &str = "a version is 16 lowercase hex digits";

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_names_are_accepted() {
        for ok in [
            "support-bot",
            "a",
            "v2",
            "tenant-7-faq",
            "9-lives",
            &"x".repeat(64),
        ] {
            assert_eq!(check_name(ok), Ok(()), "{ok}");
        }
    }

    #[test]
    fn dash_at_either_end_or_doubled_is_refused_so_the_cli_can_address_every_name() {
        assert_eq!(check_name("-lead"), Err(NameProblem::LeadingDash));
        assert_eq!(check_name("lead-"), Err(NameProblem::TrailingDash));
        assert_eq!(check_name("a--b"), Err(NameProblem::DoubleDash));
        assert_eq!(check_name("-"), Err(NameProblem::LeadingDash));
    }

    #[test]
    fn each_kind_of_bad_name_gets_its_own_problem() {
        assert_eq!(check_name(""), Err(NameProblem::Empty));
        assert_eq!(
            check_name(&"x".repeat(65)),
            Err(NameProblem::TooLong { len: 65 })
        );
        assert_eq!(check_name("base"), Err(NameProblem::Reserved));
        assert_eq!(check_name_or_base("base"), Ok(()));
        for sep in ["a/b", "..\\x", "../etc"] {
            assert!(
                matches!(check_name(sep), Err(NameProblem::PathSeparator { .. })),
                "{sep}"
            );
        }
        for bad in ["..", "Upper", "a.b", "a_b", "a b", "é"] {
            assert!(
                matches!(check_name(bad), Err(NameProblem::Character { .. })),
                "{bad}"
            );
        }
    }

    #[test]
    fn patterns_take_wildcards_and_a_dash_before_one() {
        for ok in ["north-*", "*", "*-faq", "shared-faq"] {
            assert_eq!(check_pattern(ok), Ok(()), "{ok}");
        }
        assert!(check_pattern("North-*").is_err());
        assert_eq!(check_pattern("a--*"), Err(NameProblem::DoubleDash));
    }

    #[test]
    fn messages_say_the_rule() {
        let e = check_name("Support").unwrap_err().to_string();
        assert!(e.contains("'S'") && e.contains(NAME_CHARACTERS), "{e}");
        let e = check_name(&"y".repeat(70)).unwrap_err().to_string();
        assert!(e.contains("70 characters") && e.contains("64"), "{e}");
    }

    #[test]
    fn versions_are_sixteen_lowercase_hex_digits() {
        assert!(is_version("0123456789abcdef"));
        assert!(!is_version("0123456789ABCDEF"));
        assert!(!is_version("0123456789abcde"));
        assert!(!is_version("0123456789abcdef0"));
        assert!(!is_version("../../etc/passwd"));
    }

    proptest::proptest! {
        #[test]
        fn every_accepted_name_is_a_safe_single_path_component(text in "\\PC{0,70}") {
            if check_name(&text).is_ok() {
                proptest::prop_assert!(!text.contains('/') && !text.contains('\\'));
                proptest::prop_assert!(text != "." && text != "..");
                proptest::prop_assert!(!text.starts_with('-'));
                proptest::prop_assert!(text.len() <= MAX_NAME_LEN);
            }
        }
    }
}
