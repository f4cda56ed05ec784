//! Adapter names and store versions, checked by the one rule of `switchyard_names` (shared with
//! the config reader and the split book): lowercase ASCII letters, digits and '-', 1 to 64
//! characters, no '-' at either end or doubled, and not the reserved word `base` (which addresses
//! the base model itself). Because a name becomes a folder of the store, anything that could
//! climb out of it (a path separator, `..`) breaks the same rule. A version is the 16 lowercase
//! hex digits of [`crate::package::content_version`].

use std::fmt;
use std::str::FromStr;

pub use switchyard_names::{
    BASE_MODEL as RESERVED_NAME, MAX_NAME_LEN, NameProblem, VERSION_LEN, is_version,
};

/// An adapter name that was refused, and why.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("adapter name {name:?} is not valid: {problem}")]
pub struct NameError {
    pub name: String,
    pub problem: NameProblem,
}

/// A validated adapter name.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct AdapterName(String);

impl AdapterName {
    /// Checks `name` against the name rule.
    pub fn new(name: &str) -> Result<Self, NameError> {
        switchyard_names::check_name(name).map_err(|problem| NameError {
            name: name.to_owned(),
            problem,
        })?;
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
    fn refusals_carry_the_rule_that_was_broken() {
        let problem = |n: &str| AdapterName::new(n).unwrap_err().problem;
        assert_eq!(problem(""), NameProblem::Empty);
        assert_eq!(problem("base"), NameProblem::Reserved);
        assert_eq!(problem("-lead"), NameProblem::LeadingDash);
        assert!(matches!(
            problem("../etc"),
            NameProblem::PathSeparator { .. }
        ));
        assert!(matches!(problem(".."), NameProblem::Character { .. }));
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
}
