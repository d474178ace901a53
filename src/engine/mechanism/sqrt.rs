//! The square-root factorization mechanism for prefix sums.
//!
//! Sources: Henzinger, Upadhyay & Upadhyay, SODA 2023; Fichtenberger, Henzinger & Upadhyay,
//! "Constant Matters", ICML 2023; privacy-math.md §5. The prefix-sum matrix M (lower
//! triangular all-ones) factors as M = L·R with L = R = Toeplitz(c), c_0 = 1,
//! c_k = (1 − 1/(2k))·c_{k−1} = binom(2k, k)/4^k, because Σ c_k x^k = (1 − x)^{−1/2} and its
//! square is (1 − x)^{−1} = Σ x^k.
//!
//! Release: leaf j publishes y_j = round((R̂x)_j) + z_j on the integer grid, where R̂ is R with
//! every c_k truncated (rounded down) to a multiple of 2^−120 and (R̂x)_j is computed *exactly*
//! in 320-bit integer arithmetic. Exactness matters for privacy: with R̂ ≥ 0 and R̂ ≤ R
//! entrywise, a changed leaf moves R̂x by at most what it moves Rx, and exact rounding moves
//! each coordinate by at most one more grid unit, which is exactly what
//! [`super::sensitivity_sq`] charges. Floating-point evaluation would break that bound near
//! rounding ties. The mechanism keeps the epoch's exact leaves (O(T·D) integers) to form R̂x
//! and all released y_j (another O(T·D)), and a push costs O(t·D); an epoch costs O(T²·D).
//!
//! Estimation: the prefix sum at b is Σ_{j≤b} c_{b−j}·y_j = s_b + (rounding) + (L z)_b, and a
//! range [a, b] is prefix(b) − prefix(a − 1) evaluated as one weighted sum with weights
//! w_j = c_{b−j} − c_{a−1−j} (second term only for j < a), so that large prefixes never cancel.
//! The weights are the integers ĉ·2^120 and the sum is exact, rounded once to double-double.
//! Its noise variance is node_var·Σ_j w_j² = node_var·‖L_b − L_{a−1}‖², independent of the data
//! and of how many leaves have been pushed. Rounding adds a deterministic error of at most
//! ½·Σ_j |w_j| grid units (about √T), which is why the stats grid must be fine.

use super::{ContinualMechanism, Estimate, LeafRange, NodeAddr, NodeNoise, assert_in_pushed};
use crate::engine::dd::Dd;

/// Fixed-point precision of the truncated coefficients ĉ_k (multiples of 2^−120). ĉ_0 = 2^120
/// must fit a u128, and 120 bits keeps ĉ within 2^−88 of c for any k < 2^32, below the
/// double-double precision used for estimates.
pub(super) const FRACTION_BITS: u32 = 120;

/// The coefficients c_0..c_{n−1} in the two forms the mechanism needs.
#[derive(Clone, Debug)]
pub(super) struct Coefficients {
    /// ĉ_k·2^120 as integers, with 0 ≤ ĉ_k ≤ c_k (used to release R̂x and to weight
    /// estimates, both exactly).
    pub(super) fixed: Vec<u128>,
    /// c_k in f64 from the same recurrence, used for variances (see [`float_coefficients`]).
    pub(super) float: Vec<f64>,
}

/// Truncated coefficients ĉ_0..ĉ_{n−1}.
///
/// ĉ_0 = 2^120 and ĉ_k = ⌊ĉ_{k−1}·(2k−1)/(2k)⌋ in integer arithmetic. By induction
/// ĉ_k ≤ c_k·2^120 (the floor of something ≤ the exact recurrence) and
/// c_k·2^120 − ĉ_k ≤ k (each step shrinks the inherited gap and adds < 1).
pub(super) fn coefficients(n: u32) -> Coefficients {
    let mut fixed = Vec::with_capacity(n as usize);
    let mut current: u128 = 1u128 << FRACTION_BITS;
    for k in 0..u128::from(n) {
        if k > 0 {
            // ⌊current·(2k−1)/(2k)⌋ without overflow: current = q·2k + r, so the product
            // over 2k is q·(2k−1) + r·(2k−1)/(2k), with q·(2k−1) < current and r·(2k−1) < 2^66.
            let (numerator, denominator) = (2 * k - 1, 2 * k);
            let (q, r) = (current / denominator, current % denominator);
            current = q * numerator + r * numerator / denominator;
        }
        fixed.push(current);
    }
    Coefficients {
        fixed,
        float: float_coefficients(n),
    }
}

/// c_0..c_{n−1} in f64 by the recurrence c_k = c_{k−1}·(2k−1)/(2k): relative error at most
/// 2k unit roundoffs (two rounded operations per step), i.e. below 1e-11 for k < 2^20.
///
/// Variances use these rather than ĉ so that the data-free [`super::estimate_variance`]
/// costs O(b) cheap operations (the planner calls it for every (t, scope)); the mechanism
/// object uses the same values, so both report identical numbers. The estimate itself is
/// weighted with ĉ, which differs from c by less than 2^−88, so the
/// reported variance is its exact noise variance to about 1e-11 relative.
pub(super) fn float_coefficients(n: u32) -> Vec<f64> {
    let mut c = Vec::with_capacity(n as usize);
    let mut current = 1.0f64;
    for k in 0..n {
        if k > 0 {
            current *= f64::from(2 * k - 1) / f64::from(2 * k);
        }
        c.push(current);
    }
    c
}

/// Upper bound on the squared norm of every column of R̂ over a horizon of T leaves:
/// Σ_{k<T} ĉ_k² ≤ G_{T−1} = Σ_{k<T} c_k² (Landau's constants; privacy-math.md §5, \[C\]:
/// 64 → 2.388848, 1024 → 3.272554, 8760 → 3.955868). Column 0 is the longest because every
/// other column is a truncation of it. Computed from [`float_coefficients`] (relative error
/// ≤ 2k·u each, so ≤ (4k + 1)·u for c_k²) plus ≤ T roundings of the sum: at most (5T + 1)·u
/// = (2.5T + 0.5)·ε in all, so rounding up by (3T + 3)·ε (see `round_up`) gives a true
/// upper bound.
pub(super) fn column_norm_sq(horizon: u32) -> f64 {
    let sum: f64 = float_coefficients(horizon).iter().map(|c| c * c).sum();
    super::round_up(sum, 3.0 * f64::from(horizon) + 3.0)
}

/// Variance of the estimate of `range` in units of the per-leaf noise variance:
/// Σ_j w_j² with w_j = c_{b−j} − c_{a−1−j} (module docs), given c_0..c_b.
pub fn unit_variance(c: &[f64], range: LeafRange) -> f64 {
    let (a, b) = (range.first as usize, range.last as usize);
    (0..=b)
        .map(|j| {
            let w = if j < a {
                c[b - j] - c[a - 1 - j]
            } else {
                c[b - j]
            };
            w * w
        })
        .sum()
}

/// Signed 320-bit two's-complement accumulator for Σ ĉ·x (|x| < 2^127, ĉ ≤ 2^120, at most
/// 2^32 terms, so |sum| < 2^280).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
struct Wide([u64; 5]);

/// Full 256-bit product of two u128, little-endian 64-bit limbs.
fn mul_u128(a: u128, b: u128) -> [u64; 4] {
    let (a0, a1) = (a & u128::from(u64::MAX), a >> 64);
    let (b0, b1) = (b & u128::from(u64::MAX), b >> 64);
    let (p00, p01, p10, p11) = (a0 * b0, a0 * b1, a1 * b0, a1 * b1);
    // Each partial product is < 2^128; the middle column sums three 64-bit pieces (< 2^66).
    let mid = (p00 >> 64) + (p01 & u128::from(u64::MAX)) + (p10 & u128::from(u64::MAX));
    // The high part cannot overflow: it is ⌊a·b / 2^128⌋ < 2^128.
    let high = (mid >> 64) + (p01 >> 64) + (p10 >> 64) + p11;
    [p00 as u64, mid as u64, high as u64, (high >> 64) as u64]
}

impl Wide {
    /// self += p (p unsigned, 256 bits); wraps at 320 bits like any two's-complement add.
    fn add_limbs(&mut self, p: [u64; 4]) {
        let mut carry = false;
        for (limb, &addend) in self.0.iter_mut().zip(&p) {
            let (s1, c1) = limb.overflowing_add(addend);
            let (s2, c2) = s1.overflowing_add(u64::from(carry));
            *limb = s2;
            carry = c1 | c2;
        }
        self.0[4] = self.0[4].wrapping_add(u64::from(carry));
    }

    /// self −= p (p unsigned, 256 bits).
    fn sub_limbs(&mut self, p: [u64; 4]) {
        let mut borrow = false;
        for (limb, &subtrahend) in self.0.iter_mut().zip(&p) {
            let (d1, b1) = limb.overflowing_sub(subtrahend);
            let (d2, b2) = d1.overflowing_sub(u64::from(borrow));
            *limb = d2;
            borrow = b1 | b2;
        }
        self.0[4] = self.0[4].wrapping_sub(u64::from(borrow));
    }

    /// self += x·c, exactly.
    fn add_product(&mut self, x: i128, c: u128) {
        let product = mul_u128(x.unsigned_abs(), c);
        if x >= 0 {
            self.add_limbs(product);
        } else {
            self.sub_limbs(product);
        }
    }

    /// self += x·w for a signed weight, exactly.
    fn add_signed_product(&mut self, x: i128, w: i128) {
        let product = mul_u128(x.unsigned_abs(), w.unsigned_abs());
        if (x < 0) == (w < 0) {
            self.add_limbs(product);
        } else {
            self.sub_limbs(product);
        }
    }

    /// self / 2^shift in double-double: exact up to the final 106-bit rounding.
    fn to_dd_shifted(self, shift: u32) -> Dd {
        let negative = self.0[4] >> 63 == 1;
        let mut magnitude = self;
        if negative {
            // Two's-complement negation: invert and add one.
            for limb in magnitude.0.iter_mut() {
                *limb = !*limb;
            }
            magnitude.add_limbs([1, 0, 0, 0]);
        }
        // Σ limb_i·2^(64i − shift), largest first; each limb converts exactly (< 2^106) and
        // the power-of-two scaling is exact.
        let mut total = Dd::ZERO;
        for (i, &limb) in magnitude.0.iter().enumerate().rev() {
            let exponent = 64 * i as i32 - shift as i32;
            total = total + Dd::from_i128(i128::from(limb)) * 2f64.powi(exponent);
        }
        if negative { -total } else { total }
    }

    /// ⌊self / 2^shift + ½⌋ (round half up) as an i128, saturating if it does not fit.
    /// `shift` must be in 1..=192.
    fn round_shifted(mut self, shift: u32) -> i128 {
        let half_bit = shift - 1;
        let mut half = [0u64; 4];
        half[(half_bit / 64) as usize] = 1u64 << (half_bit % 64);
        self.add_limbs(half);
        let negative = self.0[4] >> 63 == 1;
        let fill = if negative { u64::MAX } else { 0 };
        let limb = |i: usize| self.0.get(i).copied().unwrap_or(fill);
        let (limb_shift, bit_shift) = ((shift / 64) as usize, shift % 64);
        // Arithmetic shift right: limbs above the top are sign fill.
        let shifted: [u64; 5] = std::array::from_fn(|i| {
            let (lo, hi) = (limb(i + limb_shift), limb(i + limb_shift + 1));
            if bit_shift == 0 {
                lo
            } else {
                (lo >> bit_shift) | (hi << (64 - bit_shift))
            }
        });
        let value = ((u128::from(shifted[1]) << 64) | u128::from(shifted[0])) as i128;
        let extension = if value < 0 { u64::MAX } else { 0 };
        if shifted[2..].iter().all(|&l| l == extension) {
            value
        } else if negative {
            i128::MIN
        } else {
            i128::MAX
        }
    }
}

/// The square-root factorization mechanism of one series (module docs).
#[derive(Clone, Debug)]
pub struct SqrtMechanism {
    horizon: u32,
    dim: usize,
    node_var: f64,
    coeffs: Coefficients,
    n_leaves: u32,
    /// Exact leaves pushed so far, leaf-major (`leaf * dim + coordinate`).
    exact: Vec<i128>,
    /// Released noisy values y_j, same layout.
    released: Vec<i128>,
}

impl SqrtMechanism {
    /// A mechanism over `horizon` leaves of `dim` coordinates whose per-leaf noise has
    /// variance `node_var` (grid units²). It keeps every leaf, so every range is answerable.
    pub fn new(horizon: u32, dim: usize, node_var: f64) -> SqrtMechanism {
        SqrtMechanism {
            horizon,
            dim,
            node_var,
            coeffs: coefficients(horizon),
            n_leaves: 0,
            exact: Vec::with_capacity(horizon as usize * dim),
            released: Vec::with_capacity(horizon as usize * dim),
        }
    }

    /// round((R̂x)_j) for the newest leaf j, per coordinate, computed exactly.
    fn rounded_transform(&self, j: usize) -> Vec<i128> {
        let mut sums = vec![Wide::default(); self.dim];
        for i in 0..=j {
            let c = self.coeffs.fixed[j - i];
            let leaf = &self.exact[i * self.dim..(i + 1) * self.dim];
            for (sum, &x) in sums.iter_mut().zip(leaf) {
                sum.add_product(x, c);
            }
        }
        sums.into_iter()
            .map(|s| s.round_shifted(FRACTION_BITS))
            .collect()
    }
}

impl ContinualMechanism for SqrtMechanism {
    fn push_leaf(&mut self, x: &[i128], noise: &mut dyn NodeNoise) {
        assert!(
            self.n_leaves < self.horizon,
            "epoch already has its {} leaves",
            self.horizon
        );
        assert_eq!(
            x.len(),
            self.dim,
            "leaf has the wrong number of coordinates"
        );
        let j = self.n_leaves as usize;
        self.exact.extend_from_slice(x);
        let rounded = self.rounded_transform(j);
        let mut fresh = vec![0i128; self.dim];
        noise.fill(
            NodeAddr {
                level: 0,
                index: j as u64,
            },
            &mut fresh,
        );
        self.released.extend(
            rounded
                .iter()
                .zip(&fresh)
                .map(|(&r, &z)| r.saturating_add(z)),
        );
        self.n_leaves += 1;
    }

    fn estimate(&self, range: LeafRange) -> Estimate {
        assert_in_pushed(range, self.n_leaves);
        let (a, b) = (range.first as usize, range.last as usize);
        let c = &self.coeffs.fixed;
        // Σ_j w_j·y_j with integer weights W_j = w_j·2^120 (ĉ ≤ 2^120, so they fit an i128),
        // accumulated exactly and rounded once at the end.
        let mut sums = vec![Wide::default(); self.dim];
        for j in 0..=b {
            let weight = if j < a {
                c[b - j] as i128 - c[a - 1 - j] as i128
            } else {
                c[b - j] as i128
            };
            let leaf = &self.released[j * self.dim..(j + 1) * self.dim];
            for (sum, &y) in sums.iter_mut().zip(leaf) {
                sum.add_signed_product(y, weight);
            }
        }
        Estimate {
            value: sums
                .into_iter()
                .map(|s| s.to_dd_shifted(FRACTION_BITS))
                .collect(),
            variance: self.node_var * unit_variance(&self.coeffs.float, range),
        }
    }

    fn leaves(&self) -> u32 {
        self.n_leaves
    }
}

#[cfg(test)]
mod tests {
    use nalgebra::DMatrix;
    use num_bigint::{BigInt, BigUint};
    use rand::rngs::ChaCha20Rng;
    use rand::{RngExt, SeedableRng};

    use super::*;
    use crate::engine::mechanism::{MechanismKind, sensitivity_sq};

    /// Noise that is always zero: exposes round(R̂x) itself.
    struct ZeroNoise;

    impl NodeNoise for ZeroNoise {
        fn fill(&mut self, _addr: NodeAddr, out: &mut [i128]) {
            out.fill(0);
        }
    }

    fn fixed_to_f64(c: u128) -> f64 {
        c as f64 * 2f64.powi(-(FRACTION_BITS as i32))
    }

    #[test]
    fn coefficients_match_central_binomials() {
        // c_k = binom(2k, k)/4^k (FHU 2023 via privacy-math.md §5 [S (2nd)]); reference values
        // from statrs' binomial (exact factorial table for n ≤ 170) and the listed first
        // values 1, 0.5, 0.375, 0.3125, 0.2734375, 0.24609375.
        let coeffs = coefficients(81);
        for (k, expected) in [1.0, 0.5, 0.375, 0.3125, 0.2734375, 0.24609375]
            .iter()
            .enumerate()
        {
            assert_eq!(coeffs.float[k], *expected);
        }
        for k in 0..=80u64 {
            let expected = statrs::function::factorial::binomial(2 * k, k) / 4f64.powi(k as i32);
            for got in [
                coeffs.float[k as usize],
                fixed_to_f64(coeffs.fixed[k as usize]),
            ] {
                assert!(
                    (got - expected).abs() <= 1e-13 * expected,
                    "k={k}: {got} vs {expected}"
                );
            }
        }
    }

    #[test]
    fn truncated_coefficients_never_exceed_the_exact_ones() {
        // Exact check with big integers: ĉ_k ≤ c_k·2^120 < ĉ_k + k + 1, where
        // c_k·2^120 = (2k−1)!!·2^120 / (2^k·k!) (the double-factorial form of binom(2k,k)/4^k,
        // independent of the recurrence used by `coefficients`).
        let n = 300u32;
        let coeffs = coefficients(n);
        let mut odd_product = BigUint::from(1u32); // (2k−1)!!
        let mut even_product = BigUint::from(1u32); // (2k)!! = 2^k·k!
        for k in 0..n {
            if k > 0 {
                odd_product *= 2 * k - 1;
                even_product *= 2 * k;
            }
            let scaled = (&odd_product << FRACTION_BITS) / &even_product; // ⌊c_k·2^120⌋
            let fixed = BigUint::from(coeffs.fixed[k as usize]);
            assert!(fixed <= scaled, "k={k}: truncated coefficient above exact");
            assert!(
                &scaled - &fixed <= BigUint::from(k),
                "k={k}: truncation error above k ulps"
            );
        }
    }

    #[test]
    fn toeplitz_square_is_the_prefix_sum_matrix() {
        // privacy-math.md §5 [C] (tree.py: Toeplitz(c)² = M at T = 64); follows from
        // ((1 − x)^{−1/2})² = (1 − x)^{−1}.
        let n = 64;
        let c = coefficients(n as u32).float;
        let l = DMatrix::from_fn(n, n, |i, j| if i >= j { c[i - j] } else { 0.0 });
        let square = &l * &l;
        for i in 0..n {
            for j in 0..n {
                let expected = if i >= j { 1.0 } else { 0.0 };
                assert!(
                    (square[(i, j)] - expected).abs() < 1e-13,
                    "({i},{j}) = {}",
                    square[(i, j)]
                );
            }
        }
    }

    #[test]
    fn column_norm_matches_landau_constants() {
        // G_{T−1} = Σ_{k<T} c_k², privacy-math.md §5 [C] (tree.py), printed to 6 decimals.
        for (horizon, expected) in [
            (16u32, 1.943879),
            (64, 2.388848),
            (256, 2.831050),
            (1024, 3.272554),
            (8192, 3.934529),
            (8760, 3.955868),
        ] {
            let g = column_norm_sq(horizon);
            assert!(
                (g - expected).abs() < 5e-7,
                "T={horizon}: {g} vs {expected}"
            );
            // Rounded up: never below the exact-arithmetic sum of the truncated coefficients.
            // Rounded up: never below the sum of the truncated coefficients ĉ_k actually used,
            // summed here in double-double.
            let exact = coefficients(horizon)
                .fixed
                .iter()
                .fold(Dd::ZERO, |acc, &c| {
                    let c = Dd::from_i128(c as i128) * 2f64.powi(-(FRACTION_BITS as i32));
                    acc + c * c
                });
            assert!(g >= exact.to_f64(), "T={horizon}");
        }
    }

    #[test]
    fn wide_products_match_big_integers() {
        // Reference: num-bigint's arbitrary-precision arithmetic.
        let mut rng = ChaCha20Rng::seed_from_u64(17);
        for trial in 0..200 {
            let mut wide = Wide::default();
            let mut big = BigInt::from(0);
            let n_terms = 1 + trial % 40;
            for _ in 0..n_terms {
                let bits = rng.random_range(1u32..=127);
                let magnitude = (rng.random::<u128>() >> (128 - bits)) as i128;
                let x = if rng.random::<bool>() {
                    magnitude
                } else {
                    -magnitude
                };
                let c = rng.random::<u128>() >> rng.random_range(7u32..=120); // ≤ 2^121
                wide.add_product(x, c);
                big += BigInt::from(x) * BigInt::from(c);
            }
            // ⌊big / 2^120 + ½⌋ with floor division (BigInt's `>>` rounds toward −∞).
            let expected = (&big + (BigInt::from(1) << 119)) >> 120;
            let got = wide.round_shifted(FRACTION_BITS);
            let expected = i128::try_from(expected).unwrap_or(if big < BigInt::from(0) {
                i128::MIN
            } else {
                i128::MAX
            });
            assert_eq!(got, expected, "trial {trial}");
        }
        // Signed weights and the conversion to double-double used by estimates: relative
        // accuracy against num-bigint's f64 conversion, and exactness where 106 bits suffice.
        for trial in 0..200 {
            let mut wide = Wide::default();
            let mut big = BigInt::from(0);
            for _ in 0..1 + trial % 30 {
                let x = (rng.random::<u128>() >> rng.random_range(1u32..=127)) as i128;
                let x = if rng.random::<bool>() { x } else { -x };
                let w = (rng.random::<u128>() >> rng.random_range(8u32..=127)) as i128;
                let w = if rng.random::<bool>() { w } else { -w };
                wide.add_signed_product(x, w);
                big += BigInt::from(x) * BigInt::from(w);
            }
            let expected =
                num_traits::ToPrimitive::to_f64(&big).unwrap_or(f64::NAN) * 2f64.powi(-120);
            let got = wide.to_dd_shifted(FRACTION_BITS).to_f64();
            assert!(
                (got - expected).abs() <= 4.0 * f64::EPSILON * expected.abs(),
                "trial {trial}: {got} vs {expected}"
            );
        }
        let mut exact = Wide::default();
        exact.add_signed_product(-((1i128 << 80) + 3), 1i128 << 120);
        let value = exact.to_dd_shifted(FRACTION_BITS) + Dd::from_i128(1i128 << 80);
        assert_eq!(value.to_f64(), -3.0);
        // Ties round up: 2.5 → 3, −2.5 → −2.
        let mut w = Wide::default();
        w.add_product(5, 1u128 << 119);
        assert_eq!(w.round_shifted(FRACTION_BITS), 3);
        let mut w = Wide::default();
        w.add_product(-5, 1u128 << 119);
        assert_eq!(w.round_shifted(FRACTION_BITS), -2);
    }

    #[test]
    fn release_is_rounded_transform_of_leaves() {
        // With zero noise y_j = round(Σ_i c_{j−i} x_i) (privacy-math.md §5 with rounding to the
        // grid); reference evaluated in f64 on small integers, accurate to about 1e-12.
        let horizon = 50;
        let mut rng = ChaCha20Rng::seed_from_u64(3);
        let leaves: Vec<i128> = (0..horizon)
            .map(|_| i128::from(rng.random_range(-1000i64..=1000)))
            .collect();
        let mut mech = SqrtMechanism::new(horizon, 1, 1.0);
        for &x in &leaves {
            mech.push_leaf(&[x], &mut ZeroNoise);
        }
        let c = coefficients(horizon).float;
        for j in 0..horizon as usize {
            let exact: f64 = (0..=j).map(|i| c[j - i] * leaves[i] as f64).sum();
            // Round half up, as `Wide::round_shifted` does (ties occur: c_0, c_1 are dyadic).
            assert_eq!(
                mech.released[j],
                (exact + 0.5).floor() as i128,
                "j={j}: {exact}"
            );
        }
    }

    #[test]
    fn neighbouring_releases_stay_within_the_sensitivity() {
        // Privacy check of the rounding term: for neighbours differing in ≤ m leaves by
        // vectors of norm ≤ B, ‖round(R̂x) − round(R̂x′)‖² ≤ sensitivity_sq (no noise). Random
        // data puts fractional parts everywhere, so rounding flips happen; the observed
        // maximum must also exceed the data term alone (B·m)²·G, showing that the √(T·D)
        // term is needed.
        let (horizon, dim, bound) = (32u32, 2usize, 3.0);
        let mut rng = ChaCha20Rng::seed_from_u64(11);
        let mut largest_excess = 0.0f64;
        for m in 1..=3u32 {
            let limit = sensitivity_sq(MechanismKind::SqrtFactorization, horizon, dim, bound, m);
            let data_only = (bound * f64::from(m)).powi(2) * column_norm_sq(horizon);
            for _ in 0..40 {
                let x: Vec<i128> = (0..horizon as usize * dim)
                    .map(|_| i128::from(rng.random_range(-(1i64 << 50)..(1i64 << 50))))
                    .collect();
                let mut neighbour = x.clone();
                for _ in 0..m {
                    // A change of norm ≤ 3: (±2, ±2) has norm 2.83, (±3, 0) norm 3.
                    let leaf = rng.random_range(0..horizon as usize);
                    let change: [i128; 2] = if rng.random::<bool>() {
                        [2, -2]
                    } else {
                        [-3, 0]
                    };
                    neighbour[leaf * dim] = x[leaf * dim] + change[0];
                    neighbour[leaf * dim + 1] = x[leaf * dim + 1] + change[1];
                }
                let (mut a, mut b) = (
                    SqrtMechanism::new(horizon, dim, 1.0),
                    SqrtMechanism::new(horizon, dim, 1.0),
                );
                for leaf in 0..horizon as usize {
                    a.push_leaf(&x[leaf * dim..(leaf + 1) * dim], &mut ZeroNoise);
                    b.push_leaf(&neighbour[leaf * dim..(leaf + 1) * dim], &mut ZeroNoise);
                }
                let distance_sq: f64 = a
                    .released
                    .iter()
                    .zip(&b.released)
                    .map(|(&p, &q)| ((p - q) as f64).powi(2))
                    .sum();
                assert!(distance_sq <= limit, "m={m}: {distance_sq} > {limit}");
                largest_excess = largest_excess.max(distance_sq / data_only);
            }
        }
        assert!(
            largest_excess > 1.0,
            "rounding never mattered: {largest_excess}"
        );
    }

    #[test]
    fn estimates_are_prefix_differences_of_the_released_values() {
        // Definition check (privacy-math.md §5): range [a,b] = prefix(b) − prefix(a−1) with
        // prefix(b) = Σ_{j≤b} c_{b−j} y_j; reference computed in f64 on small values. With zero
        // noise the error from the exact sum is rounding only: ≤ ½·Σ_j |w_j|.
        let horizon = 40;
        let mut rng = ChaCha20Rng::seed_from_u64(8);
        let leaves: Vec<i128> = (0..horizon)
            .map(|_| i128::from(rng.random_range(0i64..=10_000)))
            .collect();
        let mut mech = SqrtMechanism::new(horizon, 1, 1.0);
        for &x in &leaves {
            mech.push_leaf(&[x], &mut ZeroNoise);
        }
        let c = coefficients(horizon).float;
        let prefix =
            |b: usize| -> f64 { (0..=b).map(|j| c[b - j] * mech.released[j] as f64).sum() };
        for a in 0..horizon as usize {
            for b in a..horizon as usize {
                let estimate = mech
                    .estimate(LeafRange {
                        first: a as u32,
                        last: b as u32,
                    })
                    .value[0]
                    .to_f64();
                let reference = prefix(b) - if a > 0 { prefix(a - 1) } else { 0.0 };
                assert!(
                    (estimate - reference).abs() < 1e-9 * (1.0 + reference.abs()),
                    "{a}..={b}"
                );
                let weights: f64 = (0..=b)
                    .map(|j| (c[b - j] - if j < a { c[a - 1 - j] } else { 0.0 }).abs())
                    .sum();
                let exact: i128 = leaves[a..=b].iter().sum();
                assert!(
                    (estimate - exact as f64).abs() <= 0.5 * weights + 1e-9,
                    "{a}..={b}"
                );
            }
        }
    }
}
