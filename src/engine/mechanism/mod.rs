//! Continual-release mechanisms: how one series of window aggregates (leaves) becomes
//! noisy running totals, window values and trailing sums from one privacy budget.
//!
//! A *series* is one (stat, component, group). An epoch has `horizon` leaves (windows),
//! pushed in order; each leaf is a vector of `dim` integers in grid units (see the stats
//! module for the grid). The caller supplies the noise through [`NodeNoise`] (the exact
//! discrete Gaussian in production, with the same variance `node_var` for every node and
//! coordinate of a series); a mechanism decides *what* gets noised and how the noisy pieces
//! are combined into estimates. Three mechanisms implement [`ContinualMechanism`]:
//!
//! * [`MechanismKind::Tree`]: the binary mechanism (Dwork, Naor, Pitassi & Rothblum,
//!   STOC 2010; Chan, Shi & Song, TISSEC 2011) with the minimum-variance (GLS / BLUE)
//!   estimator over every node released so far (Honaker 2015; privacy-math.md §4).
//! * [`MechanismKind::SqrtFactorization`]: the square-root factorization of the prefix-sum
//!   matrix (Henzinger, Upadhyay & Upadhyay, SODA 2023; Fichtenberger, Henzinger & Upadhyay,
//!   ICML 2023; privacy-math.md §5).
//! * [`MechanismKind::Independent`]: fresh noise on every leaf, sums of noisy leaves.
//!
//! Besides the objects, this module holds the data-free facts the planner needs before any
//! data arrives: [`levels`], [`sensitivity_sq`] and [`estimate_variance`]. The objects report
//! exactly the variance [`estimate_variance`] predicts (they call the same code).
//!
//! Which ranges can be asked for: a mechanism built with `max_trailing = M` may forget what
//! only old ranges need. A range is *answerable* after `t` leaves when `range.last < t` and
//! each end is either at the epoch edge (`first == 0`, `last == t - 1`) or inside the last
//! `M` leaves. That covers the release scopes `window`, `epoch_to_date` and `trailing:N`
//! for `N <= M`. With `M >= horizon` every range is answerable.

pub mod independent;
pub mod sqrt;
pub mod tree;

use crate::engine::dd::Dd;

pub use independent::IndependentMechanism;
pub use sqrt::SqrtMechanism;
pub use tree::TreeMechanism;

/// Which continual-release mechanism a series uses (config `privacy.mechanism`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum MechanismKind {
    /// Binary tree with the optimal (GLS) estimator; config `"tree"`.
    Tree,
    /// Square-root factorization of the prefix-sum matrix; config `"sqrt-factorization"`.
    SqrtFactorization,
    /// Independent noise on every leaf; config `"independent"`.
    Independent,
}

impl MechanismKind {
    /// Every kind, in the order the config documentation lists them.
    pub const ALL: [MechanismKind; 3] = [
        MechanismKind::Tree,
        MechanismKind::SqrtFactorization,
        MechanismKind::Independent,
    ];

    /// The config spelling, also used in release records (`guarantee.mechanism`).
    pub fn as_str(&self) -> &'static str {
        match self {
            MechanismKind::Tree => "tree",
            MechanismKind::SqrtFactorization => "sqrt-factorization",
            MechanismKind::Independent => "independent",
        }
    }

    /// Parses the config spelling; `None` for anything else (the config layer names the
    /// valid values in its error).
    pub fn parse(s: &str) -> Option<Self> {
        MechanismKind::ALL
            .into_iter()
            .find(|kind| kind.as_str() == s)
    }
}

/// Identity of one noised quantity of a series.
///
/// Tree: the dyadic node covering leaves `[index * 2^level, (index + 1) * 2^level)`.
/// Independent and square-root factorization: `level` 0 and `index` the leaf.
/// The caller derives each node's noise from a secret key and this address, so the same
/// node always gets the same noise (replays and restarts stay consistent).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct NodeAddr {
    /// Height of the node above the leaves (0 = a leaf).
    pub level: u8,
    /// Position of the node among the nodes of its level, from 0.
    pub index: u64,
}

/// Inclusive leaf range within the epoch.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LeafRange {
    /// First leaf of the range.
    pub first: u32,
    /// Last leaf of the range (inclusive).
    pub last: u32,
}

impl LeafRange {
    /// Number of leaves in the range.
    pub fn n_leaves(&self) -> u32 {
        self.last - self.first + 1
    }
}

/// Source of noise for the nodes of one series.
pub trait NodeNoise {
    /// Fills `out` (length `dim`) with fresh noise for the node `addr`. A mechanism calls
    /// this exactly once per node over the life of the series.
    fn fill(&mut self, addr: NodeAddr, out: &mut [i128]);
}

/// A noisy estimate of a range sum, in grid units.
#[derive(Clone, Debug, PartialEq)]
pub struct Estimate {
    /// One value per coordinate of the leaf vectors (inline for scalar series, which
    /// are most of them: one allocation fewer per released record).
    pub value: smallvec::SmallVec<[Dd; 1]>,
    /// Exact variance of each coordinate's noise, grid units² (the same for every
    /// coordinate because every coordinate gets noise of the same variance).
    pub variance: f64,
}

/// One series' continual-release mechanism for one epoch.
///
/// Calling protocol: `push_leaf` once per closed window in leaf order, then any number of
/// `estimate` calls on answerable ranges (see the module docs).
pub trait ContinualMechanism: Send + std::fmt::Debug {
    /// Leaf `leaf` (must equal the number of leaves pushed so far) closes with exact value
    /// `x` (length `dim`). Draws the noise of every node this leaf completes.
    ///
    /// # Panics
    /// If the epoch already has `horizon` leaves or `x.len() != dim` (caller bugs).
    fn push_leaf(&mut self, x: &[i128], noise: &mut dyn NodeNoise);

    /// Minimum-variance (for the tree: BLUE/GLS) unbiased estimate of `sum_{i in range} x_i`
    /// from everything released so far.
    ///
    /// # Panics
    /// If the range is not answerable (module docs): `range.last >= leaves()`,
    /// `first > last`, or an end outside the retained trailing leaves. These are caller bugs.
    fn estimate(&self, range: LeafRange) -> Estimate;

    /// Number of leaves pushed so far.
    fn leaves(&self) -> u32;
}

/// Builds the mechanism of one series for one epoch.
///
/// `horizon`: leaves per epoch (T). `dim`: coordinates per leaf (D). `max_trailing`: the
/// longest trailing scope that will be asked for (lets the tree and the independent
/// mechanism forget older nodes). `node_var`: exact variance of the noise `NodeNoise`
/// draws per node and coordinate, grid units².
pub fn new_mechanism(
    kind: MechanismKind,
    horizon: u32,
    dim: usize,
    max_trailing: u32,
    node_var: f64,
) -> Box<dyn ContinualMechanism> {
    match kind {
        MechanismKind::Tree => Box::new(TreeMechanism::new(horizon, dim, max_trailing, node_var)),
        MechanismKind::SqrtFactorization => Box::new(SqrtMechanism::new(horizon, dim, node_var)),
        MechanismKind::Independent => Box::new(IndependentMechanism::new(
            horizon,
            dim,
            max_trailing,
            node_var,
        )),
    }
}

/// Number of tree levels h = ⌊log₂ T⌋ + 1 (privacy-math.md §4, \[D\]): level l has a node
/// only if some aligned block of 2^l leaves fits inside [0, T), i.e. 2^l ≤ T.
/// `levels(0) = 0` (no leaves, no nodes).
pub fn levels(horizon: u32) -> u32 {
    u32::BITS - horizon.leading_zeros()
}

/// Upper bound on the relative floating-point error of a result computed with `n_ops`
/// correctly rounded operations on exact inputs: each operation contributes at most one
/// unit roundoff u = ε/2 (standard model; Higham, *Accuracy and Stability of Numerical
/// Algorithms*, 2nd ed., §2.2), so (1 + n·ε) bounds the product of the (1 ± u) factors
/// generously, including the multiplication that applies it.
fn round_up(x: f64, n_ops: f64) -> f64 {
    x * (1.0 + (n_ops + 1.0) * f64::EPSILON)
}

/// Squared L2 sensitivity of everything the mechanism releases over one epoch, in grid
/// units², when one privacy unit changes at most `max_leaves` leaves, each by a vector of L2
/// norm at most `leaf_bound` (grid units). At most `horizon` leaves exist, so `max_leaves` is
/// capped at `horizon`. The result is rounded up (see `round_up`) so that floating-point
/// error never makes it smaller than the true bound.
///
/// * Tree (privacy-math.md §8, \[D\]): Δ₂² ≤ B²·m·Σ_{l<h} min(2^l, m). At level l the m changed
///   leaves fall into nodes holding n_v ≤ min(2^l, m) of them with Σ_v n_v ≤ m, so
///   Σ_v n_v² ≤ min(2^l, m)·m. For D > 1 a node's change is a sum of ≤ n_v leaf changes of
///   norm ≤ B each, so by the triangle inequality its squared norm is ≤ (n_v·B)²: the same
///   bound with B the L2 norm bound of the per-leaf vector. Tight for m = 2^j aligned leaves.
/// * Square-root factorization: the released vector is round(R̂x) + z with R̂ ≤ R entrywise
///   and R = Toeplitz(c) ≥ 0 (see [`sqrt`]). One changed leaf moves R̂x by a column of R̂ times
///   the leaf change, norm ≤ B·√G_{T−1} with G_{T−1} = Σ_{k<T} c_k²; m leaves by at most
///   m·B·√G_{T−1} (triangle inequality; privacy-math.md §8 shows it is loose but safe). Rounding
///   to integers moves each of the T·D released coordinates by at most 1 more
///   (|round(a) − round(b)| ≤ |a − b| + 1), adding ‖e‖₂ ≤ √(T·D):
///   Δ₂ ≤ B·m·√G_{T−1} + √(T·D).
/// * Independent: each changed leaf moves one released vector by ≤ B: Δ₂² ≤ B²·m.
pub fn sensitivity_sq(
    kind: MechanismKind,
    horizon: u32,
    dim: usize,
    leaf_bound: f64,
    max_leaves: u32,
) -> f64 {
    let m = u64::from(max_leaves.min(horizon));
    let bound_sq = leaf_bound * leaf_bound;
    match kind {
        MechanismKind::Tree => {
            // Integer part exactly in u128: m ≤ 2^32 and each of ≤ 32 levels adds ≤ m².
            let n_pairs: u128 = (0..levels(horizon))
                .map(|l| u128::from(m) * u128::from(m.min(1u64 << l)))
                .sum();
            // Rounding: leaf_bound², the u128 → f64 conversion, the product.
            round_up(bound_sq * n_pairs as f64, 3.0)
        }
        MechanismKind::SqrtFactorization => {
            let g = sqrt::column_norm_sq(horizon);
            let data_term = leaf_bound * m as f64 * g.sqrt();
            let rounding_term = (f64::from(horizon) * dim as f64).sqrt();
            let delta = data_term + rounding_term;
            // column_norm_sq is already an upper bound; the few operations here (sqrt,
            // products, the sum, the square) add at most 8 roundings.
            round_up(delta * delta, 8.0)
        }
        MechanismKind::Independent => round_up(bound_sq * m as f64, 2.0),
    }
}

/// Data-free variance of `estimate(range)` after `leaves_pushed` leaves, in grid units²
/// (what `plan` predicts). Equal to what the mechanism object reports because both call the
/// same code: [`tree::unit_variance`], [`sqrt::unit_variance`], or the leaf count.
///
/// # Panics
/// If `range.first > range.last` or `range.last >= leaves_pushed` or
/// `leaves_pushed > horizon`.
pub fn estimate_variance(
    kind: MechanismKind,
    horizon: u32,
    node_var: f64,
    leaves_pushed: u32,
    range: LeafRange,
) -> f64 {
    assert!(
        leaves_pushed <= horizon,
        "{leaves_pushed} leaves pushed exceed the horizon {horizon}"
    );
    assert_in_pushed(range, leaves_pushed);
    let unit = match kind {
        MechanismKind::Tree => tree::unit_variance(leaves_pushed, range),
        MechanismKind::SqrtFactorization => {
            sqrt::unit_variance(&sqrt::float_coefficients(range.last + 1), range)
        }
        MechanismKind::Independent => f64::from(range.n_leaves()),
    };
    node_var * unit
}

/// Panics unless `range` is non-empty and lies within the first `leaves_pushed` leaves.
fn assert_in_pushed(range: LeafRange, leaves_pushed: u32) {
    assert!(
        range.first <= range.last && range.last < leaves_pushed,
        "range {}..={} is empty or not yet closed ({leaves_pushed} leaves pushed)",
        range.first,
        range.last
    );
}

/// Panics unless `range` is answerable (module docs) after `leaves_pushed` leaves by a
/// mechanism that remembers the leaves from `retained_from` on.
fn assert_answerable(range: LeafRange, leaves_pushed: u32, retained_from: u32) {
    assert_in_pushed(range, leaves_pushed);
    let first_ok = range.first == 0 || range.first >= retained_from;
    let last_ok = range.last + 1 == leaves_pushed || range.last >= retained_from;
    assert!(
        first_ok && last_ok,
        "range {}..={} needs leaves before {retained_from}, which this mechanism no longer keeps \
         (raise max_trailing)",
        range.first,
        range.last
    );
}

/// First leaf whose nodes a mechanism with trailing memory `max_trailing` still keeps after
/// `leaves_pushed` leaves.
fn retained_from(leaves_pushed: u32, max_trailing: u32) -> u32 {
    leaves_pushed.saturating_sub(max_trailing)
}

#[cfg(test)]
mod tests {
    use rand::rngs::ChaCha20Rng;
    use rand::{RngExt, SeedableRng};
    use rand_distr::{Distribution, Normal};
    use statrs::distribution::{ChiSquared, ContinuousCDF, Normal as StdNormal};

    use super::*;

    fn prefix(t: u32) -> LeafRange {
        LeafRange {
            first: 0,
            last: t - 1,
        }
    }

    fn trailing(t: u32, n: u32) -> LeafRange {
        LeafRange {
            first: t.saturating_sub(n),
            last: t - 1,
        }
    }

    #[test]
    fn kind_names_follow_the_contract() {
        // contract.md, config `privacy.mechanism`: "tree" | "sqrt-factorization" | "independent".
        let names: Vec<&str> = MechanismKind::ALL.iter().map(|k| k.as_str()).collect();
        assert_eq!(names, ["tree", "sqrt-factorization", "independent"]);
        for kind in MechanismKind::ALL {
            assert_eq!(MechanismKind::parse(kind.as_str()), Some(kind));
        }
        assert_eq!(MechanismKind::parse("Tree"), None);
        assert_eq!(MechanismKind::parse("sqrt"), None);
    }

    /// Worst-case standard deviation of the released epoch-to-date value in units of
    /// Δ/√(2ρ) at event level (m = 1): K = √(Δ₂²) · √(max_t Var_unit(prefix t)), with the
    /// leaf bound factored out. leaf_bound = 2^40 grid units makes the square-root
    /// factorization's rounding term √T/2^40 ≈ 1e-10 relative, i.e. a fine grid.
    fn worst_case_factor(kind: MechanismKind, horizon: u32) -> f64 {
        let bound = 2f64.powi(40);
        let sensitivity = sensitivity_sq(kind, horizon, 1, bound, 1).sqrt() / bound;
        let max_var = (1..=horizon)
            .map(|t| estimate_variance(kind, horizon, 1.0, t, prefix(t)))
            .fold(0.0, f64::max);
        sensitivity * max_var.sqrt()
    }

    #[test]
    fn worst_case_std_factors_match_privacy_math() {
        // privacy-math.md §5 table, [C] (tree.py): K for the plain tree (popcount estimator),
        // the tree with the online optimal estimator, and the square-root factorization
        // (K = G_{T−1}). Printed to 4 decimals, so 1e-4 (much tighter than the 1% asked for).
        for (horizon, plain_expected, tree_expected, sqrt_expected) in [
            (64u32, 6.4807, 5.1545, 2.3888),
            (1024, 10.4881, 7.9895, 3.2726),
            (8760, 13.4907, 10.1117, 3.9559),
        ] {
            // Plain tree: the prefix is the sum of popcount(t) nodes (privacy-math.md §4 [D]),
            // with the same node sensitivity √h.
            let max_popcount = (1..=horizon).map(u32::count_ones).max().unwrap_or(0);
            let plain = sensitivity_sq(MechanismKind::Tree, horizon, 1, 1.0, 1).sqrt()
                * f64::from(max_popcount).sqrt();
            let tree = worst_case_factor(MechanismKind::Tree, horizon);
            let sqrt = worst_case_factor(MechanismKind::SqrtFactorization, horizon);
            for (name, got, expected) in [
                ("plain", plain, plain_expected),
                ("tree", tree, tree_expected),
                ("sqrt", sqrt, sqrt_expected),
            ] {
                assert!(
                    (got - expected).abs() < 1e-4,
                    "T={horizon} {name}: {got} vs {expected}"
                );
            }
        }
    }

    /// G[s][t] = number of dyadic nodes inside [0, T) containing leaves s and t, so that
    /// ‖A·1_S‖² = Σ_{s,t∈S} G[s][t] (A the node-by-leaf 0/1 matrix).
    fn node_gram(horizon: u32) -> Vec<Vec<u32>> {
        let n = horizon as usize;
        let mut gram = vec![vec![0u32; n]; n];
        for level in 0..levels(horizon) {
            let size = 1usize << level;
            for index in 0..n / size {
                let block = index * size..(index + 1) * size;
                for row in &mut gram[block.clone()] {
                    for cell in &mut row[block.clone()] {
                        *cell += 1;
                    }
                }
            }
        }
        gram
    }

    /// Exhaustive max over m-subsets S of leaves of ‖A·1_S‖² (privacy-math.md §8, userlevel.py).
    fn brute_tree_max(horizon: u32, m: usize) -> u32 {
        let gram = node_gram(horizon);
        let n = horizon as usize;
        let mut best = 0;
        let mut subset: Vec<usize> = (0..m).collect();
        loop {
            let value: u32 = subset
                .iter()
                .flat_map(|&s| subset.iter().map(move |&t| (s, t)))
                .map(|(s, t)| gram[s][t])
                .sum();
            best = best.max(value);
            // Next combination in lexicographic order.
            let Some(i) = (0..m).rev().find(|&i| subset[i] < n - m + i) else {
                break;
            };
            subset[i] += 1;
            for j in i + 1..m {
                subset[j] = subset[j - 1] + 1;
            }
        }
        best
    }

    #[test]
    fn tree_sensitivity_is_never_below_brute_force_and_tight_for_aligned_blocks() {
        // privacy-math.md §8 [D, C]: the bound m·Σ_l min(2^l, m) is ≥ the exhaustive maximum
        // of ‖A·1_S‖² and equal to it when m = 2^j ≤ T (an aligned block, e.g. leaves 0..m).
        for horizon in 1..=16u32 {
            for m in 1..=4u32 {
                let formula = sensitivity_sq(MechanismKind::Tree, horizon, 1, 1.0, m);
                let brute = f64::from(brute_tree_max(horizon, m.min(horizon) as usize));
                assert!(formula >= brute, "T={horizon} m={m}: {formula} < {brute}");
                if m.is_power_of_two() && m <= horizon {
                    assert!(
                        (formula - brute).abs() <= 1e-12 * brute,
                        "T={horizon} m={m}: not tight"
                    );
                }
            }
        }
    }

    #[test]
    fn tree_sensitivity_matches_privacy_math_rows() {
        // privacy-math.md §8, [C] (userlevel.py): exhaustive T = 64 row (formula 7, 26, 54, 92;
        // brute 7, 26, 53, 92) and the T = 1024 tight Δ₂ for m = 1, 2, 4, 8.
        for (m, formula_expected, brute_expected) in
            [(1u32, 7.0, 7), (2, 26.0, 26), (3, 54.0, 53), (4, 92.0, 92)]
        {
            let formula = sensitivity_sq(MechanismKind::Tree, 64, 1, 1.0, m);
            assert!(
                (formula - formula_expected).abs() < 1e-12,
                "m={m}: {formula}"
            );
            assert_eq!(brute_tree_max(64, m as usize), brute_expected, "m={m}");
        }
        for (m, expected) in [(1u32, 3.3166), (2, 6.4807), (4, 12.4900), (8, 23.8328)] {
            let delta = sensitivity_sq(MechanismKind::Tree, 1024, 1, 1.0, m).sqrt();
            assert!((delta - expected).abs() < 1e-4, "m={m}: {delta}");
        }
    }

    #[test]
    fn tree_sensitivity_covers_vector_leaves() {
        // D > 1 (doc of `sensitivity_sq`): changes of L2 norm ≤ B on m leaves. Random
        // placements and directions, plus the aligned worst case (all changes equal), checked
        // against the direct node-vector norm Σ_v ‖Σ_{t∈v} Δx_t‖².
        let (horizon, dim, bound) = (12u32, 3usize, 2.0);
        let mut rng = ChaCha20Rng::seed_from_u64(21);
        for m in 1..=4u32 {
            let limit = sensitivity_sq(MechanismKind::Tree, horizon, dim, bound, m);
            let mut largest = 0.0f64;
            for trial in 0..300 {
                let mut changes = vec![vec![0.0; dim]; horizon as usize];
                let aligned: Vec<f64> = vec![bound / (dim as f64).sqrt(); dim];
                for _ in 0..m {
                    let leaf = rng.random_range(0..horizon as usize);
                    let direction: Vec<f64> = if trial % 2 == 0 {
                        aligned.clone()
                    } else {
                        let raw: Vec<f64> = (0..dim).map(|_| rng.random_range(-1.0..1.0)).collect();
                        let norm = raw.iter().map(|v| v * v).sum::<f64>().sqrt();
                        raw.iter().map(|v| v * bound / norm).collect()
                    };
                    changes[leaf] = direction; // re-picking a leaf overwrites: still ≤ m leaves
                }
                let mut norm_sq = 0.0;
                for level in 0..levels(horizon) {
                    let size = 1usize << level;
                    for index in 0..horizon as usize / size {
                        let mut sum = vec![0.0; dim];
                        for change in &changes[index * size..(index + 1) * size] {
                            for (s, c) in sum.iter_mut().zip(change) {
                                *s += c;
                            }
                        }
                        norm_sq += sum.iter().map(|v| v * v).sum::<f64>();
                    }
                }
                assert!(
                    norm_sq <= limit * (1.0 + 1e-12),
                    "m={m}: {norm_sq} > {limit}"
                );
                largest = largest.max(norm_sq);
            }
            assert!(
                largest > 0.5 * limit,
                "m={m}: the worst case was never approached"
            );
        }
    }

    #[test]
    fn sqrt_sensitivity_is_triangle_bound_plus_rounding() {
        // Formula check (doc of `sensitivity_sq`; HUU 2023/FHU 2023 column norm √G_{T−1},
        // privacy-math.md §5): Δ₂ = B·m·√G_{T−1} + √(T·D).
        let (horizon, dim, bound) = (1024u32, 3usize, 5.0);
        let g: f64 = 3.272554; // privacy-math.md §5, [C]
        for m in [1u32, 2, 7] {
            let delta =
                sensitivity_sq(MechanismKind::SqrtFactorization, horizon, dim, bound, m).sqrt();
            let expected =
                bound * f64::from(m) * g.sqrt() + (f64::from(horizon) * dim as f64).sqrt();
            assert!(
                (delta - expected).abs() < 1e-6 * expected,
                "m={m}: {delta} vs {expected}"
            );
        }
        // privacy-math.md §8 [C], T = 1024: triangle values 1.8090, 7.2361, 28.9443, 115.7773
        // for m = 1, 4, 16, 64, which sit above the contiguous-block norms 1.8090, 6.5716,
        // 23.9549, 85.6579 (a lower bound on the true maximum; R ≥ 0).
        let fine = 2f64.powi(40);
        for (m, triangle, contiguous) in [
            (1u32, 1.8090, 1.8090),
            (4, 7.2361, 6.5716),
            (16, 28.9443, 23.9549),
            (64, 115.7773, 85.6579),
        ] {
            let data_term =
                sensitivity_sq(MechanismKind::SqrtFactorization, 1024, 1, fine, m).sqrt() / fine;
            assert!((data_term - triangle).abs() < 1e-4, "m={m}: {data_term}");
            assert!(data_term >= contiguous - 1e-4);
        }
    }

    #[test]
    fn sqrt_sensitivity_is_never_below_brute_force() {
        // privacy-math.md §8 [D]: for R ≥ 0 the L2 sensitivity is B·max_{|S|≤m} ‖R·1_S‖; the
        // brute-force maximum over all placements (T ≤ 12, R built from binom(2k,k)/4^k via
        // statrs) must not exceed the data term of `sensitivity_sq`.
        for horizon in 1..=12u32 {
            let n = horizon as usize;
            let c: Vec<f64> = (0..n as u64)
                .map(|k| statrs::function::factorial::binomial(2 * k, k) / 4f64.powi(k as i32))
                .collect();
            for m in 1..=3usize.min(n) {
                let fine = 2f64.powi(40);
                let data_term =
                    sensitivity_sq(MechanismKind::SqrtFactorization, horizon, 1, fine, m as u32)
                        .sqrt()
                        / fine;
                let mut best = 0.0f64;
                for mask in 0u32..(1 << n) {
                    if mask.count_ones() as usize != m {
                        continue;
                    }
                    let norm_sq: f64 = (0..n)
                        .map(|row| {
                            let v: f64 = (0..=row)
                                .filter(|&col| mask >> col & 1 == 1)
                                .map(|col| c[row - col])
                                .sum();
                            v * v
                        })
                        .sum();
                    best = best.max(norm_sq.sqrt());
                }
                assert!(
                    data_term >= best * (1.0 - 1e-12),
                    "T={horizon} m={m}: {data_term} < {best}"
                );
            }
        }
    }

    #[test]
    fn independent_sensitivity_and_caps() {
        // One changed leaf moves exactly one released vector by ≤ B: Δ₂² = B²·m.
        let s = sensitivity_sq(MechanismKind::Independent, 100, 4, 3.0, 5);
        assert!((s - 45.0).abs() < 1e-12);
        // More changed leaves than the horizon holds is the same as all of them.
        for kind in MechanismKind::ALL {
            assert_eq!(
                sensitivity_sq(kind, 4, 1, 1.0, 10),
                sensitivity_sq(kind, 4, 1, 1.0, 4),
                "{kind:?}"
            );
            // No changed leaf: only the square-root factorization's rounding term √(T·D) = 2.
            let expected = if kind == MechanismKind::SqrtFactorization {
                4.0
            } else {
                0.0
            };
            assert!(
                (sensitivity_sq(kind, 4, 1, 1.0, 0) - expected).abs() < 1e-12,
                "{kind:?}"
            );
        }
    }

    /// Uniform integer noise for structural tests.
    struct UniformNoise(ChaCha20Rng);

    impl NodeNoise for UniformNoise {
        fn fill(&mut self, _addr: NodeAddr, out: &mut [i128]) {
            for z in out.iter_mut() {
                *z = i128::from(self.0.random_range(-50i64..=50));
            }
        }
    }

    #[test]
    fn estimate_variance_equals_the_objects_variance() {
        // The planner's data-free prediction must be exactly what releases report.
        let (horizon, node_var) = (40u32, 3.7);
        for kind in MechanismKind::ALL {
            for max_trailing in [horizon, 7] {
                let mut mech = new_mechanism(kind, horizon, 2, max_trailing, node_var);
                let mut noise = UniformNoise(ChaCha20Rng::seed_from_u64(9));
                for t in 1..=horizon {
                    mech.push_leaf(&[i128::from(t), -i128::from(t)], &mut noise);
                    assert_eq!(mech.leaves(), t);
                    let kept_from = if kind == MechanismKind::SqrtFactorization {
                        0
                    } else {
                        retained_from(t, max_trailing)
                    };
                    for first in 0..t {
                        for last in first..t {
                            let r = LeafRange { first, last };
                            let answerable = (first == 0 || first >= kept_from)
                                && (last + 1 == t || last >= kept_from);
                            if !answerable {
                                continue;
                            }
                            let reported = mech.estimate(r).variance;
                            let predicted = estimate_variance(kind, horizon, node_var, t, r);
                            assert_eq!(
                                reported, predicted,
                                "{kind:?} M={max_trailing} t={t} {r:?}"
                            );
                        }
                    }
                }
            }
        }
    }

    /// Size of the greedy minimal dyadic cover of `range` (largest aligned node starting at
    /// each point that fits): the plain binary-mechanism estimate of the range.
    fn dyadic_cover_size(range: LeafRange) -> u32 {
        let (mut start, end) = (u64::from(range.first), u64::from(range.last) + 1);
        let mut n_nodes = 0;
        while start < end {
            let mut size = if start == 0 {
                1u64 << 40
            } else {
                1u64 << start.trailing_zeros()
            };
            while start + size > end {
                size /= 2;
            }
            start += size;
            n_nodes += 1;
        }
        n_nodes
    }

    #[test]
    fn tree_estimator_beats_every_plain_estimator() {
        // Gauss–Markov: the BLUE's variance is at most that of any unbiased linear estimator
        // built from the same released nodes, in particular the plain sum over the minimal
        // dyadic cover (privacy-math.md §4: #nodes · σ²), and the noisy leaf alone for a window.
        // Both use only nodes inside [0, t), which exist once t leaves are pushed.
        let horizon = 64;
        for t in 1..=horizon {
            for first in 0..t {
                for last in first..t {
                    let r = LeafRange { first, last };
                    let blue = estimate_variance(MechanismKind::Tree, horizon, 1.0, t, r);
                    let plain = f64::from(dyadic_cover_size(r));
                    assert!(
                        blue <= plain * (1.0 + 1e-12),
                        "t={t} {r:?}: {blue} > {plain}"
                    );
                    assert!(blue <= f64::from(r.n_leaves()) * (1.0 + 1e-12));
                }
            }
        }
        // And the whole epoch beats 1 node: 2^6/(2^7 − 1) at T = 64 (privacy-math.md §4 [D]).
        let whole = estimate_variance(MechanismKind::Tree, 64, 1.0, 64, prefix(64));
        assert!((whole - 64.0 / 127.0).abs() < 1e-15);
        assert_eq!(
            estimate_variance(MechanismKind::Independent, 64, 1.0, 64, prefix(64)),
            64.0
        );
    }

    /// Rounded Gaussian node noise for the calibration tests: round(N(0, σ²)) has variance
    /// σ² + 1/12 up to terms of order e^{−2π²σ²} (Sheppard's correction, W. F. Sheppard 1898;
    /// the exponentially small remainder by Poisson summation, cf. privacy-math.md §3). It
    /// tests the estimators, not the production sampler, and is Gaussian to within the
    /// rounding's 1/12 against σ² = 10^6, so χ² quantiles apply.
    struct RoundedGaussian {
        rng: ChaCha20Rng,
        normal: Normal<f64>,
    }

    const NOISE_SIGMA: f64 = 1000.0;

    fn calibration_node_var() -> f64 {
        NOISE_SIGMA * NOISE_SIGMA + 1.0 / 12.0
    }

    impl NodeNoise for RoundedGaussian {
        fn fill(&mut self, _addr: NodeAddr, out: &mut [i128]) {
            for z in out.iter_mut() {
                *z = self.normal.sample(&mut self.rng).round() as i128;
            }
        }
    }

    /// Running mean and variance (Welford 1962) of one estimate's error over the runs.
    #[derive(Clone, Default)]
    struct Moments {
        n: f64,
        mean: f64,
        m2: f64,
    }

    impl Moments {
        fn add(&mut self, x: f64) {
            self.n += 1.0;
            let delta = x - self.mean;
            self.mean += delta / self.n;
            self.m2 += delta * (x - self.mean);
        }
    }

    /// Monte Carlo calibration: over `n_runs` independent noise draws on fixed data, the
    /// empirical variance of each scope estimate's error (window, epoch to date, trailing
    /// `max_trailing`, each coordinate, at every checkpoint t) must match
    /// `estimate_variance`, and its mean must be within the rounding bias bound.
    ///
    /// Tolerances from theory: the errors are Gaussian (above), so (n−1)s²/V ~ χ²_{n−1}; the
    /// mean error is N(bias, V/n) with |bias| ≤ ½Σ_j|w_j| for the square-root factorization
    /// (rounding of R̂x, module docs of `sqrt`) and 0 otherwise (plus 1e-3 for double-double
    /// arithmetic at values near 2^76). Every check uses a two-sided level of α/n_checks
    /// (Bonferroni), α = 1e-4, so with any seed a correct implementation fails with
    /// probability below 1e-4; the seeds are fixed, so the outcome is deterministic.
    fn calibrate(
        kind: MechanismKind,
        horizon: u32,
        dim: usize,
        max_trailing: u32,
        n_runs: usize,
        checkpoint: impl Fn(u32) -> bool,
    ) {
        assert!((1..=2).contains(&dim));
        let leaves: Vec<[i128; 2]> = (0..horizon)
            .map(|i| {
                [
                    (1i128 << 70) + 12_345 * i128::from(i),
                    -(7 * i128::from(i)) - 3,
                ]
            })
            .collect();
        let checkpoints: Vec<u32> = (1..=horizon).filter(|&t| checkpoint(t)).collect();
        let scopes = |t: u32| [trailing(t, 1), prefix(t), trailing(t, max_trailing)];
        let mut moments = vec![Moments::default(); checkpoints.len() * 3 * dim];
        let mut rng = ChaCha20Rng::seed_from_u64(0x5eed ^ u64::from(horizon));
        for _ in 0..n_runs {
            let mut noise = RoundedGaussian {
                rng: ChaCha20Rng::seed_from_u64(rng.random()),
                normal: Normal::new(0.0, NOISE_SIGMA).expect("valid normal"),
            };
            let mut mech = new_mechanism(kind, horizon, dim, max_trailing, calibration_node_var());
            let mut slot = 0;
            for t in 1..=horizon {
                mech.push_leaf(&leaves[t as usize - 1][..dim], &mut noise);
                if !checkpoint(t) {
                    continue;
                }
                for r in scopes(t) {
                    let estimate = mech.estimate(r);
                    for (coord, value) in estimate.value.iter().enumerate() {
                        let exact: i128 = leaves[r.first as usize..=r.last as usize]
                            .iter()
                            .map(|l| l[coord])
                            .sum();
                        moments[slot].add((*value - Dd::from_i128(exact)).to_f64());
                        slot += 1;
                    }
                }
            }
        }
        let n = n_runs as f64;
        let n_checks = 2.0 * moments.len() as f64;
        let alpha = 1e-4 / n_checks;
        let chi2 = ChiSquared::new(n - 1.0).expect("valid degrees of freedom");
        let (chi_lo, chi_hi) = (
            chi2.inverse_cdf(alpha / 2.0),
            chi2.inverse_cdf(1.0 - alpha / 2.0),
        );
        let z = StdNormal::new(0.0, 1.0)
            .expect("standard normal")
            .inverse_cdf(1.0 - alpha / 2.0);
        let coeffs = sqrt::float_coefficients(horizon);
        let mut slot = 0;
        for &t in &checkpoints {
            for r in scopes(t) {
                let variance = estimate_variance(kind, horizon, calibration_node_var(), t, r);
                let bias_bound = match kind {
                    MechanismKind::SqrtFactorization => {
                        let (a, b) = (r.first as usize, r.last as usize);
                        0.5 * (0..=b)
                            .map(|j| {
                                (coeffs[b - j] - if j < a { coeffs[a - 1 - j] } else { 0.0 }).abs()
                            })
                            .sum::<f64>()
                    }
                    _ => 0.0,
                } + 1e-3;
                for coord in 0..dim {
                    let m = &moments[slot];
                    slot += 1;
                    let statistic = m.m2 / variance; // (n−1)s²/V
                    assert!(
                        (chi_lo..=chi_hi).contains(&statistic),
                        "{kind:?} T={horizon} t={t} {r:?} coord {coord}: (n−1)s²/V = {statistic}, \
                         accepted [{chi_lo}, {chi_hi}]"
                    );
                    let mean_limit = bias_bound + z * (variance / n).sqrt();
                    assert!(
                        m.mean.abs() <= mean_limit,
                        "{kind:?} T={horizon} t={t} {r:?} coord {coord}: mean error {} > {mean_limit}",
                        m.mean
                    );
                }
            }
        }
    }

    #[test]
    fn monte_carlo_tree_variance_matches_prediction_at_t64() {
        calibrate(MechanismKind::Tree, 64, 2, 24, 2000, |_| true);
    }

    #[test]
    fn monte_carlo_sqrt_variance_matches_prediction_at_t64() {
        calibrate(MechanismKind::SqrtFactorization, 64, 2, 24, 2000, |_| true);
    }

    #[test]
    fn monte_carlo_independent_variance_matches_prediction_at_t64() {
        calibrate(MechanismKind::Independent, 64, 2, 24, 2000, |_| true);
    }

    /// Heavier calibration at T = 720 (the contract's example epoch) with a 168-leaf trailing
    /// scope. Run with `cargo test --release -- --ignored monte_carlo_variance_matches_prediction_at_t720`.
    #[test]
    #[ignore]
    fn monte_carlo_variance_matches_prediction_at_t720() {
        for kind in MechanismKind::ALL {
            calibrate(kind, 720, 2, 168, 2000, |t| {
                t.is_multiple_of(7) || t == 720 || t < 4
            });
        }
    }

    /// Heaviest calibration at T = 8760 (a year of hours). The square-root factorization
    /// costs O(T²·D) per run, so it gets one coordinate and 300 runs (the χ² bounds account
    /// for the smaller sample). Run with
    /// `cargo test --release -- --ignored monte_carlo_variance_matches_prediction_at_t8760`.
    #[test]
    #[ignore]
    fn monte_carlo_variance_matches_prediction_at_t8760() {
        let checkpoint = |t: u32| t.is_multiple_of(511) || t == 8760 || t == 8191 || t == 1;
        calibrate(MechanismKind::Tree, 8760, 2, 168, 2000, checkpoint);
        calibrate(MechanismKind::Independent, 8760, 2, 168, 2000, checkpoint);
        calibrate(
            MechanismKind::SqrtFactorization,
            8760,
            1,
            168,
            300,
            checkpoint,
        );
    }
}
