//! The pointer file that names an adapter's live version, and the earlier live versions a
//! rollback returns to, most recent first. It is plain text, one `key value` pair a line:
//!
//! ```text
//! live 5c0f3e8a1b2d4c6e
//! previous 0a1b2c3d4e5f6071
//! ```
//!
//! The file is only ever replaced whole (write a temporary file, fsync, rename, fsync the folder),
//! so a reader sees the old pointer or the new one, never a mix.

use std::path::Path;

use crate::names::is_version;

use super::StoreError;

/// How many earlier live versions a pointer remembers for rollback.
pub const HISTORY_LEN: usize = 32;

/// An adapter's live version and its rollback history.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Pointer {
    pub live: String,
    /// Earlier live versions, most recent first.
    pub previous: Vec<String>,
}

impl Pointer {
    /// The pointer after `version` goes live: the old live version heads the history.
    pub fn flipped_to(&self, version: &str) -> Pointer {
        let mut previous = vec![self.live.clone()];
        previous.extend(self.previous.iter().cloned());
        previous.retain(|v| v != version);
        previous.dedup();
        previous.truncate(HISTORY_LEN);
        Pointer {
            live: version.to_owned(),
            previous,
        }
    }

    /// The pointer after `version` is set live over `old` (`None`: no pointer yet), or `None`
    /// when `version` is live already and nothing changes. Publish and set-live share it, on
    /// every backend.
    pub fn next_live(old: Option<&Pointer>, version: &str) -> Option<Pointer> {
        match old {
            Some(p) if p.live == version => None,
            Some(p) => Some(p.flipped_to(version)),
            None => Some(Pointer {
                live: version.to_owned(),
                previous: Vec::new(),
            }),
        }
    }

    /// The pointer after a rollback: the most recent earlier live version is live again and
    /// leaves the history. `None` when there is nothing to roll back to.
    pub fn rolled_back(&self) -> Option<Pointer> {
        let mut history = self.previous.iter().cloned();
        let live = history.next()?;
        Some(Pointer {
            live,
            previous: history.collect(),
        })
    }

    /// The pointer with `version` dropped from the history, or `None` when it is not there.
    pub fn without_history(&self, version: &str) -> Option<Pointer> {
        self.previous.iter().any(|v| v == version).then(|| Pointer {
            live: self.live.clone(),
            previous: self
                .previous
                .iter()
                .filter(|v| *v != version)
                .cloned()
                .collect(),
        })
    }

    /// The text written to the pointer file.
    pub fn render(&self) -> String {
        let mut text = format!("live {}\n", self.live);
        for v in &self.previous {
            text.push_str("previous ");
            text.push_str(v);
            text.push('\n');
        }
        text
    }

    /// Parses a pointer file's text; `path` names it in errors.
    pub fn parse(text: &str, path: &Path) -> Result<Pointer, StoreError> {
        let corrupt = |line: usize, problem: String| StoreError::CorruptPointer {
            path: path.to_owned(),
            line,
            problem,
        };
        let mut live = None;
        let mut previous = Vec::new();
        for (i, raw) in text.lines().enumerate() {
            let line = raw.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            let (key, value) = line
                .split_once(' ')
                .map(|(k, v)| (k, v.trim()))
                .ok_or_else(|| corrupt(i + 1, format!("{line:?} is not `key value`")))?;
            if !is_version(value) {
                return Err(corrupt(i + 1, format!("{value:?} is not a version")));
            }
            match key {
                "live" if live.is_none() => live = Some(value.to_owned()),
                "live" => return Err(corrupt(i + 1, "a second `live` line".to_owned())),
                "previous" => previous.push(value.to_owned()),
                other => {
                    return Err(corrupt(
                        i + 1,
                        format!("unknown key {other:?}; expected live or previous"),
                    ));
                }
            }
        }
        let live = live.ok_or_else(|| corrupt(0, "no `live` line".to_owned()))?;
        Ok(Pointer { live, previous })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const V1: &str = "1111111111111111";
    const V2: &str = "2222222222222222";
    const V3: &str = "3333333333333333";

    #[test]
    fn render_and_parse_round_trip() {
        let p = Pointer {
            live: V3.to_owned(),
            previous: vec![V2.to_owned(), V1.to_owned()],
        };
        assert_eq!(Pointer::parse(&p.render(), Path::new("live")).unwrap(), p);
    }

    #[test]
    fn flipping_keeps_history_most_recent_first_without_the_new_live() {
        let p = Pointer {
            live: V2.to_owned(),
            previous: vec![V1.to_owned()],
        };
        let q = p.flipped_to(V3);
        assert_eq!(q.live, V3);
        assert_eq!(q.previous, vec![V2, V1]);
        // Setting an old version live again takes it out of the history.
        let r = q.flipped_to(V1);
        assert_eq!(r.previous, vec![V3, V2]);
    }

    #[test]
    fn corrupt_pointers_name_the_line() {
        let err = Pointer::parse(
            "live 1111111111111111\nnext 2222222222222222\n",
            Path::new("p"),
        )
        .unwrap_err()
        .to_string();
        assert!(err.contains("line 2") && err.contains("\"next\""), "{err}");
        let err = Pointer::parse("", Path::new("p")).unwrap_err().to_string();
        assert!(err.contains("no `live` line"), "{err}");
        let err = Pointer::parse("live ../../x\n", Path::new("p"))
            .unwrap_err()
            .to_string();
        assert!(err.contains("not a version"), "{err}");
    }
}
