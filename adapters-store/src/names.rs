//! The rules for the names users give adapters, and for the versions the store gives them.
//!
//! An adapter name is lowercase ASCII letters, digits and '-', 1 to 64 characters, and not the
//! reserved word `base` (which addresses the base model itself). Because a name becomes a folder
//! of the store, anything that could climb out of it (a path separator, `..`) is refused by the
//! same rule. A version is the 16 lowercase hex digits of [`crate::package::content_version`].

use std::fmt;
use std::str::FromStr;

/// Longest adapter name accepted.
pub const MAX_NAME_LEN: usize = 64;

/// The name that addresses the base model; no adapter may take it.
pub const RESERVED_NAME: &str = "base";

/// Length of a version: 16 hex digits (8 bytes of a sha256).
pub const VERSION_LEN: usize = 16;

/// Why an adapter name was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum NameError {
    #[error("adapter name is empty; use lowercase letters, digits and '-'")]
    Empty,
    #[error(
        "adapter name {name:?} is {len} characters, over the limit of {MAX_NAME_LEN}",
        len = name.chars().count()
    )]
    TooLong { name: String },
    #[error("adapter name {name:?} is reserved for the base model")]
    Reserved { name: String },
    #[error(
        "adapter name {name:?} contains a path separator {found:?}; a name is one folder of the store, use lowercase letters, digits and '-'"
    )]
    PathSeparator { name: String, found: char },
    #[error(
        "adapter name {name:?} contains {found:?}; only lowercase letters, digits and '-' are allowed"
    )]
    BadCharacter { name: String, found: char },
}

/// A validated adapter name.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct AdapterName(String);

impl AdapterName {
    /// Checks `name` against the rules above.
    pub fn new(name: &str) -> Result<Self, NameError> {
        if name.is_empty() {
            return Err(NameError::Empty);
        }
        if let Some(found) = name.chars().find(|c| matches!(c, '/' | '\\')) {
            return Err(NameError::PathSeparator {
                name: name.to_owned(),
                found,
            });
        }
        if let Some(found) = name
            .chars()
            .find(|c| !(c.is_ascii_lowercase() || c.is_ascii_digit() || *c == '-'))
        {
            return Err(NameError::BadCharacter {
                name: name.to_owned(),
                found,
            });
        }
        if name.len() > MAX_NAME_LEN {
            return Err(NameError::TooLong {
                name: name.to_owned(),
            });
        }
        if name == RESERVED_NAME {
            return Err(NameError::Reserved {
                name: name.to_owned(),
            });
        }
        Ok(Self(name.to_owned()))
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl fmt::Display for AdapterName {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl FromStr for AdapterName {
    type Err = NameError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Self::new(s)
    }
}

impl AsRef<str> for AdapterName {
    fn as_ref(&self) -> &str {
        &self.0
    }
}

/// Whether `text` has the shape of a version (16 lowercase hex digits), so it is safe to use as a
/// file name in the store.
pub fn is_version(text: &str) -> bool {
    text.len() == VERSION_LEN
        && text
            .bytes()
            .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_names_are_accepted() {
        for ok in ["support-bot", "a", "v2", "tenant-7-faq", &"x".repeat(64)] {
            assert_eq!(AdapterName::new(ok).unwrap().as_str(), ok);
        }
    }

    #[test]
    fn each_kind_of_bad_name_gets_its_own_error() {
        assert_eq!(AdapterName::new(""), Err(NameError::Empty));
        assert!(matches!(
            AdapterName::new(&"x".repeat(65)),
            Err(NameError::TooLong { .. })
        ));
        assert!(matches!(
            AdapterName::new("base"),
            Err(NameError::Reserved { .. })
        ));
        for sep in ["a/b", "..\\x", "../etc"] {
            assert!(
                matches!(AdapterName::new(sep), Err(NameError::PathSeparator { .. })),
                "{sep}"
            );
        }
        for bad in ["..", "Upper", "a.b", "a_b", "a b", "é"] {
            assert!(
                matches!(AdapterName::new(bad), Err(NameError::BadCharacter { .. })),
                "{bad}"
            );
        }
    }

    #[test]
    fn messages_name_the_refused_text_and_the_rule() {
        let e = AdapterName::new("Support").unwrap_err().to_string();
        assert!(e.contains("\"Support\"") && e.contains("'S'"), "{e}");
        let e = AdapterName::new("base").unwrap_err().to_string();
        assert!(e.contains("reserved for the base model"), "{e}");
        let e = AdapterName::new(&"y".repeat(70)).unwrap_err().to_string();
        assert!(e.contains("70 characters") && e.contains("64"), "{e}");
    }

    #[test]
    fn versions_are_sixteen_lowercase_hex_digits() {
        assert!(is_version("0123456789abcdef"));
        assert!(!is_version("0123456789ABCDEF"));
        assert!(!is_version("0123456789abcde"));
        assert!(!is_version("../../etc/passwd"));
    }
}
