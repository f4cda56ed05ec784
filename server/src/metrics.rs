//! Prometheus metrics (text exposition format 0.0.4 at `/metrics`), all prefixed `switchyard_`,
//! in base units, with `_total` on counters. The engine and the handlers record into
//! [`Metrics`]; a thread turns the registry's swap events into the swap and residency metrics.
//!
//! Label values stay bounded: requests are labelled by adapter name (never by version), for at
//! most `adapter_series` names (the first seen; later ones count as `other`), and a deleted
//! split's series are dropped. `promtool check metrics` accepts the output (a test runs it).

use std::collections::HashSet;
use std::sync::atomic::AtomicU64;
use std::sync::{Mutex, PoisonError};

use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{Histogram, exponential_buckets};
use prometheus_client::registry::Registry;
use switchyard_adapters::events::{SwapEvent, SwapKind, Tier};
use switchyard_adapters::store::CacheStats;

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct RequestLabels {
    pub endpoint: String,
    pub adapter: String,
    pub status: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct StageLabels {
    pub stage: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct TierLabels {
    pub tier: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct CacheLabels {
    pub tier: String,
    pub outcome: String,
}

/// The base model's weight format and the kernel path: one series, fixed at start-up.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct BaseLabels {
    pub weights: String,
    pub kernels: String,
    /// `onednn` when large f32 products go to oneDNN, else `none`.
    pub library: String,
}

/// A refusal before queueing; `tenant` is a configured tenant's name (or `default`), so the
/// series are bounded by the config.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct RefusalLabels {
    pub tenant: String,
    pub reason: String,
}

/// Where a prompt token's keys and values came from: `prefilled` by a forward pass, or `reused`
/// from the prefix cache.
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct PromptLabels {
    pub source: String,
}

/// Whether a request's adapter had to be brought into the factor tier for it (`cold`) or was
/// resident (`warm`).
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct StartLabels {
    pub start: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct ArmLabels {
    pub split: String,
    pub arm: String,
}

/// A rollout action: the split, what was done (`promoted`, `flipped`, `rolled_back`, `paused`,
/// `resumed`) and by whom (`policy` or `operator`).
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct RolloutLabels {
    pub split: String,
    pub action: String,
    pub by: String,
}

/// A shadow request: the split and what became of it (`ran`, `skipped_busy`, `failed`).
#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct ShadowLabels {
    pub split: String,
    pub result: String,
}

fn seconds_histogram() -> Histogram {
    // 0.1 ms to ~13 s.
    Histogram::new(exponential_buckets(0.0001, 2.0, 18))
}

/// Every metric switchyard exports.
pub struct Metrics {
    registry: Mutex<Registry>,
    pub requests: Family<RequestLabels, Counter>,
    pub swap_seconds: Family<StageLabels, Histogram, fn() -> Histogram>,
    pub resident_bytes: Family<TierLabels, Gauge<i64, AtomicI64Compat>>,
    pub cache: Family<CacheLabels, Counter>,
    pub queue_depth: Gauge,
    pub batch_rows: Histogram,
    pub first_token_seconds: Histogram,
    pub request_seconds: Histogram,
    pub adapter_answer_seconds: Family<StartLabels, Histogram, fn() -> Histogram>,
    pub generated_tokens: Counter,
    pub prompt_tokens: Family<PromptLabels, Counter>,
    pub prefix_cache_bytes: Gauge,
    pub engine_restarts: Counter,
    pub arm_requests: Family<ArmLabels, Counter>,
    pub rollout_actions: Family<RolloutLabels, Counter>,
    pub shadow_requests: Family<ShadowLabels, Counter>,
    pub refusals: Family<RefusalLabels, Counter>,
    pub swap_events_dropped: Counter<u64, AtomicU64>,
    pub process_resident_bytes: Gauge,
    pub base_weights: Family<BaseLabels, Gauge>,
    pub base_weight_bytes: Gauge,
    pub package_cache_fetched_bytes: Counter,
    pub package_cache_limit_bytes: Gauge,
    /// Adapter names that have their own request series; at most `adapter_series` of them.
    labelled_adapters: Mutex<HashSet<String>>,
    adapter_series: usize,
    /// Evictions from the factor and merged tiers so far (the package cache counts its own).
    evictions: AtomicU64,
}

/// The tier label of the package cache, the local disk tier in front of an object store.
pub const DISK_TIER: &str = "disk";

/// The label value of requests to adapters beyond the bounded set.
pub const OTHER_ADAPTERS: &str = "other";

type AtomicI64Compat = std::sync::atomic::AtomicI64;

impl std::fmt::Debug for Metrics {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Metrics")
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Self::new(100)
    }
}

impl Metrics {
    /// Every metric, with request series for at most `adapter_series` adapter names.
    pub fn new(adapter_series: usize) -> Self {
        let mut registry = Registry::with_prefix("switchyard");
        let requests = Family::<RequestLabels, Counter>::default();
        registry.register(
            "requests",
            "Requests by endpoint, adapter and status",
            requests.clone(),
        );
        let swap_seconds =
            Family::<StageLabels, Histogram, fn() -> Histogram>::new_with_constructor(
                seconds_histogram,
            );
        registry.register(
            "swap_seconds",
            "Time to bring an adapter version in, by stage (read, validate, convert, load = the three together, merge)",
            swap_seconds.clone(),
        );
        let resident_bytes = Family::<TierLabels, Gauge<i64, AtomicI64Compat>>::default();
        registry.register(
            "resident_bytes",
            "Bytes held by each residency tier (disk: the package cache of an object store; factors, merged)",
            resident_bytes.clone(),
        );
        let cache = Family::<CacheLabels, Counter>::default();
        registry.register(
            "cache_events",
            "Cache hits, misses and evictions by tier",
            cache.clone(),
        );
        let queue_depth = Gauge::default();
        registry.register(
            "queue_depth",
            "Jobs waiting for the engine",
            queue_depth.clone(),
        );
        let batch_rows = Histogram::new(exponential_buckets(1.0, 2.0, 12));
        registry.register("batch_rows", "Rows per forward pass", batch_rows.clone());
        let first_token_seconds = seconds_histogram();
        registry.register(
            "first_token_seconds",
            "Time from admission to the first generated token",
            first_token_seconds.clone(),
        );
        let request_seconds = seconds_histogram();
        registry.register(
            "request_seconds",
            "Time from admission to the last byte of the answer",
            request_seconds.clone(),
        );
        let adapter_answer_seconds =
            Family::<StartLabels, Histogram, fn() -> Histogram>::new_with_constructor(
                seconds_histogram,
            );
        registry.register(
            "adapter_answer_seconds",
            "Time from arrival to the answer (a generation: to its first token) of requests \
             served by an adapter, by whether its factors were loaded for the request (cold) or \
             resident (warm)",
            adapter_answer_seconds.clone(),
        );
        let generated_tokens = Counter::default();
        registry.register(
            "generated_tokens",
            "Tokens generated",
            generated_tokens.clone(),
        );
        let prompt_tokens = Family::<PromptLabels, Counter>::default();
        registry.register(
            "prompt_tokens",
            "Prompt tokens of generations, by source: prefilled, or reused from the prefix cache",
            prompt_tokens.clone(),
        );
        let prefix_cache_bytes = Gauge::default();
        registry.register(
            "prefix_cache_bytes",
            "Bytes of prompt KV cache the prefix cache holds",
            prefix_cache_bytes.clone(),
        );
        let engine_restarts = Counter::default();
        registry.register(
            "engine_restarts",
            "Times the engine loop restarted after a panic outside a batch",
            engine_restarts.clone(),
        );
        let arm_requests = Family::<ArmLabels, Counter>::default();
        registry.register(
            "split_requests",
            "Requests assigned to each arm of each split",
            arm_requests.clone(),
        );
        let rollout_actions = Family::<RolloutLabels, Counter>::default();
        registry.register(
            "rollout_actions",
            "Actions this replica took on split rollouts, by split, action and who decided (policy or operator)",
            rollout_actions.clone(),
        );
        let shadow_requests = Family::<ShadowLabels, Counter>::default();
        registry.register(
            "shadow_requests",
            "Requests mirrored to a split's shadow arm, by split and result (ran, skipped_busy: the server was busy, failed); never part of the request counts",
            shadow_requests.clone(),
        );
        let refusals = Family::<RefusalLabels, Counter>::default();
        registry.register(
            "refusals",
            "Requests refused by a tenant's quota or its share of the queue, by tenant and reason",
            refusals.clone(),
        );
        let swap_events_dropped = Counter::<u64, AtomicU64>::default();
        registry.register(
            "swap_events_dropped",
            "Swap events a slow metrics reader missed",
            swap_events_dropped.clone(),
        );
        let process_resident_bytes = Gauge::default();
        registry.register(
            "process_resident_bytes",
            "Resident memory of the server process (Linux: /proc/self/statm), read at each scrape",
            process_resident_bytes.clone(),
        );
        let base_weights = Family::<BaseLabels, Gauge>::default();
        registry.register(
            "base_weights_info",
            "The base model's weight format, the kernel path and the library (onednn or none) in use (value 1; one series)",
            base_weights.clone(),
        );
        let base_weight_bytes = Gauge::default();
        registry.register(
            "base_weight_bytes",
            "Bytes the base model's weights hold in their format",
            base_weight_bytes.clone(),
        );
        let package_cache_fetched_bytes = Counter::default();
        registry.register(
            "package_cache_fetched_bytes",
            "Bytes of package files fetched from the object store into the local cache",
            package_cache_fetched_bytes.clone(),
        );
        let package_cache_limit_bytes = Gauge::default();
        registry.register(
            "package_cache_limit_bytes",
            "The byte budget of the local package cache of an object store",
            package_cache_limit_bytes.clone(),
        );
        Self {
            registry: Mutex::new(registry),
            requests,
            swap_seconds,
            resident_bytes,
            cache,
            queue_depth,
            batch_rows,
            first_token_seconds,
            request_seconds,
            adapter_answer_seconds,
            generated_tokens,
            prompt_tokens,
            prefix_cache_bytes,
            engine_restarts,
            arm_requests,
            rollout_actions,
            shadow_requests,
            refusals,
            swap_events_dropped,
            process_resident_bytes,
            base_weights,
            base_weight_bytes,
            package_cache_fetched_bytes,
            package_cache_limit_bytes,
            labelled_adapters: Mutex::new(HashSet::new()),
            adapter_series,
            evictions: AtomicU64::new(0),
        }
    }

    /// Counts a generation's prompt tokens: `reused` from the prefix cache, the rest prefilled.
    pub fn prompt_tokens(&self, total: usize, reused: usize) {
        for (source, n) in [("reused", reused), ("prefilled", total - reused)] {
            self.prompt_tokens
                .get_or_create(&PromptLabels {
                    source: source.to_owned(),
                })
                .inc_by(n as u64);
        }
    }

    /// Records the base model's weight format, the kernel path, the library and the weights' bytes.
    pub fn set_base(&self, weights: &str, kernels: &str, library: &str, bytes: usize) {
        self.base_weights.clear();
        self.base_weights
            .get_or_create(&BaseLabels {
                weights: weights.to_owned(),
                kernels: kernels.to_owned(),
                library: library.to_owned(),
            })
            .set(1);
        self.base_weight_bytes
            .set(i64::try_from(bytes).unwrap_or(i64::MAX));
    }

    /// The text exposition of every metric.
    pub fn render(&self) -> String {
        if let Some(bytes) = process_resident_bytes() {
            self.process_resident_bytes.set(bytes);
        }
        let mut out = String::new();
        let registry = self.registry.lock().unwrap_or_else(PoisonError::into_inner);
        prometheus_client::encoding::text::encode(&mut out, &registry)
            .expect("writing to a string");
        prometheus_text(&out)
    }

    /// Counts one answered request. `served_by` is `name@version`, `base`, or `-` when the
    /// request was refused before it was routed; only the name becomes a label value.
    pub fn count_request(&self, endpoint: &str, served_by: &str, status: u16) {
        let name = served_by.split('@').next().unwrap_or(served_by);
        let adapter = self.adapter_label(name);
        self.requests
            .get_or_create(&RequestLabels {
                endpoint: endpoint.to_owned(),
                adapter,
                status: status.to_string(),
            })
            .inc();
    }

    /// Counts a refusal of `tenant`'s request for `reason` (the error code).
    pub fn refused(&self, tenant: &str, reason: &str) {
        self.refusals
            .get_or_create(&RefusalLabels {
                tenant: tenant.to_owned(),
                reason: reason.to_owned(),
            })
            .inc();
    }

    /// `name` while the bounded set has room for it (or holds it already), `other` after.
    fn adapter_label(&self, name: &str) -> String {
        let mut seen = self
            .labelled_adapters
            .lock()
            .unwrap_or_else(PoisonError::into_inner);
        if seen.contains(name) {
            return name.to_owned();
        }
        if seen.len() < self.adapter_series {
            seen.insert(name.to_owned());
            return name.to_owned();
        }
        OTHER_ADAPTERS.to_owned()
    }

    /// Drops every series of a deleted split.
    pub fn forget_split(&self, split: &str, arms: &[String]) {
        for arm in arms {
            self.arm_requests.remove(&ArmLabels {
                split: split.to_owned(),
                arm: arm.clone(),
            });
        }
        for result in ["ran", "skipped_busy", "failed"] {
            self.shadow_requests.remove(&ShadowLabels {
                split: split.to_owned(),
                result: result.to_owned(),
            });
        }
        for action in ["promoted", "flipped", "rolled_back", "paused", "resumed"] {
            for by in ["policy", "operator"] {
                self.rollout_actions.remove(&RolloutLabels {
                    split: split.to_owned(),
                    action: action.to_owned(),
                    by: by.to_owned(),
                });
            }
        }
    }

    /// Counts a shadow request of `split` by what became of it.
    pub fn count_shadow(&self, split: &str, result: &str) {
        self.shadow_requests
            .get_or_create(&ShadowLabels {
                split: split.to_owned(),
                result: result.to_owned(),
            })
            .inc();
    }

    /// Counts a rollout action this replica took.
    pub fn count_rollout(&self, split: &str, event: &crate::splits::rollout::RolloutEvent) {
        let by = match event.by {
            crate::splits::rollout::Actor::Policy => "policy",
            crate::splits::rollout::Actor::Operator => "operator",
        };
        self.rollout_actions
            .get_or_create(&RolloutLabels {
                split: split.to_owned(),
                action: event.action.as_str().to_owned(),
                by: by.to_owned(),
            })
            .inc();
    }

    pub fn cache_event(&self, tier: Tier, outcome: &str) {
        self.cache
            .get_or_create(&CacheLabels {
                tier: tier.as_str().to_owned(),
                outcome: outcome.to_owned(),
            })
            .inc();
    }

    /// Brings the package cache's series (an object store's local disk tier) up to `stats`:
    /// `cache_events{tier="disk"}`, `resident_bytes{tier="disk"}`, the bytes fetched from the
    /// object store and the cache's budget. The cache counts on its own; this copies its totals.
    pub fn set_package_cache(&self, stats: &CacheStats) {
        for (outcome, total) in [
            ("hit", stats.hits),
            ("miss", stats.misses),
            ("eviction", stats.evictions),
        ] {
            let counter = self.cache.get_or_create(&CacheLabels {
                tier: DISK_TIER.to_owned(),
                outcome: outcome.to_owned(),
            });
            counter.inc_by(total.saturating_sub(counter.get()));
        }
        self.resident_bytes
            .get_or_create(&TierLabels {
                tier: DISK_TIER.to_owned(),
            })
            .set(i64::try_from(stats.bytes).unwrap_or(i64::MAX));
        self.package_cache_fetched_bytes.inc_by(
            stats
                .fetched_bytes
                .saturating_sub(self.package_cache_fetched_bytes.get()),
        );
        self.package_cache_limit_bytes
            .set(i64::try_from(stats.max_bytes).unwrap_or(i64::MAX));
    }

    /// Evictions from the factor and merged tiers so far.
    pub fn evictions(&self) -> u64 {
        self.evictions.load(std::sync::atomic::Ordering::Relaxed)
    }

    /// Records how long a request served by an adapter took to its answer (a generation: to
    /// its first token); `resident`: its adapter was resident when it arrived.
    pub fn adapter_answer(&self, resident: bool, took: std::time::Duration) {
        self.adapter_answer_seconds
            .get_or_create(&StartLabels {
                start: if resident { "warm" } else { "cold" }.to_owned(),
            })
            .observe(took.as_secs_f64());
    }

    /// Records one swap event from the registry.
    pub fn record_swap(&self, event: &SwapEvent) {
        let stage = |s: &str, d: std::time::Duration| {
            self.swap_seconds
                .get_or_create(&StageLabels {
                    stage: s.to_owned(),
                })
                .observe(d.as_secs_f64());
        };
        match &event.kind {
            SwapKind::Loaded => {
                stage("read", event.timings.read);
                stage("validate", event.timings.validate);
                stage("convert", event.timings.convert);
                stage(
                    "load",
                    event.timings.read + event.timings.validate + event.timings.convert,
                );
            }
            SwapKind::Merged => stage("merge", event.timings.merge),
            SwapKind::Evicted { tier } => {
                self.cache_event(*tier, "eviction");
                self.evictions
                    .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            }
            _ => {}
        }
        for (tier, r) in [
            (Tier::Factors, &event.residency.factors),
            (Tier::Merged, &event.residency.merged),
        ] {
            self.resident_bytes
                .get_or_create(&TierLabels {
                    tier: tier.as_str().to_owned(),
                })
                .set(r.bytes as i64);
        }
    }
}

/// prometheus-client writes OpenMetrics text; the Prometheus text format (0.0.4, what `/metrics`
/// declares) names a counter's family with its `_total` suffix in `# HELP` and `# TYPE`, has no
/// `# UNIT` lines and no `# EOF` terminator.
fn prometheus_text(openmetrics: &str) -> String {
    let counters: HashSet<&str> = openmetrics
        .lines()
        .filter_map(|l| l.strip_prefix("# TYPE "))
        .filter_map(|rest| rest.strip_suffix(" counter"))
        .collect();
    let mut out = String::with_capacity(openmetrics.len());
    for line in openmetrics.lines() {
        if line == "# EOF" || line.starts_with("# UNIT ") {
            continue;
        }
        let renamed = ["# HELP ", "# TYPE "].iter().find_map(|prefix| {
            let rest = line.strip_prefix(prefix)?;
            let (name, tail) = rest.split_once(' ')?;
            counters
                .contains(name)
                .then(|| format!("{prefix}{name}_total {tail}"))
        });
        match renamed {
            Some(l) => out.push_str(&l),
            None => out.push_str(line),
        }
        out.push('\n');
    }
    out
}

/// The resident set of this process: the second field of /proc/self/statm, in pages of 4 KiB
/// (the page size of the x86-64 and common aarch64 Linux kernels this server targets); `None`
/// where there is no /proc.
fn process_resident_bytes() -> Option<i64> {
    let statm = std::fs::read_to_string("/proc/self/statm").ok()?;
    let pages: i64 = statm.split_whitespace().nth(1)?.parse().ok()?;
    Some(pages * 4096)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn request_labels_stay_bounded_and_carry_no_version() {
        let m = Metrics::new(2);
        m.count_request("embed", "north-routing@0123456789abcdef", 200);
        m.count_request("embed", "north-routing@fedcba9876543210", 200);
        m.count_request("embed", "base", 200);
        m.count_request("embed", "south-routing@0123456789abcdef", 200);
        m.count_request("embed", "south-faq@0123456789abcdef", 200);
        let text = m.render();
        assert!(
            text.contains(
                "switchyard_requests_total{endpoint=\"embed\",adapter=\"north-routing\",status=\"200\"} 2"
            ),
            "{text}"
        );
        assert!(
            text.contains(
                "switchyard_requests_total{endpoint=\"embed\",adapter=\"other\",status=\"200\"} 2"
            ),
            "{text}"
        );
        assert!(!text.contains("0123456789abcdef"), "{text}");
    }

    #[test]
    fn a_deleted_split_leaves_no_series() {
        let m = Metrics::new(10);
        for arm in ["incumbent", "candidate"] {
            m.arm_requests
                .get_or_create(&ArmLabels {
                    split: "north-trial".into(),
                    arm: arm.into(),
                })
                .inc();
        }
        assert!(m.render().contains("north-trial"));
        m.forget_split("north-trial", &["incumbent".into(), "candidate".into()]);
        assert!(!m.render().contains("north-trial"), "{}", m.render());
    }

    #[test]
    fn counter_families_are_named_with_total_as_the_text_format_wants() {
        let m = Metrics::new(10);
        m.count_request("embed", "base", 200);
        let text = m.render();
        assert!(
            text.contains("# TYPE switchyard_requests_total counter"),
            "{text}"
        );
        assert!(text.contains("# HELP switchyard_requests_total "), "{text}");
        assert!(!text.contains("# EOF"), "{text}");
        assert!(
            !text.contains("# TYPE switchyard_requests counter"),
            "{text}"
        );
    }

    #[test]
    fn exposition_uses_our_prefix_and_total_suffix() {
        let m = Metrics::new(10);
        m.count_request("embed", "base", 200);
        m.generated_tokens.inc_by(3);
        m.refused("ridgeline-north", "rate_limited");
        let text = m.render();
        assert!(
            text.contains(
                "switchyard_refusals_total{tenant=\"ridgeline-north\",reason=\"rate_limited\"} 1"
            ),
            "{text}"
        );
        assert!(
            text.contains(
                "switchyard_requests_total{endpoint=\"embed\",adapter=\"base\",status=\"200\"} 1"
            ),
            "{text}"
        );
        assert!(
            text.contains("switchyard_generated_tokens_total 3"),
            "{text}"
        );
        assert!(
            text.contains("# TYPE switchyard_batch_rows histogram"),
            "{text}"
        );
        if cfg!(target_os = "linux") {
            // A running test process holds at least a megabyte.
            assert!(m.process_resident_bytes.get() > 1 << 20, "{text}");
        }
    }
}
