//! The independent mechanism: every leaf gets its own noise, and a range is the sum of its
//! noisy leaves.
//!
//! The baseline the tree and the factorization improve on: a window estimate has one node's
//! variance, but a range of n leaves has n times that. Each changed leaf moves exactly one
//! released vector, so Δ₂² = B²·m (see [`super::sensitivity_sq`]). The mechanism keeps the
//! running total of all noisy leaves and the last `max_trailing` noisy leaves, which answers
//! every answerable range (module docs of [`super`]) in O(max_trailing·D).

use std::collections::VecDeque;

use super::{
    ContinualMechanism, Estimate, LeafRange, NodeAddr, NodeNoise, assert_answerable, retained_from,
};
use crate::engine::dd::Dd;

/// The independent mechanism of one series (module docs).
#[derive(Clone, Debug)]
pub struct IndependentMechanism {
    horizon: u32,
    dim: usize,
    max_trailing: u32,
    node_var: f64,
    n_leaves: u32,
    /// Sum of every noisy leaf so far, per coordinate.
    total: Vec<i128>,
    /// The last min(n_leaves, max_trailing) noisy leaves, oldest first.
    recent: VecDeque<Vec<i128>>,
}

impl IndependentMechanism {
    /// A mechanism over `horizon` leaves of `dim` coordinates whose per-leaf noise has
    /// variance `node_var` (grid units²), answering ranges within the last `max_trailing`
    /// leaves and the epoch to date.
    pub fn new(horizon: u32, dim: usize, max_trailing: u32, node_var: f64) -> IndependentMechanism {
        IndependentMechanism {
            horizon,
            dim,
            max_trailing,
            node_var,
            n_leaves: 0,
            total: vec![0; dim],
            recent: VecDeque::new(),
        }
    }

    /// Σ of the kept noisy leaves `from..=to` (absolute leaf indices, all kept).
    fn sum_recent(&self, from: u32, to: u32, into: &mut [i128], sign: i128) {
        let oldest = self.n_leaves - self.recent.len() as u32;
        for leaf in from..=to {
            let noisy = &self.recent[(leaf - oldest) as usize];
            for (acc, &y) in into.iter_mut().zip(noisy) {
                *acc = acc.saturating_add(sign * y);
            }
        }
    }
}

impl ContinualMechanism for IndependentMechanism {
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
        let mut fresh = vec![0i128; self.dim];
        noise.fill(
            NodeAddr {
                level: 0,
                index: u64::from(self.n_leaves),
            },
            &mut fresh,
        );
        // Saturating: grid values stay far below 2^127 (the stats module bounds them).
        let noisy: Vec<i128> = x
            .iter()
            .zip(&fresh)
            .map(|(&v, &z)| v.saturating_add(z))
            .collect();
        for (acc, &y) in self.total.iter_mut().zip(&noisy) {
            *acc = acc.saturating_add(y);
        }
        if self.max_trailing > 0 {
            if self.recent.len() == self.max_trailing as usize {
                self.recent.pop_front();
            }
            self.recent.push_back(noisy);
        }
        self.n_leaves += 1;
    }

    fn estimate(&self, range: LeafRange) -> Estimate {
        let kept_from = retained_from(self.n_leaves, self.max_trailing);
        assert_answerable(range, self.n_leaves, kept_from);
        let mut sum = vec![0i128; self.dim];
        if range.first >= kept_from {
            self.sum_recent(range.first, range.last, &mut sum, 1);
        } else {
            // Answerable with first < kept_from means first == 0: the total minus the kept
            // leaves after `last` (all kept, since last + 1 == t or last >= kept_from).
            sum.copy_from_slice(&self.total);
            if range.last + 1 < self.n_leaves {
                self.sum_recent(range.last + 1, self.n_leaves - 1, &mut sum, -1);
            }
        }
        Estimate {
            value: sum.into_iter().map(Dd::from_i128).collect(),
            variance: self.node_var * f64::from(range.n_leaves()),
        }
    }

    fn leaves(&self) -> u32 {
        self.n_leaves
    }
}

#[cfg(test)]
mod tests {
    use rand::rngs::ChaCha20Rng;
    use rand::{RngExt, SeedableRng};

    use super::*;

    /// Uniform integer noise that records each leaf's noise for the reference sums.
    struct RecordingNoise {
        rng: ChaCha20Rng,
        given: Vec<Vec<i128>>,
    }

    impl NodeNoise for RecordingNoise {
        fn fill(&mut self, addr: NodeAddr, out: &mut [i128]) {
            assert_eq!(
                (addr.level, addr.index),
                (0, self.given.len() as u64),
                "one node per leaf, in order"
            );
            for z in out.iter_mut() {
                *z = i128::from(self.rng.random_range(-10_000i64..=10_000));
            }
            self.given.push(out.to_vec());
        }
    }

    #[test]
    fn range_estimate_is_the_sum_of_noisy_leaves() {
        // Definition (module docs): the estimate of a range is Σ (x_j + z_j) over its leaves,
        // whether it is read from the kept leaves or as total − later kept leaves.
        let (horizon, dim, max_trailing, node_var) = (30u32, 2usize, 5u32, 4.0);
        let leaves: Vec<Vec<i128>> = (0..horizon)
            .map(|i| vec![(1i128 << 100) + i128::from(i), -i128::from(i * i)])
            .collect();
        let mut noise = RecordingNoise {
            rng: ChaCha20Rng::seed_from_u64(4),
            given: Vec::new(),
        };
        let mut mech = IndependentMechanism::new(horizon, dim, max_trailing, node_var);
        for t in 1..=horizon {
            mech.push_leaf(&leaves[t as usize - 1], &mut noise);
            let kept_from = t.saturating_sub(max_trailing);
            for first in 0..t {
                for last in first..t {
                    if !((first == 0 || first >= kept_from) && (last + 1 == t || last >= kept_from))
                    {
                        continue;
                    }
                    let estimate = mech.estimate(LeafRange { first, last });
                    for (coord, value) in estimate.value.iter().enumerate() {
                        let expected: i128 = (first..=last)
                            .map(|j| leaves[j as usize][coord] + noise.given[j as usize][coord])
                            .sum();
                        assert_eq!(*value, Dd::from_i128(expected), "t={t} {first}..={last}");
                    }
                    assert_eq!(estimate.variance, node_var * f64::from(last - first + 1));
                }
            }
        }
        assert!(mech.recent.len() <= max_trailing as usize);
    }

    #[test]
    fn without_trailing_memory_only_the_epoch_to_date_is_kept() {
        let mut mech = IndependentMechanism::new(10, 1, 0, 1.0);
        let mut noise = RecordingNoise {
            rng: ChaCha20Rng::seed_from_u64(1),
            given: Vec::new(),
        };
        for _ in 0..6 {
            mech.push_leaf(&[5], &mut noise);
        }
        let expected: i128 = noise.given.iter().map(|z| 5 + z[0]).sum();
        assert_eq!(
            mech.estimate(LeafRange { first: 0, last: 5 }).value[0],
            Dd::from_i128(expected)
        );
        assert!(mech.recent.is_empty());
        let refused = std::panic::catch_unwind(|| mech.estimate(LeafRange { first: 5, last: 5 }));
        assert!(refused.is_err(), "a window needs trailing memory");
    }
}
