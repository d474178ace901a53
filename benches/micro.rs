//! Microbenchmarks of scrim's hot paths, so regressions show up (issue 9): the discrete
//! Gaussian sampler, one keyed noise draw as a tree node gets it, the tree mechanism's leaf
//! update and estimates at T = 8760, the normal-equation update of the linear statistic,
//! and parsing one demo line.
//!
//! Run: `cargo bench --bench micro` (a filter after `--` picks benchmarks, e.g.
//! `cargo bench --bench micro -- parse`). Every benchmark is kept short (10 samples,
//! about a second of measurement) so the whole file finishes in about a minute.

use std::hint::black_box;
use std::time::{Duration, Instant};

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use rand::SeedableRng;
use rand::rngs::ChaCha20Rng;

use scrim::config::Config;
use scrim::demo::{DemoFeed, FeedSpec};
use scrim::engine::event::LineShape;
use scrim::engine::mechanism::{self, LeafRange, MechanismKind, NodeAddr, NodeNoise};
use scrim::engine::noise::{self, NoiseId, NoiseKey};
use scrim::engine::{Engine, EngineOptions, linear};

/// Short runs: these are regression alarms, not publication figures.
fn quick(c: &mut Criterion) -> criterion::BenchmarkGroup<'_, criterion::measurement::WallTime> {
    let mut g = c.benchmark_group("micro");
    g.sample_size(10)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    g
}

fn sampler(c: &mut Criterion) {
    let mut g = quick(c);
    let mut rng = ChaCha20Rng::seed_from_u64(1);
    // σ² = 2^32 (σ = 65,536 grid units) and 2^50: typical node variances on fine grids.
    for log2 in [32u32, 50] {
        g.bench_function(format!("discrete_gaussian/sigma2=2^{log2}"), |b| {
            b.iter(|| noise::discrete_gaussian(&mut rng, black_box(1u128 << log2), 1))
        });
    }
    // What the engine pays per tree node: derive the node's ChaCha20 stream from the key
    // and the node identity, then draw.
    let key = NoiseKey::from_seed(1);
    let mut index = 0u64;
    g.bench_function("keyed_node_draw/sigma2=2^32", |b| {
        b.iter(|| {
            index += 1;
            let id = NoiseId {
                stat: "taps_by_zone",
                component: 0,
                group: 3,
                epoch: 0,
                level: 0,
                index,
                coord: 0,
            };
            noise::discrete_gaussian(&mut key.rng_for(&id), 1u128 << 32, 1)
        })
    });
    g.finish();
}

/// Cheap deterministic node noise, so the tree benchmark measures the tree, not the sampler.
struct XorshiftNoise(u64);

impl NodeNoise for XorshiftNoise {
    fn fill(&mut self, _addr: NodeAddr, out: &mut [i128]) {
        for o in out {
            self.0 ^= self.0 << 13;
            self.0 ^= self.0 >> 7;
            self.0 ^= self.0 << 17;
            *o = i128::from((self.0 >> 44) as i64 - (1 << 19));
        }
    }
}

fn tree(c: &mut Criterion) {
    const HORIZON: u32 = 8760;
    const TRAILING: u32 = 24;
    let mut g = quick(c);
    // One hourly leaf of a year-long epoch, then the three scopes a count releases: the
    // window, the epoch to date and the last 24 windows. Leaves cycle through the whole
    // epoch (a fresh tree when it is full, outside the timed part).
    g.bench_function("tree/push_leaf+3_estimates/T=8760", |b| {
        b.iter_custom(|iters| {
            let mut noise = XorshiftNoise(0x9e37_79b9_7f4a_7c15);
            let new_tree =
                || mechanism::new_mechanism(MechanismKind::Tree, HORIZON, 1, TRAILING, 4.0e9);
            let mut tree = new_tree();
            let mut total = Duration::ZERO;
            for i in 0..iters {
                if tree.leaves() == HORIZON {
                    tree = new_tree();
                }
                let t = tree.leaves();
                let started = Instant::now();
                tree.push_leaf(&[black_box(i128::from(i as u32 % 97))], &mut noise);
                let window = tree.estimate(LeafRange { first: t, last: t });
                let to_date = tree.estimate(LeafRange { first: 0, last: t });
                let trailing = tree.estimate(LeafRange {
                    first: t.saturating_sub(TRAILING - 1),
                    last: t,
                });
                total += started.elapsed();
                black_box((window, to_date, trailing));
            }
            total
        })
    });
    g.finish();
}

fn normal_equations(c: &mut Criterion) {
    let mut g = quick(c);
    // The demo's trip model: 2 features plus an intercept, bounds of config/demo.toml.
    let layout = linear::Layout::new(2, true);
    let grid_exp = linear::default_grid_exp(&layout, 40.0, 180.0);
    let mut acc = vec![0i128; layout.dim()];
    let mut step = 0u32;
    g.bench_function("linear/clip+accumulate/d=2", |b| {
        b.iter(|| {
            step = step.wrapping_add(1);
            let mut x = [f64::from(step % 300) / 10.0, f64::from(step % 3)];
            let mut y = 4.0 + 2.6 * x[0] + 3.1 * x[1];
            linear::clip(&mut x, &mut y, 40.0, 180.0);
            linear::accumulate(&layout, &x, y, grid_exp, &mut acc);
        })
    });
    black_box(&acc);
    g.finish();
}

fn parse(c: &mut Criterion) {
    let mut g = quick(c);
    let config = Config::from_toml_str(scrim::app::DEMO_CONFIG).expect("the demo config is valid");
    let engine = Engine::new(&config, NoiseKey::from_seed(1), EngineOptions::default())
        .expect("demo engine");
    let decoder = engine.line_decoder();
    // 4096 lines of the dirty demo feed (about 1% bad lines), cycled.
    let lines: Vec<Vec<u8>> = DemoFeed::new(&FeedSpec {
        n_cards: 5_000,
        days: 1,
        ..FeedSpec::default()
    })
    .take(4096)
    .collect();
    g.throughput(Throughput::Elements(1));
    let mut i = 0usize;
    // What replay does: the keyed hash, with the layout carried from line to line.
    let mut shape = LineShape::new();
    g.bench_function("parse/demo_line/keyed_hash", |b| {
        b.iter(|| {
            i = (i + 1) % lines.len();
            decoder.decode_with(black_box(&lines[i]), &mut shape)
        })
    });
    // With a trivial hash: `parse_with_shape` (what replay uses), `parse` (the fast path with
    // its serde_json fallback, no shape) and `parse_serde` (serde_json alone, the floor of
    // examples/parse_floor.rs).
    let trivial = |raw: &[u8]| {
        raw.iter()
            .fold(0u64, |h, b| h.rotate_left(8) ^ u64::from(*b))
    };
    let mut shape = LineShape::new();
    g.bench_function("parse_with_shape/demo_line/trivial_hash", |b| {
        b.iter(|| {
            i = (i + 1) % lines.len();
            decoder
                .parser()
                .parse_with_shape(black_box(&lines[i]), &trivial, &mut shape)
        })
    });
    g.bench_function("parse/demo_line/trivial_hash", |b| {
        b.iter(|| {
            i = (i + 1) % lines.len();
            decoder.parser().parse(black_box(&lines[i]), &trivial)
        })
    });
    g.bench_function("parse_serde/demo_line/trivial_hash", |b| {
        b.iter(|| {
            i = (i + 1) % lines.len();
            decoder.parser().parse_serde(black_box(&lines[i]), &trivial)
        })
    });
    g.finish();
}

criterion_group!(benches, sampler, tree, normal_equations, parse);
criterion_main!(benches);
