//! `scrim plan` against its schema (ops/plan.schema.json) and against the releases: the
//! std_errors `plan --json` predicts before any data must be the std_errors a `replay` with
//! the same configuration writes into its records, for every kind, scope and mechanism, at
//! the epoch's last window and at an intermediate one.
//!
//! Why exact agreement is expected: a record's std_error is `√(node_var · u) · q`, where
//! `node_var` and the grid step `q` come from the plan and `u` is the mechanism's data-free
//! variance factor for the scope's leaf range after `leaf + 1` leaves; `plan` evaluates the
//! same function on the same numbers (src/engine/mechanism/mod.rs, `estimate_variance`).
//! Only the JSON round trip of the two doubles separates them, and serde_json's
//! float_roundtrip makes that exact: the relative tolerance of 1e-9 has nothing to absorb
//! (the values come out bit-identical), and any modelling slip would exceed it.
//!
//! Means are the exception: the record's std_error is a delta-method ratio that uses the
//! noisy count, which no plan can know. What is predictable is checked instead (see
//! `check_mean`).

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Output};

use serde_json::Value;

fn scrim(args: &[&str], dir: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_scrim"))
        .args(args)
        .current_dir(dir)
        .env_remove("RUST_LOG")
        .output()
        .expect("the scrim binary runs")
}

fn validator() -> jsonschema::Validator {
    let text =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("ops/plan.schema.json"))
            .expect("ops/plan.schema.json ships with the repository");
    let schema: Value = serde_json::from_str(&text).expect("the schema is JSON");
    jsonschema::validator_for(&schema).expect("the schema compiles")
}

/// Runs `plan --json` with `extra` arguments and returns the parsed output.
fn plan_json(dir: &Path, config: &str, extra: &[&str]) -> Value {
    let mut args = vec!["plan", "--json", "--config", config, "--start", START];
    args.extend_from_slice(extra);
    let o = scrim(&args, dir);
    assert!(
        o.status.success(),
        "plan {extra:?} failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    serde_json::from_slice(&o.stdout).expect("plan --json prints JSON")
}

const START: &str = "2026-03-02T00:00:00Z";

/// Unit level, every kind, trailing scopes, two groups; the mechanism is filled in.
/// ρ is large so that the mean's noisy count sits close to the true count (see `check_mean`).
const UNIT_CONFIG: &str = r#"
[input]
time_field = "ts"
unit_field = "card"

[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 40.0
lifetime_rho = 80.0
delta = 1e-9
epoch_windows = 8
max_events_per_window = 2
max_windows_per_epoch = 3
mechanism = "MECHANISM"

[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
trailing = [3]
[stats.keys]
zone = ["a", "b"]

[[stats]]
name = "fares"
kind = "sum"
field = "fare"
range = [-5, 20]
trailing = [4]

[[stats]]
name = "trip"
kind = "mean"
field = "minutes"
range = [0, 60]
trailing = [2]

[[stats]]
name = "model"
kind = "linear"
target = "minutes"
features = ["km"]
feature_norm_bound = 30.0
target_bound = 60.0
"#;

/// Event level (epochs compose in parallel; no caps).
const EVENT_CONFIG: &str = r#"
[input]
time_field = "ts"

[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 40.0
delta = 1e-9
epoch_windows = 8
mechanism = "MECHANISM"

[[stats]]
name = "taps"
kind = "count"
trailing = [5]

[[stats]]
name = "fares"
kind = "sum"
field = "fare"
range = [0, 20]

[[stats]]
name = "trip"
kind = "mean"
field = "minutes"
range = [0, 60]
"#;

const HOURS: i64 = 8;
const PER_HOUR: i64 = 400;

/// One epoch of 8 hourly windows, 400 events each, one event per card (so no contribution
/// bound drops anything and the true count of every scope is 400 × its windows).
fn feed() -> String {
    let t0 = 1_772_409_600_000i64; // 2026-03-02T00:00:00Z
    let mut s = String::new();
    for h in 0..HOURS {
        for i in 0..PER_HOUR {
            let zone = if i % 2 == 0 { "a" } else { "b" };
            s += &format!(
                "{{\"ts\":{},\"card\":\"c{h}-{i}\",\"zone\":\"{zone}\",\"fare\":{},\"minutes\":{},\"km\":{}}}\n",
                t0 + h * 3_600_000 + i * 1000,
                i % 17,
                10 + i % 21,
                1 + i % 9
            );
        }
    }
    s
}

/// Replays the feed with `seed` 1 and returns the records.
fn replay(dir: &Path, config: &str, out: &str) -> Vec<Value> {
    let o = scrim(
        &[
            "replay",
            "--config",
            config,
            "--out",
            out,
            "--seed",
            "1",
            "feed.jsonl",
        ],
        dir,
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    std::fs::read_to_string(dir.join(out).join("releases.jsonl"))
        .expect("releases.jsonl")
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON record"))
        .collect()
}

fn close(a: f64, b: f64, what: &str) {
    assert!(
        (a - b).abs() <= 1e-9 * b.abs().max(f64::MIN_POSITIVE),
        "{what}: release {a} vs plan {b}"
    );
}

/// The plan's entry for `stat` and `scope`.
fn planned<'a>(plan: &'a Value, stat: &str, scope: &str) -> &'a Value {
    let s = plan["stats"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == stat)
        .unwrap_or_else(|| panic!("plan lacks {stat}"));
    s["scopes"]
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["scope"] == scope)
        .unwrap_or_else(|| panic!("plan lacks {stat} {scope}"))
}

/// Mean records: the record's std_error is `√(se_S² + r²·se_C²)/C` with the noisy centred
/// sum S, the noisy count C and r = S/C = value − midpoint (delta method, src/engine/core.rs).
/// With the plan's se_S and se_C this identity gives back C exactly; C must then lie within
/// 6 planned count std_errors of the true count (the count noise is a centred discrete
/// Gaussian with that std_error; a 6σ miss has probability below 2e-9, and the seed is
/// fixed). A wrong se_S or se_C moves C by a factor, which at these counts (≥ 400, σ ≈ 4)
/// is far outside the band. The bound `mean_std_error_times_count / C` must also hold.
fn check_mean(r: &Value, p: &Value, n_true: f64, what: &str) {
    let se_s = p["std_error"][0].as_f64().unwrap();
    let se_c = p["std_error"][1].as_f64().unwrap();
    let value = r["value"].as_f64().expect("a defined mean");
    let se = r["std_error"].as_f64().unwrap();
    let centred = value - 30.0; // midpoint of [0, 60]; the data mean (≈ 20) is not clamped
    let implied_count = (se_s * se_s + centred * centred * se_c * se_c).sqrt() / se;
    assert!(
        (implied_count - n_true).abs() <= 6.0 * se_c,
        "{what}: implied noisy count {implied_count} vs true {n_true} (se_C {se_c})"
    );
    let bound = p["mean_std_error_times_count"].as_f64().unwrap();
    assert!(
        se <= bound / implied_count * (1.0 + 1e-12),
        "{what}: {se} above the planned bound {bound}/{implied_count}"
    );
}

/// Checks every epoch-0 record released at `leaf` against `plan` (made with that leaf).
/// Returns how many records were compared, by kind.
fn check_leaf(records: &[Value], plan: &Value, leaf: u64) -> BTreeMap<String, usize> {
    assert_eq!(plan["leaf"], leaf);
    let mut seen = BTreeMap::new();
    for r in records
        .iter()
        .filter(|r| r["epoch"] == 0 && r["leaf"] == leaf)
    {
        let (stat, scope, kind) = (
            r["stat"].as_str().unwrap(),
            r["scope"].as_str().unwrap(),
            r["kind"].as_str().unwrap(),
        );
        let what = format!("{} {stat} {scope} leaf {leaf}", plan["mechanism"]);
        let p = planned(plan, stat, scope);
        let first = p["first_leaf"].as_u64().unwrap();
        let n_windows = (leaf - first + 1) as f64;
        match kind {
            "count" | "sum" => close(
                r["std_error"].as_f64().unwrap(),
                p["std_error"][0].as_f64().unwrap(),
                &what,
            ),
            "linear" => close(
                r["statistics"]["std_error"].as_f64().unwrap(),
                p["std_error"][0].as_f64().unwrap(),
                &what,
            ),
            "mean" => check_mean(r, p, n_windows * PER_HOUR as f64, &what),
            other => panic!("unexpected kind {other}"),
        }
        *seen.entry(format!("{kind} {scope}")).or_insert(0) += 1;
    }
    seen
}

#[test]
fn plan_std_errors_equal_the_released_std_errors() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("feed.jsonl"), feed()).unwrap();
    let mut compared = 0;
    for (level, template) in [("unit", UNIT_CONFIG), ("event", EVENT_CONFIG)] {
        for mech in ["tree", "sqrt-factorization", "independent"] {
            let cfg = format!("{level}-{mech}.toml");
            std::fs::write(dir.path().join(&cfg), template.replace("MECHANISM", mech)).unwrap();
            let records = replay(dir.path(), &cfg, &format!("out-{level}-{mech}"));
            assert!(
                records.iter().any(|r| r["leaf"] == HOURS - 1),
                "the replay released the epoch's last window"
            );
            let end = plan_json(dir.path(), &cfg, &[]);
            let mid = plan_json(dir.path(), &cfg, &["--leaf", "3"]);
            for (plan, leaf) in [(&end, HOURS as u64 - 1), (&mid, 3)] {
                let seen = check_leaf(&records, plan, leaf);
                // Every kind and every scope of the configuration was compared.
                let expected: usize = plan["stats"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|s| s["scopes"].as_array().unwrap().len())
                    .sum();
                assert_eq!(seen.len(), expected, "{level} {mech} leaf {leaf}: {seen:?}");
                compared += seen.values().sum::<usize>();
            }
            // The end-of-epoch table by mechanism agrees with the configured mechanism's.
            for s in end["stats"].as_array().unwrap() {
                for sc in s["scopes"].as_array().unwrap() {
                    let by_mech = &s["std_error_end_of_epoch"][mech][sc["scope"].as_str().unwrap()];
                    assert_eq!(by_mech, &sc["std_error"]);
                }
            }
        }
    }
    assert!(
        compared >= 2 * 3 * 2 * 10,
        "only {compared} records compared"
    );
}

#[test]
fn what_if_predictions_equal_the_releases_of_the_changed_config() {
    // `plan --what-if mechanism=sqrt-factorization --what-if rho_per_epoch=x0.5` on the tree
    // config must predict what a replay of the changed config releases.
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("feed.jsonl"), feed()).unwrap();
    std::fs::write(
        dir.path().join("tree.toml"),
        UNIT_CONFIG.replace("MECHANISM", "tree"),
    )
    .unwrap();
    std::fs::write(
        dir.path().join("changed.toml"),
        UNIT_CONFIG
            .replace("MECHANISM", "sqrt-factorization")
            .replace("rho_per_epoch = 40.0", "rho_per_epoch = 20.0"),
    )
    .unwrap();
    let v = plan_json(
        dir.path(),
        "tree.toml",
        &[
            "--what-if",
            "mechanism=sqrt-factorization",
            "--what-if",
            "rho_per_epoch=x0.5",
            "--leaf",
            "5",
        ],
    );
    let what_if = &v["what_if"]["plan"];
    assert_eq!(what_if["mechanism"], "sqrt-factorization");
    assert_eq!(what_if["rho_per_epoch"], 20.0);
    assert_eq!(what_if["epochs_allowed"], 4, "80 / 20 epochs");
    let records = replay(dir.path(), "changed.toml", "out");
    let seen = check_leaf(&records, what_if, 5);
    assert_eq!(seen.len(), 3 + 3 + 3 + 2, "every kind and scope: {seen:?}");
    // The comparison is the ratio of the two plans' headline errors.
    for c in v["what_if"]["comparison"].as_array().unwrap() {
        let ratio = c["what_if_std_error"].as_f64().unwrap() / c["std_error"].as_f64().unwrap();
        close(c["ratio"].as_f64().unwrap(), ratio, "comparison ratio");
    }
}

#[test]
fn plan_json_matches_its_schema_with_and_without_what_if() {
    let dir = tempfile::tempdir().unwrap();
    let validator = validator();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/demo.toml");
    let demo = demo.to_str().unwrap();
    std::fs::write(
        dir.path().join("event.toml"),
        EVENT_CONFIG.replace("MECHANISM", "independent"),
    )
    .unwrap();
    let cases: Vec<(&str, Vec<&str>)> = vec![
        (demo, vec![]),
        (demo, vec!["--leaf", "10"]),
        (demo, vec!["--what-if", "rho_per_epoch=x2"]),
        (
            demo,
            vec![
                "--what-if",
                "privacy.max_windows_per_epoch=12",
                "--what-if",
                "stats.fare_revenue.range=x0.5",
                "--what-if",
                "window.length=30m",
                "--what-if",
                "epoch_windows=x2",
            ],
        ),
        ("event.toml", vec![]),
        ("event.toml", vec!["--what-if", "stats.trip.weight=x3"]),
    ];
    for (config, extra) in cases {
        let v = plan_json(dir.path(), config, &extra);
        if let Err(e) = validator.validate(&v) {
            panic!("plan {extra:?} violates the schema: {e}\n{v:#}");
        }
        assert_eq!(
            v["what_if"].is_null(),
            extra.iter().all(|a| *a != "--what-if")
        );
    }
    // The schema is strict: an unknown key, a missing one or a wrong type is refused.
    let v = plan_json(dir.path(), demo, &["--what-if", "delta=1e-10"]);
    let mut extra_key = v.clone();
    extra_key["what_if"]["plan"]["surprise"] = Value::from(1);
    assert!(validator.validate(&extra_key).is_err());
    let mut missing = v.clone();
    missing["stats"][0]
        .as_object_mut()
        .unwrap()
        .remove("scopes");
    assert!(validator.validate(&missing).is_err());
    let mut wrong = v;
    wrong["deployment"]["composition"] = Value::from("parallel");
    assert!(
        validator.validate(&wrong).is_err(),
        "unit level composes sequentially"
    );
}

#[test]
fn plan_reports_what_issue_8_lists() {
    // Demo config: ρ 1 per weekly epoch of 168 hourly windows, lifetime ρ 4 (config/demo.toml).
    let dir = tempfile::tempdir().unwrap();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/demo.toml");
    let v = plan_json(dir.path(), demo.to_str().unwrap(), &[]);
    // Whole deployment: 4 epochs × ρ 1 compose sequentially to ρ 4; its ε at δ = 1e-9 is
    // the README's ≈ 21.3 (privacy-math.md conversion, Canonne, Kamath & Steinke 2020).
    assert_eq!(v["deployment"]["rho"], 4.0);
    let eps = v["deployment"]["epsilon"].as_f64().unwrap();
    assert!((eps - 21.3).abs() < 0.05, "{eps}");
    // 4 epochs × 168 h = 28 days from the start.
    assert_eq!(v["epochs_allowed"], 4);
    assert_eq!(v["schedule"]["budget_ms"], 28i64 * 86_400_000);
    assert_eq!(v["schedule"]["releases_stop_at"], "2026-03-30T00:00:00Z");
    for s in v["stats"].as_array().unwrap() {
        for sc in s["scopes"].as_array().unwrap() {
            let e = sc["std_error"].as_array().unwrap();
            let h = sc["half_width_95"].as_array().unwrap();
            for (e, h) in e.iter().zip(h) {
                // Φ⁻¹(0.975) = 1.959964 (any normal table).
                let ratio = h.as_f64().unwrap() / e.as_f64().unwrap();
                assert!((ratio - 1.959964).abs() < 1e-6, "{ratio}");
            }
        }
        assert_eq!(s["dominant_bound"], "privacy.max_windows_per_epoch");
    }
    // The text form says the same things.
    let o = scrim(
        &["plan", "--config", demo.to_str().unwrap(), "--start", START],
        dir.path(),
    );
    let text = String::from_utf8_lossy(&o.stdout);
    for needle in [
        "epsilon 21.3",
        "covers 4 epoch(s) = 28d",
        "releases stop at 2026-03-30T00:00:00Z",
        "95% half-width",
        "<- dominant",
    ] {
        assert!(text.contains(needle), "plan text lacks {needle:?}:\n{text}");
    }
}

#[test]
fn bad_what_ifs_exit_2_and_name_the_key() {
    let dir = tempfile::tempdir().unwrap();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/demo.toml");
    let demo = demo.to_str().unwrap();
    for (spec, needle) in [
        ("privacy.rho_per_epch=x2", "privacy.rho_per_epoch"),
        ("stats.fares.range=x2", "fare_revenue"),
        ("stats.taps_by_zone.range=x2", "sum and mean"),
        ("max_windows_per_epoch=999", "privacy.max_windows_per_epoch"),
        ("rho_per_epoch=x0", "scale factor"),
        ("stats.trip_model.target_bound=x2", "depends on the data"),
    ] {
        let o = scrim(&["plan", "--config", demo, "--what-if", spec], dir.path());
        assert_eq!(o.status.code(), Some(2), "{spec}");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(err.contains(spec) && err.contains(needle), "{spec}: {err}");
        assert!(o.stdout.is_empty(), "no report on a bad what-if");
    }
    let o = scrim(&["plan", "--config", demo, "--leaf", "168"], dir.path());
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("0 to 167"));
}
