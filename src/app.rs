//! The commands behind the `scrim` binary (`replay`, `demo`, `plan`), written as library
//! functions that return an [`AppError`] whose [`AppError::exit_code`] the binary uses.

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};

use crate::config::{Config, ConfigError, Mechanism};
use crate::demo::{DemoFeed, FeedSpec};
use crate::engine::mechanism::MechanismKind;
use crate::engine::noise::NoiseKey;
use crate::engine::plan::{PlanError, Scope};
use crate::engine::release::Release;
use crate::engine::{Engine, EngineError, EngineOptions};
use crate::output::{JsonlSink, ReleaseSink};

mod planner;
mod progress;

pub use planner::{
    PlanArgs, PlanView, WHAT_IF_KEYS, WhatIfChange, Z_95, apply_what_ifs, plan_command, plan_report,
};
pub use progress::ReplayProgress;

/// The demo configuration, compiled in so `scrim demo` works from any directory.
pub const DEMO_CONFIG: &str = include_str!("../config/demo.toml");

/// What can stop a command.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum AppError {
    /// Invalid configuration (exit 2).
    #[error(transparent)]
    Config(#[from] ConfigError),
    /// The configuration cannot be planned (exit 2).
    #[error(transparent)]
    Plan(#[from] PlanError),
    /// Invalid arguments (exit 2).
    #[error("{0}")]
    Usage(String),
    /// The budget cannot cover the plan or ran out (exit 3).
    #[error("{0}")]
    Budget(String),
    /// The state directory cannot be used (exit 2: the operator must act).
    #[error("{0}")]
    State(String),
    /// Reading or writing failed (exit 1).
    #[error("{context}: {source}")]
    Io {
        /// What was being done, naming the file.
        context: String,
        /// The OS error.
        source: std::io::Error,
    },
}

impl AppError {
    /// The process exit code the contract assigns.
    pub fn exit_code(&self) -> i32 {
        match self {
            AppError::Config(_) | AppError::Plan(_) | AppError::Usage(_) | AppError::State(_) => 2,
            AppError::Budget(_) => 3,
            AppError::Io { .. } => 1,
        }
    }
}

impl From<EngineError> for AppError {
    fn from(e: EngineError) -> AppError {
        match e {
            EngineError::Plan(p) => AppError::Plan(p),
            other => AppError::Usage(other.to_string()),
        }
    }
}

fn io(context: impl Into<String>) -> impl FnOnce(std::io::Error) -> AppError {
    let context = context.into();
    move |source| AppError::Io { context, source }
}

/// Where the noise key comes from.
#[derive(Clone, Copy, Debug)]
pub enum KeySource {
    /// Fresh from the OS CSPRNG.
    Os,
    /// A fixed seed: reproducible, marked `seeded: true`, never private.
    Seed(u64),
}

impl KeySource {
    fn key(self) -> Result<(NoiseKey, bool), AppError> {
        match self {
            KeySource::Os => Ok((
                crate::runtime::os_noise_key().map_err(io("reading OS entropy"))?,
                false,
            )),
            KeySource::Seed(s) => Ok((NoiseKey::from_seed(s), true)),
        }
    }
}

/// `scrim run`: builds a tokio runtime and runs the daemon until SIGTERM/SIGINT.
pub fn run_daemon(config: Config, key: KeySource) -> Result<(), AppError> {
    let seed = match key {
        KeySource::Seed(s) => Some(s),
        KeySource::Os => None,
    };
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(io("starting the tokio runtime"))?;
    rt.block_on(crate::runtime::daemon::run(config, seed))
}

/// Summary of a replay.
#[derive(Debug)]
pub struct ReplaySummary {
    /// Lines read.
    pub lines: u64,
    /// Final counters.
    pub counters: crate::engine::Counters,
    /// Releases written.
    pub releases: u64,
    /// Where they went.
    pub output: PathBuf,
    /// Set when the budget ran out during the replay.
    pub halted: Option<String>,
    /// Unit level only: `(active units, bytes of the per-unit table)` at the end, from
    /// [`crate::engine::bound::Bounder`] (issue 9 reports bytes per active unit).
    pub unit_table: Option<(usize, usize)>,
}

/// `(active units, per-unit table bytes)` of a unit-level engine.
fn unit_table(engine: &Engine) -> Option<(usize, usize)> {
    engine
        .bounder()
        .map(|b| (b.active_units(), b.unit_table_bytes()))
}

/// Feeds every line of `input` to `engine`, handing releases to `sink` as they appear.
/// With `threads > 1` lines are parsed on that many threads
/// ([`crate::runtime::parse_pool`]); the releases are the same for any `threads`.
pub fn pump<R: Read>(
    engine: &mut Engine,
    input: R,
    sink: &mut dyn ReleaseSink,
    threads: usize,
) -> std::io::Result<(u64, u64)> {
    pump_with_progress(engine, input, sink, threads, None)
}

/// [`pump`] that also advances a progress bar (see [`ReplayProgress`] for its cost).
pub fn pump_with_progress<R: Read>(
    engine: &mut Engine,
    input: R,
    sink: &mut dyn ReleaseSink,
    threads: usize,
    mut progress: Option<&mut ReplayProgress>,
) -> std::io::Result<(u64, u64)> {
    let input = match progress.as_deref() {
        Some(p) => p.reader(input),
        None => progress::CountingReader::plain(input),
    };
    if threads > 1 {
        return pump_parallel(engine, input, sink, threads, progress);
    }
    let mut reader = BufReader::with_capacity(1 << 20, input);
    let mut line = Vec::with_capacity(4096);
    let (mut n_lines, mut n_releases) = (0u64, 0u64);
    loop {
        line.clear();
        if reader.read_until(b'\n', &mut line)? == 0 {
            break;
        }
        n_lines += 1;
        let mut body: &[u8] = &line;
        if let Some(b) = body.strip_suffix(b"\n") {
            body = b;
        }
        if let Some(b) = body.strip_suffix(b"\r") {
            body = b;
        }
        engine.handle_line(body);
        while let Some(r) = engine.poll_release() {
            sink.publish(&r)?;
            n_releases += 1;
        }
        if let Some(p) = progress.as_deref_mut()
            && p.line_done()
        {
            p.draw(engine.counters().accepted);
        }
    }
    engine.finish();
    while let Some(r) = engine.poll_release() {
        sink.publish(&r)?;
        n_releases += 1;
    }
    sink.flush()?;
    Ok((n_lines, n_releases))
}

/// [`pump`] with parsing on `threads` threads and the engine on the calling thread.
fn pump_parallel<R: Read>(
    engine: &mut Engine,
    input: R,
    sink: &mut dyn ReleaseSink,
    threads: usize,
    mut progress: Option<&mut ReplayProgress>,
) -> std::io::Result<(u64, u64)> {
    let decoder = engine.line_decoder();
    let mut n_releases = 0u64;
    let n_lines =
        crate::runtime::parse_pool::decode_in_order(input, &decoder, threads, |prepared| {
            engine.handle_prepared(prepared);
            while let Some(r) = engine.poll_release() {
                sink.publish(&r)?;
                n_releases += 1;
            }
            if let Some(p) = progress.as_deref_mut()
                && p.line_done()
            {
                p.draw(engine.counters().accepted);
            }
            Ok(())
        })?;
    engine.finish();
    while let Some(r) = engine.poll_release() {
        sink.publish(&r)?;
        n_releases += 1;
    }
    sink.flush()?;
    Ok((n_lines, n_releases))
}

/// `scrim replay`. With `state`, every consumed line is logged first (see
/// [`crate::runtime::state`]), so an interrupted replay resumes where it stopped and never
/// publishes a record twice or with different noise. `threads` parse threads are used
/// without `state` (see [`pump`]); with `state` lines are parsed on the calling thread.
pub fn replay(
    config_path: &Path,
    out: Option<&Path>,
    state: Option<&Path>,
    key: KeySource,
    input: &str,
    threads: usize,
) -> Result<ReplaySummary, AppError> {
    let config = Config::load(config_path)?;
    let out_dir = out
        .map(Path::to_path_buf)
        .unwrap_or_else(|| config.output.dir.clone());
    let Some(state_dir) = state else {
        let (key, seeded) = key.key()?;
        let mut engine = Engine::new(
            &config,
            key,
            EngineOptions {
                seeded,
                danger_keep_truth: false,
            },
        )?;
        let mut sink =
            JsonlSink::create(&out_dir).map_err(io(format!("creating {}", out_dir.display())))?;
        // A progress bar on a terminal's stderr: with an ETA when the input is a regular
        // file of known size, without one for stdin or a pipe.
        let pumped = if input == "-" {
            let mut bar = ReplayProgress::on_terminal(None);
            let r = pump_with_progress(
                &mut engine,
                std::io::stdin().lock(),
                &mut sink,
                threads,
                bar.as_mut(),
            );
            if let Some(b) = &bar {
                b.finish();
            }
            r
        } else {
            let f = std::fs::File::open(input).map_err(io(format!("opening input {input}")))?;
            let size = f
                .metadata()
                .ok()
                .filter(std::fs::Metadata::is_file)
                .map(|m| m.len());
            let mut bar = ReplayProgress::on_terminal(size);
            let r = pump_with_progress(&mut engine, f, &mut sink, threads, bar.as_mut());
            if let Some(b) = &bar {
                b.finish();
            }
            r
        };
        let (lines, releases) =
            pumped.map_err(io(format!("replaying into {}", sink.path().display())))?;
        return Ok(ReplaySummary {
            lines,
            counters: engine.counters().clone(),
            releases,
            output: sink.path().to_path_buf(),
            halted: engine.halted().map(ToString::to_string),
            unit_table: unit_table(&engine),
        });
    };
    if input == "-" {
        return Err(AppError::Usage(
            "replay --state needs a file INPUT (stdin cannot be re-read after a restart)"
                .to_string(),
        ));
    }
    replay_with_state(&config, &out_dir, state_dir, key, Path::new(input))
}

fn replay_with_state(
    config: &Config,
    out_dir: &Path,
    state_dir: &Path,
    key: KeySource,
    input: &Path,
) -> Result<ReplaySummary, AppError> {
    use crate::runtime::state::{self, StateDir, WalRecord};
    let seed = match key {
        KeySource::Seed(s) => Some(s),
        KeySource::Os => None,
    };
    let (mut st, key, records) = StateDir::open(state_dir, &config.fingerprint(), seed)
        .map_err(|e| AppError::State(e.to_string()))?;
    let mut engine = Engine::new(
        config,
        key,
        EngineOptions {
            seeded: seed.is_some(),
            danger_keep_truth: false,
        },
    )?;
    // Lines logged after the last offset record are re-read from the input instead.
    let last_offset_at = records
        .iter()
        .rposition(|r| matches!(r, WalRecord::Offset { .. }));
    let mut offset = 0u64;
    let mut finished = false;
    for (i, r) in records.iter().enumerate() {
        match r {
            WalRecord::Line(l) if last_offset_at.is_some_and(|j| i < j) => engine.handle_line(l),
            WalRecord::Line(_) => {}
            WalRecord::Tick(t) => engine.handle_tick(*t),
            WalRecord::Reject(_) => {}
            WalRecord::Offset { offset: o, .. } => offset = *o,
            WalRecord::Finish => {
                engine.finish();
                finished = true;
            }
            WalRecord::Batch { lines, offset: o } => {
                for l in lines {
                    engine.handle_line(l);
                }
                if let Some((_, o)) = o {
                    offset = *o;
                }
            }
        }
    }
    std::fs::create_dir_all(out_dir).map_err(io(format!("creating {}", out_dir.display())))?;
    let rel_path = out_dir.join("releases.jsonl");
    let published = state::published_seq(&rel_path).map_err(|e| AppError::State(e.to_string()))?;
    let mut sink =
        JsonlSink::open(out_dir).map_err(io(format!("opening {}", rel_path.display())))?;
    let mut regenerated = 0u64;
    let mut n_releases = 0u64;
    while let Some(r) = engine.poll_release() {
        regenerated += 1;
        if published.is_none_or(|p| r.seq > p) {
            sink.publish(&r).map_err(io("writing releases"))?;
            n_releases += 1;
        }
    }
    if let Some(p) = published
        && (regenerated == 0 || p >= regenerated)
    {
        return Err(AppError::State(format!(
            "{} holds releases up to seq {p} but the state in {} only reproduces {regenerated}: the state is truncated or older than the output; restore both from the same backup",
            rel_path.display(),
            state_dir.display()
        )));
    }
    sink.flush().map_err(io("writing releases"))?;
    let mut lines = 0u64;
    if !finished {
        use std::io::Seek;
        let mut f =
            std::fs::File::open(input).map_err(io(format!("opening input {}", input.display())))?;
        f.seek(std::io::SeekFrom::Start(offset))
            .map_err(io(format!("seeking input {}", input.display())))?;
        let mut reader = BufReader::with_capacity(1 << 20, f);
        let mut line = Vec::with_capacity(4096);
        let wal_err = |e: std::io::Error| AppError::Io {
            context: format!("writing state in {}", state_dir.display()),
            source: e,
        };
        loop {
            line.clear();
            let n = reader
                .read_until(b'\n', &mut line)
                .map_err(io(format!("reading {}", input.display())))?;
            if n == 0 {
                break;
            }
            offset += n as u64;
            lines += 1;
            let mut body: &[u8] = &line;
            if let Some(b) = body.strip_suffix(b"\n") {
                body = b;
            }
            if let Some(b) = body.strip_suffix(b"\r") {
                body = b;
            }
            st.log_line(body).map_err(wal_err)?;
            engine.handle_line(body);
            let mut fresh = Vec::new();
            while let Some(r) = engine.poll_release() {
                fresh.push(r);
            }
            if !fresh.is_empty() || lines.is_multiple_of(4096) {
                st.log_offset(0, offset).map_err(wal_err)?;
            }
            if !fresh.is_empty() {
                // Write-ahead: the inputs behind these releases are durable first.
                st.sync().map_err(wal_err)?;
                for r in &fresh {
                    sink.publish(r).map_err(io("writing releases"))?;
                }
                sink.flush().map_err(io("writing releases"))?;
                n_releases += fresh.len() as u64;
            }
        }
        st.log_offset(0, offset).map_err(wal_err)?;
        st.log_finish().map_err(wal_err)?;
        st.sync().map_err(wal_err)?;
        engine.finish();
        while let Some(r) = engine.poll_release() {
            sink.publish(&r).map_err(io("writing releases"))?;
            n_releases += 1;
        }
        sink.flush().map_err(io("writing releases"))?;
    }
    Ok(ReplaySummary {
        lines,
        counters: engine.counters().clone(),
        releases: n_releases,
        output: rel_path,
        halted: engine.halted().map(ToString::to_string),
        unit_table: unit_table(&engine),
    })
}

/// Options of `scrim demo`.
#[derive(Clone, Debug)]
pub struct DemoArgs {
    /// Noise seed (reproducible, marked seeded) or OS randomness.
    pub key: KeySource,
    /// Output directory.
    pub out: PathBuf,
    /// Days of feed.
    pub days: u32,
    /// After the run, serve the releases and dashboard on this address.
    pub serve: Option<std::net::SocketAddr>,
}

/// `scrim demo`: generate the Quillhaven feed, run the real pipeline, print a summary.
pub fn demo(args: &DemoArgs, w: &mut dyn Write) -> Result<Vec<Release>, AppError> {
    let config = Config::from_toml_str(DEMO_CONFIG)?;
    let (key, seeded) = args.key.key()?;
    let feed_seed = match args.key {
        KeySource::Seed(s) => s,
        KeySource::Os => 20_260_302,
    };
    let spec = FeedSpec {
        seed: feed_seed,
        days: args.days,
        ..FeedSpec::default()
    };
    std::fs::create_dir_all(&args.out).map_err(io(format!("creating {}", args.out.display())))?;
    let feed_path = args.out.join("feed.jsonl");
    let mut feed_file = std::io::BufWriter::new(
        std::fs::File::create(&feed_path)
            .map_err(io(format!("creating {}", feed_path.display())))?,
    );
    let mut engine = Engine::new(
        &config,
        key,
        EngineOptions {
            seeded,
            danger_keep_truth: true,
        },
    )?;
    let mut sink =
        JsonlSink::create(&args.out).map_err(io(format!("creating {}", args.out.display())))?;
    let mut all = Vec::new();
    let mut n_lines = 0u64;
    let mut feed = DemoFeed::new(&spec);
    let started = std::time::Instant::now();
    for line in feed.by_ref() {
        n_lines += 1;
        feed_file
            .write_all(&line)
            .and_then(|_| feed_file.write_all(b"\n"))
            .map_err(io("writing the demo feed"))?;
        engine.handle_line(&line);
        while let Some(r) = engine.poll_release() {
            sink.publish(&r).map_err(io("writing releases"))?;
            all.push(r);
        }
    }
    engine.finish();
    while let Some(r) = engine.poll_release() {
        sink.publish(&r).map_err(io("writing releases"))?;
        all.push(r);
    }
    sink.flush().map_err(io("writing releases"))?;
    feed_file.flush().map_err(io("writing the demo feed"))?;
    let elapsed = started.elapsed();
    print_demo_summary(w, &engine, &all, n_lines, elapsed, &args.out, seeded)
        .map_err(io("printing"))?;
    if let Some(addr) = args.serve {
        w.flush().map_err(io("printing"))?;
        let rt = tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .map_err(io("starting the tokio runtime"))?;
        rt.block_on(crate::runtime::daemon::serve_snapshot(
            &engine,
            all.clone(),
            addr,
        ))?;
    }
    Ok(all)
}

fn fmt_value(v: &serde_json::Value) -> String {
    v.as_f64()
        .map_or_else(|| "undefined".to_string(), |x| format!("{x:.1}"))
}

fn print_demo_summary(
    w: &mut dyn Write,
    engine: &Engine,
    all: &[Release],
    n_lines: u64,
    elapsed: std::time::Duration,
    out: &Path,
    seeded: bool,
) -> std::io::Result<()> {
    let c = engine.counters();
    let plan = engine.plan();
    writeln!(w, "scrim demo — Quillhaven transit taps (invented data)")?;
    writeln!(
        w,
        "{n_lines} lines in {:.1} s; {} windows closed; {} records released",
        elapsed.as_secs_f64(),
        c.windows_closed,
        all.len()
    )?;
    if seeded {
        writeln!(
            w,
            "NOTE: fixed seed — the noise is reproducible and these releases are NOT private"
        )?;
    }
    writeln!(w)?;
    writeln!(w, "Input")?;
    writeln!(
        w,
        "  accepted {:>9}   late {:>7}   rejected {:>7}",
        c.accepted,
        c.late,
        c.rejected_total()
    )?;
    for (reason, n) in &c.rejected {
        writeln!(w, "    rejected: {reason:<20} {n:>7}")?;
    }
    writeln!(
        w,
        "  dropped by contribution bounds: {} over the per-window event cap, {} over the per-epoch window cap",
        c.dropped_event_bound, c.dropped_window_bound
    )?;
    writeln!(w)?;

    // Last epoch_to_date / window records of a few series, released ± 2·std_error vs true.
    let last_leaf_records = |stat: &str, scope: &str| -> Vec<&Release> {
        let last = all
            .iter()
            .filter(|r| r.stat == stat && r.scope == scope)
            .map(|r| (r.epoch, r.leaf))
            .max();
        all.iter()
            .filter(|r| r.stat == stat && r.scope == scope && Some((r.epoch, r.leaf)) == last)
            .collect()
    };
    writeln!(
        w,
        "Released vs true (last window closed; true = exact value after bounding and clamping)"
    )?;
    writeln!(
        w,
        "  {:<22} {:<14} {:<16} {:>26} {:>12}",
        "statistic", "scope", "group", "released ± 2·std_error", "true"
    )?;
    for (stat, scope) in [
        ("taps_by_zone", "epoch_to_date"),
        ("taps_by_mode", "window"),
        ("fare_revenue", "trailing:24"),
        ("mean_trip_minutes", "epoch_to_date"),
    ] {
        for r in last_leaf_records(stat, scope) {
            let group = r.group.values().cloned().collect::<Vec<_>>().join(",");
            let rel = format!(
                "{} ± {:.1}",
                fmt_value(&r.value),
                2.0 * r.std_error.as_f64().unwrap_or(f64::NAN)
            );
            let truth = r.truth.as_ref().map_or("-".to_string(), fmt_value);
            writeln!(
                w,
                "  {:<22} {:<14} {:<16} {:>26} {:>12}",
                stat, scope, group, rel, truth
            )?;
        }
    }
    if let Some(r) = last_leaf_records("trip_model", "epoch_to_date").first() {
        writeln!(w)?;
        writeln!(
            w,
            "Linear model trip_minutes ~ 1 + trip_km + transfers (epoch_to_date, last window)"
        )?;
        let generator = [
            ("intercept", crate::demo::TRUE_INTERCEPT),
            ("trip_km", crate::demo::TRUE_KM),
            ("transfers", crate::demo::TRUE_TRANSFERS),
        ];
        writeln!(
            w,
            "  {:<12} {:>24} {:>14} {:>12}",
            "coefficient", "released ± 2·std_error", "exact fit", "generator"
        )?;
        for (name, truth_gen) in generator {
            let v = r.value.get(name).and_then(|v| v.as_f64());
            let s = r.std_error.get(name).and_then(|v| v.as_f64());
            let exact = r
                .truth
                .as_ref()
                .and_then(|t| t.get(name))
                .and_then(|v| v.as_f64());
            let rel = match (v, s) {
                (Some(v), Some(s)) => format!("{v:.3} ± {:.3}", 2.0 * s),
                _ => "no fit".to_string(),
            };
            let ex = exact.map_or("-".to_string(), |x| format!("{x:.3}"));
            writeln!(w, "  {name:<12} {rel:>24} {ex:>14} {truth_gen:>12.3}")?;
        }
        if let Some(n) = &r.note {
            writeln!(w, "  ({n})")?;
        }
    }

    // Honesty of the error bars over every scalar record.
    let mut covered = BTreeMap::<&str, (u64, u64)>::new();
    for r in all {
        if let (Some(v), Some(s), Some(t)) = (
            r.value.as_f64(),
            r.std_error.as_f64(),
            r.truth.as_ref().and_then(serde_json::Value::as_f64),
        ) {
            let e = covered.entry(r.kind.as_str()).or_default();
            e.1 += 1;
            if (v - t).abs() <= 2.0 * s {
                e.0 += 1;
            }
        }
    }
    writeln!(w)?;
    writeln!(
        w,
        "Error bars: share of records whose true value lies within ± 2·std_error (≈ 95% expected)"
    )?;
    for (kind, (inside, n)) in covered {
        writeln!(
            w,
            "  {kind:<8} {:>6.1}% of {n}",
            100.0 * inside as f64 / n.max(1) as f64
        )?;
    }
    writeln!(w)?;
    let l = engine.ledger();
    writeln!(w, "Budget")?;
    writeln!(
        w,
        "  rho per epoch {} over {} windows, (epsilon {:.3}, delta {:e}) per epoch",
        plan.rho_per_epoch,
        plan.epoch_windows,
        plan.epsilon_per_epoch(),
        plan.delta
    )?;
    match l.remaining() {
        Some(rem) => writeln!(
            w,
            "  lifetime rho spent {:.3} of {:.3} ({} epoch(s)); remaining {:.3}",
            l.spent(),
            l.lifetime_rho().unwrap_or(0.0),
            l.epochs_charged(),
            rem
        )?,
        None => writeln!(
            w,
            "  event level: epochs compose in parallel; rho {} in total",
            l.spent()
        )?,
    }
    writeln!(w)?;
    writeln!(w, "Files")?;
    writeln!(
        w,
        "  {}  (the generated feed)",
        out.join("feed.jsonl").display()
    )?;
    writeln!(
        w,
        "  {}  (one release record per line)",
        out.join("releases.jsonl").display()
    )?;
    Ok(())
}

/// Parses `--mechanism`-style names (for what-if flags).
pub fn parse_mechanism(s: &str) -> Option<Mechanism> {
    match MechanismKind::parse(s)? {
        MechanismKind::Tree => Some(Mechanism::Tree),
        MechanismKind::SqrtFactorization => Some(Mechanism::SqrtFactorization),
        MechanismKind::Independent => Some(Mechanism::Independent),
    }
}

/// Shown by scopes that span several windows.
pub fn scope_of(label: &str) -> Option<Scope> {
    match label {
        "window" => Some(Scope::Window),
        "epoch_to_date" => Some(Scope::EpochToDate),
        _ => label
            .strip_prefix("trailing:")
            .and_then(|n| n.parse().ok())
            .map(Scope::Trailing),
    }
}
