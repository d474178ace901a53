//! Prints the README's error table: the std_error of each scope at the end of an epoch of
//! T = 720 and T = 8760 windows, for each mechanism at equal ρ, in units of Δ/√(2ρ)
//! (event level, Δ = 1 per window), with the ratio to the plain binary mechanism (tree
//! nodes summed without the optimal estimator).
//!
//! Run: `cargo run --release --example error_table`
//!
//! Everything here is data-free: the same `sensitivity_sq` and `estimate_variance` the
//! planner uses. `tests/calibration.rs` and the mechanism tests check by simulation that
//! released errors match these numbers.

use scrim::engine::mechanism::{self, LeafRange, MechanismKind};

/// Nodes of the plain binary mechanism used for the range [a, b]: its minimal dyadic cover
/// (greedy: the largest aligned block starting at a that fits, repeatedly; privacy-math §4).
fn plain_nodes(a: u32, b: u32) -> u32 {
    let (mut a, mut n) = (u64::from(a), 0);
    let end = u64::from(b) + 1;
    while a < end {
        let mut size = 1u64;
        while a % (size * 2) == 0 && a + size * 2 <= end {
            size *= 2;
        }
        a += size;
        n += 1;
    }
    n
}

/// Node variance that makes one epoch cost ρ when Δ = 1, in units of 1/(2ρ): σ² = Δ₂²/(2ρ).
/// Computed at a fine grid (Δ = 2^30 grid units) so the factorization's rounding term
/// (√T grid units) is negligible, then scaled back to Δ = 1.
fn unit_node_var(k: MechanismKind, horizon: u32) -> f64 {
    let grid = 2f64.powi(30);
    mechanism::sensitivity_sq(k, horizon, 1, grid, 1) / (grid * grid)
}

fn main() {
    println!(
        "std_error at the end of an epoch, in units of Δ/√(2ρ) (event level, one unit per window)"
    );
    println!("ratio = std_error / plain binary mechanism (no optimal estimator)\n");
    let kinds = [
        MechanismKind::Tree,
        MechanismKind::SqrtFactorization,
        MechanismKind::Independent,
    ];
    for horizon in [720u32, 8760] {
        let t = horizon - 1;
        let scopes: [(&str, LeafRange); 4] = [
            ("window", LeafRange { first: t, last: t }),
            (
                "trailing:24",
                LeafRange {
                    first: t - 23,
                    last: t,
                },
            ),
            (
                "trailing:168",
                LeafRange {
                    first: t - 167,
                    last: t,
                },
            ),
            ("epoch_to_date", LeafRange { first: 0, last: t }),
        ];
        println!("T = {horizon} (h = {} levels)", mechanism::levels(horizon));
        print!("| scope | plain tree |");
        for k in kinds {
            print!(" {} | ratio |", k.as_str());
        }
        println!();
        println!("|---|---|{}", "---|---|".repeat(kinds.len()));
        // Plain tree: node σ² = h·Δ²/(2ρ), so in units of Δ/√(2ρ) a node has std √h.
        let h = f64::from(mechanism::levels(horizon));
        for (label, range) in scopes {
            let plain = (h * f64::from(plain_nodes(range.first, range.last))).sqrt();
            print!("| {label} | {plain:.4} |");
            for k in kinds {
                let node_var = unit_node_var(k, horizon);
                let std = mechanism::estimate_variance(k, horizon, node_var, horizon, range).sqrt();
                print!(" {std:.4} | {:.3} |", std / plain);
            }
            println!();
        }
        // Worst case over t of the running total (privacy-math §5 reference values).
        print!("worst-case epoch_to_date over t:");
        let worst_plain = (0..horizon).map(|t| plain_nodes(0, t)).max().unwrap_or(0);
        print!(" plain {:.4};", (h * f64::from(worst_plain)).sqrt());
        for k in kinds {
            let node_var = unit_node_var(k, horizon);
            let worst = (0..horizon)
                .map(|t| {
                    mechanism::estimate_variance(
                        k,
                        horizon,
                        node_var,
                        t + 1,
                        LeafRange { first: 0, last: t },
                    )
                })
                .fold(0.0f64, f64::max)
                .sqrt();
            print!(" {} {worst:.4};", k.as_str());
        }
        println!("\n");
    }
}
