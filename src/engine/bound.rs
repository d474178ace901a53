//! Contribution bounding per privacy unit: at most `k` events per unit per window and at
//! most `m` windows per unit per epoch, enforced before aggregation.
//!
//! # Why the choice of survivors is safe and unbiased
//! Removing one unit from the input must change only that unit's own contribution
//! (privacy-math §8, \[D\]). Every decision here looks at one unit's own events only:
//!
//! - **Events per window.** Each event has a priority, a keyed hash of the unit and the
//!   event's content (time, categories, numbers). The `k` events with the smallest
//!   priorities survive (bottom-k sampling). The priority does not depend on arrival
//!   order or on other units, and being a keyed pseudo-random function of the content it is
//!   uncorrelated with the values, so the kept events are a uniform sample of the unit's
//!   events in that window (unlike "first k", which keeps early events when arrival order
//!   correlates with values). Events with identical content get identical priorities;
//!   they are interchangeable, so ties cannot bias anything.
//! - **Windows per epoch.** Windows close in time order; a unit's first `m` non-empty
//!   windows of an epoch are kept and the rest of its events in that epoch are dropped.
//!   Streaming release cannot look ahead, so "first m windows" is the only causal rule.
//!
//! # Memory
//! Unit ids are never stored: the parser hands over a keyed 64-bit hash. The epoch table
//! holds one `u64 → u32` entry per active unit (the number of windows used), 16 to 32 bytes
//! per unit (see `EpochTable`). Open windows
//! hold at most about `2k` events per unit, so their size is bounded by the number of
//! active units, not by the event rate: an open window buffers its events and compacts the
//! buffer to each unit's `k` smallest priorities whenever it doubles.

use std::collections::BTreeMap;

use crate::engine::event::Event;

/// One buffered event's key; `seq` indexes [`WindowBuffer::events`] and grows with
/// arrival, so sorting keys lists each unit's events in arrival order. `unit` is the
/// unit's [`mix`]ed id: a bijection of the unit hash, so it groups events exactly as the
/// hash does, and uniform even when the hashes are not (small test ids).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, PartialOrd, Ord)]
struct Key {
    unit: u64,
    seq: u32,
}

/// Smallest buffer that triggers a compaction (see [`WindowBuffer`]).
const MIN_COMPACT_AT: usize = 4096;

/// The buffered events of one open window. Offering an event only appends its key and
/// its payload (sequential writes: no per-unit lookup, which cost a cache miss per event,
/// issue 9); the bottom-k choice is made by sorting the keys, at close and whenever the
/// buffer reaches `compact_at`. A compaction keeps each unit's `k` smallest priorities,
/// frees the rest and sets `compact_at` to twice what it kept (at least
/// [`MIN_COMPACT_AT`]); a recycled buffer starts at twice the survivors of the window that
/// used it last. So the buffer never holds more than about twice `k` events per unit (of
/// this window or the previous one) plus a constant, whatever the event rate, and the
/// sorting costs O(log n) per event amortised. Priorities are computed only for units with
/// more than `k` events buffered: the others keep every event whatever their priorities.
#[derive(Debug)]
struct WindowBuffer<T> {
    keys: Vec<Key>,
    events: Vec<T>,
    compact_at: usize,
    /// Scratch for one unit's `(priority, seq)` pairs.
    run: Vec<(u64, u32)>,
    /// Scratch for [`sort_keys`].
    sorting: SortScratch,
}

impl<T> WindowBuffer<T> {
    fn new(compact_floor: usize) -> Self {
        WindowBuffer {
            keys: Vec::new(),
            events: Vec::new(),
            compact_at: compact_floor,
            run: Vec::new(),
            sorting: SortScratch::default(),
        }
    }

    fn clear(&mut self, compact_at: usize) {
        self.keys.clear();
        self.events.clear();
        self.compact_at = compact_at;
    }

    /// Sorts the keys by `(unit, seq)` (see [`sort_keys`]) and returns the number of
    /// distinct units.
    fn sort(&mut self) -> usize {
        sort_keys(&mut self.keys, &mut self.sorting);
        usize::from(!self.keys.is_empty())
            + self
                .keys
                .windows(2)
                .filter(|w| w[0].unit != w[1].unit)
                .count()
    }

    /// Calls `each(unit, seq, rank)` for every buffered event, unit by unit, with `rank`
    /// the event's position among its unit's events by `(priority, seq)` (0 = smallest
    /// priority; earlier arrivals first among equal priorities) when the unit has more
    /// than `k` events, and its arrival position otherwise (all below `k`, so all survive
    /// whatever the priorities: they are not computed).
    ///
    /// The keys must be sorted ([`WindowBuffer::sort`]).
    fn ranked(
        &mut self,
        k: usize,
        priority: &impl Fn(&T) -> u64,
        mut each: impl FnMut(u64, u32, usize),
    ) {
        let keys = &self.keys;
        let mut start = 0;
        while start < keys.len() {
            let unit = keys[start].unit;
            // A linear scan: groups are short (the loop below visits each key anyway), and
            // a binary search over the rest of the window cost a cache miss per unit.
            let end = keys[start + 1..]
                .iter()
                .position(|key| key.unit != unit)
                .map_or(keys.len(), |len| start + 1 + len);
            let group = &keys[start..end];
            if group.len() <= k {
                for (rank, key) in group.iter().enumerate() {
                    each(unit, key.seq, rank);
                }
            } else {
                self.run.clear();
                self.run.extend(
                    group
                        .iter()
                        .map(|key| (priority(&self.events[key.seq as usize]), key.seq)),
                );
                self.run.sort_unstable();
                for (rank, &(_, seq)) in self.run.iter().enumerate() {
                    each(unit, seq, rank);
                }
            }
            start = end;
        }
    }

    /// Drops every event beyond its unit's `k` smallest keys; returns how many it dropped.
    /// The survivors keep their arrival order (and so their tie order).
    fn compact(&mut self, k: usize, compact_floor: usize, priority: &impl Fn(&T) -> u64) -> u64 {
        self.sort();
        let mut keep = vec![false; self.events.len()];
        self.ranked(k, priority, |_, seq, rank| keep[seq as usize] = rank < k);
        let before = self.events.len();
        let mut flags = keep.iter();
        self.events
            .retain(|_| *flags.next().expect("one flag per event"));
        // New seq = rank among the survivors in arrival order.
        let mut new_seq = Vec::with_capacity(keep.len());
        let mut next = 0u32;
        for kept in &keep {
            new_seq.push(next);
            next += u32::from(*kept);
        }
        self.keys.retain(|key| keep[key.seq as usize]);
        for key in &mut self.keys {
            key.seq = new_seq[key.seq as usize];
        }
        self.compact_at = (2 * self.events.len()).max(compact_floor);
        (before - self.events.len()) as u64
    }
}

/// The bounder's internal id of a unit hash: a bijection of it (multiplication by an odd
/// constant, then folding the high half down, both invertible), so distinct units keep
/// distinct ids. Unit hashes are outputs of the engine's keyed hash, already uniform 64-bit
/// values that nobody without the key can steer; mixing keeps the ids uniform when they are
/// not (tests use small ids), because the epoch table places a unit by the top bits of its
/// id and [`sort_keys`] buckets by them.
#[inline]
fn mix(unit: u64) -> u64 {
    // 2^64 / φ, the multiplier of Fibonacci hashing (Knuth, TAOCP vol. 3, §6.4).
    let p = unit.wrapping_mul(0x9e37_79b9_7f4a_7c15);
    p ^ (p >> 32)
}

/// Scratch buffers of [`sort_keys`], kept with the window buffer so sorting does not
/// allocate once the window has reached its size.
#[derive(Debug, Default)]
struct SortScratch {
    keys: Vec<Key>,
    ends: Vec<u32>,
}

/// Sorts keys by `(unit, seq)`, exactly as `sort_unstable`: a counting pass on the top
/// bits of the (uniform) unit ids puts them into about one bucket per key, then each bucket
/// with more than one key is sorted, in two linear passes plus tiny sorts instead of
/// O(n log n) comparisons (issue 9: the sort was 4% of replay). A bucket of one flooding
/// unit is already in order (the pass is stable and keys arrive in `seq` order), which the
/// standard sort detects in linear time; a bucket of many units costs O(b log b).
fn sort_keys(keys: &mut Vec<Key>, scratch: &mut SortScratch) {
    let n = keys.len();
    if n < 64 {
        keys.sort_unstable();
        return;
    }
    // About one bucket per key: bits = floor(log2 n), at most 2^20 buckets.
    let bits = (usize::BITS - 1 - n.leading_zeros()).min(20);
    let shift = 64 - bits;
    let ends = &mut scratch.ends;
    ends.clear();
    ends.resize((1 << bits) + 1, 0);
    for key in keys.iter() {
        ends[(key.unit >> shift) as usize + 1] += 1;
    }
    for b in 1..ends.len() {
        ends[b] += ends[b - 1];
    }
    // `ends[b]` is now where bucket b starts; filling moves it to where bucket b ends.
    let sorted = &mut scratch.keys;
    sorted.clear();
    sorted.resize(n, Key::default());
    for key in keys.iter() {
        let at = &mut ends[(key.unit >> shift) as usize];
        sorted[*at as usize] = *key;
        *at += 1;
    }
    let mut start = 0;
    for &end in &ends[..1 << bits] {
        let end = end as usize;
        if end - start > 1 {
            sorted[start..end].sort_unstable();
        }
        start = end;
    }
    std::mem::swap(keys, sorted);
}

/// Windows used this epoch, per unit (by [`mix`]ed id): an open-addressing table with
/// linear probing whose home slot for an id is the id's top bits. Because the window's keys
/// are sorted by id when it closes, its lookups walk the table from front to back (each a
/// little further on) instead of jumping at random through a table of every active unit,
/// which with a general hash map cost a cache miss per unit and window (issue 9: 9% of
/// replay). Slots hold the id (8 bytes, [`EpochTable::FREE`] when free) and the count (4
/// bytes) in two arrays; the table doubles when it would pass 3/4 full, so it holds 16 to
/// 32 bytes per unit.
#[derive(Debug, Default)]
struct EpochTable {
    ids: Vec<u64>,
    counts: Vec<u32>,
    /// Occupied slots.
    len: usize,
    /// The count of the unit whose id is [`EpochTable::FREE`], which cannot use a slot.
    free_id_count: Option<u32>,
    /// Slots read and searches made, for tests of the probe lengths.
    #[cfg(test)]
    probes: std::cell::Cell<(u64, u64)>,
}

impl EpochTable {
    /// Marks a free slot. Not 0: a table filled with zeros comes from `calloc` as
    /// untouched pages, which the first probe maps to the shared zero page and the first
    /// insert then copies (a write-protect fault that, in a threaded replay, interrupts
    /// the other cores to flush their TLBs: 1.4% of a two-thread replay by perf, issue 9).
    /// Filling with this value writes every page once, at the allocation.
    const FREE: u64 = u64::MAX;
    /// Slots of a table's first allocation.
    const MIN_SLOTS: usize = 1024;

    /// The count of unit id `id`, inserted as 0 if absent.
    fn entry(&mut self, id: u64) -> &mut u32 {
        if id == Self::FREE {
            return self.free_id_count.get_or_insert(0);
        }
        if 4 * (self.len + 1) > 3 * self.ids.len() {
            self.grow();
        }
        let slot = self.find(id);
        if self.ids[slot] == Self::FREE {
            self.ids[slot] = id;
            self.counts[slot] = 0;
            self.len += 1;
        }
        &mut self.counts[slot]
    }

    /// The slot holding `id`, or the free slot where it belongs. The table is never full.
    fn find(&self, id: u64) -> usize {
        let mask = self.ids.len() - 1;
        let mut slot = (id >> (64 - self.ids.len().trailing_zeros())) as usize;
        #[cfg(test)]
        self.probes
            .set((self.probes.get().0, self.probes.get().1 + 1));
        loop {
            #[cfg(test)]
            self.probes
                .set((self.probes.get().0 + 1, self.probes.get().1));
            let there = self.ids[slot];
            if there == id || there == Self::FREE {
                return slot;
            }
            slot = (slot + 1) & mask;
        }
    }

    /// Makes room for `additional` more units, so that no insertion of a pass over a
    /// window grows the table. Growing in the middle of a pass in id order would rehash a set
    /// denser below the pass's position than above it (this window's units so far plus the
    /// table's), and linear probing then builds clusters of hundreds of slots there: about 70%
    /// more instructions in replay before this was added (2.6 billion against 1.5 on the
    /// first 200,000 lines of the bench feed, callgrind).
    fn reserve(&mut self, additional: usize) {
        while 4 * (self.len + additional) > 3 * self.ids.len() {
            self.grow();
        }
    }

    fn grow(&mut self) {
        let slots = (2 * self.ids.len()).max(Self::MIN_SLOTS);
        let ids = std::mem::replace(&mut self.ids, vec![Self::FREE; slots]);
        let counts = std::mem::replace(&mut self.counts, vec![0; slots]);
        for (id, count) in ids.into_iter().zip(counts) {
            if id != Self::FREE {
                let slot = self.find(id);
                self.ids[slot] = id;
                self.counts[slot] = count;
            }
        }
    }

    /// Units in the table.
    fn len(&self) -> usize {
        self.len + usize::from(self.free_id_count.is_some())
    }

    /// Mean distance of the units' slots from their home slots (tests).
    #[cfg(test)]
    fn mean_displacement(&self) -> f64 {
        let slots = self.ids.len();
        if self.len == 0 {
            return 0.0;
        }
        let (mask, shift) = (slots - 1, 64 - slots.trailing_zeros());
        let total: usize = self
            .ids
            .iter()
            .enumerate()
            .filter(|(_, id)| **id != Self::FREE)
            .map(|(slot, id)| slot.wrapping_sub((id >> shift) as usize) & mask)
            .sum();
        total as f64 / self.len as f64
    }

    /// Bytes of the table's arrays.
    fn bytes(&self) -> usize {
        self.ids.capacity() * std::mem::size_of::<u64>()
            + self.counts.capacity() * std::mem::size_of::<u32>()
    }
}

/// The per-unit bounding stage of the engine. `T` is what is retained per event: the
/// engine keeps the parsed event (`core::Retained`); the decisions only ever look at units,
/// windows and priorities.
#[derive(Debug)]
pub struct Bounder<T = Event> {
    max_events_per_window: usize,
    max_windows_per_epoch: u32,
    open: BTreeMap<i64, WindowBuffer<T>>,
    windows_used: EpochTable,
    /// The last closed window's buffers, emptied, for the next window to open: steady
    /// traffic then neither regrows them from empty nor touches fresh pages every window.
    spare: Option<WindowBuffer<T>>,
    /// An event vector handed back after [`Bounder::close_take`], for the next window
    /// that opens without one.
    spare_events: Option<Vec<T>>,
    epoch: Option<u64>,
    /// Smallest buffer that triggers a compaction: [`MIN_COMPACT_AT`], smaller in tests so
    /// that compactions happen.
    compact_floor: usize,
}

/// What closing a window produced.
#[derive(Debug)]
pub struct ClosedWindow<T = Event> {
    /// Events that survive both bounds.
    pub kept: Vec<T>,
    /// Events dropped by the per-window bound (beyond their unit's `k` smallest
    /// priorities) when the window closed; [`Bounder::offer`] reports those dropped
    /// earlier, by compactions.
    pub dropped_by_event_cap: u64,
    /// Events dropped because their unit had used up its windows for the epoch.
    pub dropped_by_window_cap: u64,
}

/// Events dropped when a window closed, by bound.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Dropped {
    /// By the per-window bound (`max_events_per_window`).
    pub by_event_cap: u64,
    /// By the per-epoch bound (`max_windows_per_epoch`).
    pub by_window_cap: u64,
}

/// A closed window's events and a keep flag per event (`true`: survives both bounds), as
/// [`Bounder::close_take`] hands them over.
pub type Taken<T> = (Vec<T>, Vec<bool>);

impl<T> Bounder<T> {
    /// A bounder keeping `k` events per unit per window and `m` windows per unit per epoch.
    pub fn new(max_events_per_window: u32, max_windows_per_epoch: u32) -> Bounder<T> {
        Bounder {
            max_events_per_window: max_events_per_window as usize,
            max_windows_per_epoch,
            open: BTreeMap::new(),
            windows_used: EpochTable::default(),
            spare: None,
            spare_events: None,
            epoch: None,
            compact_floor: MIN_COMPACT_AT,
        }
    }

    /// [`Bounder::new`] with compactions from `compact_floor` buffered events on (tests).
    #[cfg(test)]
    fn with_compact_floor(k: u32, m: u32, compact_floor: usize) -> Bounder<T> {
        Bounder {
            compact_floor: compact_floor.max(1),
            ..Bounder::new(k, m)
        }
    }

    /// Offers an event of `unit` for window `window_idx`. Returns the number of events of
    /// that window dropped by the per-window bound now (by a compaction of its buffer, see
    /// `WindowBuffer`); the others are counted when the window closes. Which events
    /// survive does not depend on when compactions happen. `priority` gives an event's
    /// bounding priority (see the module notes); it is called only for units with more
    /// than `k` events in the window, and must be a function of the event alone.
    pub fn offer(
        &mut self,
        window_idx: i64,
        unit: u64,
        event: T,
        priority: impl Fn(&T) -> u64,
    ) -> u64 {
        let (spare, spare_events, floor) =
            (&mut self.spare, &mut self.spare_events, self.compact_floor);
        let window = self.open.entry(window_idx).or_insert_with(|| {
            let mut window = spare.take().unwrap_or_else(|| WindowBuffer::new(floor));
            if window.events.capacity() == 0
                && let Some(events) = spare_events.take()
            {
                window.events = events;
            }
            window
        });
        // Sequence numbers are u32: a buffer that cannot number another event (2^32 events
        // held in memory, unreachable in practice) drops it rather than mis-order it.
        let Ok(seq) = u32::try_from(window.events.len()) else {
            return 1;
        };
        window.keys.push(Key {
            unit: mix(unit),
            seq,
        });
        window.events.push(event);
        if window.events.len() >= window.compact_at {
            window.compact(self.max_events_per_window, floor, &priority)
        } else {
            0
        }
    }

    /// Closes window `window_idx`, which belongs to `epoch`; windows must be closed in
    /// increasing order. Applies the per-epoch window cap. `priority` as for
    /// [`Bounder::offer`].
    pub fn close(
        &mut self,
        window_idx: i64,
        epoch: u64,
        priority: impl Fn(&T) -> u64,
    ) -> ClosedWindow<T>
    where
        T: Clone,
    {
        let mut kept = Vec::new();
        let dropped = self.close_with(window_idx, epoch, priority, |ev| kept.push(ev.clone()));
        ClosedWindow {
            kept,
            dropped_by_event_cap: dropped.by_event_cap,
            dropped_by_window_cap: dropped.by_window_cap,
        }
    }

    /// [`Bounder::close`] without collecting: hands every surviving event to `keep` (in no
    /// particular order) and returns the numbers dropped by each bound.
    pub fn close_with(
        &mut self,
        window_idx: i64,
        epoch: u64,
        priority: impl Fn(&T) -> u64,
        mut keep: impl FnMut(&T),
    ) -> Dropped {
        let Some((mut window, keep_seq, dropped)) = self.decide(window_idx, epoch, priority) else {
            return Dropped::default();
        };
        // Each event is dropped right after it is read, while it is in cache: dropping them
        // all afterwards read every event from memory a second time (issue 9).
        for (event, kept) in window.events.drain(..).zip(&keep_seq) {
            if *kept {
                keep(&event);
            }
        }
        self.recycle(window, dropped);
        dropped
    }

    /// [`Bounder::close_with`] that hands over all the window's events at once, with a
    /// flag per event (`kept[i]`: `events[i]` survives both bounds), so that the caller can
    /// share the survivors among threads (issue 9). Returns the numbers dropped by each
    /// bound.
    pub fn close_batch(
        &mut self,
        window_idx: i64,
        epoch: u64,
        priority: impl Fn(&T) -> u64,
        batch: impl FnOnce(&[T], &[bool]),
    ) -> Dropped {
        let Some((window, keep_seq, dropped)) = self.decide(window_idx, epoch, priority) else {
            return Dropped::default();
        };
        batch(&window.events, &keep_seq);
        self.recycle(window, dropped);
        dropped
    }

    /// [`Bounder::close_batch`] that hands over the window's events and flags by value, so
    /// that another thread can sum the survivors while this one goes on (`None` when the
    /// window holds no event). Give the vector back with [`Bounder::recycle_events`].
    pub fn close_take(
        &mut self,
        window_idx: i64,
        epoch: u64,
        priority: impl Fn(&T) -> u64,
    ) -> (Dropped, Option<Taken<T>>) {
        let Some((mut window, keep_seq, dropped)) = self.decide(window_idx, epoch, priority) else {
            return (Dropped::default(), None);
        };
        let events = std::mem::take(&mut window.events);
        self.recycle(window, dropped);
        (dropped, Some((events, keep_seq)))
    }

    /// Takes back an event vector from [`Bounder::close_take`] (emptied here), so that a
    /// window opened later need not grow a new one.
    pub fn recycle_events(&mut self, mut events: Vec<T>) {
        events.clear();
        if self
            .spare_events
            .as_ref()
            .is_none_or(|kept| kept.capacity() < events.capacity())
        {
            self.spare_events = Some(events);
        }
    }

    /// Applies both bounds to window `window_idx` (removed from the open windows): its
    /// buffer, a flag per event in arrival order (`true`: kept) and the numbers dropped.
    /// `None` when the window holds no event.
    fn decide(
        &mut self,
        window_idx: i64,
        epoch: u64,
        priority: impl Fn(&T) -> u64,
    ) -> Option<(WindowBuffer<T>, Vec<bool>, Dropped)> {
        if self.epoch != Some(epoch) {
            // Dropped, not cleared: the memory goes back with the old epoch's units.
            self.windows_used = EpochTable::default();
            self.epoch = Some(epoch);
        }
        // Windows before this one can no longer receive events (they are closed too).
        let mut window = self.open.remove(&window_idx)?;
        let (k, m) = (self.max_events_per_window, self.max_windows_per_epoch);
        let windows_used = &mut self.windows_used;
        let mut dropped = Dropped::default();
        let mut admitted = false;
        // Decide on the sorted keys, then hand over the survivors in arrival order: the
        // payloads are read front to back rather than in key order (issue 9).
        let mut keep_seq = vec![false; window.events.len()];
        let units = window.sort();
        windows_used.reserve(units);
        window.ranked(k, &priority, |unit, seq, rank| {
            if rank == 0 {
                // The unit's first event: does this window count for it?
                let used = windows_used.entry(unit);
                admitted = *used < m;
                if admitted {
                    *used += 1;
                }
            }
            if rank >= k {
                dropped.by_event_cap += 1;
            } else if admitted {
                keep_seq[seq as usize] = true;
            } else {
                dropped.by_window_cap += 1;
            }
        });
        Some((window, keep_seq, dropped))
    }

    /// Empties a closed window's buffer and keeps it for the next window.
    fn recycle(&mut self, mut window: WindowBuffer<T>, dropped: Dropped) {
        // The next window starts compacting at twice this one's survivors of the per-window
        // bound: steady traffic then needs no compaction before its close, and the buffer
        // stays within twice `k` per unit of a recent window (plus the floor).
        let survivors = window.keys.len() - dropped.by_event_cap as usize;
        window.clear((2 * survivors).max(self.compact_floor));
        self.spare = Some(window);
    }

    /// Units with a window counted in the current epoch.
    pub fn active_units(&self) -> usize {
        self.windows_used.len()
    }

    /// Events buffered in open windows (at most about twice `k` per unit and window, see
    /// `WindowBuffer`).
    pub fn retained_events(&self) -> usize {
        self.open.values().map(|w| w.events.len()).sum()
    }

    /// Bytes held by the per-unit epoch table (the part that scales with distinct units):
    /// 12 bytes per slot, see `EpochTable`.
    pub fn unit_table_bytes(&self) -> usize {
        self.windows_used.bytes()
    }
}

#[cfg(test)]
mod tests {
    use proptest::prelude::Strategy as _;

    use super::*;
    use crate::engine::time::Millis;

    /// Test payload: the event with its priority.
    type P = (u64, Event);

    fn prio(p: &P) -> u64 {
        p.0
    }

    fn offer(b: &mut Bounder<P>, w: i64, unit: u64, priority: u64, e: Event) -> u64 {
        b.offer(w, unit, (priority, e), prio)
    }

    fn close(b: &mut Bounder<P>, w: i64, epoch: u64) -> ClosedWindow<Event> {
        let c = b.close(w, epoch, prio);
        ClosedWindow {
            kept: c.kept.into_iter().map(|p| p.1).collect(),
            dropped_by_event_cap: c.dropped_by_event_cap,
            dropped_by_window_cap: c.dropped_by_window_cap,
        }
    }

    fn ev(t: i64, v: f64) -> Event {
        Event {
            time: Millis(t),
            unit: Some(1),
            categories: [0].into_iter().collect(),
            numbers: [v].into_iter().collect(),
        }
    }

    #[test]
    fn keeps_the_k_smallest_priorities_whatever_the_arrival_order() {
        let prios = [50u64, 10, 40, 30, 20, 60];
        let mut a = Bounder::new(3, 10);
        let mut dropped = 0;
        for (i, p) in prios.iter().enumerate() {
            dropped += offer(&mut a, 0, 7, *p, ev(i as i64, *p as f64));
        }
        let mut b = Bounder::new(3, 10);
        for (i, p) in prios.iter().enumerate().rev() {
            offer(&mut b, 0, 7, *p, ev(i as i64, *p as f64));
        }
        let closed = close(&mut a, 0, 0);
        dropped += closed.dropped_by_event_cap;
        let mut ka: Vec<f64> = closed.kept.iter().map(|e| e.numbers[0]).collect();
        let mut kb: Vec<f64> = close(&mut b, 0, 0)
            .kept
            .iter()
            .map(|e| e.numbers[0])
            .collect();
        ka.sort_by(f64::total_cmp);
        kb.sort_by(f64::total_cmp);
        assert_eq!(ka, vec![10.0, 20.0, 30.0]);
        assert_eq!(ka, kb);
        assert_eq!(dropped, 3);
    }

    #[test]
    fn priorities_are_computed_only_for_units_over_the_bound() {
        // k = 2: 100 units with 2 events each need no priority; one unit with 5 needs 5.
        let calls = std::cell::Cell::new(0u32);
        let counted = |p: &P| {
            calls.set(calls.get() + 1);
            p.0
        };
        let mut b = Bounder::new(2, 10);
        for unit in 0..100u64 {
            for i in 0..2 {
                b.offer(0, unit, (i, ev(0, 1.0)), counted);
            }
        }
        for i in 0..5 {
            b.offer(0, 1_000, (i, ev(0, 1.0)), counted);
        }
        let closed = b.close(0, 0, counted);
        assert_eq!(closed.kept.len(), 200 + 2);
        assert_eq!(closed.dropped_by_event_cap, 3);
        assert_eq!(calls.get(), 5);
    }

    #[test]
    fn a_flooding_unit_cannot_grow_the_buffer() {
        // 100,000 events of one unit and one event each of 1,000 others in one window:
        // compactions keep the buffer within twice the survivors or the floor.
        let mut b = Bounder::new(2, 10);
        let mut dropped = 0;
        for i in 0..100_000u64 {
            dropped += offer(
                &mut b,
                0,
                7,
                i.wrapping_mul(0x9e37_79b9_7f4a_7c15),
                ev(0, 1.0),
            );
            if i % 100 == 0 {
                offer(&mut b, 0, 1_000 + i, i, ev(0, 2.0));
            }
            assert!(b.retained_events() <= MIN_COMPACT_AT.max(2 * (2 + 1_000)));
        }
        let closed = close(&mut b, 0, 0);
        assert_eq!(closed.kept.len(), 2 + 1_000);
        assert_eq!(dropped + closed.dropped_by_event_cap, 100_000 - 2);
    }

    #[test]
    fn window_cap_applies_per_epoch_and_resets() {
        let mut b = Bounder::new(5, 2);
        for w in 0..4 {
            offer(&mut b, w, 9, 1, ev(w, 1.0));
        }
        assert_eq!(close(&mut b, 0, 0).kept.len(), 1);
        assert_eq!(close(&mut b, 1, 0).kept.len(), 1);
        let third = close(&mut b, 2, 0);
        assert_eq!(third.kept.len(), 0);
        assert_eq!(third.dropped_by_window_cap, 1);
        // New epoch: the unit may contribute again.
        assert_eq!(close(&mut b, 3, 1).kept.len(), 1);
    }

    #[test]
    fn other_units_do_not_change_a_units_survivors() {
        // Neighbouring inputs: with and without unit 2. Unit 1's kept events are identical.
        let run = |with_other: bool| {
            let mut b = Bounder::new(2, 1);
            for i in 0..10u64 {
                offer(
                    &mut b,
                    0,
                    1,
                    i.wrapping_mul(0x9e37_79b9_7f4a_7c15),
                    ev(i as i64, i as f64),
                );
                if with_other {
                    offer(&mut b, 0, 2, i, ev(i as i64, 100.0));
                }
            }
            let mut kept: Vec<f64> = close(&mut b, 0, 0)
                .kept
                .iter()
                .filter(|e| e.numbers[0] < 100.0)
                .map(|e| e.numbers[0])
                .collect();
            kept.sort_by(f64::total_cmp);
            kept
        };
        assert_eq!(run(false), run(true));
    }

    /// `mix` is a bijection (so the bounder groups events exactly by unit hash): on
    /// 100,000 consecutive and 100,000 scattered ids it never maps two to one value.
    #[test]
    fn mixing_keeps_distinct_units_distinct() {
        let mut seen = std::collections::HashSet::new();
        for i in 0..100_000u64 {
            assert!(seen.insert(mix(i)));
            assert!(seen.insert(mix(i.wrapping_mul(0xd1b5_4a32_d192_ed03) | 1 << 63)));
        }
    }

    /// Unit ids in sorted passes, as `close_with` makes them: every pass reserves first,
    /// so the table never grows during a pass, and linear probing stays short (mean
    /// displacement from the home slot below 2 slots at up to 3/4 load; Knuth, TAOCP vol. 3,
    /// §6.4, gives about ½(1 + 1/(1 − α)) probes for a successful search, 2.5 at α = 3/4).
    /// Growing in the middle of a pass gave displacements in the hundreds.
    #[test]
    fn epoch_table_passes_stay_short() {
        let mut table = EpochTable::default();
        let mut x = 1u64;
        let mut next = || {
            // Knuth's MMIX linear congruential generator, for reproducible ids.
            x = x
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            x
        };
        let population: Vec<u64> = (0..50_000).map(|_| mix(next())).collect();
        for pass in 0..40 {
            let mut ids: Vec<u64> = (0..3_000)
                .map(|_| population[(next() >> 33) as usize % population.len()])
                .collect();
            ids.sort_unstable();
            ids.dedup();
            table.reserve(ids.len());
            let slots = table.ids.len();
            for id in &ids {
                *table.entry(*id) += 1;
            }
            assert_eq!(table.ids.len(), slots, "pass {pass} grew the table");
            let mean = table.mean_displacement();
            assert!(mean < 2.0, "pass {pass}: mean displacement {mean}");
        }
        // The same through the bounder, whose closes must reserve before their pass; and
        // the searches during the passes must be short too. (The first window of an epoch
        // fills an empty table in id order: growing during that pass would crowd all its
        // units into the low slots, 5 slots read per search here, dozens in replay.)
        let mut b: Bounder<P> = Bounder::new(2, 1_000);
        for w in 0..40 {
            for _ in 0..3_000 {
                let unit = population[(next() >> 33) as usize % population.len()];
                offer(&mut b, w, unit, 0, ev(w, 1.0));
            }
            close(&mut b, w, 0);
            let mean = b.windows_used.mean_displacement();
            assert!(mean < 2.0, "window {w}: mean displacement {mean}");
        }
        let (probes, searches) = b.windows_used.probes.get();
        let per_search = probes as f64 / searches as f64;
        assert!(per_search < 3.0, "{per_search} slots read per search");
    }

    proptest::proptest! {
        /// The epoch table against a `HashMap`: counts, sizes and the id that marks a free
        /// slot, over ids that collide in their top bits, small ids and random ones, with and
        /// without reserving.
        #[test]
        fn epoch_table_counts_like_a_hash_map(
            ids in proptest::collection::vec(
                proptest::prop_oneof![
                    0u64..8,
                    u64::MAX - 7..=u64::MAX,
                    proptest::prelude::any::<u64>(),
                    (0u64..64).prop_map(|i| (7u64 << 58) | i),
                ],
                0..3_000,
            ),
            reserve_first in proptest::prelude::any::<bool>(),
        ) {
            let mut table = EpochTable::default();
            if reserve_first {
                table.reserve(ids.len());
            }
            let mut model = std::collections::HashMap::<u64, u32>::new();
            for id in &ids {
                *table.entry(*id) += 1;
                *model.entry(*id).or_insert(0) += 1;
            }
            proptest::prop_assert_eq!(table.len(), model.len());
            for (id, count) in &model {
                proptest::prop_assert_eq!(*table.entry(*id), *count);
            }
            proptest::prop_assert_eq!(table.len(), model.len());
            // Growth at 3/4 load doubles: at most 8/3 slots of 12 bytes per unit (32 bytes),
            // or per reserved unit.
            let n = if reserve_first { ids.len() } else { model.len() };
            proptest::prop_assert!(table.bytes() <= 12 * (8 * (n + 1) / 3).max(EpochTable::MIN_SLOTS));
        }

        /// [`sort_keys`] gives exactly `sort_unstable` (keys are distinct), for windows of
        /// many units, of one flooding unit, and mixed, around the size where bucketing
        /// starts.
        #[test]
        fn bucket_sort_matches_the_standard_sort(
            units in proptest::collection::vec(
                proptest::prop_oneof![0u64..4, proptest::prelude::any::<u64>()],
                0..1_500,
            ),
        ) {
            let keys: Vec<Key> = units
                .iter()
                .enumerate()
                .map(|(seq, unit)| Key { unit: mix(*unit), seq: seq as u32 })
                .collect();
            let mut want = keys.clone();
            want.sort_unstable();
            let mut got = keys;
            let mut scratch = SortScratch::default();
            sort_keys(&mut got, &mut scratch);
            proptest::prop_assert_eq!(&got, &want);
            // Again with the scratch already used.
            let mut again: Vec<Key> = want.iter().rev().copied().collect();
            sort_keys(&mut again, &mut scratch);
            proptest::prop_assert_eq!(again, want);
        }
        /// Against the definition, by brute force: per window and unit, the `k` offered
        /// events with the smallest priorities (bottom-k sampling); per epoch and unit, only
        /// the first `m` windows in which it offered anything. Small compaction floors make
        /// buffers compact at many points; the survivors must not depend on when.
        #[test]
        fn survivors_are_the_bottom_k_of_the_first_m_windows(
            k in 1u32..4,
            m in 1u32..4,
            compact_floor in 1usize..12,
            offers in proptest::collection::vec((0i64..6, 0u64..5, proptest::prelude::any::<u64>()), 0..120),
        ) {
            let mut b = Bounder::with_compact_floor(k, m, compact_floor);
            let mut dropped_now = 0;
            for (i, (w, unit, prio)) in offers.iter().enumerate() {
                // The value identifies the offer, so survivors can be compared as sets.
                dropped_now += offer(&mut b, *w, *unit, *prio, ev(*w, i as f64));
            }
            // Windows 0..3 are epoch 0, windows 3..6 epoch 1.
            let (mut got, mut dropped_cap) = (Vec::new(), 0);
            for w in 0..6 {
                let closed = close(&mut b, w, (w / 3) as u64);
                got.extend(closed.kept.iter().map(|e| e.numbers[0] as usize));
                dropped_now += closed.dropped_by_event_cap;
                dropped_cap += closed.dropped_by_window_cap;
            }
            got.sort_unstable();

            let mut want = Vec::new();
            let mut want_dropped_now = 0u64;
            let mut want_dropped_cap = 0u64;
            let mut used = std::collections::HashMap::<(u64, i64), u32>::new();
            for w in 0..6i64 {
                for unit in 0..5u64 {
                    let mut mine: Vec<(u64, usize)> = offers
                        .iter()
                        .enumerate()
                        .filter(|(_, (ow, ou, _))| *ow == w && *ou == unit)
                        .map(|(i, (_, _, p))| (*p, i))
                        .collect();
                    if mine.is_empty() {
                        continue;
                    }
                    mine.sort_unstable();
                    let keep = mine.len().min(k as usize);
                    want_dropped_now += (mine.len() - keep) as u64;
                    let n = used.entry((unit, w / 3)).or_insert(0);
                    if *n < m {
                        *n += 1;
                        want.extend(mine[..keep].iter().map(|(_, i)| *i));
                    } else {
                        want_dropped_cap += keep as u64;
                    }
                }
            }
            want.sort_unstable();
            // Equal priorities: the earlier offer wins, in the brute force (sorted by
            // priority, then offer index) and in the bounder (keys sorted by arrival).
            proptest::prop_assert_eq!(got, want);
            proptest::prop_assert_eq!(dropped_now, want_dropped_now);
            proptest::prop_assert_eq!(dropped_cap, want_dropped_cap);
        }
    }
}
