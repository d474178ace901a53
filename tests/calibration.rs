//! Calibration of released error bars: over many independent runs, the standardised error
//! (released − true) / std_error of every scalar release must look like N(0, 1).
//!
//! Why this is an outside check: the std_error printed in a record is computed from the
//! plan (sensitivity, σ², estimator weights); the exact truth comes from the engine's
//! un-noised aggregates. If the noise were mis-scaled, or the estimator's variance formula
//! wrong, the z-scores would not have variance 1. Tolerances come from the sampling
//! distribution of the mean and variance of n i.i.d. N(0,1) draws (central limit theorem):
//! mean within 4/√n and variance within 4·√(2/n) of 1, a 4-sigma band, so with fixed seeds
//! the test is deterministic and a real scale error of 10% or more fails it.

use scrim::config::Config;
use scrim::engine::noise::NoiseKey;
use scrim::engine::release::Release;
use scrim::engine::{Engine, EngineOptions};

fn config(mechanism: &str, unit: bool) -> Config {
    let unit_part = if unit { "unit_field = \"card\"\n" } else { "" };
    let bounds = if unit {
        "lifetime_rho = 100.0\nmax_events_per_window = 2\nmax_windows_per_epoch = 8\n"
    } else {
        ""
    };
    let toml = format!(
        r#"
[input]
time_field = "ts"
{unit_part}
[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 0.5
delta = 1e-9
epoch_windows = 16
mechanism = "{mechanism}"
{bounds}
[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
trailing = [4]
[stats.keys]
zone = ["harbour", "old-town", "uplands"]

[[stats]]
name = "fares"
kind = "sum"
field = "fare_cents"
range = [0, 900]

[[stats]]
name = "minutes"
kind = "mean"
field = "trip_minutes"
range = [0, 120]
"#
    );
    Config::from_toml_str(&toml).expect("test config is valid")
}

/// A small deterministic feed: `n_windows` hours, a few events per hour per zone.
fn feed(n_windows: i64) -> Vec<String> {
    let zones = ["harbour", "old-town", "uplands"];
    let mut lines = Vec::new();
    let t0 = 1_772_409_600_000i64; // 2026-03-02T00:00:00Z
    for w in 0..n_windows {
        for i in 0..(20 + (w * 7) % 13) {
            let ts = t0 + w * 3_600_000 + i * 60_000;
            let zone = zones[(i as usize + w as usize) % 3];
            let fare = (i * 37 + w * 11) % 1000; // some above the 900 clamp
            let minutes = 5.0 + ((i * 13 + w) % 40) as f64;
            lines.push(format!(
                r#"{{"ts":{ts},"card":"c-{:03}","zone":"{zone}","fare_cents":{fare},"trip_minutes":{minutes}}}"#,
                i % 9
            ));
        }
    }
    lines
}

fn run(cfg: &Config, seed: u64, lines: &[String]) -> Vec<Release> {
    let mut engine = Engine::new(
        cfg,
        NoiseKey::from_seed(seed),
        EngineOptions {
            seeded: true,
            danger_keep_truth: true,
        },
    )
    .expect("engine builds");
    let mut out = Vec::new();
    for l in lines {
        engine.handle_line(l.as_bytes());
        while let Some(r) = engine.poll_release() {
            out.push(r);
        }
    }
    engine.finish();
    while let Some(r) = engine.poll_release() {
        out.push(r);
    }
    out
}

fn z_scores(records: &[Release], pick: impl Fn(&Release) -> bool) -> Vec<f64> {
    records
        .iter()
        .filter(|r| pick(r))
        .filter_map(|r| {
            let v = r.value.as_f64()?;
            let s = r.std_error.as_f64()?;
            let t = r.truth.as_ref()?.as_f64()?;
            Some((v - t) / s)
        })
        .collect()
}

fn assert_standard_normal(z: &[f64], what: &str) {
    let n = z.len() as f64;
    assert!(n >= 200.0, "{what}: too few samples ({n})");
    let mean = z.iter().sum::<f64>() / n;
    let var = z.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    let mean_tol = 4.0 / n.sqrt();
    let var_tol = 4.0 * (2.0 / n).sqrt();
    assert!(
        mean.abs() < mean_tol,
        "{what}: mean z {mean:.4} outside ±{mean_tol:.4} (n = {n})"
    );
    assert!(
        (var - 1.0).abs() < var_tol,
        "{what}: var z {var:.4} outside 1 ± {var_tol:.4} (n = {n})"
    );
}

/// One z per run and series for the last window, so samples are independent across runs
/// (different keys) even when a mechanism correlates estimates within a run.
fn calibrate(mechanism: &str, unit: bool) {
    let cfg = config(mechanism, unit);
    let lines = feed(16);
    let mut by_scope: std::collections::BTreeMap<(String, String), Vec<f64>> = Default::default();
    for seed in 0..250u64 {
        let recs = run(&cfg, 1_000 + seed, &lines);
        let last_leaf = recs.iter().map(|r| r.leaf).max().expect("releases");
        for kind in ["count", "sum"] {
            for scope in ["window", "epoch_to_date", "trailing:4"] {
                let z = z_scores(&recs, |r| {
                    r.kind == kind && r.scope == scope && r.leaf == last_leaf
                });
                by_scope
                    .entry((kind.to_string(), scope.to_string()))
                    .or_default()
                    .extend(z);
            }
        }
    }
    for ((kind, scope), z) in by_scope {
        if z.is_empty() {
            continue; // the sum statistic has no trailing scope
        }
        assert_standard_normal(&z, &format!("{mechanism} {kind} {scope}"));
    }
}

#[test]
fn independent_noise_is_calibrated_at_event_level() {
    // Window values with independent noise are independent across windows and groups too,
    // so use every window of a few runs.
    let cfg = config("independent", false);
    let lines = feed(16);
    let mut z = Vec::new();
    for seed in 0..10u64 {
        let recs = run(&cfg, seed, &lines);
        z.extend(z_scores(&recs, |r| {
            r.scope == "window" && (r.kind == "count" || r.kind == "sum")
        }));
    }
    assert_standard_normal(&z, "independent window");
}

#[test]
fn tree_is_calibrated_for_every_scope() {
    calibrate("tree", false);
}

#[test]
fn sqrt_factorization_is_calibrated_for_every_scope() {
    calibrate("sqrt-factorization", false);
}

#[test]
fn unit_level_tree_is_calibrated() {
    calibrate("tree", true);
}

#[test]
fn mean_error_bars_are_roughly_honest() {
    // The mean's std_error is a first-order delta-method value, so only coverage is
    // checked: about 95% of ±2·std_error intervals contain the truth. With n intervals the
    // count inside is Binomial(n, 0.954); 4 binomial standard deviations of slack.
    let cfg = config("tree", false);
    let lines = feed(16);
    let mut inside = 0usize;
    let mut n = 0usize;
    for seed in 0..600u64 {
        let recs = run(&cfg, 5_000 + seed, &lines);
        let last = recs.iter().map(|r| r.leaf).max().unwrap_or(0);
        for z in z_scores(&recs, |r| {
            r.kind == "mean" && r.scope == "epoch_to_date" && r.leaf == last
        }) {
            n += 1;
            if z.abs() <= 2.0 {
                inside += 1;
            }
        }
    }
    let p = 0.9545;
    let nf = n as f64;
    let lo = nf * p - 4.0 * (nf * p * (1.0 - p)).sqrt();
    assert!(n >= 500, "n = {n}");
    assert!((inside as f64) > lo, "coverage {inside}/{n} below {lo:.0}");
}
