//! The rules for the names, patterns and secrets a config holds. Each returns the rule a value
//! breaks, as the tail of an error message, so the caller can name the key.

/// Longest tenant name, and longest adapter pattern: the same limit as adapter names.
pub use switchyard_names::MAX_NAME_LEN;

/// Shortest API key or admin token: 16 characters keep a guessed key out of reach of a client
/// that can only try keys over HTTP.
pub const MIN_SECRET_LEN: usize = 16;

/// Longest API key or admin token; an `Authorization` header has to carry it.
pub const MAX_SECRET_LEN: usize = 512;

/// A tenant name follows the adapter name rule (`switchyard_names`); `base` is allowed, since
/// tenants and adapters do not share a namespace.
pub(crate) fn name_rule(name: &str) -> Option<String> {
    switchyard_names::check_name_or_base(name)
        .err()
        .map(|p| p.to_string())
}

/// An adapter pattern is an adapter (or split) name that may hold `*` wildcards, each standing
/// for any run of characters, the empty one included.
pub(crate) fn pattern_rule(pattern: &str) -> Option<String> {
    switchyard_names::check_pattern(pattern)
        .err()
        .map(|p| p.to_string())
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
