//! Contribution bounding per privacy unit: at most `k` events per unit per window and at
//! most `m` windows per unit per epoch, enforced before aggregation.
//!
//! # Why the choice of survivors is safe and unbiased
//! Removing one unit from the input must change only that unit's own contribution
//! (privacy-math §8, [D]). Every decision here looks at one unit's own events only:
//!
//! - **Events per window.** Each event gets a priority, a keyed hash of the unit and the
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
//! holds one `u64 → u32` entry per active unit (the number of windows used). Open windows
//! hold at most `k` retained events per unit, so their size is bounded by the number of
//! active units, not by the event rate.

use std::collections::{BTreeMap, HashMap};
use std::hash::{BuildHasherDefault, Hasher};

use smallvec::SmallVec;

use crate::engine::event::Event;

/// Events retained for one unit in one open window, at most `k`, with their priorities.
/// Two fit inline (the demo's `k`); larger bounds spill to the heap.
#[derive(Debug, Default)]
struct Retained {
    events: SmallVec<[(u64, Event); 2]>,
}

/// Hasher for the bounder's tables, whose keys are unit hashes: outputs of the engine's
/// keyed BLAKE3 hash, so already uniform 64-bit values that nobody without the key can
/// steer. Hashing them again with SipHash (the std default, a defence against chosen keys)
/// buys nothing; one multiplication by an odd constant (a bijection, so distinct keys stay
/// distinct) with the high half folded down keeps both the low bits hashbrown indexes with
/// and the top bits it tags with well mixed. The table's iteration order is therefore
/// deterministic, but nothing depends on it: window aggregates are exact integer sums.
#[derive(Clone, Copy, Debug, Default)]
pub struct UnitKeyHasher(u64);

impl Hasher for UnitKeyHasher {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        // Not reached for u64 keys (they call `write_u64`); kept correct for any key type.
        for b in bytes {
            self.write_u64(u64::from(*b));
        }
    }

    fn write_u64(&mut self, v: u64) {
        // 2^64 / φ, the multiplier of Fibonacci hashing (Knuth, TAOCP vol. 3, §6.4).
        let p = (self.0 ^ v).wrapping_mul(0x9e37_79b9_7f4a_7c15);
        self.0 = p ^ (p >> 32);
    }
}

/// A map keyed by unit hash (see [`UnitKeyHasher`]).
pub type UnitMap<V> = HashMap<u64, V, BuildHasherDefault<UnitKeyHasher>>;

/// The per-unit bounding stage of the engine.
#[derive(Debug)]
pub struct Bounder {
    max_events_per_window: usize,
    max_windows_per_epoch: u32,
    open: BTreeMap<i64, UnitMap<Retained>>,
    windows_used: UnitMap<u32>,
    /// Units seen in the last closed window: the capacity a new window's table starts with,
    /// so steady traffic does not regrow (and rehash) every window's table from empty.
    last_window_units: usize,
    epoch: Option<u64>,
}

/// What closing a window produced.
#[derive(Debug, Default)]
pub struct ClosedWindow {
    /// Events that survive both bounds.
    pub kept: Vec<Event>,
    /// Events dropped because their unit had used up its windows for the epoch.
    pub dropped_by_window_cap: u64,
}

impl Bounder {
    /// A bounder keeping `k` events per unit per window and `m` windows per unit per epoch.
    pub fn new(max_events_per_window: u32, max_windows_per_epoch: u32) -> Bounder {
        Bounder {
            max_events_per_window: max_events_per_window as usize,
            max_windows_per_epoch,
            open: BTreeMap::new(),
            windows_used: UnitMap::default(),
            last_window_units: 0,
            epoch: None,
        }
    }

    /// Offers an event of `unit` for window `window_idx`. Returns the number of events
    /// dropped by the per-window bound as a result (0 or 1): either this event or the
    /// retained event with the largest priority.
    pub fn offer(&mut self, window_idx: i64, unit: u64, priority: u64, event: Event) -> u64 {
        let k = self.max_events_per_window;
        let capacity = self.last_window_units;
        let slot = self
            .open
            .entry(window_idx)
            .or_insert_with(|| UnitMap::with_capacity_and_hasher(capacity, Default::default()))
            .entry(unit)
            .or_default();
        if slot.events.len() < k {
            slot.events.push((priority, event));
            return 0;
        }
        // Full: replace the largest priority if the newcomer is smaller.
        let (worst_idx, worst) = slot
            .events
            .iter()
            .enumerate()
            .max_by_key(|(_, (p, _))| *p)
            .map(|(i, (p, _))| (i, *p))
            .unwrap_or((0, 0));
        if k > 0 && priority < worst {
            slot.events[worst_idx] = (priority, event);
        }
        1
    }

    /// Closes window `window_idx`, which belongs to `epoch`; windows must be closed in
    /// increasing order. Applies the per-epoch window cap.
    pub fn close(&mut self, window_idx: i64, epoch: u64) -> ClosedWindow {
        let mut kept = Vec::new();
        let dropped_by_window_cap = self.close_with(window_idx, epoch, |ev| kept.push(ev));
        ClosedWindow {
            kept,
            dropped_by_window_cap,
        }
    }

    /// [`Bounder::close`] without collecting: hands every surviving event to `keep` (in no
    /// particular order) and returns the number dropped by the per-epoch window cap.
    pub fn close_with(&mut self, window_idx: i64, epoch: u64, mut keep: impl FnMut(Event)) -> u64 {
        if self.epoch != Some(epoch) {
            self.windows_used.clear();
            self.windows_used.shrink_to_fit();
            self.epoch = Some(epoch);
        }
        // Windows before this one can no longer receive events (they are closed too).
        let Some(units) = self.open.remove(&window_idx) else {
            return 0;
        };
        self.last_window_units = units.len();
        let mut dropped = 0;
        for (unit, retained) in units {
            let used = self.windows_used.entry(unit).or_insert(0);
            if *used < self.max_windows_per_epoch {
                *used += 1;
                for (_, ev) in retained.events {
                    keep(ev);
                }
            } else {
                dropped += retained.events.len() as u64;
            }
        }
        dropped
    }

    /// Units with a window counted in the current epoch.
    pub fn active_units(&self) -> usize {
        self.windows_used.len()
    }

    /// Retained events waiting in open windows.
    pub fn retained_events(&self) -> usize {
        self.open
            .values()
            .flat_map(|w| w.values())
            .map(|r| r.events.len())
            .sum()
    }

    /// Bytes held by the per-unit epoch table (the part that scales with distinct units):
    /// hashbrown stores one control byte plus the `(u64, u32)` slot (16 bytes with padding)
    /// per bucket.
    pub fn unit_table_bytes(&self) -> usize {
        self.windows_used.capacity() * (std::mem::size_of::<(u64, u32)>() + 1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::time::Millis;

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
            dropped += a.offer(0, 7, *p, ev(i as i64, *p as f64));
        }
        let mut b = Bounder::new(3, 10);
        for (i, p) in prios.iter().enumerate().rev() {
            b.offer(0, 7, *p, ev(i as i64, *p as f64));
        }
        let mut ka: Vec<f64> = a.close(0, 0).kept.iter().map(|e| e.numbers[0]).collect();
        let mut kb: Vec<f64> = b.close(0, 0).kept.iter().map(|e| e.numbers[0]).collect();
        ka.sort_by(f64::total_cmp);
        kb.sort_by(f64::total_cmp);
        assert_eq!(ka, vec![10.0, 20.0, 30.0]);
        assert_eq!(ka, kb);
        assert_eq!(dropped, 3);
    }

    #[test]
    fn window_cap_applies_per_epoch_and_resets() {
        let mut b = Bounder::new(5, 2);
        for w in 0..4 {
            b.offer(w, 9, 1, ev(w, 1.0));
        }
        assert_eq!(b.close(0, 0).kept.len(), 1);
        assert_eq!(b.close(1, 0).kept.len(), 1);
        let third = b.close(2, 0);
        assert_eq!(third.kept.len(), 0);
        assert_eq!(third.dropped_by_window_cap, 1);
        // New epoch: the unit may contribute again.
        assert_eq!(b.close(3, 1).kept.len(), 1);
    }

    #[test]
    fn other_units_do_not_change_a_units_survivors() {
        // Neighbouring inputs: with and without unit 2. Unit 1's kept events are identical.
        let run = |with_other: bool| {
            let mut b = Bounder::new(2, 1);
            for i in 0..10u64 {
                b.offer(
                    0,
                    1,
                    i.wrapping_mul(0x9e37_79b9_7f4a_7c15),
                    ev(i as i64, i as f64),
                );
                if with_other {
                    b.offer(0, 2, i, ev(i as i64, 100.0));
                }
            }
            let mut kept: Vec<f64> = b
                .close(0, 0)
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
}
