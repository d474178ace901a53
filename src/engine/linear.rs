//! Private linear models: what one event adds to the packed cross-product matrix Σ z zᵀ
//! (clipping, grid rounding, sensitivity), and how a model is fitted from its noisy release.
//!
//! # The statistic
//! For an event with features x ∈ ℝᵈ and target y, let z = (1, x₁..x_d, y) (the leading 1
//! only when the model has an intercept). The `linear` stat keeps, per window and group, the
//! upper triangle (diagonal included) of Σ z zᵀ, packed row by row ([`Layout::index`]). It
//! holds n, Σx, Σy, XᵀX, Xᵀy and yᵀy, so one release serves the whole model
//! (privacy-math.md §6, "one-matrix option"). Every entry is an exact `i128` count of grid
//! units 2^e: an event adds round(z_i z_j · 2^-e) ([`accumulate`]).
//!
//! # Fitting, and the numerical choices
//! The continual-release mechanism returns the packed vector plus iid noise of variance σ²
//! (grid units²) per coordinate, as [`Dd`] (double-double, ~32 digits). [`fit`] works in
//! *value units* (grid value × 2^e, an exact power-of-two scaling) and:
//! 1. forms the normal equations A θ = b, where A is the block of Σ z zᵀ for (1, x) and b its
//!    y column (the yy entry is not used);
//! 2. with noise, repairs an A that is not safely positive definite by an eigenvalue floor at
//!    a high-probability bound on the noise spectral norm ([`noise_norm_bound`]; privacy-math
//!    §6 option 1) and says so in [`LinearFit::repair`];
//! 3. eliminates the intercept *exactly*: C = n·(S_xx + λI) − Σx Σxᵀ and c = n·S_xy − Σx Σy
//!    are formed in `Dd`. The exact inputs are integers times 2^e, so the products and the
//!    cancellation keep about 30 significant digits; in plain f64 the same step loses
//!    log10(x̄²/var x) digits (about 5 on NIST Longley);
//! 4. equilibrates C to unit diagonal (D C D with D = diag(C)^-½; van der Sluis, Numer. Math.
//!    14, 1969: within a factor d of the best diagonal scaling for a symmetric positive
//!    definite matrix), factors the rounded f64 matrix by Cholesky (eigen-decomposition when
//!    Cholesky fails), and reports its condition number κ;
//! 5. refuses with [`FitError::IllConditioned`] when κ > [`MAX_CONDITION`] (1e13). The data
//!    themselves are f64, so they carry relative errors of 2^-53 ≈ 1.1e-16. A relative
//!    perturbation δ of C moves the solution by up to κ·δ, so at κ = 1e13 at most three digits
//!    are determined by the data. The same threshold keeps κ·2^-53 < 1e-3, so step 6
//!    contracts by 1e-3 or better per step. With noise, step 2 has already raised every
//!    eigenvalue of A to at least the noise bound. Directions the noise makes
//!    indistinguishable from zero are therefore repaired and reported, not refused, and the
//!    limit only trips if the floored system still exceeds it;
//! 6. refines the solution in mixed precision: residual c − C β in `Dd`, correction from the
//!    f64 factor (Wilkinson; Moler, J. ACM 14, 1967; Higham, *Accuracy and Stability of
//!    Numerical Algorithms*, 2nd ed., §12.1). After refinement the error is about that of
//!    rounding β to f64 plus κ times the `Dd` error of C (≈ κ·1e-30). Refinement thus
//!    removes the κ·2^-53 error of a plain f64 solve;
//! 7. recovers the intercept as (Σy − Σxᵀβ)/n in `Dd`.
//!
//! Measured on the NIST StRD linear-regression sets (tests below; digits of the worst
//! coefficient):
//! - Longley, the hardest: 14.6 digits. Without step 6 it reaches 11.8. Plain f64 normal
//!   equations reach 7.2, per the README of tests/data/nist.
//! - Norris: 12.8. Its intercept is small against ȳ, so the decimal-to-binary rounding of the
//!   data already limits it to ~13.
//! - NoInt1 and NoInt2: 14.7 and more.
//! - Pontius: 7.7 on raw units, 13.0 with x in units of 2^21. In raw units one grid must hold
//!   x⁴ ≈ 1e26 and y ≈ 0.1 at once, so y's grid rounding limits the small intercept. Choosing
//!   feature units that keep the clip bounds near the data is the remedy.
//!
//! # Centred statistics
//! When the configuration declares ranges and the model has an intercept, the engine
//! accumulates z = (1, x − γ, y − γ_y) with γ the ranges' midpoints in normalised units
//! (`plan::MomentUnits`). [`fit_shifted`] fits those statistics as they are, which is the
//! same least-squares problem with the intercept moved, and maps the intercept back:
//! θ_0 + γ_y − Σ θ_j γ_j. Its std_error is that of the linear combination gᵀθ with
//! g = (1, −γ). Centring changes nothing for exact data, but with noise it matters: the noise
//! is sized for the largest |z|, the fit feeds on the spread of z, and a range centred on its
//! midpoint maps the same data to twice the spread per feature.
//!
//! # Why the eigenvalue floor, and when it acts
//! Of the two repairs privacy-math §6 names, the floor (step 2) was kept over AdaSSP-style
//! ridge (Wang 2018) because it leaves well-determined directions untouched, while a ridge
//! shrinks every slope. Both bias the directions they repair, and neither bias is in the
//! delta-method std_error, so the record's `note` says when the floor acted. The threshold is
//! a 99.9% bound on the noise's spectral norm: below it an eigenvalue cannot be told apart
//! from 0 in the worst direction. The remedy for a floored model is in the configuration
//! (ranges, weight), not in a smaller threshold, which would let noise-sized eigenvalues
//! blow up the coefficients.
//!
//! # Noise in the fit
//! The delta method uses the exact noise covariance of the packed layout
//! ([`normal_equation_noise_cov`]). The ℓ1 fit (Frank–Wolfe) gets a parametric bootstrap
//! instead. Everything after the release is post-processing and costs no privacy budget.
//!
//! Frank–Wolfe converges as O(1/t). After [`FW_ITERATIONS`] steps on exact data, the tests
//! measure a distance of 4e-4 (relative) from least squares when the ball is inactive. That
//! is far below the noise of any private release. [`LinearFit::duality_gap`] certifies the
//! achieved accuracy of each fit.

use crate::engine::dd::Dd;
use nalgebra::{Cholesky, DMatrix, DVector, Dyn, SymmetricEigen};
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

/// Largest feature count a [`Layout`] accepts. The float-rounding margin in
/// [`event_sensitivity_sq`] is derived for at most this many features. Real models have a
/// handful; at 1024 features one packed vector already has 5·10⁵ coordinates.
pub const MAX_FEATURES: usize = 1024;

/// Grid exponents [`accumulate`] and [`fit`] accept. With them, 2^±e and all the grid
/// scalings stay normal f64 numbers, so scaling by 2^e is exact.
pub const GRID_EXP_RANGE: std::ops::RangeInclusive<i32> = -900..=900;

/// Relative margin in [`event_sensitivity_sq`] for floating-point rounding.
///
/// Derivation. After [`clip`], ‖x‖ is computed with relative error at most (d+4)·2^-53. That
/// covers the d squares and sums, the square root and the scaling, and gives at most
/// 1028·2^-53 < 2^-42 for d ≤ [`MAX_FEATURES`]. So the clipped ‖x‖² ≤ B²(1 + 2^-41).
/// [`accumulate`] takes each product z_i z_j exactly and rounds it to the grid within
/// ½(1 + 2^-52). Applying (1 + 2^-30) to both terms covers these. It also covers the few
/// roundings of the bound's own evaluation (≤ 2^-50). The cost is 1e-9 relative sensitivity.
const ROUNDING_MARGIN: f64 = 1.0 + 1.0 / (1u64 << 30) as f64;

/// Condition-number limit of the equilibrated, centred system (module doc, step 5).
pub const MAX_CONDITION: f64 = 1e13;

/// Failure probability β of the eigenvalue floor: the noise spectral norm exceeds the floor
/// with probability at most β per fit ([`noise_norm_bound`]). 1e-3 is the level of
/// privacy-math §6's q99.9 table.
pub const FLOOR_FAILURE_PROB: f64 = 1e-3;

/// Φ⁻¹(0.999), the one-sided 99.9% standard normal quantile, used for the row-count check.
/// Value from the normal quantile function (common practice; the test checks it against
/// `statrs::distribution::Normal::inverse_cdf`).
const Z_0999: f64 = 3.090_232_306_167_813_5;

/// Frank–Wolfe iteration budget for the ℓ1 fit (a fixed count; see [`FitMethod::L1`]).
pub const FW_ITERATIONS: usize = 20_000;

/// Frank–Wolfe stops early when the duality gap falls below this fraction of the gap at
/// θ = 0. Relative, because the objective is in value units², which are arbitrary.
const FW_RELATIVE_GAP: f64 = 1e-12;

/// Bootstrap replicates for the ℓ1 standard errors. The relative standard error of a
/// standard-deviation estimate from B normal draws is about 1/√(2B) (common practice), so 5%
/// at B = 200.
pub const BOOTSTRAP_REPLICATES: usize = 200;

/// Refinement steps (module doc, step 6). Each step gains at least −log10(κ·2^-53) ≥ 3
/// digits, so 6 steps always reach f64 precision from a start that has any correct digit.
const REFINEMENT_STEPS: usize = 6;

/// The shape of a linear model's statistics: with or without an intercept, and how many
/// features. It fixes the order of z = (1?, x₁..x_d, y) and of the packed upper triangle.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Layout {
    intercept: bool,
    n_features: usize,
}

/// What one position of z stands for.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Role {
    /// The constant 1 of the intercept.
    One,
    /// Feature number k (0-based).
    Feature(usize),
    /// The target y.
    Target,
}

impl Layout {
    /// A layout for `n_features` features, with a leading 1 in z when `intercept`.
    ///
    /// # Panics
    /// If `n_features > MAX_FEATURES`: configuration validation must refuse such a model
    /// first, because the sensitivity margin is derived only up to that size.
    pub fn new(n_features: usize, intercept: bool) -> Layout {
        assert!(
            n_features <= MAX_FEATURES,
            "a linear model takes at most {MAX_FEATURES} features, got {n_features}"
        );
        Layout {
            intercept,
            n_features,
        }
    }

    /// Whether z starts with the constant 1, so the model has an intercept.
    pub fn intercept(&self) -> bool {
        self.intercept
    }

    /// Number of features d.
    pub fn n_features(&self) -> usize {
        self.n_features
    }

    /// Number of fitted coefficients: the intercept (if any) plus one per feature.
    pub fn n_params(&self) -> usize {
        usize::from(self.intercept) + self.n_features
    }

    /// Length of z: intercept + d + 1.
    pub fn z_len(&self) -> usize {
        self.n_params() + 1
    }

    /// Length of the packed upper triangle: z_len·(z_len+1)/2.
    pub fn dim(&self) -> usize {
        let z = self.z_len();
        z * (z + 1) / 2
    }

    /// Position of entry (min(i,j), max(i,j)) of Σ z zᵀ in the packed upper triangle, stored
    /// row by row. Row r starts at r·z_len − r(r−1)/2 = r(2·z_len − r + 1)/2.
    ///
    /// # Panics
    /// If `i` or `j` is not below [`Layout::z_len`].
    pub fn index(&self, i: usize, j: usize) -> usize {
        let (row, col) = (i.min(j), i.max(j));
        let z = self.z_len();
        assert!(col < z, "index ({i}, {j}) is outside z of length {z}");
        row * (2 * z - row + 1) / 2 + (col - row)
    }

    /// Position of y in z.
    fn target_pos(&self) -> usize {
        self.z_len() - 1
    }

    /// What position `pos` of z stands for.
    fn role(&self, pos: usize) -> Role {
        if self.intercept && pos == 0 {
            Role::One
        } else if pos == self.target_pos() {
            Role::Target
        } else {
            Role::Feature(pos - usize::from(self.intercept))
        }
    }

    /// Names of the packed coordinates, in packed order. These names are part of the release
    /// record (the noisy sufficient statistics), so they are stable:
    /// - `n` is the count (1·1), and `sum:<feature>` and `sum:<target>` are the sums (1·x, 1·y).
    ///   These exist only with an intercept.
    /// - `xx:<a>:<b>` is Σ x_a x_b, with a before b in feature order (`xx:a:a` on the diagonal).
    /// - `xy:<a>` is Σ x_a y, and `yy` is Σ y².
    ///
    /// # Panics
    /// If `features.len()` differs from [`Layout::n_features`].
    pub fn coordinate_names(&self, features: &[String], target: &str) -> Vec<String> {
        assert_eq!(
            features.len(),
            self.n_features,
            "coordinate_names needs one name per feature"
        );
        let z = self.z_len();
        let mut names = Vec::with_capacity(self.dim());
        for i in 0..z {
            for j in i..z {
                let name = match (self.role(i), self.role(j)) {
                    (Role::One, Role::One) => "n".to_string(),
                    (Role::One, Role::Feature(a)) => format!("sum:{}", features[a]),
                    (Role::One, Role::Target) => format!("sum:{target}"),
                    (Role::Feature(a), Role::Feature(b)) => {
                        format!("xx:{}:{}", features[a], features[b])
                    }
                    (Role::Feature(a), Role::Target) => format!("xy:{}", features[a]),
                    (Role::Target, Role::Target) => "yy".to_string(),
                    // i ≤ j and the order One < Feature < Target make these unreachable.
                    (Role::Feature(_) | Role::Target, Role::One)
                    | (Role::Target, Role::Feature(_)) => {
                        unreachable!("packed order puts 1 before x before y")
                    }
                };
                names.push(name);
            }
        }
        names
    }
}

/// 2^k as an exact f64, for k in the normal exponent range [-1022, 1023].
pub(crate) fn pow2(k: i32) -> f64 {
    debug_assert!((-1022..=1023).contains(&k));
    // The biased exponent field of an IEEE 754 double with a zero mantissa is exactly 2^k.
    f64::from_bits(((k + 1023) as u64) << 52)
}

/// x · 2^k for a double-double: exact (both parts scale by a power of two) unless a part
/// leaves the normal range, which [`GRID_EXP_RANGE`] prevents for realistic values.
fn scale_dd(x: Dd, k: i32) -> Dd {
    let s = pow2(k);
    Dd {
        hi: x.hi * s,
        lo: x.lo * s,
    }
}

/// Euclidean norm without overflow or underflow: scale by the largest magnitude first.
fn l2_norm(x: &[f64]) -> f64 {
    let scale = x.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    if scale == 0.0 || !scale.is_finite() {
        return scale;
    }
    scale
        * x.iter()
            .map(|v| (v / scale) * (v / scale))
            .sum::<f64>()
            .sqrt()
}

/// True only when `l2_norm(x) <= b` for sure, from the plain sum of squares: no division and
/// no square root, so [`clip`] skips the careful norm for the common vector inside the
/// bound, with the same outcome (the norm is only compared with the bound).
///
/// Derivation. For finite x the computed S = fl(Σ x_i²) satisfies
/// Σ x_i² ≤ S(1 + γ) + d·2^-1022 with γ = (d+1)·2^-53 < 2^-42 for d ≤ [`MAX_FEATURES`]
/// (Higham 2002, "Accuracy and Stability of Numerical Algorithms", §3.1, recursive
/// summation of rounded squares; the second term covers squares that underflow). The test
/// S ≤ fl(b²)·(1 − 2^-30) with 2^-400 ≤ b ≤ 2^400 (so b² is finite and normal) then gives
/// ‖x‖ < b(1 − 2^-32), and [`l2_norm`] is within a relative (d+4)·2^-53 < 2^-42 of ‖x‖
/// (see [`ROUNDING_MARGIN`]), so it returns at most b.
fn surely_within_norm(x: &[f64], b: f64) -> bool {
    const MARGIN: f64 = 1.0 - 1.0 / (1u64 << 30) as f64;
    const B_MIN: f64 = f64::from_bits((1023 - 400) << 52);
    const B_MAX: f64 = f64::from_bits((1023 + 400) << 52);
    if x.len() > MAX_FEATURES || !(B_MIN..=B_MAX).contains(&b) {
        return false;
    }
    let sum_sq: f64 = x.iter().map(|v| v * v).sum();
    sum_sq <= b * b * MARGIN
}

/// Clip one event before aggregation (privacy-math §6, "Clipping"): x is scaled to L2 norm
/// ≤ `feature_norm_bound` (x · min(1, B/‖x‖)), and y is clamped to [−B_y, B_y].
///
/// Non-finite inputs are made harmless rather than trusted. A NaN or infinite feature is set
/// to 0 before the norm is taken, and a non-finite y becomes 0. Otherwise a NaN norm would
/// skip the scaling and leave the other features unbounded. A NaN or negative bound is
/// treated as 0, which fails closed: the event then contributes nothing but its intercept
/// entry. [`event_sensitivity_sq`] holds for every output of this function.
pub fn clip(x: &mut [f64], y: &mut f64, feature_norm_bound: f64, target_bound: f64) {
    let b_x = if feature_norm_bound >= 0.0 {
        feature_norm_bound
    } else {
        0.0
    };
    let b_y = if target_bound >= 0.0 {
        target_bound
    } else {
        0.0
    };
    for v in x.iter_mut() {
        if !v.is_finite() {
            *v = 0.0;
        }
    }
    if !surely_within_norm(x, b_x) {
        let norm = l2_norm(x);
        if norm > b_x {
            let factor = b_x / norm;
            for v in x.iter_mut() {
                *v *= factor;
            }
        }
    }
    *y = if y.is_finite() {
        y.max(-b_y).min(b_y)
    } else {
        0.0
    };
}

/// round(a·b·scale) for the *exact* real product a·b, with `scale` a power of two.
///
/// The FMA split a·b = p + err is exact (TwoProd: Dekker 1971; Hida, Li & Bailey 2007), and so
/// is the scaling by a power of two. Then P = p·scale is split into its integer part
/// (`trunc`, exact) and its fraction (P − trunc P, exact for |P| < 2^52 and 0 above). The
/// fraction plus err·scale is rounded once, in f64. The result is within ½ + 2^-53 grid units
/// of a·b·scale. The fraction sum rounds at 2^-53 only when it lands that close to a
/// half-integer; otherwise ties go away from zero, as `f64::round` does.
/// Non-finite products (overflow, NaN inputs) saturate or give 0 through `as i128`, which can
/// only shrink an entry.
fn product_units(a: f64, b: f64, scale: f64) -> i128 {
    let p = a * b;
    let err = a.mul_add(b, -p);
    let big = p * scale;
    if !big.is_finite() {
        return big as i128;
    }
    let int_part = trunc_int(big);
    let frac = (big - int_part) + err * scale;
    // A tie must go away from zero for the sign of the *total* a·b, which is the sign of p
    // (|err| ≤ ulp(p)/2), not for the sign of the fraction alone.
    let frac_units = if (frac - trunc_int(frac)).abs() == 0.5 {
        let sign = if big != 0.0 {
            big.signum()
        } else {
            frac.signum()
        };
        frac + 0.5 * sign
    } else {
        round_int(frac)
    };
    f64_to_i128(int_part).saturating_add(f64_to_i128(frac_units))
}

/// Smallest and largest nonzero magnitudes for which [`two_product_err`] is exact: 2^-450
/// and 2^450. Splitting multiplies by 2^27 + 1, far from overflow below 2^450. Each part of
/// a split factor is zero or a multiple of the factor's ulp (at least 2^-502), so every
/// partial product is zero or at least 2^-1004 in magnitude, above the smallest normal
/// 2^-1022: nothing underflows.
const SPLIT_MIN: f64 = f64::from_bits((1023 - 450) << 52);
const SPLIT_MAX: f64 = f64::from_bits((1023 + 450) << 52);

/// a·b − p exactly, for p = fl(a·b): Dekker's TwoProduct with Veltkamp's splitting (Dekker
/// 1971, "A floating-point technique for extending the available precision", Numer. Math.
/// 18; Ogita, Rump & Oishi 2005, Algorithm 3.3). Each factor splits into a high part of 26
/// significant bits and a low part, so the four partial products are exact, and the sum is
/// exact in the order below. It needs no overflow in the split and no underflow in the
/// partial products, which [`SPLIT_MIN`] and [`SPLIT_MAX`] guarantee (or a zero factor).
/// Equal to `a.mul_add(b, -p)`, the fused form, up to the sign of a zero.
#[inline(always)]
fn two_product_err(a: f64, b: f64, p: f64) -> f64 {
    const SPLITTER: f64 = 134_217_729.0; // 2^27 + 1
    let split = |v: f64| {
        let c = SPLITTER * v;
        let hi = c - (c - v);
        (hi, v - hi)
    };
    let (a_hi, a_lo) = split(a);
    let (b_hi, b_lo) = split(b);
    a_lo * b_lo - (((p - a_hi * b_hi) - a_lo * b_hi) - a_hi * b_lo)
}

/// `v` as ±m·2^e exactly: the magnitude m (an integer below 2^53), the exponent e and the
/// sign (IEEE 754 binary64: the significand with its implicit bit, and the exponent less the
/// 52 fraction bits; subnormals have exponent −1074 and no implicit bit). `None` for ±∞ and
/// NaN.
#[inline(always)]
fn exact_parts(v: f64) -> Option<ExactParts> {
    let bits = v.to_bits();
    let exp = ((bits >> 52) & 0x7ff) as i32;
    let fraction = bits & ((1 << 52) - 1);
    let (magnitude, exponent) = match exp {
        0x7ff => return None,
        0 => (fraction, -1074),
        _ => (fraction | 1 << 52, exp - 1075),
    };
    Some(ExactParts {
        magnitude,
        exponent,
        negative: bits >> 63 == 1,
    })
}

/// A finite f64 as ±m·2^e (see [`exact_parts`]).
#[derive(Clone, Copy, Debug, Default)]
struct ExactParts {
    magnitude: u64,
    exponent: i32,
    negative: bool,
}

/// round(a·b·2^-grid_exp), half away from zero, for a and b given by their
/// [`exact_parts`], when the result is below 2^52 in magnitude (`None` otherwise). The
/// product of the magnitudes is below 2^106, so it is exact in u128, and the value in grid
/// units is ±m_a·m_b·2^-s with s = grid_exp − e_a − e_b. For s ≤ 0 it is a left shift.
/// For s > 0, rounding half away from zero is rounding the magnitude half up,
/// ⌊(m + 2^(s−1))/2^s⌋, which equals ⌊(⌊m/2^(s−1)⌋ + 1)/2⌋ (write m = q·2^(s−1) + r with
/// r < 2^(s−1): both are ⌊(q + 1)/2⌋, as r/2^s < ½); for s ≥ 107 the magnitude is below
/// 2^(s−1), so the result is 0. Pure integer arithmetic, so exactly the rounding the float
/// paths compute.
#[inline(always)]
fn product_units_int(a: ExactParts, b: ExactParts, grid_exp: i32) -> Option<i64> {
    let mag = u128::from(a.magnitude) * u128::from(b.magnitude);
    let shift = grid_exp - a.exponent - b.exponent;
    let units = if mag == 0 || shift >= 107 {
        0
    } else if shift > 64 {
        // ⌊m/2^(s−1)⌋ = ⌊⌊m/2^64⌋/2^(s−65)⌋: the high half alone, in u64 (issue 9: the
        // usual case, as products sit near 2^40 grid units; the u128 shift cost a tenth
        // of the moment accumulation). ⌊m/2^64⌋ < 2^42, so the `+ 1` cannot wrap.
        let high = (mag >> 64) as u64;
        u128::from(((high >> (shift - 65)) + 1) >> 1)
    } else if shift > 0 {
        ((mag >> (shift - 1)) + 1) >> 1
    } else if shift > -52 && mag < 1u128 << (52 + shift) {
        mag << -shift
    } else {
        return None;
    };
    if units >= 1 << 52 {
        return None;
    }
    let units = units as i64;
    Some(if a.negative != b.negative {
        -units
    } else {
        units
    })
}

/// 2^52: from here on every f64 is an integer (the significand has 52 fraction bits).
const TWO_POW_52: f64 = 4_503_599_627_370_496.0;

/// `v.trunc()` up to the sign of a zero result, for callers that only use the value as an
/// integer. Baseline x86-64 has no rounding instruction (SSE4.1 `roundsd`), so `f64::trunc`
/// is a libm call; below 2^52 the round trip through i64 truncates toward zero exactly, and
/// at or above 2^52 (or for ±∞ and NaN) `v` is returned unchanged, as `trunc` does.
#[inline]
pub(crate) fn trunc_int(v: f64) -> f64 {
    if v.abs() < TWO_POW_52 {
        (v as i64) as f64
    } else {
        v
    }
}

/// `v.round()` (half away from zero) up to the sign of a zero result; see [`trunc_int`].
/// Below 2^52 the fraction `v − trunc(v)` is exact (both share v's binade or the fraction is
/// v itself), so comparing it with ½ decides the rounding exactly.
#[inline]
pub(crate) fn round_int(v: f64) -> f64 {
    if v.abs() < TWO_POW_52 {
        let t = (v as i64) as f64;
        let frac = v - t;
        if frac >= 0.5 {
            t + 1.0
        } else if frac <= -0.5 {
            t - 1.0
        } else {
            t
        }
    } else {
        v
    }
}

/// `v as i128` (truncation toward zero, saturating, NaN → 0), exactly, but through the
/// native `f64 → i64` conversion whenever the value fits: the direct cast is a slow
/// software routine (`__fixdfti`) on x86-64, and this runs for every moment entry of every
/// event. For |v| < 2^63 truncation fits i64, so both casts give the same integer.
#[inline]
pub(crate) fn f64_to_i128(v: f64) -> i128 {
    const TWO_POW_63: f64 = 9_223_372_036_854_775_808.0;
    if v.abs() < TWO_POW_63 {
        i128::from(v as i64)
    } else {
        v as i128
    }
}

/// Adds one event's contribution round(z_i z_j · 2^-grid_exp) to `acc` (len [`Layout::dim`],
/// packed order). The rounding is to the nearest integer, with ties away from zero.
///
/// Error: the product z_i z_j of the f64 inputs is taken exactly (in integers, see
/// `product_units_int`, or for products beyond 2^52 grid units and vectors of more than 16
/// entries in floating point, see `product_units`), so the only error is the rounding to
/// the grid: at most ½ (+2^-53 on the floating-point path) grid unit, that is
/// 2^(grid_exp−1) in value units, per entry and event. On a grid fine enough for the data
/// (every exact product a multiple of 2^grid_exp) the accumulation is exact. The caller must
/// [`clip`] first: the sensitivity bound assumes clipped inputs.
///
/// Overflow: a product beyond the i128 range saturates, and so does the running sum
/// (`saturating_add`). Neither can raise one event's influence above the bound: x ↦
/// clamp(x + c) is 1-Lipschitz, so two runs that differ by one event's steps end within |c| of
/// each other. [`default_grid_exp`] leaves room for 2^85 events, so saturation never occurs
/// in practice.
///
/// # Panics
/// If `x.len() != layout.n_features()`, if `acc.len() != layout.dim()`, or if `grid_exp` is
/// outside [`GRID_EXP_RANGE`]. These are programming errors: the aggregate is created from
/// the same layout.
pub fn accumulate(layout: &Layout, x: &[f64], y: f64, grid_exp: i32, acc: &mut [i128]) {
    assert_eq!(acc.len(), layout.dim(), "accumulator length");
    accumulate_with(layout, x, y, grid_exp, |idx, units| {
        acc[idx] = acc[idx].saturating_add(units);
    });
}

/// The products of [`accumulate`], each handed to `add(index, units)` in packed order
/// instead of added to an `i128` accumulator (callers that know the values are small sum
/// them in `i64`: `contribution`'s block sums).
///
/// # Panics
/// As [`accumulate`], but `add` must check its own index.
#[inline(always)]
pub(crate) fn accumulate_with(
    layout: &Layout,
    x: &[f64],
    y: f64,
    grid_exp: i32,
    mut add: impl FnMut(usize, i128),
) {
    assert_eq!(x.len(), layout.n_features, "feature vector length");
    assert!(
        GRID_EXP_RANGE.contains(&grid_exp),
        "grid exponent {grid_exp}"
    );
    let scale = pow2(-grid_exp);
    // z = (1, x, y) or (x, y): on the stack up to 16 entries (d ≤ 14), on the heap beyond.
    let (mut small, mut large) = ([0.0f64; 16], Vec::new());
    let z = scratch(&mut small, &mut large, layout.z_len());
    let offset = usize::from(layout.intercept);
    if layout.intercept {
        z[0] = 1.0;
    }
    z[offset..offset + x.len()].copy_from_slice(x);
    z[offset + x.len()] = y;
    if z.len() <= 16 {
        // Each factor as m·2^e exactly, once per event; then every product is an integer
        // product and a shift (issue 9: 3.5% fewer instructions in replay than the
        // floating-point path below, which remains for the products that do not fit).
        let mut parts = [ExactParts::default(); 16];
        let mut finite = true;
        for (part, &v) in parts.iter_mut().zip(z.iter()) {
            match exact_parts(v) {
                Some(p) => *part = p,
                None => finite = false,
            }
        }
        if finite {
            let mut idx = 0;
            for i in 0..z.len() {
                for j in i..z.len() {
                    let units = match product_units_int(parts[i], parts[j], grid_exp) {
                        Some(units) => i128::from(units),
                        None => product_units(z[i], z[j], scale),
                    };
                    add(idx, units);
                    idx += 1;
                }
            }
            return;
        }
    }
    // Dekker's product error is exact for every pair when no |z_i| is tiny or huge.
    let split_exact = z
        .iter()
        .all(|v| *v == 0.0 || (SPLIT_MIN..=SPLIT_MAX).contains(&v.abs()));
    let mut idx = 0;
    for (i, &zi) in z.iter().enumerate() {
        for &zj in &z[i..] {
            let units = match product_units_small(zi, zj, scale, split_exact) {
                Some(units) => i128::from(units),
                None => product_units(zi, zj, scale),
            };
            add(idx, units);
            idx += 1;
        }
    }
}

/// `len` zeros: the first `len` entries of `small` when they suffice, else `large` resized.
/// For per-event vectors that must not allocate in the usual case (issue 9).
#[inline]
pub(crate) fn scratch<'a>(
    small: &'a mut [f64; 16],
    large: &'a mut Vec<f64>,
    len: usize,
) -> &'a mut [f64] {
    if len <= small.len() {
        &mut small[..len]
    } else {
        large.clear();
        large.resize(len, 0.0);
        large
    }
}

/// [`product_units`] for the common case |a·b·scale| < 2^52 (every moment entry on the
/// default grid, which puts the largest product near 2^40), in i64 with fewer branches;
/// `None` outside that case. The floating-point operations are the same ones in the same
/// order, so the result is the same integer (a property test compares the two).
///
/// With |P| < 2^52 for P = p·scale: the casts `P as i64` and `frac as i64` truncate exactly
/// (as `trunc_int` does), |err·scale| ≤ ulp(P)/2 ≤ ½ so |frac| < 3/2, and in the tie case
/// frac ± ½ is an integer, so its cast is exact too. The sum of the two parts stays far
/// inside i64.
///
/// With `split_exact` (both factors 0 or of magnitude in [`SPLIT_MIN`, `SPLIT_MAX`]) the
/// product's rounding error comes from [`two_product_err`] instead of a fused multiply-add:
/// the same exact value, without the out-of-line `fma` call that x86-64's baseline target
/// needs, so successive products overlap in the pipeline.
#[inline(always)]
fn product_units_small(a: f64, b: f64, scale: f64, split_exact: bool) -> Option<i64> {
    let p = a * b;
    let big = p * scale;
    if big.is_nan() || big.abs() >= TWO_POW_52 {
        return None;
    }
    let err = if split_exact {
        two_product_err(a, b, p)
    } else {
        a.mul_add(b, -p)
    };
    let int_units = big as i64;
    let frac = (big - int_units as f64) + err * scale;
    let frac_trunc = frac as i64;
    let rest = frac - frac_trunc as f64;
    let frac_units = if rest.abs() == 0.5 {
        let sign = if big != 0.0 {
            big.signum()
        } else {
            frac.signum()
        };
        (frac + 0.5 * sign) as i64
    } else {
        // Branch-free: the direction is data-dependent and would be mispredicted half the
        // time.
        frac_trunc + i64::from(rest >= 0.5) - i64::from(rest <= -0.5)
    };
    Some(int_units + frac_units)
}

/// Largest ‖z‖² of a clipped event: 𝟙(intercept) + B_x² + B_y².
fn max_z_norm_sq(layout: &Layout, feature_norm_bound: f64, target_bound: f64) -> f64 {
    f64::from(u8::from(layout.intercept))
        + feature_norm_bound * feature_norm_bound
        + target_bound * target_bound
}

/// Largest squared L2 norm, in grid units², of one event's packed contribution vector, given
/// the clip bounds. This is the Δ₂² of adding or removing one event (add/remove neighbours).
///
/// Derivation (privacy-math §6, "Sensitivity" and "one-matrix option", \[D\]). Write
/// v_ij = z_i z_j / 2^e for i ≤ j. Then ‖v‖² = Σ_{i≤j} z_i² z_j² / 4^e = (‖z‖⁴ + Σ z_i⁴)/2 / 4^e,
/// which is at most ‖z‖⁴/4^e because Σ z_i⁴ ≤ (Σ z_i²)². Rounding moves each of the `dim`
/// entries by at most ½, which adds at most √dim/2 in L2 (triangle inequality). Clipping gives
/// ‖z‖² ≤ 𝟙(intercept) + B_x² + B_y². Hence
///
///   Δ₂ ≤ (‖z‖²_max/2^e + √dim/2)·(1 + 2^-30),
///
/// where the factor (1 + 2^-30) covers float rounding in the clip and in the grid rounding
/// (`ROUNDING_MARGIN`). The function returns Δ₂².
///
/// For replace-one neighbours, use twice the Δ₂ (triangle inequality).
pub fn event_sensitivity_sq(
    layout: &Layout,
    feature_norm_bound: f64,
    target_bound: f64,
    grid_exp: i32,
) -> f64 {
    let z_sq = max_z_norm_sq(layout, feature_norm_bound, target_bound);
    let delta = (z_sq * pow2(-grid_exp) + (layout.dim() as f64).sqrt() / 2.0) * ROUNDING_MARGIN;
    delta * delta
}

/// Bits of resolution below the largest single-entry contribution in [`default_grid_exp`].
const GRID_BITS: i32 = 40;

/// A grid exponent for given clip bounds: 2^e ≈ ‖z‖²_max · 2^-40.
///
/// Why this value. One event then adds at most 2^41 grid units to any entry. That leaves
/// 2^85 events before an i128 entry could saturate, and 2^65 before a `Dd` conversion stops
/// being exact. The grid rounding (≤ ½ unit) is about 2^-41 of the largest contribution, and
/// the √dim/2 rounding term raises Δ₂ only by a relative √dim·2^-41, which is negligible.
/// Returns a value in [`GRID_EXP_RANGE`]. Bounds that are not positive and finite give the
/// exponent of a unit ‖z‖².
pub fn default_grid_exp(layout: &Layout, feature_norm_bound: f64, target_bound: f64) -> i32 {
    let z_sq = max_z_norm_sq(layout, feature_norm_bound, target_bound);
    let top = if z_sq.is_finite() && z_sq > 0.0 {
        // floor(log2) of a positive finite f64 lies in [-1074, 1023].
        z_sq.log2().floor() as i32
    } else {
        0
    };
    (top - GRID_BITS).clamp(*GRID_EXP_RANGE.start(), *GRID_EXP_RANGE.end())
}

/// How [`fit`] turns the normal equations into coefficients.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum FitMethod {
    /// Least squares with a ridge penalty: minimise ‖y − Xθ‖² + λ‖θ_features‖². The penalty
    /// λ ≥ 0 is in value units (the units of Σx²) and does not touch the intercept. λ = 0 is
    /// ordinary least squares.
    Ridge {
        /// The penalty λ ≥ 0.
        lambda: f64,
    },
    /// ℓ1-constrained least squares (LASSO in constrained form): minimise ‖y − Xθ‖² subject
    /// to ‖θ_features‖₁ ≤ r, with the intercept unpenalised. Solved by Frank–Wolfe: Talwar,
    /// Thakurta & Zhang, "Nearly Optimal Private LASSO", NIPS 2015, Alg. 2, without the noisy
    /// selection. Here the fit is post-processing of released statistics, so there is nothing
    /// left to privatise.
    L1 {
        /// The radius r > 0 of the ℓ1 ball.
        radius: f64,
    },
}

/// A fitted linear model.
#[derive(Clone, Debug, PartialEq)]
pub struct LinearFit {
    /// The intercept (if the layout has one), then one coefficient per feature.
    pub coefficients: Vec<f64>,
    /// Standard deviation of each coefficient due to the release noise, in the same order.
    /// They are 0 for exact statistics. Ridge uses the delta method (first order in the
    /// noise) and ℓ1 a parametric bootstrap. They do not include sampling variability of the
    /// data, nor the bias of the ridge, the ℓ1 ball or an eigenvalue-floor repair.
    pub std_errors: Vec<f64>,
    /// The released count n (noisy), when the layout has an intercept. Without an intercept,
    /// the statistics hold no count.
    pub n_hat: Option<f64>,
    /// Condition number of the equilibrated, centred system that was solved (1 when there
    /// are no features).
    pub condition_number: f64,
    /// What was done to make noisy statistics usable, if anything (an eigenvalue floor).
    pub repair: Option<String>,
    /// For the ℓ1 fit: the Frank–Wolfe duality gap at the returned solution. It bounds the
    /// objective's distance from the optimum, in value units². `None` for ridge.
    pub duality_gap: Option<f64>,
}

/// Why a fit was refused.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum FitError {
    /// The statistics vector does not have the layout's packed length.
    #[error("expected {expected} packed statistics for this layout, found {found}")]
    WrongLength {
        /// [`Layout::dim`].
        expected: usize,
        /// The length that was passed.
        found: usize,
    },
    /// A released statistic is NaN or infinite.
    #[error("released statistic number {index} is not finite")]
    NonFinite {
        /// Its packed position.
        index: usize,
    },
    /// A fit parameter is out of its domain.
    #[error("invalid {name} = {value}: {expected}")]
    InvalidParameter {
        /// Which parameter.
        name: &'static str,
        /// The value passed.
        value: f64,
        /// What would be valid.
        expected: &'static str,
    },
    /// The (noisy) count is below the number of coefficients plus its noise margin.
    #[error("too few rows: the released count {n_hat} is below the {needed} needed to fit")]
    TooFewRows {
        /// The released count.
        n_hat: f64,
        /// n_params + Φ⁻¹(0.999)·σ_n: the smallest count that shows, at the 99.9% level, that
        /// there are enough rows.
        needed: f64,
    },
    /// The normal equations are singular or too ill-conditioned for the data's precision
    /// (module doc, step 5).
    #[error(
        "the normal equations are too ill-conditioned to fit (condition number {condition_number:.3e}, limit 1e13): drop or combine collinear features, or add a ridge penalty"
    )]
    IllConditioned {
        /// Condition number of the equilibrated, centred system (infinite when singular).
        condition_number: f64,
    },
    /// Too many bootstrap refits failed to give an ℓ1 standard error.
    #[error("the bootstrap for ℓ1 standard errors failed in {failed} of {replicates} refits")]
    BootstrapFailed {
        /// Refits that returned an error.
        failed: usize,
        /// Refits attempted.
        replicates: usize,
    },
}

/// High-probability bound on the spectral norm of p×p symmetric Gaussian noise. The entries
/// on and above the diagonal are iid N(0, σ²) and mirrored below: the packed noise of the
/// (1, x) block. P(‖E‖₂ > bound) ≤ β.
///
/// Derivation \[D\]:
/// 1. Mean. λ_max(E) = sup_{‖v‖=1} vᵀEv. For unit u and v, the variance of uᵀEu − vᵀEv is
///    σ²(2‖uuᵀ−vvᵀ‖_F² − Σ_i(u_i²−v_i²)²). This is at most 4σ²(1 − (uᵀv)²) ≤ 4σ²‖u−v‖², the
///    increment variance of 2σ·gᵀv with g ~ N(0, I_p). The Sudakov–Fernique inequality
///    (Fernique 1975) gives E λ_max(E) ≤ 2σ E‖g‖ ≤ 2σ√p.
/// 2. Concentration. λ_max is Lipschitz in the p(p+1)/2 independent entries. Its gradient
///    (v_i², 2v_iv_j) has norm² 2 − Σv_i⁴ ≤ 2, so the constant is √2. The Gaussian
///    concentration inequality (Tsirelson–Ibragimov–Sudakov 1976) gives
///    P(λ_max > E λ_max + t) ≤ exp(−t²/(4σ²)).
/// 3. Both tails. The same holds for −E, and ‖E‖₂ = max(λ_max(E), λ_max(−E)). A union bound
///    gives P(‖E‖₂ > 2σ√p + 2σ√(ln(2/β))) ≤ β.
///
/// The result is conservative against privacy-math §6's simulated q99.9 table \[C\]. At σ = 1,
/// d = 2, 5, 10, 20, 50 it gives 8.34, 9.99, 11.84, 14.46, 19.66, where the table has 4.24,
/// 6.15, 8.12, 10.60, 15.74. A rigorous bound was preferred over the simulated quantiles: the
/// floor then holds for any p without a table. The brief's σ(2√p + √(2 ln(1/β))) uses
/// Lipschitz constant 1, but the constant here is √2.
pub fn noise_norm_bound(p: usize, sigma: f64, beta: f64) -> f64 {
    sigma * (2.0 * (p as f64).sqrt() + 2.0 * (2.0 / beta).ln().sqrt())
}

/// Covariance, at unit noise σ = 1, of w = e_b − E_A θ: the first-order error of A θ = b.
///
/// E_A and e_b are the noise in A (the p×p block of Σ z zᵀ for (1, x)) and in b (its y
/// column). The noise F on the packed vector is iid N(0, 1) and mirrored: F_ij = F_ji = ε_{i≤j}.
/// - e_b_i = F_{i,y} uses packed entries (i, y), none of which lie in the (1, x) block. So e_b
///   is independent of E_A, with Cov(e_b) = I. The yy entry enters neither.
/// - (E_A θ)_i = Σ_j F_ij θ_j. For i = k, Cov((E_Aθ)_i, (E_Aθ)_k) = Σ_j θ_j² (the pairs {i,j}
///   and {i,l} agree only for j = l). For i ≠ k, {i,j} = {k,l} forces j = k and l = i, which
///   gives θ_i θ_k.
///
/// Hence Cov(w) = (1 + ‖θ‖²) I + θθᵀ − diag(θ²), with θ the full coefficient vector (the
/// intercept included). Scale it by the noise variance in value units. This is the brief's
/// formula with θ̃ = θ; the test rebuilds it from the linear map, one packed coordinate at a
/// time.
pub fn normal_equation_noise_cov(theta: &[f64]) -> DMatrix<f64> {
    let p = theta.len();
    let norm_sq: f64 = theta.iter().map(|t| t * t).sum();
    DMatrix::from_fn(p, p, |i, k| {
        if i == k {
            1.0 + norm_sq
        } else {
            theta[i] * theta[k]
        }
    })
}

/// The normal equations A θ = b in value units. A is p×p (row-major, symmetric) for (1, x), b
/// is the y column.
#[derive(Clone, Debug)]
struct NormalEquations {
    intercept: bool,
    p: usize,
    a: Vec<Dd>,
    b: Vec<Dd>,
}

impl NormalEquations {
    /// Unpacks released statistics (grid units) into value units (× 2^grid_exp, exact).
    fn from_packed(layout: &Layout, values: &[Dd], grid_exp: i32) -> NormalEquations {
        let p = layout.n_params();
        let y = layout.target_pos();
        let value = |i: usize, j: usize| scale_dd(values[layout.index(i, j)], grid_exp);
        let mut a = Vec::with_capacity(p * p);
        for i in 0..p {
            for j in 0..p {
                a.push(value(i, j));
            }
        }
        let b = (0..p).map(|i| value(i, y)).collect();
        NormalEquations {
            intercept: layout.intercept,
            p,
            a,
            b,
        }
    }

    fn a(&self, i: usize, j: usize) -> Dd {
        self.a[i * self.p + j]
    }

    /// The released count, when there is an intercept.
    fn count(&self) -> Option<Dd> {
        self.intercept.then(|| self.a(0, 0))
    }
}

/// The system after exact elimination of the intercept (module doc, step 3), over the d
/// features:
/// - with an intercept, C = n·(S_xx + λI) − s sᵀ and c = n·S_xy − s Σy, where s = Σx;
/// - without one, C = S_xx + λI and c = S_xy.
#[derive(Clone, Debug)]
struct Reduced {
    /// n, when there is an intercept.
    count: Option<Dd>,
    /// Σx (empty without an intercept).
    sums: Vec<Dd>,
    /// Σy (0 without an intercept).
    sum_y: Dd,
    d: usize,
    c: Vec<Dd>,
    c_y: Vec<Dd>,
}

impl Reduced {
    fn new(eq: &NormalEquations, ridge: f64) -> Reduced {
        let off = usize::from(eq.intercept);
        let d = eq.p - off;
        let lam = Dd::from_f64(ridge);
        let s_xx = |j: usize, k: usize| {
            let v = eq.a(j + off, k + off);
            if j == k { v + lam } else { v }
        };
        let mut c = vec![Dd::ZERO; d * d];
        let mut c_y = vec![Dd::ZERO; d];
        match eq.count() {
            Some(n) => {
                let sums: Vec<Dd> = (0..d).map(|j| eq.a(0, j + 1)).collect();
                let sum_y = eq.b[0];
                for j in 0..d {
                    for k in j..d {
                        let v = n * s_xx(j, k) - sums[j] * sums[k];
                        c[j * d + k] = v;
                        c[k * d + j] = v;
                    }
                    c_y[j] = n * eq.b[j + 1] - sums[j] * sum_y;
                }
                Reduced {
                    count: Some(n),
                    sums,
                    sum_y,
                    d,
                    c,
                    c_y,
                }
            }
            None => {
                for j in 0..d {
                    for k in j..d {
                        let v = s_xx(j, k);
                        c[j * d + k] = v;
                        c[k * d + j] = v;
                    }
                    c_y[j] = eq.b[j];
                }
                Reduced {
                    count: None,
                    sums: Vec::new(),
                    sum_y: Dd::ZERO,
                    d,
                    c,
                    c_y,
                }
            }
        }
    }

    /// The full coefficient vector from the feature coefficients β: the intercept is
    /// (Σy − sᵀβ)/n, evaluated in `Dd`.
    fn with_intercept(&self, beta: &[f64]) -> Vec<f64> {
        match self.count {
            Some(n) => {
                let mut num = self.sum_y;
                for (s, b) in self.sums.iter().zip(beta) {
                    num = num - *s * *b;
                }
                let mut theta = Vec::with_capacity(beta.len() + 1);
                theta.push((num / n).to_f64());
                theta.extend_from_slice(beta);
                theta
            }
            None => beta.to_vec(),
        }
    }
}

/// How the equilibrated matrix is inverted.
enum Solver {
    /// The usual case: a Cholesky factor.
    Cholesky(Cholesky<f64, Dyn>),
    /// Cholesky failed on a matrix the eigen-decomposition finds positive definite (possible
    /// near the condition limit).
    Eigen(SymmetricEigen<f64, Dyn>),
}

/// The equilibrated factorisation of C (module doc, step 4).
struct Factor {
    /// D = diag(C)^-½.
    scale: Vec<f64>,
    /// `None` when D C D is not positive definite.
    solver: Option<Solver>,
    /// λ_max/λ_min of D C D; infinite when it is not positive definite.
    condition_number: f64,
}

impl Factor {
    fn new(c: &[Dd], d: usize) -> Factor {
        if d == 0 {
            return Factor {
                scale: Vec::new(),
                solver: None,
                condition_number: 1.0,
            };
        }
        let diag: Vec<f64> = (0..d).map(|j| c[j * d + j].to_f64()).collect();
        if !diag.iter().all(|v| is_positive_finite(*v)) {
            return Factor {
                scale: vec![1.0; d],
                solver: None,
                condition_number: f64::INFINITY,
            };
        }
        let scale: Vec<f64> = diag.iter().map(|v| 1.0 / v.sqrt()).collect();
        // Scale in Dd, then round once: the matrix is symmetric by construction.
        let m = DMatrix::from_fn(d, d, |j, k| (c[j * d + k] * scale[j] * scale[k]).to_f64());
        let eigen = SymmetricEigen::new(m.clone());
        let (lo, hi) = eigen
            .eigenvalues
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                (lo.min(v), hi.max(v))
            });
        let positive = lo > 0.0 && lo.is_finite() && hi.is_finite();
        let condition_number = if positive { hi / lo } else { f64::INFINITY };
        let solver = if !positive {
            None
        } else {
            match m.cholesky() {
                Some(ch) => Some(Solver::Cholesky(ch)),
                None => Some(Solver::Eigen(eigen)),
            }
        };
        Factor {
            scale,
            solver,
            condition_number,
        }
    }

    /// C⁻¹ r in f64 via D (D C D)⁻¹ D r. Zero when C is not positive definite; callers check
    /// `solver` first.
    fn solve(&self, r: &[f64]) -> Vec<f64> {
        let d = self.scale.len();
        let rhs = DVector::from_iterator(d, r.iter().zip(&self.scale).map(|(v, s)| v * s));
        let u = match &self.solver {
            Some(Solver::Cholesky(ch)) => ch.solve(&rhs),
            Some(Solver::Eigen(e)) => {
                let mut proj = e.eigenvectors.transpose() * rhs;
                for (v, lam) in proj.iter_mut().zip(e.eigenvalues.iter()) {
                    *v /= *lam;
                }
                &e.eigenvectors * proj
            }
            None => DVector::zeros(d),
        };
        u.iter().zip(&self.scale).map(|(v, s)| v * s).collect()
    }

    /// C⁻¹ c with mixed-precision iterative refinement against the `Dd` matrix (module doc,
    /// step 6).
    fn solve_refined(&self, c: &[Dd], rhs: &[Dd]) -> Vec<f64> {
        let d = self.scale.len();
        let mut x = self.solve(&rhs.iter().map(|v| v.to_f64()).collect::<Vec<_>>());
        for _ in 0..REFINEMENT_STEPS {
            let residual: Vec<f64> = (0..d)
                .map(|j| {
                    let mut acc = rhs[j];
                    for k in 0..d {
                        acc = acc - c[j * d + k] * x[k];
                    }
                    acc.to_f64()
                })
                .collect();
            let dx = self.solve(&residual);
            let mut dx_max = 0.0f64;
            let mut x_max = 0.0f64;
            for (xk, dk) in x.iter_mut().zip(&dx) {
                *xk += dk;
                dx_max = dx_max.max(dk.abs());
                x_max = x_max.max(xk.abs());
            }
            if dx_max <= f64::EPSILON * x_max {
                break;
            }
        }
        x
    }
}

/// M⁻¹ r for the full p×p ridge matrix M = A + λJ, through the reduced system:
/// x_f = C⁻¹(n r_f − s r₀) and x₀ = (r₀ − sᵀx_f)/n (block elimination; with C = n·Schur
/// complement). Used for the standard errors, where f64 is ample.
fn solve_full(red: &Reduced, factor: &Factor, r: &[f64]) -> Vec<f64> {
    match red.count {
        Some(n) => {
            let n = n.to_f64();
            let r0 = r[0];
            let sums: Vec<f64> = red.sums.iter().map(|s| s.to_f64()).collect();
            let rhs: Vec<f64> = (0..red.d).map(|j| n * r[j + 1] - sums[j] * r0).collect();
            let xf = factor.solve(&rhs);
            let x0 = (r0 - sums.iter().zip(&xf).map(|(s, x)| s * x).sum::<f64>()) / n;
            let mut x = Vec::with_capacity(red.d + 1);
            x.push(x0);
            x.extend(xf);
            x
        }
        None => factor.solve(r),
    }
}

/// Delta-method standard errors: Cov(θ) ≈ M⁻¹ Cov(w) M⁻¹ with Cov(w) from
/// [`normal_equation_noise_cov`] times σ_v² (value units). The derivation: from
/// (M + E_A)(θ + dθ) = b + e_b, to first order dθ = M⁻¹(e_b − E_A θ). Only the diagonal is
/// needed: Var θ_k = g_kᵀ Cov(w) g_k, with g_k = M⁻¹ e_k.
///
/// With a [`Shift`], the reported intercept is the linear combination gᵀθ with
/// g = (1, −γ_1, …, −γ_d), and its variance is (M⁻¹g)ᵀ Cov(w) (M⁻¹g) by the same argument.
fn delta_method_std_errors(
    red: &Reduced,
    factor: &Factor,
    theta: &[f64],
    sigma_v: f64,
    shift: Option<&Shift>,
) -> Vec<f64> {
    let p = theta.len();
    let w = normal_equation_noise_cov(theta) * (sigma_v * sigma_v);
    (0..p)
        .map(|k| {
            let mut unit = vec![0.0; p];
            unit[k] = 1.0;
            if let (0, Some(sh), true) = (k, shift, red.count.is_some()) {
                for (u, g) in unit[1..].iter_mut().zip(&sh.features) {
                    *u = -g;
                }
            }
            let g = DVector::from_vec(solve_full(red, factor, &unit));
            let var = (g.transpose() * &w * &g)[(0, 0)];
            var.max(0.0).sqrt()
        })
        .collect()
}

/// The eigenvalue-floor repair (privacy-math §6 option 1, \[D\]). If Â − τI is not positive
/// definite, with τ = [`noise_norm_bound`] at β = [`FLOOR_FAILURE_PROB`], every eigenvalue of
/// Â below τ is raised to τ.
///
/// Why τ. The true A = Σ(1,x)(1,x)ᵀ is positive semidefinite, so by Weyl's inequality
/// λ_i(Â) ≥ λ_i(A) − ‖E‖₂ ≥ −τ except with probability β. Eigenvalues below τ cannot be told
/// apart from 0, and inverting them would amplify the noise by 1/|λ̂|. Flooring them at τ
/// bounds ‖Â⁻¹‖ ≤ 1/τ, at the price of shrinking θ along those directions. The floor is
/// applied in value units, where the noise is isotropic, so it is not equilibrated.
///
/// Numerics. The positive-definiteness test runs on the equilibrated shifted matrix, so
/// well-conditioned exact-looking data are never touched. The eigen-decomposition runs on Â
/// unscaled, with absolute error ≈ 2^-53‖Â‖. That is below τ while n·‖z‖²_max·1e-16 is below
/// the noise level, that is for any realistic count.
fn repair_by_floor(eq: &mut NormalEquations, sigma_v: f64) -> Option<String> {
    let p = eq.p;
    if p == 0 {
        return None;
    }
    let tau = noise_norm_bound(p, sigma_v, FLOOR_FAILURE_PROB);
    let mut shifted = eq.a.clone();
    for i in 0..p {
        shifted[i * p + i] = shifted[i * p + i] - Dd::from_f64(tau);
    }
    let shifted_factor = Factor::new(&shifted, p);
    if shifted_factor.solver.is_some() {
        return None;
    }
    let a = DMatrix::from_fn(p, p, |i, j| eq.a(i, j).to_f64());
    let eigen = SymmetricEigen::new(a);
    let n_low = eigen.eigenvalues.iter().filter(|&&l| l < tau).count();
    if n_low == 0 {
        return None;
    }
    let floored = DMatrix::from_diagonal(&eigen.eigenvalues.map(|l| l.max(tau)));
    let rebuilt = &eigen.eigenvectors * floored * eigen.eigenvectors.transpose();
    for i in 0..p {
        for j in 0..p {
            // Symmetrise: the product is symmetric only up to rounding.
            let v = 0.5 * (rebuilt[(i, j)] + rebuilt[(j, i)]);
            eq.a[i * p + j] = Dd::from_f64(v);
        }
    }
    Some(format!(
        "eigenvalue floor: {n_low} of {p} eigenvalues of the (1, x) cross-product matrix were \
         below the noise level {tau:.6e} (a {:.1}% bound on the noise spectral norm, value \
         units) and were raised to it; coefficients along those directions are shrunk toward \
         zero and their std_errors do not include that bias",
        100.0 * (1.0 - FLOOR_FAILURE_PROB)
    ))
}

/// Result of a Frank–Wolfe run.
#[derive(Clone, Debug)]
struct FwSolution {
    beta: Vec<f64>,
    gap: f64,
}

/// Frank–Wolfe for min g(β) = βᵀQβ − 2qᵀβ over ‖β‖₁ ≤ r (Frank & Wolfe 1956; the step
/// 2/(t+2) of TTZ 2015 Alg. 2 and Jaggi, ICML 2013, Alg. 1).
///
/// At each step the linear minimiser over the ball is the vertex s = −r·sign(∇_j)·e_j, with
/// j = argmax|∇_j| and ∇ = 2(Qβ − q). The duality gap ∇ᵀ(β − s) = ∇ᵀβ + r‖∇‖_∞ bounds
/// g(β) − g* from above (convexity), so the loop stops once it is small. Otherwise it runs
/// [`FW_ITERATIONS`] steps: Jaggi's Theorem 1 then gives g(β) − g* ≤ 2C_f/(T+2) with curvature
/// C_f ≤ 2·λ_max(Q)·(2r)². Qβ is updated in O(d) per step and recomputed exactly at the end.
fn frank_wolfe(q_mat: &DMatrix<f64>, q: &[f64], radius: f64) -> FwSolution {
    let d = q.len();
    let mut beta = vec![0.0; d];
    let mut q_beta = vec![0.0; d];
    let gap_at = |beta: &[f64], q_beta: &[f64]| -> (f64, usize, f64) {
        let mut lin = 0.0;
        let mut best = 0;
        let mut best_abs = -1.0;
        let mut best_grad = 0.0;
        for j in 0..d {
            let g = 2.0 * (q_beta[j] - q[j]);
            lin += g * beta[j];
            if g.abs() > best_abs {
                best_abs = g.abs();
                best = j;
                best_grad = g;
            }
        }
        (lin + radius * best_abs.max(0.0), best, best_grad)
    };
    if d == 0 {
        return FwSolution { beta, gap: 0.0 };
    }
    let (initial_gap, _, _) = gap_at(&beta, &q_beta);
    let tolerance = FW_RELATIVE_GAP * initial_gap;
    for t in 0..FW_ITERATIONS {
        let (gap, j, grad_j) = gap_at(&beta, &q_beta);
        if gap <= tolerance {
            break;
        }
        let vertex = if grad_j > 0.0 { -radius } else { radius };
        let step = 2.0 / (t as f64 + 2.0);
        for k in 0..d {
            beta[k] *= 1.0 - step;
            q_beta[k] = (1.0 - step) * q_beta[k] + step * vertex * q_mat[(k, j)];
        }
        beta[j] += step * vertex;
    }
    let exact = q_mat * DVector::from_column_slice(&beta);
    let (gap, _, _) = gap_at(&beta, exact.as_slice());
    FwSolution {
        beta,
        gap: gap.max(0.0),
    }
}

/// A point estimate, before standard errors.
struct Estimate {
    coefficients: Vec<f64>,
    n_hat: Option<f64>,
    condition_number: f64,
    repair: Option<String>,
    duality_gap: Option<f64>,
    /// The solved ridge system, kept for the delta method.
    system: Option<(Reduced, Factor)>,
}

/// `v` is finite and > 0 (false for NaN).
fn is_positive_finite(v: f64) -> bool {
    v.is_finite() && v > 0.0
}

/// `v` is finite and ≥ 0 (false for NaN).
fn is_nonnegative_finite(v: f64) -> bool {
    v.is_finite() && v >= 0.0
}

/// Checks the inputs that do not depend on the numbers' meaning.
fn validate(
    layout: &Layout,
    values: &[Dd],
    noise_var: f64,
    grid_exp: i32,
    method: &FitMethod,
) -> Result<(), FitError> {
    if values.len() != layout.dim() {
        return Err(FitError::WrongLength {
            expected: layout.dim(),
            found: values.len(),
        });
    }
    if let Some(index) = values
        .iter()
        .position(|v| !v.hi.is_finite() || !v.lo.is_finite())
    {
        return Err(FitError::NonFinite { index });
    }
    if !is_nonnegative_finite(noise_var) {
        return Err(FitError::InvalidParameter {
            name: "noise_var",
            value: noise_var,
            expected: "a finite variance >= 0",
        });
    }
    if !GRID_EXP_RANGE.contains(&grid_exp) {
        return Err(FitError::InvalidParameter {
            name: "grid_exp",
            value: f64::from(grid_exp),
            expected: "an exponent in -900..=900",
        });
    }
    match *method {
        FitMethod::Ridge { lambda } if !is_nonnegative_finite(lambda) => {
            Err(FitError::InvalidParameter {
                name: "lambda",
                value: lambda,
                expected: "a finite ridge penalty >= 0",
            })
        }
        FitMethod::L1 { radius } if !is_positive_finite(radius) => {
            Err(FitError::InvalidParameter {
                name: "l1_radius",
                value: radius,
                expected: "a finite radius > 0",
            })
        }
        _ => Ok(()),
    }
}

/// Everything in [`fit`] except the standard errors.
fn estimate(
    layout: &Layout,
    values: &[Dd],
    noise_var: f64,
    grid_exp: i32,
    method: &FitMethod,
) -> Result<Estimate, FitError> {
    let mut eq = NormalEquations::from_packed(layout, values, grid_exp);
    // Noise std in value units: σ·2^e (exact scaling).
    let sigma_v = noise_var.sqrt() * pow2(grid_exp);
    let n_hat = eq.count().map(|n| n.to_f64());
    if let Some(n) = n_hat {
        // At least as many rows as coefficients, shown at the 99.9% level under the count's
        // noise: below that the count cannot be told apart from too few rows.
        let needed = layout.n_params() as f64 + Z_0999 * sigma_v;
        if n.is_nan() || n < needed {
            return Err(FitError::TooFewRows { n_hat: n, needed });
        }
    }
    let repair = if sigma_v > 0.0 {
        repair_by_floor(&mut eq, sigma_v)
    } else {
        None
    };
    match *method {
        FitMethod::Ridge { lambda } => {
            let red = Reduced::new(&eq, lambda);
            let factor = Factor::new(&red.c, red.d);
            let well_posed = red.d == 0 || factor.solver.is_some();
            if !well_posed || factor.condition_number > MAX_CONDITION {
                return Err(FitError::IllConditioned {
                    condition_number: factor.condition_number,
                });
            }
            let beta = factor.solve_refined(&red.c, &red.c_y);
            let coefficients = red.with_intercept(&beta);
            Ok(Estimate {
                coefficients,
                n_hat,
                condition_number: factor.condition_number,
                repair,
                duality_gap: None,
                system: Some((red, factor)),
            })
        }
        FitMethod::L1 { radius } => {
            let red = Reduced::new(&eq, 0.0);
            let factor = Factor::new(&red.c, red.d);
            // The objective over β after minimising out the intercept is βᵀQβ − 2qᵀβ with
            // Q = C/n and q = c/n (Q = S_xx, q = S_xy without an intercept).
            let d = red.d;
            let norm = red.count.unwrap_or(Dd::from_f64(1.0));
            let q_mat = DMatrix::from_fn(d, d, |j, k| (red.c[j * d + k] / norm).to_f64());
            let q: Vec<f64> = red.c_y.iter().map(|v| (*v / norm).to_f64()).collect();
            let fw = frank_wolfe(&q_mat, &q, radius);
            let coefficients = red.with_intercept(&fw.beta);
            Ok(Estimate {
                coefficients,
                n_hat,
                condition_number: factor.condition_number,
                repair,
                duality_gap: Some(fw.gap),
                system: None,
            })
        }
    }
}

/// Parametric-bootstrap standard errors for the ℓ1 fit. Each of [`BOOTSTRAP_REPLICATES`]
/// replicates adds fresh N(0, σ²) noise to every released coordinate (grid units), the same
/// noise law the mechanism used, and refits. The standard error is the sample standard
/// deviation over replicates (Efron & Tibshirani, *An Introduction to the Bootstrap*, 1993,
/// §6.5). The delta method does not apply here, because the ℓ1 solution is not a smooth
/// function of the statistics where the constraint is active. Replicates whose refit fails
/// are skipped, and more than half failing is an error.
fn bootstrap_std_errors<R: Rng + ?Sized>(
    layout: &Layout,
    values: &[Dd],
    noise_var: f64,
    grid_exp: i32,
    method: &FitMethod,
    shift: Option<&Shift>,
    rng: &mut R,
) -> Result<Vec<f64>, FitError> {
    let sigma = noise_var.sqrt();
    let p = layout.n_params();
    // Welford's running mean and sum of squared deviations (Welford, Technometrics 4, 1962):
    // the naive Σc² − m·mean² cancels catastrophically when a coefficient's spread is tiny
    // against its size (an intercept of 1e6 with a std error of 1e-3).
    let mut mean = vec![0.0; p];
    let mut m2 = vec![0.0; p];
    let mut ok = 0usize;
    let mut perturbed = values.to_vec();
    for _ in 0..BOOTSTRAP_REPLICATES {
        for (out, v) in perturbed.iter_mut().zip(values) {
            let z: f64 = StandardNormal.sample(rng);
            *out = *v + Dd::from_f64(sigma * z);
        }
        if let Ok(est) = estimate(layout, &perturbed, noise_var, grid_exp, method) {
            ok += 1;
            let coefficients = unshift(layout, est.coefficients, shift);
            for (k, c) in coefficients.iter().enumerate() {
                let delta = c - mean[k];
                mean[k] += delta / ok as f64;
                m2[k] += delta * (c - mean[k]);
            }
        }
    }
    let failed = BOOTSTRAP_REPLICATES - ok;
    if 2 * failed > BOOTSTRAP_REPLICATES || ok < 2 {
        return Err(FitError::BootstrapFailed {
            failed,
            replicates: BOOTSTRAP_REPLICATES,
        });
    }
    Ok(m2
        .iter()
        .map(|v| (v / (ok - 1) as f64).max(0.0).sqrt())
        .collect())
}

/// Fit from released statistics `values` (grid units, packed as [`Layout::index`]). The
/// per-coordinate noise variance is `noise_var` (grid units²; 0 for exact data) and the grid
/// exponent is `grid_exp`. `rng` is used only by the ℓ1 bootstrap. The module doc describes the
/// numerics; coefficients are in value units.
///
/// Errors: [`FitError::TooFewRows`] when the count is below n_params (plus its noise margin),
/// and [`FitError::IllConditioned`] (ridge only) past [`MAX_CONDITION`]. The ℓ1 ball keeps
/// the ℓ1 problem well-posed, so it is not refused for conditioning. Its solution may then
/// be non-unique, which `condition_number` shows.
pub fn fit<R: Rng + ?Sized>(
    layout: &Layout,
    values: &[Dd],
    noise_var: f64,
    grid_exp: i32,
    method: &FitMethod,
    rng: &mut R,
) -> Result<LinearFit, FitError> {
    fit_shifted(layout, values, noise_var, grid_exp, method, None, rng)
}

/// The centres of statistics accumulated from z = (1, x − γ, y − γ_y) (value units; see
/// `plan::MomentUnits`). Only meaningful with an intercept.
#[derive(Clone, Debug, PartialEq)]
pub struct Shift {
    /// γ_j per feature.
    pub features: Vec<f64>,
    /// γ_y.
    pub target: f64,
}

/// Maps coefficients fitted on centred data back to the uncentred model. From
/// y − γ_y = θ_0 + Σ θ_j (x_j − γ_j): the slopes are unchanged and the intercept is
/// θ_0 + γ_y − Σ θ_j γ_j. Without an intercept (or shift) the coefficients are returned as is.
fn unshift(layout: &Layout, mut coefficients: Vec<f64>, shift: Option<&Shift>) -> Vec<f64> {
    if let (Some(sh), true) = (shift, layout.intercept()) {
        let moved: f64 = coefficients[1..]
            .iter()
            .zip(&sh.features)
            .map(|(t, g)| t * g)
            .sum();
        coefficients[0] += sh.target - moved;
    }
    coefficients
}

/// [`fit`] of statistics accumulated on centred data (`shift`), with coefficients and
/// standard errors reported for the uncentred model (`unshift`). `shift` is ignored without
/// an intercept. The numerics are those of [`fit`]. The centres come from the configuration,
/// not the data, so centring costs no budget, and mapping back is post-processing.
pub fn fit_shifted<R: Rng + ?Sized>(
    layout: &Layout,
    values: &[Dd],
    noise_var: f64,
    grid_exp: i32,
    method: &FitMethod,
    shift: Option<&Shift>,
    rng: &mut R,
) -> Result<LinearFit, FitError> {
    let shift = shift.filter(|_| layout.intercept());
    if let Some(sh) = shift {
        if sh.features.len() != layout.n_features() {
            return Err(FitError::WrongLength {
                expected: layout.n_features(),
                found: sh.features.len(),
            });
        }
        if let Some(bad) = sh
            .features
            .iter()
            .chain([&sh.target])
            .find(|v| !v.is_finite())
        {
            return Err(FitError::InvalidParameter {
                name: "shift",
                value: *bad,
                expected: "finite centres",
            });
        }
    }
    validate(layout, values, noise_var, grid_exp, method)?;
    let est = estimate(layout, values, noise_var, grid_exp, method)?;
    let p = est.coefficients.len();
    let std_errors = if noise_var == 0.0 {
        vec![0.0; p]
    } else {
        match (&est.system, method) {
            (Some((red, factor)), _) => {
                let sigma_v = noise_var.sqrt() * pow2(grid_exp);
                delta_method_std_errors(red, factor, &est.coefficients, sigma_v, shift)
            }
            (None, _) => {
                bootstrap_std_errors(layout, values, noise_var, grid_exp, method, shift, rng)?
            }
        }
    };
    Ok(LinearFit {
        coefficients: unshift(layout, est.coefficients, shift),
        std_errors,
        n_hat: est.n_hat,
        condition_number: est.condition_number,
        repair: est.repair,
        duality_gap: est.duality_gap,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use rand::rngs::ChaCha20Rng;
    use rand::{RngExt, SeedableRng};
    use statrs::distribution::{ContinuousCDF, Normal};

    /// One data row: features and target.
    type Row = (Vec<f64>, f64);

    /// Exact packed statistics of `rows` on grid 2^e, through [`accumulate`].
    fn exact_values(layout: &Layout, rows: &[Row], grid_exp: i32) -> Vec<Dd> {
        let mut acc = vec![0i128; layout.dim()];
        for (x, y) in rows {
            accumulate(layout, x, *y, grid_exp, &mut acc);
        }
        acc.into_iter().map(Dd::from_i128).collect()
    }

    /// The finest grid on which every accumulated entry stays below 2^124, leaving two bits
    /// of i128 headroom. Entries below 2^106 convert to `Dd` exactly, and larger ones round at
    /// 2^-106 relative, which is far below what the fits can resolve.
    fn finest_grid(layout: &Layout, rows: &[Row]) -> i32 {
        let z_len = layout.z_len();
        let mut max_entry = 0.0f64;
        for i in 0..z_len {
            for j in i..z_len {
                let s: f64 = rows
                    .iter()
                    .map(|(x, y)| {
                        let z = |p: usize| match layout.role(p) {
                            Role::One => 1.0,
                            Role::Feature(k) => x[k],
                            Role::Target => *y,
                        };
                        (z(i) * z(j)).abs()
                    })
                    .sum();
                max_entry = max_entry.max(s);
            }
        }
        max_entry.log2().ceil() as i32 - 124
    }

    /// Log relative error, −log10(|est − cert|/|cert|) (McCullough, "Assessing the
    /// reliability of statistical software", Am. Statistician 52(4), 1998). It is capped at
    /// 15, the number of digits NIST certifies.
    fn lre(est: f64, cert: f64) -> f64 {
        let rel = ((est - cert) / cert).abs();
        if rel == 0.0 {
            15.0
        } else {
            (-rel.log10()).min(15.0)
        }
    }

    fn nist_dir() -> std::path::PathBuf {
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/nist")
    }

    /// Reads a NIST CSV: first column y, the rest the predictors.
    fn nist_rows(name: &str) -> Vec<Row> {
        let text = std::fs::read_to_string(nist_dir().join(format!("{name}.csv"))).unwrap();
        text.lines()
            .skip(1)
            .filter(|l| !l.trim().is_empty())
            .map(|l| {
                let v: Vec<f64> = l.split(',').map(|f| f.trim().parse().unwrap()).collect();
                (v[1..].to_vec(), v[0])
            })
            .collect()
    }

    /// Certified coefficients, parsed from the exact published strings.
    fn nist_certified(name: &str) -> Vec<f64> {
        let text = std::fs::read_to_string(nist_dir().join("certified.json")).unwrap();
        let json: serde_json::Value = serde_json::from_str(&text).unwrap();
        json[name]["coefficients_str"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap().parse().unwrap())
            .collect()
    }

    /// Fits `rows` exactly (noise_var = 0) and returns the LRE of every coefficient.
    fn nist_lres(name: &str, rows: &[Row], intercept: bool, certified: &[f64]) -> Vec<f64> {
        let layout = Layout::new(rows[0].0.len(), intercept);
        let e = finest_grid(&layout, rows);
        let values = exact_values(&layout, rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let fit = fit(
            &layout,
            &values,
            0.0,
            e,
            &FitMethod::Ridge { lambda: 0.0 },
            &mut rng,
        )
        .unwrap();
        assert_eq!(fit.coefficients.len(), certified.len());
        assert!(fit.std_errors.iter().all(|s| *s == 0.0));
        let lres: Vec<f64> = fit
            .coefficients
            .iter()
            .zip(certified)
            .map(|(e, c)| lre(*e, *c))
            .collect();
        println!(
            "{name}: grid 2^{e}, condition {:.3e}, LRE per coefficient {:?}",
            fit.condition_number,
            lres.iter()
                .map(|l| (l * 10.0).round() / 10.0)
                .collect::<Vec<_>>()
        );
        lres
    }

    fn min(v: &[f64]) -> f64 {
        v.iter().cloned().fold(f64::INFINITY, f64::min)
    }

    // --- NIST StRD linear least squares (tests/data/nist, NIST/ITL, public domain) ---------

    #[test]
    fn nist_norris_certified_digits() {
        // NIST StRD Norris, certified B0, B1 (certified.json).
        // B0 = −0.26 against ȳ ≈ 400: the nearest doubles to the decimal data (relative
        // error ≤ 2^-53) already move B0 by about 1e-13, so ~13 digits is the data's limit.
        let lres = nist_lres(
            "Norris",
            &nist_rows("Norris"),
            true,
            &nist_certified("Norris"),
        );
        assert!(min(&lres) >= 12.5, "{lres:?}");
    }

    #[test]
    fn nist_pontius_certified_digits() {
        // NIST StRD Pontius: y = B0 + B1 x + B2 x², with the x² column built here.
        let cert = nist_certified("Pontius");
        let raw: Vec<Row> = nist_rows("Pontius")
            .into_iter()
            .map(|(x, y)| (vec![x[0], x[0] * x[0]], y))
            .collect();
        // Raw units: one grid has to hold Σx⁴ ≈ 2^91 and y ≈ 0.1 together, so 2^-34 is the
        // finest grid that fits in i128, and y's grid rounding (≈ 3e-11 per row) limits the
        // small intercept B0 = 6.7e-4 to about 7.7 digits (B1 10.6, B2 8.8).
        let lres = nist_lres("Pontius (raw units)", &raw, true, &cert);
        assert!(min(&lres) >= 7.5, "{lres:?}");
        // Measuring x in units of 2^21 is an exact change of units (a power of two). The grid
        // can then resolve every product exactly: the limit is the data, not the grid.
        let unit = pow2(21);
        let scaled: Vec<Row> = raw
            .iter()
            .map(|(x, y)| (vec![x[0] / unit, x[1] / (unit * unit)], *y))
            .collect();
        let cert_scaled = [cert[0], cert[1] * unit, cert[2] * unit * unit];
        let lres = nist_lres("Pontius (x in 2^21 units)", &scaled, true, &cert_scaled);
        assert!(min(&lres) >= 12.0, "{lres:?}");
    }

    #[test]
    fn nist_noint1_certified_digits() {
        // NIST StRD NoInt1: y = B1 x, no intercept.
        let lres = nist_lres(
            "NoInt1",
            &nist_rows("NoInt1"),
            false,
            &nist_certified("NoInt1"),
        );
        assert!(min(&lres) >= 14.0, "{lres:?}");
    }

    #[test]
    fn nist_noint2_certified_digits() {
        // NIST StRD NoInt2: y = B1 x, no intercept, 3 rows.
        let lres = nist_lres(
            "NoInt2",
            &nist_rows("NoInt2"),
            false,
            &nist_certified("NoInt2"),
        );
        assert!(min(&lres) >= 14.0, "{lres:?}");
    }

    #[test]
    fn nist_longley_certified_digits() {
        // NIST StRD Longley (Longley 1967, JASA 62): the issue demands ≥ 8 digits on every
        // coefficient. The README of the data notes plain f64 normal equations reach 7.2.
        let lres = nist_lres(
            "Longley",
            &nist_rows("Longley"),
            true,
            &nist_certified("Longley"),
        );
        assert!(min(&lres) >= 8.0, "{lres:?}");
        // What exact accumulation, exact centring and refinement reach: 14.6 or more.
        assert!(min(&lres) >= 14.0, "{lres:?}");
    }

    // --- Helpers for the simulated data sets -------------------------------------------

    /// A correlated design with d ≤ 3 features and Gaussian errors (seeded): x₁ ~ U(−2, 2),
    /// x₂ = 0.5x₁ + U(−2, 2), x₃ = U(−2, 2), y = 1.5 + 0.8x₁ − 0.5x₂ + 0.3x₃ + 0.5·N(0, 1).
    fn simulated_rows(seed: u64, n: usize, d: usize) -> Vec<Row> {
        let mut rng = ChaCha20Rng::seed_from_u64(seed);
        let beta = [0.8, -0.5, 0.3];
        (0..n)
            .map(|_| {
                let u1: f64 = rng.random_range(-2.0..2.0);
                let u2: f64 = rng.random_range(-2.0..2.0);
                let u3: f64 = rng.random_range(-2.0..2.0);
                let x = [u1, 0.5 * u1 + u2, u3][..d].to_vec();
                let noise: f64 = StandardNormal.sample(&mut rng);
                let y = 1.5 + x.iter().zip(&beta).map(|(a, b)| a * b).sum::<f64>() + 0.5 * noise;
                (x, y)
            })
            .collect()
    }

    /// Two-pass centred cross-products in plain f64, computed independently of the module:
    /// Q = Σ(x − x̄)(x − x̄)ᵀ, q = Σ(x − x̄)(y − ȳ), and the means.
    fn centred_reference(rows: &[Row]) -> (DMatrix<f64>, DVector<f64>, Vec<f64>, f64) {
        let n = rows.len() as f64;
        let d = rows[0].0.len();
        let mut mean_x = vec![0.0; d];
        let mut mean_y = 0.0;
        for (x, y) in rows {
            for k in 0..d {
                mean_x[k] += x[k] / n;
            }
            mean_y += y / n;
        }
        let mut q_mat = DMatrix::zeros(d, d);
        let mut q = DVector::zeros(d);
        for (x, y) in rows {
            for j in 0..d {
                for k in 0..d {
                    q_mat[(j, k)] += (x[j] - mean_x[j]) * (x[k] - mean_x[k]);
                }
                q[j] += (x[j] - mean_x[j]) * (y - mean_y);
            }
        }
        (q_mat, q, mean_x, mean_y)
    }

    /// g(β) = βᵀQβ − 2qᵀβ, the centred least-squares objective (up to a constant).
    fn objective(q_mat: &DMatrix<f64>, q: &DVector<f64>, beta: &[f64]) -> f64 {
        let b = DVector::from_column_slice(beta);
        (b.transpose() * q_mat * &b)[(0, 0)] - 2.0 * q.dot(&b)
    }

    fn add_noise(exact: &[Dd], sigma: f64, rng: &mut ChaCha20Rng) -> Vec<Dd> {
        exact
            .iter()
            .map(|v| {
                let z: f64 = StandardNormal.sample(rng);
                *v + Dd::from_f64(sigma * z)
            })
            .collect()
    }

    const OLS: FitMethod = FitMethod::Ridge { lambda: 0.0 };

    /// Least squares on exact statistics accumulated on the finest grid.
    fn fit_exact(layout: &Layout, rows: &[Row]) -> LinearFit {
        let e = finest_grid(layout, rows);
        let values = exact_values(layout, rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        fit(layout, &values, 0.0, e, &OLS, &mut rng).unwrap()
    }

    // --- Centred statistics (fit_shifted) ----------------------------------------------

    /// `rows` moved by −γ (features) and −γ_y (target).
    fn shifted(rows: &[Row], gamma: &[f64], gamma_y: f64) -> Vec<Row> {
        rows.iter()
            .map(|(x, y)| {
                (
                    x.iter().zip(gamma).map(|(a, g)| a - g).collect(),
                    y - gamma_y,
                )
            })
            .collect()
    }

    #[test]
    fn fit_shifted_maps_centred_statistics_back_to_the_raw_model() {
        // With an intercept, least squares is equivariant under x → x − γ, y → y − γ_y: the
        // slopes are unchanged and the intercept moves by γ_y − Σ θ_j γ_j (algebra of the
        // normal equations; any regression text). Reference: the raw fit of the same rows.
        let layout = Layout::new(2, true);
        let raw: Vec<Row> = simulated_rows(11, 400, 2)
            .into_iter()
            .map(|(x, y)| (vec![x[0] + 7.0, x[1] - 3.0], y + 20.0))
            .collect();
        let reference = fit_exact(&layout, &raw);
        let (gamma, gamma_y) = (vec![7.5, -2.0], 21.0);
        let centred = shifted(&raw, &gamma, gamma_y);
        let e = finest_grid(&layout, &centred);
        let values = exact_values(&layout, &centred, e);
        let shift = Shift {
            features: gamma.clone(),
            target: gamma_y,
        };
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let got = fit_shifted(&layout, &values, 0.0, e, &OLS, Some(&shift), &mut rng).unwrap();
        for (g, r) in got.coefficients.iter().zip(&reference.coefficients) {
            assert!((g - r).abs() <= 1e-12 * r.abs().max(1.0), "{g} vs {r}");
        }
        // The ℓ1 path maps back the same way. After the intercept is eliminated, Frank–Wolfe
        // sees the same centred quadratic either way, so the raw ℓ1 fit is the reference.
        let l1 = FitMethod::L1 { radius: 1.0 };
        let e_raw = finest_grid(&layout, &raw);
        let raw_l1 = fit(
            &layout,
            &exact_values(&layout, &raw, e_raw),
            0.0,
            e_raw,
            &l1,
            &mut rng,
        )
        .unwrap();
        let got = fit_shifted(&layout, &values, 0.0, e, &l1, Some(&shift), &mut rng).unwrap();
        for (g, r) in got.coefficients.iter().zip(&raw_l1.coefficients) {
            assert!((g - r).abs() <= 1e-9 * r.abs().max(1.0), "{g} vs {r}");
        }
        // Without an intercept the shift is ignored (there is no constant to absorb it).
        let no_int = Layout::new(2, false);
        let e = finest_grid(&no_int, &raw);
        let values = exact_values(&no_int, &raw, e);
        let a = fit(&no_int, &values, 0.0, e, &OLS, &mut rng).unwrap();
        let b = fit_shifted(&no_int, &values, 0.0, e, &OLS, Some(&shift), &mut rng).unwrap();
        assert_eq!(a.coefficients, b.coefficients);
    }

    #[test]
    fn shifted_intercept_std_error_matches_simulation() {
        // The delta-method SE of the mapped-back intercept gᵀθ, g = (1, −γ), against the
        // spread of the same estimate over repeated noise draws. At this noise level the
        // first-order approximation is accurate; the sample SD of R = 4000 draws has relative
        // standard error 1/√(2R) ≈ 1.1% (common practice), so 6% is over 5 of those.
        let layout = Layout::new(2, true);
        let centred = shifted(&simulated_rows(12, 2000, 2), &[-4.0, 1.0], -10.0);
        let e = -20;
        let exact = exact_values(&layout, &centred, e);
        let shift = Shift {
            features: vec![-4.0, 1.0],
            target: -10.0,
        };
        let sigma = 2f64.powi(20) * 2.0; // grid units: 2 in value units
        let mut rng = ChaCha20Rng::seed_from_u64(5);
        let reported = fit_shifted(
            &layout,
            &add_noise(&exact, sigma, &mut rng),
            sigma * sigma,
            e,
            &OLS,
            Some(&shift),
            &mut rng,
        )
        .unwrap()
        .std_errors;
        let draws: Vec<Vec<f64>> = (0..4000)
            .map(|_| {
                let noisy = add_noise(&exact, sigma, &mut rng);
                fit_shifted(
                    &layout,
                    &noisy,
                    sigma * sigma,
                    e,
                    &OLS,
                    Some(&shift),
                    &mut rng,
                )
                .unwrap()
                .coefficients
            })
            .collect();
        for k in 0..3 {
            let mean = draws.iter().map(|d| d[k]).sum::<f64>() / draws.len() as f64;
            let sd = (draws.iter().map(|d| (d[k] - mean).powi(2)).sum::<f64>()
                / (draws.len() - 1) as f64)
                .sqrt();
            assert!(
                (reported[k] / sd - 1.0).abs() < 0.06,
                "coefficient {k}: delta method {} vs simulated {sd}",
                reported[k]
            );
        }
    }

    // --- Layout, clip, accumulate, sensitivity ------------------------------------------

    #[test]
    fn layout_packs_the_upper_triangle_row_by_row() {
        let layout = Layout::new(2, true);
        assert_eq!(
            (layout.z_len(), layout.dim(), layout.n_params()),
            (4, 10, 3)
        );
        // Row-major packing of the 4×4 upper triangle, enumerated by hand.
        let mut expected = 0;
        for i in 0..4 {
            for j in i..4 {
                assert_eq!(layout.index(i, j), expected);
                assert_eq!(layout.index(j, i), expected);
                expected += 1;
            }
        }
        let names =
            layout.coordinate_names(&["trip_km".into(), "transfers".into()], "trip_minutes");
        assert_eq!(
            names,
            [
                "n",
                "sum:trip_km",
                "sum:transfers",
                "sum:trip_minutes",
                "xx:trip_km:trip_km",
                "xx:trip_km:transfers",
                "xy:trip_km",
                "xx:transfers:transfers",
                "xy:transfers",
                "yy"
            ]
        );
        let no_int = Layout::new(1, false);
        assert_eq!(
            no_int.coordinate_names(&["a".into()], "y"),
            ["xx:a:a", "xy:a", "yy"]
        );
    }

    #[test]
    fn clip_scales_clamps_and_neutralises_non_finite_values() {
        let (mut x, mut y) = (vec![3.0, 4.0], 10.0);
        clip(&mut x, &mut y, 1.0, 2.0);
        assert!((x[0] - 0.6).abs() < 1e-15 && (x[1] - 0.8).abs() < 1e-15);
        assert_eq!(y, 2.0);
        let (mut x, mut y) = (vec![0.3, -0.4], -0.5);
        clip(&mut x, &mut y, 1.0, 2.0);
        assert_eq!(
            (x, y),
            (vec![0.3, -0.4], -0.5),
            "inside the bounds nothing changes"
        );
        // A NaN feature must not switch the scaling off for the others.
        let (mut x, mut y) = (vec![f64::NAN, 1e300, f64::INFINITY], f64::NAN);
        clip(&mut x, &mut y, 2.0, 1.0);
        assert_eq!(x[0], 0.0);
        assert!((x[1] - 2.0).abs() < 1e-15);
        assert_eq!((x[2], y), (0.0, 0.0));
        // An invalid bound fails closed.
        let (mut x, mut y) = (vec![5.0], 5.0);
        clip(&mut x, &mut y, f64::NAN, -1.0);
        assert_eq!((x[0], y), (0.0, 0.0));
    }

    #[test]
    fn accumulate_is_exact_for_integer_data_on_the_unit_grid() {
        // Independent reference: the same sums in i128 integer arithmetic.
        let layout = Layout::new(2, true);
        let rows: Vec<(Vec<i64>, i64)> = vec![
            (vec![3, -7], 11),
            (vec![1_000_000, 5], -4),
            (vec![-2, 0], 123_456_789),
        ];
        let mut acc = vec![0i128; layout.dim()];
        for (x, y) in &rows {
            let xf: Vec<f64> = x.iter().map(|v| *v as f64).collect();
            accumulate(&layout, &xf, *y as f64, 0, &mut acc);
        }
        let mut expected = vec![0i128; layout.dim()];
        for (x, y) in &rows {
            let z: Vec<i128> = [1]
                .into_iter()
                .chain(x.iter().copied())
                .chain([*y])
                .map(i128::from)
                .collect();
            for i in 0..4 {
                for j in i..4 {
                    expected[layout.index(i, j)] += z[i] * z[j];
                }
            }
        }
        assert_eq!(acc, expected);
    }

    #[test]
    fn accumulate_rounds_the_exact_product_half_away_from_zero() {
        let layout = Layout::new(1, false);
        // Grid 2^-1: 0.5·0.5·2 = 0.5 → 1; 0.5·(−0.5)·2 = −0.5 → −1; (−0.5)²·2 = 0.5 → 1.
        let mut acc = vec![0i128; 3];
        accumulate(&layout, &[0.5], -0.5, -1, &mut acc);
        assert_eq!(acc, [1, -1, 1]);
        // The product of two doubles is m_a·m_b·2^(e_a+e_b) exactly, with m_a·m_b < 2^106 held
        // in i128. Rounding that integer to a coarser grid by hand is the reference
        // (integer arithmetic, ties away from zero).
        let decompose = |v: f64| -> (i128, i32) {
            let bits = v.to_bits();
            let exp = ((bits >> 52) & 0x7ff) as i32;
            let mant = (bits & ((1u64 << 52) - 1)) | (1u64 << 52);
            let sign = if v < 0.0 { -1 } else { 1 };
            (sign * i128::from(mant), exp - 1075)
        };
        let mut rng = ChaCha20Rng::seed_from_u64(3);
        for _ in 0..2000 {
            let a: f64 = rng.random_range(-50.0..50.0);
            let b: f64 = rng.random_range(-50.0..50.0);
            let grid_exp: i32 = rng.random_range(-100..-20);
            let (ma, ea) = decompose(a);
            let (mb, eb) = decompose(b);
            let m = ma * mb;
            let shift = grid_exp - (ea + eb); // product = m·2^(ea+eb) = m·2^-shift grid units
            let expected = if shift <= 0 {
                m << (-shift)
            } else {
                let half = 1i128 << (shift - 1);
                let mag = (m.abs() + half) >> shift;
                m.signum() * mag
            };
            let mut acc = vec![0i128; 3];
            accumulate(&layout, &[a], b, grid_exp, &mut acc);
            assert_eq!(acc[1], expected, "a = {a}, b = {b}, grid 2^{grid_exp}");
        }
    }

    #[test]
    fn sensitivity_bound_dominates_brute_force_over_the_clip_boundary() {
        // Brute force: the largest actual contribution norm over random directions and all
        // axis-aligned x on the clip boundary, with |y| = B_y. The exact maximum of the
        // unrounded norm² is ((‖z‖²)² + Σz_i⁴)/2 at axis-aligned x (privacy-math §6: equality
        // for axis-aligned vectors), with z = (1, B_x e_k, ±B_y).
        let (b_x, b_y, grid_exp) = (3.0, 2.0, -3);
        let layout = Layout::new(3, true);
        let bound = event_sensitivity_sq(&layout, b_x, b_y, grid_exp);
        let mut rng = ChaCha20Rng::seed_from_u64(5);
        let mut candidates: Vec<Vec<f64>> = (0..3)
            .flat_map(|k| {
                [1.0, -1.0].map(|s| {
                    let mut x = vec![0.0; 3];
                    x[k] = s * b_x;
                    x
                })
            })
            .collect();
        for _ in 0..20_000 {
            let g: Vec<f64> = (0..3).map(|_| StandardNormal.sample(&mut rng)).collect();
            let norm = l2_norm(&g);
            candidates.push(g.iter().map(|v| v * b_x / norm).collect());
        }
        let scale = pow2(-grid_exp);
        let (mut max_rounded, mut max_exact) = (0.0f64, 0.0f64);
        for x in &candidates {
            for y in [b_y, -b_y] {
                let (mut xc, mut yc) = (x.clone(), y);
                clip(&mut xc, &mut yc, b_x, b_y);
                let mut acc = vec![0i128; layout.dim()];
                accumulate(&layout, &xc, yc, grid_exp, &mut acc);
                max_rounded = max_rounded.max(acc.iter().map(|v| (*v as f64).powi(2)).sum());
                let z: Vec<f64> = [1.0].into_iter().chain(xc).chain([yc]).collect();
                let mut exact = 0.0;
                for i in 0..z.len() {
                    for j in i..z.len() {
                        exact += (z[i] * z[j] * scale).powi(2);
                    }
                }
                max_exact = max_exact.max(exact);
            }
        }
        let z_sq = 1.0 + b_x * b_x + b_y * b_y;
        let analytic = (z_sq * z_sq + 1.0 + b_x.powi(4) + b_y.powi(4)) / 2.0 * scale * scale;
        assert!(
            (max_exact - analytic).abs() <= 1e-12 * analytic,
            "{max_exact} vs {analytic}"
        );
        assert!(max_rounded <= bound, "{max_rounded} > {bound}");
        // (‖z‖⁴ + Σz⁴)/2 ≥ ‖z‖⁴/2, so the bound is within a factor ~2 of the true maximum.
        assert!(
            bound <= 2.2 * max_rounded,
            "bound {bound} vs brute force {max_rounded}"
        );
        // The formula itself (doc comment): ‖z‖² = 14, dim = 15.
        let expected = ((14.0 * 8.0 + 15f64.sqrt() / 2.0) * ROUNDING_MARGIN).powi(2);
        assert_eq!(bound, expected);
    }

    /// Values around every boundary of the fast integer helpers: zero signs, halves, the
    /// last non-integers below 2^52, 2^52 and 2^63 themselves, infinities and NaN.
    fn rounding_edges() -> Vec<f64> {
        let mut v = vec![
            0.0,
            -0.0,
            0.5,
            -0.5,
            1.5,
            -1.5,
            2.5,
            -2.5,
            0.499_999_999_999_999_94,
            -0.499_999_999_999_999_94,
            f64::MIN_POSITIVE,
            f64::MAX,
            f64::MIN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
        ];
        for p in [52, 53, 63, 64, 127, 128] {
            let b = 2f64.powi(p);
            for x in [b, b.next_down(), b.next_up(), b - 0.5, b + 0.5] {
                v.push(x);
                v.push(-x);
            }
        }
        v
    }

    /// The helpers against the standard library (the reference): `f64::trunc`,
    /// `f64::round` (half away from zero, IEEE 754 roundTiesToAway) and the saturating
    /// `as i128` cast. Zeros may differ in sign only.
    fn assert_rounding_agrees(v: f64) {
        let same = |a: f64, b: f64| a == b || (a.is_nan() && b.is_nan());
        assert!(same(trunc_int(v), v.trunc()), "trunc_int({v:e})");
        assert!(same(round_int(v), v.round()), "round_int({v:e})");
        assert_eq!(f64_to_i128(v), v as i128, "f64_to_i128({v:e})");
    }

    #[test]
    fn fast_rounding_helpers_match_the_standard_library_at_the_edges() {
        for v in rounding_edges() {
            assert_rounding_agrees(v);
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(512))]

        /// Random doubles of every magnitude and random halves: same as the standard library.
        #[test]
        fn fast_rounding_helpers_match_the_standard_library(
            v in prop_oneof![any::<f64>(), -1e6..1e6f64, (-1_000_000i64..1_000_000).prop_map(|k| k as f64 + 0.5)],
        ) {
            assert_rounding_agrees(v);
        }

        /// The integer path of the moments against the definition, in big-integer
        /// arithmetic: a finite double is ±m·2^e with m its 53-bit significand (IEEE 754
        /// binary64), so a·b·2^-g = ±m_a·m_b·2^-(g − e_a − e_b) exactly, and rounding half
        /// away from zero is ⌊(2|N| + 2^s)/2^(s+1)⌋ for N = m_a·m_b, s = g − e_a − e_b > 0.
        /// The path must give that integer whenever it is below 2^52 and decline otherwise.
        /// Dyadic inputs hit exact ties; subnormals and wide grids hit the shift limits.
        #[test]
        fn integer_product_rounding_matches_big_integer_arithmetic(
            a in prop_oneof![any::<f64>(), -4.0..4.0f64, (-4096i64..4096, 0i32..30).prop_map(|(k, j)| k as f64 * pow2(-j)), -1e-310..1e-310f64],
            b in prop_oneof![any::<f64>(), -4.0..4.0f64, (-4096i64..4096, 0i32..30).prop_map(|(k, j)| k as f64 * pow2(-j)), -1e-310..1e-310f64],
            grid_exp in prop_oneof![-60i32..60, -900i32..900, -2200i32..-1000],
        ) {
            use num_bigint::BigInt;
            use num_traits::{Signed, ToPrimitive};
            let parts = |v: f64| {
                let bits = v.to_bits();
                let biased = ((bits >> 52) & 0x7ff) as i32;
                let frac = bits & ((1u64 << 52) - 1);
                if biased == 0 { (frac, -1074) } else { (frac | 1u64 << 52, biased - 1075) }
            };
            let (pa, pb) = (exact_parts(a), exact_parts(b));
            prop_assume!(pa.is_some() && pb.is_some());
            let ((ma, ea), (mb, eb)) = (parts(a), parts(b));
            let n = BigInt::from(ma) * BigInt::from(mb);
            let s = grid_exp - ea - eb;
            let magnitude = if s <= 0 {
                n << (-s) as usize
            } else {
                (n * 2 + (BigInt::from(1) << s as usize)) >> (s + 1) as usize
            };
            let negative = (a < 0.0) != (b < 0.0);
            let want = magnitude
                .abs()
                .to_i64()
                .filter(|m| *m < 1 << 52)
                .map(|m| if negative { -m } else { m });
            prop_assert_eq!(
                product_units_int(pa.unwrap(), pb.unwrap(), grid_exp),
                want,
                "a = {:e}, b = {:e}, grid 2^{}", a, b, grid_exp
            );
        }

        /// The i64 fast path of the product rounding gives exactly the general path's
        /// integer whenever it applies (and applies to every product below 2^52 grid units).
        /// Dyadic inputs land exactly on half-integers, the tie case.
        #[test]
        fn small_product_rounding_matches_the_general_path(
            a in prop_oneof![any::<f64>(), -4.0..4.0f64, (-4096i64..4096, 0i32..30).prop_map(|(k, j)| k as f64 * pow2(-j))],
            b in prop_oneof![any::<f64>(), -4.0..4.0f64, (-4096i64..4096, 0i32..30).prop_map(|(k, j)| k as f64 * pow2(-j))],
            grid_exp in prop_oneof![-60i32..60, -900i32..900],
        ) {
            let scale = pow2(-grid_exp);
            let general = product_units(a, b, scale);
            let split_exact = [a, b]
                .iter()
                .all(|v| *v == 0.0 || (SPLIT_MIN..=SPLIT_MAX).contains(&v.abs()));
            if split_exact {
                let p = a * b;
                prop_assert_eq!(two_product_err(a, b, p), a.mul_add(b, -p));
                prop_assert_eq!(
                    product_units_small(a, b, scale, true),
                    product_units_small(a, b, scale, false)
                );
            }
            match product_units_small(a, b, scale, false) {
                Some(small) => prop_assert_eq!(i128::from(small), general),
                None => {
                    let big = a * b * scale;
                    prop_assert!(big.is_nan() || big.abs() >= TWO_POW_52);
                }
            }
        }

        /// The shortcut in `clip` only ever answers "inside" when the careful norm agrees,
        /// including vectors right at the bound.
        #[test]
        fn norm_shortcut_never_contradicts_the_careful_norm(
            raw in prop::collection::vec(prop_oneof![any::<f64>(), -40.0..40.0f64, -1e-300..1e-300f64], 1..6),
            b in prop_oneof![1e-3f64..1e3, any::<f64>()],
            at_bound in any::<bool>(),
        ) {
            let x: Vec<f64> = raw.iter().map(|v| if v.is_finite() { *v } else { 0.0 }).collect();
            let b = if at_bound && l2_norm(&x) > 0.0 {
                // A bound equal to the vector's own norm: the shortcut must not claim room.
                l2_norm(&x)
            } else {
                b
            };
            if surely_within_norm(&x, b) {
                prop_assert!(l2_norm(&x) <= b, "‖x‖ = {} > {}", l2_norm(&x), b);
                prop_assert!(!at_bound || l2_norm(&x) < b);
            }
        }

        /// Whatever the input, a clipped event's contribution stays within the sensitivity.
        #[test]
        fn clipped_contribution_stays_within_the_sensitivity(
            d in 1usize..5,
            intercept in any::<bool>(),
            raw in prop::collection::vec(-1e8f64..1e8, 5),
            y in -1e8f64..1e8,
            b_x in 1e-3f64..1e3,
            b_y in 1e-3f64..1e3,
            grid_exp in -60i32..20,
        ) {
            let layout = Layout::new(d, intercept);
            let (mut x, mut y) = (raw[..d].to_vec(), y);
            clip(&mut x, &mut y, b_x, b_y);
            let mut acc = vec![0i128; layout.dim()];
            accumulate(&layout, &x, y, grid_exp, &mut acc);
            let norm_sq: f64 = acc.iter().map(|v| (*v as f64).powi(2)).sum();
            prop_assert!(norm_sq <= event_sensitivity_sq(&layout, b_x, b_y, grid_exp));
        }
    }

    #[test]
    fn default_grid_leaves_forty_bits_below_the_largest_contribution() {
        let layout = Layout::new(2, true);
        // ‖z‖²_max = 1 + 1600 + 32400 = 34001, floor(log2) = 15.
        let e = default_grid_exp(&layout, 40.0, 180.0);
        assert_eq!(e, 15 - 40);
        let per_event = max_z_norm_sq(&layout, 40.0, 180.0) * pow2(-e);
        assert!(per_event < pow2(41) && per_event >= pow2(40));
    }

    // --- Noise model: spectral bound, covariance, quantile --------------------------------

    #[test]
    fn noise_norm_bound_covers_the_simulated_quantiles() {
        // privacy-math.md §6 table, q99.9 of ‖E‖₂ at σ = 1 [C] (symnoise.py, 20 000 draws).
        for (p, q999) in [
            (2, 4.238),
            (5, 6.147),
            (10, 8.121),
            (20, 10.597),
            (50, 15.737),
        ] {
            assert!(noise_norm_bound(p, 1.0, 1e-3) > q999, "p = {p}");
        }
        // A seeded simulation of our own: the fraction of draws above the β = 0.05 bound must
        // be at most β plus 3 binomial standard deviations (it is 0 in practice: the bound is
        // conservative).
        let (p, draws, beta) = (4, 4000, 0.05);
        let bound = noise_norm_bound(p, 1.0, beta);
        let mut rng = ChaCha20Rng::seed_from_u64(9);
        let mut above = 0;
        for _ in 0..draws {
            let mut e = DMatrix::zeros(p, p);
            for i in 0..p {
                for j in i..p {
                    let v: f64 = StandardNormal.sample(&mut rng);
                    e[(i, j)] = v;
                    e[(j, i)] = v;
                }
            }
            let norm = SymmetricEigen::new(e).eigenvalues.amax();
            above += usize::from(norm > bound);
        }
        let limit = beta + 3.0 * (beta * (1.0 - beta) / draws as f64).sqrt();
        assert!((above as f64 / draws as f64) <= limit);
    }

    #[test]
    fn noise_covariance_matches_the_linear_map_coordinate_by_coordinate() {
        // Brute force: push a unit noise on each packed coordinate through
        // w = e_b − E_A θ and sum w wᵀ (σ = 1).
        for (layout, theta) in [
            (Layout::new(2, true), vec![0.7, -1.3, 2.1]),
            (Layout::new(3, false), vec![-0.4, 1.1, 0.25]),
        ] {
            let (z_len, p) = (layout.z_len(), layout.n_params());
            let y = layout.target_pos();
            let mut cov = DMatrix::<f64>::zeros(p, p);
            for k in 0..layout.dim() {
                let mut f = DMatrix::<f64>::zeros(z_len, z_len);
                for i in 0..z_len {
                    for j in i..z_len {
                        if layout.index(i, j) == k {
                            f[(i, j)] = 1.0;
                            f[(j, i)] = 1.0;
                        }
                    }
                }
                let w = DVector::from_fn(p, |i, _| {
                    f[(i, y)] - (0..p).map(|j| f[(i, j)] * theta[j]).sum::<f64>()
                });
                cov += &w * w.transpose();
            }
            let formula = normal_equation_noise_cov(&theta);
            assert!((cov - formula).amax() < 1e-12);
        }
    }

    #[test]
    fn quantile_constant_matches_statrs() {
        let normal = Normal::new(0.0, 1.0).unwrap();
        assert!((normal.inverse_cdf(0.999) - Z_0999).abs() < 1e-9);
    }

    // --- Fit: refusals, repair, reference solutions --------------------------------------

    #[test]
    fn identical_feature_columns_are_ill_conditioned() {
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let rows: Vec<Row> = simulated_rows(21, 50, 1)
            .into_iter()
            .map(|(x, y)| (vec![x[0], x[0]], y))
            .collect();
        let layout = Layout::new(2, true);
        let e = default_grid_exp(&layout, 10.0, 50.0);
        let values = exact_values(&layout, &rows, e);
        match fit(&layout, &values, 0.0, e, &OLS, &mut rng) {
            Err(FitError::IllConditioned { condition_number }) => {
                assert!(condition_number > MAX_CONDITION)
            }
            other => panic!("expected IllConditioned, got {other:?}"),
        }
        // A constant feature is collinear with the intercept: singular after centring.
        let constant: Vec<Row> = rows.iter().map(|(x, y)| (vec![x[0], 2.5], *y)).collect();
        let values = exact_values(&layout, &constant, e);
        assert!(matches!(
            fit(&layout, &values, 0.0, e, &OLS, &mut rng),
            Err(FitError::IllConditioned { .. })
        ));
        // A ridge penalty makes the identical-column problem well-posed (Hoerl & Kennard,
        // Technometrics 12, 1970): each column then gets half the single-column slope.
        let values = exact_values(&layout, &rows, e);
        let ridge = fit(
            &layout,
            &values,
            0.0,
            e,
            &FitMethod::Ridge { lambda: 1e-6 },
            &mut rng,
        )
        .unwrap();
        assert!((ridge.coefficients[1] - ridge.coefficients[2]).abs() < 1e-9);
    }

    #[test]
    fn too_few_rows_is_refused_with_and_without_noise() {
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let layout = Layout::new(2, true);
        let e = -20;
        let two_rows = exact_values(&layout, &simulated_rows(2, 2, 2), e);
        assert_eq!(
            fit(&layout, &two_rows, 0.0, e, &OLS, &mut rng),
            Err(FitError::TooFewRows {
                n_hat: 2.0,
                needed: 3.0
            })
        );
        // Eight rows but noise σ_v = 2 on the count: 8 < 3 + 3.09·2.
        let eight = exact_values(&layout, &simulated_rows(2, 8, 2), e);
        let noise_var = (2.0 * pow2(-e)).powi(2);
        assert!(matches!(
            fit(&layout, &eight, noise_var, e, &OLS, &mut rng),
            Err(FitError::TooFewRows { .. })
        ));
    }

    #[test]
    fn invalid_inputs_are_refused() {
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let layout = Layout::new(1, true);
        let good = vec![Dd::from_f64(10.0); layout.dim()];
        assert_eq!(
            fit(&layout, &good[..5], 0.0, 0, &OLS, &mut rng),
            Err(FitError::WrongLength {
                expected: 6,
                found: 5
            })
        );
        let mut bad = good.clone();
        bad[4] = Dd::from_f64(f64::NAN);
        assert_eq!(
            fit(&layout, &bad, 0.0, 0, &OLS, &mut rng),
            Err(FitError::NonFinite { index: 4 })
        );
        for (noise_var, method) in [
            (-1.0, OLS),
            (f64::NAN, OLS),
            (0.0, FitMethod::Ridge { lambda: -1.0 }),
            (0.0, FitMethod::L1 { radius: 0.0 }),
            (
                0.0,
                FitMethod::L1 {
                    radius: f64::INFINITY,
                },
            ),
        ] {
            assert!(matches!(
                fit(&layout, &good, noise_var, 0, &method, &mut rng),
                Err(FitError::InvalidParameter { .. })
            ));
        }
    }

    #[test]
    fn ridge_matches_the_closed_form_from_two_pass_centring() {
        // Ridge with an unpenalised intercept (Hoerl & Kennard 1970; Hastie, Tibshirani &
        // Friedman, ESL 2nd ed., eq. 3.44 on centred data): β = (Q + λI)⁻¹ q and
        // θ₀ = ȳ − x̄ᵀβ. The reference solves it independently in f64 by LU. Both sides are
        // backward stable, so they agree to a few κ·2^-53; 1e3·κ·2^-53 is the tolerance.
        // The finest grid makes the statistics exact, so only the solvers are compared. On the
        // default grid, each entry carries up to 2^(e−1) of rounding per event.
        let rows = simulated_rows(31, 300, 3);
        let layout = Layout::new(3, true);
        let e = finest_grid(&layout, &rows);
        let values = exact_values(&layout, &rows, e);
        let (q_mat, q, mean_x, mean_y) = centred_reference(&rows);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        for lambda in [0.0, 5.0, 500.0] {
            let reg = &q_mat + DMatrix::identity(3, 3) * lambda;
            let beta = reg.clone().lu().solve(&q).unwrap();
            let intercept = mean_y - beta.dot(&DVector::from_column_slice(&mean_x));
            let fit = fit(
                &layout,
                &values,
                0.0,
                e,
                &FitMethod::Ridge { lambda },
                &mut rng,
            )
            .unwrap();
            let eig = SymmetricEigen::new(reg).eigenvalues;
            let kappa = eig.max() / eig.min();
            let tol = 1e3 * kappa * f64::EPSILON / 2.0;
            let expected: Vec<f64> = [intercept]
                .into_iter()
                .chain(beta.iter().copied())
                .collect();
            for (got, want) in fit.coefficients.iter().zip(&expected) {
                assert!(
                    ((got - want) / want).abs() <= tol,
                    "λ = {lambda}: {got} vs {want}"
                );
            }
            assert_eq!(fit.n_hat, Some(300.0));
            assert!(fit.repair.is_none() && fit.duality_gap.is_none());
        }
    }

    #[test]
    fn intercept_only_model_is_the_mean() {
        let rows = simulated_rows(41, 64, 1);
        let rows: Vec<Row> = rows.into_iter().map(|(_, y)| (Vec::new(), y)).collect();
        let layout = Layout::new(0, true);
        let values = exact_values(&layout, &rows, -60);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let fit = fit(&layout, &values, 0.0, -60, &OLS, &mut rng).unwrap();
        let mean = rows.iter().map(|r| r.1).sum::<f64>() / 64.0;
        assert!((fit.coefficients[0] - mean).abs() <= 1e-15 * mean.abs());
    }

    #[test]
    fn eigenvalue_floor_raises_only_the_eigenvalues_below_the_noise_bound() {
        // Â = V diag(−5, 3, 1000) Vᵀ with a random orthogonal V, σ_v = 1. The floor τ must
        // replace −5 and 3 and keep 1000 with its eigenvector (privacy-math §6 option 1).
        let mut rng = ChaCha20Rng::seed_from_u64(13);
        let g = DMatrix::<f64>::from_fn(3, 3, |_, _| StandardNormal.sample(&mut rng));
        let v = g.qr().q();
        let a: DMatrix<f64> = &v
            * DMatrix::from_diagonal(&DVector::from_vec(vec![-5.0, 3.0, 1000.0]))
            * v.transpose();
        let mut eq = NormalEquations {
            intercept: true,
            p: 3,
            a: a.iter().map(|x| Dd::from_f64(*x)).collect(), // a is symmetric: order irrelevant
            b: vec![Dd::ZERO; 3],
        };
        let tau = noise_norm_bound(3, 1.0, FLOOR_FAILURE_PROB);
        let note = repair_by_floor(&mut eq, 1.0).expect("an indefinite matrix must be repaired");
        assert!(note.contains("2 of 3"), "{note}");
        let repaired = DMatrix::from_fn(3, 3, |i, j| eq.a(i, j).to_f64());
        let mut eig: Vec<f64> = SymmetricEigen::new(repaired.clone())
            .eigenvalues
            .iter()
            .copied()
            .collect();
        eig.sort_by(f64::total_cmp);
        for (got, want) in eig.iter().zip([tau, tau, 1000.0]) {
            assert!((got - want).abs() < 1e-10 * 1000.0, "{eig:?}");
        }
        let top = v.column(2).into_owned();
        assert!((&repaired * &top - &top * 1000.0).amax() < 1e-9);
        // A matrix well above the floor is left alone.
        let mut safe = NormalEquations {
            intercept: true,
            p: 3,
            a: (&v
                * DMatrix::from_diagonal(&DVector::from_vec(vec![50.0, 80.0, 1000.0]))
                * v.transpose())
            .iter()
            .map(|x| Dd::from_f64(*x))
            .collect(),
            b: vec![Dd::ZERO; 3],
        };
        assert!(repair_by_floor(&mut safe, 1.0).is_none());
    }

    #[test]
    fn noisy_identical_columns_are_repaired_not_fitted_silently() {
        let rows: Vec<Row> = simulated_rows(23, 400, 1)
            .into_iter()
            .map(|(x, y)| (vec![x[0], x[0]], y))
            .collect();
        let layout = Layout::new(2, true);
        let e = default_grid_exp(&layout, 10.0, 50.0);
        let exact = exact_values(&layout, &rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(17);
        let sigma = pow2(-e); // σ_v = 1 value unit
        let noisy = add_noise(&exact, sigma, &mut rng);
        let fit = fit(&layout, &noisy, sigma * sigma, e, &OLS, &mut rng).unwrap();
        assert!(
            fit.repair
                .as_deref()
                .unwrap_or("")
                .contains("eigenvalue floor"),
            "{fit:?}"
        );
        // The floor shrinks only the twins' difference; their sum is the single-column slope.
        // Its noise std is about σ_v·√(1 + ‖θ‖²)·√2 / (2·Σ(x − x̄)²) ≈ 1.9·1.4/(2·530) ≈ 0.0025
        // (delta method along (1, 1)/√2), so 0.02 is 8 standard deviations.
        let single = Layout::new(1, true);
        let single_rows: Vec<Row> = rows.iter().map(|(x, y)| (vec![x[0]], *y)).collect();
        let slope = fit_exact(&single, &single_rows).coefficients[1];
        let total = fit.coefficients[1] + fit.coefficients[2];
        assert!((total - slope).abs() < 0.02, "{total} vs {slope}");
        assert!(fit.std_errors.iter().all(|s| s.is_finite() && *s > 0.0));
    }

    /// Shared body of the delta-method coverage tests.
    ///
    /// Set-up: exact statistics of a seeded data set (n = 400, d = 2). Each replicate adds
    /// N(0, σ²) to every packed coordinate, refits by least squares, and checks whether
    /// θ̂ ± 2·std_error contains the noiseless fit. The nominal coverage is 2Φ(2) − 1 (statrs).
    /// The tolerance is 3 binomial standard deviations at `replicates` draws.
    ///
    /// The linearisation holds because σ_v = 1 puts the 99.9% noise spectral bound below 5%
    /// of λ_min(A), asserted below. The neglected second-order terms are then below 5% of the
    /// first-order ones. Their effect on the coverage of a 2σ interval is about
    /// 2φ(2)·2·(0.05)² ≈ 3e-4, far inside the tolerance.
    fn delta_method_coverage(replicates: usize, seed: u64) {
        let rows = simulated_rows(seed, 400, 2);
        let layout = Layout::new(2, true);
        let e = default_grid_exp(&layout, 10.0, 50.0);
        let exact = exact_values(&layout, &rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(seed + 1);
        let truth = fit(&layout, &exact, 0.0, e, &OLS, &mut rng)
            .unwrap()
            .coefficients;
        let sigma_v = 1.0;
        let eq = NormalEquations::from_packed(&layout, &exact, e);
        let a = DMatrix::from_fn(3, 3, |i, j| eq.a(i, j).to_f64());
        let lambda_min = SymmetricEigen::new(a).eigenvalues.min();
        assert!(noise_norm_bound(3, sigma_v, 1e-3) < 0.05 * lambda_min);
        let sigma = sigma_v * pow2(-e);
        let mut covered = [0usize; 3];
        for _ in 0..replicates {
            let noisy = add_noise(&exact, sigma, &mut rng);
            let fit = fit(&layout, &noisy, sigma * sigma, e, &OLS, &mut rng).unwrap();
            assert!(fit.repair.is_none());
            for k in 0..3 {
                covered[k] +=
                    usize::from((fit.coefficients[k] - truth[k]).abs() <= 2.0 * fit.std_errors[k]);
            }
        }
        let normal = Normal::new(0.0, 1.0).unwrap();
        let nominal = 2.0 * normal.cdf(2.0) - 1.0;
        let tol = 3.0 * (nominal * (1.0 - nominal) / replicates as f64).sqrt();
        for (k, c) in covered.iter().enumerate() {
            let rate = *c as f64 / replicates as f64;
            println!("coefficient {k}: coverage {rate:.4} (nominal {nominal:.4} ± {tol:.4})");
            assert!(
                (rate - nominal).abs() <= tol,
                "coefficient {k}: {rate} vs {nominal} ± {tol}"
            );
        }
    }

    #[test]
    fn delta_method_std_errors_have_nominal_coverage() {
        delta_method_coverage(2000, 51);
    }

    /// The same with 20 000 replicates (tolerance ±0.0044).
    /// Run: `cargo test --release -- --ignored delta_method_coverage_large`.
    #[test]
    #[ignore]
    fn delta_method_coverage_large() {
        delta_method_coverage(20_000, 61);
    }

    // --- Frank–Wolfe ℓ1 fit -----------------------------------------------------------------

    #[test]
    fn frank_wolfe_with_a_large_radius_converges_to_least_squares() {
        // With r above ‖β_OLS‖₁ the constraint is inactive, so the optimum is OLS and
        // g(β) − g* = ‖β − β*‖²_Q. Jaggi (ICML 2013, Thm 1) bounds g(β_K) − g* by 2C_f/(K+2)
        // with C_f ≤ 2λ_max(Q)(2r)² (module doc of `frank_wolfe`). Convexity bounds it by the
        // reported duality gap.
        let rows = simulated_rows(71, 300, 3);
        let layout = Layout::new(3, true);
        let e = finest_grid(&layout, &rows);
        let values = exact_values(&layout, &rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let ols = fit(&layout, &values, 0.0, e, &OLS, &mut rng)
            .unwrap()
            .coefficients;
        let radius = 2.0 * ols[1..].iter().map(|b| b.abs()).sum::<f64>();
        let l1 = fit(
            &layout,
            &values,
            0.0,
            e,
            &FitMethod::L1 { radius },
            &mut rng,
        )
        .unwrap();
        let (q_mat, q, mean_x, mean_y) = centred_reference(&rows);
        let excess =
            objective(&q_mat, &q, &l1.coefficients[1..]) - objective(&q_mat, &q, &ols[1..]);
        let scale = objective(&q_mat, &q, &ols[1..]).abs();
        let gap = l1.duality_gap.unwrap();
        let eig = SymmetricEigen::new(q_mat.clone()).eigenvalues;
        let jaggi = 2.0 * (2.0 * eig.max() * (2.0 * radius).powi(2)) / (FW_ITERATIONS as f64 + 2.0);
        assert!(excess >= -1e-12 * scale, "{excess}");
        assert!(excess <= gap + 1e-12 * scale, "{excess} > gap {gap}");
        assert!(excess <= jaggi, "{excess} > Jaggi bound {jaggi}");
        // ‖β − β*‖₂ ≤ √(excess/λ_min): report how close it got, and check the intercept
        // relation θ₀ = ȳ − x̄ᵀβ.
        let dist = (excess.max(0.0) / eig.min()).sqrt();
        let beta_norm = ols[1..].iter().map(|b| b * b).sum::<f64>().sqrt();
        println!(
            "Frank–Wolfe vs OLS: relative distance ≤ {:.2e}, gap {gap:.2e}",
            dist / beta_norm
        );
        for k in 0..3 {
            assert!((l1.coefficients[k + 1] - ols[k + 1]).abs() <= dist + 1e-12);
        }
        let intercept = mean_y
            - (0..3)
                .map(|k| mean_x[k] * l1.coefficients[k + 1])
                .sum::<f64>();
        assert!((l1.coefficients[0] - intercept).abs() < 1e-9);
    }

    /// The exact minimiser of g over ‖β‖₁ ≤ r when the constraint is active, by enumeration.
    /// For each support S and sign pattern s it minimises g over sᵀβ_S = r, using the KKT
    /// system [2Q_SS s; sᵀ 0][β; μ] = [2q_S; r]. It keeps the sign-consistent solutions with
    /// μ ≥ 0 and returns the best. The optimum on the ball lies on exactly one such face.
    fn brute_force_l1(q_mat: &DMatrix<f64>, q: &DVector<f64>, r: f64) -> Vec<f64> {
        let d = q.len();
        let mut best: Option<(f64, Vec<f64>)> = None;
        for support in 1u32..(1 << d) {
            let idx: Vec<usize> = (0..d).filter(|k| support >> k & 1 == 1).collect();
            let m = idx.len();
            for signs in 0u32..(1 << m) {
                let s: Vec<f64> = (0..m)
                    .map(|k| if signs >> k & 1 == 1 { -1.0 } else { 1.0 })
                    .collect();
                let mut kkt = DMatrix::zeros(m + 1, m + 1);
                let mut rhs = DVector::zeros(m + 1);
                for a in 0..m {
                    for b in 0..m {
                        kkt[(a, b)] = 2.0 * q_mat[(idx[a], idx[b])];
                    }
                    kkt[(a, m)] = s[a];
                    kkt[(m, a)] = s[a];
                    rhs[a] = 2.0 * q[idx[a]];
                }
                rhs[m] = r;
                let Some(sol) = kkt.lu().solve(&rhs) else {
                    continue;
                };
                if (0..m).any(|a| sol[a] * s[a] < 0.0) || sol[m] < 0.0 {
                    continue;
                }
                let mut beta = vec![0.0; d];
                for a in 0..m {
                    beta[idx[a]] = sol[a];
                }
                let g = objective(q_mat, q, &beta);
                if best.as_ref().is_none_or(|(bg, _)| g < *bg) {
                    best = Some((g, beta));
                }
            }
        }
        best.map(|(_, b)| b).unwrap_or_else(|| vec![0.0; d])
    }

    #[test]
    fn frank_wolfe_with_a_small_radius_solves_the_constrained_problem() {
        let rows = simulated_rows(73, 300, 3);
        let layout = Layout::new(3, true);
        let e = finest_grid(&layout, &rows);
        let values = exact_values(&layout, &rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        let ols = fit(&layout, &values, 0.0, e, &OLS, &mut rng)
            .unwrap()
            .coefficients;
        let radius = 0.3 * ols[1..].iter().map(|b| b.abs()).sum::<f64>();
        let l1 = fit(
            &layout,
            &values,
            0.0,
            e,
            &FitMethod::L1 { radius },
            &mut rng,
        )
        .unwrap();
        let beta = &l1.coefficients[1..];
        let (q_mat, q, _, _) = centred_reference(&rows);
        let exact = brute_force_l1(&q_mat, &q, radius);
        let gap = l1.duality_gap.unwrap();
        let scale = objective(&q_mat, &q, &exact).abs();
        let excess = objective(&q_mat, &q, beta) - objective(&q_mat, &q, &exact);
        // Feasible, and within the certified gap of the optimum.
        let l1_norm: f64 = beta.iter().map(|b| b.abs()).sum();
        assert!(l1_norm <= radius * (1.0 + 1e-12));
        assert!(
            excess >= -1e-12 * scale && excess <= gap + 1e-12 * scale,
            "{excess} vs gap {gap}"
        );
        // First-order optimality of β* gives ‖β − β*‖²_Q ≤ g(β) − g* ≤ gap. Hence
        // ‖β − β*‖₁ ≤ √(d·gap/λ_min), and β lies on the ball up to that distance.
        let diff = DVector::from_iterator(3, beta.iter().zip(&exact).map(|(a, b)| a - b));
        let q_dist = (diff.transpose() * &q_mat * &diff)[(0, 0)];
        assert!(q_dist <= gap + 1e-12 * scale);
        let lambda_min = SymmetricEigen::new(q_mat.clone()).eigenvalues.min();
        let l1_dist = (3.0 * gap / lambda_min).sqrt();
        assert!(
            l1_norm >= radius - l1_dist - 1e-12,
            "‖β‖₁ = {l1_norm}, r = {radius}"
        );
        // KKT at the brute-force optimum: the gradient is −μ·sign(β_j) on the support and
        // at most μ in magnitude elsewhere (μ = ‖∇‖_∞).
        let grad: Vec<f64> = (0..3)
            .map(|j| 2.0 * ((0..3).map(|k| q_mat[(j, k)] * exact[k]).sum::<f64>() - q[j]))
            .collect();
        let mu = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
        for j in 0..3 {
            if exact[j] != 0.0 {
                assert!((grad[j] + mu * exact[j].signum()).abs() <= 1e-8 * mu);
            }
        }
        println!("Frank–Wolfe small radius: gap {gap:.3e}, ‖β − β*‖₁ ≤ {l1_dist:.3e}");
    }

    #[test]
    fn l1_bootstrap_std_errors_match_the_monte_carlo_spread() {
        // The bootstrap std of each coefficient is compared with the std of ℓ1 fits over 400
        // fresh noisy releases. Relative standard errors: 1/√(2·200) = 5% for the bootstrap
        // and 1/√(2·400) = 3.5% for the Monte Carlo reference (normal-theory std of a sample
        // std). Their ratio has a relative std of about 6.1%, and the test allows 4 of them,
        // that is 25%.
        let rows = simulated_rows(81, 400, 2);
        let layout = Layout::new(2, true);
        let e = default_grid_exp(&layout, 10.0, 50.0);
        let exact = exact_values(&layout, &rows, e);
        let mut rng = ChaCha20Rng::seed_from_u64(83);
        let ols = fit(&layout, &exact, 0.0, e, &OLS, &mut rng)
            .unwrap()
            .coefficients;
        let method = FitMethod::L1 {
            radius: 0.6 * (ols[1].abs() + ols[2].abs()),
        };
        let sigma = 2.0 * pow2(-e);
        let noisy = add_noise(&exact, sigma, &mut rng);
        let boot = fit(&layout, &noisy, sigma * sigma, e, &method, &mut rng).unwrap();
        let draws = 400;
        let mut sum = [0.0; 3];
        let mut sum_sq = [0.0; 3];
        for _ in 0..draws {
            let noisy = add_noise(&exact, sigma, &mut rng);
            let est = estimate(&layout, &noisy, sigma * sigma, e, &method).unwrap();
            for k in 0..3 {
                sum[k] += est.coefficients[k];
                sum_sq[k] += est.coefficients[k].powi(2);
            }
        }
        for k in 0..3 {
            let m = draws as f64;
            let mean = sum[k] / m;
            let sd = ((sum_sq[k] - m * mean * mean) / (m - 1.0)).sqrt();
            let ratio = boot.std_errors[k] / sd;
            println!(
                "coefficient {k}: bootstrap {:.4e}, Monte Carlo {sd:.4e}",
                boot.std_errors[k]
            );
            assert!(
                (ratio - 1.0).abs() <= 0.25,
                "coefficient {k}: ratio {ratio}"
            );
        }
    }
}
