//! Reading quotas: the `[quota]` section (the default of every tenant, and the quota of the one
//! open tenant when no tenants are configured) and the same three keys in a `[[tenants]]` entry,
//! which win over the default key by key. One set of rules serves both places, so a refusal reads
//! the same whether it names `quota.tokens_per_minute` or `tenants[1].tokens_per_minute`.

use std::ops::RangeInclusive;

use toml::Table;

use crate::ConfigError;
use crate::read::{self, Raw, Sources, number_in, whole_in};

/// How much one tenant may ask of the server. A limit left out is no limit.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Quota {
    /// Requests admitted per second on average; a burst of up to one second's worth (at least
    /// one request) is admitted at once.
    pub requests_per_second: Option<f64>,
    /// Requests admitted and not yet finished (waiting in the queue or running) at any moment.
    pub concurrent_requests: Option<u64>,
    /// Tokens per minute: every input token, and for generation the output tokens too; up to a
    /// minute's worth at once.
    pub tokens_per_minute: Option<u64>,
}

impl Quota {
    /// This quota with each limit it leaves out taken from `default`.
    pub fn or(self, default: Quota) -> Quota {
        Quota {
            requests_per_second: self.requests_per_second.or(default.requests_per_second),
            concurrent_requests: self.concurrent_requests.or(default.concurrent_requests),
            tokens_per_minute: self.tokens_per_minute.or(default.tokens_per_minute),
        }
    }

    /// True when no limit is set.
    pub fn is_unlimited(&self) -> bool {
        *self == Quota::default()
    }
}

/// The field names, the same in `[quota]` and in a `[[tenants]]` entry.
pub(crate) const FIELDS: [&str; 3] = [
    "requests_per_second",
    "concurrent_requests",
    "tokens_per_minute",
];

/// Highest request rate a quota may name: a million per second is far past what one server
/// answers, so a larger value is a typo.
pub const MAX_REQUESTS_PER_SECOND: f64 = 1_000_000.0;
const CONCURRENT_REQUESTS: RangeInclusive<u64> = 1..=1_000_000;
const TOKENS_PER_MINUTE: RangeInclusive<u64> = 1..=1_000_000_000_000;

fn rate_rule(x: f64) -> Option<&'static str> {
    (!(x > 0.0 && x <= MAX_REQUESTS_PER_SECOND))
        .then_some("must be above 0 and at most 1000000 requests per second")
}

/// The `[quota]` section, from the file or its `SWITCHYARD_QUOTA_*` variables.
pub(crate) fn read_default_quota(src: &Sources<'_>) -> Result<Quota, ConfigError> {
    Ok(Quota {
        requests_per_second: src.optional_number(&read::QUOTA_REQUESTS_PER_SECOND, rate_rule)?,
        concurrent_requests: src
            .optional_whole(&read::QUOTA_CONCURRENT_REQUESTS, CONCURRENT_REQUESTS)?,
        tokens_per_minute: src.optional_whole(&read::QUOTA_TOKENS_PER_MINUTE, TOKENS_PER_MINUTE)?,
    })
}

/// The quota keys of one `[[tenants]]` entry at `at` (`tenants[0]`), unmerged.
pub(crate) fn read_tenant_quota(at: &str, table: &Table) -> Result<Quota, ConfigError> {
    let label = |field: &str| format!("{at}.{field}");
    let value = |field: &str| table.get(field).map(Raw::Toml);
    Ok(Quota {
        requests_per_second: value(FIELDS[0])
            .map(|raw| number_in(raw, &label(FIELDS[0]), rate_rule))
            .transpose()?,
        concurrent_requests: value(FIELDS[1])
            .map(|raw| whole_in(raw, &label(FIELDS[1]), CONCURRENT_REQUESTS))
            .transpose()?,
        tokens_per_minute: value(FIELDS[2])
            .map(|raw| whole_in(raw, &label(FIELDS[2]), TOKENS_PER_MINUTE))
            .transpose()?,
    })
}
