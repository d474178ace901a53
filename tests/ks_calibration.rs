//! Kolmogorov–Smirnov calibration of every released error bar: over many seeded runs,
//! (released − true) / std_error must be standard normal for every stat kind, scope and
//! mechanism.
//!
//! One sample per run per series (the records of the last window of the epoch), so samples
//! are independent: runs use different keys, groups and statistics draw their noise under
//! different identities, and the coordinates of the linear kind's statistics are noised
//! independently. Scopes of one series share noise, so each scope is tested on its own.
//!
//! The test: one-sample KS against `statrs::distribution::Normal`'s CDF, failing when the
//! p-value is below 1e-3 (Kolmogorov's limiting distribution with Stephens' finite-n
//! correction, see [`ks_p_value`]). There are 3 mechanisms × (3 count/sum scopes + 3
//! statistics scopes + 3 mean scopes + 9 coefficient series) tests; with fixed seeds the
//! outcome is deterministic, and a correct implementation passes each with probability
//! 0.999.
//!
//! Exact vs first order:
//! - count, sum and the linear kind's sufficient statistics are linear in the noise, so
//!   their z-score is exactly N(0, 1) (up to the discrete Gaussian's lattice, which at σ ≥ 2^16
//!   grid units moves the CDF by ~1e-5);
//! - the mean and the regression coefficients are non-linear, and their std_error is the
//!   first-order (delta-method) value evaluated at the noisy estimate. Their z-score is
//!   therefore only approximately normal, and the check is looser: the KS distance may exceed
//!   the 1e-3 critical value by an allowance derived below from the exact algebra of each
//!   estimator on a high-probability box of the noise ([`mean_allowance`],
//!   [`coefficient_allowance`]). The feed keeps these estimators far inside their
//!   first-order regime (a large ρ, hundreds of events per window), so the allowance is
//!   small and the check keeps most of its power.
//!
//! Run with `cargo test --test ks_calibration` (about 30 s in the test profile).

use nalgebra::{DMatrix, DVector, SymmetricEigen};
use rand::SeedableRng;
use rand::rngs::ChaCha20Rng;
use rand_distr::{Distribution, StandardNormal};
use scrim::config::Config;
use scrim::engine::mechanism::LeafRange;
use scrim::engine::noise::NoiseKey;
use scrim::engine::plan::Plan;
use scrim::engine::release::Release;
use scrim::engine::{Engine, EngineOptions};
use statrs::distribution::{ContinuousCDF, Normal};

/// Fail when the KS p-value is below this.
const SIGNIFICANCE: f64 = 1e-3;

// ---------------------------------------------------------------------------------------
// Kolmogorov–Smirnov machinery.
// ---------------------------------------------------------------------------------------

fn std_normal() -> Normal {
    Normal::new(0.0, 1.0).expect("standard normal")
}

/// The KS distance sup |F_n − Φ| of a sample (sorted in place), taking both one-sided
/// gaps at every jump of the empirical CDF (common practice).
fn ks_distance(z: &mut [f64]) -> f64 {
    z.sort_by(f64::total_cmp);
    let n = z.len() as f64;
    let phi = std_normal();
    z.iter()
        .enumerate()
        .map(|(i, &x)| {
            let f = phi.cdf(x);
            ((i as f64 + 1.0) / n - f).max(f - i as f64 / n)
        })
        .fold(0.0, f64::max)
}

/// Kolmogorov's limiting survival function `Q(λ) = 2 Σ_{j≥1} (−1)^{j−1} e^{−2j²λ²}`
/// (Kolmogorov 1933), i.e. `P(√n·D_n > λ)` as n → ∞.
fn kolmogorov_sf(lambda: f64) -> f64 {
    if lambda < 0.2 {
        return 1.0; // the series is 1 to double precision there, and converges slowly
    }
    let mut sum = 0.0;
    for j in 1..=100 {
        let term = (-2.0 * f64::from(j * j) * lambda * lambda).exp();
        sum += if j % 2 == 1 { term } else { -term };
        if term < 1e-18 {
            break;
        }
    }
    (2.0 * sum).clamp(0.0, 1.0)
}

/// Stephens' effective argument `(√n + 0.12 + 0.11/√n)·D`, which makes the limiting law
/// accurate for finite n (Stephens, J. R. Stat. Soc. B 32, 1970; Press et al., Numerical
/// Recipes 3rd ed., §14.3.3).
fn stephens_factor(n: usize) -> f64 {
    let rn = (n as f64).sqrt();
    rn + 0.12 + 0.11 / rn
}

/// p-value of the one-sample KS test with distance `d` on `n` samples.
fn ks_p_value(d: f64, n: usize) -> f64 {
    kolmogorov_sf(stephens_factor(n) * d)
}

/// The λ with `Q(λ) = p`, by bisection (Q decreases).
fn kolmogorov_quantile(p: f64) -> f64 {
    let (mut lo, mut hi) = (0.2, 10.0);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if kolmogorov_sf(mid) > p {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// The KS distance at which the p-value is exactly `p` for `n` samples.
fn ks_critical(n: usize, p: f64) -> f64 {
    kolmogorov_quantile(p) / stephens_factor(n)
}

/// How far the empirical CDF of `z_i = a_i·Z_i + c_i`, with `a_i ∈ [a_lo, a_hi]`,
/// `|c_i| ≤ b` and Z_i standard normal, can be from Φ beyond the KS distance of the Z_i
/// themselves.
///
/// Derivation \[D\]: `z_i ≤ x` implies `a_i Z_i ≤ x + b`, hence `Z_i ≤ h(x + b)` with
/// `h(y) = y/a_lo` for y ≥ 0 and `y/a_hi` for y < 0; likewise `Z_i ≤ h′(x − b)` (with a_lo and
/// a_hi swapped) implies `z_i ≤ x`. So `F_z(x) ≤ F_Z(h(x + b)) ≤ Φ(h(x + b)) + D_Z` and
/// `F_z(x) ≥ Φ(h′(x − b)) − D_Z`, and
/// `D_z ≤ D_Z + sup_x max(Φ(h(x + b)) − Φ(x), Φ(x) − Φ(h′(x − b)))`. The supremum is taken on
/// a grid of step 1e-3 over [−12, 12] (outside it both terms are below 1e-30) and the grid
/// error is added: the function's slope is at most φ(0)(1/a_lo + 1).
fn distortion_allowance(a_lo: f64, a_hi: f64, b: f64) -> f64 {
    assert!(
        0.0 < a_lo && a_lo <= a_hi && b >= 0.0,
        "a ∈ [{a_lo}, {a_hi}], b = {b}"
    );
    let phi = std_normal();
    let h = |y: f64| if y >= 0.0 { y / a_lo } else { y / a_hi };
    let h_prime = |y: f64| if y >= 0.0 { y / a_hi } else { y / a_lo };
    let step = 1e-3;
    let mut sup = 0.0f64;
    for k in -12_000..=12_000 {
        let x = f64::from(k) * step;
        let up = phi.cdf(h(x + b)) - phi.cdf(x);
        let down = phi.cdf(x) - phi.cdf(h_prime(x - b));
        sup = sup.max(up).max(down);
    }
    let slope = (1.0 / a_lo + 1.0) / (2.0 * std::f64::consts::PI).sqrt();
    sup + slope * step / 2.0
}

/// Upper bound on a χ²_k variable that fails with probability at most e^{−x}: Laurent &
/// Massart, Ann. Statist. 28(5), 2000, Lemma 1: `P(X − k ≥ 2√(kx) + 2x) ≤ e^{−x}`.
fn chi2_bound(k: usize, x: f64) -> f64 {
    let k = k as f64;
    k + 2.0 * (k * x).sqrt() + 2.0 * x
}

/// Tail exponent of every high-probability box below: each box fails with probability
/// ≤ e^{−25} ≈ 1.4e-11 per sample.
const BOX_LOG_FAILURE: f64 = 25.0;

/// Half-width of the mean's noise box in standard deviations: P(|N(0,1)| > 7.1) ≈ 1.2e-12.
const MEAN_BOX_SIGMAS: f64 = 7.1;

#[test]
fn kolmogorov_quantiles_match_the_published_critical_values() {
    // Asymptotic critical values of √n·D_n (Smirnov 1948 table; common practice), 4 decimals.
    for (p, lambda) in [(0.05, 1.3581), (0.01, 1.6276), (0.001, 1.9495)] {
        let q = kolmogorov_quantile(p);
        assert!(
            (q - lambda).abs() < 5e-5,
            "p = {p}: λ = {q}, table {lambda}"
        );
    }
}

#[test]
fn ks_test_accepts_normal_draws_and_rejects_a_ten_percent_scale_error() {
    // 20,000 draws: a 10% scale error moves the CDF by sup|Φ(x/1.1) − Φ(x)| ≈ 0.022, above the
    // 1e-3 critical distance 1.9495/√20000 ≈ 0.0138 by more than 4 sampling standard
    // deviations of D (≈ 0.5/√n = 0.0035).
    let mut rng = ChaCha20Rng::seed_from_u64(20_260_302);
    let mut z: Vec<f64> = (0..20_000)
        .map(|_| StandardNormal.sample(&mut rng))
        .collect();
    let d = ks_distance(&mut z);
    assert!(
        ks_p_value(d, z.len()) >= SIGNIFICANCE,
        "N(0,1) draws rejected: D = {d}"
    );
    let mut wide: Vec<f64> = (0..20_000)
        .map(|_| 1.1 * Distribution::<f64>::sample(&StandardNormal, &mut rng))
        .collect();
    let d = ks_distance(&mut wide);
    assert!(
        ks_p_value(d, wide.len()) < SIGNIFICANCE,
        "10% scale error accepted: D = {d}"
    );
}

#[test]
fn distortion_allowance_matches_the_closed_form_for_a_pure_scale() {
    // For b = 0 and a single scale a > 1, sup_x Φ(x) − Φ(x/a) is attained where
    // φ(x) = φ(x/a)/a, i.e. x* = a·√(2 ln a / (a² − 1)) (calculus; derived here).
    let phi = std_normal();
    for a in [1.01f64, 1.1, 1.5] {
        let x = a * (2.0 * a.ln() / (a * a - 1.0)).sqrt();
        let exact = phi.cdf(x) - phi.cdf(x / a);
        let grid = distortion_allowance(1.0, a, 0.0);
        assert!(
            grid >= exact && grid - exact < 2e-3,
            "a = {a}: grid {grid}, exact {exact}"
        );
    }
    // A pure shift b: sup_x Φ(x + b) − Φ(x) = 2Φ(b/2) − 1.
    let b = 0.05;
    let exact = 2.0 * phi.cdf(b / 2.0) - 1.0;
    let grid = distortion_allowance(1.0, 1.0, b);
    assert!(
        grid >= exact && grid - exact < 2e-3,
        "b = {b}: grid {grid}, exact {exact}"
    );
}

// ---------------------------------------------------------------------------------------
// The calibrated release path.
// ---------------------------------------------------------------------------------------

const HORIZON: u32 = 8;
const TRAILING: u32 = 3;
const EVENTS_PER_WINDOW: usize = 300;
const RUNS: u64 = 400;
const ZONES: [&str; 3] = ["harbour", "old-town", "uplands"];
/// The mean's range and its midpoint (the centring of its sum component).
const MINUTES_RANGE: (f64, f64) = (0.0, 120.0);
/// The linear kind's clip bounds (features within 2.83, targets within 5: never clipped).
const FEATURE_NORM_BOUND: f64 = 4.0;
const TARGET_BOUND: f64 = 8.0;

/// Event-level privacy with a large ρ, so that the mean and the coefficients are deep in
/// their first-order regime (the allowances below are then small).
fn config(mechanism: &str) -> Config {
    let toml = format!(
        r#"
[input]
time_field = "ts"

[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 1e8
delta = 1e-9
epoch_windows = {HORIZON}
mechanism = "{mechanism}"

[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
trailing = [{TRAILING}]
[stats.keys]
zone = ["harbour", "old-town", "uplands"]

[[stats]]
name = "fares"
kind = "sum"
field = "fare"
range = [0, 900]
trailing = [{TRAILING}]

[[stats]]
name = "minutes"
kind = "mean"
field = "minutes"
range = [{lo}, {hi}]
trailing = [{TRAILING}]

[[stats]]
name = "model"
kind = "linear"
target = "y"
features = ["x1", "x2"]
intercept = true
feature_norm_bound = {FEATURE_NORM_BOUND}
target_bound = {TARGET_BOUND}
fit = "ridge"
trailing = [{TRAILING}]
"#,
        lo = MINUTES_RANGE.0,
        hi = MINUTES_RANGE.1
    );
    Config::from_toml_str(&toml).expect("calibration config is valid")
}

#[derive(Clone, Debug)]
struct Ev {
    window: u32,
    zone: usize,
    fare: f64,
    minutes: f64,
    x: [f64; 2],
    y: f64,
}

/// A deterministic feed of small integers (exact in f64 and on every grid): fares partly
/// above the 900 clamp, minutes inside the range, features in {−2..2}² and
/// y = 1 + x1 − x2 + {−1, 0, 1}.
fn feed() -> Vec<Ev> {
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut next = move |n: u64| {
        // xorshift64 (Marsaglia 2003): only a source of varied, reproducible test data.
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state % n
    };
    let mut out = Vec::new();
    for window in 0..HORIZON {
        for _ in 0..EVENTS_PER_WINDOW {
            let x = [next(5) as f64 - 2.0, next(5) as f64 - 2.0];
            out.push(Ev {
                window,
                zone: next(3) as usize,
                fare: next(1_000) as f64,
                minutes: 5.0 + next(100) as f64,
                x,
                y: 1.0 + x[0] - x[1] + next(3) as f64 - 1.0,
            });
        }
    }
    out
}

fn lines(events: &[Ev]) -> Vec<String> {
    let t0 = 1_772_409_600_000i64; // 2026-03-02T00:00:00Z
    let per_window = EVENTS_PER_WINDOW as i64;
    events
        .iter()
        .enumerate()
        .map(|(i, e)| {
            let ts = t0 + i64::from(e.window) * 3_600_000 + (i as i64 % per_window) * 10_000;
            format!(
                r#"{{"ts":{ts},"zone":"{}","fare":{},"minutes":{},"x1":{},"x2":{},"y":{}}}"#,
                ZONES[e.zone], e.fare, e.minutes, e.x[0], e.x[1], e.y
            )
        })
        .collect()
}

/// The records of the epoch's last window, from one run with the key from `seed`.
fn last_window_records(cfg: &Config, seed: u64, lines: &[String]) -> Vec<Release> {
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
            if r.leaf == HORIZON - 1 {
                out.push(r);
            }
        }
    }
    engine.finish();
    while let Some(r) = engine.poll_release() {
        if r.leaf == HORIZON - 1 {
            out.push(r);
        }
    }
    out
}

fn scope_range(scope: &str) -> LeafRange {
    let last = HORIZON - 1;
    match scope {
        "window" => LeafRange { first: last, last },
        "epoch_to_date" => LeafRange { first: 0, last },
        s => {
            let n: u32 = s
                .strip_prefix("trailing:")
                .and_then(|n| n.parse().ok())
                .expect("trailing:N scope");
            LeafRange {
                first: (last + 1).saturating_sub(n),
                last,
            }
        }
    }
}

fn in_range(e: &Ev, r: LeafRange) -> bool {
    (r.first..=r.last).contains(&e.window)
}

/// Exact packed moments Σ z zᵀ of z = (1, x1, x2, y) divided componentwise by the record's
/// units `scales` (normalised units), upper triangle row by row.
fn exact_moments(events: &[Ev], r: LeafRange, scales: &[f64]) -> Vec<f64> {
    let mut acc = vec![0.0; 10];
    for e in events.iter().filter(|e| in_range(e, r)) {
        let z = [
            1.0 / scales[0],
            e.x[0] / scales[1],
            e.x[1] / scales[2],
            e.y / scales[3],
        ];
        let mut idx = 0;
        for i in 0..4 {
            for j in i..4 {
                acc[idx] += z[i] * z[j];
                idx += 1;
            }
        }
    }
    acc
}

/// The mean's allowance (module doc). With S the true centred sum, C the true count,
/// e_s, e_c their independent noises (variances v_s, v_c from the plan) and r = S/C, the
/// release is `mid + (S + e_s)/(C + e_c)` and its std_error `√(v_s + r̂² v_c)/Ĉ` with
/// r̂ = (S + e_s)/Ĉ, Ĉ = C + e_c (the engine's delta method). Hence exactly \[D\]:
///
/// `z = (e_s − r e_c)/√(v_s + r̂² v_c) = Z · √((v_s + r² v_c)/(v_s + r̂² v_c))`,
///
/// with Z = (e_s − r e_c)/√(v_s + r² v_c) standard normal. On the box |e_s| ≤ k√v_s,
/// |e_c| ≤ k√v_c (k = [`MEAN_BOX_SIGMAS`]) r̂² lies in an interval computed here, which
/// bounds the factor a, and b = 0.
fn mean_allowance(s: f64, c: f64, v_s: f64, v_c: f64) -> f64 {
    let k = MEAN_BOX_SIGMAS;
    let (num_lo, num_hi) = (s - k * v_s.sqrt(), s + k * v_s.sqrt());
    let (den_lo, den_hi) = (c - k * v_c.sqrt(), c + k * v_c.sqrt());
    // The mean is defined (count ≥ 1) and not clamped inside the box.
    assert!(
        den_lo >= 1.0,
        "noisy count can fall below 1: C = {c}, sd {}",
        v_c.sqrt()
    );
    let half = (MINUTES_RANGE.1 - MINUTES_RANGE.0) / 2.0;
    let r_max = num_lo.abs().max(num_hi.abs()) / den_lo;
    assert!(r_max < half, "the mean could be clamped inside the box");
    let r2_max = r_max * r_max;
    let r2_min = if num_lo <= 0.0 && num_hi >= 0.0 {
        0.0
    } else {
        (num_lo.abs().min(num_hi.abs()) / den_hi).powi(2)
    };
    let r = s / c;
    let centre = v_s + r * r * v_c;
    let a_lo = (centre / (v_s + r2_max * v_c)).sqrt();
    let a_hi = (centre / (v_s + r2_min * v_c)).sqrt();
    distortion_allowance(a_lo, a_hi, 0.0)
}

/// The first-order covariance factor of the normal equations' error, at noise variance 1:
/// `G(θ) = (1 + ‖θ‖²) I + θθᵀ − diag(θ²)` \[D\]: the error of Aθ = b is e − Eθ, whose
/// coordinate i has variance 1 + ‖θ‖² and, for i ≠ l, covariance θ_i θ_l (E_il = E_li is one
/// packed coordinate).
fn g_matrix(theta: &DVector<f64>) -> DMatrix<f64> {
    let p = theta.len();
    let norm_sq = theta.norm_squared();
    DMatrix::from_fn(p, p, |i, l| {
        if i == l {
            1.0 + norm_sq
        } else {
            theta[i] * theta[l]
        }
    })
}

/// The coefficients' allowances and first-order standard deviations (module doc).
///
/// Setting \[D\]: A θ = b are the exact normal equations of (1, x) in normalised units, the
/// release is Â = A + E, b̂ = b + e with iid noise of variance v on every packed coordinate
/// (E symmetric), and (ridge with λ = 0, no repair) θ̂ = Â⁻¹ b̂. Then exactly
/// θ̂ − θ = Â⁻¹(e − Eθ) = L + R with L = A⁻¹(e − Eθ) and R = −Â⁻¹ E L, and
/// L_j / sd_j ~ N(0, 1) with sd_j² = v gᵀ G(θ) g, g = A⁻¹ e_j. Since G ⪰ I, sd_j ≥ √v ‖g‖.
/// On the box where the χ² of all noise coordinates stays below [`chi2_bound`]:
/// - ‖E‖₂ ≤ ‖E‖_F ≤ E_b = √(2 v X_b) (off-diagonal entries count twice), ‖e‖ ≤ e_b = √(v X_b);
/// - with α = ‖A⁻¹‖₂, r = α E_b bounds ‖A⁻¹E‖; Â⁻¹ = (I + A⁻¹E)⁻¹ A⁻¹ gives, for ĝ = Â⁻¹ e_j,
///   ‖ĝ‖ ≤ ‖g‖/(1 − r) and ‖ĝ − g‖ ≤ r‖g‖/(1 − r) (Neumann series);
/// - ‖L‖ ≤ L_b = α(e_b + E_b ‖θ‖), ‖θ̂ − θ‖ ≤ D_b = L_b/(1 − r), and |R_j| = |ĝᵀ E L| ≤
///   ‖g‖ E_b L_b/(1 − r);
/// - the reported std_error is the same formula at (Â, θ̂): se² = v ĝᵀ G(θ̂) ĝ. With
///   ‖G(θ)‖ ≤ g_n = 1 + 2‖θ‖² and ‖G(θ̂) − G(θ)‖ ≤ Δg = 3(2‖θ‖D_b + D_b²) (each of G's three
///   terms moves by at most 2‖θ‖D_b + D_b²),
///   |se² − sd_j²| ≤ v‖g‖² [Δg/(1 − r)² + g_n r(2 − r)/(1 − r)²] ≤ u·sd_j².
///
/// So z_j = Z·(sd_j/se) + R_j/se with sd_j/se ∈ [1/√(1 + u), 1/√(1 − u)] and
/// |R_j/se| ≤ b = E_b L_b / ((1 − r) √v √(1 − u)).
///
/// Returns the allowance (the same for every coefficient: the bounds are relative to each
/// one's own sd), u, and every sd_j (normalised units), so that the caller can also check each
/// reported std_error against this independent first-order derivation.
fn coefficient_allowances(a: &DMatrix<f64>, theta: &DVector<f64>, v: f64) -> (f64, f64, Vec<f64>) {
    let p = theta.len();
    let eig = SymmetricEigen::new(a.clone());
    let lambda_min = eig
        .eigenvalues
        .iter()
        .copied()
        .fold(f64::INFINITY, f64::min);
    assert!(lambda_min > 0.0, "A is positive definite");
    let alpha = 1.0 / lambda_min;
    let x_b = chi2_bound(p * (p + 1) / 2 + p, BOX_LOG_FAILURE);
    let (e_big, e_small) = ((2.0 * v * x_b).sqrt(), (v * x_b).sqrt());
    let r = alpha * e_big;
    assert!(r < 0.5, "not in the first-order regime: r = {r}");
    // No eigenvalue-floor repair can trigger inside the box: the engine's floor is
    // σ(2√p + 2√ln(2/β)) at β = 1e-3 (linear::noise_norm_bound), and λ_min(Â) ≥ λ_min − E_b.
    let floor = v.sqrt() * (2.0 * (p as f64).sqrt() + 2.0 * (2.0f64 / 1e-3).ln().sqrt());
    assert!(
        lambda_min - e_big > floor,
        "the fit could repair A inside the box"
    );
    let norm_theta = theta.norm();
    let l_b = alpha * (e_small + e_big * norm_theta);
    let d_b = l_b / (1.0 - r);
    let g_n = 1.0 + 2.0 * norm_theta * norm_theta;
    let dg = 3.0 * (2.0 * norm_theta * d_b + d_b * d_b);
    let u = (dg + g_n * r * (2.0 - r)) / (1.0 - r).powi(2);
    assert!(u < 0.5, "std_error bound too loose: u = {u}");
    let (a_lo, a_hi) = (1.0 / (1.0 + u).sqrt(), 1.0 / (1.0 - u).sqrt());
    let b = e_big * l_b / ((1.0 - r) * v.sqrt() * (1.0 - u).sqrt());
    let a_inv = a.clone().try_inverse().expect("A is positive definite");
    let cov = &a_inv * g_matrix(theta) * &a_inv * v;
    let sd = (0..p).map(|j| cov[(j, j)].sqrt()).collect();
    (distortion_allowance(a_lo, a_hi, b), u, sd)
}

/// z-scores of one test series, and how much looser than exact its check is.
#[derive(Default)]
struct Series {
    z: Vec<f64>,
    allowance: f64,
}

/// Runs `RUNS` seeded runs of `mechanism` and checks every (kind, scope) series.
fn calibrate(mechanism: &str) {
    let cfg = config(mechanism);
    let plan = Plan::new(&cfg).expect("plan");
    let events = feed();
    let text = lines(&events);
    let scopes = [
        "window".to_string(),
        "epoch_to_date".to_string(),
        format!("trailing:{TRAILING}"),
    ];
    let mut series: std::collections::BTreeMap<String, Series> = Default::default();

    // The mean's and the coefficients' allowances depend only on the truth and the plan.
    let mean_plan = &plan.stats[2];
    for scope in &scopes {
        let r = scope_range(scope);
        let (sum_c, cnt_c) = (&mean_plan.components[0], &mean_plan.components[1]);
        let v_s = sum_c.std_error(plan.mechanism, HORIZON, HORIZON, r).powi(2);
        let v_c = cnt_c.std_error(plan.mechanism, HORIZON, HORIZON, r).powi(2);
        let mid = (MINUTES_RANGE.0 + MINUTES_RANGE.1) / 2.0;
        let inside: Vec<&Ev> = events.iter().filter(|e| in_range(e, r)).collect();
        let s: f64 = inside.iter().map(|e| e.minutes - mid).sum();
        let allowance = mean_allowance(s, inside.len() as f64, v_s, v_c);
        series.entry(format!("mean {scope}")).or_default().allowance = allowance;
    }

    // Per scope: the coefficients' first-order sd (value units) and the relative bound u.
    let mut first_order: std::collections::BTreeMap<String, (Vec<f64>, f64)> = Default::default();
    for seed in 0..RUNS {
        let records = last_window_records(&cfg, 7_000_000 + seed, &text);
        for rec in &records {
            let z = |v: f64, s: f64, t: f64| (v - t) / s;
            match rec.kind.as_str() {
                "count" | "sum" | "mean" => {
                    let (Some(v), Some(s), Some(t)) = (
                        rec.value.as_f64(),
                        rec.std_error.as_f64(),
                        rec.truth.as_ref().and_then(|t| t.as_f64()),
                    ) else {
                        panic!(
                            "{} {}: value, std_error and truth are numbers here",
                            rec.stat, rec.scope
                        )
                    };
                    series
                        .entry(format!("{} {}", rec.kind, rec.scope))
                        .or_default()
                        .z
                        .push(z(v, s, t));
                }
                "linear" => {
                    let stats = rec
                        .statistics
                        .as_ref()
                        .expect("linear records carry their statistics");
                    let r = scope_range(&rec.scope);
                    let truth = exact_moments(&events, r, &stats.scales);
                    let entry = series
                        .entry(format!("linear statistics {}", rec.scope))
                        .or_default();
                    for (v, t) in stats.values.iter().zip(&truth) {
                        entry.z.push(z(*v, stats.std_error, *t));
                    }
                    // The coefficients' allowance, once per scope (the truth is fixed).
                    if !first_order.contains_key(rec.scope.as_str()) {
                        // Normal equations of (1, x) in normalised units: packed indices
                        // (0,0)=0 (0,1)=1 (0,2)=2 (0,y)=3 (1,1)=4 (1,2)=5 (1,y)=6 (2,2)=7 (2,y)=8.
                        let m = |i: usize| truth[i];
                        let a = DMatrix::from_row_slice(
                            3,
                            3,
                            &[m(0), m(1), m(2), m(1), m(4), m(5), m(2), m(5), m(7)],
                        );
                        let b = DVector::from_vec(vec![m(3), m(6), m(8)]);
                        let theta = a.clone().try_inverse().expect("A is positive definite") * b;
                        // Cross-check against the engine's exact fit (value units: intercept
                        // × u_y, slopes × u_y/u_x).
                        let scales = &stats.scales;
                        let back = [scales[3], scales[3] / scales[1], scales[3] / scales[2]];
                        for (j, name) in ["intercept", "x1", "x2"].iter().enumerate() {
                            let t = rec
                                .truth
                                .as_ref()
                                .and_then(|t| t[name].as_f64())
                                .expect("truth coefficient");
                            let mine = theta[j] * back[j];
                            assert!(
                                (t - mine).abs() <= 1e-9 * (1.0 + t.abs()),
                                "{name}: engine {t}, normal equations {mine}"
                            );
                        }
                        let (allowance, u, sd) =
                            coefficient_allowances(&a, &theta, stats.std_error.powi(2));
                        for name in ["intercept", "x1", "x2"] {
                            series
                                .entry(format!("linear {name} {}", rec.scope))
                                .or_default()
                                .allowance = allowance;
                        }
                        let sd_value: Vec<f64> = sd.iter().zip(back).map(|(s, f)| s * f).collect();
                        first_order.insert(rec.scope.to_string(), (sd_value, u));
                    }
                    // The reported std_error is the delta method at the noisy estimate: within
                    // the relative bound u of the first-order sd at the truth (see
                    // `coefficient_allowances`; fails with probability ≤ e^-25 per record).
                    let (sd_value, u) = &first_order[rec.scope.as_str()];
                    for (j, name) in ["intercept", "x1", "x2"].iter().enumerate() {
                        let se = rec.std_error[name].as_f64().expect("std_error is a number");
                        let ratio = se / sd_value[j];
                        assert!(
                            ((1.0 - u).sqrt()..=(1.0 + u).sqrt()).contains(&ratio),
                            "{mechanism} {name} {}: std_error {se} vs first-order {} (u = {u})",
                            rec.scope,
                            sd_value[j]
                        );
                    }
                    for name in ["intercept", "x1", "x2"] {
                        let (Some(v), Some(s), Some(t)) = (
                            rec.value[name].as_f64(),
                            rec.std_error[name].as_f64(),
                            rec.truth.as_ref().and_then(|t| t[name].as_f64()),
                        ) else {
                            panic!("linear {}: coefficient {name} missing", rec.scope)
                        };
                        series
                            .entry(format!("linear {name} {}", rec.scope))
                            .or_default()
                            .z
                            .push(z(v, s, t));
                    }
                }
                other => panic!("unexpected kind {other}"),
            }
        }
    }

    let mut failures = Vec::new();
    for (name, mut s) in series {
        let n = s.z.len();
        assert!(n >= RUNS as usize, "{name}: only {n} samples");
        let d = ks_distance(&mut s.z);
        let p = ks_p_value(d, n);
        let limit = ks_critical(n, SIGNIFICANCE) + s.allowance;
        println!(
            "ks {mechanism:<18} {name:<32} n {n:>5}  D {d:.4}  p {p:.4}  limit {limit:.4} (allowance {:.4})",
            s.allowance
        );
        if d > limit {
            failures.push(format!(
                "{name}: D = {d:.4} > {limit:.4} (p = {p:.2e}, allowance {:.4})",
                s.allowance
            ));
        }
    }
    assert!(failures.is_empty(), "{mechanism}: {failures:#?}");
}

#[test]
fn tree_releases_are_calibrated() {
    calibrate("tree");
}

#[test]
fn sqrt_factorization_releases_are_calibrated() {
    calibrate("sqrt-factorization");
}

#[test]
fn independent_releases_are_calibrated() {
    calibrate("independent");
}
