//! The engine: a deterministic state machine that takes lines or events and clock ticks
//! and returns releases. It owns windows, bounding, aggregation, the mechanisms of the
//! current epoch and the ledger.
//!
//! # Calling protocol
//! - Feed input with [`Engine::handle_line`] (or [`Engine::handle_event`]) in any order;
//!   windows close when the watermark (largest event time minus `allowed_lateness`) passes
//!   their end.
//! - In a live daemon call [`Engine::handle_tick`] with the wall clock; a window also
//!   closes `idle_close` after its end when the feed is quiet.
//! - At end of input (replay) call [`Engine::finish`]: every window with data closes.
//! - After any call, drain [`Engine::poll_release`] until `None`.
//!
//! Nothing here reads a clock, a file or the OS random number generator: noise is derived
//! from the [`NoiseKey`] the caller passes in (see [`crate::engine::noise`]).

use std::collections::{BTreeMap, VecDeque};
use std::sync::Arc;

use smallvec::SmallVec;

use crate::config::Config;
use crate::engine::bound::Bounder;
use crate::engine::contribution::{Contributor, HelpBoard, PARALLEL_MIN_EVENTS, SharedSum};
use crate::engine::dd::Dd;
use crate::engine::event::{
    Event, LineParser, LineShape, RawLine, RejectReason, Rejection, Schema,
};
use crate::engine::ledger::{BudgetError, EpochCharge, Ledger};
use crate::engine::linear;
use crate::engine::mechanism::{
    self, ContinualMechanism, Estimate, LeafRange, NodeAddr, NodeNoise,
};
use crate::engine::noise::{self, KeyedHash64, NoiseId, NoiseKey};
use crate::engine::plan::{ComponentRole, Plan, PlanError, PrivacyLevel, Scope, StatPlan};
use crate::engine::release::{self, Guarantee, Release, SharedStr, Statistics};
use crate::engine::time::Millis;

/// Options that change what the engine keeps; none of them weakens the guarantee of
/// what is released.
#[derive(Clone, Debug, Default)]
pub struct EngineOptions {
    /// The noise key comes from a fixed seed: every release is marked `seeded: true`.
    pub seeded: bool,
    /// Keep exact (un-noised) aggregates and attach them to releases as `truth`, which is
    /// never serialised. For the demo's side-by-side table and for tests only: it keeps
    /// per-leaf exact values in memory.
    pub danger_keep_truth: bool,
}

/// Where a new *generation* of a deployment starts: the engine continues the release
/// sequence, the epoch numbering and the ledger of earlier generations, which ran under
/// another configuration (see `runtime::state` and `scrim state new-epoch`). The default
/// value is a deployment's first generation, and [`Engine::with_carry`] with it is
/// [`Engine::new`].
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Carry {
    /// Start of this generation's first window, if pinned: it is rounded up to a window
    /// boundary of this configuration, and every event before it is counted late (its
    /// window belongs to an earlier generation). `None`: the first event sets it.
    pub start: Option<Millis>,
    /// Index of this generation's first epoch; every lower index belongs to an earlier
    /// generation. Epoch indices are part of every noise node's identity, so no node of an
    /// earlier generation is ever recomputed (or its noise reused) for other data.
    pub first_epoch: u64,
    /// `seq` of this generation's first release.
    pub next_seq: u64,
    /// zCDP spent by earlier generations ([`Ledger::continued`]).
    pub spent_rho: f64,
    /// Epochs charged by earlier generations.
    pub epochs_charged: u64,
}

/// Why the engine cannot start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum EngineError {
    /// The configuration cannot be planned.
    #[error(transparent)]
    Plan(#[from] PlanError),
    /// The parser schema is inconsistent.
    #[error("input schema: {0}")]
    Schema(String),
}

/// Counters an operator watches. Plain numbers; the metrics module renders them.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Counters {
    /// Events accepted into an open window (before contribution bounding).
    pub accepted: u64,
    /// Lines rejected, by reason label.
    pub rejected: BTreeMap<&'static str, u64>,
    /// Events whose window had already closed.
    pub late: u64,
    /// Events dropped by the per-window event bound. The bounder decides when the window
    /// closes (or when it compacts the window's buffer), so the count catches up by then.
    pub dropped_event_bound: u64,
    /// Events dropped by the per-epoch window bound.
    pub dropped_window_bound: u64,
    /// Windows closed.
    pub windows_closed: u64,
    /// Windows closed without releases because the budget could not cover their epoch.
    pub windows_suppressed: u64,
    /// Records released, by statistic.
    pub releases: BTreeMap<String, u64>,
}

impl Counters {
    /// Total rejected lines.
    pub fn rejected_total(&self) -> u64 {
        self.rejected.values().sum()
    }
}

/// Label of the engine-level rejection for an event too far ahead of the stream.
pub const REJECT_TIME_JUMP: &str = "time_jump";

/// Mechanisms of one epoch for one statistic: `[component][group]`.
#[derive(Debug)]
struct StatSeries {
    mechs: Vec<Vec<Box<dyn ContinualMechanism>>>,
    /// Exact leaves `[component][group][leaf]` when keeping truth.
    truth: Option<Vec<Vec<Vec<Vec<i128>>>>>,
}

#[derive(Debug)]
struct EpochState {
    charge: EpochCharge,
    series: Vec<StatSeries>,
}

/// Per-window exact aggregates: `[stat][component]` → flat `groups × dim` vector.
#[derive(Debug, Clone)]
struct WindowAgg {
    values: Vec<Vec<Vec<i128>>>,
}

/// Noise for one series, derived from the key and the node's identity, so the same node
/// always gets the same noise (a restart can never draw a second, independent copy).
struct KeyedNoise<'a> {
    key: &'a NoiseKey,
    stat: &'a str,
    component: u8,
    group: u32,
    epoch: u64,
    sigma2: u128,
}

impl NodeNoise for KeyedNoise<'_> {
    fn fill(&mut self, addr: NodeAddr, out: &mut [i128]) {
        let id = NoiseId {
            stat: self.stat,
            component: self.component,
            group: self.group,
            epoch: self.epoch,
            level: addr.level,
            index: addr.index,
            coord: 0,
        };
        let mut rng = self.key.rng_for(&id);
        for o in out.iter_mut() {
            *o = noise::discrete_gaussian(&mut rng, self.sigma2, 1);
        }
    }
}

/// The scrim engine.
#[derive(Debug)]
pub struct Engine {
    plan: Plan,
    /// Shared with [`LineDecoder`]s handed to parse workers; never mutated after `new`.
    parser: Arc<LineParser>,
    /// The layout of the lines [`Engine::handle_line`] has been reading (speed only).
    shape: LineShape,
    key: NoiseKey,
    /// `key`'s hashers for unit ids and bounding priorities, derived once.
    hashers: EventHashers,
    opts: EngineOptions,
    /// Threads that share a window close's work (see [`Engine::set_close_threads`]);
    /// 1 = the calling thread alone.
    close_threads: usize,
    window_ms: i64,
    lateness_ms: i64,
    idle_close_ms: i64,
    /// The start (in ms) and index of the window of the last accepted event: most events
    /// fall in the same window as the one before, and then need no division (issue 9).
    recent_window: (i64, i64),
    /// How far (in windows) past the next window to close an event may lie: one epoch plus
    /// the lateness (see [`Engine::accept`]).
    horizon_windows: i64,
    /// Absolute window index (time / length) of this generation's first leaf, that of
    /// epoch `epoch_base`.
    origin: Option<i64>,
    /// Index of this generation's first epoch ([`Carry::first_epoch`]).
    epoch_base: u64,
    /// Next absolute window index to close.
    next_close: i64,
    max_event_time: Option<Millis>,
    open: BTreeMap<i64, WindowAgg>,
    bounder: Option<Bounder<Retained>>,
    /// Turns events into their exact per-statistic contributions.
    contributor: Arc<Contributor>,
    /// Threads that lend a hand with a close's survivors (replay's parse workers).
    help_board: Option<Arc<dyn HelpBoard>>,
    epoch: Option<EpochState>,
    ledger: Ledger,
    halted: Option<BudgetError>,
    counters: Counters,
    outbox: VecDeque<Release>,
    /// Per statistic, each group's keys as the records' `group` field, built at the first
    /// close and shared by every record of the group since (issue 9: building them was
    /// about 7% of the instructions of closing 100,000 groups, by callgrind, before the
    /// frees when the records are dropped).
    group_keys: Vec<Vec<Arc<BTreeMap<String, String>>>>,
    next_seq: u64,
    guarantee: Arc<Guarantee>,
}

impl Engine {
    /// Builds an engine for `config` with noise derived from `key`.
    pub fn new(config: &Config, key: NoiseKey, opts: EngineOptions) -> Result<Engine, EngineError> {
        Engine::with_carry(config, key, opts, &Carry::default())
    }

    /// Builds an engine for a generation of a deployment that continues from `carry`:
    /// releases start at `carry.next_seq`, epochs at `carry.first_epoch`, the first window
    /// at `carry.start`, and the ledger charges this configuration's epochs on top of what
    /// earlier generations spent ([`Ledger::continued`]).
    pub fn with_carry(
        config: &Config,
        key: NoiseKey,
        opts: EngineOptions,
        carry: &Carry,
    ) -> Result<Engine, EngineError> {
        let plan = Plan::new(config)?;
        let schema = Schema {
            time_field: config.input.time_field.clone(),
            unit_field: config.input.unit_field.clone(),
            categories: plan.categories.clone(),
            numbers: plan.numbers.clone(),
            max_line_bytes: config.input.max_line_bytes,
        };
        let parser = LineParser::new(schema).map_err(|e| EngineError::Schema(e.to_string()))?;
        let contributor = Contributor::new(&plan);
        let (bounder, lifetime, unit) = match &plan.level {
            PrivacyLevel::Event => (None, None, None),
            PrivacyLevel::Unit {
                field,
                lifetime_rho,
                max_events_per_window,
                max_windows_per_epoch,
            } => (
                Some(Bounder::new(*max_events_per_window, *max_windows_per_epoch)),
                Some(*lifetime_rho),
                Some(field.clone()),
            ),
        };
        let guarantee = Guarantee {
            level: if unit.is_some() { "unit" } else { "event" }.to_string(),
            unit,
            rho: plan.rho_per_epoch,
            lifetime_rho: lifetime,
            epsilon: plan.epsilon_per_epoch(),
            delta: plan.delta,
            mechanism: plan.mechanism.as_str().to_string(),
        };
        let window_ms = config.window.length.0;
        // The first window that starts at or after the pinned start (ceiling division).
        let origin = carry
            .start
            .map(|s| s.0.div_euclid(window_ms) + i64::from(s.0.rem_euclid(window_ms) != 0));
        Ok(Engine {
            ledger: Ledger::continued(
                plan.rho_per_epoch,
                lifetime,
                carry.spent_rho,
                carry.epochs_charged,
                carry.first_epoch,
            ),
            parser: Arc::new(parser),
            shape: LineShape::new(),
            hashers: EventHashers::new(&key),
            key,
            opts,
            close_threads: 1,
            window_ms,
            lateness_ms: config.window.allowed_lateness.0,
            idle_close_ms: config.window.idle_close.0,
            // No window starts at i64::MAX: the first event computes its own.
            recent_window: (i64::MAX, 0),
            horizon_windows: i64::from(plan.epoch_windows)
                + config.window.allowed_lateness.0 / window_ms
                + 1,
            origin,
            epoch_base: carry.first_epoch,
            next_close: origin.unwrap_or(0),
            max_event_time: None,
            open: BTreeMap::new(),
            bounder,
            contributor: Arc::new(contributor),
            help_board: None,
            epoch: None,
            halted: None,
            counters: Counters::default(),
            outbox: VecDeque::new(),
            group_keys: Vec::new(),
            next_seq: carry.next_seq,
            guarantee: Arc::new(guarantee),
            plan,
        })
    }

    /// Lets up to `threads` threads (the calling one included) share a window close's
    /// work: the contributions of the survivors ([`Contributor::add_kept`]) and each group's
    /// leaf and node noise (`for_blocks`). `scrim replay --threads` and the daemon (one per
    /// core) set it. Releases do not depend on it.
    pub fn set_close_threads(&mut self, threads: usize) {
        self.close_threads = threads.max(1);
    }

    /// Lets the threads behind `board` help with the survivors' contributions at a
    /// window close (`scrim replay --threads`, whose parse workers help between chunks;
    /// `None` takes it back). Releases do not depend on it.
    pub fn set_help_board(&mut self, board: Option<Arc<dyn HelpBoard>>) {
        self.help_board = board;
    }

    /// The plan the engine runs.
    pub fn plan(&self) -> &Plan {
        &self.plan
    }

    /// Counters so far.
    pub fn counters(&self) -> &Counters {
        &self.counters
    }

    /// The ledger.
    pub fn ledger(&self) -> &Ledger {
        &self.ledger
    }

    /// Set when the budget could not cover an epoch: nothing more is released.
    pub fn halted(&self) -> Option<&BudgetError> {
        self.halted.as_ref()
    }

    /// Bounding state, for memory reporting (unit level only).
    pub fn bounder(&self) -> Option<&Bounder<Retained>> {
        self.bounder.as_ref()
    }

    /// Number of windows currently open (with at least one event).
    pub fn open_windows(&self) -> usize {
        match &self.bounder {
            Some(_) => self.max_event_time.map_or(0, |t| {
                (self.window_of(t) - self.next_close + 1).max(0) as usize
            }),
            None => self.open.len(),
        }
    }

    /// `(epoch, windows closed in it)` of the next window to close, once the stream started.
    pub fn epoch_position(&self) -> Option<(u64, u32)> {
        let origin = self.origin?;
        let rel = (self.next_close - origin).max(0) as u64;
        let t = u64::from(self.plan.epoch_windows);
        Some((self.epoch_base + rel / t, (rel % t) as u32))
    }

    /// End of the last closed window, if any.
    pub fn last_closed_end(&self) -> Option<Millis> {
        let origin = self.origin?;
        (self.next_close > origin).then(|| Millis(self.next_close * self.window_ms))
    }

    /// Event-time watermark: largest event time minus the allowed lateness.
    pub fn watermark(&self) -> Option<Millis> {
        self.max_event_time
            .map(|t| Millis(t.0.saturating_sub(self.lateness_ms)))
    }

    /// Parses and handles one input line (without its newline).
    pub fn handle_line(&mut self, line: &[u8]) {
        self.handle_raw_line(RawLine::Bytes(line));
    }

    /// [`Engine::handle_line`] of a line in either form (see [`RawLine`]): the same
    /// verdict for the same bytes.
    pub fn handle_raw_line(&mut self, line: RawLine<'_>) {
        let parsed = decode_line(&self.parser, &self.hashers, line, &mut self.shape);
        self.handle_parsed(parsed);
    }

    /// Handles the verdict of [`LineDecoder::decode`] on one line: `handle_line(l)` is
    /// exactly `handle_parsed(decoder.decode(l))`, so parsing may run on other threads as
    /// long as verdicts arrive here in input order.
    pub fn handle_parsed(&mut self, parsed: Result<Event, Rejection>) {
        match parsed {
            Ok(ev) => self.handle_event(ev),
            Err(rej) => self.reject(rej.reason.label()),
        }
    }

    /// A parser detached from the engine, for parsing lines on worker threads.
    pub fn line_decoder(&self) -> LineDecoder {
        LineDecoder {
            parser: Arc::clone(&self.parser),
            hashers: self.hashers.clone(),
        }
    }

    fn reject(&mut self, label: &'static str) {
        *self.counters.rejected.entry(label).or_insert(0) += 1;
    }

    /// Counts a rejection decided outside the engine (e.g. the runtime's I/O layer).
    pub fn count_rejection(&mut self, reason: RejectReason) {
        self.reject(reason.label());
    }

    fn window_of(&self, t: Millis) -> i64 {
        t.0.div_euclid(self.window_ms)
    }

    /// Handles one parsed event.
    pub fn handle_event(&mut self, ev: Event) {
        let Some(w) = self.accept(ev.time) else {
            return;
        };
        self.place(w, ev);
    }

    /// Handles a line prepared by [`LineDecoder::prepare`] of this engine's decoder:
    /// `handle_line(l)` is exactly `handle_prepared(decoder.prepare(l))`.
    pub fn handle_prepared(&mut self, prepared: Prepared) {
        match prepared.outcome {
            Ok(event) => self.handle_event(event),
            Err(rej) => self.reject(rej.reason.label()),
        }
    }

    /// The window of an event at `time`, or `None` when the event is late or implausibly
    /// far ahead (counted here). An accepted event is counted and moves the largest event
    /// time; the caller then places it with [`Engine::place`].
    fn accept(&mut self, time: Millis) -> Option<i64> {
        let (start, recent) = self.recent_window;
        let w = match time.0.checked_sub(start) {
            Some(into) if (0..self.window_ms).contains(&into) => recent,
            _ => self.window_of(time),
        };
        let origin = *self.origin.get_or_insert(w);
        if self.next_close < origin {
            self.next_close = origin;
        }
        if w < self.next_close {
            self.counters.late += 1;
            return None;
        }
        // An event more than one epoch (plus the lateness) ahead of the oldest open window
        // would force closing a whole epoch of empty windows: almost always a broken clock.
        if w - self.next_close > self.horizon_windows {
            self.reject(REJECT_TIME_JUMP);
            return None;
        }
        self.recent_window = (w.saturating_mul(self.window_ms), w);
        self.counters.accepted += 1;
        self.max_event_time = Some(self.max_event_time.map_or(time, |m| m.max(time)));
        Some(w)
    }

    /// Puts an accepted event into window `w`: into the bounder when the engine bounds
    /// units (its contribution is added when the window closes, if it survives), its
    /// contribution straight into the window's aggregate otherwise. Then closes what the
    /// watermark passed.
    fn place(&mut self, w: i64, ev: Event) {
        match (&mut self.bounder, ev.unit) {
            (Some(b), Some(unit)) => {
                let hashers = &self.hashers;
                self.counters.dropped_event_bound +=
                    b.offer(w, unit, ev, |e| bounding_priority(hashers, e));
            }
            _ => {
                let plan = &self.plan;
                let agg = self.open.entry(w).or_insert_with(|| WindowAgg::empty(plan));
                self.contributor.add_event(&ev, &mut agg.values);
            }
        }
        self.advance_watermark();
    }

    fn advance_watermark(&mut self) {
        let Some(max_t) = self.max_event_time else {
            return;
        };
        let watermark = max_t.0.saturating_sub(self.lateness_ms);
        while (self.next_close + 1) * self.window_ms <= watermark {
            self.close_next();
        }
    }

    /// Wall-clock tick (live daemon): closes windows whose end is `idle_close` in the past.
    pub fn handle_tick(&mut self, now: Millis) {
        if self.origin.is_none() {
            return;
        }
        while (self.next_close + 1) * self.window_ms + self.idle_close_ms <= now.0
            && self.has_data_at_or_after(self.next_close)
        {
            self.close_next();
        }
    }

    fn has_data_at_or_after(&self, w: i64) -> bool {
        self.max_event_time.is_some_and(|t| self.window_of(t) >= w)
    }

    /// End of input: closes every window up to the last one that received an event.
    pub fn finish(&mut self) {
        if let Some(t) = self.max_event_time {
            let last = self.window_of(t);
            while self.next_close <= last {
                self.close_next();
            }
        }
    }

    /// The earliest wall-clock time at which [`Engine::handle_tick`] would close a window.
    pub fn poll_timeout(&self) -> Option<Millis> {
        self.has_data_at_or_after(self.next_close)
            .then(|| Millis((self.next_close + 1) * self.window_ms + self.idle_close_ms))
    }

    /// Releases waiting in the outbox.
    pub fn pending_releases(&self) -> usize {
        self.outbox.len()
    }

    /// Next release, in seq order.
    pub fn poll_release(&mut self) -> Option<Release> {
        self.outbox.pop_front()
    }

    fn close_next(&mut self) {
        let w = self.next_close;
        self.next_close += 1;
        self.counters.windows_closed += 1;
        let origin = self.origin.unwrap_or(w);
        let t = u64::from(self.plan.epoch_windows);
        let rel = (w - origin) as u64;
        let epoch = self.epoch_base + rel / t;
        let leaf = (rel % t) as u32;

        let mut agg = self
            .open
            .remove(&w)
            .unwrap_or_else(|| WindowAgg::empty(&self.plan));
        if let Some(b) = &mut self.bounder {
            let (contributor, hashers) = (&self.contributor, &self.hashers);
            let threads = self.close_threads;
            let priority = |e: &Event| bounding_priority(hashers, e);
            let dropped = match &self.help_board {
                Some(board) => {
                    let (dropped, taken) = b.close_take(w, epoch, priority);
                    if let Some((events, kept)) = taken {
                        let events = if events.len() >= PARALLEL_MIN_EVENTS {
                            let sum = Arc::new(SharedSum::new(
                                Arc::clone(contributor),
                                events,
                                kept,
                                &agg.values,
                            ));
                            board.post(Arc::clone(&sum));
                            let events = sum.finish(&mut agg.values);
                            board.withdraw();
                            events
                        } else {
                            contributor.add_kept(&events, &kept, &mut agg.values, 1);
                            events
                        };
                        b.recycle_events(events);
                    }
                    dropped
                }
                None => b.close_batch(w, epoch, priority, |events, kept| {
                    contributor.add_kept(events, kept, &mut agg.values, threads)
                }),
            };
            self.counters.dropped_event_bound += dropped.by_event_cap;
            self.counters.dropped_window_bound += dropped.by_window_cap;
        }

        if self
            .epoch
            .as_ref()
            .is_none_or(|e| e.charge.epoch() != epoch)
        {
            self.epoch = None;
            if self.halted.is_some() {
                self.counters.windows_suppressed += 1;
                return;
            }
            match self.ledger.charge_epoch(epoch) {
                Ok(charge) => self.epoch = Some(self.new_epoch(charge)),
                Err(e) => {
                    tracing::error!(epoch, reason = %e, "budget cannot cover the epoch; releases stop");
                    self.halted = Some(e);
                    self.counters.windows_suppressed += 1;
                    return;
                }
            }
        }
        self.push_and_release(agg, w, epoch, leaf);
    }

    fn new_epoch(&self, charge: EpochCharge) -> EpochState {
        let horizon = self.plan.epoch_windows;
        let series = self
            .plan
            .stats
            .iter()
            .map(|s| {
                let max_trailing = s
                    .scopes
                    .iter()
                    .filter_map(|sc| {
                        if let Scope::Trailing(n) = sc {
                            Some(*n)
                        } else {
                            None
                        }
                    })
                    .max()
                    .unwrap_or(1);
                let n_groups = s.groups.len();
                StatSeries {
                    mechs: s
                        .components
                        .iter()
                        .map(|c| {
                            (0..n_groups)
                                .map(|_| {
                                    mechanism::new_mechanism(
                                        self.plan.mechanism,
                                        horizon,
                                        c.dim,
                                        max_trailing,
                                        c.node_var,
                                    )
                                })
                                .collect()
                        })
                        .collect(),
                    truth: self.opts.danger_keep_truth.then(|| {
                        s.components
                            .iter()
                            .map(|_| vec![Vec::new(); n_groups])
                            .collect()
                    }),
                }
            })
            .collect();
        EpochState { charge, series }
    }

    fn push_and_release(&mut self, agg: WindowAgg, w: i64, epoch: u64, leaf: u32) {
        let Some(state) = self.epoch.as_mut() else {
            return;
        };
        // 1. Every node that completes with this leaf gets its noise (drawn once, by identity).
        for (si, s) in self.plan.stats.iter().enumerate() {
            let series = &mut state.series[si];
            for (ci, c) in s.components.iter().enumerate() {
                let values = &agg.values[si][ci];
                let key = &self.key;
                // Groups `first..` of this component take their leaf.
                let push = |first: usize, mechs: &mut [Box<dyn ContinualMechanism>]| {
                    for (k, mech) in mechs.iter_mut().enumerate() {
                        let g = first + k;
                        let mut nz = KeyedNoise {
                            key,
                            stat: &s.name,
                            component: ci as u8,
                            group: g as u32,
                            epoch,
                            sigma2: c.sigma2,
                        };
                        mech.push_leaf(&values[g * c.dim..(g + 1) * c.dim], &mut nz);
                    }
                };
                for_blocks(&mut series.mechs[ci], GROUP_BLOCK, self.close_threads, push);
                if let Some(truth) = &mut series.truth {
                    for (g, leaves) in truth[ci].iter_mut().enumerate() {
                        leaves.push(values[g * c.dim..(g + 1) * c.dim].to_vec());
                    }
                }
            }
        }
        // 2. Estimates for every scope, as records. Room for all of them at once: with many
        // groups the outbox would otherwise grow (and copy itself) by doubling (closing an
        // epoch's first window of 100,000 groups: 158 -> 118 ms, issue 9).
        self.outbox.reserve(
            self.plan
                .stats
                .iter()
                .map(|s| s.groups.len() * s.scopes.len())
                .sum(),
        );
        if self.group_keys.is_empty() {
            self.group_keys = self
                .plan
                .stats
                .iter()
                .map(|s| {
                    (0..s.groups.len())
                        .map(|g| {
                            Arc::new(
                                s.groups
                                    .keys_of(g)
                                    .into_iter()
                                    .map(|(f, k)| (f.to_string(), k.to_string()))
                                    .collect(),
                            )
                        })
                        .collect()
                })
                .collect();
        }
        let origin = self.origin.unwrap_or(w);
        let epoch_start =
            origin + ((epoch - self.epoch_base) * u64::from(self.plan.epoch_windows)) as i64;
        for (si, s) in self.plan.stats.iter().enumerate() {
            // What records share is built once per close and shared (reference counts, not
            // copies): strings per record were most of closing 100,000 groups (issue 9).
            let stat = SharedStr::from(s.name.as_str());
            let kind = SharedStr::from(s.kind);
            let scopes: Vec<(LeafRange, SharedStr, SharedStr, SharedStr)> = s
                .scopes
                .iter()
                .map(|scope| {
                    let range = scope.range(leaf);
                    let start = Millis((epoch_start + i64::from(range.first)) * self.window_ms);
                    let end = Millis((epoch_start + i64::from(range.last) + 1) * self.window_ms);
                    (
                        range,
                        scope.label().into(),
                        start.to_rfc3339().into(),
                        end.to_rfc3339().into(),
                    )
                })
                .collect();
            for (g, group) in self.group_keys[si].iter().enumerate() {
                for (scope, (range, label, start, end)) in s.scopes.iter().zip(&scopes) {
                    let range = *range;
                    let series = &state.series[si];
                    let est: SmallVec<[Estimate; 2]> = series
                        .mechs
                        .iter()
                        .map(|per_group| per_group[g].estimate(range))
                        .collect();
                    let truth: Option<Vec<Vec<Dd>>> = series.truth.as_ref().map(|t| {
                        t.iter()
                            .zip(&s.components)
                            .map(|(per_group, c)| {
                                let mut sum = vec![Dd::ZERO; c.dim];
                                for leafv in
                                    &per_group[g][range.first as usize..=range.last as usize]
                                {
                                    for (acc, v) in sum.iter_mut().zip(leafv) {
                                        *acc = *acc + Dd::from_i128(*v);
                                    }
                                }
                                sum
                            })
                            .collect()
                    });
                    let head = RecordHead {
                        seq: self.next_seq,
                        stat: stat.clone(),
                        kind: kind.clone(),
                        scope: label.clone(),
                        group: group.clone(),
                        window_start: start.clone(),
                        window_end: end.clone(),
                        epoch,
                        leaf,
                        guarantee: self.guarantee.clone(),
                        seeded: self.opts.seeded,
                    };
                    self.next_seq += 1;
                    let rec = render(s, &est, truth.as_deref(), &self.key, head, g, scope);
                    self.outbox.push_back(rec);
                }
            }
            // Counted once per statistic rather than per record (no name clone per record).
            let n_records = (s.groups.len() * s.scopes.len()) as u64;
            if n_records > 0 {
                *self.counters.releases.entry(s.name.clone()).or_insert(0) += n_records;
            }
        }
    }
}

/// Groups per block of [`for_blocks`] in a window close: about a millisecond of work.
const GROUP_BLOCK: usize = 1024;

/// Calls `each(first, block)` for consecutive blocks of `block_len` items (`first`: the index
/// of the block's first item), on up to `threads` threads, the calling thread included,
/// when there are at least two blocks; on the calling thread alone otherwise. For per-group
/// work whose result does not depend on the order or the thread: every node's noise is a
/// function of its identity (see `KeyedNoise`; issue 9: closing a window of 100,000 groups
/// was mostly drawing their noise). Blocks are taken from a shared iterator, so a thread
/// the OS deschedules holds back one block at most.
///
/// # Panics
/// Re-raises a helper thread's panic.
fn for_blocks<T: Send>(
    items: &mut [T],
    block_len: usize,
    threads: usize,
    each: impl Fn(usize, &mut [T]) + Sync,
) {
    let block_len = block_len.max(1);
    let n_blocks = items.len().div_ceil(block_len);
    let threads = threads.min(n_blocks);
    if threads <= 1 {
        each(0, items);
        return;
    }
    let blocks = std::sync::Mutex::new(items.chunks_mut(block_len).enumerate());
    let work = || {
        loop {
            // A poisoned lock means another taker panicked; its panic is re-raised below.
            let next = blocks
                .lock()
                .unwrap_or_else(std::sync::PoisonError::into_inner)
                .next();
            let Some((b, chunk)) = next else {
                return;
            };
            each(b * block_len, chunk);
        }
    };
    std::thread::scope(|scope| {
        let helpers: Vec<_> = (1..threads).map(|_| scope.spawn(work)).collect();
        work();
        for helper in helpers {
            helper
                .join()
                .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        }
    });
}

/// The engine's line parser with its keyed unit hash, detached from the engine so that
/// lines can be parsed on other threads while the engine runs (parsing is pure). It holds
/// a copy of the noise key (the unit hash is keyed), so it is as secret as the engine and
/// is never serialised or logged (`Debug` redacts the key).
#[derive(Clone, Debug)]
pub struct LineDecoder {
    parser: Arc<LineParser>,
    hashers: EventHashers,
}

/// A line made ready off the engine thread by [`LineDecoder::prepare`], for
/// [`Engine::handle_prepared`]: the parser's verdict, with the unit id already replaced by
/// its keyed hash. Only `prepare` builds one, so the hash is always the engine's own.
#[derive(Clone, Debug, PartialEq)]
pub struct Prepared {
    outcome: Result<Event, Rejection>,
}

impl Prepared {
    /// The parser's rejection of the line, if it rejected it.
    pub fn rejection(&self) -> Option<&Rejection> {
        self.outcome.as_ref().err()
    }

    /// The parsed event (tests).
    #[cfg(test)]
    pub(crate) fn event(&self) -> Option<&Event> {
        self.outcome.as_ref().ok()
    }
}

impl LineDecoder {
    /// Parses one line (without its newline) exactly as [`Engine::handle_line`] does.
    pub fn decode(&self, line: &[u8]) -> Result<Event, Rejection> {
        self.decode_with(line, &mut LineShape::new())
    }

    /// [`LineDecoder::decode`] for a caller that reads many lines: `shape` carries the
    /// layout of the lines seen so far from one call to the next (see [`LineShape`]; the
    /// result does not depend on it).
    pub fn decode_with(&self, line: &[u8], shape: &mut LineShape) -> Result<Event, Rejection> {
        decode_line(&self.parser, &self.hashers, RawLine::Bytes(line), shape)
    }

    /// [`LineDecoder::decode`], packaged for [`Engine::handle_prepared`]: a pure function
    /// of the line and the key, so parse workers compute it and the engine thread only
    /// admits the event. Use the result with the engine that made this decoder.
    pub fn prepare(&self, line: &[u8]) -> Prepared {
        self.prepare_with(line, &mut LineShape::new())
    }

    /// [`LineDecoder::prepare`] with a [`LineShape`] carried between calls (see
    /// [`LineDecoder::decode_with`]).
    pub fn prepare_with(&self, line: &[u8], shape: &mut LineShape) -> Prepared {
        self.prepare_raw_with(RawLine::Bytes(line), shape)
    }

    /// [`LineDecoder::prepare_with`] of a line in either form (see [`RawLine`]).
    pub fn prepare_raw_with(&self, line: RawLine<'_>, shape: &mut LineShape) -> Prepared {
        Prepared {
            outcome: decode_line(&self.parser, &self.hashers, line, shape),
        }
    }

    /// The engine's parser, for callers that bring their own unit hash (benchmarks).
    pub fn parser(&self) -> &LineParser {
        &self.parser
    }
}

/// The noise key's keyed hashes that every event needs, subkeys derived once
/// ([`NoiseKey::event_hasher`]: the key's [`EventHash`](crate::engine::noise::EventHash),
/// which its state records).
#[derive(Clone, Debug)]
struct EventHashers {
    /// Domain "unit": unit ids.
    unit: KeyedHash64,
    /// Domain "priority": bounding priorities.
    priority: KeyedHash64,
}

impl EventHashers {
    fn new(key: &NoiseKey) -> EventHashers {
        EventHashers {
            unit: key.event_hasher("unit"),
            priority: key.event_hasher("priority"),
        }
    }
}

/// The one place a line becomes an event: the unit id is replaced by its keyed hash.
fn decode_line(
    parser: &LineParser,
    hashers: &EventHashers,
    line: RawLine<'_>,
    shape: &mut LineShape,
) -> Result<Event, Rejection> {
    parser.parse_raw_with_shape(line, &|raw: &[u8]| hashers.unit.hash(raw), shape)
}

/// What the bounder keeps of an event: the event itself (120 bytes). Its contribution is
/// computed when its window closes, and only if it survives the bounds; its priority only
/// when its unit has more than `k` events in the window (see `bound`), which is rare.
/// (Keeping the precomputed contribution and priority bytes instead took 256 bytes per
/// event, and copying them in and out of the window buffers cost more than computing them
/// late: issue 9.)
pub type Retained = Event;

/// An event's priority for bottom-k bounding: [`priority_input`] hashed with the priority
/// key. Only events with a unit are bounded.
fn bounding_priority(hashers: &EventHashers, ev: &Event) -> u64 {
    hashers
        .priority
        .hash(&priority_input(ev.unit.unwrap_or_default(), ev))
}

/// The bytes of an event's bounding priority (see [`priority_input`]); 64 inline bytes
/// hold a unit, a time, four categories and four numbers.
type PriorityInput = smallvec::SmallVec<[u8; 64]>;

/// What an event's priority for bottom-k bounding is a keyed hash of: the unit and the
/// event's content (unit, time, categories, numbers as little-endian bytes, in that order),
/// independent of arrival order and of other units (see `bound`).
fn priority_input(unit: u64, ev: &Event) -> PriorityInput {
    let len = 16 + 4 * ev.categories.len() + 8 * ev.numbers.len();
    if len <= 64 {
        // The usual case, written in place: the same bytes without a capacity check per
        // field (issue 9: the general loop below was 4% of replay).
        let mut buf = [0u8; 64];
        buf[..8].copy_from_slice(&unit.to_le_bytes());
        buf[8..16].copy_from_slice(&ev.time.0.to_le_bytes());
        let mut at = 16;
        for c in &ev.categories {
            buf[at..at + 4].copy_from_slice(&c.to_le_bytes());
            at += 4;
        }
        for x in &ev.numbers {
            buf[at..at + 8].copy_from_slice(&x.to_bits().to_le_bytes());
            at += 8;
        }
        return PriorityInput::from_buf_and_len(buf, len);
    }
    let mut bytes = PriorityInput::new();
    bytes.extend_from_slice(&unit.to_le_bytes());
    bytes.extend_from_slice(&ev.time.0.to_le_bytes());
    for c in &ev.categories {
        bytes.extend_from_slice(&c.to_le_bytes());
    }
    for x in &ev.numbers {
        bytes.extend_from_slice(&x.to_bits().to_le_bytes());
    }
    bytes
}

impl WindowAgg {
    fn empty(plan: &Plan) -> WindowAgg {
        WindowAgg {
            values: crate::engine::contribution::zero_aggregate(plan),
        }
    }
}

/// The fields of a record that do not depend on its estimate.
struct RecordHead {
    seq: u64,
    stat: SharedStr,
    kind: SharedStr,
    scope: SharedStr,
    group: Arc<BTreeMap<String, String>>,
    window_start: SharedStr,
    window_end: SharedStr,
    epoch: u64,
    leaf: u32,
    guarantee: Arc<Guarantee>,
    seeded: bool,
}

/// Turns the per-component estimates of one (stat, group, scope) into a record.
fn render(
    s: &StatPlan,
    est: &[Estimate],
    truth: Option<&[Vec<Dd>]>,
    key: &NoiseKey,
    head: RecordHead,
    group: usize,
    scope: &Scope,
) -> Release {
    let (epoch, leaf) = (head.epoch, head.leaf);
    let mut rec = Release {
        seq: head.seq,
        stat: head.stat,
        kind: head.kind,
        scope: head.scope,
        group: head.group,
        window_start: head.window_start,
        window_end: head.window_end,
        value: serde_json::Value::Null,
        std_error: serde_json::Value::Null,
        epoch,
        leaf,
        guarantee: head.guarantee,
        seeded: head.seeded,
        note: None,
        supersedes: None,
        statistics: None,
        condition_number: None,
        fit: None,
        truth: None,
    };
    match s.kind {
        "count" | "sum" => {
            let c = &s.components[0];
            let q = c.quantum();
            rec.value = release::number(est[0].value[0].to_f64() * q);
            rec.std_error = release::number(est[0].variance.sqrt() * q);
            rec.truth = truth.map(|t| release::number(t[0][0].to_f64() * q));
        }
        "mean" => {
            let (sum_c, cnt_c) = (&s.components[0], &s.components[1]);
            let ComponentRole::CentredSum { lo, hi, .. } = sum_c.role else {
                unreachable!("mean plans start with a centred sum")
            };
            let mid = (lo + hi) / 2.0;
            let ratio = |sum: f64, cnt: f64| {
                if cnt >= 1.0 {
                    Some((mid + sum / cnt).clamp(lo, hi))
                } else {
                    None
                }
            };
            let sum = est[0].value[0].to_f64() * sum_c.quantum();
            let cnt = est[1].value[0].to_f64() * cnt_c.quantum();
            match ratio(sum, cnt) {
                Some(v) => {
                    // Delta method for a ratio of independent noisy terms (common practice):
                    // Var(mid + S/C) ≈ (Var S + (S/C)² Var C) / C².
                    let var_s = est[0].variance * sum_c.quantum().powi(2);
                    let var_c = est[1].variance * cnt_c.quantum().powi(2);
                    let r = sum / cnt;
                    rec.value = release::number(v);
                    rec.std_error = release::number(((var_s + r * r * var_c) / (cnt * cnt)).sqrt());
                    rec.note = Some("std_error by the delta method (first order)".to_string());
                }
                None => {
                    rec.note = Some(
                        "noisy count below 1: the mean is undefined for this scope".to_string(),
                    );
                }
            }
            rec.truth = truth.and_then(|t| {
                ratio(
                    t[0][0].to_f64() * sum_c.quantum(),
                    t[1][0].to_f64() * cnt_c.quantum(),
                )
                .map(release::number)
            });
        }
        _ => render_linear(s, est, truth, key, epoch, leaf, group, scope, &mut rec),
    }
    rec
}

#[allow(clippy::too_many_arguments)]
fn render_linear(
    s: &StatPlan,
    est: &[Estimate],
    truth: Option<&[Vec<Dd>]>,
    key: &NoiseKey,
    epoch: u64,
    leaf: u32,
    group: usize,
    scope: &Scope,
    rec: &mut Release,
) {
    let c = &s.components[0];
    let ComponentRole::Moments { layout, units, .. } = &c.role else {
        unreachable!("linear plans have one moments component")
    };
    // Coefficients fitted in normalised units map back: y = u_y·y', x = u_x·x', so the
    // intercept scales by u_y and each slope by u_y / u_x (std errors alike).
    let uy = units.target;
    let mut unscale: Vec<f64> = Vec::new();
    if s.intercept {
        unscale.push(uy);
    }
    unscale.extend(units.features.iter().map(|u| uy / u));
    let back = |v: &[f64]| {
        v.iter()
            .zip(&unscale)
            .map(|(a, f)| a * f)
            .collect::<Vec<f64>>()
    };
    let mut scales: Vec<f64> = Vec::new();
    if s.intercept {
        scales.push(1.0);
    }
    scales.extend(units.features.iter().copied());
    scales.push(uy);
    let mut centres: Vec<f64> = Vec::new();
    if s.intercept {
        centres.push(0.0);
    }
    centres.extend(units.feature_centres.iter().copied());
    centres.push(units.target_centre);
    // The fit runs in normalised units, where the centres are c/u (exact: u is a power of two).
    let shift = units.is_centred().then(|| linear::Shift {
        features: units
            .feature_centres
            .iter()
            .zip(&units.features)
            .map(|(c, u)| c / u)
            .collect(),
        target: units.target_centre / uy,
    });
    let q = c.quantum();
    let method = s.fit.unwrap_or(linear::FitMethod::Ridge { lambda: 0.0 });
    let mut names: Vec<String> = Vec::new();
    if s.intercept {
        names.push("intercept".to_string());
    }
    names.extend(s.features.iter().cloned());
    rec.fit = Some(
        match method {
            linear::FitMethod::Ridge { .. } => "ridge",
            linear::FitMethod::L1 { .. } => "l1",
        }
        .to_string(),
    );
    rec.statistics = Some(Statistics {
        names: layout.coordinate_names(&s.features, &s.target),
        values: est[0].value.iter().map(|v| v.to_f64() * q).collect(),
        std_error: est[0].variance.sqrt() * q,
        scales,
        centres,
    });
    // The bootstrap of the l1 fit is post-processing; its randomness is derived from the
    // key under an identity no noise node uses (level 255), so it is reproducible.
    let scope_tag = match scope {
        Scope::Window => 0,
        Scope::EpochToDate => 1,
        Scope::Trailing(n) => 2 + u64::from(*n),
    };
    let mut rng = key.rng_for(&NoiseId {
        stat: &s.name,
        component: 0,
        group: group as u32,
        epoch,
        level: 255,
        index: (u64::from(leaf) << 32) | scope_tag,
        coord: 0,
    });
    let obj = |vals: &[f64]| {
        serde_json::Value::Object(
            names
                .iter()
                .cloned()
                .zip(vals.iter().map(|v| release::number(*v)))
                .collect(),
        )
    };
    match linear::fit_shifted(
        layout,
        &est[0].value,
        est[0].variance,
        c.grid_exp,
        &method,
        shift.as_ref(),
        &mut rng,
    ) {
        Ok(f) => {
            rec.value = obj(&back(&f.coefficients));
            rec.std_error = obj(&back(&f.std_errors));
            rec.condition_number = Some(f.condition_number);
            let mut note = "coefficient std_error by the delta method".to_string();
            if matches!(method, linear::FitMethod::L1 { .. }) {
                note = "coefficient std_error by parametric bootstrap".to_string();
            }
            if let Some(r) = f.repair {
                note.push_str("; ");
                note.push_str(&r);
            }
            rec.note = Some(note);
        }
        Err(e) => {
            // The record keeps its shape (an object per coefficient), with nulls.
            let nulls = vec![f64::NAN; names.len()];
            rec.value = obj(&nulls);
            rec.std_error = obj(&nulls);
            rec.note = Some(format!("no fit: {e}"));
        }
    }
    if let Some(t) = truth {
        let mut trng = key.rng_for(&NoiseId {
            stat: &s.name,
            component: 1,
            group: group as u32,
            epoch,
            level: 255,
            index: u64::from(leaf),
            coord: 0,
        });
        rec.truth = linear::fit_shifted(
            layout,
            &t[0],
            0.0,
            c.grid_exp,
            &method,
            shift.as_ref(),
            &mut trng,
        )
        .ok()
        .map(|f| obj(&back(&f.coefficients)));
    }
}

#[cfg(test)]
mod tests {
    //! Neighbouring datasets: removing one unit (including one far over its bounds) changes
    //! every mechanism's node vector by at most the sensitivity the plan used to scale the
    //! noise (privacy-math §8). Node vectors are rebuilt from the exact leaves by brute force.
    use super::*;
    use crate::config::Config;
    use crate::engine::mechanism::MechanismKind;

    /// The priority bytes follow their documented layout (unit, time, categories, numbers,
    /// little endian) whether they fit the inline 64 bytes or not.
    #[test]
    fn priority_input_follows_its_layout() {
        for (n_cat, n_num) in [(0, 0), (2, 4), (4, 4), (3, 5), (0, 6), (4, 5), (8, 8)] {
            let ev = Event {
                time: Millis(1_772_439_247_123),
                unit: Some(0x0102_0304_0506_0708),
                categories: (0..n_cat).map(|i| 1000 + i as u32).collect(),
                numbers: (0..n_num).map(|i| -1.5 * f64::from(i) + 0.1).collect(),
            };
            let mut want = Vec::new();
            want.extend_from_slice(&0x0102_0304_0506_0708u64.to_le_bytes());
            want.extend_from_slice(&1_772_439_247_123i64.to_le_bytes());
            for c in &ev.categories {
                want.extend_from_slice(&c.to_le_bytes());
            }
            for x in &ev.numbers {
                want.extend_from_slice(&x.to_bits().to_le_bytes());
            }
            let got = priority_input(0x0102_0304_0506_0708, &ev);
            assert_eq!(
                got.as_slice(),
                want.as_slice(),
                "{n_cat} categories, {n_num} numbers"
            );
        }
    }

    fn config(mechanism: &str) -> Config {
        Config::from_toml_str(&format!(
            r#"
[input]
time_field = "ts"
unit_field = "card"
[window]
length = "1h"
allowed_lateness = "0s"
[privacy]
rho_per_epoch = 1.0
lifetime_rho = 4.0
delta = 1e-9
epoch_windows = 16
max_events_per_window = 2
max_windows_per_epoch = 3
mechanism = "{mechanism}"
[[stats]]
name = "c"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a", "b", "c"]
[[stats]]
name = "s"
kind = "sum"
field = "v"
range = [-5, 20]
[[stats]]
name = "m"
kind = "mean"
field = "v"
range = [0, 10]
[[stats]]
name = "l"
kind = "linear"
target = "y"
features = ["v", "w"]
feature_norm_bound = 10.0
target_bound = 30.0
[[stats]]
name = "lb"
kind = "linear"
target = "y"
features = ["v", "w"]
feature_norm_bound = 10.0
feature_bounds = [5.0, 8.0]
target_bound = 30.0
[[stats]]
name = "lr"
kind = "linear"
target = "y"
features = ["v", "w"]
feature_norm_bound = 20.0
feature_ranges = [[-2.0, 12.0], [1.0, 9.0]]
target_bound = 50.0
target_range = [0.0, 40.0]
[[stats]]
name = "ln"
kind = "linear"
target = "y"
features = ["v", "w"]
intercept = false
feature_norm_bound = 20.0
feature_ranges = [[2.0, 12.0], [1.0, 9.0]]
target_bound = 30.0
"#
        ))
        .expect("valid test config")
    }

    /// A random feed: `units` units, a heavy unit 0 far over both bounds.
    fn feed(units: u32, seed: u64) -> Vec<(i64, u32, String)> {
        let mut x = seed | 1;
        let mut rnd = move |n: u64| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            x % n
        };
        let zones = ["a", "b", "c"];
        let mut out = Vec::new();
        for u in 0..units {
            let n = if u == 0 { 60 } else { 1 + rnd(6) };
            for _ in 0..n {
                let ts = 1_772_409_600_000 + rnd(10 * 3_600_000) as i64;
                let v = rnd(400) as f64 / 10.0 - 8.0;
                let w = rnd(100) as f64 / 10.0;
                let y = 2.0 * v + w + rnd(50) as f64 / 10.0;
                let line = format!(
                    r#"{{"ts":{ts},"card":"u{u}","zone":"{}","v":{v},"w":{w},"y":{y}}}"#,
                    zones[rnd(3) as usize]
                );
                out.push((ts, u, line));
            }
        }
        out.sort_by_key(|e| e.0);
        out
    }

    /// Every accepted event is placed in window ⌊t / length⌋ (`div_euclid`, the
    /// definition), whatever the order of times: the window of the previous event, which
    /// `accept` reuses without dividing, must never stick to a later one. Times jump back
    /// and forth within and across window edges, far ahead (a rejected time jump) and
    /// late (behind the next window to close).
    #[test]
    fn accept_places_each_event_in_its_own_window() {
        let cfg = Config::from_toml_str(crate::app::DEMO_CONFIG).expect("demo config");
        let mut engine = seeded_engine(&cfg);
        let hour = 3_600_000i64;
        let base = 1_772_409_600_000i64; // 2026-03-02T00:00:00Z
        let mut times = Vec::new();
        for i in 0..2000i64 {
            // A walk forward with steps back, edges hit exactly (i % 7 == 0).
            let t = base + (i / 3) * (hour / 5) - (i % 3) * 997 + if i % 7 == 0 { 0 } else { 13 };
            times.push(t - t.rem_euclid(hour) * i64::from(i % 7 == 0));
            if i % 250 == 0 {
                times.push(t + 400 * hour); // a time jump, rejected
                times.push(t - 3 * hour); // late once its window is closed
            }
        }
        let (mut accepted, mut refused) = (0, 0);
        for t in times {
            match engine.accept(Millis(t)) {
                Some(w) => {
                    assert_eq!(w, t.div_euclid(hour), "time {t}");
                    accepted += 1;
                }
                None => refused += 1,
            }
        }
        assert!(
            accepted > 1900 && refused > 4,
            "{accepted} accepted, {refused} refused"
        );
    }

    /// A seeded engine for `cfg` that keeps the exact leaves (`truth`).
    fn seeded_engine(cfg: &Config) -> Engine {
        Engine::new(
            cfg,
            NoiseKey::from_seed(1),
            EngineOptions {
                seeded: true,
                danger_keep_truth: true,
            },
        )
        .expect("engine")
    }

    /// Exact leaves `[stat][component][group][leaf]` after processing `lines`.
    fn leaves(cfg: &Config, lines: &[&str]) -> Vec<Vec<Vec<Vec<Vec<i128>>>>> {
        let mut e = seeded_engine(cfg);
        for l in lines {
            e.handle_line(l.as_bytes());
        }
        e.finish();
        let state = e.epoch.as_ref().expect("one epoch");
        state
            .series
            .iter()
            .map(|s| s.truth.clone().expect("truth kept"))
            .collect()
    }

    fn sq(v: &[i128]) -> f64 {
        v.iter().map(|x| (*x as f64).powi(2)).sum()
    }

    /// ‖Δ(node vector)‖² for one component over all groups, by brute force.
    fn node_delta_sq(
        kind: MechanismKind,
        a: &[Vec<Vec<i128>>],
        b: &[Vec<Vec<i128>>],
        horizon: u32,
    ) -> f64 {
        let mut total = 0.0;
        for (ga, gb) in a.iter().zip(b) {
            let n = ga.len().max(gb.len());
            let dim = ga.first().or(gb.first()).map_or(0, Vec::len);
            let diff: Vec<Vec<i128>> = (0..n)
                .map(|t| {
                    (0..dim)
                        .map(|j| ga.get(t).map_or(0, |v| v[j]) - gb.get(t).map_or(0, |v| v[j]))
                        .collect()
                })
                .collect();
            match kind {
                MechanismKind::Independent => total += diff.iter().map(|d| sq(d)).sum::<f64>(),
                MechanismKind::Tree => {
                    let mut level = 0;
                    while (1usize << level) <= horizon as usize {
                        let size = 1usize << level;
                        let mut start = 0;
                        while start + size <= n {
                            let mut node = vec![0i128; dim];
                            for d in &diff[start..start + size] {
                                for (acc, x) in node.iter_mut().zip(d) {
                                    *acc += x;
                                }
                            }
                            total += sq(&node);
                            start += size;
                        }
                        level += 1;
                    }
                }
                #[allow(clippy::needless_range_loop)] // t and j index a matrix product
                MechanismKind::SqrtFactorization => {
                    let mut c = vec![1.0f64; n];
                    for k in 1..n {
                        c[k] = c[k - 1] * (1.0 - 1.0 / (2.0 * k as f64));
                    }
                    for t in 0..n {
                        for j in 0..dim {
                            let r: f64 = (0..=t).map(|s| c[t - s] * diff[s][j] as f64).sum();
                            total += r * r;
                        }
                    }
                }
            }
        }
        total
    }

    /// A generation continued with [`Engine::with_carry`]: events before the pinned start
    /// are late, epochs and seq continue, the ledger adds the earlier spend, and a carry
    /// that leaves less than one epoch of lifetime budget releases nothing (fails closed).
    #[test]
    fn a_carried_generation_continues_seq_epochs_and_ledger() {
        let cfg = config("tree");
        let t0: i64 = 1_772_409_600_000; // 2026-03-02T00:00:00Z, a window boundary
        let hour = 3_600_000;
        let lines: Vec<String> = (0..10)
            .map(|h| {
                format!(
                    r#"{{"ts":{},"card":"u{h}","zone":"a","v":1,"w":1,"y":1}}"#,
                    t0 + h * hour + 60_000
                )
            })
            .collect();
        let carry = Carry {
            // One millisecond past 05:00: the first window is 06:00–07:00.
            start: Some(Millis(t0 + 5 * hour + 1)),
            first_epoch: 3,
            next_seq: 1000,
            spent_rho: 2.5,
            epochs_charged: 3,
        };
        let opts = EngineOptions {
            seeded: true,
            danger_keep_truth: false,
        };
        let mut e =
            Engine::with_carry(&cfg, NoiseKey::from_seed(1), opts.clone(), &carry).expect("engine");
        for l in &lines {
            e.handle_line(l.as_bytes());
        }
        e.finish();
        let out: Vec<Release> = std::iter::from_fn(|| e.poll_release()).collect();
        assert_eq!(
            e.counters().late,
            6,
            "events of 00:00..05:59 are before the start"
        );
        assert_eq!(e.counters().accepted, 4);
        assert!(!out.is_empty());
        for (i, r) in out.iter().enumerate() {
            assert_eq!(r.seq, 1000 + i as u64, "seq continues densely");
            assert_eq!(r.epoch, 3, "epochs continue from the carry");
        }
        let first_window = out
            .iter()
            .find(|r| r.scope == "window")
            .expect("window scope");
        assert_eq!(first_window.leaf, 0);
        assert_eq!(
            first_window.window_start,
            Millis(t0 + 6 * hour).to_rfc3339()
        );
        // 2.5 before + 1.0 for epoch 3 (additive zCDP composition, Bun & Steinke 2016).
        assert_eq!(e.ledger().spent(), 3.5);
        assert_eq!(e.ledger().epochs_charged(), 4);
        assert_eq!(e.epoch_position(), Some((3, 4)));

        // 3.5 + 1.0 > 4.0: the generation cannot pay for its first epoch.
        let broke = Carry {
            spent_rho: 3.5,
            ..carry
        };
        let mut e = Engine::with_carry(&cfg, NoiseKey::from_seed(1), opts, &broke).expect("engine");
        for l in &lines {
            e.handle_line(l.as_bytes());
        }
        e.finish();
        assert!(e.poll_release().is_none());
        assert!(matches!(
            e.halted(),
            Some(BudgetError::Exhausted { epoch: 3, .. })
        ));
        assert_eq!(e.ledger().spent(), 3.5);
    }

    #[test]
    fn removing_any_unit_moves_every_node_vector_by_at_most_the_sensitivity() {
        for mech in ["tree", "sqrt-factorization", "independent"] {
            let cfg = config(mech);
            let plan = Plan::new(&cfg).expect("plan");
            let events = feed(12, 0x9e37_79b9);
            let all: Vec<&str> = events.iter().map(|e| e.2.as_str()).collect();
            let full = leaves(&cfg, &all);
            for removed in 0..12u32 {
                let rest: Vec<&str> = events
                    .iter()
                    .filter(|e| e.1 != removed)
                    .map(|e| e.2.as_str())
                    .collect();
                let nb = leaves(&cfg, &rest);
                for (si, s) in plan.stats.iter().enumerate() {
                    for (ci, c) in s.components.iter().enumerate() {
                        let d = node_delta_sq(
                            plan.mechanism,
                            &full[si][ci],
                            &nb[si][ci],
                            plan.epoch_windows,
                        );
                        assert!(
                            d <= c.sensitivity_sq * (1.0 + 1e-9),
                            "{mech}: removing unit {removed} moved stat {} component {ci} by Δ² = {d:e} > {:e}",
                            s.name,
                            c.sensitivity_sq
                        );
                    }
                }
            }
        }
    }

    /// Every record (as its `Debug` text, truth included) and the counters of a seeded
    /// engine that closes windows on `threads` threads.
    fn run_on_threads(cfg: &Config, lines: &[String], threads: usize) -> (Vec<String>, Counters) {
        run_with(cfg, lines, threads, None)
    }

    /// A help board whose helper is a thread started at each post (the replay's parse
    /// workers help between chunks instead).
    #[derive(Debug, Default)]
    struct ThreadBoard(std::sync::Mutex<Option<std::thread::JoinHandle<()>>>);

    impl HelpBoard for ThreadBoard {
        fn post(&self, sum: Arc<SharedSum>) {
            *self.0.lock().expect("board") = Some(std::thread::spawn(move || sum.help()));
        }

        fn withdraw(&self) {
            if let Some(helper) = self.0.lock().expect("board").take() {
                helper.join().expect("helper");
            }
        }
    }

    /// [`run_on_threads`] with an optional help board.
    fn run_with(
        cfg: &Config,
        lines: &[String],
        threads: usize,
        board: Option<Arc<dyn HelpBoard>>,
    ) -> (Vec<String>, Counters) {
        let mut e = seeded_engine(cfg);
        e.set_close_threads(threads);
        e.set_help_board(board);
        for l in lines {
            e.handle_line(l.as_bytes());
        }
        e.finish();
        let mut out = Vec::new();
        while let Some(r) = e.poll_release() {
            out.push(format!("{r:?}"));
        }
        (out, e.counters().clone())
    }

    /// Sharing the survivors' contributions among threads at a close
    /// (`set_close_threads`, or a help board) changes no release: windows of 20,000 buffered events (half
    /// over the per-window bound), well above `add_kept`'s threshold, closed with 1 and 3
    /// threads, give the same records, truth included.
    #[test]
    fn close_threads_do_not_change_releases() {
        let mut lines = Vec::new();
        for w in 0..3i64 {
            for u in 0..10_000u32 {
                for i in 0..2 {
                    let ts =
                        1_772_409_600_000 + w * 3_600_000 + i64::from((u * 7 + i) % 3_600) * 1000;
                    let v = f64::from((u * 13 + i * 5) % 250) / 10.0 - 5.0;
                    let wv = f64::from((u * 3 + i) % 100) / 10.0;
                    let y = 2.0 * v + wv;
                    let zone = ["a", "b", "c"][(u % 3) as usize];
                    lines.push(format!(
                        r#"{{"ts":{ts},"card":"u{}","zone":"{zone}","v":{v},"w":{wv},"y":{y}}}"#,
                        u % 5_000
                    ));
                }
            }
        }
        let cfg = config("tree");
        let run = |threads: usize| {
            let (records, counters) = run_on_threads(&cfg, &lines, threads);
            (records, counters.dropped_event_bound)
        };
        let (one, dropped) = run(1);
        assert!(one.len() >= 3, "{} records", one.len());
        assert_eq!(
            dropped, 30_000,
            "units u and u + 5000 share a card: 4 events each"
        );
        assert_eq!(run(3), (one.clone(), dropped));
        // And with a help board (the replay's path), whose helper takes blocks too.
        let (boarded, counters) = run_with(&cfg, &lines, 2, Some(Arc::new(ThreadBoard::default())));
        assert_eq!((boarded, counters.dropped_event_bound), (one, dropped));
    }

    /// `for_blocks` hands every item to `each` exactly once, with its index in the slice,
    /// for any thread count, block length and item count (including an empty slice).
    #[test]
    fn for_blocks_visits_every_item_once_with_its_index() {
        for n in [0usize, 1, 5, 1023, 1024, 1025, 5000] {
            for block_len in [1usize, 7, 1024] {
                for threads in [1usize, 2, 4] {
                    let mut items: Vec<(usize, u32)> = (0..n).map(|i| (i, 0)).collect();
                    for_blocks(&mut items, block_len, threads, |first, block| {
                        for (k, (i, seen)) in block.iter_mut().enumerate() {
                            assert_eq!(*i, first + k, "index of a block's item");
                            *seen += 1;
                        }
                    });
                    assert!(
                        items.iter().all(|(_, seen)| *seen == 1),
                        "n {n}, block {block_len}, threads {threads}"
                    );
                }
            }
        }
    }

    /// With 2,500 groups (three blocks of `GROUP_BLOCK`), closing windows on 1 or 3 threads
    /// draws the same noise and builds the same records: noise is keyed by node identity,
    /// whichever thread draws it.
    #[test]
    fn close_threads_do_not_change_many_group_releases() {
        let keys: Vec<String> = (0..2_500).map(|i| format!("\"k{i}\"")).collect();
        let cfg = Config::from_toml_str(&format!(
            r#"
[input]
time_field = "ts"
[window]
length = "1h"
allowed_lateness = "0s"
[privacy]
rho_per_epoch = 1.0
delta = 1e-9
epoch_windows = 8
[[stats]]
name = "c"
kind = "count"
group_by = ["k"]
trailing = [2]
[stats.keys]
k = [{}]
"#,
            keys.join(", ")
        ))
        .expect("valid config");
        let lines: Vec<String> = (0..3i64)
            .flat_map(|w| {
                (0..2_500).step_by(3).map(move |g| {
                    let ts = 1_772_409_600_000 + w * 3_600_000 + (g % 3_600) * 1000;
                    format!(r#"{{"ts":{ts},"k":"k{g}"}}"#)
                })
            })
            .collect();
        let run = |threads: usize| run_on_threads(&cfg, &lines, threads).0;
        let one = run(1);
        assert_eq!(
            one.len(),
            3 * 3 * 2_500,
            "3 windows; window, trailing and epoch-to-date scopes; 2,500 groups"
        );
        assert_eq!(run(3), one);
    }
}
