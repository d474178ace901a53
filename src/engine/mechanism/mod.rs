//! Continual-release mechanisms: how one series of window aggregates (leaves) becomes
//! noisy running totals, window values and trailing sums from one privacy budget.
//!
//! All three mechanisms implement [`ContinualMechanism`]; values are integer grid units
//! (see `engine::stats` for the grid) and noise is the exact discrete Gaussian.
//! OWNER: mechanisms helper. Interface fixed by the lead; see the helper prompt.
