//! Per-tenant quotas, checked when a request is admitted, before it is routed or queued:
//! requests per second and tokens per minute are token buckets (full at the start, refilled
//! continuously, holding at most one second's worth of requests and one minute's worth of
//! tokens), and concurrent requests is a count of the tenant's requests admitted and not yet
//! finished.
//!
//! Admission hands out a [`Permit`]; the job carries it through the engine. Dropping it (when the
//! engine is done with the job, or when the request fails before it is queued) ends the request:
//! the concurrency count goes down and the tokens held but not used go back (a generation holds
//! its prompt plus `max_tokens` and uses what it generated; a job that never ran uses nothing).
//! [`Permit::cancel`] also gives back the request itself, for a request the queue then refuses.
//!
//! A refusal carries the wait its limit implies: the time until the bucket holds what the request
//! needs. Every function takes the time as an argument, so the tests run on a made-up clock.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use switchyard_config::Quota;

/// Why a tenant's request was refused by its quota.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum QuotaRefusal {
    #[error("over this key's quota of {per_second} requests per second; retry in {}", wait_text(*wait))]
    Rate { per_second: f64, wait: Duration },
    #[error("this key already has {limit} requests in flight, its quota; retry when one finishes")]
    Concurrency { limit: u64 },
    #[error("this request needs {needed} tokens and this key's quota of {per_minute} tokens per minute has fewer left; retry in {}", wait_text(*wait))]
    Tokens {
        needed: u64,
        per_minute: u64,
        wait: Duration,
    },
    #[error(
        "this request needs {needed} tokens, more than this key's whole quota of {per_minute} tokens per minute; send fewer or shorter texts, or a smaller max_tokens"
    )]
    TokensNeverFit { needed: u64, per_minute: u64 },
}

/// A wait as a message says it: milliseconds under a second (rounded up), else seconds to a
/// tenth.
pub fn wait_text(wait: Duration) -> String {
    if wait < Duration::from_secs(1) {
        format!("{} ms", (wait.as_secs_f64() * 1e3).ceil().max(1.0))
    } else {
        format!("{:.1} s", wait.as_secs_f64())
    }
}

impl QuotaRefusal {
    /// How long the limit says to wait, where it says; concurrency depends on when the tenant's
    /// requests finish, which the engine's queue estimates instead.
    pub fn wait(&self) -> Option<Duration> {
        match self {
            QuotaRefusal::Rate { wait, .. } | QuotaRefusal::Tokens { wait, .. } => Some(*wait),
            QuotaRefusal::Concurrency { .. } | QuotaRefusal::TokensNeverFit { .. } => None,
        }
    }
}

/// A token bucket: `level` units now, at most `capacity`, refilled at `per_second`.
#[derive(Debug, Clone)]
struct Bucket {
    level: f64,
    capacity: f64,
    per_second: f64,
    at: Instant,
}

impl Bucket {
    fn full(capacity: f64, per_second: f64, now: Instant) -> Self {
        Self {
            level: capacity,
            capacity,
            per_second,
            at: now,
        }
    }

    fn refill(&mut self, now: Instant) {
        let elapsed = now.saturating_duration_since(self.at).as_secs_f64();
        self.level = (self.level + elapsed * self.per_second).min(self.capacity);
        self.at = self.at.max(now);
    }

    /// How long until the (refilled) bucket holds `amount`; zero when it already does.
    fn wait_for(&self, amount: f64) -> Duration {
        let missing = amount - self.level;
        if missing <= 0.0 {
            Duration::ZERO
        } else {
            Duration::from_secs_f64(missing / self.per_second)
        }
    }

    /// As the request-rate bucket: refilled to `now`, whether it holds one more request (nothing
    /// is taken), or the rate refusal with its wait.
    fn admits_one_request(&mut self, now: Instant) -> Result<(), QuotaRefusal> {
        self.refill(now);
        let wait = self.wait_for(1.0);
        if wait.is_zero() {
            Ok(())
        } else {
            Err(QuotaRefusal::Rate {
                per_second: self.per_second,
                wait,
            })
        }
    }

    fn give_back(&mut self, amount: f64) {
        self.level = (self.level + amount).min(self.capacity);
    }
}

#[derive(Debug)]
struct Buckets {
    requests: Option<Bucket>,
    tokens: Option<Bucket>,
}

/// One tenant's limits and what it holds now.
#[derive(Debug)]
struct TenantQuota {
    limits: Quota,
    buckets: Mutex<Buckets>,
    in_flight: AtomicU64,
}

impl TenantQuota {
    /// The buckets; a panic elsewhere while holding them leaves numbers that are still valid,
    /// so a poisoned lock is taken over rather than passed on.
    fn buckets(&self) -> MutexGuard<'_, Buckets> {
        self.buckets.lock().unwrap_or_else(|e| e.into_inner())
    }
}

/// Every tenant's quota, by tenant index.
#[derive(Debug)]
pub struct Quotas {
    tenants: Vec<Arc<TenantQuota>>,
}

impl Quotas {
    /// One entry per tenant, in the order of `limits` (the tenants' indices).
    pub fn new(limits: &[Quota], now: Instant) -> Self {
        let tenants = limits
            .iter()
            .map(|q| {
                let requests = q
                    .requests_per_second
                    .map(|rate| Bucket::full(rate.max(1.0), rate, now));
                let tokens = q
                    .tokens_per_minute
                    .map(|n| Bucket::full(n as f64, n as f64 / 60.0, now));
                Arc::new(TenantQuota {
                    limits: *q,
                    buckets: Mutex::new(Buckets { requests, tokens }),
                    in_flight: AtomicU64::new(0),
                })
            })
            .collect();
        Self { tenants }
    }

    /// Whether a request of `tenant` would be refused now by a limit that does not depend on its
    /// size (the request rate or the concurrent requests), without taking anything: the server
    /// asks before it tokenises a request, so a tenant far over its rate costs no tokenizer time.
    /// A hint: [`Quotas::reserve`] decides.
    pub fn precheck(&self, tenant: usize, now: Instant) -> Result<(), QuotaRefusal> {
        let quota = &self.tenants[tenant];
        if let Some(limit) = quota.limits.concurrent_requests
            && quota.in_flight.load(Ordering::SeqCst) >= limit
        {
            return Err(QuotaRefusal::Concurrency { limit });
        }
        let mut buckets = quota.buckets();
        match buckets.requests.as_mut() {
            Some(b) => b.admits_one_request(now),
            None => Ok(()),
        }
    }

    /// Admits one request of `tenant` needing `tokens`, or says which limit refuses it and how
    /// long that limit says to wait. Nothing is taken from a bucket unless every limit admits.
    pub fn reserve(
        &self,
        tenant: usize,
        tokens: u64,
        now: Instant,
    ) -> Result<Permit, QuotaRefusal> {
        let quota = Arc::clone(&self.tenants[tenant]);
        let limits = quota.limits;
        if let Some(limit) = limits.concurrent_requests {
            // Only admissions raise the count, so a check then an add under the bucket lock
            // below could race only with other admissions; the atomic add makes it exact.
            let before = quota.in_flight.fetch_add(1, Ordering::SeqCst);
            if before >= limit {
                quota.in_flight.fetch_sub(1, Ordering::SeqCst);
                return Err(QuotaRefusal::Concurrency { limit });
            }
        } else {
            quota.in_flight.fetch_add(1, Ordering::SeqCst);
        }
        // From here the count is held: the permit (or its early drop) gives it back.
        let mut permit = Permit {
            quota: Arc::clone(&quota),
            tokens_held: 0,
            tokens_used: 0,
            cancelled: false,
        };
        let mut buckets = quota.buckets();
        let Buckets {
            requests,
            tokens: token_bucket,
        } = &mut *buckets;
        if let Some(b) = requests.as_mut() {
            b.admits_one_request(now)?;
        }
        if let (Some(b), Some(per_minute)) = (token_bucket.as_mut(), limits.tokens_per_minute) {
            if tokens > per_minute {
                return Err(QuotaRefusal::TokensNeverFit {
                    needed: tokens,
                    per_minute,
                });
            }
            b.refill(now);
            let wait = b.wait_for(tokens as f64);
            if !wait.is_zero() {
                return Err(QuotaRefusal::Tokens {
                    needed: tokens,
                    per_minute,
                    wait,
                });
            }
        }
        if let Some(b) = requests.as_mut() {
            b.level -= 1.0;
        }
        if let Some(b) = token_bucket.as_mut() {
            b.level -= tokens as f64;
        }
        if token_bucket.is_some() {
            permit.tokens_held = tokens;
        }
        drop(buckets);
        Ok(permit)
    }

    /// Requests of `tenant` admitted and not yet finished.
    pub fn in_flight(&self, tenant: usize) -> u64 {
        self.tenants[tenant].in_flight.load(Ordering::SeqCst)
    }
}

/// One admitted request's hold on its tenant's quota; see the module doc.
#[derive(Debug)]
pub struct Permit {
    quota: Arc<TenantQuota>,
    tokens_held: u64,
    tokens_used: u64,
    cancelled: bool,
}

impl Permit {
    /// Records `tokens` of the held ones as used (they stay spent).
    pub fn spend(&mut self, tokens: u64) {
        if self.cancelled {
            return;
        }
        self.tokens_used = self
            .tokens_used
            .saturating_add(tokens)
            .min(self.tokens_held);
    }

    /// Records every held token as used.
    pub fn spend_all(&mut self) {
        self.spend(self.tokens_held);
    }

    /// Gives back the request now, and all its tokens when the permit drops: it was refused
    /// after its quota admitted it. A second call does nothing.
    pub fn cancel(&mut self) {
        if self.cancelled {
            return;
        }
        self.cancelled = true;
        self.tokens_used = 0;
        if let Some(b) = self.quota.buckets().requests.as_mut() {
            b.give_back(1.0);
        }
    }
}

impl Drop for Permit {
    fn drop(&mut self) {
        self.quota.in_flight.fetch_sub(1, Ordering::SeqCst);
        let unused = self.tokens_held - self.tokens_used;
        if unused > 0
            && let Some(b) = self.quota.buckets().tokens.as_mut()
        {
            b.give_back(unused as f64);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn quota(rate: Option<f64>, concurrent: Option<u64>, per_minute: Option<u64>) -> Quota {
        Quota {
            requests_per_second: rate,
            concurrent_requests: concurrent,
            tokens_per_minute: per_minute,
        }
    }

    fn secs(s: f64) -> Duration {
        Duration::from_secs_f64(s)
    }

    fn assert_close(a: Duration, b: Duration) {
        assert!(
            (a.as_secs_f64() - b.as_secs_f64()).abs() < 1e-6,
            "{a:?} != {b:?}"
        );
    }

    #[test]
    fn waits_read_in_milliseconds_under_a_second() {
        assert_eq!(wait_text(secs(0.0483)), "49 ms");
        assert_eq!(wait_text(secs(0.0)), "1 ms");
        assert_eq!(wait_text(secs(4.0)), "4.0 s");
        assert_eq!(wait_text(secs(59.97)), "60.0 s");
        let refusal = QuotaRefusal::Rate {
            per_second: 20.7,
            wait: secs(0.0483),
        };
        assert_eq!(
            refusal.to_string(),
            "over this key's quota of 20.7 requests per second; retry in 49 ms"
        );
    }

    #[test]
    fn no_limits_admit_everything() {
        let t0 = Instant::now();
        let q = Quotas::new(&[Quota::default()], t0);
        let permits: Vec<Permit> = (0..10_000)
            .map(|_| q.reserve(0, 1_000_000, t0).unwrap())
            .collect();
        assert_eq!(q.in_flight(0), 10_000);
        drop(permits);
        assert_eq!(q.in_flight(0), 0);
    }

    #[test]
    fn request_rate_admits_a_second_of_burst_then_one_per_interval() {
        // 2 requests per second: a full bucket holds 2, then one more every 0.5 s.
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(2.0), None, None)], t0);
        let _a = q.reserve(0, 1, t0).unwrap();
        let _b = q.reserve(0, 1, t0).unwrap();
        let refused = q.reserve(0, 1, t0).unwrap_err();
        assert_eq!(
            refused,
            QuotaRefusal::Rate {
                per_second: 2.0,
                wait: secs(0.5)
            }
        );
        // 0.2 s later the bucket holds 0.4 of a request: 0.3 s to go.
        let wait = q.reserve(0, 1, t0 + secs(0.2)).unwrap_err().wait().unwrap();
        assert_close(wait, secs(0.3));
        let _c = q.reserve(0, 1, t0 + secs(0.5)).unwrap();
        assert!(q.reserve(0, 1, t0 + secs(0.5)).is_err());
    }

    /// The check before tokenising refuses what reserve would refuse for rate or concurrency,
    /// and never takes from the bucket itself: a tenant under its rate keeps all of it.
    #[test]
    fn precheck_refuses_a_tenant_over_its_rate_or_concurrency_without_spending() {
        let t0 = Instant::now();
        let q = Quotas::new(
            &[quota(Some(2.0), None, None), quota(None, Some(1), None)],
            t0,
        );
        for _ in 0..5 {
            assert_eq!(q.precheck(0, t0), Ok(()));
        }
        let _a = q.reserve(0, 1, t0).unwrap();
        let _b = q.reserve(0, 1, t0).unwrap();
        assert_eq!(
            q.precheck(0, t0),
            Err(QuotaRefusal::Rate {
                per_second: 2.0,
                wait: secs(0.5)
            })
        );
        assert_eq!(q.precheck(0, t0 + secs(0.5)), Ok(()));
        let held = q.reserve(1, 1, t0).unwrap();
        assert_eq!(
            q.precheck(1, t0),
            Err(QuotaRefusal::Concurrency { limit: 1 })
        );
        drop(held);
        assert_eq!(q.precheck(1, t0), Ok(()));
        assert_eq!(q.in_flight(1), 0);
    }

    #[test]
    fn a_rate_below_one_per_second_waits_the_whole_interval() {
        // 0.25 per second: the burst is one request (never less than one), then one every 4 s.
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(0.25), None, None)], t0);
        let _first = q.reserve(0, 1, t0).unwrap();
        assert_eq!(q.reserve(0, 1, t0).unwrap_err().wait(), Some(secs(4.0)));
        assert_eq!(
            q.reserve(0, 1, t0 + secs(3.0)).unwrap_err().wait(),
            Some(secs(1.0))
        );
        assert!(q.reserve(0, 1, t0 + secs(4.0)).is_ok());
    }

    #[test]
    fn concurrency_counts_permits_until_they_drop() {
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(None, Some(2), None)], t0);
        let a = q.reserve(0, 1, t0).unwrap();
        let b = q.reserve(0, 1, t0).unwrap();
        assert_eq!(
            q.reserve(0, 1, t0).unwrap_err(),
            QuotaRefusal::Concurrency { limit: 2 }
        );
        assert_eq!(q.in_flight(0), 2, "a refusal holds nothing");
        drop(a);
        let c = q.reserve(0, 1, t0).unwrap();
        assert!(q.reserve(0, 1, t0).is_err());
        drop((b, c));
        assert_eq!(q.in_flight(0), 0);
    }

    #[test]
    fn tokens_per_minute_waits_for_what_the_request_needs() {
        // 600 tokens a minute: 10 a second, a full bucket of 600.
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(None, None, Some(600))], t0);
        let mut a = q.reserve(0, 500, t0).unwrap();
        a.spend_all();
        drop(a);
        // 100 left; 250 needs 150 more, 15 s at 10 a second.
        assert_eq!(
            q.reserve(0, 250, t0).unwrap_err(),
            QuotaRefusal::Tokens {
                needed: 250,
                per_minute: 600,
                wait: secs(15.0)
            }
        );
        assert!(q.reserve(0, 100, t0).is_ok());
        // More than a whole minute's worth can never be admitted: a different refusal.
        assert_eq!(
            q.reserve(0, 601, t0 + secs(3600.0)).unwrap_err(),
            QuotaRefusal::TokensNeverFit {
                needed: 601,
                per_minute: 600
            }
        );
    }

    #[test]
    fn unused_tokens_go_back_when_the_permit_drops() {
        // A generation holds prompt + max_tokens = 10 + 90 and generates 20: 70 come back.
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(None, None, Some(100))], t0);
        let mut generation = q.reserve(0, 100, t0).unwrap();
        generation.spend(10);
        generation.spend(20);
        assert!(q.reserve(0, 1, t0).is_err(), "all 100 are held");
        drop(generation);
        let _fits = q.reserve(0, 70, t0).unwrap();
        assert!(
            q.reserve(0, 1, t0).is_err(),
            "exactly the 70 unused came back"
        );
    }

    #[test]
    fn a_job_that_never_ran_gives_back_its_tokens_and_cancel_gives_back_the_request() {
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(1.0), None, Some(60))], t0);
        // Routing failed after admission: the tokens come back, the request stays counted.
        drop(q.reserve(0, 60, t0).unwrap());
        assert!(matches!(
            q.reserve(0, 60, t0).unwrap_err(),
            QuotaRefusal::Rate { .. }
        ));
        // The queue refused it: cancel gives back the request and its tokens.
        let later = t0 + secs(1.0);
        let mut refused = q.reserve(0, 60, later).unwrap();
        refused.cancel();
        drop(refused);
        let _again = q.reserve(0, 60, later).unwrap();
    }

    #[test]
    fn cancelling_twice_gives_back_one_request() {
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(2.0), None, None)], t0);
        let mut a = q.reserve(0, 1, t0).unwrap();
        let _b = q.reserve(0, 1, t0).unwrap();
        a.cancel();
        a.cancel();
        let _c = q.reserve(0, 1, t0).unwrap();
        assert!(
            q.reserve(0, 1, t0).is_err(),
            "one request given back, not two"
        );
    }

    #[test]
    fn a_refusal_by_one_limit_takes_nothing_from_the_others() {
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(1.0), None, Some(60))], t0);
        // Too many tokens: the request bucket keeps its one request.
        assert!(q.reserve(0, 61, t0).is_err());
        assert!(q.reserve(0, 61, t0).is_err());
        let _ok = q.reserve(0, 60, t0).unwrap();
        assert_eq!(q.in_flight(0), 1);
    }

    #[test]
    fn tenants_are_limited_apart() {
        let t0 = Instant::now();
        let q = Quotas::new(&[quota(Some(1.0), None, None), Quota::default()], t0);
        let _a = q.reserve(0, 1, t0).unwrap();
        assert!(q.reserve(0, 1, t0).is_err());
        for _ in 0..100 {
            drop(q.reserve(1, 1, t0).unwrap());
        }
    }
}
