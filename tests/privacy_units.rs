//! Contribution bounding seen from outside: a unit that floods the feed moves the exact
//! (pre-noise) aggregates by at most its bound, and leaves everybody else's bounded
//! contribution unchanged (privacy-math §8: removing one unit changes only that unit's
//! bounded contribution).

use scrim::config::Config;
use scrim::engine::noise::NoiseKey;
use scrim::engine::release::Release;
use scrim::engine::{Engine, EngineOptions};

const K: u32 = 3;

fn config() -> Config {
    Config::from_toml_str(&format!(
        r#"
[input]
time_field = "ts"
unit_field = "card"

[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 0.5
lifetime_rho = 10.0
delta = 1e-9
epoch_windows = 8
max_events_per_window = {K}
max_windows_per_epoch = 4

[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["harbour", "uplands"]

[[stats]]
name = "fares"
kind = "sum"
field = "fare_cents"
range = [0, 900]
"#
    ))
    .expect("valid test config")
}

const T0: i64 = 1_772_409_600_000;

fn honest_lines() -> Vec<String> {
    let mut v = Vec::new();
    for h in 0..6i64 {
        for c in 0..40 {
            // Each honest card taps once or twice an hour: never over the bound.
            for k in 0..(1 + c % 2) {
                let zone = if (c + k) % 3 == 0 {
                    "uplands"
                } else {
                    "harbour"
                };
                v.push(format!(
                    r#"{{"ts":{},"card":"c-{c}","zone":"{zone}","fare_cents":{}}}"#,
                    T0 + h * 3_600_000 + (c * 60 + k) * 1000,
                    100 + c * 10
                ));
            }
        }
    }
    v
}

fn spam_lines(n: usize) -> Vec<String> {
    (0..n)
        .map(|i| {
            format!(
                r#"{{"ts":{},"card":"spammer","zone":"harbour","fare_cents":{}}}"#,
                T0 + 3_600_000 + (i as i64 % 3_000_000),
                (i * 7919) % 900
            )
        })
        .collect()
}

fn truths(lines: &[String]) -> Vec<Release> {
    let mut e = Engine::new(
        &config(),
        NoiseKey::from_seed(5),
        EngineOptions {
            seeded: true,
            danger_keep_truth: true,
        },
    )
    .unwrap();
    let mut out = Vec::new();
    // Time order, as a feed would deliver it.
    let mut sorted: Vec<&String> = lines.iter().collect();
    sorted.sort_by_key(|l| {
        serde_json::from_str::<serde_json::Value>(l).unwrap()["ts"]
            .as_i64()
            .unwrap()
    });
    for l in sorted {
        e.handle_line(l.as_bytes());
        while let Some(r) = e.poll_release() {
            out.push(r);
        }
    }
    e.finish();
    while let Some(r) = e.poll_release() {
        out.push(r);
    }
    out
}

fn truth_of(recs: &[Release], stat: &str, zone: Option<&str>, leaf: u32) -> f64 {
    recs.iter()
        .find(|r| {
            r.stat == stat
                && r.scope == "window"
                && r.leaf == leaf
                && zone.is_none_or(|z| r.group.get("zone").map(String::as_str) == Some(z))
        })
        .and_then(|r| r.truth.as_ref()?.as_f64())
        .expect("record with truth")
}

#[test]
fn a_unit_spamming_10000_events_moves_each_window_by_at_most_its_bound() {
    let honest = honest_lines();
    let mut with = honest.clone();
    with.extend(spam_lines(10_000));
    let a = truths(&honest);
    let b = truths(&with);
    for leaf in 0..6u32 {
        for zone in ["harbour", "uplands"] {
            let d = truth_of(&b, "taps", Some(zone), leaf) - truth_of(&a, "taps", Some(zone), leaf);
            assert!(
                (0.0..=f64::from(K)).contains(&d),
                "leaf {leaf} {zone}: the spammer moved the count by {d}"
            );
        }
        let d = truth_of(&b, "fares", None, leaf) - truth_of(&a, "fares", None, leaf);
        assert!(
            (0.0..=f64::from(K) * 900.0).contains(&d),
            "leaf {leaf}: fares moved by {d}"
        );
    }
    // Honest units are never bounded here, so their counts are exactly the raw counts.
    let raw_harbour_leaf0 = honest
        .iter()
        .filter(|l| {
            l.contains("harbour")
                && serde_json::from_str::<serde_json::Value>(l).unwrap()["ts"]
                    .as_i64()
                    .unwrap()
                    < T0 + 3_600_000
        })
        .count() as f64;
    assert_eq!(truth_of(&a, "taps", Some("harbour"), 0), raw_harbour_leaf0);
    assert_eq!(
        truth_of(&b, "taps", Some("harbour"), 0),
        raw_harbour_leaf0,
        "window 0 has no spam"
    );
}

#[test]
fn the_window_cap_limits_how_many_windows_a_unit_reaches() {
    // One card active in all 6 windows with max_windows_per_epoch = 4: only its first 4
    // windows count.
    let lines: Vec<String> = (0..6i64)
        .map(|h| {
            format!(
                r#"{{"ts":{},"card":"solo","zone":"uplands","fare_cents":5}}"#,
                T0 + h * 3_600_000
            )
        })
        .collect();
    let recs = truths(&lines);
    let counts: Vec<f64> = (0..6)
        .map(|leaf| truth_of(&recs, "taps", Some("uplands"), leaf))
        .collect();
    assert_eq!(counts, vec![1.0, 1.0, 1.0, 1.0, 0.0, 0.0]);
}
