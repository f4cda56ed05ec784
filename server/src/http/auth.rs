//! Who is calling, and what they may use. [`Tenants`] turns the configured API keys into a lookup
//! from an `Authorization: Bearer <key>` header to a [`Tenant`]; [`Tenant::may_use`] says whether
//! that tenant may address an adapter or split; [`check_admin`] guards the admin API.
//!
//! Keys are compared so that timing reveals nothing: the presented key and every configured key
//! are hashed (SHA-256) to equal-length digests, and the presented digest is compared against
//! every configured one with `subtle`'s constant-time equality, with no early exit, so neither
//! which key matched, how much of a key matched, nor a key's length shows in the time taken.
//! Keys are never logged, and nothing here prints one.

use std::fmt;
use std::sync::Arc;

use sha2::{Digest, Sha256};
use subtle::{Choice, ConditionallySelectable, ConstantTimeEq};
use switchyard_config::{Settings, TenantSettings};

use crate::engine::TenantLimits;

/// The name that addresses the base model; every tenant may use it.
const BASE: &str = "base";

/// The tenant every request runs as when no tenants are configured.
pub const OPEN_TENANT: &str = "default";

/// A refused credential. Each says what to do and nothing about any key.
#[derive(Debug, thiserror::Error)]
pub enum AuthError {
    #[error("missing api key: send an Authorization: Bearer header")]
    Missing,
    #[error("unknown api key")]
    Unknown,
    #[error("admin token required")]
    AdminRequired,
    #[error("admin token is wrong")]
    AdminWrong,
    #[error("admin API is disabled: no admin token is configured")]
    AdminDisabled,
}

/// One tenant: its name and the adapter name patterns it may use.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Tenant {
    pub name: String,
    /// Its place in the configured list (0 for the open tenant): the engine keeps each tenant's
    /// queue and quota by it ([`tenant_limits`]).
    pub index: usize,
    patterns: Vec<String>,
}

impl Tenant {
    /// Whether this tenant may address `adapter_or_split_name`: `base` always, anything else
    /// when one of the tenant's patterns matches it.
    pub fn may_use(&self, adapter_or_split_name: &str) -> bool {
        adapter_or_split_name == BASE
            || self
                .patterns
                .iter()
                .any(|p| pattern_matches(p, adapter_or_split_name))
    }

    /// The configured patterns (`*` matches any run of characters).
    pub fn patterns(&self) -> &[String] {
        &self.patterns
    }
}

type KeyDigest = [u8; 32];

fn digest(secret: &str) -> KeyDigest {
    Sha256::digest(secret.as_bytes()).into()
}

/// The configured tenants, and the digests of their keys.
pub struct Tenants {
    tenants: Vec<Arc<Tenant>>,
    /// Each key's digest and the index of its tenant in `tenants`.
    keys: Vec<(KeyDigest, u32)>,
    /// Set when no tenants are configured: every request runs as this tenant.
    open: Option<Arc<Tenant>>,
}

impl Tenants {
    /// Builds the lookup from validated settings (`switchyard_config` refuses duplicate names and
    /// keys; were a key listed twice anyway, the later tenant would win).
    pub fn new(settings: &[TenantSettings]) -> Tenants {
        let mut tenants = Vec::with_capacity(settings.len());
        let mut keys = Vec::new();
        for (index, t) in settings.iter().enumerate() {
            let index = u32::try_from(index).expect("fewer than 2^32 tenants");
            tenants.push(Arc::new(Tenant {
                name: t.name.clone(),
                index: index as usize,
                patterns: t.adapters.clone(),
            }));
            keys.extend(t.keys.iter().map(|k| (digest(k), index)));
        }
        let open = settings.is_empty().then(|| {
            Arc::new(Tenant {
                name: OPEN_TENANT.to_owned(),
                index: 0,
                patterns: vec!["*".to_owned()],
            })
        });
        Tenants {
            tenants,
            keys,
            open,
        }
    }

    /// True when no tenants are configured: every request is allowed as tenant `default`, with
    /// access to every adapter.
    pub fn is_open(&self) -> bool {
        self.open.is_some()
    }

    /// Each tenant that may address `adapter`, with the patterns of its that match the name; the
    /// open tenant (`default`, pattern `*`) when none is configured. The status page shows it.
    pub fn reaching(&self, adapter: &str) -> Vec<(&str, Vec<&str>)> {
        self.open
            .iter()
            .chain(&self.tenants)
            .filter_map(|t| {
                let matching: Vec<&str> = t
                    .patterns
                    .iter()
                    .filter(|p| pattern_matches(p, adapter))
                    .map(String::as_str)
                    .collect();
                (!matching.is_empty()).then_some((t.name.as_str(), matching))
            })
            .collect()
    }

    /// The tenant whose key the `Authorization` header carries (`Bearer <key>`).
    pub fn authenticate(
        &self,
        authorization_header: Option<&str>,
    ) -> Result<Arc<Tenant>, AuthError> {
        if let Some(open) = &self.open {
            return Ok(Arc::clone(open));
        }
        let key = bearer_token(authorization_header).ok_or(AuthError::Missing)?;
        let (owner, _) = self.find(&digest(key));
        owner
            .map(|i| Arc::clone(&self.tenants[i]))
            .ok_or(AuthError::Unknown)
    }

    /// The index of the tenant owning `presented`, and how many configured keys were compared
    /// (always all of them; the count lets a test pin that there is no early exit).
    fn find(&self, presented: &KeyDigest) -> (Option<usize>, usize) {
        let mut matched = Choice::from(0);
        let mut owner = 0u32;
        let mut compared = 0;
        for (key, tenant) in &self.keys {
            let equal = key.as_slice().ct_eq(presented.as_slice());
            owner.conditional_assign(tenant, equal);
            matched |= equal;
            compared += 1;
        }
        (bool::from(matched).then_some(owner as usize), compared)
    }
}

/// Each tenant's name and quota, in the order [`Tenants`] numbers them ([`Tenant::index`]): the
/// configured tenants in the file's order, or the one open tenant (with `[quota]`'s limits) when
/// none are configured. The engine keeps its per-tenant queues and quotas in this order.
pub fn tenant_limits(settings: &Settings) -> Vec<TenantLimits> {
    if settings.tenants.is_empty() {
        return vec![TenantLimits {
            name: OPEN_TENANT.to_owned(),
            quota: settings.quota,
        }];
    }
    settings
        .tenants
        .iter()
        .map(|t| TenantLimits {
            name: t.name.clone(),
            quota: t.quota,
        })
        .collect()
}

/// Keeps key digests out of `{:?}`.
impl fmt::Debug for Tenants {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let names: Vec<&str> = self.tenants.iter().map(|t| t.name.as_str()).collect();
        f.debug_struct("Tenants")
            .field("tenants", &names)
            .field("keys", &self.keys.len())
            .field("open", &self.is_open())
            .finish()
    }
}

/// Checks the admin API's bearer token against the configured one, in constant time.
pub fn check_admin(
    configured: Option<&str>,
    authorization_header: Option<&str>,
) -> Result<(), AuthError> {
    let configured = configured.ok_or(AuthError::AdminDisabled)?;
    let token = bearer_token(authorization_header).ok_or(AuthError::AdminRequired)?;
    if bool::from(digest(configured).ct_eq(&digest(token))) {
        Ok(())
    } else {
        Err(AuthError::AdminWrong)
    }
}

/// The token of a `Bearer <token>` header value. The scheme is case-insensitive (RFC 7235);
/// any other scheme, or an empty token, counts as no credential.
fn bearer_token(header: Option<&str>) -> Option<&str> {
    let (scheme, token) = header?.trim().split_once([' ', '\t'])?;
    let token = token.trim();
    (scheme.eq_ignore_ascii_case("bearer") && !token.is_empty()).then_some(token)
}

/// Whether a tenant pattern of the config (`north-*`) matches an adapter or split name.
pub fn pattern_matches(pattern: &str, name: &str) -> bool {
    wildcard_match(pattern.as_bytes(), name.as_bytes())
}

/// Whether `name` matches `pattern`, where `*` matches any run of bytes (the empty one too) and
/// every other byte matches itself. Greedy with one backtrack point, so linear in practice and
/// never exponential.
fn wildcard_match(pattern: &[u8], name: &[u8]) -> bool {
    let (mut p, mut n) = (0, 0);
    // After the last `*` seen: the pattern position after it, and the name position it resumes at.
    let mut resume: Option<(usize, usize)> = None;
    while n < name.len() {
        match pattern.get(p) {
            Some(b'*') => {
                resume = Some((p + 1, n));
                p += 1;
            }
            Some(&c) if c == name[n] => {
                p += 1;
                n += 1;
            }
            _ => match resume {
                // Let the last `*` swallow one more byte and try again from there.
                Some((after_star, start)) => {
                    resume = Some((after_star, start + 1));
                    p = after_star;
                    n = start + 1;
                }
                None => return false,
            },
        }
    }
    pattern[p..].iter().all(|&c| c == b'*')
}

#[cfg(test)]
mod tests {
    use super::*;

    const NORTH_KEY: &str = "north-key-0123456789";
    const NORTH_KEY_2: &str = "north-key-rotated-01";
    const SOUTH_KEY: &str = "south-key-0123456789";

    fn ridgeline() -> Tenants {
        Tenants::new(&[
            TenantSettings {
                name: "ridgeline-north".into(),
                keys: vec![NORTH_KEY.into(), NORTH_KEY_2.into()],
                adapters: vec!["north-*".into(), "shared-faq".into()],
                quota: Default::default(),
            },
            TenantSettings {
                name: "ridgeline-south".into(),
                keys: vec![SOUTH_KEY.into()],
                adapters: vec!["south-*".into()],
                quota: Default::default(),
            },
        ])
    }

    fn tenant(patterns: &[&str]) -> Tenant {
        Tenant {
            name: "t".into(),
            index: 0,
            patterns: patterns.iter().map(|p| p.to_string()).collect(),
        }
    }

    fn bearer(key: &str) -> String {
        format!("Bearer {key}")
    }

    #[test]
    fn each_key_authenticates_its_own_tenant() {
        let tenants = ridgeline();
        assert!(!tenants.is_open());
        for (key, name, index) in [
            (NORTH_KEY, "ridgeline-north", 0),
            (NORTH_KEY_2, "ridgeline-north", 0),
            (SOUTH_KEY, "ridgeline-south", 1),
        ] {
            let t = tenants.authenticate(Some(&bearer(key))).unwrap();
            assert_eq!((t.name.as_str(), t.index), (name, index), "{key}");
        }
    }

    #[test]
    fn unknown_and_near_miss_keys_are_refused() {
        let tenants = ridgeline();
        for key in [
            "south-key-012345678",   // one short
            "south-key-01234567890", // one long
            "South-key-0123456789",  // case differs
            "nobody-knows-this-key",
        ] {
            let err = tenants.authenticate(Some(&bearer(key))).unwrap_err();
            assert!(matches!(err, AuthError::Unknown), "{key}: {err}");
        }
    }

    #[test]
    fn every_configured_key_is_compared_whatever_matches() {
        let tenants = ridgeline();
        // The first key, the last key, and no key at all each cost all three comparisons.
        for (key, owner) in [
            (NORTH_KEY, Some(0)),
            (SOUTH_KEY, Some(1)),
            ("no-such-key-000000", None),
        ] {
            assert_eq!(tenants.find(&digest(key)), (owner, 3), "{key}");
        }
    }

    #[test]
    fn header_without_a_bearer_key_is_missing() {
        let tenants = ridgeline();
        for header in [
            None,
            Some(""),
            Some("   "),
            Some("Bearer"),
            Some("Bearer "),
            Some("Bearer    "),
            Some("Basic bm9ydGg6a2V5"),
            Some(NORTH_KEY), // a bare key, no scheme
            Some("Token north-key-0123456789"),
        ] {
            let err = tenants.authenticate(header).unwrap_err();
            assert!(matches!(err, AuthError::Missing), "{header:?}: {err}");
            assert_eq!(
                err.to_string(),
                "missing api key: send an Authorization: Bearer header"
            );
        }
    }

    #[test]
    fn bearer_scheme_is_case_insensitive_and_whitespace_tolerant() {
        let tenants = ridgeline();
        for header in [
            format!("bearer {NORTH_KEY}"),
            format!("BEARER {NORTH_KEY}"),
            format!("Bearer   {NORTH_KEY}  "),
            format!("Bearer\t{NORTH_KEY}"),
        ] {
            let t = tenants.authenticate(Some(&header)).unwrap();
            assert_eq!(t.name, "ridgeline-north", "{header:?}");
        }
    }

    #[test]
    fn no_tenants_means_open_as_default_with_everything() {
        let tenants = Tenants::new(&[]);
        assert!(tenants.is_open());
        for header in [None, Some("Bearer whatever-anyone-sends")] {
            let t = tenants.authenticate(header).unwrap();
            assert_eq!(t.name, OPEN_TENANT);
            assert!(t.may_use("north-brakes") && t.may_use("south-wheels") && t.may_use("base"));
        }
    }

    #[test]
    fn tenants_may_use_only_what_their_patterns_match() {
        let tenants = ridgeline();
        let north = tenants.authenticate(Some(&bearer(NORTH_KEY))).unwrap();
        assert!(north.may_use("north-brakes"));
        assert!(north.may_use("shared-faq"));
        assert!(!north.may_use("south-brakes"));
        assert!(
            !north.may_use("shared-faq-v2"),
            "a pattern without `*` is an exact name"
        );
        assert!(!north.may_use("northern"), "`north-*` needs the dash");
    }

    #[test]
    fn base_is_always_allowed() {
        assert!(tenant(&[]).may_use("base"));
        assert!(tenant(&["south-*"]).may_use("base"));
        assert!(!tenant(&[]).may_use("base-v2"));
    }

    #[test]
    fn wildcards_match_any_run_including_none() {
        let cases: &[(&str, &str, bool)] = &[
            ("*", "anything", true),
            ("*", "", true),
            ("north-*", "north-", true),
            ("north-*", "north-brakes", true),
            ("north-*", "north", false),
            ("*-faq", "shared-faq", true),
            ("*-faq", "shared-faq-old", false),
            ("n*-*-v2", "north-brakes-v2", true),
            ("n*-*-v2", "north-brakes-v3", false),
            ("*a*a*a*", "banana", true),
            ("*a*a*a*a*", "banana", false),
            ("a**b", "ab", true),
            ("exact", "exact", true),
            ("exact", "exactly", false),
        ];
        for &(pattern, name, expected) in cases {
            assert_eq!(
                wildcard_match(pattern.as_bytes(), name.as_bytes()),
                expected,
                "{pattern} ~ {name}"
            );
        }
    }

    #[test]
    fn reaching_names_each_tenant_whose_patterns_match_with_those_patterns() {
        let tenants = ridgeline();
        assert_eq!(
            tenants.reaching("north-routing"),
            vec![("ridgeline-north", vec!["north-*"])]
        );
        assert_eq!(
            tenants.reaching("south-urgency"),
            vec![("ridgeline-south", vec!["south-*"])]
        );
        assert!(tenants.reaching("west-routing").is_empty());
        assert_eq!(
            Tenants::new(&[]).reaching("west-routing"),
            vec![(OPEN_TENANT, vec!["*"])]
        );
    }

    #[test]
    fn admin_token_checks() {
        let token = "admin-token-0123456789";
        assert!(check_admin(Some(token), Some(&bearer(token))).is_ok());
        let disabled = check_admin(None, Some(&bearer(token)));
        assert!(matches!(disabled, Err(AuthError::AdminDisabled)));
        for header in [
            None,
            Some("Bearer ".to_owned()),
            Some(format!("Basic {token}")),
        ] {
            let err = check_admin(Some(token), header.as_deref()).unwrap_err();
            assert!(matches!(err, AuthError::AdminRequired), "{header:?}: {err}");
        }
        // One character short, and a tenant's key: both are simply wrong.
        for presented in ["admin-token-012345678", NORTH_KEY] {
            let err = check_admin(Some(token), Some(&bearer(presented))).unwrap_err();
            assert!(matches!(err, AuthError::AdminWrong), "{presented}: {err}");
        }
    }

    #[test]
    fn debug_output_shows_no_key_material() {
        let text = format!("{:?}", ridgeline());
        assert!(
            text.contains("ridgeline-north") && text.contains("keys: 3"),
            "{text}"
        );
        assert!(!text.contains("north-key"), "{text}");
    }
}
