//! The engine: one dedicated thread that owns the model and does all model compute, fed by a
//! bounded queue that the HTTP handlers fill (a full queue is their 429).
//!
//! Admission first asks the tenant's [`quota`] (requests per second, concurrent requests, tokens
//! per minute); the job then carries its [`Ticket`] into the [`queue`], which keeps one lane per
//! tenant and serves them by start-time fair queueing (costs in rows for embedding jobs, in tokens
//! for generations), so one tenant's flood waits behind itself and a light tenant's request goes
//! next. Each tenant may hold only its share of the queue; past its quota or its share a request
//! is refused with the time to wait.
//!
//! An encoder engine gathers queued embedding jobs into one batch up to the row limit, rows of
//! different adapters side by side; a batch that uses only one adapter, when the promotion
//! policy says that adapter dominates recent traffic, runs its merged variant instead. A decoder
//! engine does continuous batching: new sequences are prefilled between decode steps and join
//! the next step, every live sequence advances one token per step, and a sequence whose client
//! went away is dropped with its KV cache at the next step. A prompt that begins like one
//! prefilled before on the same adapter version starts from a copy of that one's KV cache (the
//! [`prefix`] cache) and prefills only the rest.

pub mod detok;
pub mod end_at;
pub mod policy;
pub mod prefix;
pub mod queue;
pub mod quota;

use std::panic::AssertUnwindSafe;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use switchyard_adapters::registry::{AdapterHandle, MergedHandle, Registry};
use switchyard_adapters::{Adapter, MergedWeights};
use switchyard_config::Quota;
use tokio::sync::{mpsc, oneshot};

use crate::metrics::Metrics;
use crate::model::embedder::{Embedder, padded_len};
use crate::model::generator::Generator;
use crate::model::linear::RowAdapters;
use crate::model::llama::KvCache;
use crate::model::rows_for_sequences;
use crate::model::sampling::{Sampler, SamplingParams};
use detok::Detokenizer;
use policy::PromotionPolicy;
use prefix::PrefixCache;
use queue::{Budget, Cost, FairQueue, QueueLimits, Refused};
use quota::{Permit, QuotaRefusal, Quotas};

/// The model the engine owns: one family per server. Only one exists per process, so the size
/// difference between the variants costs nothing.
#[allow(clippy::large_enum_variant)]
pub enum Backbone {
    Encoder(Embedder),
    Decoder(Generator),
}

impl Backbone {
    /// The format the base weights are held in.
    pub fn weights_format(&self) -> switchyard_kernels::WeightFormat {
        match self {
            Backbone::Encoder(e) => e.weights_format(),
            Backbone::Decoder(g) => g.weights_format(),
        }
    }

    /// Bytes the base model's weights hold.
    pub fn weight_bytes(&self) -> usize {
        match self {
            Backbone::Encoder(e) => e.model().resident_bytes(),
            Backbone::Decoder(g) => g.model().resident_bytes(),
        }
    }

    pub fn spec(&self) -> &switchyard_adapters::BaseSpec {
        match self {
            Backbone::Encoder(e) => e.spec(),
            Backbone::Decoder(g) => g.spec(),
        }
    }

    pub fn family(&self) -> &'static str {
        match self {
            Backbone::Encoder(_) => "encoder",
            Backbone::Decoder(_) => "decoder",
        }
    }
}

/// Engine settings.
#[derive(Debug, Clone)]
pub struct EngineConfig {
    pub max_batch_rows: usize,
    /// Most tokens one decoder step carries (decodes, then prompt chunks).
    pub step_tokens: usize,
    /// KV-cache bytes the running generations may plan for together; 0: no limit.
    pub kv_budget_bytes: u64,
    /// Bytes of prompt KV cache kept for later prompts with the same beginning on the same
    /// adapter version; 0: off.
    pub prefix_cache_bytes: u64,
    pub queue_depth: usize,
    /// With several tenants, the most rows in one encoder batch.
    pub shared_batch_rows: usize,
    pub promote_share: f64,
    pub promote_window_rows: usize,
    /// Each tenant's name and quota, by tenant index
    /// ([`crate::http::auth::tenant_limits`]), then the background lanes.
    pub tenants: Vec<TenantLimits>,
    /// How many of the last `tenants` are background lanes (shadow traffic) that answer nobody:
    /// they get a queue lane, but neither a share of the queue's per-tenant bound nor a say in
    /// whether the server counts as shared by several tenants.
    pub background_lanes: usize,
}

impl EngineConfig {
    /// The tenants that send requests, background lanes left out (at least 1).
    fn answering_tenants(&self) -> usize {
        self.tenants
            .len()
            .saturating_sub(self.background_lanes)
            .max(1)
    }
}

/// One tenant as the engine knows it: a name for the metrics, and its quota.
#[derive(Debug, Clone, PartialEq)]
pub struct TenantLimits {
    pub name: String,
    pub quota: Quota,
}

/// Why the engine refused or failed a job.
#[derive(Debug, Clone, thiserror::Error)]
pub enum EngineError {
    #[error("the queue is full ({waiting} requests waiting); retry in about {}", quota::wait_text(*retry_after))]
    QueueFull {
        waiting: usize,
        retry_after: Duration,
    },
    #[error("this key already has {waiting} requests waiting, its share of the queue; retry in about {}", quota::wait_text(*retry_after))]
    TenantQueueFull {
        waiting: usize,
        retry_after: Duration,
    },
    #[error("{refusal}")]
    OverQuota {
        refusal: QuotaRefusal,
        retry_after: Duration,
    },
    #[error("the engine is shutting down")]
    ShuttingDown,
    #[error(
        "the engine stopped after panicking {MAX_RESTARTS} times within a minute; this server can no longer compute (its log says why)"
    )]
    Stopped,
    #[error("the request's deadline passed before it could run")]
    DeadlineExceeded,
    #[error("model computation failed: {0}")]
    Compute(String),
}

impl EngineError {
    /// The stable code of a refusal before the job was queued (a quota or the queue's bounds),
    /// as the API and the refusals metric name it; `None` for other errors.
    pub fn refusal_code(&self) -> Option<&'static str> {
        Some(match self {
            EngineError::QueueFull { .. } => "queue_full",
            EngineError::TenantQueueFull { .. } => "tenant_queue_full",
            EngineError::OverQuota { refusal, .. } => match refusal {
                QuotaRefusal::Rate { .. } => "rate_limited",
                QuotaRefusal::Concurrency { .. } => "too_many_in_flight",
                QuotaRefusal::Tokens { .. } => "token_quota_spent",
                QuotaRefusal::TokensNeverFit { .. } => "over_token_quota",
            },
            _ => return None,
        })
    }

    /// For a refusal that a retry can get past, how long to wait first.
    pub fn retry_after(&self) -> Option<Duration> {
        match self {
            EngineError::QueueFull { retry_after, .. }
            | EngineError::TenantQueueFull { retry_after, .. } => Some(*retry_after),
            EngineError::OverQuota {
                refusal: QuotaRefusal::TokensNeverFit { .. },
                ..
            } => None,
            EngineError::OverQuota { retry_after, .. } => Some(*retry_after),
            _ => None,
        }
    }
}

/// A wait in whole seconds, rounded up, at least 1: what a `Retry-After` header can say.
pub fn whole_seconds(wait: Duration) -> u64 {
    let s = wait.as_secs_f64().ceil();
    if s.is_finite() { (s as u64).max(1) } else { 1 }
}

/// A request's admission: which tenant's lane its job joins, its hold on that tenant's quota
/// (given back when the job is dropped; see [`quota::Permit`]) and the place it holds in that
/// lane (given back if the ticket is dropped before its job is queued).
#[derive(Debug)]
pub struct Ticket {
    pub tenant: usize,
    permit: Permit,
    place: HeldPlace,
}

/// A place held in a lane of the queue for a job not built yet. Queueing the job uses it up;
/// dropping it unused (the adapter failed to load, the client went away) gives it back.
struct HeldPlace {
    queue: Option<Arc<FairQueue<Job>>>,
    lane: usize,
}

impl HeldPlace {
    /// The queue, for the one push into this place; afterwards there is nothing to give back.
    fn take(&mut self) -> Option<Arc<FairQueue<Job>>> {
        self.queue.take()
    }
}

impl Drop for HeldPlace {
    fn drop(&mut self) {
        if let Some(q) = self.queue.take() {
            q.release(self.lane);
        }
    }
}

impl std::fmt::Debug for HeldPlace {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("HeldPlace")
            .field("lane", &self.lane)
            .field("held", &self.queue.is_some())
            .finish()
    }
}

/// Timings every answer reports.
#[derive(Debug, Clone, Copy, Default)]
pub struct Timings {
    pub queue: Duration,
    pub swap: Duration,
    pub first_token: Option<Duration>,
    pub total: Duration,
}

/// Embeddings of one job's texts.
#[derive(Debug)]
pub struct EmbedOutput {
    pub embeddings: Vec<Vec<f32>>,
    pub timings: Timings,
    pub merged: bool,
}

pub struct EmbedJob {
    pub ticket: Ticket,
    pub ids: Vec<Vec<u32>>,
    pub adapter: Option<AdapterHandle>,
    pub admitted: Instant,
    pub swap: Duration,
    pub deadline: Instant,
    pub reply: oneshot::Sender<Result<EmbedOutput, EngineError>>,
}

/// What a generation sends back, token by token.
#[derive(Debug, Clone)]
pub enum GenEvent {
    Token { id: u32, text: String },
    Done(Finished),
    Failed(EngineError),
}

/// Why a generation stopped.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Stop {
    /// The model's end-of-sequence token.
    Eos,
    /// `max_tokens` reached.
    Limit,
    /// The request's deadline passed mid-generation: the output so far.
    Deadline,
    /// One of the request's end token ids was sampled.
    EndToken(u32),
    /// One of the request's end texts appeared in the output.
    EndText(String),
}

/// How a generation ended: the engine's last event of a generation that did not fail.
#[derive(Debug, Clone)]
pub struct Finished {
    pub stop: Stop,
    /// The whole output decoded at once (cut before an end text that ended it): what the
    /// non-streamed answer returns.
    pub text: String,
    /// Text not yet sent in a `Token` event: a trailing incomplete character that was held
    /// back in case the next token completed it (usually empty).
    pub tail: String,
    pub prompt_tokens: usize,
    /// Prompt tokens whose KV cache came from the prefix cache instead of a prefill.
    pub reused_tokens: usize,
    /// Tokens generated, not counting an end-of-sequence token (which is not part of the
    /// output): the length of the answer's `token_ids`.
    pub output_tokens: usize,
    pub timings: Timings,
}

pub struct GenerateJob {
    pub ticket: Ticket,
    pub prompt_ids: Vec<u32>,
    pub adapter: Option<AdapterHandle>,
    pub sampling: SamplingParams,
    pub limit: usize,
    /// Texts and token ids that end the generation (not part of its output).
    pub end_at: end_at::EndAt,
    pub admitted: Instant,
    pub swap: Duration,
    pub deadline: Instant,
    pub events: mpsc::UnboundedSender<GenEvent>,
}

pub enum Job {
    Embed(EmbedJob),
    Generate(GenerateJob),
}

impl Job {
    fn ticket(&mut self) -> &mut Ticket {
        match self {
            Job::Embed(j) => &mut j.ticket,
            Job::Generate(j) => &mut j.ticket,
        }
    }
}

/// What a job costs in its tenant's lane: rows for an embedding job, the prompt and the most
/// tokens it may generate for a generation.
impl Cost for Job {
    fn cost(&self) -> u64 {
        match self {
            Job::Embed(j) => j.ids.len() as u64,
            Job::Generate(j) => (j.prompt_ids.len() + j.limit) as u64,
        }
    }
}

/// The handlers' side of the engine.
pub struct Engine {
    queue: Arc<FairQueue<Job>>,
    quotas: Quotas,
    /// Tenant names by index, for the refusals metric.
    names: Vec<String>,
    metrics: Arc<Metrics>,
    thread: Option<JoinHandle<()>>,
    /// KV-cache bytes the running generations may plan for together; 0: no limit.
    kv_budget_bytes: u64,
    /// Set by the engine thread when it stops for good after repeated panics.
    stopped: Arc<std::sync::atomic::AtomicBool>,
}

impl std::fmt::Debug for Engine {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine")
            .field("queued", &self.queued())
            .finish()
    }
}

impl Engine {
    /// Starts the engine thread.
    pub fn start(
        backbone: Arc<Backbone>,
        registry: Option<Registry>,
        config: EngineConfig,
        metrics: Arc<Metrics>,
    ) -> Engine {
        let tenants = config.tenants.len().max(1);
        let answering = config.answering_tenants();
        // A tenant back from idle may have one full batch of rows (or, generating, as many
        // tokens) served ahead of the others' backlog: a clump of a light tenant's requests then
        // goes before a flood's backlog instead of taking turns with it, batch by batch.
        let queue = Arc::new(FairQueue::new(
            tenants,
            QueueLimits::shared(config.queue_depth, answering)
                .with_burst(config.max_batch_rows as u64),
        ));
        let mut limits = config.tenants.clone();
        limits.resize(
            tenants,
            TenantLimits {
                name: "default".to_owned(),
                quota: Quota::default(),
            },
        );
        let quota_list: Vec<Quota> = limits.iter().map(|t| t.quota).collect();
        let names = limits.into_iter().map(|t| t.name).collect();
        let worker = Worker {
            backbone,
            registry,
            policy: PromotionPolicy::new(config.promote_window_rows, config.promote_share),
            prefixes: PrefixCache::new(config.prefix_cache_bytes),
            merges: Arc::default(),
            panics: PanicTriggers::from_env(),
            stopped: Arc::default(),
            config,
            metrics: Arc::clone(&metrics),
            queue: Arc::clone(&queue),
        };
        let kv_budget_bytes = worker.config.kv_budget_bytes;
        let stopped = Arc::clone(&worker.stopped);
        let thread = std::thread::Builder::new()
            .name("switchyard-engine".to_owned())
            .spawn(move || worker.run())
            .expect("spawn the engine thread");
        Engine {
            queue,
            quotas: Quotas::new(&quota_list, Instant::now()),
            names,
            metrics,
            thread: Some(thread),
            kv_budget_bytes,
            stopped,
        }
    }

    /// KV-cache bytes the running generations may plan for together; 0: no limit.
    pub fn kv_budget_bytes(&self) -> u64 {
        self.kv_budget_bytes
    }

    /// Admits a request of `tenant` that needs `tokens`: under the tenant's quota, and with a
    /// place held in the tenant's lane of the queue. The server calls this before it resolves
    /// the request's adapter, so a request that would be refused never loads one (nor evicts
    /// another to make room). The job built for it carries the ticket; a ticket dropped before
    /// its job is queued gives back its place and the tokens it held.
    pub fn reserve(&self, tenant: usize, tokens: u64) -> Result<Ticket, EngineError> {
        match self.quotas.reserve(tenant, tokens, Instant::now()) {
            Ok(mut permit) => match self.queue.hold(tenant) {
                Ok(()) => Ok(Ticket {
                    tenant,
                    permit,
                    place: HeldPlace {
                        queue: Some(Arc::clone(&self.queue)),
                        lane: tenant,
                    },
                }),
                Err(why) => {
                    // Refused after the quota admitted it: it no longer counts against it.
                    permit.cancel();
                    drop(permit);
                    Err(self.queue_refusal(tenant, why))
                }
            },
            Err(refusal) => Err(self.over_quota(tenant, refusal)),
        }
    }

    /// A quota refusal of `tenant`'s request, counted, with the wait its limit says (or, for
    /// concurrency, the queue's estimate).
    fn over_quota(&self, tenant: usize, refusal: QuotaRefusal) -> EngineError {
        let retry_after = refusal
            .wait()
            .or_else(|| self.queue.wait_estimate(Some(tenant)))
            .unwrap_or(Duration::from_secs(1));
        self.refused(
            tenant,
            EngineError::OverQuota {
                refusal,
                retry_after,
            },
        )
    }

    /// Refuses a request of `tenant` at once when its request rate or concurrency quota would
    /// refuse it, or its lane of the queue has no place free, so that a flooding tenant's excess
    /// is answered before any work is spent on it (tokenising it). A hint: [`Engine::reserve`]
    /// takes from the quota, holds the place and decides.
    pub fn check_room(&self, tenant: usize) -> Result<(), EngineError> {
        self.quotas
            .precheck(tenant, Instant::now())
            .map_err(|refusal| self.over_quota(tenant, refusal))?;
        self.queue
            .room(tenant)
            .map_err(|why| self.queue_refusal(tenant, why))
    }

    /// Counts a refusal of `tenant`'s request and passes it on.
    fn refused(&self, tenant: usize, e: EngineError) -> EngineError {
        if let Some(reason) = e.refusal_code() {
            self.metrics.refused(&self.names[tenant], reason);
        }
        e
    }

    /// Queues a job in the place its ticket holds. Refused only when the server began shutting
    /// down meanwhile; a refused job's request no longer counts against the tenant's quota.
    pub fn try_submit(&self, mut job: Job) -> Result<(), EngineError> {
        let lane = job.ticket().tenant;
        let pushed = match job.ticket().place.take() {
            Some(queue) => queue.push_held(lane, job),
            // A ticket whose place was used already: queue it within the bounds, as any job.
            None => self.queue.push(lane, job),
        };
        let (why, mut job) = match pushed {
            Ok(()) => return Ok(()),
            Err(refused) => refused,
        };
        job.ticket().permit.cancel();
        drop(job);
        Err(self.queue_refusal(lane, why))
    }

    /// The error for a request of `lane` the queue refused, counted.
    fn queue_refusal(&self, lane: usize, why: Refused) -> EngineError {
        let limits = self.queue.limits();
        let wait = |lane| {
            self.queue
                .wait_estimate(lane)
                .unwrap_or(Duration::from_secs(1))
        };
        let e = match why {
            Refused::Closed if self.stopped.load(std::sync::atomic::Ordering::SeqCst) => {
                EngineError::Stopped
            }
            Refused::Closed => EngineError::ShuttingDown,
            Refused::LaneFull => EngineError::TenantQueueFull {
                waiting: limits.per_lane,
                retry_after: wait(Some(lane)),
            },
            Refused::Full => EngineError::QueueFull {
                waiting: limits.total,
                retry_after: wait(None),
            },
        };
        self.refused(lane, e)
    }

    /// Whether the engine thread is alive (readiness turns 503 if it is not).
    pub fn is_running(&self) -> bool {
        self.thread.as_ref().is_some_and(|t| !t.is_finished())
    }

    /// Whether the engine stopped for good after repeated panics (not a shutdown).
    pub fn has_stopped(&self) -> bool {
        self.stopped.load(std::sync::atomic::Ordering::SeqCst)
    }

    /// Jobs waiting for the engine thread.
    pub fn queued(&self) -> usize {
        self.queue.len()
    }

    /// Stops taking jobs, lets the engine finish what it holds, and waits for it.
    pub fn shutdown(&mut self) {
        self.queue.close();
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Drop for Engine {
    fn drop(&mut self) {
        self.shutdown();
    }
}

/// A merged variant being built off the engine thread, or one whose build failed (and when).
enum MergeBuild {
    Running,
    Failed(Instant),
}

/// How long a merged variant whose build failed (its tier full, say) runs unmerged before the
/// engine tries to build it again.
const MERGE_RETRY_AFTER: Duration = Duration::from_secs(30);

/// Locks a mutex, taking it over from a thread that panicked while holding it (the map it
/// guards stays consistent: every change is one insert or remove).
fn lock<T>(m: &std::sync::Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

struct Worker {
    backbone: Arc<Backbone>,
    registry: Option<Registry>,
    policy: PromotionPolicy,
    /// Prefilled prompts' KV caches, by adapter version (decoder engines only).
    prefixes: PrefixCache<KvCache>,
    panics: PanicTriggers,
    /// Set when the engine stops for good after repeated panics.
    stopped: Arc<std::sync::atomic::AtomicBool>,
    /// Merged variants being built off the engine thread, by `name@version`.
    merges: Arc<std::sync::Mutex<std::collections::HashMap<String, MergeBuild>>>,
    config: EngineConfig,
    metrics: Arc<Metrics>,
    queue: Arc<FairQueue<Job>>,
}

fn encoder_cannot_generate() -> EngineError {
    EngineError::Compute("this server's base model is an encoder; it cannot generate".into())
}

fn adapter_key(h: &Option<AdapterHandle>) -> String {
    h.as_ref()
        .map(|h| h.id())
        .unwrap_or_else(|| "base".to_owned())
}

/// Restarts the engine may make within [`RESTART_WINDOW`] after panics outside a batch; one more
/// and it stops for good (readiness turns 503 and queued work is failed).
const MAX_RESTARTS: usize = 3;
const RESTART_WINDOW: Duration = Duration::from_secs(60);

/// Token ids that make the engine panic on purpose, read from the environment in debug builds
/// only, so tests can check that a panic fails only what it must and the engine recovers:
/// `SWITCHYARD_TEST_PANIC_IN_STEP` (inside a forward pass, caught there) and
/// `SWITCHYARD_TEST_PANIC_IN_LOOP` (in the decoder loop outside any pass, caught by the
/// restart). Release builds never read them.
#[derive(Debug, Default, Clone, Copy)]
struct PanicTriggers {
    in_step: Option<u32>,
    in_loop: Option<u32>,
}

impl PanicTriggers {
    fn from_env() -> Self {
        if !cfg!(debug_assertions) {
            return Self::default();
        }
        let read = |name: &str| std::env::var(name).ok().and_then(|v| v.parse().ok());
        Self {
            in_step: read("SWITCHYARD_TEST_PANIC_IN_STEP"),
            in_loop: read("SWITCHYARD_TEST_PANIC_IN_LOOP"),
        }
    }

    fn fire(trigger: Option<u32>, ids: &[u32], place: &str) {
        if let Some(t) = trigger
            && ids.contains(&t)
        {
            panic!("test panic {place}: token {t}");
        }
    }
}

impl Worker {
    /// Runs the engine loop; a panic that escapes it (one outside a batch or a step, which are
    /// caught where they happen) fails the work it held, is logged and counted, and the loop
    /// starts again, up to [`MAX_RESTARTS`] times a minute. Past that the engine stops: the queue
    /// closes, what waits in it is failed, and readiness reports the engine stopped.
    fn run(mut self) {
        let backbone = self.backbone.clone();
        let mut restarts: std::collections::VecDeque<Instant> = Default::default();
        loop {
            let ran = std::panic::catch_unwind(AssertUnwindSafe(|| match &*backbone {
                Backbone::Encoder(e) => self.run_encoder(e),
                Backbone::Decoder(g) => self.run_decoder(g),
            }));
            if ran.is_ok() {
                break;
            }
            let now = Instant::now();
            while restarts
                .front()
                .is_some_and(|t| now.duration_since(*t) > RESTART_WINDOW)
            {
                restarts.pop_front();
            }
            if restarts.len() >= MAX_RESTARTS {
                tracing::error!(
                    restarts = restarts.len(),
                    window_s = RESTART_WINDOW.as_secs(),
                    "the engine panicked again after {MAX_RESTARTS} restarts within {} s; it stops, queued work fails and readiness turns 503",
                    RESTART_WINDOW.as_secs()
                );
                self.stopped
                    .store(true, std::sync::atomic::Ordering::SeqCst);
                self.queue.close();
                self.fail_queued();
                return;
            }
            restarts.push_back(now);
            self.metrics.engine_restarts.inc();
            tracing::error!(
                restart = restarts.len(),
                "the engine panicked outside a batch; the work it was running failed, and it restarts"
            );
        }
        tracing::info!("engine stopped");
    }

    /// Fails every job still queued (the engine stopped for good).
    fn fail_queued(&self) {
        let all = Budget {
            cost: u64::MAX,
            jobs: usize::MAX,
        };
        loop {
            let jobs = self.queue.try_take(all);
            if jobs.is_empty() {
                break;
            }
            for job in jobs {
                match job {
                    Job::Embed(j) => {
                        let _ = j.reply.send(Err(EngineError::Stopped));
                    }
                    Job::Generate(j) => {
                        let _ = j.events.send(GenEvent::Failed(EngineError::Stopped));
                    }
                }
            }
        }
        self.took();
    }

    /// The queue-depth gauge, after a take.
    fn took(&self) {
        self.metrics.queue_depth.set(self.queue.len() as i64);
    }

    /// The merged variant to run a batch that uses only `handle`, when the policy promotes it
    /// and it is built. One not built yet is built on a thread of its own while this batch and
    /// the next run unmerged, so a merge never holds up the engine; a build that failed is not
    /// tried again for [`MERGE_RETRY_AFTER`].
    fn merged_for(&mut self, handle: &AdapterHandle) -> Option<(MergedHandle, Duration)> {
        let registry = self.registry.as_ref()?;
        if !registry.merging_enabled() || !self.policy.promotes(&handle.id()) {
            return None;
        }
        if let Some(m) = registry.merged_ready(handle) {
            self.metrics
                .cache_event(switchyard_adapters::events::Tier::Merged, "hit");
            return Some((m, Duration::ZERO));
        }
        let id = handle.id();
        {
            let mut builds = lock(&self.merges);
            match builds.get(&id) {
                Some(MergeBuild::Running) => return None,
                Some(MergeBuild::Failed(at)) if at.elapsed() < MERGE_RETRY_AFTER => return None,
                _ => {}
            }
            builds.insert(id.clone(), MergeBuild::Running);
        }
        self.metrics
            .cache_event(switchyard_adapters::events::Tier::Merged, "miss");
        let (registry, builds) = (registry.clone(), Arc::clone(&self.merges));
        let (name, version) = (handle.name().to_string(), handle.version().to_owned());
        let spawned = std::thread::Builder::new()
            .name("switchyard-merge".to_owned())
            .spawn(move || {
                let start = Instant::now();
                let built = registry
                    .resolve_version(&name, &version)
                    .and_then(|h| registry.merged(&h).map(drop));
                let mut builds = lock(&builds);
                match built {
                    Ok(()) => {
                        tracing::info!(adapter = %id, elapsed_ms = start.elapsed().as_millis() as u64, "merged variant built");
                        builds.remove(&id);
                    }
                    Err(e) => {
                        tracing::warn!(adapter = %id, error = %e, "merged variant unavailable; running unmerged");
                        builds.insert(id, MergeBuild::Failed(Instant::now()));
                    }
                }
            });
        if let Err(e) = spawned {
            tracing::warn!(error = %e, "could not start a merge thread; running unmerged");
            lock(&self.merges).remove(&handle.id());
        }
        None
    }

    /// Batches of up to `max_batch_rows` rows, taken from the queue in fair order. With several
    /// tenants a batch holds at most `shared_batch_rows` rows, so what a request finds running
    /// ahead of it is a few rows, not a full batch of someone else's; small batches cost
    /// throughput (4 rows against 32: 0.6 to 0.75 of the requests answered, on 2 cores). A single
    /// job larger than the batch runs alone, in chunks.
    fn run_encoder(&mut self, e: &Embedder) {
        let rows = if self.config.answering_tenants() > 1 {
            self.config
                .shared_batch_rows
                .min(self.config.max_batch_rows)
        } else {
            self.config.max_batch_rows
        };
        let budget = Budget {
            cost: rows.max(1) as u64,
            jobs: usize::MAX,
        };
        while let Some(jobs) = self.queue.take(budget) {
            self.took();
            let mut batch = Vec::with_capacity(jobs.len());
            for job in jobs {
                match job {
                    Job::Embed(j) => batch.push(j),
                    Job::Generate(j) => {
                        let _ = j.events.send(GenEvent::Failed(encoder_cannot_generate()));
                    }
                }
            }
            // A panic in one batch (a bug in model code) fails that batch's requests, whose
            // reply channels drop, and the engine goes on with the next.
            if !batch.is_empty()
                && std::panic::catch_unwind(AssertUnwindSafe(|| self.run_embed_batch(e, batch)))
                    .is_err()
            {
                tracing::error!(
                    "an embedding batch panicked; its requests failed, the engine goes on"
                );
            }
        }
    }

    fn run_embed_batch(&mut self, e: &Embedder, batch: Vec<EmbedJob>) {
        let now = Instant::now();
        let (live, late): (Vec<EmbedJob>, Vec<EmbedJob>) =
            batch.into_iter().partition(|j| now <= j.deadline);
        for j in late {
            let _ = j.reply.send(Err(EngineError::DeadlineExceeded));
        }
        if live.is_empty() {
            return;
        }
        let mut live = live;
        for j in &mut live {
            j.ticket.permit.spend_all();
        }
        let _span = tracing::trace_span!("embed_batch", jobs = live.len()).entered();
        let first_key = adapter_key(&live[0].adapter);
        let uniform = live.iter().all(|j| adapter_key(&j.adapter) == first_key);
        let merged = match (&live[0].adapter, uniform) {
            (Some(h), true) => self.merged_for(h),
            _ => None,
        };
        for j in &live {
            self.policy.record(&adapter_key(&j.adapter), j.ids.len());
        }
        let ids: Vec<Vec<u32>> = live.iter().flat_map(|j| j.ids.iter().cloned()).collect();
        let start = Instant::now();
        let max_rows = self.config.max_batch_rows.max(1);
        let mut result: Result<Vec<Vec<f32>>, EngineError> = Ok(Vec::with_capacity(ids.len()));
        // A single job larger than the row limit runs in chunks of at most the limit.
        let mut per_row: Vec<Option<Arc<Adapter>>> = Vec::with_capacity(ids.len());
        for j in &live {
            per_row.extend(std::iter::repeat_n(
                j.adapter.as_ref().map(|h| h.adapter().clone()),
                j.ids.len(),
            ));
        }
        for (chunk, adapters) in ids.chunks(max_rows).zip(per_row.chunks(max_rows)) {
            let t_chunk = padded_len(chunk);
            let rows = match &merged {
                Some((m, _)) => RowAdapters::merged(
                    Arc::<MergedWeights>::clone(m.weights()),
                    chunk.len() * t_chunk,
                ),
                None => rows_for_sequences(adapters, &vec![t_chunk; chunk.len()]),
            };
            self.metrics.batch_rows.observe(chunk.len() as f64);
            match e.embed_rows(chunk, &rows) {
                Ok(v) => {
                    if let Ok(all) = &mut result {
                        all.extend(v);
                    }
                }
                Err(err) => result = Err(EngineError::Compute(format!("{err:#}"))),
            }
        }
        let merge_time = merged.as_ref().map(|(_, d)| *d).unwrap_or_default();
        match result {
            Ok(mut all) => {
                for j in live.into_iter().rev() {
                    let mine = all.split_off(all.len() - j.ids.len());
                    let queue = start
                        .saturating_duration_since(j.admitted)
                        .saturating_sub(merge_time);
                    let timings = Timings {
                        queue,
                        swap: j.swap + merge_time,
                        first_token: None,
                        total: j.admitted.elapsed(),
                    };
                    if let Some(h) = &j.adapter {
                        self.metrics.adapter_answer(h.was_resident(), timings.total);
                    }
                    let _ = j.reply.send(Ok(EmbedOutput {
                        embeddings: mine,
                        timings,
                        merged: merged.is_some(),
                    }));
                }
            }
            Err(err) => {
                tracing::error!(error = %err, "embedding batch failed");
                for j in live {
                    let _ = j.reply.send(Err(err.clone()));
                }
            }
        }
    }

    /// Continuous batching: up to `max_batch_rows` live sequences; free places are filled from
    /// the queue's round robin over tenants between steps. Blocks only when nothing is running.
    fn run_decoder(&mut self, g: &Generator) {
        let mut live: Vec<Sequence> = Vec::new();
        // Jobs taken from the queue that wait for room in the KV budget, in the queue's order.
        let mut waiting: std::collections::VecDeque<Job> = std::collections::VecDeque::new();
        let eos = g.model().config.eos_ids();
        let per_position = g.model().kv_bytes_per_position();
        let planned = |job: &Job| match job {
            Job::Generate(j) => (j.prompt_ids.len() + j.limit) as u64 * per_position,
            Job::Embed(_) => 0,
        };
        loop {
            let budget = Budget {
                cost: u64::MAX,
                jobs: self
                    .config
                    .max_batch_rows
                    .saturating_sub(live.len() + waiting.len()),
            };
            let jobs = if live.is_empty() && waiting.is_empty() {
                match self.queue.take(budget) {
                    Some(jobs) => jobs,
                    None => return,
                }
            } else if budget.jobs > 0 && waiting.is_empty() {
                self.queue.try_take(budget)
            } else {
                Vec::new()
            };
            if !jobs.is_empty() {
                self.took();
            }
            waiting.extend(jobs);
            // Admit in order while the planned KV bytes fit (always when nothing runs: a job
            // that could never fit was refused before it was queued).
            let kv_budget = self.config.kv_budget_bytes;
            let mut in_use: u64 = live
                .iter()
                .map(|s| (s.job.prompt_ids.len() + s.job.limit) as u64 * per_position)
                .sum();
            while let Some(job) = waiting.front() {
                let need = planned(job);
                if kv_budget > 0 && !live.is_empty() && in_use + need > kv_budget {
                    break;
                }
                in_use += need;
                let job = waiting.pop_front().expect("a front job");
                if let Job::Generate(j) = &job {
                    PanicTriggers::fire(self.panics.in_loop, &j.prompt_ids, "in the decoder loop");
                }
                self.admit_guarded(g, job, &mut live);
            }
            // Drop sequences whose client went away, or whose deadline passed.
            let now = Instant::now();
            live.retain_mut(|s| {
                if s.job.events.is_closed() {
                    tracing::debug!("client disconnected; generation stopped and its cache freed");
                    false
                } else if now > s.job.deadline {
                    s.end(Stop::Deadline, None, g, &self.metrics);
                    false
                } else {
                    true
                }
            });
            if live.is_empty() {
                continue;
            }
            if std::panic::catch_unwind(AssertUnwindSafe(|| self.step(g, &mut live, &eos))).is_err()
            {
                tracing::error!(
                    sequences = live.len(),
                    "a decoder step panicked; its sequences failed, the engine goes on"
                );
                live.clear();
            }
        }
    }

    /// [`Worker::admit`], with a panic there failing only that request.
    fn admit_guarded(&mut self, g: &Generator, job: Job, live: &mut Vec<Sequence>) {
        if std::panic::catch_unwind(AssertUnwindSafe(|| self.admit(g, job, live))).is_err() {
            tracing::error!(
                "admitting a generation panicked; its request failed, the engine goes on"
            );
        }
    }

    /// Takes a job into the running set; its prompt is prefilled by the next steps, in chunks.
    fn admit(&mut self, g: &Generator, job: Job, live: &mut Vec<Sequence>) {
        let job = match job {
            Job::Generate(j) => j,
            Job::Embed(j) => {
                let _ = j.reply.send(Err(EngineError::Compute(
                    "this server's base model is a decoder; it cannot embed".into(),
                )));
                return;
            }
        };
        if Instant::now() > job.deadline {
            let _ = job
                .events
                .send(GenEvent::Failed(EngineError::DeadlineExceeded));
            return;
        }
        if job.prompt_ids.is_empty() {
            let _ = job.events.send(GenEvent::Failed(EngineError::Compute(
                "a generation needs at least one prompt token".into(),
            )));
            return;
        }
        // A stored prompt with the same beginning on the same adapter version gives its cache;
        // the last prompt token is always prefilled, as its logits pick the first new token.
        let (cache, reused) = match self.prefixes.find(
            &adapter_key(&job.adapter),
            &job.prompt_ids,
            job.prompt_ids.len() - 1,
        ) {
            Some(found) => {
                let room = job.prompt_ids.len() + job.limit;
                (
                    g.model().cache_prefix(found.cache, found.shared, room),
                    found.shared,
                )
            }
            None => (g.model().new_cache(), 0),
        };
        self.metrics.prompt_tokens(job.prompt_ids.len(), reused);
        let mut seq = Sequence {
            cache,
            sampler: Sampler::new(job.sampling),
            last: 0,
            prefilled: reused,
            reused,
            detok: Detokenizer::new(),
            sent_text: String::new(),
            holder: end_at::Holder::default(),
            started: Instant::now(),
            first_token: None,
            job,
        };
        seq.job.ticket.permit.spend(seq.job.prompt_ids.len() as u64);
        live.push(seq);
    }

    /// One forward pass over the running set: each generating sequence's next token, then
    /// prompt chunks of the sequences still prefilling, in admission order, as far as
    /// `step_tokens` allows (at least [`MIN_PREFILL_TOKENS`] when generations fill it, so a
    /// prompt always advances). Several prompts share the pass; a prompt longer than the budget
    /// takes several steps while the generations keep stepping. A sequence whose prompt is done
    /// samples its first token from this pass.
    fn step(&mut self, g: &Generator, live: &mut Vec<Sequence>, eos: &[u32]) {
        let decoding = live.iter().filter(|s| s.prefilling() == 0).count();
        let room = self
            .config
            .step_tokens
            .saturating_sub(decoding)
            .max(MIN_PREFILL_TOKENS);
        let grants = prefill_grants(
            &live.iter().map(Sequence::prefilling).collect::<Vec<_>>(),
            room,
        );
        // Each taking part: its index in `live` and how many new tokens it brings.
        let parts: Vec<(usize, usize)> = live
            .iter()
            .zip(&grants)
            .enumerate()
            .filter_map(|(i, (s, &granted))| match s.prefilling() {
                0 => Some((i, 1)),
                _ if granted > 0 => Some((i, granted)),
                _ => None,
            })
            .collect();
        // Sequences of one adapter side by side, so the layer reads each adapter's factors once
        // per step for all its rows instead of once per sequence.
        let adapter_of = |i: usize| {
            live[i]
                .job
                .adapter
                .as_ref()
                .map(|h| Arc::as_ptr(h.adapter()) as usize)
        };
        let mut parts = parts;
        parts.sort_by_key(|&(i, _)| (adapter_of(i), i));
        let _span = tracing::trace_span!("decoder_step", sequences = parts.len()).entered();
        let inputs: Vec<Vec<u32>> = parts
            .iter()
            .map(|&(i, n)| {
                let s = &live[i];
                match s.prefilling() {
                    0 => vec![s.last],
                    _ => s.job.prompt_ids[s.prefilled..s.prefilled + n].to_vec(),
                }
            })
            .collect();
        for ids in &inputs {
            PanicTriggers::fire(self.panics.in_step, ids, "in a decoder step");
        }
        let token_refs: Vec<&[u32]> = inputs.iter().map(Vec::as_slice).collect();
        let first_key = adapter_key(&live[parts[0].0].job.adapter);
        let uniform = parts
            .iter()
            .all(|&(i, _)| adapter_key(&live[i].job.adapter) == first_key);
        let merged = match (&live[parts[0].0].job.adapter, uniform) {
            (Some(h), true) => self.merged_for(h),
            _ => None,
        };
        for &(i, _) in &parts {
            self.policy.record(&adapter_key(&live[i].job.adapter), 1);
        }
        let lengths: Vec<usize> = parts.iter().map(|&(_, n)| n).collect();
        let rows = match &merged {
            Some((m, _)) => RowAdapters::merged(
                Arc::<MergedWeights>::clone(m.weights()),
                lengths.iter().sum(),
            ),
            None => {
                let adapters: Vec<Option<Arc<Adapter>>> = parts
                    .iter()
                    .map(|&(i, _)| live[i].job.adapter.as_ref().map(|h| h.adapter().clone()))
                    .collect();
                rows_for_sequences(&adapters, &lengths)
            }
        };
        self.metrics.batch_rows.observe(parts.len() as f64);
        // The caches in the order of `parts`.
        let mut slots: Vec<Option<&mut KvCache>> =
            live.iter_mut().map(|s| Some(&mut s.cache)).collect();
        let mut caches: Vec<&mut KvCache> = parts
            .iter()
            .map(|&(i, _)| slots[i].take().expect("each sequence takes part once"))
            .collect();
        let logits = g
            .model()
            .forward_last(&token_refs, &mut caches, &rows)
            .and_then(|l| l.to_vec2::<f32>());
        match logits {
            Ok(rows) => {
                let mut brought: Vec<Option<(usize, Vec<f32>)>> = vec![None; live.len()];
                for (&(i, n), l) in parts.iter().zip(rows) {
                    brought[i] = Some((n, l));
                }
                let mut keep = Vec::with_capacity(live.len());
                for (mut s, b) in live.drain(..).zip(brought) {
                    let Some((n, l)) = b else {
                        keep.push(s);
                        continue;
                    };
                    if s.prefilling() > 0 {
                        s.prefilled += n;
                        if s.prefilling() > 0 {
                            // A chunk of a longer prompt: its logits are not used.
                            keep.push(s);
                            continue;
                        }
                        self.keep_prefix(g, &s);
                    }
                    let token = s.sampler.next(&l);
                    if s.push(g, token, eos, &self.metrics) {
                        keep.push(s);
                    }
                }
                *live = keep;
            }
            Err(e) => {
                tracing::error!(error = %e, "decoder step failed");
                for s in live.drain(..) {
                    s.fail(e.to_string());
                }
            }
        }
    }
}

impl Worker {
    /// Offers a sequence's just-prefilled prompt to the prefix cache (a copy of its KV cache,
    /// which holds exactly the prompt's positions now).
    fn keep_prefix(&mut self, g: &Generator, s: &Sequence) {
        if !self.prefixes.enabled() {
            return;
        }
        let prompt = &s.job.prompt_ids;
        let bytes = prompt.len() as u64 * g.model().kv_bytes_per_position();
        let model = g.model();
        self.prefixes
            .keep(&adapter_key(&s.job.adapter), prompt, bytes, || {
                model.cache_prefix(&s.cache, prompt.len(), prompt.len())
            });
        self.metrics
            .prefix_cache_bytes
            .set(self.prefixes.held_bytes() as i64);
    }
}

/// How many prompt tokens each sequence prefills in one step, out of `room`, given the prompt
/// tokens each has left (0 for one that generates; the slice is in admission order). The oldest
/// prompt still prefilling is granted a quarter of the room first (at least one token), so no
/// prompt waits forever; the rest goes to the prompts with the fewest tokens left, so a short
/// prompt that arrives while long ones prefill finishes in the next step instead of waiting
/// for all of them.
fn prefill_grants(left: &[usize], mut room: usize) -> Vec<usize> {
    let mut grants = vec![0; left.len()];
    let waiting: Vec<usize> = (0..left.len()).filter(|&i| left[i] > 0).collect();
    let Some(&oldest) = waiting.first() else {
        return grants;
    };
    let first = left[oldest].min((room / 4).max(1)).min(room);
    grants[oldest] = first;
    room -= first;
    let mut shortest = waiting;
    shortest.sort_by_key(|&i| (left[i] - grants[i], i));
    for i in shortest {
        if room == 0 {
            break;
        }
        let n = (left[i] - grants[i]).min(room);
        grants[i] += n;
        room -= n;
    }
    grants
}

#[cfg(test)]
mod grant_tests {
    use super::prefill_grants;

    #[test]
    fn a_short_prompt_goes_ahead_of_long_ones_and_the_oldest_always_advances() {
        // Two long prompts prefilling, a decode, and a short prompt that just arrived: the short
        // one finishes, the rest goes to the oldest (now the long one with the fewest left).
        assert_eq!(
            prefill_grants(&[2000, 2000, 0, 12], 255),
            vec![243, 0, 0, 12]
        );
        // The short one alone with the room: all of it, in one step.
        assert_eq!(prefill_grants(&[0, 12], 255), vec![0, 12]);
        // However many short prompts keep arriving, the oldest gets its quarter.
        assert_eq!(
            prefill_grants(&[2000, 100, 100, 100], 256),
            vec![64, 100, 92, 0]
        );
        // The smallest room still moves the oldest.
        assert_eq!(prefill_grants(&[50, 3], 1), vec![1, 0]);
        assert_eq!(prefill_grants(&[0, 0], 10), vec![0, 0]);
        // Never more than the room, never more than a prompt has left.
        let g = prefill_grants(&[5, 7, 300], 64);
        assert!(g.iter().sum::<usize>() <= 64);
        assert_eq!(&g[..2], &[5, 7]);
    }
}

/// Prompt tokens a decoder step prefills at least, however many generations it carries, so a
/// waiting prompt always advances.
const MIN_PREFILL_TOKENS: usize = 1;

struct Sequence {
    job: GenerateJob,
    cache: KvCache,
    sampler: Sampler,
    /// The token sampled last: the input of the next step.
    last: u32,
    /// Prompt tokens already in the cache (the rest are prefilled by the coming steps).
    prefilled: usize,
    /// Prompt tokens whose cache was copied from the prefix cache.
    reused: usize,
    /// The output so far (end-of-sequence token excluded) and its streamed text.
    detok: Detokenizer,
    sent_text: String,
    /// Decoded text held back while it may be the start of an end text.
    holder: end_at::Holder,
    started: Instant,
    first_token: Option<Duration>,
}

impl Sequence {
    /// Prompt tokens not yet prefilled (0 once the sequence generates).
    fn prefilling(&self) -> usize {
        self.job.prompt_ids.len() - self.prefilled
    }

    /// Records a new token, streams its text, and says whether the sequence goes on.
    fn push(&mut self, g: &Generator, token: u32, eos: &[u32], metrics: &Metrics) -> bool {
        if self.first_token.is_none() {
            let d = self.job.admitted.elapsed();
            self.first_token = Some(d);
            metrics.first_token_seconds.observe(d.as_secs_f64());
            if let Some(h) = &self.job.adapter {
                metrics.adapter_answer(h.was_resident(), d);
            }
        }
        metrics.generated_tokens.inc();
        self.job.ticket.permit.spend(1);
        self.last = token;
        if eos.contains(&token) {
            self.end(Stop::Eos, None, g, metrics);
            return false;
        }
        if self.job.end_at.token_ids.contains(&token) {
            self.end(Stop::EndToken(token), None, g, metrics);
            return false;
        }
        let decode = |ids: &[u32]| g.decode(ids).unwrap_or_default();
        let delta = self.detok.push(token, &decode);
        let (send, ended) = match self.holder.push(&self.job.end_at.texts, &delta) {
            end_at::Step::Send(send) => (send, None),
            end_at::Step::End { send, index } => (send, Some(index)),
        };
        self.sent_text.push_str(&send);
        if self
            .job
            .events
            .send(GenEvent::Token {
                id: token,
                text: send,
            })
            .is_err()
        {
            return false;
        }
        if let Some(index) = ended {
            let text = self.job.end_at.texts[index].clone();
            let sent = self.sent_text.clone();
            self.end(Stop::EndText(text), Some(sent), g, metrics);
            return false;
        }
        if self.detok.ids().len() >= self.job.limit {
            self.end(Stop::Limit, None, g, metrics);
            return false;
        }
        true
    }

    fn end(&self, stop: Stop, text: Option<String>, g: &Generator, metrics: &Metrics) {
        let total = self.job.admitted.elapsed();
        metrics.request_seconds.observe(total.as_secs_f64());
        let text = text.unwrap_or_else(|| g.decode(self.detok.ids()).unwrap_or_default());
        let _ = self.job.events.send(GenEvent::Done(Finished {
            stop,
            tail: unsent_tail(&text, &self.sent_text),
            text,
            prompt_tokens: self.job.prompt_ids.len(),
            reused_tokens: self.reused,
            output_tokens: self.detok.ids().len(),
            timings: Timings {
                queue: self
                    .started
                    .saturating_duration_since(self.job.admitted + self.job.swap),
                swap: self.job.swap,
                first_token: self.first_token,
                total,
            },
        }));
    }

    fn fail(self, message: String) {
        let _ = self
            .job
            .events
            .send(GenEvent::Failed(EngineError::Compute(message)));
    }
}

/// What of the whole decoded text was not streamed yet. Streaming only ever sends a prefix of the
/// decoded text, so the rest is what follows `sent`; if decoding ever disagreed with what was sent
/// (it does not for byte-level tokenizers), nothing is resent.
fn unsent_tail(full: &str, sent: &str) -> String {
    full.strip_prefix(sent).unwrap_or_default().to_owned()
}

#[cfg(test)]
mod tail_tests {
    use super::unsent_tail;

    #[test]
    fn a_trailing_incomplete_character_held_back_is_flushed_at_the_end() {
        // A byte-level decoder shows a cut multi-byte character as U+FFFD; streaming held it back.
        assert_eq!(unsent_tail("caf\u{FFFD}", "caf"), "\u{FFFD}");
        assert_eq!(unsent_tail("café", "café"), "");
        assert_eq!(unsent_tail("other", "caf"), "");
    }
}
