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
pub fn pump<R: Read + Send>(
    engine: &mut Engine,
    input: R,
    sink: &mut dyn ReleaseSink,
    threads: usize,
) -> std::io::Result<(u64, u64)> {
    pump_with_progress(engine, input, sink, threads, None)
}

/// [`pump`] that also advances a progress bar (see [`ReplayProgress`] for its cost).
pub fn pump_with_progress<R: Read + Send>(
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
    let mut n_releases = 0u64;
    let n_lines = crate::runtime::parse_pool::for_each_line(input, |line| {
        engine.handle_raw_line(line);
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

/// [`pump`] with parsing on `threads` threads and the engine on the calling thread.
fn pump_parallel<R: Read + Send>(
    engine: &mut Engine,
    input: R,
    sink: &mut dyn ReleaseSink,
    threads: usize,
    mut progress: Option<&mut ReplayProgress>,
) -> std::io::Result<(u64, u64)> {
    let decoder = engine.line_decoder();
    engine.set_close_threads(threads);
    // While lines come in, the parse workers help with window closes between chunks; after
    // the input ends (the workers are gone) closes start their own helper threads.
    let assists = std::sync::Arc::new(crate::runtime::parse_pool::Assists::default());
    engine.set_help_board(Some(assists.clone()));
    let mut n_releases = 0u64;
    let decoded = crate::runtime::parse_pool::decode_in_order(
        input,
        &decoder,
        threads,
        &assists,
        |prepared| {
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
        },
    );
    engine.set_help_board(None);
    let n_lines = decoded?;
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
                // `Stdin`, not its lock: a parse worker may be the thread that reads.
                std::io::stdin(),
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
    use crate::runtime::state::{self, StateDir};
    let seed = match key {
        KeySource::Seed(s) => Some(s),
        KeySource::Os => None,
    };
    let (mut st, key, records) =
        StateDir::open(state_dir, config, seed).map_err(|e| AppError::State(e.to_string()))?;
    let carry = st.carry().clone();
    let mut engine = Engine::with_carry(
        config,
        key,
        EngineOptions {
            seeded: seed.is_some(),
            danger_keep_truth: false,
        },
        &carry,
    )?;
    // Lines logged after the last offset record are re-read from the input instead (only
    // logs written before replay logged batches hold such `Line` records).
    let pos = state::replay_log(&mut engine, &records, 1);
    let mut offset = pos.input_offset;
    let finished = pos.finished;
    std::fs::create_dir_all(out_dir).map_err(io(format!("creating {}", out_dir.display())))?;
    let rel_path = out_dir.join("releases.jsonl");
    let published = state::published_seq(&rel_path).map_err(|e| AppError::State(e.to_string()))?;
    let mut sink =
        JsonlSink::open(out_dir).map_err(io(format!("opening {}", rel_path.display())))?;
    let mut last_regenerated = None;
    let mut n_releases = 0u64;
    while let Some(r) = engine.poll_release() {
        last_regenerated = Some(r.seq);
        if published.is_none_or(|p| r.seq > p) {
            sink.publish(&r).map_err(io("writing releases"))?;
            n_releases += 1;
        }
    }
    // When this refuses, no record was written above: all regenerated seqs are ≤ published.
    state::check_output(published, last_regenerated, &carry, &rel_path, state_dir)
        .map_err(|e| AppError::State(e.to_string()))?;
    if let Some((first, last)) = state::missing_from_output(published, &carry) {
        tracing::warn!(
            first,
            last,
            "releases.jsonl lacks records an earlier state generation published; they cannot be regenerated"
        );
    }
    sink.flush().map_err(io("writing releases"))?;
    let mut lines = 0u64;
    if !finished {
        use std::io::Seek;
        // The lines after the last offset are read again below: drop their old copies.
        st.discard_unconfirmed_lines()
            .map_err(io(format!("writing state in {}", state_dir.display())))?;
        let mut f =
            std::fs::File::open(input).map_err(io(format!("opening input {}", input.display())))?;
        f.seek(std::io::SeekFrom::Start(offset))
            .map_err(io(format!("seeking input {}", input.display())))?;
        let mut reader = BufReader::with_capacity(1 << 20, f);
        let mut line = Vec::with_capacity(4096);
        let mut pending: Vec<Vec<u8>> = Vec::new();
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
            engine.handle_line(body);
            pending.push(body.to_vec());
            let mut fresh = Vec::new();
            while let Some(r) = engine.poll_release() {
                fresh.push(r);
            }
            // Lines are logged in batches that carry the input offset after them, so a
            // crash loses either a whole batch (re-read from the previous offset) or
            // nothing. Logging lines one by one with separate offset records let a restart
            // re-read lines that were already in the log, and count them twice.
            if !fresh.is_empty() || pending.len() >= 4096 {
                st.log_batch(&pending, Some((0, offset))).map_err(wal_err)?;
                pending.clear();
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
        st.log_batch(&pending, Some((0, offset))).map_err(wal_err)?;
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

/// Options of `scrim state new-epoch`.
#[derive(Clone, Debug)]
pub struct NewEpochArgs {
    /// The configuration the new epoch runs under.
    pub config: PathBuf,
    /// State directory (default: the new configuration's `state.dir`).
    pub state: Option<PathBuf>,
    /// Output directory (default: the new configuration's `output.dir`).
    pub out: Option<PathBuf>,
    /// The configuration the state currently runs under, for states that do not store it.
    pub previous_config: Option<PathBuf>,
    /// Why; recorded in the ledger.
    pub reason: String,
    /// Start of the new epoch (RFC 3339); default the end of the last closed window.
    pub start: Option<String>,
    /// The state's key source (`--seed` for seeded states).
    pub key: KeySource,
}

/// `scrim state new-epoch`: abandons the current epoch and starts a new generation of the
/// state pinned to a (possibly different) configuration; see [`crate::runtime::state`].
///
/// The current generation is replayed with the configuration it is pinned to, which tells
/// what it spent, the last window it closed, the last epoch it charged and the next seq.
/// The new generation starts at the first window after that (or at `--start`), with the next
/// epoch index and seq, and its ledger charges the new configuration's epochs on top of the
/// lifetime spend (Bun & Steinke 2016: zCDP composes additively). Nothing changes, and the
/// error is [`AppError::Budget`] (exit 3), when the lifetime budget cannot pay for one epoch
/// of the new configuration. Releases the old log makes durable but `releases.jsonl` lacks
/// are written first, since the old log is deleted at the end.
pub fn state_new_epoch(
    args: &NewEpochArgs,
    w: &mut dyn Write,
) -> Result<crate::runtime::state::Generation, AppError> {
    use crate::engine::core::Carry;
    use crate::engine::ledger::BudgetError;
    use crate::engine::time::Millis;
    use crate::runtime::state::{self, Current, Generation, StateError};
    let state_err = |e: StateError| AppError::State(e.to_string());
    let new_config = Config::load(&args.config)?;
    let dir = args
        .state
        .clone()
        .unwrap_or_else(|| new_config.state.dir.clone());
    let out_dir = args
        .out
        .clone()
        .unwrap_or_else(|| new_config.output.dir.clone());
    if args.reason.trim().is_empty() {
        return Err(AppError::Usage(
            "--reason must say why the epoch is cut short (it is kept in the ledger)".to_string(),
        ));
    }
    let requested_start = match &args.start {
        None => None,
        Some(t) => Some(Millis::parse_rfc3339(t).ok_or_else(|| {
            AppError::Usage(format!(
                "--start {t:?} is not an RFC 3339 time such as 2026-03-09T00:00:00Z"
            ))
        })?),
    };
    let previous = match &args.previous_config {
        Some(p) => Some(Config::load(p)?),
        None => None,
    };
    let seed = match args.key {
        KeySource::Seed(s) => Some(s),
        KeySource::Os => None,
    };
    let cur = Current::open(&dir, seed, previous.as_ref()).map_err(state_err)?;
    let opts = EngineOptions {
        seeded: seed.is_some(),
        danger_keep_truth: false,
    };

    // 1. Where the current generation stands, from its own log and configuration.
    let old_carry = cur.carry();
    let mut old = Engine::with_carry(&cur.config, cur.key.clone(), opts.clone(), &old_carry)?;
    state::replay_log(&mut old, &cur.records, 0);
    let regenerated: Vec<Release> = std::iter::from_fn(|| old.poll_release()).collect();
    let ledger = old.ledger();
    // Windows before this were released (or belong to an earlier generation).
    let earliest = old.last_closed_end().or(old_carry.start);
    let start = match (requested_start, earliest) {
        (Some(s), Some(e)) if s < e => {
            return Err(state_err(StateError::StartTooEarly {
                start: s.to_rfc3339(),
                earliest: e.to_rfc3339(),
            }));
        }
        (Some(s), _) => Some(s),
        (None, e) => e,
    };
    // The first window boundary of the new configuration at or after `start`.
    let window_ms = new_config.window.length.0;
    let start = start.map(|s| Millis((s.0 + window_ms - 1).div_euclid(window_ms) * window_ms));
    let abandoned_epoch = match old.epoch_position() {
        Some((e, closed)) if closed > 0 && ledger.last_epoch() == Some(e) => Some(e),
        _ => None,
    };
    let carry = Carry {
        start,
        first_epoch: ledger.last_epoch().map_or(0, |e| e + 1),
        next_seq: regenerated.last().map_or(old_carry.next_seq, |r| r.seq + 1),
        spent_rho: ledger.spent(),
        epochs_charged: ledger.epochs_charged(),
    };

    // 2. The new configuration: same privacy unit, and its first epoch must be affordable.
    let unit = |c: &Config| {
        c.input
            .unit_field
            .clone()
            .map_or_else(|| "event level".to_string(), |u| format!("unit `{u}`"))
    };
    if cur.config.input.unit_field != new_config.input.unit_field {
        return Err(state_err(StateError::UnitChanged {
            old: unit(&cur.config),
            new: unit(&new_config),
        }));
    }
    let new_engine = Engine::with_carry(&new_config, cur.key.clone(), opts, &carry)?;
    let mut probe = new_engine.ledger().clone();
    if let Err(BudgetError::Exhausted {
        needed, lifetime, ..
    }) = probe.charge_epoch(carry.first_epoch)
    {
        return Err(AppError::Budget(
            StateError::OverBudget {
                spent: carry.spent_rho,
                needed,
                lifetime,
            }
            .to_string(),
        ));
    }
    let affordable = new_engine.ledger().epochs_affordable();

    // 3. The output must not be ahead of the state; records only the old log can
    //    regenerate are written now, before that log is deleted.
    std::fs::create_dir_all(&out_dir).map_err(io(format!("creating {}", out_dir.display())))?;
    let rel_path = out_dir.join("releases.jsonl");
    let published = state::published_seq(&rel_path).map_err(state_err)?;
    state::check_output(
        published,
        regenerated.last().map(|r| r.seq),
        &old_carry,
        &rel_path,
        &dir,
    )
    .map_err(state_err)?;
    let mut sink =
        JsonlSink::open(&out_dir).map_err(io(format!("opening {}", rel_path.display())))?;
    let mut n_written = 0u64;
    for r in regenerated
        .iter()
        .filter(|r| published.is_none_or(|p| r.seq > p))
    {
        sink.publish(r).map_err(io("writing releases"))?;
        n_written += 1;
    }
    sink.flush().map_err(io("writing releases"))?;

    // 4. Commit the new generation.
    let previous_fingerprint = cur.fingerprint().to_string();
    let old_generation = cur.generation();
    let g = cur
        .commit(
            &new_config,
            Generation {
                generation: 0,
                created: crate::runtime::now().to_rfc3339(),
                reason: args.reason.trim().to_string(),
                config_fingerprint: String::new(),
                previous_fingerprint,
                start_ms: carry.start.map(|s| s.0),
                first_epoch: carry.first_epoch,
                next_seq: carry.next_seq,
                spent_rho: carry.spent_rho,
                epochs_charged: carry.epochs_charged,
                abandoned_epoch,
                check: String::new(),
            },
        )
        .map_err(state_err)?;
    let mut report = || -> std::io::Result<()> {
        writeln!(
            w,
            "scrim state new-epoch: generation {} started in {}",
            g.generation,
            dir.display()
        )?;
        writeln!(w, "  reason     {}", g.reason)?;
        writeln!(
            w,
            "  previous   generation {old_generation}: {} epoch(s) charged in all, lifetime rho spent {}{}",
            g.epochs_charged,
            g.spent_rho,
            match g.abandoned_epoch {
                Some(e) => format!("; epoch {e} abandoned (its charge stays spent)"),
                None => String::new(),
            }
        )?;
        if n_written > 0 {
            writeln!(
                w,
                "             {n_written} durable release(s) missing from {} were written first",
                rel_path.display()
            )?;
        }
        writeln!(
            w,
            "  new        fingerprint {}; epoch {} starts {}; seq continues at {}",
            g.config_fingerprint,
            g.first_epoch,
            g.start_ms
                .map_or("at the first event".to_string(), |s| format!(
                    "at {}",
                    Millis(s).to_rfc3339()
                )),
            g.next_seq
        )?;
        writeln!(
            w,
            "  budget     rho {} per epoch; {}",
            new_config.privacy.rho_per_epoch,
            match (new_config.privacy.unit_bounds, affordable) {
                (Some(b), Some(n)) => format!(
                    "lifetime_rho {} covers {n} more epoch(s) on top of the {} spent",
                    b.lifetime_rho, g.spent_rho
                ),
                _ => "event level: epochs hold disjoint events (parallel composition)".to_string(),
            }
        )?;
        writeln!(
            w,
            "  the previous generation's log (raw input lines) was deleted; earlier events are counted late"
        )
    };
    report().map_err(io("printing"))?;
    Ok(g)
}

/// `scrim state show`: what the state directory holds, without the key; changes nothing.
pub fn state_show(dir: &Path, json: bool, w: &mut dyn Write) -> Result<(), AppError> {
    use crate::engine::time::Millis;
    let s = crate::runtime::state::inspect(dir).map_err(|e| AppError::State(e.to_string()))?;
    let mut print = || -> std::io::Result<()> {
        if json {
            return writeln!(
                w,
                "{}",
                serde_json::to_string_pretty(&s).unwrap_or_default()
            );
        }
        writeln!(w, "state      {}", s.dir.display())?;
        writeln!(
            w,
            "format     {} (event hash {}){}; key fingerprint {}",
            s.format,
            s.event_hash,
            if s.seeded {
                ", SEEDED (not private)"
            } else {
                ""
            },
            s.key_fingerprint
        )?;
        writeln!(
            w,
            "generation {} pinned to config fingerprint {} (configuration {}stored)",
            s.generation,
            s.config_fingerprint,
            if s.config_stored { "" } else { "not " }
        )?;
        writeln!(
            w,
            "log        {} record(s), {} bytes",
            s.log_records, s.log_bytes
        )?;
        if s.generations.is_empty() {
            writeln!(w, "ledger     no fresh epoch so far (generation 0)")?;
        }
        for g in &s.generations {
            writeln!(
                w,
                "ledger     generation {} at {}: {:?}",
                g.generation, g.created, g.reason
            )?;
            writeln!(
                w,
                "             before it: rho {} spent over {} epoch(s){}; it starts with epoch {} {} and seq {}",
                g.spent_rho,
                g.epochs_charged,
                g.abandoned_epoch
                    .map_or(String::new(), |e| format!(", epoch {e} abandoned")),
                g.first_epoch,
                g.start_ms
                    .map_or("at its first event".to_string(), |t| format!(
                        "at {}",
                        Millis(t).to_rfc3339()
                    )),
                g.next_seq
            )?;
        }
        Ok(())
    };
    print().map_err(io("printing"))
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
