//! Closing one window of a count with 100,000 groups (two group fields, 1,000 × 100 keys)
//! in an epoch of T = 8760 windows
//! (issue 9's target: under 200 ms). The engine runs at event level with one event per
//! group per window; the timed part is the event that moves the watermark past the window
//! (which closes it: every group's tree takes its leaf and node noise, and every group's
//! records for both scopes are built) plus draining the 200,000 records from the outbox.
//! Filling the window is not timed.
//!
//! Run: `cargo bench --bench window_close`
//!
//! Two cases: `steady` closes later windows of a running epoch; `first_of_epoch` closes the
//! first window, which also charges the budget and builds the 100,000 mechanisms. Each runs
//! on one thread and, as `…/2_threads`, with `Engine::set_close_threads(2)` (the daemon
//! sets one thread per core; the groups' noise is then drawn on both).

use std::hint::black_box;
use std::time::{Duration, Instant};

use criterion::{Criterion, SamplingMode, criterion_group, criterion_main};

use scrim::config::Config;
use scrim::engine::noise::NoiseKey;
use scrim::engine::{Engine, EngineOptions};

const N_GROUPS: usize = 100_000;
const EPOCH_WINDOWS: u32 = 8760;
const HOUR_MS: i64 = 3_600_000;
/// 2026-03-02T00:00:00Z, the demo feed's start (a window boundary).
const T0_MS: i64 = 1_772_409_600_000;

/// The configuration caps one group field at 10,000 keys, so the 100,000 groups are the
/// cross product of a field with 1,000 keys and one with 100.
const N_KEYS_A: usize = 1_000;
const N_KEYS_B: usize = N_GROUPS / N_KEYS_A;

/// The `(a, b)` key pair of group `group`.
fn key_pair(group: usize) -> (String, String) {
    (
        format!("a{:04}", group / N_KEYS_B),
        format!("b{:03}", group % N_KEYS_B),
    )
}

fn config() -> Config {
    let list = |keys: Vec<String>| {
        keys.iter()
            .map(|k| format!("\"{k}\""))
            .collect::<Vec<_>>()
            .join(",")
    };
    let keys_a = list((0..N_KEYS_A).map(|g| key_pair(g * N_KEYS_B).0).collect());
    let keys_b = list((0..N_KEYS_B).map(|g| key_pair(g).1).collect());
    let toml = format!(
        r#"
[input]
time_field = "ts"
[window]
length = "1h"
allowed_lateness = "0s"
[privacy]
rho_per_epoch = 1.0
delta = 1e-9
epoch_windows = {EPOCH_WINDOWS}
[[stats]]
name = "hits"
kind = "count"
group_by = ["a", "b"]
[stats.keys]
a = [{keys_a}]
b = [{keys_b}]
"#
    );
    Config::from_toml_str(&toml).expect("valid benchmark config")
}

/// Feeds a window's lines (untimed).
fn fill(engine: &mut Engine, lines: &[Vec<u8>]) {
    for line in lines {
        engine.handle_line(line);
    }
}

/// Lines for one window: one event per group, 1 s apart within the hour.
fn window_lines(window_idx: i64) -> Vec<Vec<u8>> {
    (0..N_GROUPS)
        .map(|g| {
            let ts = T0_MS + window_idx * HOUR_MS + (g as i64 % 3600) * 1000;
            let (a, b) = key_pair(g);
            format!(r#"{{"ts":{ts},"a":"{a}","b":"{b}"}}"#).into_bytes()
        })
        .collect()
}

/// The event at the start of window `window_idx + 1` that closes window `window_idx`, and
/// the drain of its records. Returns the time and the number of records.
fn close(engine: &mut Engine, window_idx: i64) -> (Duration, usize) {
    let (a, b) = key_pair(0);
    let ts = T0_MS + (window_idx + 1) * HOUR_MS;
    let trigger = format!(r#"{{"ts":{ts},"a":"{a}","b":"{b}"}}"#);
    let started = Instant::now();
    engine.handle_line(trigger.as_bytes());
    let mut n_records = 0;
    while let Some(r) = engine.poll_release() {
        black_box(r);
        n_records += 1;
    }
    (started.elapsed(), n_records)
}

fn window_close(c: &mut Criterion) {
    let config = config();
    let new_engine =
        || Engine::new(&config, NoiseKey::from_seed(1), EngineOptions::default()).expect("engine");
    let mut g = c.benchmark_group("window_close/100k_groups/T=8760");
    g.sample_size(10)
        .sampling_mode(SamplingMode::Flat)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2));

    for threads in [1usize, 2] {
        let name = if threads == 1 {
            "steady".to_string()
        } else {
            format!("steady/{threads}_threads")
        };
        g.bench_function(name, |b| {
            let mut engine = new_engine();
            engine.set_close_threads(threads);
            fill(&mut engine, &window_lines(0));
            let _ = close(&mut engine, 0); // the epoch's first window, measured below
            let mut window_idx = 1i64;
            b.iter_custom(|iters| {
                let mut total = Duration::ZERO;
                for _ in 0..iters {
                    if window_idx >= i64::from(EPOCH_WINDOWS) {
                        // Stay inside one epoch (never reached with these run lengths).
                        engine = new_engine();
                        engine.set_close_threads(threads);
                        window_idx = 0;
                    }
                    fill(&mut engine, &window_lines(window_idx));
                    let (elapsed, n_records) = close(&mut engine, window_idx);
                    assert_eq!(
                        n_records,
                        2 * N_GROUPS,
                        "window and epoch_to_date per group"
                    );
                    total += elapsed;
                    window_idx += 1;
                }
                total
            })
        });
    }

    for threads in [1usize, 2] {
        let name = if threads == 1 {
            "first_of_epoch".to_string()
        } else {
            format!("first_of_epoch/{threads}_threads")
        };
        g.bench_function(name, |b| {
            let lines = window_lines(0);
            b.iter_custom(|iters| {
                let mut total = Duration::ZERO;
                for _ in 0..iters {
                    let mut engine = new_engine();
                    engine.set_close_threads(threads);
                    fill(&mut engine, &lines);
                    let (elapsed, n_records) = close(&mut engine, 0);
                    assert_eq!(n_records, 2 * N_GROUPS);
                    total += elapsed;
                }
                total
            })
        });
    }
    g.finish();
}

criterion_group!(benches, window_close);
criterion_main!(benches);
