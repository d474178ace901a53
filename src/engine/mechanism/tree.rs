//! The binary (tree) mechanism with the minimum-variance estimator over all released nodes.
//!
//! Release side (Dwork, Naor, Pitassi & Rothblum, STOC 2010; Chan, Shi & Song, TISSEC 2011):
//! every dyadic node [index·2^l, (index+1)·2^l) inside [0, T) gets its exact sum plus fresh
//! noise once, when its last leaf closes.
//!
//! Estimation side (Honaker, "Efficient Use of Differentially Private Binary Trees", 2015;
//! Hay, Rastogi, Miklau & Suciu, VLDB 2010; GLS form in privacy-math.md §4): with y = A·x + e,
//! Cov e = σ²I, the BLUE of a range sum cᵀx is cᵀ(AᵀA)⁻¹Aᵀy. After t leaves the released
//! nodes are exactly the complete subtrees of the binary decomposition of t (one per set bit,
//! from the left); no node straddles two of them, so AᵀA is block diagonal and the BLUE of a
//! range is the sum over subtrees of the BLUE of (range ∩ subtree).
//!
//! Within one complete subtree of height H (2^H leaves), G = AᵀA = Σ_{l≤H} B_l with B_l the
//! block-diagonal all-ones matrix with blocks of 2^l leaves. The Haar basis diagonalises G:
//! B_l·1 = 2^l·1, so the constant vector has eigenvalue 2^{H+1} − 1; the Haar wavelet ψ_b of an
//! internal node b of height j (+1 on its left half, −1 on its right half, ‖ψ_b‖² = 2^j) is
//! annihilated by B_l for l ≥ j (each block holds all of ψ_b or none) and multiplied by 2^l for
//! l < j (each block lies in one half), so its eigenvalue is 2^j − 1. Hence, for a range
//! indicator c,
//!
//! ```text
//! Var(cᵀx̂)/σ² = (c·1)² / (2^H (2^{H+1} − 1)) + Σ_b (c·ψ_b)² / (2^j (2^j − 1))
//! cᵀx̂        = (c·1)·u_root / (2^H (2^{H+1} − 1)) + Σ_b (c·ψ_b)(u_left(b) − u_right(b)) / (2^j (2^j − 1))
//! ```
//!
//! with u_v = Σ_{w ⊆ v} 2^{level(w)}·y_w, because 1ᵀAᵀy = u_root and ψ_bᵀAᵀy = u_left − u_right.
//! u_v is built bottom-up when v completes: u_v = 2^{level v}·y_v + u_left + u_right. Only the
//! nodes b on the two boundary paths of the range have c·ψ_b ≠ 0 (any other node is inside
//! the range or disjoint from it), so an estimate costs O(log T). Checks: a whole subtree
//! gives 2^H/(2^{H+1} − 1) (privacy-math.md §4, \[D\]); a single leaf with H = 1 gives 2/3.
//! Both are unit tests, as is the agreement with dense GLS for all ranges at small T.
//!
//! Memory: the mechanism keeps the current forest roots plus every node that ends after
//! leaf t − M (M = `max_trailing`): at most 2M + 2h nodes. That is enough for every
//! answerable range (proof at `TreeMechanism::add_wavelet_difference`).

use std::collections::VecDeque;

use super::{
    ContinualMechanism, Estimate, LeafRange, NodeAddr, NodeNoise, assert_answerable, levels,
    retained_from,
};
use crate::engine::dd::Dd;

/// Per-coordinate values of one node: inline for scalar series (counts, sums: one
/// coordinate), so the 100,000-group case allocates nothing per node.
type Coords<T> = smallvec::SmallVec<[T; 1]>;

/// What the tree keeps about one released node.
#[derive(Clone, Debug)]
struct NodeState {
    /// Noisy node value y_v = exact sum + noise, one per coordinate.
    noisy: Coords<i128>,
    /// u_v = Σ_{w ⊆ v} 2^{level w}·y_w, one per coordinate (module docs). Kept in
    /// double-double: mathematically an integer, but it can outgrow i128 for extreme inputs.
    weighted: Coords<Dd>,
}

/// The released nodes of one level that are still kept: indices `first_index..`, contiguous
/// because nodes are appended in completion order and only dropped from the front.
#[derive(Clone, Debug, Default)]
struct LevelStore {
    first_index: u64,
    nodes: VecDeque<NodeState>,
}

/// The binary mechanism of one series with the optimal estimator (module docs).
#[derive(Clone, Debug)]
pub struct TreeMechanism {
    horizon: u32,
    dim: usize,
    max_trailing: u32,
    node_var: f64,
    n_leaves: u32,
    /// One store per level 0..h.
    stores: Vec<LevelStore>,
    /// Exact (noise-free) sum of the current forest root at each level, if bit l of the
    /// leaf count is set: the parent's exact sum needs it when the right sibling completes.
    pending_sums: Vec<Option<Coords<i128>>>,
}

impl TreeMechanism {
    /// A tree over `horizon` leaves of `dim` coordinates whose node noise has variance
    /// `node_var` (grid units²), able to answer ranges within the last `max_trailing` leaves.
    pub fn new(horizon: u32, dim: usize, max_trailing: u32, node_var: f64) -> TreeMechanism {
        let h = levels(horizon) as usize;
        TreeMechanism {
            horizon,
            dim,
            max_trailing,
            node_var,
            n_leaves: 0,
            // Built, not cloned: `vec![store; h]` clones the store's `VecDeque` h − 1 times,
            // which was 7% of closing an epoch's first window of 100,000 groups (issue 9).
            stores: (0..h).map(|_| LevelStore::default()).collect(),
            pending_sums: (0..h).map(|_| None).collect(),
        }
    }

    /// Number of nodes currently kept (for the memory bound: ≤ 2·max_trailing + 2h).
    pub fn retained_nodes(&self) -> usize {
        self.stores.iter().map(|store| store.nodes.len()).sum()
    }

    fn node(&self, level: u32, index: u64) -> Option<&NodeState> {
        let store = self.stores.get(level as usize)?;
        let offset = index.checked_sub(store.first_index)?;
        store.nodes.get(usize::try_from(offset).ok()?)
    }

    /// Adds (u_left(b) − u_right(b))·ratio to `value`, coordinate by coordinate, for the
    /// internal node b = (level, index), without materialising the difference (this runs
    /// for every term of every estimate).
    ///
    /// Why the needed nodes are kept. Every wavelet node b with c·ψ_b ≠ 0 overlaps the range
    /// partially, so it contains an end e of the range and a leaf outside it. If that end is
    /// at the epoch edge (first = 0 or last = t − 1), the outside leaf lies beyond the other
    /// end, so b also contains the other end. Hence, for an answerable range that is not the
    /// whole [0, t − 1] (which needs only roots), b contains an end e ≥ t − M, and b ends after
    /// e ≥ t − M, so b is kept; so is its right child, which contains e or lies after it. The
    /// left child may be gone, but u_left = u_b − 2^j·y_b − u_right recovers it.
    fn add_wavelet_difference(&self, level: u32, index: u64, ratio: Dd, value: &mut [Dd]) {
        let right = self.node(level - 1, 2 * index + 1);
        let left = self.node(level - 1, 2 * index);
        match (left, right) {
            (Some(left), Some(right)) => {
                for ((v, &l), &r) in value.iter_mut().zip(&left.weighted).zip(&right.weighted) {
                    *v = *v + (l - r) * ratio;
                }
            }
            _ => {
                // Invariant (proof above): the node and its right child are kept for every
                // answerable range, and `estimate` checks answerability first.
                let node = self
                    .node(level, index)
                    .expect("wavelet node of an answerable range is retained");
                let right = right.expect("right child of an answerable range's node is retained");
                let scale = (1u64 << level) as f64;
                for (((v, &u), &y), &r) in value
                    .iter_mut()
                    .zip(&node.weighted)
                    .zip(&node.noisy)
                    .zip(&right.weighted)
                {
                    *v = *v + (u - Dd::from_i128(y) * scale - r - r) * ratio;
                }
            }
        }
    }

    /// Drops nodes that no answerable range can need any more: those ending at or before
    /// leaf t − M that are not forest roots. O(1) amortised per level.
    fn prune(&mut self) {
        let t = u64::from(self.n_leaves);
        let cutoff = u64::from(retained_from(self.n_leaves, self.max_trailing));
        for (level, store) in self.stores.iter_mut().enumerate() {
            // The last completed node of this level is a forest root iff bit `level` of t is set.
            let last_index = (t >> level).checked_sub(1);
            let root_index = last_index.filter(|_| (t >> level) & 1 == 1);
            while !store.nodes.is_empty() {
                let end = (store.first_index + 1) << level;
                if end > cutoff || Some(store.first_index) == root_index {
                    break;
                }
                store.nodes.pop_front();
                store.first_index += 1;
            }
            if store.nodes.is_empty() {
                // Keep the index contiguous with the next node this level will receive.
                store.first_index = t >> level;
            }
        }
    }
}

/// One term of the GLS estimate of a range within one forest subtree (module docs).
enum Term {
    /// (c·1)·u_root / denominator for the subtree root (level, index).
    Root { level: u32, index: u64, count: u64 },
    /// (c·ψ_b)·(u_left − u_right) / denominator for the internal node (level, index).
    Wavelet { level: u32, index: u64, weight: i64 },
}

impl Term {
    /// The eigenvalue-times-norm denominator: 2^H (2^{H+1} − 1) for the root of a subtree of
    /// height H, 2^j (2^j − 1) for a wavelet at height j.
    fn denominator(&self) -> f64 {
        match *self {
            Term::Root { level, .. } => ((1u64 << level) * ((2u64 << level) - 1)) as f64,
            Term::Wavelet { level, .. } => ((1u64 << level) * ((1u64 << level) - 1)) as f64,
        }
    }

    fn coefficient(&self) -> f64 {
        match *self {
            Term::Root { count, .. } => count as f64,
            Term::Wavelet { weight, .. } => weight as f64,
        }
    }
}

/// Calls `visit` on every non-zero term of the BLUE of `range` after `n_leaves` leaves, in a
/// fixed order (so the variance is computed identically everywhere).
fn for_each_term(n_leaves: u32, range: LeafRange, mut visit: impl FnMut(Term)) {
    let (a, b) = (u64::from(range.first), u64::from(range.last));
    let t = u64::from(n_leaves);
    let mut subtree_start = 0u64;
    // Forest of complete subtrees: one per set bit of t, largest (leftmost) first.
    for height in (0..u64::BITS - t.leading_zeros()).rev() {
        if (t >> height) & 1 == 0 {
            continue;
        }
        let size = 1u64 << height;
        let subtree_end = subtree_start + size; // exclusive
        let (p, q) = (a.max(subtree_start), b.min(subtree_end - 1));
        if p <= q {
            visit(Term::Root {
                level: height,
                index: subtree_start >> height,
                count: q - p + 1,
            });
            // A fully covered subtree has c·ψ_b = 0 for all its wavelets, so only the (at
            // most two) partially covered subtrees walk their paths: O(log T) overall.
            let partial = p > subtree_start || q < subtree_end - 1;
            for level in (1..=height).filter(|_| partial) {
                let (index_p, index_q) = (p >> level, q >> level);
                let path_nodes = if index_p == index_q { 1 } else { 2 };
                for index in [index_p, index_q].into_iter().take(path_nodes) {
                    let lo = index << level;
                    let mid = lo + (1u64 << (level - 1));
                    let hi = lo + (1u64 << level);
                    let overlap = |from: u64, to: u64| -> i64 {
                        // |[p, q] ∩ [from, to)|
                        let (s, e) = (p.max(from), (q + 1).min(to));
                        e.saturating_sub(s) as i64
                    };
                    let weight = overlap(lo, mid) - overlap(mid, hi);
                    if weight != 0 {
                        visit(Term::Wavelet {
                            level,
                            index,
                            weight,
                        });
                    }
                }
            }
        }
        subtree_start = subtree_end;
    }
}

/// Variance of the tree's estimate of `range` after `n_leaves` leaves, in units of the node
/// noise variance: Σ_terms coefficient² / denominator (module docs). O(log T).
pub fn unit_variance(n_leaves: u32, range: LeafRange) -> f64 {
    let mut total = 0.0;
    for_each_term(n_leaves, range, |term| {
        let coefficient = term.coefficient();
        total += coefficient * coefficient / term.denominator();
    });
    total
}

impl ContinualMechanism for TreeMechanism {
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
        let mut exact_sum: Coords<i128> = x.iter().copied().collect();
        let mut level = 0u32;
        let mut index = u64::from(self.n_leaves);
        let mut fresh: Coords<i128> = smallvec::smallvec![0i128; self.dim];
        loop {
            // Node (level, index) completes now: its last leaf is the one being pushed, and it
            // lies inside [0, T) because that leaf does.
            noise.fill(
                NodeAddr {
                    level: level as u8,
                    index,
                },
                &mut fresh,
            );
            // Saturating: grid sums stay far below 2^127 for any sane grid (the stats module
            // bounds leaf values); saturation rather than wrap-around if not.
            let noisy: Coords<i128> = exact_sum
                .iter()
                .zip(&fresh)
                .map(|(&s, &z)| s.saturating_add(z))
                .collect();
            let scale = (1u64 << level) as f64;
            let mut weighted: Coords<Dd> =
                noisy.iter().map(|&y| Dd::from_i128(y) * scale).collect();
            if level > 0 {
                // Both children are kept: the right one was stored in this very push, and the
                // left one has been a forest root (never pruned) since it completed.
                for child in [2 * index, 2 * index + 1] {
                    let child_state = self
                        .node(level - 1, child)
                        .expect("children of a completing node are retained");
                    for (w, &u) in weighted.iter_mut().zip(&child_state.weighted) {
                        *w = *w + u;
                    }
                }
            }
            let store = &mut self.stores[level as usize];
            debug_assert_eq!(store.first_index + store.nodes.len() as u64, index);
            store.nodes.push_back(NodeState { noisy, weighted });
            if index % 2 == 0 {
                // A left child (or a node without a parent inside [0, T)) becomes a forest root.
                self.pending_sums[level as usize] = Some(exact_sum);
                break;
            }
            // A right child completes its parent. The left sibling is the current forest root
            // of this level, so its exact sum is pending.
            let left_sum = self.pending_sums[level as usize]
                .take()
                .expect("left sibling of a right child is the pending forest root");
            for (s, l) in exact_sum.iter_mut().zip(left_sum) {
                *s = s.saturating_add(l);
            }
            level += 1;
            index /= 2;
        }
        self.n_leaves += 1;
        self.prune();
    }

    fn estimate(&self, range: LeafRange) -> Estimate {
        assert_answerable(
            range,
            self.n_leaves,
            retained_from(self.n_leaves, self.max_trailing),
        );
        let mut value: Coords<Dd> = smallvec::smallvec![Dd::ZERO; self.dim];
        for_each_term(self.n_leaves, range, |term| {
            // Both are small exact integers; one double-double division per term.
            let ratio = Dd::from_f64(term.coefficient()) / Dd::from_f64(term.denominator());
            match term {
                Term::Root { level, index, .. } => {
                    let root = self
                        .node(level, index)
                        // Forest roots are never pruned.
                        .expect("forest root is retained");
                    for (v, &part) in value.iter_mut().zip(&root.weighted) {
                        *v = *v + part * ratio;
                    }
                }
                Term::Wavelet { level, index, .. } => {
                    self.add_wavelet_difference(level, index, ratio, &mut value);
                }
            }
        });
        Estimate {
            value,
            variance: self.node_var * unit_variance(self.n_leaves, range),
        }
    }

    fn leaves(&self) -> u32 {
        self.n_leaves
    }
}

#[cfg(test)]
mod tests {
    use std::collections::HashMap;

    use nalgebra::{DMatrix, DVector};
    use rand::rngs::ChaCha20Rng;
    use rand::{RngExt, SeedableRng};

    use super::*;

    /// Uniform integer noise that remembers what it gave each node, and checks that no node
    /// is noised twice (the `NodeNoise` contract).
    struct RecordingNoise {
        rng: ChaCha20Rng,
        given: HashMap<(u8, u64), Vec<i128>>,
    }

    impl RecordingNoise {
        fn new(seed: u64) -> RecordingNoise {
            RecordingNoise {
                rng: ChaCha20Rng::seed_from_u64(seed),
                given: HashMap::new(),
            }
        }
    }

    impl NodeNoise for RecordingNoise {
        fn fill(&mut self, addr: NodeAddr, out: &mut [i128]) {
            for z in out.iter_mut() {
                *z = i128::from(self.rng.random_range(-1000i64..=1000));
            }
            let previous = self.given.insert((addr.level, addr.index), out.to_vec());
            assert!(previous.is_none(), "node {addr:?} noised twice");
        }
    }

    fn range(first: u32, last: u32) -> LeafRange {
        LeafRange { first, last }
    }

    #[test]
    fn levels_is_floor_log2_plus_one() {
        // privacy-math.md §4 [D]: h = ⌊log₂ T⌋ + 1, e.g. 14 for T = 8760 (tree.py prints 14).
        for (horizon, h) in [
            (1, 1),
            (2, 2),
            (3, 2),
            (4, 3),
            (64, 7),
            (1023, 10),
            (1024, 11),
            (8760, 14),
        ] {
            assert_eq!(levels(horizon), h, "T = {horizon}");
        }
    }

    #[test]
    fn closed_forms_for_whole_subtree_and_single_leaf() {
        // privacy-math.md §4 [D, checked against GLS for h ≤ 8 by tree.py, C]: the BLUE of a
        // complete subtree's total has variance v_H = 2^H / (2^{H+1} − 1); for H = 1 a single
        // leaf has 2/3 (1/6 from the root direction plus 1/2 from the one wavelet).
        for height in 0..=13u32 {
            let size = 1u32 << height;
            let expected = f64::from(size) / f64::from(2 * size - 1);
            let got = unit_variance(size, range(0, size - 1));
            assert!(
                (got - expected).abs() < 1e-15,
                "H = {height}: {got} vs {expected}"
            );
        }
        assert!((unit_variance(2, range(0, 0)) - 2.0 / 3.0).abs() < 1e-15);
        assert!((unit_variance(2, range(1, 1)) - 2.0 / 3.0).abs() < 1e-15);
    }

    #[test]
    fn online_prefix_variance_matches_privacy_math_table() {
        // privacy-math.md §4 table, [C] (tree.py, `honaker_online`): max and mean over
        // t = 1..T of the prefix variance with unit node noise.
        for (horizon, max_expected, mean_expected) in [
            (64u32, 3.795494, 1.905621),
            (1024, 5.802859, 2.901918),
            (8760, 7.303287, 3.617159),
        ] {
            let variances: Vec<f64> = (1..=horizon)
                .map(|t| unit_variance(t, range(0, t - 1)))
                .collect();
            let max = variances.iter().copied().fold(0.0, f64::max);
            let mean = variances.iter().sum::<f64>() / f64::from(horizon);
            assert!(
                (max - max_expected).abs() < 1e-6,
                "T = {horizon}: max {max}"
            );
            assert!(
                (mean - mean_expected).abs() < 1e-6,
                "T = {horizon}: mean {mean}"
            );
        }
    }

    /// Dense GLS after `t` leaves (privacy-math.md §4, \[D\]; Honaker 2015): builds the 0/1
    /// node-by-leaf matrix A of every node ending at or before t, solves (AᵀA) x̂ = Aᵀy with
    /// a Cholesky factorisation, and returns x̂ and (AᵀA)⁻¹.
    fn dense_gls(
        t: u32,
        leaves: &[i128],
        noise: &HashMap<(u8, u64), Vec<i128>>,
    ) -> (DVector<f64>, DMatrix<f64>) {
        let n = t as usize;
        let mut rows: Vec<(Vec<f64>, f64)> = Vec::new();
        for level in 0..levels(t) {
            let size = 1usize << level;
            for index in 0..n / size {
                let mut row = vec![0.0; n];
                let mut exact = 0i128;
                for leaf in index * size..(index + 1) * size {
                    row[leaf] = 1.0;
                    exact += leaves[leaf];
                }
                let z = noise[&(level as u8, index as u64)][0];
                rows.push((row, (exact + z) as f64));
            }
        }
        let a = DMatrix::from_fn(rows.len(), n, |i, j| rows[i].0[j]);
        let y = DVector::from_iterator(rows.len(), rows.iter().map(|r| r.1));
        let gram = a.transpose() * &a;
        let cholesky = gram
            .clone()
            .cholesky()
            .expect("AᵀA is positive definite (leaves are rows)");
        let x_hat = cholesky.solve(&(a.transpose() * y));
        (x_hat, cholesky.inverse())
    }

    #[test]
    fn estimates_equal_dense_gls_for_all_ranges_and_pushed_counts() {
        // Reference: the textbook GLS/BLUE x̂ = (AᵀA)⁻¹Aᵀy and Var(cᵀx̂) = σ²·cᵀ(AᵀA)⁻¹c
        // (privacy-math.md §4 [D]; Honaker 2015), computed densely with nalgebra. The
        // closed-form Haar estimator must reproduce both for every range and every t.
        let node_var = 2.5;
        for horizon in [1u32, 2, 3, 5, 8, 13, 16] {
            let mut rng = ChaCha20Rng::seed_from_u64(u64::from(horizon));
            let leaves: Vec<i128> = (0..horizon)
                .map(|_| i128::from(rng.random_range(0i64..=500)))
                .collect();
            let mut noise = RecordingNoise::new(1000 + u64::from(horizon));
            let mut tree = TreeMechanism::new(horizon, 1, horizon, node_var);
            // A pruned twin with the same noise must give the same answers where answerable.
            let mut pruned_noise = RecordingNoise::new(1000 + u64::from(horizon));
            let max_trailing = 2;
            let mut pruned = TreeMechanism::new(horizon, 1, max_trailing, node_var);
            for t in 1..=horizon {
                tree.push_leaf(&[leaves[t as usize - 1]], &mut noise);
                pruned.push_leaf(&[leaves[t as usize - 1]], &mut pruned_noise);
                let (x_hat, gram_inv) = dense_gls(t, &leaves, &noise.given);
                for first in 0..t {
                    for last in first..t {
                        let r = range(first, last);
                        let estimate = tree.estimate(r);
                        let (f, l) = (first as usize, last as usize);
                        let gls_value: f64 = x_hat.rows(f, l - f + 1).sum();
                        let gls_var =
                            node_var * gram_inv.view((f, f), (l - f + 1, l - f + 1)).sum();
                        let value = estimate.value[0].to_f64();
                        assert!(
                            (value - gls_value).abs() < 1e-8 * (1.0 + gls_value.abs()),
                            "T={horizon} t={t} {r:?}: {value} vs GLS {gls_value}"
                        );
                        assert!(
                            (estimate.variance - gls_var).abs() < 1e-10 * gls_var,
                            "T={horizon} t={t} {r:?}: var {} vs GLS {gls_var}",
                            estimate.variance
                        );
                        let kept_from = t.saturating_sub(max_trailing);
                        let answerable = (first == 0 || first >= kept_from)
                            && (last + 1 == t || last >= kept_from);
                        if answerable {
                            let twin = pruned.estimate(r);
                            assert!(
                                (twin.value[0].to_f64() - value).abs() < 1e-9 * (1.0 + value.abs())
                            );
                            assert_eq!(twin.variance, estimate.variance);
                        }
                    }
                }
            }
            // Every dyadic node inside [0, T) was noised exactly once (RecordingNoise checks
            // "once"; the count is Σ_l ⌊T/2^l⌋).
            let n_nodes: u32 = (0..levels(horizon)).map(|l| horizon >> l).sum();
            assert_eq!(noise.given.len(), n_nodes as usize);
        }
    }

    /// Noise that is always zero, for tests about structure rather than randomness.
    struct ZeroNoise;

    impl NodeNoise for ZeroNoise {
        fn fill(&mut self, _addr: NodeAddr, out: &mut [i128]) {
            out.fill(0);
        }
    }

    #[test]
    fn large_values_keep_double_double_precision() {
        // With zero noise the BLUE is exact: every estimate must return the exact range sum
        // even when the sums are near 2^96, where f64 alone would lose the low 44 bits.
        let horizon = 37;
        let leaves: Vec<[i128; 2]> = (0..horizon)
            .map(|i| {
                [
                    (1i128 << 90) + 7919 * i128::from(i),
                    -(i128::from(i) * 3) - 1,
                ]
            })
            .collect();
        let mut tree = TreeMechanism::new(horizon, 2, horizon, 1.0);
        for (t, leaf) in (1..=horizon).zip(&leaves) {
            tree.push_leaf(leaf, &mut ZeroNoise);
            for first in 0..t {
                for last in first..t {
                    let estimate = tree.estimate(range(first, last));
                    for coord in 0..2 {
                        let exact: i128 = leaves[first as usize..=last as usize]
                            .iter()
                            .map(|l| l[coord])
                            .sum();
                        let error = (estimate.value[coord] - Dd::from_i128(exact)).to_f64();
                        assert!(
                            error.abs() < 1e-3,
                            "t={t} {first}..={last} coord {coord}: error {error}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn pruned_tree_keeps_o_of_trailing_plus_log_nodes() {
        // Memory bound (module docs): nodes ending in (t − M, t] number ≤ ⌊M/2^l⌋ + 1 per level,
        // ≤ 2M + h in total, plus ≤ h forest roots: 2M + 2h = 364 for M = 168, T = 8760.
        let (horizon, max_trailing) = (8760u32, 168u32);
        let bound = 2 * max_trailing as usize + 2 * levels(horizon) as usize;
        let mut pruned = TreeMechanism::new(horizon, 1, max_trailing, 1.0);
        let mut full = TreeMechanism::new(horizon, 1, horizon, 1.0);
        let mut noise_a = RecordingNoise::new(5);
        let mut noise_b = RecordingNoise::new(5);
        let mut most = 0;
        for t in 1..=horizon {
            let x = [i128::from(t % 97) * 1000];
            pruned.push_leaf(&x, &mut noise_a);
            full.push_leaf(&x, &mut noise_b);
            most = most.max(pruned.retained_nodes());
            if t % 731 == 0 || t == horizon {
                // The release scopes still work and agree with the unpruned tree.
                for r in [
                    range(t - 1, t - 1),
                    range(0, t - 1),
                    range(t.saturating_sub(168), t - 1),
                    range(t.saturating_sub(24), t - 1),
                ] {
                    let (a, b) = (pruned.estimate(r), full.estimate(r));
                    assert!(
                        (a.value[0] - b.value[0]).to_f64().abs() < 1e-6,
                        "t={t} {r:?}"
                    );
                    assert_eq!(a.variance, b.variance);
                }
            }
        }
        assert!(most <= bound, "kept {most} nodes, bound {bound}");
        assert_eq!(
            full.retained_nodes(),
            (0..14).map(|l| 8760usize >> l).sum::<usize>()
        );
    }

    #[test]
    #[should_panic(expected = "no longer keeps")]
    fn pruned_range_is_refused() {
        let mut tree = TreeMechanism::new(64, 1, 4, 1.0);
        for _ in 0..40 {
            tree.push_leaf(&[1], &mut ZeroNoise);
        }
        let _ = tree.estimate(range(10, 12));
    }
}
