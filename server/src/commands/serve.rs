//! `switchyard serve`: loads the settings, the base model and the adapter store, starts the
//! registry's watcher, the engine thread and the HTTP server, and shuts down cleanly on SIGTERM
//! or Ctrl-C: readiness turns 503, new work is refused, in-flight work gets the grace period to
//! finish, and the process exits 0.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use anyhow::Context;
use axum::extract::{Request, State};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use switchyard_adapters::package::Limits;
use switchyard_adapters::registry::{Registry, RegistryConfig};
use switchyard_adapters::store::{RemoteConfig, Store};
use switchyard_config::{LogFormat, Overrides, Settings};
use switchyard_kernels::WeightFormat;

use crate::engine::{Backbone, Engine, EngineConfig};
use crate::experiments::{Experiments, PostgresStore, SqliteStore, legacy, postgres};
use crate::http::auth::{Tenants, tenant_limits};
use crate::http::error::ApiError;
use crate::http::{AppState, Bounds, SharedState, router};
use crate::metrics::Metrics;
use crate::model::embedder::Embedder;
use crate::model::generator::Generator;

/// The most threads blocking work runs on at once. Each holds a request's tokenising or an
/// adapter's read for a millisecond or so, so a few more than the cores keep the engine fed
/// while one waits on the disk.
const BLOCKING_THREADS: usize = 8;

#[derive(Debug, Clone, Default)]
pub struct ServeOptions {
    pub config: Option<PathBuf>,
    pub overrides: Overrides,
}

/// Tells the kernel whether this process's memory may be backed by transparent huge pages
/// (`prctl(PR_SET_THP_DISABLE)`; pages already huge stay so). Done before the model loads, so
/// nothing the server allocates after it is affected. With huge pages on, memory the allocator
/// frees inside a 2 MiB page stays resident, and the kernel's background merging of pages
/// into huge ones made the soak's resident set creep up for many minutes.
fn set_huge_pages(allowed: bool) {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: PR_SET_THP_DISABLE takes one integer and touches no memory of ours.
        #[allow(unsafe_code)]
        let rc = unsafe {
            libc::prctl(
                libc::PR_SET_THP_DISABLE,
                libc::c_ulong::from(!allowed),
                0,
                0,
                0,
            )
        };
        if rc != 0 {
            tracing::warn!(
                error = %std::io::Error::last_os_error(),
                "could not set whether huge pages back the server's memory"
            );
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = allowed;
}

/// Loads an encoder or a decoder, by the checkpoint's `model_type`, with its weights held in
/// `format`.
pub fn load_backbone(dir: &Path, format: WeightFormat) -> anyhow::Result<Backbone> {
    let config = dir.join("config.json");
    let text = std::fs::read_to_string(&config)
        .with_context(|| format!("reading {}", config.display()))?;
    let v: serde_json::Value =
        serde_json::from_str(&text).with_context(|| format!("parsing {}", config.display()))?;
    let model_type = v.get("model_type").and_then(|m| m.as_str()).unwrap_or("");
    match model_type {
        t if crate::model::bert::ENCODER_TYPES.contains(&t) => {
            Ok(Backbone::Encoder(Embedder::load_as(dir, format)?))
        }
        t if crate::model::llama::DECODER_TYPES.contains(&t) => {
            Ok(Backbone::Decoder(Generator::load_as(dir, format)?))
        }
        other => anyhow::bail!(
            "{}: model_type {other:?} is not supported (encoders: {}; decoders: {})",
            config.display(),
            crate::model::bert::ENCODER_TYPES.join(", "),
            crate::model::llama::DECODER_TYPES.join(", ")
        ),
    }
}

fn base_weight(
    backbone: &Backbone,
    site: &switchyard_adapters::Site,
) -> Option<Arc<switchyard_kernels::PackedWeight>> {
    match backbone {
        Backbone::Encoder(e) => e.model().base_weight(site),
        Backbone::Decoder(g) => g.model().base_weight(site),
    }
}

fn init_logging(settings: &Settings) {
    let filter = tracing_subscriber::EnvFilter::try_new(&settings.log_filter)
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    // Colour codes only on a terminal: in a log file or a collector they are noise.
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr);
    let _ = match settings.log_format {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Human => builder.try_init(),
    };
}

/// One request in flight: counted while it lives, so a client that disconnects (dropping the
/// handler's future at an await) still leaves the count.
struct InFlight(Arc<AtomicUsize>);

impl InFlight {
    fn enter(count: &Arc<AtomicUsize>) -> Self {
        count.fetch_add(1, Ordering::SeqCst);
        Self(count.clone())
    }
}

impl Drop for InFlight {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::SeqCst);
    }
}

/// Counts requests in flight, and refuses new work once shutdown has begun.
async fn track(
    State(state): State<(SharedState, Arc<AtomicUsize>)>,
    req: Request,
    next: Next,
) -> Response {
    let (app, inflight) = state;
    let path = req.uri().path();
    let is_probe = path.starts_with("/health") || path == "/metrics";
    if !is_probe && !app.ready.load(Ordering::SeqCst) {
        return ApiError::new(
            axum::http::StatusCode::SERVICE_UNAVAILABLE,
            "shutting_down",
            "the server is shutting down",
        )
        .into_response();
    }
    let _counted = InFlight::enter(&inflight);
    next.run(req).await
}

pub fn run(opts: &ServeOptions) -> anyhow::Result<()> {
    let settings = Settings::load_with(opts.config.as_deref(), std::env::vars(), &opts.overrides)?;
    init_logging(&settings);
    let model_dir = settings.require_model_dir()?.to_owned();
    let store_dir = settings.store_dir.clone().ok_or_else(|| {
        anyhow::anyhow!(
            "store.dir is not set: give it in the config file, SWITCHYARD_STORE_DIR or --store"
        )
    })?;
    if settings.threads > 0 {
        // SAFETY-free: set before any rayon pool exists; candle and the kernels read it.
        let _ = rayon_threads(settings.threads);
    }
    // The compute pool is the engine's: a request's texts are tokenised one after another on
    // the (lowered) blocking thread that handles it, not spread over the pool, where they would
    // queue between the engine's own parallel work and take its priority.
    tokenizers::utils::parallelism::set_parallelism(false);
    if !settings.huge_pages {
        set_huge_pages(false);
    }
    let started = Instant::now();
    let backbone = Arc::new(load_backbone(&model_dir, settings.model_weights)?);
    let kernels = switchyard_kernels::dispatch::active();
    tracing::info!(model = %model_dir.display(), family = backbone.family(), fingerprint = %backbone.spec().fingerprint, weights = %settings.model_weights, kernels = %kernels, library = %switchyard_kernels::onednn::status(), weight_bytes = backbone.weight_bytes(), secs = started.elapsed().as_secs_f64(), "base model loaded");
    if !store_dir.exists() {
        std::fs::create_dir_all(&store_dir)
            .with_context(|| format!("creating the store folder {}", store_dir.display()))?;
    }
    let store = match &settings.object_store {
        None => Store::open(&store_dir, Limits::default())
            .with_context(|| format!("opening the store {}", store_dir.display()))?,
        Some(o) => {
            let config = RemoteConfig {
                endpoint: o.endpoint.clone(),
                bucket: o.bucket.clone(),
                prefix: o.prefix.clone(),
                region: o.region.clone(),
                access_key_id: o.access_key_id.clone(),
                secret_access_key: o.secret_access_key.clone(),
            };
            // The store folder holds the package cache (and, by default, the experiments).
            Store::open_remote(
                &config,
                &store_dir.join("package-cache"),
                settings.store_cache_bytes,
                Limits::default(),
            )
            .with_context(|| format!("opening the object store {}", config.url()))?
        }
    };
    let unfinished = store
        .remove_unfinished_writes()
        .with_context(|| format!("cleaning the store {}", store_dir.display()))?;
    if unfinished > 0 {
        tracing::warn!(
            files = unfinished,
            "removed unfinished writes an earlier process left in the store"
        );
    }
    let weights = backbone.clone();
    let registry = Registry::new(
        store,
        backbone.spec().clone(),
        RegistryConfig {
            factor_budget_bytes: settings.factor_budget_bytes,
            merged_budget_bytes: settings.merged_budget_bytes,
        },
        Some(Box::new(move |site: &switchyard_adapters::Site| {
            base_weight(&weights, site)
        })),
    );
    let watcher = registry.start_watcher(Duration::from_millis(250));
    let vital_threads = vec![("store watcher", watcher.alive())];
    let metrics = Arc::new(Metrics::new(settings.metrics_adapter_series));
    let library = switchyard_kernels::onednn::in_use(kernels, settings.model_weights);
    metrics.set_base(
        &settings.model_weights.to_string(),
        kernels.name(),
        if library.is_some() { "onednn" } else { "none" },
        backbone.weight_bytes(),
    );
    {
        let events = registry.subscribe(1024);
        let metrics = metrics.clone();
        std::thread::Builder::new()
            .name("switchyard-metrics".into())
            .spawn(move || {
                while let Ok(ev) = events.recv() {
                    metrics.record_swap(&ev);
                }
            })
            .context("starting the metrics thread")?;
    }
    let engine = Engine::start(
        backbone.clone(),
        Some(registry.clone()),
        EngineConfig {
            max_batch_rows: settings.max_batch_rows,
            step_tokens: settings.step_tokens,
            kv_budget_bytes: settings.kv_budget_bytes,
            prefix_cache_bytes: settings.prefix_cache_bytes,
            queue_depth: settings.queue_depth,
            shared_batch_rows: settings.shared_batch_rows,
            promote_share: settings.promote_share,
            promote_window_rows: settings.promote_window_rows,
            tenants: {
                // The tenants' lanes, then shadow traffic's, with no quota of its own (its
                // budget is checked before a shadow job is queued).
                let mut lanes = tenant_limits(&settings);
                lanes.push(crate::engine::TenantLimits {
                    name: SHADOW_LANE.to_owned(),
                    quota: Default::default(),
                });
                lanes
            },
            background_lanes: 1,
        },
        metrics.clone(),
    );
    let splits = open_experiments(&settings, &store_dir)?;
    splits.keep_arm_versions(&registry);
    let state: SharedState = Arc::new(AppState {
        engine,
        backbone,
        registry,
        tenants: Tenants::new(&settings.tenants),
        admin_token: settings.admin_token.clone(),
        metrics_public: settings.metrics_public,
        metrics,
        splits,
        readout: crate::splits::ReadoutSettings {
            mixing_variance: settings.mixing_variance,
            assignment_alarm_p: settings.assignment_alarm_p,
        },
        rollout_check: Duration::from_millis(settings.rollout_check_ms),
        shadow: crate::http::ShadowBudget {
            lane: tenant_limits(&settings).len(),
            max_in_flight: settings.shadow_max_in_flight as usize,
            max_queued: settings.shadow_max_queued as usize,
            in_flight: Default::default(),
        },
        bounds: Bounds {
            inference_body_bytes: settings.inference_body_bytes,
            upload_body_bytes: settings.upload_body_bytes,
            text_bytes: settings.text_bytes,
            prompt_tokens: settings.prompt_tokens,
            generated_tokens: settings.generated_tokens,
            texts_per_request: settings.texts_per_request,
            timeout: Duration::from_millis(settings.request_timeout_ms),
        },
        ready: AtomicBool::new(true),
        vital_threads,
        replica: crate::http::replica_name(settings.replica.as_deref()),
        history: crate::history::History::new(Duration::from_millis(settings.history_interval_ms)),
    });
    let niceness = http_niceness();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        // Blocking work (tokenising, bringing adapters in, admin writes) runs on a bounded set
        // of threads that stay once started: in the soak, each new blocking thread came with
        // more resident memory (the allocator's per-thread pages), and bursts grew the pool
        // from 17 to 30 threads.
        .max_blocking_threads(BLOCKING_THREADS)
        .thread_keep_alive(Duration::from_secs(24 * 3600))
        .enable_all()
        .thread_name("switchyard-http")
        .on_thread_start(move || yield_to_the_engine(niceness))
        .build()
        .context("starting the async runtime")?;
    let grace = Duration::from_millis(settings.shutdown_grace_ms);
    let listen = settings.listen;
    let result = runtime.block_on(serve(state.clone(), listen, grace));
    watcher.stop();
    drop(runtime);
    // The engine finishes what it holds, then its thread ends.
    match Arc::try_unwrap(state) {
        Ok(mut s) => s.engine.shutdown(),
        Err(_) => tracing::warn!("requests still held the server state at exit"),
    }
    tracing::info!("stopped");
    result
}

/// How much lower the HTTP threads' scheduling priority is than the engine thread's (Linux
/// niceness, added to the process's own).
const HTTP_NICENESS: i32 = 5;

/// The niceness the HTTP threads get: the calling (main) thread's plus [`HTTP_NICENESS`], at
/// most 19. Read once, before the runtime starts, because a thread inherits the niceness of the
/// thread that starts it (the blocking pool's threads are started by HTTP threads).
#[allow(unsafe_code)]
fn http_niceness() -> Option<i32> {
    #[cfg(target_os = "linux")]
    // SAFETY: getpriority on the calling thread reads only that thread's niceness; errno is
    // cleared first because -1 is also a valid answer.
    unsafe {
        let tid = libc::syscall(libc::SYS_gettid) as libc::id_t;
        *libc::__errno_location() = 0;
        let now = libc::getpriority(libc::PRIO_PROCESS, tid);
        if *libc::__errno_location() == 0 {
            return Some((now + HTTP_NICENESS).min(19));
        }
    }
    None
}

/// Sets the calling thread's CPU priority to `niceness` (on Linux the niceness is per thread; any
/// user may lower its own priority), so that on a machine with few cores the engine thread, which
/// computes every answer, goes before the threads that read, refuse and write requests. A tenant
/// flooding the server with requests that are refused then takes CPU from the other refusals,
/// not from the batches other tenants wait for. The flood scenario (`switchyard-load fairness`)
/// measures it.
#[allow(unsafe_code)]
fn yield_to_the_engine(niceness: Option<i32>) {
    #[cfg(target_os = "linux")]
    if let Some(niceness) = niceness {
        // SAFETY: setpriority on the calling thread's id changes only that thread's niceness;
        // no memory is passed. A refusal (it cannot happen when lowering) leaves it as it was.
        unsafe {
            let tid = libc::syscall(libc::SYS_gettid) as libc::id_t;
            libc::setpriority(libc::PRIO_PROCESS, tid, niceness);
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = niceness;
}

/// The engine lane shadow traffic queues in, as metrics name it.
const SHADOW_LANE: &str = "shadow-traffic";

/// How often a replica reads the split definitions of a shared experiment database again.
const SHARED_RELOAD: Duration = Duration::from_secs(1);

/// Opens the experiment database (moving an earlier version's `splits.json` into it once) and
/// loads the splits.
fn open_experiments(settings: &Settings, store_dir: &Path) -> anyhow::Result<Experiments> {
    let path = settings
        .experiments_database_path()
        .unwrap_or_else(|| store_dir.join("experiments.sqlite"));
    let keep = Duration::from_secs(settings.keep_responses_days * 24 * 3600);
    if let Some(url) = path.to_str().filter(|p| postgres::is_postgres_url(p)) {
        // Shared by the replicas of a fleet: definitions are read again every second.
        let store = PostgresStore::open(url).with_context(|| {
            format!(
                "opening the experiment database {}",
                postgres::without_password(url)
            )
        })?;
        legacy::migrate(store_dir, &store)?;
        tracing::info!(database = %store.shown(), keep_responses_days = settings.keep_responses_days, "experiments opened (shared; split definitions read again every second)");
        return Experiments::open(Arc::new(store), Some(keep), Some(SHARED_RELOAD));
    }
    let store = SqliteStore::open(&path)
        .with_context(|| format!("opening the experiment database {}", path.display()))?;
    legacy::migrate(store_dir, &store)?;
    tracing::info!(database = %path.display(), keep_responses_days = settings.keep_responses_days, "experiments opened");
    Experiments::open(Arc::new(store), Some(keep), None)
}

fn rayon_threads(n: usize) -> anyhow::Result<()> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(n)
        .build_global()
        .map_err(|e| anyhow::anyhow!("setting {n} compute threads: {e}"))
}

async fn serve(state: SharedState, listen: SocketAddr, grace: Duration) -> anyhow::Result<()> {
    let inflight = Arc::new(AtomicUsize::new(0));
    let app = router(state.clone()).layer(axum::middleware::from_fn_with_state(
        (state.clone(), inflight.clone()),
        track,
    ));
    tokio::spawn(crate::http::recent::sample_every(state.clone()));
    tokio::spawn(crate::http::splits::check_rollouts_every(state.clone()));
    let listener = tokio::net::TcpListener::bind(listen)
        .await
        .with_context(|| format!("binding {listen}"))?;
    let addr = listener.local_addr()?;
    // The first line on stdout, so scripts (and tests using port 0) learn the address.
    println!("switchyard listening on http://{addr}");
    tracing::info!(%addr, "listening");
    let stop = {
        let state = state.clone();
        async move {
            shutdown_signal().await;
            tracing::info!(
                inflight = inflight.load(Ordering::SeqCst),
                "shutdown requested: readiness is now 503, new work refused"
            );
            state.ready.store(false, Ordering::SeqCst);
            let deadline = Instant::now() + grace;
            while inflight.load(Ordering::SeqCst) > 0 && Instant::now() < deadline {
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
            let left = inflight.load(Ordering::SeqCst);
            if left > 0 {
                tracing::warn!(left, "grace period over with requests still in flight");
            }
        }
    };
    // Streams outlive their handlers, so the in-flight count above does not cover them: after
    // the signal, open connections get one more grace period, then the server stops regardless.
    let stopping = Arc::new(tokio::sync::Notify::new());
    let signalled = stopping.clone();
    let stop = async move {
        stop.await;
        signalled.notify_one();
    };
    let server = axum::serve(listener, app).with_graceful_shutdown(stop);
    tokio::select! {
        result = server => result.context("serving HTTP")?,
        _ = async { stopping.notified().await; tokio::time::sleep(grace).await } => {
            tracing::warn!("open connections outlived the grace period; stopping anyway");
        }
    }
    Ok(())
}

async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {},
        _ = term => {},
    }
}
