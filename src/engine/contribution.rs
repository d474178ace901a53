//! One event's exact contribution to every statistic, on the statistics' grids.
//!
//! What an event adds to a window aggregate depends on the event and the plan only (its
//! group in each statistic, its clamped values rounded to each component's grid, its
//! clipped moment vector): not on the window, on other events or on bounding. The engine
//! adds it when the event's window closes, for the events that survive contribution
//! bounding ([`Contributor::add_event`]), or at once when units are not bounded. Adding is
//! integer addition, so the order of events never matters.
//!
//! (It used to be computed as soon as a line was parsed, on `scrim replay`'s parse
//! workers, and kept with the event until its window closed; at 256 bytes per retained
//! event, copying it in and out of the window buffers cost more than computing it late,
//! for survivors only: issue 9.)
//!
//! Sensitivities and their derivations are in `plan` and `linear`.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex, PoisonError, RwLock};

use smallvec::SmallVec;

use crate::engine::event::Event;
use crate::engine::linear;
use crate::engine::plan::{ComponentPlan, ComponentRole, Plan};

/// Marks a statistic the event is not part of: its category value is declared for another
/// statistic only. Never a group index ([`GroupSpace`](crate::engine::plan::GroupSpace)
/// sizes are far below `u32::MAX`: configuration caps keys per field).
const NOT_PART: u32 = u32::MAX;

/// Coordinates of a plan whose contributions [`Contributor::add_event`] computes on the
/// stack (the demo has 15).
const INLINE_VALUES: usize = 16;

/// Events (kept or not) per block of [`Contributor::add_kept`]: about 0.2 ms of work, so
/// a helper the OS deschedules holds back little, and the few atomic operations per block
/// cost nothing.
const PARALLEL_BLOCK: usize = 1024;

/// Largest aggregate (in slots: groups × coordinates, over all statistics) whose blocks
/// [`Contributor::add_block`] sums in `i64` first; 4 KiB of partial sums on the stack.
const BLOCK_SLOTS: usize = 512;

/// Largest coordinate magnitude, 2^51, for which [`Contributor::add_block`] sums in `i64`:
/// [`PARALLEL_BLOCK`] = 2^10 of them sum to at most 2^61.
const SMALL_COORDINATE: i64 = 1 << 51;

/// Batches below this many events are summed on the calling thread alone: starting a
/// helper thread (tens of microseconds) is then a noticeable share of the work.
pub(crate) const PARALLEL_MIN_EVENTS: usize = 8192;

/// One event's contribution: per statistic its group (or `NOT_PART`), and per component,
/// in plan order, its grid values (`dim` each, zeros for statistics it is not part of), in
/// the aggregates' type.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Contribution {
    groups: SmallVec<[u32; 6]>,
    values: SmallVec<[i128; INLINE_VALUES]>,
}

/// How one statistic's group is found and where its components' values go.
#[derive(Clone, Debug)]
struct StatLayout {
    /// Per group field: the parser's category index, its domain index → key index map,
    /// and the number of keys (mixed radix, first field most significant).
    fields: Vec<(usize, Vec<Option<u32>>, usize)>,
    /// Per component: its plan and the offset of its values in [`Contribution::values`].
    components: Vec<(ComponentPlan, usize)>,
}

/// Computes [`Contribution`]s for one plan; built once per engine.
#[derive(Clone, Debug)]
pub struct Contributor {
    stats: Vec<StatLayout>,
    /// Per statistic, per component: the `(offset, dim)` of its values.
    spans: Vec<Vec<(usize, usize)>>,
    width: usize,
    /// Whether every coordinate of every event's contribution is at most
    /// [`SMALL_COORDINATE`] (the plan's per-event bounds say so): blocks are then summed
    /// in `i64` ([`Contributor::add_block`]).
    small: bool,
}

impl Contributor {
    /// The contributor of `plan`.
    pub fn new(plan: &Plan) -> Contributor {
        let mut width = 0;
        let stats: Vec<StatLayout> = plan
            .stats
            .iter()
            .map(|s| StatLayout {
                fields: s
                    .groups
                    .fields
                    .iter()
                    .map(|(_, keys, cat)| {
                        let map = plan.categories[*cat]
                            .1
                            .iter()
                            .map(|d| keys.iter().position(|k| k == d).map(|i| i as u32))
                            .collect();
                        (*cat, map, keys.len())
                    })
                    .collect(),
                components: s
                    .components
                    .iter()
                    .map(|c| {
                        let offset = width;
                        width += c.dim;
                        (c.clone(), offset)
                    })
                    .collect(),
            })
            .collect();
        let spans = stats
            .iter()
            .map(|s| {
                s.components
                    .iter()
                    .map(|(c, offset)| (*offset, c.dim))
                    .collect()
            })
            .collect();
        // The per-event bound √event_sens_sq is rigorous (rounding included, see
        // `plan::event_sens_sq`); compared in f64, where 2^51 is exact.
        let small = plan
            .stats
            .iter()
            .flat_map(|s| &s.components)
            .all(|c| c.event_sens_sq.sqrt() <= SMALL_COORDINATE as f64);
        Contributor {
            stats,
            spans,
            width,
            small,
        }
    }

    /// The contribution of `ev` (an event parsed with this plan's schema).
    pub fn contribution(&self, ev: &Event) -> Contribution {
        let mut groups = SmallVec::with_capacity(self.stats.len());
        let mut values = SmallVec::from_elem(0, self.width);
        self.fill(ev, &mut groups, &mut values);
        Contribution { groups, values }
    }

    /// Pushes `ev`'s group in each statistic onto `groups` and adds its values to
    /// `values` (zeros, `width` long).
    fn fill(&self, ev: &Event, groups: &mut SmallVec<[u32; 6]>, values: &mut [i128]) {
        for s in &self.stats {
            let group = group_of(&s.fields, ev);
            groups.push(group.unwrap_or(NOT_PART));
            if group.is_none() {
                continue;
            }
            for (c, offset) in &s.components {
                contribute(c, ev, &mut values[*offset..*offset + c.dim]);
            }
        }
    }

    /// Adds `ev`'s contribution to a window aggregate (see [`Contributor::add`]): exactly
    /// `add(&contribution(ev), aggregate)`, without building the [`Contribution`] (the
    /// values stay on the stack for plans up to 16 coordinates).
    pub fn add_event(&self, ev: &Event, aggregate: &mut [Vec<Vec<i128>>]) {
        if self.width > INLINE_VALUES {
            self.add(&self.contribution(ev), aggregate);
            return;
        }
        let mut groups = SmallVec::with_capacity(self.stats.len());
        let mut values = [0i128; INLINE_VALUES];
        self.fill(ev, &mut groups, &mut values[..self.width]);
        self.add_values(&groups, &values[..self.width], aggregate);
    }

    /// Adds the contribution of every `events[i]` with `kept[i]` to a window aggregate:
    /// exactly `add_event` of each in turn, shared among `threads` threads (the calling
    /// thread included) when the batch is large enough to repay starting them (issue 9:
    /// these contributions were 44% of the engine thread of a two-thread replay).
    ///
    /// # Why the result does not depend on `threads`
    /// Each helper sums the blocks it takes into its own zeroed aggregate, which is then
    /// added to `aggregate`; how the blocks fall to threads depends on scheduling. Integer
    /// addition is associative and commutative, so the result is the sequential one as
    /// long as no `saturating_add` saturates, and none can: a contribution coordinate is at
    /// most its component's per-event bound √`event_sens_sq` (a coordinate is at most the
    /// vector's L2 norm), at most `leaf_bound` = k·√`event_sens_sq` ≤ 2^80 by the plan's
    /// accumulator guard (`leaf_bound` · 2^40 · T ≤ 2^120, in `plan`'s `plan_component`), and a
    /// window holds fewer than 2^32 events (`bound`'s sequence numbers are u32), so every
    /// partial and total sum stays below 2^112, far inside i128. The test
    /// `contribution_coordinates_stay_within_the_per_event_bound` checks the first step
    /// on extreme events.
    ///
    /// # Panics
    /// If `kept.len() != events.len()`, or (re-raised) if a helper thread panics.
    pub fn add_kept(
        &self,
        events: &[Event],
        kept: &[bool],
        aggregate: &mut [Vec<Vec<i128>>],
        threads: usize,
    ) {
        self.add_kept_from(events, kept, aggregate, threads, PARALLEL_MIN_EVENTS);
    }

    /// [`Contributor::add_kept`] with the batch size from which helpers start (tests).
    fn add_kept_from(
        &self,
        events: &[Event],
        kept: &[bool],
        aggregate: &mut [Vec<Vec<i128>>],
        threads: usize,
        min_events: usize,
    ) {
        assert_eq!(kept.len(), events.len(), "one flag per event");
        // A helper zeroes, fills and hands back a whole aggregate: only worth it when the
        // batch is several times the aggregate's size.
        if threads <= 1
            || events.len() < min_events
            || events.len() < 4 * aggregate.iter().flatten().map(Vec::len).sum::<usize>()
        {
            for (block, flags) in events
                .chunks(PARALLEL_BLOCK)
                .zip(kept.chunks(PARALLEL_BLOCK))
            {
                self.add_block(block, flags, aggregate);
            }
            return;
        }
        let next = AtomicUsize::new(0);
        let work = |into: &mut [Vec<Vec<i128>>]| take_blocks(self, &next, events, kept, into);
        let shape = shape_of(aggregate);
        std::thread::scope(|scope| {
            let helpers: Vec<_> = (1..threads)
                .map(|_| {
                    scope.spawn(|| {
                        let mut part = zeros(&shape);
                        (work(&mut part) > 0).then_some(part)
                    })
                })
                .collect();
            work(aggregate);
            for helper in helpers {
                let part = helper
                    .join()
                    .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
                if let Some(part) = part {
                    merge(aggregate, &part);
                }
            }
        });
    }

    /// `add_event` of each `events[i]` with `kept[i]` (at most [`PARALLEL_BLOCK`] events),
    /// summed in `i64` first when the plan allows (issue 9: building each event's `i128`
    /// values and adding them into the nested aggregate one by one cost a fifth of the
    /// contributions).
    ///
    /// # Why the result is `add_event`'s
    /// When `small`, every coordinate is at most [`SMALL_COORDINATE`] = 2^51 in magnitude,
    /// so the at most 1,024 values that fall in one aggregate slot sum to at most 2^61:
    /// each flat `i64` partial sum is exact. Each is then added to the aggregate once: the
    /// same integers added in another order, which gives the same total because no window
    /// sum saturates (see [`Contributor::add_kept`]). Plans whose bounds allow larger
    /// values, plans of more than [`INLINE_VALUES`] coordinates and aggregates of more
    /// than [`BLOCK_SLOTS`] slots (many groups: zeroing and adding back the partial sums
    /// would cost more than they save) take `add_event` itself.
    fn add_block(&self, events: &[Event], kept: &[bool], aggregate: &mut [Vec<Vec<i128>>]) {
        // The i64 partial sums are exact for at most PARALLEL_BLOCK events (see above).
        assert!(
            events.len() <= PARALLEL_BLOCK,
            "a block of {} events",
            events.len()
        );
        let slots: usize = aggregate.iter().flatten().map(Vec::len).sum();
        if !self.small || self.width > INLINE_VALUES || slots > BLOCK_SLOTS {
            for (ev, _) in events.iter().zip(kept).filter(|(_, k)| **k) {
                self.add_event(ev, aggregate);
            }
            return;
        }
        // Where each (statistic, component) starts in the flat partial sums, and its length.
        let mut bases: SmallVec<[(usize, usize); INLINE_VALUES]> = SmallVec::new();
        let mut at = 0;
        for slot in aggregate.iter().flatten() {
            bases.push((at, slot.len()));
            at += slot.len();
        }
        let mut partial = [0i64; BLOCK_SLOTS];
        for (ev, _) in events.iter().zip(kept).filter(|(_, k)| **k) {
            let mut bases = bases.iter();
            for s in &self.stats {
                let group = group_of(&s.fields, ev);
                for ((c, _), &(base, len)) in s.components.iter().zip(bases.by_ref()) {
                    let Some(g) = group else { continue };
                    // The group's place in its slot, checked as `add_values` indexes it.
                    let from = g as usize * c.dim;
                    assert!(from + c.dim <= len, "group {g} outside its aggregate");
                    let to = &mut partial[base + from..base + from + c.dim];
                    contribute_with(c, ev, |k, v| {
                        debug_assert!(v.unsigned_abs() <= SMALL_COORDINATE as u128);
                        to[k] += v as i64;
                    });
                }
            }
        }
        for (slot, &(base, len)) in aggregate.iter_mut().flatten().zip(&bases) {
            for (acc, v) in slot.iter_mut().zip(&partial[base..base + len]) {
                *acc = acc.saturating_add(i128::from(*v));
            }
        }
    }

    /// Adds `contribution` to a window aggregate laid out as `[stat][component]` → flat
    /// `groups × dim` vectors (the engine's window aggregate). Saturating, like the moment
    /// accumulation: a sum can never wrap around (see `linear::accumulate`).
    pub fn add(&self, contribution: &Contribution, aggregate: &mut [Vec<Vec<i128>>]) {
        self.add_values(&contribution.groups, &contribution.values, aggregate);
    }

    /// [`Contributor::add`] of groups and values, with the statistics' `(offset, dim)`
    /// spans in one small table (issue 9: walking the component plans per event was a
    /// tenth of replay's instructions).
    fn add_values(&self, groups: &[u32], values: &[i128], aggregate: &mut [Vec<Vec<i128>>]) {
        for ((spans, &group), per_component) in self.spans.iter().zip(groups).zip(aggregate) {
            if group == NOT_PART {
                continue;
            }
            let g = group as usize;
            for (&(offset, dim), slot) in spans.iter().zip(per_component.iter_mut()) {
                if dim == 1 {
                    // Counts and sums: one value, no loop.
                    slot[g] = slot[g].saturating_add(values[offset]);
                    continue;
                }
                let to = &mut slot[g * dim..(g + 1) * dim];
                for (acc, v) in to.iter_mut().zip(&values[offset..offset + dim]) {
                    *acc = acc.saturating_add(*v);
                }
            }
        }
    }
}

/// A window aggregate: `[stat][component]` → flat `groups × dim` values.
type Aggregate = Vec<Vec<Vec<i128>>>;

/// The empty window aggregate of `plan`: per statistic and component, `groups × dim` zeros.
pub fn zero_aggregate(plan: &Plan) -> Vec<Vec<Vec<i128>>> {
    plan.stats
        .iter()
        .map(|s| {
            s.components
                .iter()
                .map(|c| vec![0i128; s.groups.len() * c.dim])
                .collect()
        })
        .collect()
}

/// The contributions of a closed window's survivors, shared with threads that offer help
/// between their own jobs (the replay's parse workers, through a [`HelpBoard`]): the
/// engine thread and the helpers take blocks of 1,024 events from an atomic
/// counter, each sums its blocks into its own aggregate, and the engine adds the helpers'
/// sums when every block is done ([`SharedSum::finish`]). Unlike the scoped helpers of
/// [`Contributor::add_kept`], no thread is started, and no thread competes with the
/// parse worker for its core.
///
/// The result does not depend on which thread takes which block: see
/// [`Contributor::add_kept`] for why these sums cannot saturate.
#[derive(Debug)]
pub struct SharedSum {
    contributor: Arc<Contributor>,
    /// The window's events (read by every helper; taken back by the engine at the end).
    events: RwLock<Vec<Event>>,
    kept: Vec<bool>,
    blocks: usize,
    /// The next block to take.
    next: AtomicUsize,
    /// The helpers' sum so far and the number of blocks they have finished.
    helped: Mutex<(Option<Aggregate>, usize)>,
    /// Signalled when a helper finishes its blocks.
    progress: Condvar,
    /// The aggregate's shape (`[stat][component]` lengths), for the helpers' sums.
    shape: Vec<Vec<usize>>,
}

impl SharedSum {
    /// The sum of the `events[i]` with `kept[i]` into an aggregate shaped like `like`.
    ///
    /// # Panics
    /// If `kept.len() != events.len()`.
    pub fn new(
        contributor: Arc<Contributor>,
        events: Vec<Event>,
        kept: Vec<bool>,
        like: &[Vec<Vec<i128>>],
    ) -> SharedSum {
        assert_eq!(kept.len(), events.len(), "one flag per event");
        SharedSum {
            contributor,
            blocks: events.len().div_ceil(PARALLEL_BLOCK),
            events: RwLock::new(events),
            kept,
            next: AtomicUsize::new(0),
            helped: Mutex::new((None, 0)),
            progress: Condvar::new(),
            shape: shape_of(like),
        }
    }

    /// A helper's turn: takes blocks until none is left and hands its sum over. Returns at
    /// once when every block is taken.
    pub fn help(&self) {
        if self.next.load(Ordering::Relaxed) >= self.blocks {
            return;
        }
        let mut part = zeros(&self.shape);
        let taken = {
            let events = self.events.read().unwrap_or_else(PoisonError::into_inner);
            take_blocks(
                &self.contributor,
                &self.next,
                &events,
                &self.kept,
                &mut part,
            )
        };
        if taken == 0 {
            return;
        }
        let mut helped = self.helped.lock().unwrap_or_else(PoisonError::into_inner);
        match &mut helped.0 {
            Some(sum) => merge(sum, &part),
            None => helped.0 = Some(part),
        }
        helped.1 += taken;
        drop(helped);
        self.progress.notify_all();
    }

    /// The engine's turn: takes the blocks left, waits for the helpers' blocks, adds
    /// everything into `into` and returns the event vector (for reuse).
    pub fn finish(&self, into: &mut [Vec<Vec<i128>>]) -> Vec<Event> {
        let mine = {
            let events = self.events.read().unwrap_or_else(PoisonError::into_inner);
            take_blocks(&self.contributor, &self.next, &events, &self.kept, into)
        };
        let mut helped = self.helped.lock().unwrap_or_else(PoisonError::into_inner);
        while helped.1 + mine < self.blocks {
            helped = self
                .progress
                .wait(helped)
                .unwrap_or_else(PoisonError::into_inner);
        }
        if let Some(sum) = helped.0.take() {
            merge(into, &sum);
        }
        drop(helped);
        // Every block is summed, so no helper holds the events any more.
        std::mem::take(&mut *self.events.write().unwrap_or_else(PoisonError::into_inner))
    }
}

/// Adds aggregate `part` into `into` (same shape): see [`Contributor::add_kept`] for
/// why this saturating addition never saturates on window aggregates.
pub fn merge(into: &mut [Vec<Vec<i128>>], part: &[Vec<Vec<i128>>]) {
    for (to, from) in into.iter_mut().flatten().zip(part.iter().flatten()) {
        for (acc, v) in to.iter_mut().zip(from) {
            *acc = acc.saturating_add(*v);
        }
    }
}

/// Takes blocks of [`PARALLEL_BLOCK`] events from the counter `next` until none of
/// `events` is left and adds their survivors (`kept`) into `into`; returns how many blocks
/// it took. Shared by every thread working on one window's sum.
fn take_blocks(
    contributor: &Contributor,
    next: &AtomicUsize,
    events: &[Event],
    kept: &[bool],
    into: &mut [Vec<Vec<i128>>],
) -> usize {
    let blocks = events.len().div_ceil(PARALLEL_BLOCK);
    let mut taken = 0;
    loop {
        let b = next.fetch_add(1, Ordering::Relaxed);
        if b >= blocks {
            return taken;
        }
        let range = b * PARALLEL_BLOCK..((b + 1) * PARALLEL_BLOCK).min(events.len());
        contributor.add_block(&events[range.clone()], &kept[range], into);
        taken += 1;
    }
}

/// The `[stat][component]` lengths of an aggregate.
fn shape_of(aggregate: &[Vec<Vec<i128>>]) -> Vec<Vec<usize>> {
    aggregate
        .iter()
        .map(|per| per.iter().map(Vec::len).collect())
        .collect()
}

/// A zero aggregate of the given shape.
fn zeros(shape: &[Vec<usize>]) -> Aggregate {
    shape
        .iter()
        .map(|per| per.iter().map(|&n| vec![0i128; n]).collect())
        .collect()
}

/// Threads that can lend a hand with a window close: the engine posts a [`SharedSum`]
/// while it works on it and withdraws it when done; a helper calls [`SharedSum::help`]
/// on what is posted, between its own jobs (`scrim replay`'s parse workers, see
/// `runtime::parse_pool`).
pub trait HelpBoard: Send + Sync + std::fmt::Debug {
    /// Offers `sum` to the helpers.
    fn post(&self, sum: Arc<SharedSum>);
    /// Takes the offer back (every block is done).
    fn withdraw(&self);
}

/// The event's group index in one statistic, or `None` when one of its category values
/// is declared for another statistic only.
fn group_of(fields: &[(usize, Vec<Option<u32>>, usize)], ev: &Event) -> Option<u32> {
    let mut g = 0usize;
    for (cat, map, n_keys) in fields {
        let domain_idx = ev.categories[*cat] as usize;
        let k = map.get(domain_idx).copied().flatten()?;
        g = g * n_keys + k as usize;
    }
    u32::try_from(g).ok()
}

/// One event's contribution on the component's grid (see `plan` for the sensitivities),
/// added to `slot` (zeros when called from [`Contributor::contribution`]).
fn contribute(c: &ComponentPlan, ev: &Event, slot: &mut [i128]) {
    contribute_with(c, ev, |k, v| slot[k] = slot[k].saturating_add(v));
}

/// The coordinates of one event's contribution to component `c`, each handed to
/// `add(coordinate, value)`; each is at most √`event_sens_sq` in magnitude (the plan's
/// per-event bound: a coordinate is at most the vector's L2 norm).
#[inline(always)]
fn contribute_with(c: &ComponentPlan, ev: &Event, mut add: impl FnMut(usize, i128)) {
    let q = c.quantum();
    match &c.role {
        ComponentRole::Count => add(0, 1i128 << (-c.grid_exp)),
        ComponentRole::Sum { field, lo, hi } => {
            add(
                0,
                linear::f64_to_i128(linear::round_int(ev.numbers[*field].clamp(*lo, *hi) / q)),
            );
        }
        ComponentRole::CentredSum { field, lo, hi } => {
            let mid = (lo + hi) / 2.0;
            add(
                0,
                linear::f64_to_i128(linear::round_int(
                    (ev.numbers[*field].clamp(*lo, *hi) - mid) / q,
                )),
            );
        }
        ComponentRole::Moments {
            features,
            target,
            layout,
            units,
            ..
        } => {
            // Clip in value units, then centre and normalise (see `plan::MomentUnits`) so the
            // packed moments have comparable scales.
            // x on the stack for up to 16 features, without a collect (issue 9).
            let (mut small, mut large) = ([0.0f64; 16], Vec::new());
            let x = linear::scratch(&mut small, &mut large, features.len());
            for (to, &i) in x.iter_mut().zip(features) {
                *to = ev.numbers[i];
            }
            let mut y = ev.numbers[*target];
            units.normalise(x, &mut y);
            linear::accumulate_with(layout, x, y, c.grid_exp, add);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::engine::event::Numbers;
    use crate::engine::plan::Plan;
    use crate::engine::time::Millis;

    /// Each value against its definition (plan docs): a count adds one event, 2^-e grid
    /// units; a sum adds round(clamp(x)/q) (half away from zero, `f64::round`); a mean's
    /// centred sum adds round((clamp(x) − mid)/q); moments are `linear::accumulate` of the
    /// normalised vector; the group is the mixed-radix index of the event's keys.
    #[test]
    fn contributions_follow_their_definitions() {
        check_definitions(crate::app::DEMO_CONFIG, false);
    }

    /// The same with a budget so large that the grids are fine enough to put values beyond
    /// i64: the contribution is then held in i128, with the same values.
    #[test]
    fn contributions_beyond_i64_follow_their_definitions() {
        let fine = crate::app::DEMO_CONFIG
            .replace("rho_per_epoch = 1.0 ", "rho_per_epoch = 1e30 ")
            .replace("lifetime_rho = 4.0 ", "lifetime_rho = 4e30 ");
        assert_ne!(
            fine,
            crate::app::DEMO_CONFIG,
            "the demo config's budget lines moved"
        );
        check_definitions(&fine, true);
    }

    fn check_definitions(config_text: &str, wide: bool) {
        let config = Config::from_toml_str(config_text).expect("demo config");
        let plan = Plan::new(&config).expect("demo plan");
        let contributor = Contributor::new(&plan);
        let index = |names: &[String], name: &str| names.iter().position(|n| n == name).unwrap();
        let cat_names: Vec<String> = plan.categories.iter().map(|(n, _)| n.clone()).collect();
        let value_of = |field: &str, key: &str| {
            let (_, domain) = &plan.categories[index(&cat_names, field)];
            domain.iter().position(|d| d == key).unwrap() as u32
        };
        let mut categories = crate::engine::event::Categories::new();
        categories.resize(plan.categories.len(), 0);
        categories[index(&cat_names, "zone")] = value_of("zone", "riverside");
        categories[index(&cat_names, "mode")] = value_of("mode", "ferry");
        let mut numbers = Numbers::new();
        numbers.resize(plan.numbers.len(), 0.0);
        numbers[index(&plan.numbers, "fare_cents")] = 1234.5; // above the range: clamped
        numbers[index(&plan.numbers, "trip_minutes")] = 17.3;
        numbers[index(&plan.numbers, "trip_km")] = 6.2;
        numbers[index(&plan.numbers, "transfers")] = 1.0;
        let ev = Event {
            time: Millis(0),
            unit: Some(1),
            categories,
            numbers: numbers.clone(),
        };
        let c = contributor.contribution(&ev);
        assert_eq!(
            c.values.iter().any(|v| i64::try_from(*v).is_err()),
            wide,
            "values beyond i64"
        );
        let values: Vec<i128> = c.values.to_vec();
        let mut offset = 0;
        for (s, &group) in plan.stats.iter().zip(&c.groups) {
            let want_group = match s.name.as_str() {
                "taps_by_zone" => 3, // riverside in the stat's key list
                "taps_by_mode" => 1, // ferry
                _ => 0,
            };
            assert_eq!(group, want_group, "{}", s.name);
            for comp in &s.components {
                let got = &values[offset..offset + comp.dim];
                let q = 2f64.powi(comp.grid_exp);
                let want: Vec<i128> = match &comp.role {
                    ComponentRole::Count => vec![1i128 << -comp.grid_exp],
                    ComponentRole::Sum { field, lo, hi } => {
                        vec![(numbers[*field].clamp(*lo, *hi) / q).round() as i128]
                    }
                    ComponentRole::CentredSum { field, lo, hi } => {
                        let mid = (lo + hi) / 2.0;
                        vec![((numbers[*field].clamp(*lo, *hi) - mid) / q).round() as i128]
                    }
                    ComponentRole::Moments {
                        features,
                        target,
                        layout,
                        units,
                        ..
                    } => {
                        let mut x: Vec<f64> = features.iter().map(|&i| numbers[i]).collect();
                        let mut y = numbers[*target];
                        units.normalise(&mut x, &mut y);
                        let mut acc = vec![0i128; comp.dim];
                        linear::accumulate(layout, &x, y, comp.grid_exp, &mut acc);
                        acc
                    }
                };
                assert_eq!(got, want.as_slice(), "{}", s.name);
                offset += comp.dim;
            }
        }
        assert_eq!(offset, values.len());

        // Adding to an aggregate puts exactly these values at the group's slot.
        let mut agg = zero_aggregate(&plan);
        contributor.add(&c, &mut agg);
        contributor.add(&c, &mut agg);
        let zone = plan
            .stats
            .iter()
            .position(|s| s.name == "taps_by_zone")
            .unwrap();
        let count = 1i128 << -plan.stats[zone].components[0].grid_exp;
        assert_eq!(agg[zone][0], vec![0, 0, 0, 2 * count, 0]);
        // `add_event`, the engine's path, adds exactly the same.
        let mut by_event: Vec<Vec<Vec<i128>>> = agg
            .iter()
            .map(|per| per.iter().map(|v| vec![0; v.len()]).collect())
            .collect();
        contributor.add_event(&ev, &mut by_event);
        contributor.add_event(&ev, &mut by_event);
        assert_eq!(by_event, agg);
    }

    /// Demo events with varied keys and values, some outside the clamp ranges.
    fn varied_events(plan: &Plan, n: usize) -> Vec<Event> {
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = move || {
            // xorshift64*: invented test data, any spread will do.
            state ^= state >> 12;
            state ^= state << 25;
            state ^= state >> 27;
            state.wrapping_mul(0x2545_f491_4f6c_dd1d)
        };
        (0..n)
            .map(|_| Event {
                time: Millis(0),
                unit: Some(next()),
                categories: plan
                    .categories
                    .iter()
                    .map(|(_, domain)| (next() % domain.len() as u64) as u32)
                    .collect(),
                numbers: plan
                    .numbers
                    .iter()
                    .map(|_| (next() % 4001) as f64 * 0.37 - 200.0)
                    .collect(),
            })
            .collect()
    }

    /// `add_kept` on several threads adds exactly what `add_event` of each kept event adds
    /// on one (integer sums, see its doc), whatever the thread count or block sharing; with
    /// the demo's plan, whose blocks are summed in `i64` (`add_block`), and with one whose
    /// grid is so fine that they are not. Events at the ends of every range and beyond them
    /// give the largest coordinates.
    #[test]
    fn add_kept_on_threads_equals_adding_each_kept_event() {
        let fine = crate::app::DEMO_CONFIG
            .replace("rho_per_epoch = 1.0 ", "rho_per_epoch = 1e30 ")
            .replace("lifetime_rho = 4.0 ", "lifetime_rho = 4e30 ");
        for (text, small) in [(crate::app::DEMO_CONFIG, true), (fine.as_str(), false)] {
            let config = Config::from_toml_str(text).expect("config");
            let plan = Plan::new(&config).expect("plan");
            let contributor = Contributor::new(&plan);
            assert_eq!(contributor.small, small, "which path the plan takes");
            let n = 10 * PARALLEL_BLOCK + 77;
            let mut events = varied_events(&plan, n);
            for (i, extreme) in [1e15, -1e15, 0.0, 900.0, 120.0, 30.0].iter().enumerate() {
                for ev in events.iter_mut().skip(i).step_by(7) {
                    ev.numbers.iter_mut().for_each(|x| *x = *extreme);
                }
            }
            let kept: Vec<bool> = (0..n).map(|i| i % 3 != 1).collect();
            let mut want = zero_aggregate(&plan);
            for (ev, _) in events.iter().zip(&kept).filter(|(_, k)| **k) {
                contributor.add_event(ev, &mut want);
            }
            for threads in [1, 2, 3, 8] {
                let mut got = zero_aggregate(&plan);
                contributor.add_kept_from(&events, &kept, &mut got, threads, 0);
                assert_eq!(got, want, "{threads} threads, small {small}");
            }
            // Adding to a non-empty aggregate keeps what it held.
            let mut twice = want.clone();
            contributor.add_kept_from(&events, &kept, &mut twice, 2, 0);
            for (t, w) in twice
                .iter()
                .flatten()
                .flatten()
                .zip(want.iter().flatten().flatten())
            {
                assert_eq!(*t, 2 * w);
            }
        }
    }

    /// A [`SharedSum`] finished by the engine while 0 to 3 helpers call `help` (some
    /// before, some after the last block is taken) adds exactly what `add_event` of each
    /// kept event adds, and gives the events back.
    #[test]
    fn shared_sum_with_helpers_equals_adding_each_kept_event() {
        let config = Config::from_toml_str(crate::app::DEMO_CONFIG).expect("demo config");
        let plan = Plan::new(&config).expect("demo plan");
        let contributor = Arc::new(Contributor::new(&plan));
        let n = 12 * PARALLEL_BLOCK + 5;
        let events = varied_events(&plan, n);
        let kept: Vec<bool> = (0..n).map(|i| i % 4 != 2).collect();
        let mut want = zero_aggregate(&plan);
        contributor.add_kept(&events, &kept, &mut want, 1);
        for helpers in 0..4 {
            let mut got = zero_aggregate(&plan);
            let sum = Arc::new(SharedSum::new(
                contributor.clone(),
                events.clone(),
                kept.clone(),
                &got,
            ));
            let back = std::thread::scope(|scope| {
                for _ in 0..helpers {
                    let sum = Arc::clone(&sum);
                    scope.spawn(move || {
                        sum.help();
                        sum.help();
                    });
                }
                sum.finish(&mut got)
            });
            sum.help(); // nothing left: returns at once
            assert_eq!(got, want, "{helpers} helpers");
            assert_eq!(back.len(), n, "the events come back");
        }
    }

    /// The first step of `add_kept`'s argument that its sums never saturate: every
    /// coordinate of one event's contribution is at most its component's per-event bound
    /// √event_sens_sq, and that bound is at most 2^80 (the plan's accumulator guard). On
    /// extreme and varied events, with the demo's budget and one so large that values go
    /// beyond i64.
    #[test]
    fn contribution_coordinates_stay_within_the_per_event_bound() {
        let fine = crate::app::DEMO_CONFIG
            .replace("rho_per_epoch = 1.0 ", "rho_per_epoch = 1e30 ")
            .replace("lifetime_rho = 4.0 ", "lifetime_rho = 4e30 ");
        for text in [crate::app::DEMO_CONFIG, fine.as_str()] {
            let plan = Plan::new(&Config::from_toml_str(text).expect("config")).expect("plan");
            let contributor = Contributor::new(&plan);
            let mut events = varied_events(&plan, 2000);
            for extreme in [1e15, -1e15, 0.0, 5e-324] {
                let mut ev = events[0].clone();
                ev.numbers.iter_mut().for_each(|x| *x = extreme);
                events.push(ev);
            }
            for ev in &events {
                let c = contributor.contribution(ev);
                let mut offset = 0;
                for s in &plan.stats {
                    for comp in &s.components {
                        let bound = comp.event_sens_sq.sqrt();
                        assert!(bound <= 2f64.powi(80), "{}: bound {bound}", s.name);
                        for v in &c.values[offset..offset + comp.dim] {
                            assert!((*v as f64).abs() <= bound, "{}: {v} > {bound}", s.name);
                        }
                        offset += comp.dim;
                    }
                }
            }
        }
    }

    /// A category value declared for another statistic only leaves that statistic alone.
    #[test]
    fn values_outside_a_statistics_keys_are_not_part_of_it() {
        let toml = r#"
[input]
time_field = "ts"
[window]
length = "1h"
[privacy]
rho_per_epoch = 1.0
delta = 1e-9
epoch_windows = 4
[[stats]]
name = "some"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a"]
[[stats]]
name = "all"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a", "b"]
"#;
        let plan = Plan::new(&Config::from_toml_str(toml).expect("config")).expect("plan");
        let contributor = Contributor::new(&plan);
        let b = plan.categories[0].1.iter().position(|d| d == "b").unwrap() as u32;
        let ev = Event {
            time: Millis(0),
            unit: None,
            categories: [b].into_iter().collect(),
            numbers: Numbers::new(),
        };
        let c = contributor.contribution(&ev);
        assert_eq!(c.groups.as_slice(), [NOT_PART, 1]);
        assert_eq!(
            c.values[0], 0,
            "nothing computed for a statistic it is not part of"
        );
    }
}
