//! The invented Quillhaven tap feed: a pure, seeded generator of JSON-lines events for the
//! demo, the benchmarks and the end-to-end tests (scenario.md describes the city).
//!
//! Everything here is made up. The generator knows the ground truth it draws from (the
//! daily rhythm, the zone and mode mix, and the trip model
//! `trip_minutes = 4.0 + 2.6·trip_km + 3.1·transfers + N(0, 3²)`), so the demo can put
//! released values beside true ones. It also produces the dirt a real feed has: malformed
//! lines, late events, fare readers that send nonsense and "stuck validator" cards that
//! tap hundreds of times in an hour, so rejection counts and contribution bounding have
//! something to show.
//!
//! The generator is pure: no clock, no files, no OS randomness. One [`ChaCha20Rng`] seeded
//! from [`FeedSpec::seed`] drives every choice, and the order of draws is fixed, so a seed
//! always gives the same bytes. Lines come out in (roughly) increasing event time, one
//! calendar day planned at a time, so memory stays proportional to one day's taps.

use rand::rngs::ChaCha20Rng;
use rand::{Rng, RngExt, SeedableRng};
use rand_distr::StandardNormal;

use crate::engine::time::{MAX_EVENT_TIME, MIN_EVENT_TIME, Millis};

/// Intercept of the true trip model, in minutes (boarding and walking time).
pub const TRUE_INTERCEPT: f64 = 4.0;
/// Minutes per kilometre in the true trip model.
pub const TRUE_KM: f64 = 2.6;
/// Minutes per transfer in the true trip model.
pub const TRUE_TRANSFERS: f64 = 3.1;
/// Standard deviation of the trip model's Gaussian noise, in minutes.
pub const TRUE_NOISE_SD: f64 = 3.0;

/// The public mode categories, in the order the demo configuration declares them.
pub const MODES: [&str; 3] = ["tram", "ferry", "bus"];
/// The public zone categories, in the order the demo configuration declares them.
pub const ZONES: [&str; 5] = [
    "harbour",
    "old-town",
    "uplands",
    "riverside",
    "airport-link",
];

/// Lateness the feed is designed around: late lines lag the feed time by more than this.
pub const DESIGN_LATENESS_MS: i64 = 5 * 60_000;

const DAY_MS: i64 = 86_400_000;
const DAY_SECS: u32 = 86_400;
const HOUR_SECS: u32 = 3_600;

/// What to generate. Shares outside `[0, 1]` (or not finite) are clamped when the feed is
/// built; `late_share` is further capped at `1 - bad_line_share`.
#[derive(Clone, Debug, PartialEq)]
pub struct FeedSpec {
    /// Seed of the one random stream behind every choice.
    pub seed: u64,
    /// Size of the card population (the privacy units).
    pub n_cards: u32,
    /// First instant covered (inclusive); lines carry event times in
    /// `[start, start + days·24h)`, except late lines, which may lag up to 30 minutes.
    pub start: Millis,
    /// Number of 24-hour days covered.
    pub days: u32,
    /// Probability that a line is malformed instead of a good event.
    pub bad_line_share: f64,
    /// Probability that a line is a good event delivered late (see [`FeedStats::late_lines`]).
    pub late_share: f64,
}

impl Default for FeedSpec {
    /// One week of 20,000 cards from Monday 2026-03-02T00:00:00Z, with 0.5% bad and 0.5%
    /// late lines.
    fn default() -> FeedSpec {
        FeedSpec {
            seed: 2026,
            n_cards: 20_000,
            // 2026-03-02T00:00:00Z = 1772409600 s since the epoch (`date -u -d` gives the
            // same; the time-module test pins 08:14:07 that day to 1772439247 s).
            start: Millis(1_772_409_600_000),
            days: 7,
            bad_line_share: 0.005,
            late_share: 0.005,
        }
    }
}

/// Counts of what the feed has produced so far (totals once the iterator is exhausted).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct FeedStats {
    /// Lines produced, good and bad.
    pub lines: u64,
    /// Lines that are not a valid event: truncated JSON, a missing `ts` or `card`, a field
    /// of the wrong JSON type, an unknown zone, an empty line or non-UTF-8 bytes.
    pub bad_lines: u64,
    /// Good lines whose `ts` lies 6 to 30 minutes behind the newest on-time event before
    /// them, i.e. beyond the 5-minute lateness the demo configuration allows. A daemon
    /// drops only those whose window has already closed, so its late count can be lower.
    pub late_lines: u64,
    /// Lines from "stuck validator" episodes (one card tapping 30-200 times within an
    /// hour), whatever their other fate (a spam line can also be bad or late).
    pub spam_lines: u64,
}

/// The feed: an iterator of lines, each without its trailing `'\n'`.
///
/// Build it with [`DemoFeed::new`], iterate to the end, then read [`DemoFeed::stats`].
/// Bad lines may be empty or hold non-UTF-8 bytes, hence `Vec<u8>` items.
#[derive(Debug)]
pub struct DemoFeed {
    rng: ChaCha20Rng,
    /// Sanitised copy of the spec's shares.
    bad_line_share: f64,
    late_share: f64,
    start_ms: i64,
    end_ms: i64,
    cards: Vec<CardProfile>,
    card_ids: CardIdMap,
    /// Next calendar day (days since 1970-01-01) to plan, and the last one that can hold taps.
    next_day: i64,
    last_day: i64,
    /// Midnight (UTC) of the day currently being emitted.
    day_ms: i64,
    /// The current day's taps, sorted by time; `plan_pos` is the next one to emit.
    plan: Vec<PlannedTap>,
    /// Scratch space of the day's counting sort, kept to avoid reallocating every day.
    unsorted: Vec<PlannedTap>,
    taps_per_sec: Vec<u32>,
    plan_pos: usize,
    /// Validator (mode, zone) of each stuck-validator episode of the current day.
    episodes: Vec<(u8, u8)>,
    /// Newest event time among on-time good lines so far: the feed time late lines lag.
    feed_time: Option<i64>,
    stats: FeedStats,
}

/// A rider card's fixed traits, drawn once when the feed is built.
#[derive(Clone, Copy, Debug)]
struct CardProfile {
    commuter: bool,
    /// Habitual departure times of a commuter, seconds after midnight.
    morning_sec: u32,
    evening_sec: u32,
    /// What emitting a tap needs to know about the rider.
    rider: Rider,
}

/// The traits a tap's fields depend on. Copied into every planned tap, so emitting a line
/// reads the day plan sequentially instead of the card table at random (that cache miss
/// was the largest single cost in profiles).
#[derive(Clone, Copy, Debug, PartialEq)]
struct Rider {
    /// Children ride free: every fare is 0.
    child: bool,
    /// Reduced fare (half price).
    concession: bool,
    home_zone: u8,
    work_zone: u8,
    /// Personal multiplier on trip length (some people live further out).
    km_scale: f32,
}

/// Which kind of trip a planned tap belongs to; it decides how the zone is drawn.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
enum Leg {
    /// A commuter's morning trip, mostly from the home zone.
    Home,
    /// A commuter's evening trip, mostly from the work zone.
    Work,
    /// Any other ride: zone drawn from the city-wide mix.
    Any,
    /// A tap of stuck-validator episode number `.0` of the current day.
    Stuck(u32),
}

/// One tap of the day plan.
#[derive(Clone, Copy, Debug, PartialEq)]
struct PlannedTap {
    sec_of_day: u32,
    card_idx: u32,
    leg: Leg,
    rider: Rider,
}

impl PlannedTap {
    /// Placeholder for slots the sort overwrites at once.
    const FILLER: PlannedTap = PlannedTap {
        sec_of_day: 0,
        card_idx: 0,
        leg: Leg::Any,
        rider: Rider {
            child: false,
            concession: false,
            home_zone: 0,
            work_zone: 0,
            km_scale: 1.0,
        },
    };
}

/// A keyed bijection from card index to a short hex id, so ids look random, never
/// collide (two cards sharing an id would merge two privacy units) and need no storage.
#[derive(Clone, Copy, Debug)]
struct CardIdMap {
    bits: u32,
    add: u64,
    mul1: u64,
    mul2: u64,
}

impl CardIdMap {
    fn new(n_cards: u32, rng: &mut ChaCha20Rng) -> CardIdMap {
        // 24 bits ("c-7f3a91") cover up to 16.7 M cards; beyond that use all 32 bits.
        let bits = if n_cards <= 1 << 24 { 24 } else { 32 };
        CardIdMap {
            bits,
            add: rng.next_u64(),
            mul1: rng.next_u64() | 1,
            mul2: rng.next_u64() | 1,
        }
    }

    /// Each step is invertible on `bits`-bit integers (adding a constant, multiplying by an
    /// odd number and `x ^= x >> s` for s ≥ 1 all are), so distinct indices get distinct ids.
    fn id(&self, card_idx: u32) -> u64 {
        let mask = (1u64 << self.bits) - 1;
        let half = self.bits / 2;
        let mut x = (u64::from(card_idx).wrapping_add(self.add)) & mask;
        x ^= x >> half;
        x = x.wrapping_mul(self.mul1) & mask;
        x ^= x >> (half - 1);
        x = x.wrapping_mul(self.mul2) & mask;
        x ^= x >> half;
        x
    }

    /// Writes `c-` and the id as lowercase hex (6 or 8 digits) into `buf`; returns the length.
    fn render(&self, card_idx: u32, buf: &mut [u8; 10]) -> usize {
        const HEX: &[u8; 16] = b"0123456789abcdef";
        let n_digits = (self.bits / 4) as usize;
        let id = self.id(card_idx);
        buf[0] = b'c';
        buf[1] = b'-';
        for digit_idx in 0..n_digits {
            let shift = 4 * (n_digits - 1 - digit_idx);
            buf[2 + digit_idx] = HEX[((id >> shift) & 0xf) as usize];
        }
        2 + n_digits
    }
}

/// City-wide zone mix in [`ZONES`] order (harbour busiest, airport-link quietest), in
/// thousandths so the draw is an integer comparison.
const ZONE_WEIGHTS: [u32; 5] = [300, 250, 150, 200, 100];

/// Mode mix per zone in [`MODES`] order (tram, ferry, bus); ferries only serve the water.
const MODE_WEIGHTS_BY_ZONE: [[u32; 3]; 5] = [
    [45, 35, 20], // harbour
    [65, 0, 35],  // old-town
    [25, 0, 75],  // uplands
    [40, 25, 35], // riverside
    [70, 0, 30],  // airport-link
];

/// Relative tap rate of occasional rides per hour of the day: quiet night, busy daytime.
const OCCASIONAL_HOUR_WEIGHTS: [u32; 24] = [
    6, 3, 2, 2, 3, 8, 30, 60, 70, 80, 90, 100, 110, 100, 90, 90, 100, 100, 90, 80, 60, 44, 30, 16,
];

/// Number of occasional rides per day: P(0), P(1), P(2) in percent.
const OCCASIONAL_RIDES_PCT: [u32; 3] = [55, 30, 15];
/// Commuters on a weekend behave like somewhat busier occasional riders.
const WEEKEND_COMMUTER_RIDES_PCT: [u32; 3] = [45, 35, 20];

/// Share of cards that commute.
const COMMUTER_SHARE: f64 = 0.6;
/// Share of cards held by children (fare 0) and by concession holders (half fare).
const CHILD_SHARE: f64 = 0.12;
const CONCESSION_SHARE: f64 = 0.15;
/// Probability that a commuter travels on a given working day.
const COMMUTER_PRESENCE: f64 = 0.93;
/// Probability that a commute trip starts in the commuter's usual zone.
const USUAL_ZONE_SHARE: f64 = 0.9;
/// Share of good lines from malformed fare readers (negative or huge `fare_cents`).
const MALFORMED_FARE_SHARE: f64 = 0.002;
/// Share of good lines whose `ts` is integer epoch milliseconds instead of RFC 3339, to
/// exercise the other accepted time format.
const INTEGER_TS_SHARE: f64 = 0.01;
/// Stuck-validator episodes per day: one per this many cards, at least one.
const CARDS_PER_STUCK_EPISODE: u32 = 10_000;
/// Upper cap on trip length, km.
const MAX_TRIP_KM: f64 = 30.0;

/// Draws an index with probability proportional to `weights` (all small integers, with a
/// positive sum, so the range below is never empty).
fn weighted_index(rng: &mut ChaCha20Rng, weights: &[u32]) -> usize {
    let total: u32 = weights.iter().sum();
    let mut ticket = rng.random_range(0..total);
    for (idx, &weight) in weights.iter().enumerate() {
        if ticket < weight {
            return idx;
        }
        ticket -= weight;
    }
    weights.len() - 1
}

/// `x.round()` (half away from zero, same bits) without the libm call that `f64::round`
/// compiles to on baseline x86-64, where it showed up in profiles of this generator.
///
/// Below 2^52 the truncation `x as i64` is exact and so is the fractional part `x - t`
/// (it lies on x's own ulp grid), so the comparison with ±0.5 decides exactly; at or above
/// 2^52 every f64 is already an integer. `copysign` restores the sign of a zero result.
fn round_fast(x: f64) -> f64 {
    if x.is_nan() || x.abs() >= 4_503_599_627_370_496.0 {
        return x; // ≥ 2^52, infinite or NaN: nothing to round.
    }
    let t = x as i64 as f64;
    let frac = x - t;
    let r = if frac >= 0.5 {
        t + 1.0
    } else if frac <= -0.5 {
        t - 1.0
    } else {
        t
    };
    r.copysign(x)
}

fn clamp_share(share: f64, max: f64) -> f64 {
    if share.is_finite() {
        share.clamp(0.0, max)
    } else {
        0.0
    }
}

/// Seconds after midnight, drawn around `centre_sec` with standard deviation `sd_sec` and
/// clamped into `[lo_sec, hi_sec]`.
fn time_near(rng: &mut ChaCha20Rng, centre_sec: u32, sd_sec: f64, lo_sec: u32, hi_sec: u32) -> u32 {
    let z: f64 = rng.sample(StandardNormal);
    let t = f64::from(centre_sec) + sd_sec * z;
    // The clamp keeps the value inside [lo, hi] ⊂ [0, 86400), so the cast cannot wrap.
    round_fast(t).clamp(f64::from(lo_sec), f64::from(hi_sec)) as u32
}

impl DemoFeed {
    /// Builds the card population and positions the feed before its first line.
    /// Costs O(`n_cards`) time and memory; lines are then produced lazily.
    pub fn new(spec: &FeedSpec) -> DemoFeed {
        let mut rng = ChaCha20Rng::seed_from_u64(spec.seed);
        let bad_line_share = clamp_share(spec.bad_line_share, 1.0);
        let late_share = clamp_share(spec.late_share, 1.0 - bad_line_share);
        let card_ids = CardIdMap::new(spec.n_cards, &mut rng);
        let cards = (0..spec.n_cards).map(|_| draw_profile(&mut rng)).collect();
        let start_ms = spec.start.0;
        let end_ms = start_ms.saturating_add(i64::from(spec.days).saturating_mul(DAY_MS));
        DemoFeed {
            rng,
            bad_line_share,
            late_share,
            start_ms,
            end_ms,
            cards,
            card_ids,
            next_day: start_ms.div_euclid(DAY_MS),
            // The day holding the last covered millisecond; an empty span plans nothing.
            last_day: if end_ms > start_ms {
                (end_ms - 1).div_euclid(DAY_MS)
            } else {
                i64::MIN
            },
            day_ms: 0,
            plan: Vec::new(),
            unsorted: Vec::new(),
            taps_per_sec: Vec::new(),
            plan_pos: 0,
            episodes: Vec::new(),
            feed_time: None,
            stats: FeedStats::default(),
        }
    }

    /// What has been produced so far.
    pub fn stats(&self) -> &FeedStats {
        &self.stats
    }

    /// Fills `plan` with the taps of calendar day `day` (days since 1970-01-01, UTC),
    /// sorted by time, keeping only those inside the spec's span.
    fn plan_day(&mut self, day: i64) {
        self.plan.clear();
        self.plan_pos = 0;
        self.episodes.clear();
        self.day_ms = day * DAY_MS;
        // 1970-01-01 was a Thursday, so (day + 3) mod 7 counts from Monday = 0.
        let working_day = (day + 3).rem_euclid(7) < 5;
        let rng = &mut self.rng;
        for (card_idx, profile) in (0u32..).zip(self.cards.iter()) {
            if profile.commuter && working_day {
                if !rng.random_bool(COMMUTER_PRESENCE) {
                    continue;
                }
                // 2-4 rides: one trip each way, one of them sometimes with a second leg.
                let n_rides: u32 = rng.random_range(2..=4);
                let n_morning = match n_rides {
                    3 => rng.random_range(1..=2),
                    _ => n_rides / 2,
                };
                let morning = time_near(
                    rng,
                    profile.morning_sec,
                    480.0,
                    6 * HOUR_SECS,
                    10 * HOUR_SECS,
                );
                let evening = time_near(
                    rng,
                    profile.evening_sec,
                    600.0,
                    15 * HOUR_SECS,
                    20 * HOUR_SECS,
                );
                for (first_sec, n_legs, leg) in [
                    (morning, n_morning, Leg::Home),
                    (evening, n_rides - n_morning, Leg::Work),
                ] {
                    let mut sec_of_day = first_sec;
                    for _ in 0..n_legs {
                        self.plan.push(PlannedTap {
                            sec_of_day,
                            card_idx,
                            leg,
                            rider: profile.rider,
                        });
                        // A connecting ride 8-25 minutes later (still well before midnight).
                        sec_of_day += rng.random_range(480..=1_500);
                    }
                }
            } else {
                let rides_pct = if profile.commuter {
                    &WEEKEND_COMMUTER_RIDES_PCT
                } else {
                    &OCCASIONAL_RIDES_PCT
                };
                let n_rides = weighted_index(rng, rides_pct);
                for _ in 0..n_rides {
                    let hour = weighted_index(rng, &OCCASIONAL_HOUR_WEIGHTS) as u32;
                    let sec_of_day = hour * HOUR_SECS + rng.random_range(0..HOUR_SECS);
                    self.plan.push(PlannedTap {
                        sec_of_day,
                        card_idx,
                        leg: Leg::Any,
                        rider: profile.rider,
                    });
                }
            }
        }
        let n_cards = self.cards.len() as u32;
        if n_cards > 0 {
            let n_episodes = (n_cards / CARDS_PER_STUCK_EPISODE).max(1);
            for episode_idx in 0..n_episodes {
                let card_idx = rng.random_range(0..n_cards);
                // In range: card_idx < n_cards = cards.len().
                let rider = self.cards[card_idx as usize].rider;
                let zone = weighted_index(rng, &ZONE_WEIGHTS);
                let mode = weighted_index(rng, &MODE_WEIGHTS_BY_ZONE[zone]);
                self.episodes.push((mode as u8, zone as u8));
                // Starts between 06:00 and 22:00, so the hour ends before midnight.
                let first_sec = rng.random_range(6 * HOUR_SECS..22 * HOUR_SECS);
                let n_taps: u32 = rng.random_range(30..=200);
                for _ in 0..n_taps {
                    let sec_of_day = first_sec + rng.random_range(0..HOUR_SECS);
                    self.plan.push(PlannedTap {
                        sec_of_day,
                        card_idx,
                        leg: Leg::Stuck(episode_idx),
                        rider,
                    });
                }
            }
        }
        let (day_ms, start_ms, end_ms) = (self.day_ms, self.start_ms, self.end_ms);
        self.plan.retain(|tap| {
            let ts = day_ms + i64::from(tap.sec_of_day) * 1000;
            // Every time drawn above is before 23:00; checking `< DAY_SECS` anyway keeps
            // the counting sort's indices in range should that ever change.
            tap.sec_of_day < DAY_SECS && (start_ms..end_ms).contains(&ts)
        });
        self.sort_plan_by_time();
    }

    /// Stable counting sort of the plan by second of the day: O(taps + 86 400), and taps
    /// of the same second keep the (deterministic) order in which they were planned.
    fn sort_plan_by_time(&mut self) {
        self.taps_per_sec.clear();
        self.taps_per_sec.resize(DAY_SECS as usize + 1, 0);
        // plan_day kept only taps with sec_of_day < DAY_SECS, so indices stay in range.
        for tap in &self.plan {
            self.taps_per_sec[tap.sec_of_day as usize + 1] += 1;
        }
        for sec in 1..self.taps_per_sec.len() {
            self.taps_per_sec[sec] += self.taps_per_sec[sec - 1];
        }
        // Now taps_per_sec[s] is the first slot of second s.
        std::mem::swap(&mut self.plan, &mut self.unsorted);
        self.plan.clear();
        self.plan.resize(self.unsorted.len(), PlannedTap::FILLER);
        for tap in &self.unsorted {
            let slot = &mut self.taps_per_sec[tap.sec_of_day as usize];
            self.plan[*slot as usize] = *tap;
            *slot += 1;
        }
    }

    /// Draws the trip and fare of one planned tap and renders it (good, late or bad).
    fn emit(&mut self, tap: PlannedTap) -> Vec<u8> {
        let rng = &mut self.rng;
        let rider = tap.rider;
        let (mode_idx, zone_idx) = match tap.leg {
            // Episode indices come from this day's plan, which filled `episodes`.
            Leg::Stuck(episode_idx) => {
                let (mode, zone) = self.episodes[episode_idx as usize];
                (usize::from(mode), usize::from(zone))
            }
            leg => {
                let usual = match leg {
                    Leg::Home => Some(rider.home_zone),
                    Leg::Work => Some(rider.work_zone),
                    _ => None,
                };
                let zone = match usual {
                    Some(zone) if rng.random_bool(USUAL_ZONE_SHARE) => usize::from(zone),
                    _ => weighted_index(rng, &ZONE_WEIGHTS),
                };
                (weighted_index(rng, &MODE_WEIGHTS_BY_ZONE[zone]), zone)
            }
        };
        let trip = draw_trip(rng, &rider, mode_idx, zone_idx);

        let category: f64 = rng.random();
        let planned_ms = self.day_ms + i64::from(tap.sec_of_day) * 1000;
        let mut ts = planned_ms;
        let mut defect = Defect::None;
        let mut late = false;
        if category < self.bad_line_share {
            defect = draw_defect(rng);
        } else if category < self.bad_line_share + self.late_share {
            // Late relative to the newest on-time event, so a consumer that tracks the
            // maximum event time sees the lag too. Before any on-time event there is no
            // feed time to lag, and the line goes out on time.
            if let Some(feed_time) = self.feed_time {
                ts = feed_time.saturating_sub(i64::from(rng.random_range(360u32..=1_800)) * 1000);
                late = true;
            }
        }
        let ts_as_integer = rng.random_bool(INTEGER_TS_SHARE);

        let mut card_buf = [0u8; 10];
        let card_len = self.card_ids.render(tap.card_idx, &mut card_buf);
        let fields = EventFields {
            ts: Millis(ts),
            ts_as_integer,
            card: &card_buf[..card_len],
            mode: MODES[mode_idx].as_bytes(),
            zone: ZONES[zone_idx].as_bytes(),
            fare_cents: trip.fare_cents,
            trip_km: trip.km,
            trip_minutes: trip.minutes,
            transfers: trip.transfers,
        };
        let mut line = Vec::with_capacity(176);
        write_event(&mut line, &fields, defect);
        if let Defect::Truncate = defect {
            // A strict prefix of a JSON object lacks its closing brace, so it never parses.
            // Rendering always yields more than one byte, so the range is non-empty.
            let keep = rng.random_range(1..line.len().max(2));
            line.truncate(keep);
        }

        self.stats.lines += 1;
        if defect != Defect::None {
            self.stats.bad_lines += 1;
        } else if late {
            self.stats.late_lines += 1;
        } else {
            self.feed_time = Some(self.feed_time.map_or(planned_ms, |t| t.max(planned_ms)));
        }
        if let Leg::Stuck(_) = tap.leg {
            self.stats.spam_lines += 1;
        }
        line
    }
}

impl Iterator for DemoFeed {
    type Item = Vec<u8>;

    fn next(&mut self) -> Option<Vec<u8>> {
        while self.plan_pos >= self.plan.len() {
            if self.next_day > self.last_day {
                return None;
            }
            let day = self.next_day;
            self.next_day += 1;
            self.plan_day(day);
        }
        let tap = self.plan[self.plan_pos];
        self.plan_pos += 1;
        Some(self.emit(tap))
    }
}

fn draw_profile(rng: &mut ChaCha20Rng) -> CardProfile {
    let z: f64 = rng.sample(StandardNormal);
    let commuter = rng.random_bool(COMMUTER_SHARE);
    let rider = Rider {
        child: rng.random_bool(CHILD_SHARE),
        concession: rng.random_bool(CONCESSION_SHARE),
        home_zone: weighted_index(rng, &ZONE_WEIGHTS) as u8,
        work_zone: weighted_index(rng, &ZONE_WEIGHTS) as u8,
        km_scale: (0.3 * z).exp() as f32,
    };
    CardProfile {
        commuter,
        // Habits: leave around 08:00 (sd 35 min) and 17:30 (sd 45 min).
        morning_sec: time_near(
            rng,
            8 * HOUR_SECS,
            2_100.0,
            6 * HOUR_SECS + 1_800,
            9 * HOUR_SECS + 1_800,
        ),
        evening_sec: time_near(
            rng,
            17 * HOUR_SECS + 1_800,
            2_700.0,
            15 * HOUR_SECS + 2_700,
            19 * HOUR_SECS + 1_800,
        ),
        rider,
    }
}

/// The numeric fields of one ride.
struct Trip {
    fare_cents: i64,
    km: f64,
    minutes: f64,
    transfers: u32,
}

/// Draws a ride's length, transfers, duration and fare.
///
/// Length and duration are rounded to 0.1 before output. The duration is computed from the
/// *rounded* length, so the printed `trip_km` is exactly the regressor of the true model
/// and only the duration carries rounding error (uniform, variance 0.1²/12 ≈ 0.0008 min²,
/// negligible beside the model's 9 min²).
fn draw_trip(rng: &mut ChaCha20Rng, rider: &Rider, mode_idx: usize, zone_idx: usize) -> Trip {
    // Median ride length by mode (tram, ferry, bus); airport-link rides run twice as far.
    const MEDIAN_KM: [f64; 3] = [3.0, 5.5, 4.0];
    let zone_factor = if ZONES[zone_idx] == "airport-link" {
        2.0
    } else {
        1.0
    };
    let z: f64 = rng.sample(StandardNormal);
    let km_raw = (MEDIAN_KM[mode_idx] * zone_factor * f64::from(rider.km_scale) * (0.6 * z).exp())
        .min(MAX_TRIP_KM);
    let km = round_fast(km_raw * 10.0) / 10.0;
    // Longer rides need more changes: three chances, each likelier with distance.
    let p_transfer = (0.04 + km / 40.0).min(0.45);
    let transfers = (0..3)
        .map(|_| u32::from(rng.random_bool(p_transfer)))
        .sum::<u32>();
    let noise: f64 = rng.sample(StandardNormal);
    let minutes_raw = TRUE_INTERCEPT
        + TRUE_KM * km
        + TRUE_TRANSFERS * f64::from(transfers)
        + TRUE_NOISE_SD * noise;
    let minutes = round_fast(minutes_raw.max(1.0) * 10.0) / 10.0;

    // Fares: a base by mode plus a distance part, rounded to 10 cents and capped at 900.
    const BASE_CENTS: [f64; 3] = [180.0, 320.0, 160.0];
    let fare_cents = if rng.random_bool(MALFORMED_FARE_SHARE) {
        // A broken reader: negative or absurdly large, but still a JSON integer.
        if rng.random_bool(0.5) {
            -rng.random_range(1..=1_000)
        } else {
            rng.random_range(10_000..=1_000_000)
        }
    } else if rider.child {
        0
    } else {
        let surcharge = if ZONES[zone_idx] == "airport-link" {
            150.0
        } else {
            0.0
        };
        let full = BASE_CENTS[mode_idx] + 22.0 * (km - 2.0).max(0.0) + surcharge;
        let price = if rider.concession { full / 2.0 } else { full };
        // Bounded in [80, 900] before the cast.
        (round_fast(price / 10.0) * 10.0).min(900.0) as i64
    };
    Trip {
        fare_cents,
        km,
        minutes,
        transfers,
    }
}

/// How a bad line is broken. Each is a mistake real feeds make; each makes the line
/// unusable for every statistic of the demo configuration.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Defect {
    None,
    /// Cut short at a random byte.
    Truncate,
    /// `ts` left out (no event time).
    MissingTs,
    /// `card` left out (no privacy unit).
    MissingCard,
    /// `ts` is `true`.
    TsNotTime,
    /// `fare_cents` is a JSON string.
    FareAsString,
    /// `trip_km` is an array.
    KmAsArray,
    /// `zone` is not one of the declared zones.
    UnknownZone(&'static str),
    /// Bytes that are not UTF-8 inside the `zone` value.
    NonUtf8Zone,
    /// Bytes that are not UTF-8 inside the `card` value.
    NonUtf8Card,
    /// Nothing at all.
    Empty,
}

fn draw_defect(rng: &mut ChaCha20Rng) -> Defect {
    const UNKNOWN_ZONES: [&str; 4] = ["lighthouse", "old_town", "HARBOUR", ""];
    match rng.random_range(0..10u32) {
        0 | 1 => Defect::Truncate,
        2 => Defect::MissingTs,
        3 => Defect::MissingCard,
        4 => Defect::TsNotTime,
        5 => Defect::FareAsString,
        6 => Defect::KmAsArray,
        7 => Defect::UnknownZone(UNKNOWN_ZONES[rng.random_range(0..UNKNOWN_ZONES.len())]),
        8 => {
            if rng.random_bool(0.5) {
                Defect::NonUtf8Zone
            } else {
                Defect::NonUtf8Card
            }
        }
        _ => Defect::Empty,
    }
}

/// The fields of one event line, strings as raw bytes (already valid UTF-8 except in
/// deliberately broken lines).
struct EventFields<'a> {
    ts: Millis,
    ts_as_integer: bool,
    card: &'a [u8],
    mode: &'a [u8],
    zone: &'a [u8],
    fare_cents: i64,
    trip_km: f64,
    trip_minutes: f64,
    transfers: u32,
}

/// Renders one event as a single-line JSON object, in the field order of scenario.md.
fn write_event(out: &mut Vec<u8>, ev: &EventFields<'_>, defect: Defect) {
    if defect == Defect::Empty {
        return;
    }
    out.push(b'{');
    let mut first = true;
    // `name` is the quoted key with its colon, e.g. `"ts":`.
    let mut key = |out: &mut Vec<u8>, name: &[u8]| {
        if !first {
            out.push(b',');
        }
        first = false;
        out.extend_from_slice(name);
    };
    if defect != Defect::MissingTs {
        key(out, br#""ts":"#);
        if defect == Defect::TsNotTime {
            out.extend_from_slice(b"true");
        } else if ev.ts_as_integer || !(MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(&ev.ts) {
            write_i64(out, ev.ts.0);
        } else {
            out.push(b'"');
            write_rfc3339(out, ev.ts);
            out.push(b'"');
        }
    }
    if defect != Defect::MissingCard {
        key(out, br#""card":"#);
        if defect == Defect::NonUtf8Card {
            write_broken_string(out, ev.card);
        } else {
            write_json_string(out, ev.card);
        }
    }
    key(out, br#""mode":"#);
    write_json_string(out, ev.mode);
    key(out, br#""zone":"#);
    match defect {
        Defect::UnknownZone(zone) => write_json_string(out, zone.as_bytes()),
        Defect::NonUtf8Zone => write_broken_string(out, ev.zone),
        _ => write_json_string(out, ev.zone),
    }
    key(out, br#""fare_cents":"#);
    if defect == Defect::FareAsString {
        out.push(b'"');
        write_i64(out, ev.fare_cents);
        out.push(b'"');
    } else {
        write_i64(out, ev.fare_cents);
    }
    key(out, br#""trip_km":"#);
    if defect == Defect::KmAsArray {
        out.push(b'[');
        write_f64(out, ev.trip_km);
        out.push(b']');
    } else {
        write_f64(out, ev.trip_km);
    }
    key(out, br#""trip_minutes":"#);
    write_f64(out, ev.trip_minutes);
    key(out, br#""transfers":"#);
    write_i64(out, i64::from(ev.transfers));
    out.push(b'}');
}

/// A JSON string whose middle holds the bytes 0xFF 0xFE, which never occur in UTF-8.
fn write_broken_string(out: &mut Vec<u8>, s: &[u8]) {
    let mid = s.len() / 2;
    out.push(b'"');
    out.extend_from_slice(&s[..mid]);
    out.extend_from_slice(&[0xFF, 0xFE]);
    out.extend_from_slice(&s[mid..]);
    out.push(b'"');
}

/// Writes `s` as a JSON string literal (RFC 8259 §7): quote, backslash and control
/// characters are escaped; every other byte is copied, so UTF-8 text stays UTF-8.
fn write_json_string(out: &mut Vec<u8>, s: &[u8]) {
    const HEX: &[u8; 16] = b"0123456789abcdef";
    out.push(b'"');
    // Fast path: generator ids and categories never need escaping.
    if !s
        .iter()
        .any(|&byte| byte == b'"' || byte == b'\\' || byte < 0x20)
    {
        out.extend_from_slice(s);
        out.push(b'"');
        return;
    }
    for &byte in s {
        match byte {
            b'"' => out.extend_from_slice(b"\\\""),
            b'\\' => out.extend_from_slice(b"\\\\"),
            b'\n' => out.extend_from_slice(b"\\n"),
            b'\r' => out.extend_from_slice(b"\\r"),
            b'\t' => out.extend_from_slice(b"\\t"),
            0..=0x1f => out.extend_from_slice(&[
                b'\\',
                b'u',
                b'0',
                b'0',
                HEX[usize::from(byte >> 4)],
                HEX[usize::from(byte & 0xf)],
            ]),
            _ => out.push(byte),
        }
    }
    out.push(b'"');
}

/// Decimal digits of an integer without going through `fmt` (this is the hot path).
fn write_i64(out: &mut Vec<u8>, value: i64) {
    let mut digits = [0u8; 20];
    let mut pos = digits.len();
    let mut rest = value.unsigned_abs();
    loop {
        pos -= 1;
        digits[pos] = b'0' + (rest % 10) as u8;
        rest /= 10;
        if rest == 0 {
            break;
        }
    }
    if value < 0 {
        out.push(b'-');
    }
    out.extend_from_slice(&digits[pos..]);
}

/// A JSON number for `value`: the shortest decimal that reads back as the same f64 (what
/// Rust's `Display` prints), or `null` when it is not finite (JSON has no NaN/∞).
///
/// Fast path for the generator's values, which are multiples of 0.1: if `value` is the
/// f64 nearest to n/10 for an integer n, that one-decimal string reads back exactly, and no
/// shorter decimal does (the next shorter candidates, whole numbers, are ≥ 0.1 away, far
/// more than half an ulp below 2^40), so it is the string `Display` would print; the
/// `fast_path_matches_display` test checks this on random values.
fn write_f64(out: &mut Vec<u8>, value: f64) {
    if !value.is_finite() {
        out.extend_from_slice(b"null");
        return;
    }
    let tenths = round_fast(value * 10.0);
    if tenths.abs() < 1e12 && tenths / 10.0 == value && !(value == 0.0 && value.is_sign_negative())
    {
        // |tenths| < 1e12, so the cast is exact.
        let tenths = tenths as i64;
        if tenths < 0 {
            out.push(b'-');
        }
        let magnitude = tenths.unsigned_abs();
        write_i64(out, (magnitude / 10) as i64);
        if !magnitude.is_multiple_of(10) {
            out.push(b'.');
            out.push(b'0' + (magnitude % 10) as u8);
        }
        return;
    }
    use std::io::Write as _;
    // Writing into a Vec<u8> cannot fail: its io::Write impl only grows the vector.
    let _ = write!(out, "{value}");
}

/// Writes `ts` as RFC 3339 UTC (`2026-03-02T08:14:07Z`, with `.mmm` only when the
/// milliseconds are not zero), the same text as [`Millis::to_rfc3339`] without allocating.
///
/// Civil date from a day count: Howard Hinnant's `civil_from_days` ("chrono-Compatible
/// Low-Level Date Algorithms", 2013), valid for every day of the proleptic Gregorian
/// calendar; callers pass only times in `[MIN_EVENT_TIME, MAX_EVENT_TIME]` (years 1970-9999).
fn write_rfc3339(out: &mut Vec<u8>, ts: Millis) {
    let days = ts.0.div_euclid(DAY_MS);
    let ms_of_day = ts.0.rem_euclid(DAY_MS);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097; // day of era, [0, 146096]
    let yoe = (doe - doe / 1_460 + doe / 36_524 - doe / 146_096) / 365; // year of era, [0, 399]
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100); // day of year from March 1, [0, 365]
    let mp = (5 * doy + 2) / 153; // month from March, [0, 11]
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);

    // Filled in place and appended once: this runs for every line.
    let mut text = *b"0000-00-00T00:00:00.000Z";
    fn two(text: &mut [u8; 24], at: usize, v: i64) {
        text[at] = b'0' + (v / 10) as u8;
        text[at + 1] = b'0' + (v % 10) as u8;
    }
    two(&mut text, 0, year / 100);
    two(&mut text, 2, year % 100);
    two(&mut text, 5, month);
    two(&mut text, 8, day);
    two(&mut text, 11, ms_of_day / 3_600_000);
    two(&mut text, 14, ms_of_day / 60_000 % 60);
    two(&mut text, 17, ms_of_day / 1_000 % 60);
    let ms = ms_of_day % 1_000;
    if ms == 0 {
        text[19] = b'Z';
        out.extend_from_slice(&text[..20]);
    } else {
        text[20] = b'0' + (ms / 100) as u8;
        two(&mut text, 21, ms % 100);
        out.extend_from_slice(&text);
    }
}

/// Renders one good event line (no trailing newline) exactly as the feed does, with `ts`
/// in RFC 3339. Strings are JSON-escaped; a non-finite number becomes `null`; a `ts`
/// outside the accepted range (1970 to 9999) is written as integer milliseconds.
#[allow(clippy::too_many_arguments)] // mirrors the eight fields of the event, in order
pub fn event_line(
    ts: Millis,
    card: &str,
    mode: &str,
    zone: &str,
    fare_cents: i64,
    trip_km: f64,
    trip_minutes: f64,
    transfers: u32,
) -> String {
    let fields = EventFields {
        ts,
        ts_as_integer: false,
        card: card.as_bytes(),
        mode: mode.as_bytes(),
        zone: zone.as_bytes(),
        fare_cents,
        trip_km,
        trip_minutes,
        transfers,
    };
    let mut line = Vec::with_capacity(176);
    write_event(&mut line, &fields, Defect::None);
    // Every byte written is ASCII or was copied whole from a &str, so this is UTF-8; the
    // lossy branch exists only to avoid a panic path.
    match String::from_utf8(line) {
        Ok(text) => text,
        Err(err) => String::from_utf8_lossy(err.as_bytes()).into_owned(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use std::collections::{HashMap, HashSet};
    use std::sync::OnceLock;

    /// The categories of scenario.md ("One event"), written out here rather than taken
    /// from the module under test.
    const SCENARIO_MODES: [&str; 3] = ["tram", "ferry", "bus"];
    const SCENARIO_ZONES: [&str; 5] = [
        "harbour",
        "old-town",
        "uplands",
        "riverside",
        "airport-link",
    ];

    /// One good line, as an independent reader sees it.
    #[derive(Clone, Debug)]
    struct Seen {
        ts: Millis,
        card: String,
        mode: String,
        zone: String,
        fare_cents: i64,
        trip_km: f64,
        trip_minutes: f64,
        transfers: u64,
    }

    /// Reads a line the way a strict consumer of scenario.md's event format would: valid
    /// UTF-8 JSON object, exactly the eight fields, `ts` RFC 3339 or integer milliseconds,
    /// known mode and zone, integer fare and transfers, numeric trip fields.
    fn read_line(line: &[u8]) -> Option<Seen> {
        let value: serde_json::Value = serde_json::from_slice(line).ok()?;
        let object = value.as_object()?;
        if object.len() != 8 {
            return None;
        }
        let ts = match object.get("ts")? {
            serde_json::Value::String(text) => Millis::parse_rfc3339(text)?,
            serde_json::Value::Number(number) => Millis(number.as_i64()?),
            _ => return None,
        };
        let text = |name: &str| object.get(name)?.as_str().map(str::to_string);
        let seen = Seen {
            ts,
            card: text("card")?,
            mode: text("mode")?,
            zone: text("zone")?,
            fare_cents: object.get("fare_cents")?.as_i64()?,
            trip_km: object.get("trip_km")?.as_f64()?,
            trip_minutes: object.get("trip_minutes")?.as_f64()?,
            transfers: object.get("transfers")?.as_u64()?,
        };
        let known = SCENARIO_MODES.contains(&seen.mode.as_str())
            && SCENARIO_ZONES.contains(&seen.zone.as_str());
        known.then_some(seen)
    }

    /// What a consumer can see of one whole feed.
    struct Analysis {
        stats: FeedStats,
        n_lines: u64,
        n_unreadable: u64,
        /// Good lines that lag the newest earlier good line by more than 5 minutes.
        n_lagging: u64,
        /// Largest lag of those, ms.
        max_lag_ms: i64,
        /// Whether on-time good lines came out in non-decreasing time.
        on_time_ordered: bool,
        has_newline: bool,
        good: Vec<Seen>,
    }

    fn analyse(spec: &FeedSpec) -> Analysis {
        let mut feed = DemoFeed::new(spec);
        let mut analysis = Analysis {
            stats: FeedStats::default(),
            n_lines: 0,
            n_unreadable: 0,
            n_lagging: 0,
            max_lag_ms: 0,
            on_time_ordered: true,
            has_newline: false,
            good: Vec::new(),
        };
        let mut newest: Option<i64> = None;
        for line in feed.by_ref() {
            analysis.n_lines += 1;
            analysis.has_newline |= line.contains(&b'\n');
            let Some(seen) = read_line(&line) else {
                analysis.n_unreadable += 1;
                continue;
            };
            match newest {
                Some(max) if seen.ts.0 < max - DESIGN_LATENESS_MS => {
                    analysis.n_lagging += 1;
                    analysis.max_lag_ms = analysis.max_lag_ms.max(max - seen.ts.0);
                }
                Some(max) if seen.ts.0 < max => analysis.on_time_ordered = false,
                _ => newest = Some(seen.ts.0),
            }
            analysis.good.push(seen);
        }
        analysis.stats = *feed.stats();
        analysis
    }

    /// The default week (≈ 220 k lines), analysed once and shared by several tests.
    fn default_week() -> &'static Analysis {
        static WEEK: OnceLock<Analysis> = OnceLock::new();
        WEEK.get_or_init(|| analyse(&FeedSpec::default()))
    }

    /// |observed − n·p| ≤ 5·√(n·p·(1−p)): the binomial mean and variance (common practice),
    /// with z = 5 (two-sided normal tail 5.7e-7), so a correct generator fails this for
    /// fewer than one seed in a million. The feed's seed is fixed, so the test is stable.
    fn assert_binomial(observed: u64, n: u64, p: f64, what: &str) {
        let mean = n as f64 * p;
        let sd = (n as f64 * p * (1.0 - p)).sqrt();
        let off = (observed as f64 - mean).abs();
        assert!(
            off <= 5.0 * sd,
            "{what}: {observed} of {n}, expected {mean:.1} ± 5·{sd:.2}"
        );
    }

    #[test]
    fn same_seed_same_lines_other_seed_differs() {
        let spec = FeedSpec {
            n_cards: 2_000,
            days: 2,
            ..FeedSpec::default()
        };
        let first: Vec<Vec<u8>> = DemoFeed::new(&spec).collect();
        let second: Vec<Vec<u8>> = DemoFeed::new(&spec).collect();
        assert!(first.len() > 5_000, "{} lines", first.len());
        assert_eq!(first, second);
        let other: Vec<Vec<u8>> = DemoFeed::new(&FeedSpec {
            seed: spec.seed + 1,
            ..spec.clone()
        })
        .collect();
        assert_ne!(first, other);
        // Not just a shifted copy: most lines differ position by position.
        let n_same = first.iter().zip(&other).filter(|(a, b)| a == b).count();
        assert!(n_same * 100 < first.len(), "{n_same} identical lines");
    }

    #[test]
    fn bad_and_late_counts_match_spec_and_what_a_reader_sees() {
        let busy = FeedSpec {
            n_cards: 1_500,
            days: 3,
            bad_line_share: 0.2,
            late_share: 0.1,
            ..FeedSpec::default()
        };
        for (analysis, spec) in [
            (default_week(), FeedSpec::default()),
            (&analyse(&busy), busy),
        ] {
            let stats = analysis.stats;
            assert_eq!(stats.lines, analysis.n_lines);
            // Each line is bad with probability bad_line_share, independently of how many
            // lines the day plan holds, so bad ~ Bin(lines, p); likewise late (the first
            // few lines, before any feed time exists, cannot be late: a negligible shift).
            assert_binomial(
                stats.bad_lines,
                stats.lines,
                spec.bad_line_share,
                "bad lines",
            );
            assert_binomial(stats.late_lines, stats.lines, spec.late_share, "late lines");
            // The generator's bookkeeping agrees with an independent reader.
            assert_eq!(stats.bad_lines, analysis.n_unreadable, "unreadable lines");
            assert_eq!(stats.late_lines, analysis.n_lagging, "lagging lines");
            assert!(
                analysis.max_lag_ms <= 30 * 60_000,
                "lag {} ms",
                analysis.max_lag_ms
            );
            assert!(analysis.on_time_ordered, "on-time lines out of order");
            assert!(!analysis.has_newline);
        }
    }

    #[test]
    fn good_lines_cover_the_span_and_the_categories() {
        let week = default_week();
        let spec = FeedSpec::default();
        let end = spec.start.0 + 7 * DAY_MS;
        assert!(week.good.len() > 150_000, "{} good lines", week.good.len());
        let mut modes = HashSet::new();
        let mut zones = HashSet::new();
        for seen in &week.good {
            // Late lines may lag the start by up to 30 minutes; nothing reaches the end.
            assert!(
                seen.ts.0 >= spec.start.0 - 30 * 60_000 && seen.ts.0 < end,
                "ts {:?}",
                seen.ts
            );
            assert!(
                seen.card.len() == 8 && seen.card.starts_with("c-"),
                "card {}",
                seen.card
            );
            assert!(
                seen.card[2..]
                    .bytes()
                    .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
            );
            assert!(
                (0.0..=MAX_TRIP_KM).contains(&seen.trip_km),
                "km {}",
                seen.trip_km
            );
            assert!(seen.trip_minutes >= 1.0, "minutes {}", seen.trip_minutes);
            assert!(seen.transfers <= 3);
            modes.insert(seen.mode.clone());
            zones.insert(seen.zone.clone());
        }
        assert_eq!(modes.len(), 3);
        assert_eq!(zones.len(), 5);
        // Cards: at most the population; almost everyone rides in a week (an occasional
        // rider stays home all week with probability 0.55^7 ≈ 1.5%).
        let n_distinct = week
            .good
            .iter()
            .map(|seen| seen.card.as_str())
            .collect::<HashSet<_>>()
            .len();
        assert!(
            (19_000..=20_000).contains(&n_distinct),
            "{n_distinct} distinct cards"
        );
    }

    #[test]
    fn malformed_fares_are_rare_and_the_rest_in_range() {
        let week = default_week();
        let n_out = week
            .good
            .iter()
            .filter(|seen| !(0..=900).contains(&seen.fare_cents))
            .count();
        // Each good line's fare comes from a broken reader with probability 0.002, alone.
        assert_binomial(
            n_out as u64,
            week.good.len() as u64,
            MALFORMED_FARE_SHARE,
            "malformed fares",
        );
        assert!(week.good.iter().any(|seen| seen.fare_cents < 0));
        assert!(week.good.iter().any(|seen| seen.fare_cents > 9_000));
        // Children ride free.
        assert!(week.good.iter().filter(|seen| seen.fare_cents == 0).count() > 1_000);
    }

    #[test]
    fn stuck_validators_tap_dozens_of_times_in_an_hour() {
        let week = default_week();
        let mut per_card_hour: HashMap<(&str, i64), u32> = HashMap::new();
        for seen in &week.good {
            *per_card_hour
                .entry((seen.card.as_str(), seen.ts.0.div_euclid(3_600_000)))
                .or_default() += 1;
        }
        // 2 episodes a day (20 000 cards / 10 000), each 30-200 taps within one hour, so
        // spread over at most 2 clock hours: one of them holds at least 15 taps (pigeonhole;
        // the ~1% of lines lost to bad lines or moved by lateness does not change that at
        // this seed), and at most 2 hours per episode can. Ordinary riders tap at most 4
        // times a day, so no other card-hour reaches 15.
        let n_episodes = 7 * 2;
        let n_heavy = per_card_hour.values().filter(|&&n| n >= 15).count() as u64;
        assert!(
            (n_episodes..=2 * n_episodes).contains(&n_heavy),
            "{n_heavy} heavy card-hours"
        );
        assert!(per_card_hour.values().any(|&n| n >= 30));
        assert!(
            (30 * n_episodes..=200 * n_episodes).contains(&week.stats.spam_lines),
            "{}",
            week.stats.spam_lines
        );
    }

    #[test]
    fn daily_rhythm_has_peaks_and_a_quiet_night() {
        let week = default_week();
        let mut per_hour = [0u64; 24];
        for seen in &week.good {
            let day = seen.ts.0.div_euclid(DAY_MS);
            if (day + 3).rem_euclid(7) < 5 {
                per_hour[(seen.ts.0.rem_euclid(DAY_MS) / 3_600_000) as usize] += 1;
            }
        }
        // By construction commute trips start between 06:00 and 20:25 and occasional rides
        // weigh 01:00-04:00 at 2-3 against 60-110 by day, so the expected ratio of the 08:00
        // hour to the 03:00 hour is in the hundreds; 20 leaves a wide margin.
        assert!(per_hour[8] > 20 * per_hour[3], "{per_hour:?}");
        assert!(per_hour[17] > 20 * per_hour[3], "{per_hour:?}");
        assert!(per_hour[8] > 2 * per_hour[13], "{per_hour:?}");
    }

    #[test]
    fn trip_model_least_squares_recovers_the_true_coefficients() {
        // Source of truth: the generator's own definition (TRUE_* and TRUE_NOISE_SD). This
        // checks that the generator does what it says, which is all demo data needs.
        //
        // Minutes are clamped at 1, which would bias short trips. OLS stays unbiased when
        // rows are selected on the regressors alone, so keep rows whose mean is at least
        // 1 + 5.5σ: there the clamp acts with probability Φ(−5.5) ≈ 1.9e-8.
        let week = default_week();
        let mut xtx = nalgebra::Matrix3::<f64>::zeros();
        let mut xty = nalgebra::Vector3::<f64>::zeros();
        let mut n_rows = 0u64;
        for seen in &week.good {
            let transfers = seen.transfers as f64;
            let mean = TRUE_INTERCEPT + TRUE_KM * seen.trip_km + TRUE_TRANSFERS * transfers;
            if mean < 1.0 + 5.5 * TRUE_NOISE_SD {
                continue;
            }
            let x = nalgebra::Vector3::new(1.0, seen.trip_km, transfers);
            xtx += x * x.transpose();
            xty += x * seen.trip_minutes;
            n_rows += 1;
        }
        assert!(n_rows > 20_000, "{n_rows} rows");
        let inverse = xtx.try_inverse().expect("design is full rank");
        let beta = inverse * xty;
        // Given X, β̂ − β = (XᵀX)⁻¹Xᵀe with independent errors of variance σ² + 0.1²/12
        // (noise plus rounding to 0.1), so sd(β̂_j) = σ_e·√((XᵀX)⁻¹_jj) (Gauss–Markov; the
        // Gaussian noise makes β̂ exactly normal). Tolerance: 5 sd, as in assert_binomial.
        let sigma_e = (TRUE_NOISE_SD.powi(2) + 0.01 / 12.0).sqrt();
        for (j, truth) in [TRUE_INTERCEPT, TRUE_KM, TRUE_TRANSFERS]
            .into_iter()
            .enumerate()
        {
            let sd = sigma_e * inverse[(j, j)].sqrt();
            assert!(
                (beta[j] - truth).abs() <= 5.0 * sd,
                "coefficient {j}: {} vs {truth} (sd {sd})",
                beta[j]
            );
        }
        // The km slope is pinned down to within a few hundredths.
        assert!(sigma_e * inverse[(1, 1)].sqrt() < 0.01);
    }

    #[test]
    fn shares_are_sanitised() {
        let base = FeedSpec {
            n_cards: 300,
            days: 1,
            ..FeedSpec::default()
        };
        let mut all_bad = DemoFeed::new(&FeedSpec {
            bad_line_share: 2.0,
            late_share: 0.5,
            ..base.clone()
        });
        let n_lines = all_bad.by_ref().count() as u64;
        assert!(n_lines > 0);
        assert_eq!(all_bad.stats().bad_lines, n_lines);
        assert_eq!(all_bad.stats().late_lines, 0);

        let mut clean = DemoFeed::new(&FeedSpec {
            bad_line_share: f64::NAN,
            late_share: -1.0,
            ..base.clone()
        });
        assert!(clean.by_ref().all(|line| read_line(&line).is_some()));
        assert_eq!((clean.stats().bad_lines, clean.stats().late_lines), (0, 0));
    }

    #[test]
    fn empty_specs_give_empty_feeds_and_the_span_is_respected() {
        assert_eq!(
            DemoFeed::new(&FeedSpec {
                n_cards: 0,
                ..FeedSpec::default()
            })
            .count(),
            0
        );
        assert_eq!(
            DemoFeed::new(&FeedSpec {
                days: 0,
                ..FeedSpec::default()
            })
            .count(),
            0
        );
        // A start in the middle of a day: on-time lines stay inside [start, start + 1 day).
        let start = Millis(FeedSpec::default().start.0 + 13 * 3_600_000 + 1_234);
        let spec = FeedSpec {
            n_cards: 1_000,
            days: 1,
            start,
            late_share: 0.0,
            ..FeedSpec::default()
        };
        let analysis = analyse(&spec);
        assert!(analysis.good.len() > 500);
        assert!(
            analysis
                .good
                .iter()
                .all(|seen| (start.0..start.0 + DAY_MS).contains(&seen.ts.0))
        );
    }

    #[test]
    fn card_ids_never_collide() {
        let mut rng = ChaCha20Rng::seed_from_u64(7);
        let small = CardIdMap::new(20_000, &mut rng);
        let ids: HashSet<u64> = (0..1u32 << 16).map(|idx| small.id(idx)).collect();
        assert_eq!(ids.len(), 1 << 16);
        assert!(ids.iter().all(|&id| id < 1 << 24));
        let large = CardIdMap::new(u32::MAX, &mut rng);
        let ids: HashSet<u64> = (0..1u32 << 16)
            .map(|idx| large.id(idx.wrapping_mul(65_537)))
            .collect();
        assert_eq!(ids.len(), 1 << 16);
        let mut buf = [0u8; 10];
        assert_eq!(large.render(3, &mut buf), 10);
        assert_eq!(small.render(3, &mut buf), 8);
    }

    #[test]
    fn event_line_matches_the_scenario_example() {
        // scenario.md, "One event" (the two displayed lines joined, without the indent).
        let expected = concat!(
            r#"{"ts":"2026-03-02T08:14:07Z","card":"c-7f3a91","mode":"tram","zone":"harbour","#,
            r#""fare_cents":240,"trip_km":3.8,"trip_minutes":14.5,"transfers":0}"#
        );
        let line = event_line(
            Millis(1_772_439_247_000),
            "c-7f3a91",
            "tram",
            "harbour",
            240,
            3.8,
            14.5,
            0,
        );
        assert_eq!(line, expected);
    }

    #[test]
    fn event_line_edge_values() {
        let line = event_line(
            Millis(1_772_439_247_250),
            "a\"b\\c\n\u{1}é",
            "m",
            "z",
            -5,
            f64::NAN,
            -0.0,
            3,
        );
        let value: serde_json::Value = serde_json::from_str(&line).unwrap();
        assert_eq!(value["ts"], "2026-03-02T08:14:07.250Z");
        assert_eq!(value["card"], "a\"b\\c\n\u{1}é");
        assert!(value["trip_km"].is_null());
        assert_eq!(value["fare_cents"], -5);
        // Before 1970 the accepted text form does not exist: integer milliseconds.
        let early = event_line(Millis(-1), "c", "m", "z", 0, 1.0, 1.0, 0);
        assert!(early.starts_with(r#"{"ts":-1,"#), "{early}");
    }

    proptest! {
        /// Reference: `Millis::to_rfc3339`, built on the `time` crate.
        #[test]
        fn rfc3339_writer_matches_the_time_crate(ms in MIN_EVENT_TIME.0..=MAX_EVENT_TIME.0) {
            let mut out = Vec::new();
            write_rfc3339(&mut out, Millis(ms));
            prop_assert_eq!(String::from_utf8(out).unwrap(), Millis(ms).to_rfc3339());
        }

        /// Reference: Rust's shortest round-trip `Display` for f64.
        #[test]
        fn fast_path_matches_display(tenths in -10_000_000i64..10_000_000, any in proptest::num::f64::NORMAL) {
            for value in [tenths as f64 / 10.0, any] {
                let mut out = Vec::new();
                write_f64(&mut out, value);
                prop_assert_eq!(String::from_utf8(out).unwrap(), format!("{value}"));
            }
        }

        /// Reference: `f64::round`, bit for bit (signed zeros included).
        #[test]
        fn round_fast_matches_round(x in any::<f64>(), tenths in -1e7f64..1e7) {
            for value in [x, tenths, tenths.trunc() + 0.5, tenths.trunc() - 0.5] {
                if value.is_nan() {
                    prop_assert!(round_fast(value).is_nan());
                } else {
                    prop_assert_eq!(round_fast(value).to_bits(), value.round().to_bits(), "{}", value);
                }
            }
        }

        /// Reference: serde_json reading the line back.
        #[test]
        fn event_line_round_trips_through_serde_json(
            ms in MIN_EVENT_TIME.0..=MAX_EVENT_TIME.0,
            card in any::<String>(),
            zone in "[a-z-]{0,12}",
            fare_cents in any::<i64>(),
            trip_km in proptest::num::f64::NORMAL | proptest::num::f64::ZERO,
            trip_minutes in -1e6f64..1e6,
            transfers in any::<u32>(),
        ) {
            let line = event_line(Millis(ms), &card, "bus", &zone, fare_cents, trip_km, trip_minutes, transfers);
            prop_assert!(!line.contains('\n'));
            let value: serde_json::Value = serde_json::from_str(&line).unwrap();
            prop_assert_eq!(Millis::parse_rfc3339(value["ts"].as_str().unwrap()), Some(Millis(ms)));
            prop_assert_eq!(value["card"].as_str(), Some(card.as_str()));
            prop_assert_eq!(value["zone"].as_str(), Some(zone.as_str()));
            prop_assert_eq!(value["fare_cents"].as_i64(), Some(fare_cents));
            prop_assert_eq!(value["trip_km"].as_f64(), Some(trip_km));
            prop_assert_eq!(value["trip_minutes"].as_f64(), Some(trip_minutes));
            prop_assert_eq!(value["transfers"].as_u64(), Some(u64::from(transfers)));
        }
    }
}
