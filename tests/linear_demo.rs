//! Issue 5's acceptance criterion for linear models, on the demo at its configured budget:
//! the epoch_to_date model's coefficients lie within 2 std_error of the generator's truth in
//! at least 90% of seeded runs, and the reported std_errors cover the noiseless fit of the
//! same data about 95% of the time (the delta method's claim).
//!
//! Each run generates a fresh week of the invented Quillhaven feed (its own seed), draws
//! fresh noise (the same seed as key), runs it through the real engine with
//! config/demo.toml, and reads the last epoch_to_date record of `trip_model`.
//!
//! The default test runs [`QUICK_SEEDS`] seeds; the long version runs [`LONG_SEEDS`]:
//! `cargo test --release --test linear_demo -- --ignored --nocapture`.

use scrim::config::Config;
use scrim::demo::{DemoFeed, FeedSpec, TRUE_INTERCEPT, TRUE_KM, TRUE_TRANSFERS};
use scrim::engine::core::{Engine, EngineOptions};
use scrim::engine::noise::NoiseKey;
use scrim::engine::release::Release;

const DEMO_CONFIG: &str = include_str!("../config/demo.toml");

/// Seeds of the default run: a smoke check that fits in `cargo test` (each run generates and
/// processes a week of feed); the 90% criterion itself is asserted by the long run.
const QUICK_SEEDS: u64 = 4;

/// Seeds of the ignored long run.
const LONG_SEEDS: u64 = 200;

/// The coefficients as the record names them, with the generator's values (src/demo.rs).
const TRUTH: [(&str, f64); 3] = [
    ("intercept", TRUE_INTERCEPT),
    ("trip_km", TRUE_KM),
    ("transfers", TRUE_TRANSFERS),
];

/// One run's final epoch_to_date model: (released, std_error, noiseless fit) per coefficient.
struct ModelRun {
    value: Vec<f64>,
    std_error: Vec<f64>,
    exact: Vec<f64>,
}

fn coefficient(v: &serde_json::Value, name: &str) -> f64 {
    v.get(name)
        .and_then(serde_json::Value::as_f64)
        .unwrap_or_else(|| panic!("coefficient {name} missing or null in {v}"))
}

fn run_seed(seed: u64) -> ModelRun {
    let config = Config::from_toml_str(DEMO_CONFIG).expect("demo config");
    let mut engine = Engine::new(
        &config,
        NoiseKey::from_seed(seed),
        EngineOptions {
            seeded: true,
            danger_keep_truth: true,
        },
    )
    .expect("engine");
    let spec = FeedSpec {
        seed,
        ..FeedSpec::default()
    };
    let mut last: Option<Release> = None;
    let mut keep = |r: Release| {
        if r.stat == "trip_model" && r.scope == "epoch_to_date" {
            last = Some(r);
        }
    };
    for line in DemoFeed::new(&spec) {
        engine.handle_line(&line);
        while let Some(r) = engine.poll_release() {
            keep(r);
        }
    }
    engine.finish();
    while let Some(r) = engine.poll_release() {
        keep(r);
    }
    let rec = last.expect("a trip_model epoch_to_date record");
    assert_eq!(rec.leaf, 167, "the last record closes the week");
    let truth = rec.truth.as_ref().expect("kept truth");
    ModelRun {
        value: TRUTH
            .iter()
            .map(|(n, _)| coefficient(&rec.value, n))
            .collect(),
        std_error: TRUTH
            .iter()
            .map(|(n, _)| coefficient(&rec.std_error, n))
            .collect(),
        exact: TRUTH.iter().map(|(n, _)| coefficient(truth, n)).collect(),
    }
}

/// Per coefficient, how many runs put `target` within 2 std_error; and how many runs did so
/// for all coefficients at once.
fn tally(runs: &[ModelRun], target: impl Fn(&ModelRun, usize) -> f64) -> (Vec<usize>, usize) {
    let mut per = vec![0usize; TRUTH.len()];
    let mut joint = 0usize;
    for r in runs {
        let inside: Vec<bool> = (0..TRUTH.len())
            .map(|k| (r.value[k] - target(r, k)).abs() <= 2.0 * r.std_error[k])
            .collect();
        for (k, ok) in inside.iter().enumerate() {
            per[k] += usize::from(*ok);
        }
        joint += usize::from(inside.iter().all(|ok| *ok));
    }
    (per, joint)
}

fn check(n_seeds: u64) {
    let runs: Vec<ModelRun> = (1..=n_seeds).map(run_seed).collect();
    let n = runs.len();
    let (vs_truth, joint_truth) = tally(&runs, |_, k| TRUTH[k].1);
    let (vs_exact, joint_exact) = tally(&runs, |r, k| r.exact[k]);
    for (k, (name, _)) in TRUTH.iter().enumerate() {
        let mean_se = runs.iter().map(|r| r.std_error[k]).sum::<f64>() / n as f64;
        println!(
            "{name:>10}: within 2 SE of the generator {}/{n}, of the noiseless fit {}/{n}; mean SE {mean_se:.4}",
            vs_truth[k], vs_exact[k]
        );
    }
    println!("all three at once: generator {joint_truth}/{n}, noiseless fit {joint_exact}/{n}");
    // Issue 5: each coefficient within 2 std_error of the generator's truth in ≥ 90% of runs
    // (long run); the quick run allows one miss in its 4 runs. The std_error covers only the
    // release noise; the sampling error of the fit itself (SE ≈ 0.002 for trip_km with
    // 217,000 rows and residual SD 3) is negligible beside it.
    // Coverage of the noiseless fit: a ±2σ normal interval holds 95.45% (common practice), so
    // misses are Binomial(n, 0.0455). The quick run allows 1 of 4 (P(≥ 2) ≈ 1.2%); the long
    // run allows 20 of 200 (P(≥ 21) ≈ 4e-4, exact binomial sum), so both fail only for a
    // broken std_error.
    let max_misses = if n < 10 { 1 } else { n / 10 };
    for (k, (name, _)) in TRUTH.iter().enumerate() {
        assert!(
            n - vs_truth[k] <= max_misses,
            "{name}: within 2 std_error of the generator's {} in only {}/{n} runs",
            TRUTH[k].1,
            vs_truth[k]
        );
        assert!(
            n - vs_exact[k] <= max_misses,
            "{name}: the noiseless fit lies outside ±2 std_error in {}/{n} runs",
            n - vs_exact[k]
        );
    }
}

#[test]
fn demo_model_coefficients_cover_the_generator_truth() {
    check(QUICK_SEEDS);
}

/// The long run (about 2 s per seed in release mode).
#[test]
#[ignore = "long: cargo test --release --test linear_demo -- --ignored --nocapture"]
fn demo_model_coefficients_cover_the_generator_truth_long() {
    check(LONG_SEEDS);
}
