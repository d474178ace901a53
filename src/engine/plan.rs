//! Release planning: from the validated configuration to every number the privacy
//! guarantee rests on — the budget share, integer grid, sensitivity and noise scale of
//! each statistic — computed once, before any data, and used both by `scrim plan` and by
//! the engine, so that what `plan` predicts is exactly what the releases carry.
//!
//! # The integer grid
//! Noise is the exact discrete Gaussian (Canonne, Kamath & Steinke 2020), which is defined on
//! the integers. Every statistic is therefore accumulated on a power-of-two grid `q = 2^e`:
//! an event's contribution `v` becomes the integer `round(v / q)`, sums are exact `i128`,
//! noise is added in grid units and the release is `q · (noisy integer)`. Sensitivities are
//! computed on the rounded values, so rounding never weakens the guarantee; it only adds a
//! deterministic error of at most `q/2` per event, which the grid choice below keeps far
//! below the noise.
//!
//! The exponent `e` is chosen per component so that the noise standard deviation in grid
//! units lies in `[2^16, 2^28)`: at least `2^16` so that rounding `σ²` up to an integer
//! changes it by less than `2^-32` relatively and the sqrt-factorization's rounding term
//! (`√(T·D)` grid units) stays small against the sensitivity; at most `2^28` so that the
//! sampler's intermediate products fit in `u128` (its slow path handles the rest exactly).
//! Counts are never coarser than 1 (a count of one event is `2^-e ≥ 1` grid units).
//! Sums and the linear kind's moments are also never coarser than the value precision they
//! need (about 40 bits below the largest per-event value, 80 bits for the moments of the
//! linear kind, so that centring exact normal equations keeps enough digits).

use std::fmt;

use crate::config::{Config, FitConfig, Mechanism, StatConfig, StatKind};
use crate::engine::accounting;
use crate::engine::linear;
use crate::engine::mechanism::{self, LeafRange, MechanismKind};
use crate::engine::noise;

/// Which neighbouring relation the guarantee uses.
#[derive(Clone, Debug, PartialEq)]
pub enum PrivacyLevel {
    /// Neighbours differ in one event. Epochs hold disjoint events and compose in parallel.
    Event,
    /// Neighbours differ in all events of one privacy unit. Epochs compose sequentially
    /// against `lifetime_rho`.
    Unit {
        /// The event field that names the unit (e.g. `card`).
        field: String,
        /// zCDP cap over all epochs.
        lifetime_rho: f64,
        /// At most this many events per unit per window survive bounding.
        max_events_per_window: u32,
        /// At most this many windows per unit per epoch survive bounding.
        max_windows_per_epoch: u32,
    },
}

impl PrivacyLevel {
    /// `k`: events one unit can contribute to one window (1 at event level).
    pub fn events_per_window(&self) -> u32 {
        match self {
            PrivacyLevel::Event => 1,
            PrivacyLevel::Unit {
                max_events_per_window,
                ..
            } => *max_events_per_window,
        }
    }

    /// `m`: leaves one unit can touch in one epoch (1 at event level).
    pub fn windows_per_epoch(&self) -> u32 {
        match self {
            PrivacyLevel::Event => 1,
            PrivacyLevel::Unit {
                max_windows_per_epoch,
                ..
            } => *max_windows_per_epoch,
        }
    }
}

/// A released scope of a statistic.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Scope {
    /// The window itself.
    Window,
    /// From the epoch's first window to this one.
    EpochToDate,
    /// The last N windows (clipped at the start of the epoch).
    Trailing(u32),
}

impl Scope {
    /// The `scope` field of the release record.
    pub fn label(&self) -> String {
        match self {
            Scope::Window => "window".to_string(),
            Scope::EpochToDate => "epoch_to_date".to_string(),
            Scope::Trailing(n) => format!("trailing:{n}"),
        }
    }

    /// The leaves this scope covers when leaf `leaf` has just closed.
    pub fn range(&self, leaf: u32) -> LeafRange {
        match self {
            Scope::Window => LeafRange {
                first: leaf,
                last: leaf,
            },
            Scope::EpochToDate => LeafRange {
                first: 0,
                last: leaf,
            },
            Scope::Trailing(n) => LeafRange {
                first: (leaf + 1).saturating_sub(*n),
                last: leaf,
            },
        }
    }
}

/// What one component of a statistic accumulates per event.
#[derive(Clone, Debug, PartialEq)]
pub enum ComponentRole {
    /// One per event.
    Count,
    /// The event's value clamped into `[lo, hi]`.
    Sum {
        /// Index into the parser's numeric fields.
        field: usize,
        /// Clamp range.
        lo: f64,
        /// Clamp range.
        hi: f64,
    },
    /// The clamped value minus the range's midpoint (for means: halves the sensitivity).
    CentredSum {
        /// Index into the parser's numeric fields.
        field: usize,
        /// Clamp range.
        lo: f64,
        /// Clamp range.
        hi: f64,
    },
    /// Packed upper triangle of `z zᵀ`, `z = (1, x, y)` (see [`linear`]).
    Moments {
        /// Indices into the parser's numeric fields of the features.
        features: Vec<usize>,
        /// Index of the target.
        target: usize,
        /// Layout of the packed vector.
        layout: linear::Layout,
        /// Whether `z` starts with the constant 1.
        intercept: bool,
        /// L2 clip of the feature vector.
        feature_norm_bound: f64,
        /// Normalisation units (see [`MomentUnits`]).
        units: MomentUnits,
        /// Per-feature clamps, if configured.
        feature_bounds: Option<Vec<f64>>,
        /// Clamp of |y|.
        target_bound: f64,
    },
}

/// The noise plan of one component (one vector series per group).
#[derive(Clone, Debug)]
pub struct ComponentPlan {
    /// What is accumulated.
    pub role: ComponentRole,
    /// Coordinates per leaf.
    pub dim: usize,
    /// Grid exponent: values are integers in units of `2^grid_exp`.
    pub grid_exp: i32,
    /// Squared L2 norm bound of one event's contribution, grid units².
    pub event_sens_sq: f64,
    /// L2 bound of one unit's contribution to one leaf: `k · √event_sens_sq`.
    pub leaf_bound: f64,
    /// Squared L2 sensitivity of everything the mechanism releases in one epoch, grid units².
    pub sensitivity_sq: f64,
    /// Integer variance parameter of the discrete Gaussian on every node, grid units².
    pub sigma2: u128,
    /// Exact variance of one node's noise, grid units² (slightly below `sigma2`).
    pub node_var: f64,
    /// The zCDP this component really spends per epoch: `sensitivity_sq / (2 sigma2)`.
    pub rho: f64,
}

impl ComponentPlan {
    /// The grid step `q = 2^grid_exp` in value units.
    pub fn quantum(&self) -> f64 {
        2f64.powi(self.grid_exp)
    }

    /// Standard deviation, in value units, of the estimate of `range` after `leaves` leaves.
    pub fn std_error(
        &self,
        mech: MechanismKind,
        horizon: u32,
        leaves: u32,
        range: LeafRange,
    ) -> f64 {
        let var = mechanism::estimate_variance(mech, horizon, self.node_var, leaves, range);
        var.sqrt() * self.quantum()
    }
}

/// The group-by space of a statistic: the cartesian product of its key lists.
#[derive(Clone, Debug, PartialEq)]
pub struct GroupSpace {
    /// (field name, declared keys, index of the field among the parser's categories).
    pub fields: Vec<(String, Vec<String>, usize)>,
}

impl GroupSpace {
    /// Number of groups (1 when ungrouped).
    pub fn len(&self) -> usize {
        self.fields.iter().map(|(_, k, _)| k.len()).product()
    }

    /// True when there are no groups at all (never, for a validated config).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The key of every field for group `g` (mixed radix, first field most significant).
    pub fn keys_of(&self, mut g: usize) -> Vec<(&str, &str)> {
        let mut out = vec![("", ""); self.fields.len()];
        for (i, (name, keys, _)) in self.fields.iter().enumerate().rev() {
            out[i] = (name.as_str(), keys[g % keys.len()].as_str());
            g /= keys.len();
        }
        out
    }
}

/// Everything decided about one statistic before any data.
#[derive(Clone, Debug)]
pub struct StatPlan {
    /// Configured name.
    pub name: String,
    /// `count`, `sum`, `mean` or `linear`.
    pub kind: &'static str,
    /// Group-by space.
    pub groups: GroupSpace,
    /// Released scopes, in release order.
    pub scopes: Vec<Scope>,
    /// This statistic's share of `rho_per_epoch` (by weight).
    pub rho_share: f64,
    /// Components (two for mean: centred sum and count; one otherwise).
    pub components: Vec<ComponentPlan>,
    /// Fit method for the linear kind.
    pub fit: Option<linear::FitMethod>,
    /// Feature names for the linear kind (release keys).
    pub features: Vec<String>,
    /// Intercept for the linear kind.
    pub intercept: bool,
    /// Target name for the linear kind.
    pub target: String,
}

impl StatPlan {
    /// The real zCDP this statistic spends per epoch (≤ `rho_share`).
    pub fn rho(&self) -> f64 {
        self.components.iter().map(|c| c.rho).sum()
    }
}

/// The whole release plan.
#[derive(Clone, Debug)]
pub struct Plan {
    /// Neighbouring relation.
    pub level: PrivacyLevel,
    /// Mechanism for every statistic.
    pub mechanism: MechanismKind,
    /// Leaves per epoch (`T`).
    pub epoch_windows: u32,
    /// Configured zCDP per epoch for all statistics together.
    pub rho_per_epoch: f64,
    /// δ for the reported (ε, δ).
    pub delta: f64,
    /// One entry per statistic, in config order.
    pub stats: Vec<StatPlan>,
    /// Parser categories: (field, domain = union of every stat's keys for that field).
    pub categories: Vec<(String, Vec<String>)>,
    /// Parser numeric fields.
    pub numbers: Vec<String>,
}

/// Why a configuration cannot be planned.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PlanError {
    /// The grid needed for the requested precision would overflow 128-bit accumulators.
    #[error(
        "stats[{stat}]: the noise is so small ({sigma:e} in value units) that the exact integer grid would overflow; lower privacy.rho_per_epoch or widen the bounds"
    )]
    GridOverflow {
        /// Statistic name.
        stat: String,
        /// Noise standard deviation, value units.
        sigma: f64,
    },
}

impl Plan {
    /// Plans the configuration. Pure; depends on nothing but `config`.
    pub fn new(config: &Config) -> Result<Plan, PlanError> {
        let level = match (&config.input.unit_field, &config.privacy.unit_bounds) {
            (Some(field), Some(b)) => PrivacyLevel::Unit {
                field: field.clone(),
                lifetime_rho: b.lifetime_rho,
                max_events_per_window: b.max_events_per_window,
                max_windows_per_epoch: b.max_windows_per_epoch,
            },
            _ => PrivacyLevel::Event,
        };
        let mech = match config.privacy.mechanism {
            Mechanism::Tree => MechanismKind::Tree,
            Mechanism::SqrtFactorization => MechanismKind::SqrtFactorization,
            Mechanism::Independent => MechanismKind::Independent,
        };
        let horizon = config.privacy.epoch_windows;
        let total_weight: f64 = config.stats.iter().map(|s| s.weight).sum();

        let mut categories: Vec<(String, Vec<String>)> = Vec::new();
        let mut numbers: Vec<String> = Vec::new();
        let mut number_index = |name: &str| -> usize {
            if let Some(i) = numbers.iter().position(|n| n == name) {
                i
            } else {
                numbers.push(name.to_string());
                numbers.len() - 1
            }
        };

        let mut stats = Vec::with_capacity(config.stats.len());
        for s in &config.stats {
            let mut fields = Vec::new();
            for g in &s.group_by {
                let cat = match categories.iter().position(|(n, _)| *n == g.field) {
                    Some(i) => {
                        for k in &g.keys {
                            if !categories[i].1.contains(k) {
                                categories[i].1.push(k.clone());
                            }
                        }
                        i
                    }
                    None => {
                        categories.push((g.field.clone(), g.keys.clone()));
                        categories.len() - 1
                    }
                };
                fields.push((g.field.clone(), g.keys.clone(), cat));
            }
            let rho_share = config.privacy.rho_per_epoch * s.weight / total_weight;
            let roles = roles_of(s, &mut number_index);
            let n_roles = roles.len() as f64;
            let mut components = Vec::new();
            for role in roles {
                // Split the statistic's share evenly over its components (mean: ρ/2 each):
                // zCDP composes additively (Bun & Steinke 2016), so the sum is the share.
                let comp = plan_component(role, rho_share / n_roles, &level, mech, horizon)
                    .ok_or_else(|| PlanError::GridOverflow {
                        stat: s.name.clone(),
                        sigma: 0.0,
                    })?;
                components.push(comp);
            }
            let mut scopes = vec![Scope::Window, Scope::EpochToDate];
            for &n in &s.trailing {
                scopes.push(Scope::Trailing(n));
            }
            let (fit, features, intercept, target) = match &s.kind {
                StatKind::Linear(l) => (
                    Some(match l.fit {
                        FitConfig::Ridge { lambda } => linear::FitMethod::Ridge { lambda },
                        FitConfig::L1 { radius } => linear::FitMethod::L1 { radius },
                    }),
                    l.features.clone(),
                    l.intercept,
                    l.target.clone(),
                ),
                _ => (None, Vec::new(), false, String::new()),
            };
            stats.push(StatPlan {
                name: s.name.clone(),
                kind: kind_label(&s.kind),
                groups: GroupSpace { fields },
                scopes,
                rho_share,
                components,
                fit,
                features,
                intercept,
                target,
            });
        }
        Ok(Plan {
            level,
            mechanism: mech,
            epoch_windows: horizon,
            rho_per_epoch: config.privacy.rho_per_epoch,
            delta: config.privacy.delta,
            stats,
            categories,
            numbers,
        })
    }

    /// zCDP really spent by one epoch of releases (≤ `rho_per_epoch`; below it only by the
    /// integer rounding of σ²).
    pub fn rho_spent_per_epoch(&self) -> f64 {
        self.stats.iter().map(StatPlan::rho).sum()
    }

    /// ε of one epoch at the configured δ (Canonne, Kamath & Steinke 2020 conversion).
    pub fn epsilon_per_epoch(&self) -> f64 {
        accounting::epsilon_for(self.rho_per_epoch, self.delta)
    }

    /// How many epochs the lifetime budget covers (None: unlimited, event level).
    pub fn epochs_allowed(&self) -> Option<u64> {
        match &self.level {
            PrivacyLevel::Event => None,
            PrivacyLevel::Unit { lifetime_rho, .. } => {
                // A tiny relative slack absorbs binary rounding of e.g. 8 × 0.5 = 4.0.
                Some(((lifetime_rho / self.rho_per_epoch) * (1.0 + 1e-12)).floor() as u64)
            }
        }
    }

    /// zCDP of the whole deployment: unit level, the epochs the lifetime budget pays for
    /// compose sequentially and zCDP adds up, so `epochs_allowed · rho_per_epoch`
    /// (≤ `lifetime_rho`; additive composition, Bun & Steinke 2016, as the ledger charges);
    /// event level, epochs hold disjoint events and compose in parallel, so one epoch's
    /// `rho_per_epoch` covers the whole stream (privacy-math.md §2).
    pub fn deployment_rho(&self) -> f64 {
        match self.epochs_allowed() {
            Some(n) => n as f64 * self.rho_per_epoch,
            None => self.rho_per_epoch,
        }
    }

    /// Predicted standard error of each component of statistic `stat_idx` in the record of
    /// `scope` released when leaf `leaf` (0-based, as the record's `leaf`) closes: value units,
    /// and the normalised units of [`MomentUnits`] for the linear kind's moments.
    ///
    /// This is the number the engine puts in the record (for counts and sums the record's
    /// `std_error` itself; for the linear kind `statistics.std_error`): the record is released
    /// after `leaf + 1` leaves for the range `scope.range(leaf)`, and both sides evaluate
    /// [`mechanism::estimate_variance`] on the same node variance and grid.
    ///
    /// # Panics
    /// If `stat_idx` is out of range or `leaf >= epoch_windows` (caller bugs: `plan`
    /// validates `--leaf` first).
    pub fn scope_std_errors(&self, stat_idx: usize, scope: Scope, leaf: u32) -> Vec<f64> {
        let range = scope.range(leaf);
        self.stats[stat_idx]
            .components
            .iter()
            .map(|c| c.std_error(self.mechanism, self.epoch_windows, leaf + 1, range))
            .collect()
    }
}

/// Data-free bound on `std_error × count` of a mean record, from the standard errors of its
/// centred-sum and count components and the half-width `h = (hi − lo)/2` of its range.
///
/// The engine reports the mean's std_error by the first-order delta method for the ratio of
/// two independent noisy terms (common practice; the formula in `core.rs`):
/// `se = √(se_S² + r²·se_C²) / C`, where `S` is the noisy centred sum, `C` the noisy count
/// and `r = S/C` the centred mean. Clamping keeps the centred mean within `[−h, h]`, so
/// `se·C ≤ √(se_S² + h²·se_C²)`: a scope holding `n` events has a mean std_error of about
/// this bound divided by `n`, and at most that when its mean sits at an end of the range.
pub fn mean_std_error_times_count(
    sum_std_error: f64,
    count_std_error: f64,
    half_range: f64,
) -> f64 {
    (sum_std_error.powi(2) + (half_range * count_std_error).powi(2)).sqrt()
}

fn kind_label(k: &StatKind) -> &'static str {
    match k {
        StatKind::Count => "count",
        StatKind::Sum { .. } => "sum",
        StatKind::Mean { .. } => "mean",
        StatKind::Linear(_) => "linear",
    }
}

fn roles_of(s: &StatConfig, number_index: &mut impl FnMut(&str) -> usize) -> Vec<ComponentRole> {
    match &s.kind {
        StatKind::Count => vec![ComponentRole::Count],
        StatKind::Sum { field, range } => {
            vec![ComponentRole::Sum {
                field: number_index(field),
                lo: range.0,
                hi: range.1,
            }]
        }
        StatKind::Mean { field, range } => vec![
            ComponentRole::CentredSum {
                field: number_index(field),
                lo: range.0,
                hi: range.1,
            },
            ComponentRole::Count,
        ],
        StatKind::Linear(l) => {
            let features = l.features.iter().map(|f| number_index(f)).collect();
            let target = number_index(&l.target);
            vec![ComponentRole::Moments {
                features,
                target,
                layout: linear::Layout::new(l.features.len(), l.intercept),
                intercept: l.intercept,
                feature_bounds: l.feature_bounds.clone(),
                units: MomentUnits::new(
                    l.features.len(),
                    l.feature_norm_bound,
                    l.feature_bounds.as_deref(),
                    l.target_bound,
                ),
                feature_norm_bound: l.feature_norm_bound,
                target_bound: l.target_bound,
            }]
        }
    }
}

/// The unit in which the linear kind accumulates a clipped quantity with bound `b`: the
/// smallest power of two ≥ b. Dividing by a power of two is exact in floating point, so the
/// normalised data carry no extra rounding (NIST StRD digits are unaffected), and the
/// normalised bound `b / unit` lies in (1/2, 1]. Normalising puts n, Σx, Σy, XᵀX, Xᵀy and
/// yᵀy on comparable scales, so one noise scale serves them all: without it the count n
/// gets noise sized for the largest y², which can swamp it.
pub fn moment_unit(b: f64) -> f64 {
    if b > 0.0 && b.is_finite() {
        2f64.powi(b.log2().ceil() as i32)
    } else {
        1.0
    }
}

/// Units in which the linear kind accumulates its moments: x'_j = x_j / features[j] and
/// y' = y / target, all powers of two (exact division).
#[derive(Clone, Debug, PartialEq)]
pub struct MomentUnits {
    /// Unit of each feature.
    pub features: Vec<f64>,
    /// Unit of the target.
    pub target: f64,
    /// Bound on ‖x'‖₂ after clipping.
    pub x_bound: f64,
    /// Bound on |y'| after clipping.
    pub y_bound: f64,
}

impl MomentUnits {
    /// Units for `n` features with L2 clip `b_x`, optional per-feature clamps, target clip `b_y`.
    ///
    /// Derivation of the normalised bounds: after clamping |x_j| ≤ c_j = min(b_j, b_x) and the
    /// L2 clip ‖x‖ ≤ b_x (which only shrinks coordinates), ‖x'‖² = Σ (x_j/u_j)² is at most
    /// Σ (c_j/u_j)², and also at most ‖x‖²/min_j u_j² ≤ (b_x / min u)²; we take the smaller.
    /// |y'| ≤ b_y / u_y.
    pub fn new(n: usize, b_x: f64, per_feature: Option<&[f64]>, b_y: f64) -> MomentUnits {
        let clamps: Vec<f64> = match per_feature {
            Some(b) => b.iter().map(|v| v.min(b_x)).collect(),
            None => vec![b_x; n],
        };
        let features: Vec<f64> = clamps.iter().map(|c| moment_unit(*c)).collect();
        let by_coord = clamps
            .iter()
            .zip(&features)
            .map(|(c, u)| (c / u).powi(2))
            .sum::<f64>()
            .sqrt();
        let min_unit = features.iter().copied().fold(f64::INFINITY, f64::min);
        let x_bound = by_coord.min(if min_unit.is_finite() {
            b_x / min_unit
        } else {
            0.0
        });
        let target = moment_unit(b_y);
        MomentUnits {
            features,
            target,
            x_bound,
            y_bound: b_y / target,
        }
    }
}

/// Largest |contribution| of one event in value units, and the coordinates per event.
fn value_scale(role: &ComponentRole) -> (f64, usize) {
    match role {
        ComponentRole::Count => (1.0, 1),
        ComponentRole::Sum { lo, hi, .. } => (lo.abs().max(hi.abs()), 1),
        ComponentRole::CentredSum { lo, hi, .. } => ((hi - lo) / 2.0, 1),
        // Moments are accumulated in normalised units (see `moment_units`), where the clip
        // bounds become r_x, r_y ≤ 1, so ‖z‖² ≤ [intercept] + r_x² + r_y² ≤ 3.
        ComponentRole::Moments {
            layout,
            intercept,
            units,
            ..
        } => {
            let (rx, ry) = (units.x_bound, units.y_bound);
            (
                if *intercept { 1.0 } else { 0.0 } + rx * rx + ry * ry,
                layout.dim(),
            )
        }
    }
}

/// Exact squared L2 norm bound of one event's rounded contribution at grid `e`.
///
/// - Count: the contribution is exactly `2^-e` (e ≤ 0), so the bound is `4^-e`.
/// - Sum: `round(clamp(v)/q)` is monotone in `v`, so its largest magnitude is attained at an
///   end of the range: `max(|round(lo/q)|, |round(hi/q)|)²` — exact, no slack needed.
/// - Centred sum: the same with `lo - mid` and `hi - mid` (rounding of `v - mid` is monotone).
/// - Moments: [`linear::event_sensitivity_sq`] (upper-triangle norm ≤ ‖z‖², plus rounding) in
///   normalised units, where the clip bounds are 1.
fn event_sens_sq(role: &ComponentRole, e: i32) -> f64 {
    let q = 2f64.powi(e);
    match role {
        ComponentRole::Count => {
            let c = 2f64.powi(-e);
            c * c
        }
        ComponentRole::Sum { lo, hi, .. } => {
            let m = (lo / q).round().abs().max((hi / q).round().abs());
            m * m
        }
        ComponentRole::CentredSum { lo, hi, .. } => {
            let mid = (lo + hi) / 2.0;
            let m = ((lo - mid) / q)
                .round()
                .abs()
                .max(((hi - mid) / q).round().abs());
            m * m
        }
        ComponentRole::Moments { layout, units, .. } => {
            linear::event_sensitivity_sq(layout, units.x_bound, units.y_bound, e)
        }
    }
}

/// Plans one component for a zCDP share `rho`.
///
/// Derivation of the noise scale. One unit changes at most `m` leaves of the epoch, each by
/// a vector of L2 norm at most `k · S` (k events per window, each of norm ≤ S = √event_sens_sq;
/// triangle inequality, also across groups since one event lands in one group). The
/// mechanism's released node vector then has squared L2 sensitivity
/// `Δ² = mechanism::sensitivity_sq(kind, T, D, k·S, m)` (privacy-math §8), and Gaussian
/// noise of variance σ² on every node gives ρ = Δ²/(2σ²) (Bun & Steinke 2016, Prop. 1.6;
/// for the discrete Gaussian the same ρ holds: Canonne, Kamath & Steinke 2020, Thm 4).
/// σ² is rounded *up* to an integer for the exact sampler, so the ρ actually spent is at
/// most the share.
fn plan_component(
    role: ComponentRole,
    rho: f64,
    level: &PrivacyLevel,
    mech: MechanismKind,
    horizon: u32,
) -> Option<ComponentPlan> {
    let k = f64::from(level.events_per_window());
    let m = level.windows_per_epoch();
    let (scale, dim) = value_scale(&role);
    // σ in value units, ignoring grid rounding: only used to choose the grid.
    let sens_value = mechanism::sensitivity_sq(mech, horizon, 1, k * scale, m);
    let sigma_value = accounting::gaussian_sigma2(sens_value, rho).sqrt();
    let lg = sigma_value.log2();
    let e_lo = lg.floor() as i32 - 16;
    let e_hi = (lg - 28.0).ceil() as i32;
    let e = match &role {
        ComponentRole::Count => e_lo.min(0),
        ComponentRole::Sum { .. } | ComponentRole::CentredSum { .. } => {
            let e_value = scale.log2().floor() as i32 - 40;
            e_value.max(e_hi).min(e_lo)
        }
        ComponentRole::Moments { .. } => {
            let e_value = scale.log2().floor() as i32 - 80;
            e_value.max(e_hi).min(e_lo)
        }
    };
    let event_sens_sq = event_sens_sq(&role, e);
    let leaf_bound = k * event_sens_sq.sqrt();
    let sensitivity_sq = mechanism::sensitivity_sq(mech, horizon, dim, leaf_bound, m);
    let sigma2_real = accounting::gaussian_sigma2(sensitivity_sq, rho);
    if !sigma2_real.is_finite() || sigma2_real >= 2f64.powi(120) {
        return None;
    }
    // Guard the i128 accumulators: a node sums at most T leaves of at most
    // `max_events_per_window × units` events; we require head-room for 2^40 events per node.
    if leaf_bound.log2() + 40.0 + f64::from(horizon).log2() > 120.0 {
        return None;
    }
    let sigma2 = sigma2_real.ceil().max(1.0) as u128;
    let node_var = noise::discrete_gaussian_variance(sigma2 as f64);
    let rho_real = accounting::gaussian_rho(sensitivity_sq, sigma2 as f64);
    Some(ComponentPlan {
        role,
        dim,
        grid_exp: e,
        event_sens_sq,
        leaf_bound,
        sensitivity_sq,
        sigma2,
        node_var,
        rho: rho_real,
    })
}

impl fmt::Display for Scope {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.label())
    }
}
