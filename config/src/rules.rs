//! The rules for the names, patterns and secrets a config holds. Each returns the rule a value
//! breaks, as the tail of an error message, so the caller can name the key.

/// Longest tenant name, and longest adapter pattern: the same limit as adapter names.
pub const MAX_NAME_LEN: usize = 64;

/// Shortest API key or admin token: 16 characters keep a guessed key out of reach of a client
/// that can only try keys over HTTP.
pub const MIN_SECRET_LEN: usize = 16;

/// Longest API key or admin token; an `Authorization` header has to carry it.
pub const MAX_SECRET_LEN: usize = 512;

/// A tenant name follows the adapter name rule: lowercase letters, digits and '-', 1 to 64.
pub(crate) fn name_rule(name: &str) -> Option<String> {
    charset_rule(name, "lowercase letters, digits and '-'", |c| {
        c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-'
    })
}

/// An adapter pattern is an adapter (or split) name that may hold `*` wildcards, each standing
/// for any run of characters, the empty one included.
pub(crate) fn pattern_rule(pattern: &str) -> Option<String> {
    charset_rule(
        pattern,
        "lowercase letters, digits, '-' and the wildcard '*'",
        |c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-' || c == '*',
    )
}

fn charset_rule(text: &str, allowed: &str, ok: impl Fn(char) -> bool) -> Option<String> {
    if text.is_empty() {
        return Some(format!("is empty; use {allowed}"));
    }
    if let Some(found) = text.chars().find(|&c| !ok(c)) {
        return Some(format!("contains {found:?}; only {allowed} are allowed"));
    }
    let len = text.chars().count();
    if len > MAX_NAME_LEN {
        return Some(format!(
            "is {len} characters, over the limit of {MAX_NAME_LEN}"
        ));
    }
    None
}

/// An API key or admin token: 16 to 512 printable ASCII characters, no spaces (it travels in an
/// `Authorization` header). The rule names a length and a position, never a character of it.
pub(crate) fn secret_rule(secret: &str) -> Option<String> {
    if let Some(position) = secret.chars().position(|c| !c.is_ascii_graphic()) {
        return Some(format!(
            "character {} is a space, a control character or not ASCII; use printable ASCII without spaces",
            position + 1
        ));
    }
    let len = secret.len();
    if len < MIN_SECRET_LEN {
        return Some(format!(
            "is {len} characters, fewer than the minimum of {MIN_SECRET_LEN}"
        ));
    }
    if len > MAX_SECRET_LEN {
        return Some(format!(
            "is {len} characters, over the limit of {MAX_SECRET_LEN}"
        ));
    }
    None
}

/// How the rendered settings show a secret: its length only.
pub(crate) fn redacted(secret: &str) -> String {
    format!("<redacted, {} chars>", secret.chars().count())
}
