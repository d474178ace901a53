//! `scrim run`: the live daemon. One driver task owns the engine; ingest workers feed it
//! through a bounded channel; HTTP handlers read published snapshots and never touch the
//! engine; SIGTERM/SIGINT stop the sources, drain the queue and exit.

use std::collections::VecDeque;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::Duration;

use serde::Serialize;
use tokio::sync::{mpsc, watch};

use crate::app::AppError;
use crate::config::{Config, SourceConfig};
use crate::engine::plan::PrivacyLevel;
use crate::engine::release::Release;
use crate::engine::{Engine, EngineOptions};
use crate::output::{JsonlSink, ReleaseSink};
use crate::runtime::metrics::Metrics;
use crate::runtime::sources::{self, Batch};
use crate::runtime::state::{self, StateDir};

/// Releases kept in memory for `/v1/releases` (older ones stay in releases.jsonl).
pub const RELEASES_IN_MEMORY: usize = 200_000;
/// Default and maximum page size of `/v1/releases`.
pub const DEFAULT_LIMIT: usize = 500;
/// Largest page.
pub const MAX_LIMIT: usize = 5_000;
/// Input batches the ingest queue holds before sources wait.
pub const QUEUE_BATCHES: usize = 64;

/// The most recent releases, for cursor pulls.
#[derive(Default)]
pub struct ReleaseStore {
    records: VecDeque<Release>,
}

impl ReleaseStore {
    /// Adds a record (seq increasing), evicting the oldest beyond the memory cap.
    pub fn push(&mut self, r: Release) {
        self.records.push_back(r);
        while self.records.len() > RELEASES_IN_MEMORY {
            self.records.pop_front();
        }
    }

    /// Records with seq > `after` (all when None), at most `limit`.
    pub fn page(&self, after: Option<u64>, limit: usize) -> Vec<Release> {
        let start = match after {
            None => 0,
            Some(a) => self.records.partition_point(|r| r.seq <= a),
        };
        self.records
            .iter()
            .skip(start)
            .take(limit)
            .cloned()
            .collect()
    }
}

/// Budget as shown by `/v1/budget` and the dashboard.
#[derive(Clone, Debug, Default, Serialize)]
pub struct BudgetView {
    /// `unit` or `event`.
    pub level: String,
    /// Unit field, if any.
    pub unit: Option<String>,
    /// zCDP per epoch, all statistics.
    pub rho_per_epoch: f64,
    /// ε per epoch at `delta`.
    pub epsilon_per_epoch: f64,
    /// δ.
    pub delta: f64,
    /// Lifetime cap (unit level).
    pub lifetime_rho: Option<f64>,
    /// Lifetime spent.
    pub lifetime_spent_rho: f64,
    /// Lifetime left (unit level).
    pub lifetime_remaining_rho: Option<f64>,
    /// Epochs charged.
    pub epochs_charged: u64,
    /// Epochs the lifetime covers.
    pub epochs_allowed: Option<u64>,
    /// Current epoch.
    pub epoch: Option<u64>,
    /// Windows per epoch.
    pub epoch_windows: u32,
    /// Windows closed in the current epoch.
    pub epoch_windows_closed: u32,
    /// Set when releases stopped.
    pub exhausted: Option<String>,
    /// Per statistic: rho per epoch and lifetime spent.
    pub stats: Vec<StatBudget>,
    /// Exact ingest counts: never part of `/v1/budget`, served by the operator endpoint
    /// `/v1/ingest` (see [`IngestView`]).
    #[serde(skip)]
    pub ingest: IngestView,
}

/// Exact operational counts for operators (`/v1/ingest`, behind the operator token when one
/// is configured). They are raw counts of the input, *not* differentially private: the
/// accepted count alone is an un-noised event count. That is why they are kept out of the
/// consumer endpoints.
#[derive(Clone, Debug, Default, Serialize)]
pub struct IngestView {
    /// Events accepted into an open window.
    pub accepted: u64,
    /// Rejected lines.
    pub rejected: u64,
    /// Rejected lines by reason.
    pub rejected_by_reason: std::collections::BTreeMap<String, u64>,
    /// Late events.
    pub late: u64,
    /// Dropped by the per-unit bounds.
    pub bounded: u64,
}

/// One statistic's share.
#[derive(Clone, Debug, Default, Serialize)]
pub struct StatBudget {
    /// Name.
    pub name: String,
    /// Kind.
    pub kind: String,
    /// zCDP per epoch.
    pub rho_per_epoch: f64,
    /// zCDP spent over the lifetime.
    pub spent_rho: f64,
}

/// What HTTP handlers may read.
pub struct Shared {
    /// Recent releases.
    pub releases: RwLock<ReleaseStore>,
    /// Budget snapshot.
    pub budget: watch::Receiver<Arc<BudgetView>>,
    /// Metrics registry.
    pub metrics: Arc<Mutex<Metrics>>,
    /// Set once state is loaded and sources are open.
    pub ready: AtomicBool,
    /// Bearer token required by the operator endpoints, if configured.
    pub operator_token: Option<String>,
}

fn budget_view(engine: &Engine) -> BudgetView {
    let plan = engine.plan();
    let l = engine.ledger();
    let c = engine.counters();
    let (level, unit) = match &plan.level {
        PrivacyLevel::Event => ("event", None),
        PrivacyLevel::Unit { field, .. } => ("unit", Some(field.clone())),
    };
    let pos = engine.epoch_position();
    BudgetView {
        level: level.to_string(),
        unit,
        rho_per_epoch: plan.rho_per_epoch,
        epsilon_per_epoch: plan.epsilon_per_epoch(),
        delta: plan.delta,
        lifetime_rho: l.lifetime_rho(),
        lifetime_spent_rho: l.spent(),
        lifetime_remaining_rho: l.remaining(),
        epochs_charged: l.epochs_charged(),
        // Earlier state generations (`scrim state new-epoch`) may have spent at another rate.
        epochs_allowed: l.epochs_affordable().map(|k| l.epochs_charged() + k),
        epoch: pos.map(|p| p.0),
        epoch_windows: plan.epoch_windows,
        epoch_windows_closed: pos.map_or(0, |p| p.1),
        exhausted: engine.halted().map(ToString::to_string),
        stats: plan
            .stats
            .iter()
            .map(|s| StatBudget {
                name: s.name.clone(),
                kind: s.kind.to_string(),
                rho_per_epoch: s.rho(),
                // Under the current configuration (its state generation).
                spent_rho: match l.lifetime_rho() {
                    Some(_) => s.rho() * l.epochs_charged_here() as f64,
                    None if l.epochs_charged_here() > 0 => s.rho(),
                    None => 0.0,
                },
            })
            .collect(),
        ingest: IngestView {
            accepted: c.accepted,
            rejected: c.rejected_total(),
            rejected_by_reason: c
                .rejected
                .iter()
                .map(|(k, v)| ((*k).to_string(), *v))
                .collect(),
            late: c.late,
            bounded: c.dropped_event_bound + c.dropped_window_bound,
        },
    }
}

/// Reads the operator token from `http.operator_token_file`: one line, at least 16
/// characters, in a file that only its owner can read (like the state directory's key).
pub fn read_operator_token(path: &std::path::Path) -> Result<String, AppError> {
    use std::os::unix::fs::PermissionsExt;
    let bad = |why: String| {
        AppError::Config(crate::config::ConfigError::Invalid {
            key: "http.operator_token_file".to_string(),
            reason: format!("{}: {why}", path.display()),
        })
    };
    let meta = std::fs::metadata(path).map_err(|e| bad(format!("cannot read it ({e})")))?;
    if meta.permissions().mode() & 0o077 != 0 {
        return Err(bad(
            "other users can read it; run `chmod 600` on it (it guards exact counts)".to_string(),
        ));
    }
    let text = std::fs::read_to_string(path).map_err(|e| bad(format!("cannot read it ({e})")))?;
    let token = text.trim().to_string();
    if token.len() < 16 || token.contains(char::is_whitespace) {
        return Err(bad(
            "the token must be one line of at least 16 characters without spaces (e.g. `openssl rand -hex 32`)"
                .to_string(),
        ));
    }
    Ok(token)
}

/// Seconds until the lifetime budget runs out at one window of event time per window length.
///
/// `affordable` is how many more epochs the ledger can pay for after those already charged
/// (earlier generations included; `None` at event level, which never runs out). The current
/// epoch is charged when its first window closes: with `closed` > 0 windows closed it is paid
/// for and has T − closed windows left; with `closed` = 0 it is not charged yet and is one of
/// the `affordable` ones.
fn exhaustion_eta_seconds(
    affordable: Option<u64>,
    epoch_windows: u32,
    closed: u32,
    window_ms: i64,
) -> f64 {
    match affordable {
        Some(n) => {
            let whole = n as f64 * f64::from(epoch_windows);
            let current = if closed > 0 {
                f64::from(epoch_windows - closed)
            } else {
                0.0
            };
            (whole + current) * window_ms as f64 / 1000.0
        }
        None => f64::INFINITY,
    }
}

fn update_gauges(m: &mut Metrics, engine: &Engine, window_ms: i64) {
    m.observe(engine.counters());
    let l = engine.ledger();
    m.budget_spent.set(l.spent());
    m.budget_remaining
        .set(l.remaining().unwrap_or(f64::INFINITY));
    m.budget_exhausted.set(i64::from(engine.halted().is_some()));
    let plan = engine.plan();
    // Before the first event no epoch has started: a whole epoch lies ahead.
    let closed = engine.epoch_position().map_or(0, |(_, closed)| closed);
    m.epoch_windows_remaining
        .set(i64::from(plan.epoch_windows - closed));
    m.budget_exhaustion_eta.set(exhaustion_eta_seconds(
        l.epochs_affordable(),
        plan.epoch_windows,
        closed,
        window_ms,
    ));
    m.windows_open.set(engine.open_windows() as i64);
    if let Some(w) = engine.watermark() {
        m.watermark.set(w.0 as f64 / 1000.0);
    }
}

/// Runs the daemon until SIGTERM/SIGINT. `seed` replaces the state's OS-random noise key
/// (only reachable with `--insecure-seed`).
pub async fn run(config: Config, seed: Option<u64>) -> Result<(), AppError> {
    let io = |what: String| {
        move |source: std::io::Error| AppError::Io {
            context: what,
            source,
        }
    };
    let (mut state, key, records) = StateDir::open(&config.state.dir, &config, seed)
        .map_err(|e| AppError::State(e.to_string()))?;
    let seeded = seed.is_some();
    let carry = state.carry().clone();
    let mut engine = Engine::with_carry(
        &config,
        key,
        EngineOptions {
            seeded,
            danger_keep_truth: false,
        },
        &carry,
    )?;
    // A window close shares its per-group work (noise, survivors' sums) among the cores:
    // closing 100,000 groups takes about two thirds of the time on two (issue 9). The
    // records do not depend on it.
    engine.set_close_threads(std::thread::available_parallelism().map_or(1, usize::from));
    // Rebuild the engine from the log: same inputs, same key, same noise, same seq.
    let file_offsets = state::replay_log(&mut engine, &records, config.sources.len()).file_offsets;
    let rel_path = config.output.dir.join("releases.jsonl");
    std::fs::create_dir_all(&config.output.dir)
        .map_err(io(format!("creating {}", config.output.dir.display())))?;
    let published = state::published_seq(&rel_path).map_err(|e| AppError::State(e.to_string()))?;
    let mut sink = JsonlSink::open(&config.output.dir)
        .map_err(io(format!("opening {}", config.output.dir.display())))?;
    let mut restored = Vec::new();
    while let Some(r) = engine.poll_release() {
        restored.push(r);
    }
    state::check_output(
        published,
        restored.last().map(|r| r.seq),
        &carry,
        &rel_path,
        &config.state.dir,
    )
    .map_err(|e| AppError::State(e.to_string()))?;
    if let Some((first, last)) = state::missing_from_output(published, &carry) {
        tracing::warn!(
            first,
            last,
            "releases.jsonl lacks records an earlier state generation published; they cannot be regenerated (restore the newest releases.jsonl if one exists)"
        );
    }
    // Releases that were durable in the log but not yet in the file are written once.
    for r in &restored {
        if published.is_none_or(|p| r.seq > p) {
            sink.publish(r)
                .map_err(io("writing releases".to_string()))?;
        }
    }
    sink.flush().map_err(io("writing releases".to_string()))?;
    if !records.is_empty() {
        tracing::info!(
            records = records.len(),
            releases = restored.len(),
            "state restored from the log"
        );
    }
    let metrics = Metrics::new();
    metrics.declare_stats(engine.plan().stats.iter().map(|s| s.name.as_str()));
    let metrics = Arc::new(Mutex::new(metrics));
    let (budget_tx, budget_rx) = watch::channel(Arc::new(budget_view(&engine)));
    let mut store = ReleaseStore::default();
    for r in restored {
        store.push(r);
    }
    let operator_token = match &config.http.operator_token_file {
        Some(path) => Some(read_operator_token(path)?),
        None => None,
    };
    let shared = Arc::new(Shared {
        releases: RwLock::new(store),
        budget: budget_rx,
        metrics: metrics.clone(),
        ready: AtomicBool::new(false),
        operator_token,
    });
    let (shutdown_tx, shutdown_rx) = watch::channel(false);
    let (tx, mut rx) = mpsc::channel::<Batch>(QUEUE_BATCHES);
    let max_line = config.input.max_line_bytes;

    // HTTP first, so probes answer while sources open.
    let http_listener = tokio::net::TcpListener::bind(config.http.listen)
        .await
        .map_err(io(format!("binding http.listen {}", config.http.listen)))?;
    let http_addr = http_listener
        .local_addr()
        .map_err(io("reading the HTTP address".to_string()))?;
    let router = crate::runtime::http::router(shared.clone());
    let mut http_shutdown = shutdown_rx.clone();
    let http_task = tokio::spawn(async move {
        let _ = axum::serve(http_listener, router)
            .with_graceful_shutdown(async move {
                let _ = http_shutdown.changed().await;
            })
            .await;
    });
    tracing::info!(%http_addr, "http listening");
    eprintln!("scrim: http listening on {http_addr}");

    let mut source_tasks = Vec::new();
    for (i, src) in config.sources.iter().enumerate() {
        let (tx, sd, m) = (tx.clone(), shutdown_rx.clone(), metrics.clone());
        match src {
            SourceConfig::Stdin => {
                source_tasks.push(tokio::spawn(sources::stdin_source(max_line, tx, sd, m)))
            }
            SourceConfig::File { path } => source_tasks.push(tokio::spawn(sources::file_source(
                i,
                path.clone(),
                file_offsets[i],
                max_line,
                tx,
                sd,
                m,
                Duration::from_millis(100),
            ))),
            SourceConfig::Tcp {
                listen,
                max_connections,
                idle_timeout,
            } => {
                let l = tokio::net::TcpListener::bind(listen)
                    .await
                    .map_err(io(format!("binding sources[{i}].listen {listen}")))?;
                let addr = l
                    .local_addr()
                    .map_err(io("reading a source address".to_string()))?;
                eprintln!("scrim: tcp source {i} listening on {addr}");
                tracing::info!(%addr, "tcp source listening");
                source_tasks.push(tokio::spawn(sources::tcp_source(
                    l,
                    max_line,
                    *max_connections,
                    Duration::from_millis(idle_timeout.0 as u64),
                    tx,
                    sd,
                    m,
                )));
            }
        }
    }
    drop(tx);
    if let Ok(mut m) = metrics.lock() {
        update_gauges(&mut m, &engine, config.window.length.0);
    }
    shared.ready.store(true, Ordering::SeqCst);

    let signal = async {
        #[cfg(unix)]
        {
            use tokio::signal::unix::{SignalKind, signal};
            match (
                signal(SignalKind::terminate()),
                signal(SignalKind::interrupt()),
            ) {
                (Ok(mut t), Ok(mut i)) => {
                    tokio::select! { _ = t.recv() => {}, _ = i.recv() => {} }
                }
                _ => {
                    let _ = tokio::signal::ctrl_c().await;
                }
            }
        }
        #[cfg(not(unix))]
        {
            let _ = tokio::signal::ctrl_c().await;
        }
    };
    tokio::pin!(signal);
    let mut tick = tokio::time::interval(Duration::from_millis(250));
    let window_ms = config.window.length.0;
    // Test hook (debug builds only): slows the engine down to exercise backpressure. Not
    // prefixed SCRIM_, which the config loader reserves for configuration overrides.
    let slow_hook = std::env::var("SCRIMTEST_SLOW_ENGINE_MS")
        .ok()
        .and_then(|v| v.parse::<u64>().ok())
        .filter(|_| cfg!(debug_assertions));

    let mut draining = false;
    let mut sources_done = false;
    let checkpoint_every = Duration::from_millis(config.state.checkpoint_interval.0.max(1) as u64);
    let mut last_sync = std::time::Instant::now();
    loop {
        let batch = tokio::select! {
            biased;
            _ = &mut signal, if !draining => {
                tracing::info!("shutdown requested: stopping sources and draining the queue");
                let _ = shutdown_tx.send(true);
                draining = true;
                continue;
            }
            b = rx.recv(), if !sources_done => match b {
                Some(b) => Some(b),
                None => {
                    // Every source ended (stdin EOF, or shutdown): drained.
                    sources_done = true;
                    if draining {
                        break;
                    }
                    continue;
                }
            },
            _ = tick.tick() => None,
        };
        let wal_io = io(format!("writing state in {}", config.state.dir.display()));
        if let Some(b) = batch {
            if let Some(ms) = slow_hook {
                tokio::time::sleep(Duration::from_millis(ms)).await;
            }
            // Write-ahead: log first, then let the engine see it.
            let logged = (|| {
                for r in &b.rejects {
                    state.log_reject(r.label())?;
                }
                state.log_batch(&b.lines, b.offset.map(|(s, o)| (s as u32, o)))?;
                Ok::<(), std::io::Error>(())
            })();
            logged.map_err(wal_io)?;
            for r in &b.rejects {
                engine.count_rejection(*r);
            }
            for line in &b.lines {
                engine.handle_line(line);
            }
        } else {
            let now = crate::runtime::now();
            if engine.poll_timeout().is_some_and(|t| t <= now) {
                state.log_tick(now).map_err(wal_io)?;
                engine.handle_tick(now);
            }
            if last_sync.elapsed() >= checkpoint_every {
                state.sync().map_err(io(format!(
                    "syncing state in {}",
                    config.state.dir.display()
                )))?;
                last_sync = std::time::Instant::now();
            }
        }
        if engine_has_releases(&engine) {
            // The inputs behind these releases are durable before anyone can see them.
            state.sync().map_err(io(format!(
                "syncing state in {}",
                config.state.dir.display()
            )))?;
            last_sync = std::time::Instant::now();
        }
        publish(&mut engine, &mut sink, &shared, &metrics, window_ms)
            .map_err(io("writing releases".to_string()))?;
        if let Ok(mut m) = metrics.lock() {
            m.ingest_queue_depth.set(rx.len() as i64);
            update_gauges(&mut m, &engine, window_ms);
        }
        let _ = budget_tx.send(Arc::new(budget_view(&engine)));
    }
    for t in source_tasks {
        let _ = tokio::time::timeout(Duration::from_secs(5), t).await;
    }
    sink.flush().map_err(io("flushing releases".to_string()))?;
    state.sync().map_err(io(format!(
        "syncing state in {}",
        config.state.dir.display()
    )))?;
    let _ = shutdown_tx.send(true);
    let _ = tokio::time::timeout(Duration::from_secs(5), http_task).await;
    tracing::info!("stopped");
    Ok(())
}

fn engine_has_releases(engine: &Engine) -> bool {
    engine.pending_releases() > 0
}

fn publish(
    engine: &mut Engine,
    sink: &mut JsonlSink,
    shared: &Shared,
    metrics: &Mutex<Metrics>,
    window_ms: i64,
) -> std::io::Result<()> {
    let mut fresh = Vec::new();
    while let Some(r) = engine.poll_release() {
        sink.publish(&r)?;
        fresh.push(r);
    }
    if fresh.is_empty() {
        return Ok(());
    }
    // Durable before visible over HTTP.
    sink.flush()?;
    let now = crate::runtime::now();
    if let Ok(m) = metrics.lock() {
        m.last_release_time.set(now.0 as f64 / 1000.0);
        if let Some(end) = engine.last_closed_end() {
            m.release_lag
                .set(((now.0 - end.0) as f64 / 1000.0).max(0.0));
        }
        let _ = window_ms;
    }
    if let Ok(mut store) = shared.releases.write() {
        for r in fresh {
            store.push(r);
        }
    }
    Ok(())
}

/// `scrim demo --serve`: serves a finished run's releases, budget and metrics over the same
/// HTTP API (and dashboard) as the daemon, until SIGINT/SIGTERM.
pub async fn serve_snapshot(
    engine: &Engine,
    releases: Vec<Release>,
    listen: std::net::SocketAddr,
) -> Result<(), AppError> {
    let io = |what: String| {
        move |source: std::io::Error| AppError::Io {
            context: what,
            source,
        }
    };
    let mut metrics = Metrics::new();
    metrics.declare_stats(engine.plan().stats.iter().map(|s| s.name.as_str()));
    update_gauges(&mut metrics, engine, 0);
    let mut store = ReleaseStore::default();
    for r in releases {
        store.push(r);
    }
    let (_budget_tx, budget_rx) = watch::channel(Arc::new(budget_view(engine)));
    let shared = Arc::new(Shared {
        releases: RwLock::new(store),
        budget: budget_rx,
        metrics: Arc::new(Mutex::new(metrics)),
        ready: AtomicBool::new(true),
        // `demo --serve` listens on loopback and shows invented data only.
        operator_token: None,
    });
    let listener = tokio::net::TcpListener::bind(listen)
        .await
        .map_err(io(format!("binding {listen}")))?;
    let addr = listener
        .local_addr()
        .map_err(io("reading the HTTP address".to_string()))?;
    eprintln!("scrim: http listening on {addr} (dashboard at http://{addr}/); Ctrl-C to stop");
    axum::serve(listener, crate::runtime::http::router(shared))
        .with_graceful_shutdown(async {
            let _ = tokio::signal::ctrl_c().await;
        })
        .await
        .map_err(io("serving HTTP".to_string()))
}

#[cfg(test)]
mod tests {
    use super::exhaustion_eta_seconds;

    #[test]
    fn exhaustion_eta_counts_every_window_the_lifetime_budget_still_pays_for() {
        // Brute force: a lifetime of n epochs pays for n·T windows; after e whole epochs and
        // `closed` windows of the next, n·T − (e·T + closed) remain, each one window length.
        let window_ms = 3_600_000i64;
        for n in 1..5u64 {
            for t in 1..6u32 {
                for e in 0..n {
                    for closed in 0..t {
                        let charged = if closed > 0 { e + 1 } else { e };
                        let left = n * u64::from(t) - (e * u64::from(t) + u64::from(closed));
                        let want = left as f64 * 3600.0;
                        let got = exhaustion_eta_seconds(Some(n - charged), t, closed, window_ms);
                        assert_eq!(got, want, "n={n} T={t} e={e} closed={closed}");
                    }
                }
                // All n epochs spent: nothing left.
                assert_eq!(exhaustion_eta_seconds(Some(0), t, 0, window_ms), 0.0);
            }
        }
        assert!(exhaustion_eta_seconds(None, 24, 5, window_ms).is_infinite());
    }
}
