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
        /// Clipping, centring and normalisation (see [`MomentUnits`]).
        units: MomentUnits,
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
        // Built from the exponent bits: the same exact power of two as `2f64.powi`, without
        // its loop (this runs per event and sum). Grid exponents are within
        // `linear::GRID_EXP_RANGE`, inside the normal range.
        linear::pow2(self.grid_exp)
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
                    .map_err(|sigma| PlanError::GridOverflow {
                        stat: s.name.clone(),
                        sigma,
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
                units: MomentUnits::new(l),
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

/// How the linear kind turns a raw event (x, y) into the normalised, clipped vector it
/// accumulates: x'_j = (x_j − c_j)/u_j and y' = (y − c_y)/u_y, with units u that are powers
/// of two (exact division) and centres c.
///
/// Two configurations:
/// - *Symmetric* (no `feature_ranges`): each feature is clamped to |x_j| ≤ min(b_j, B_x)
///   (`feature_bounds`, else B_x = `feature_norm_bound`), then the vector is L2-clipped to B_x
///   (which only shrinks coordinates, so the clamps still hold). Centres are 0.
/// - *Ranges* (`feature_ranges`): x is L2-clipped to B_x first, then each feature is clamped
///   into [lo_j, hi_j]. With an intercept, the centre is the midpoint c_j = (lo_j + hi_j)/2.
///   Without one it is 0, because without the constant column the centred moments could not
///   be mapped back to Σxxᵀ.
///
/// The target is clamped to |y| ≤ B_y, then into `target_range` when given, and centred on
/// its midpoint under the same rule.
///
/// Why centre. The noise is sized for the largest possible |x'_j| ≤ 1, but the fit depends
/// on the spread of x'. A feature whose values lie in [0, 30] and that is bounded
/// symmetrically by 30 uses half of the normalised range at most; centred on 15 with unit 16
/// instead of 32, the same data have four times the second moments against the same noise.
/// The centres come from the configuration, never from the data, so they cost no budget, and
/// with an intercept the fit is equivariant under the shift: slopes are unchanged and the
/// intercept is mapped back exactly ([`linear::fit_shifted`]).
#[derive(Clone, Debug, PartialEq)]
pub struct MomentUnits {
    /// Unit u_j of each feature.
    pub features: Vec<f64>,
    /// Unit u_y of the target.
    pub target: f64,
    /// Centre c_j of each feature (0 unless ranges and an intercept).
    pub feature_centres: Vec<f64>,
    /// Centre c_y of the target.
    pub target_centre: f64,
    /// Per-feature clamp interval [lo_j, hi_j] in value units.
    pub feature_clamps: Vec<(f64, f64)>,
    /// The order of the clip steps.
    pub order: ClipOrder,
    /// The L2 clip B_x of the raw feature vector.
    pub feature_norm_bound: f64,
    /// Clamp interval of the target in value units.
    pub target_clamp: (f64, f64),
    /// Bound on ‖x'‖₂ after normalisation.
    pub x_bound: f64,
    /// Bound on |y'| after normalisation.
    pub y_bound: f64,
}

/// The order of the clip steps of [`MomentUnits::normalise`] (see [`MomentUnits`]).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ClipOrder {
    /// Only the L2 clip of x (no per-feature clamps configured).
    NormOnly,
    /// Symmetric `feature_bounds`: clamp each feature, then the L2 clip.
    ClampThenNorm,
    /// `feature_ranges`: the L2 clip, then clamp each feature into its range.
    NormThenClamp,
}

impl MomentUnits {
    /// The units, centres and bounds of a linear model's configuration.
    ///
    /// Derivation of the normalised bounds. After clamping, |x_j − c_j| ≤ h_j with
    /// h_j = max(|lo_j − c_j|, |hi_j − c_j|), so ‖x'‖² ≤ Σ (h_j/u_j)². In the symmetric
    /// configuration the L2 clip also gives ‖x'‖ ≤ ‖x‖/min_j u_j ≤ B_x / min u, and we take the
    /// smaller. With ranges the clamp comes last and may move x away from 0, so only the
    /// per-coordinate bound is used. |y'| ≤ h_y / u_y likewise. Rounding in the subtraction
    /// and division is covered by the final re-clip in [`MomentUnits::normalise`].
    pub fn new(l: &crate::config::LinearConfig) -> MomentUnits {
        let b_x = l.feature_norm_bound;
        let n = l.features.len();
        let (feature_clamps, order): (Vec<(f64, f64)>, ClipOrder) =
            match (&l.feature_ranges, &l.feature_bounds) {
                (Some(r), _) => (r.clone(), ClipOrder::NormThenClamp),
                (None, Some(b)) => (
                    b.iter().map(|v| (-v.min(b_x), v.min(b_x))).collect(),
                    ClipOrder::ClampThenNorm,
                ),
                (None, None) => (vec![(-b_x, b_x); n], ClipOrder::NormOnly),
            };
        let ranges = order == ClipOrder::NormThenClamp;
        let centre =
            |(lo, hi): (f64, f64), use_mid: bool| if use_mid { lo / 2.0 + hi / 2.0 } else { 0.0 };
        let feature_centres: Vec<f64> = feature_clamps
            .iter()
            .map(|&c| centre(c, ranges && l.intercept))
            .collect();
        let half_width = |(lo, hi): (f64, f64), c: f64| (lo - c).abs().max((hi - c).abs());
        let half_widths: Vec<f64> = feature_clamps
            .iter()
            .zip(&feature_centres)
            .map(|(&r, &c)| half_width(r, c))
            .collect();
        let features: Vec<f64> = half_widths.iter().map(|h| moment_unit(*h)).collect();
        let by_coord = half_widths
            .iter()
            .zip(&features)
            .map(|(h, u)| (h / u).powi(2))
            .sum::<f64>()
            .sqrt();
        let min_unit = features.iter().copied().fold(f64::INFINITY, f64::min);
        let x_bound = if ranges || !min_unit.is_finite() {
            by_coord
        } else {
            by_coord.min(b_x / min_unit)
        };
        let b_y = l.target_bound;
        let target_clamp = l.target_range.unwrap_or((-b_y, b_y));
        let target_centre = centre(target_clamp, l.target_range.is_some() && l.intercept);
        let h_y = half_width(target_clamp, target_centre);
        let target = moment_unit(h_y);
        MomentUnits {
            features,
            target,
            feature_centres,
            target_centre,
            feature_clamps,
            order,
            feature_norm_bound: b_x,
            target_clamp,
            x_bound,
            y_bound: h_y / target,
        }
    }

    /// Whether any centre is non-zero (the fit must then map the intercept back).
    pub fn is_centred(&self) -> bool {
        self.target_centre != 0.0 || self.feature_centres.iter().any(|c| *c != 0.0)
    }

    /// Clips, centres and normalises one event's raw (x, y) in place, as described on
    /// [`MomentUnits`]. Non-finite inputs become harmless first ([`linear::clip`]). The final
    /// re-clip to (`x_bound`, `y_bound`) is a no-op in exact arithmetic; it guarantees the
    /// planned bounds under rounding, so the sensitivity holds for every output.
    pub fn normalise(&self, x: &mut [f64], y: &mut f64) {
        let clamp_all = |x: &mut [f64]| {
            for (v, &(lo, hi)) in x.iter_mut().zip(&self.feature_clamps) {
                *v = v.clamp(lo, hi);
            }
        };
        let b_y = self.target_clamp.0.abs().max(self.target_clamp.1.abs());
        match self.order {
            ClipOrder::NormOnly => linear::clip(x, y, self.feature_norm_bound, b_y),
            // A NaN survives `clamp` and is zeroed by `clip`; ±∞ is clamped to the bound.
            ClipOrder::ClampThenNorm => {
                clamp_all(x);
                linear::clip(x, y, self.feature_norm_bound, b_y);
            }
            ClipOrder::NormThenClamp => {
                linear::clip(x, y, self.feature_norm_bound, b_y);
                clamp_all(x);
            }
        }
        *y = y.clamp(self.target_clamp.0, self.target_clamp.1);
        for ((v, u), c) in x.iter_mut().zip(&self.features).zip(&self.feature_centres) {
            *v = (*v - c) / u;
        }
        *y = (*y - self.target_centre) / self.target;
        linear::clip(x, y, self.x_bound, self.y_bound);
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
/// Err carries σ in value units when the grid needed for it would overflow the accumulators
/// (the noise is too small for the data's range).
fn plan_component(
    role: ComponentRole,
    rho: f64,
    level: &PrivacyLevel,
    mech: MechanismKind,
    horizon: u32,
) -> Result<ComponentPlan, f64> {
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
            // The finest grid the accumulators allow (the guard below): one leaf of k events
            // must stay below 2^(80 − log2 T) grid units, with one bit for the rounding
            // margin of `event_sens_sq`. Only binding when σ is tiny (e_hi below it).
            let e_value =
                (k * scale).log2().ceil() as i32 + f64::from(horizon).log2().ceil() as i32 + 1 - 80;
            e_value.max(e_hi).min(e_lo)
        }
    };
    let event_sens_sq = event_sens_sq(&role, e);
    let leaf_bound = k * event_sens_sq.sqrt();
    let sensitivity_sq = mechanism::sensitivity_sq(mech, horizon, dim, leaf_bound, m);
    let sigma2_real = accounting::gaussian_sigma2(sensitivity_sq, rho);
    if !sigma2_real.is_finite() || sigma2_real >= 2f64.powi(120) {
        return Err(sigma_value);
    }
    // Guard the i128 accumulators: a node sums at most T leaves of at most
    // `max_events_per_window × units` events; we require head-room for 2^40 events per node.
    if leaf_bound.log2() + 40.0 + f64::from(horizon).log2() > 120.0 {
        return Err(sigma_value);
    }
    let sigma2 = sigma2_real.ceil().max(1.0) as u128;
    let node_var = noise::discrete_gaussian_variance(sigma2 as f64);
    let rho_real = accounting::gaussian_rho(sensitivity_sq, sigma2 as f64);
    Ok(ComponentPlan {
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{Config, StatKind};
    use proptest::prelude::*;

    /// The linear configurations of the three clip orders (and a range without 0, without
    /// an intercept).
    fn linear_units() -> Vec<MomentUnits> {
        let toml = r#"
[input]
time_field = "ts"
[window]
length = "1h"
[privacy]
rho_per_epoch = 1.0
delta = 1e-9
epoch_windows = 4
[[stats]]
name = "plain"
kind = "linear"
target = "y"
features = ["a", "b"]
feature_norm_bound = 10.0
target_bound = 30.0
[[stats]]
name = "bounds"
kind = "linear"
target = "y"
features = ["a", "b"]
feature_norm_bound = 10.0
feature_bounds = [3.0, 50.0]
target_bound = 30.0
[[stats]]
name = "ranges"
kind = "linear"
target = "y"
features = ["a", "b"]
feature_norm_bound = 40.0
feature_ranges = [[0.0, 30.0], [-1.5, 4.0]]
target_bound = 120.0
target_range = [10.0, 120.0]
[[stats]]
name = "ranges_no_intercept"
kind = "linear"
target = "y"
features = ["a", "b"]
intercept = false
feature_norm_bound = 40.0
feature_ranges = [[5.0, 30.0], [1.0, 4.0]]
target_bound = 120.0
"#;
        let cfg = Config::from_toml_str(toml).expect("valid config");
        cfg.stats
            .iter()
            .map(|s| match &s.kind {
                StatKind::Linear(l) => MomentUnits::new(l),
                _ => unreachable!("only linear stats"),
            })
            .collect()
    }

    #[test]
    fn units_centres_and_bounds_follow_the_derivation() {
        let u = linear_units();
        // Symmetric: unit 16 ≥ 10 for both; ‖x'‖ ≤ min(√2·10/16, 10/16) = 0.625; y: 30/32.
        assert_eq!(u[0].features, vec![16.0, 16.0]);
        assert_eq!(u[0].order, ClipOrder::NormOnly);
        assert!((u[0].x_bound - 0.625).abs() < 1e-15);
        assert!((u[0].y_bound - 30.0 / 32.0).abs() < 1e-15);
        // Per-feature bounds: clamps 3 and min(50, 10) = 10, units 4 and 16;
        // ‖x'‖ ≤ min(√((3/4)² + (10/16)²), 10/4) = √(0.5625 + 0.390625).
        assert_eq!(u[1].features, vec![4.0, 16.0]);
        assert!((u[1].x_bound - (0.5625f64 + 0.390625).sqrt()).abs() < 1e-15);
        // Ranges with an intercept: centres 15 and 1.25, half-widths 15 and 2.75, units 16
        // and 4; target centre 65, half-width 55, unit 64.
        assert_eq!(u[2].order, ClipOrder::NormThenClamp);
        assert_eq!(u[2].feature_centres, vec![15.0, 1.25]);
        assert_eq!(u[2].features, vec![16.0, 4.0]);
        assert!(
            (u[2].x_bound - ((15.0f64 / 16.0).powi(2) + (2.75f64 / 4.0).powi(2)).sqrt()).abs()
                < 1e-15
        );
        assert_eq!((u[2].target_centre, u[2].target), (65.0, 64.0));
        assert!((u[2].y_bound - 55.0 / 64.0).abs() < 1e-15);
        assert!(u[2].is_centred());
        // Without an intercept nothing is centred; the half-width is the largest |end|.
        assert_eq!(u[3].feature_centres, vec![0.0, 0.0]);
        assert_eq!(u[3].features, vec![32.0, 4.0]);
        assert!(!u[3].is_centred());
    }

    #[test]
    fn centring_quadruples_the_spread_of_data_in_the_lower_half() {
        // The demo's case: km in [0, 30], symmetric bound 30 (unit 32) against the range
        // [0, 30] centred on 15 (unit 16): the normalised spread of the same data is
        // (32/16)² = 4 times larger, against noise of the same order.
        let u = linear_units();
        let spread = |mu: &MomentUnits, xs: &[f64]| {
            let vals: Vec<f64> = xs
                .iter()
                .map(|&a| {
                    let (mut x, mut y) = (vec![a, 0.0], 20.0);
                    mu.normalise(&mut x, &mut y);
                    x[0]
                })
                .collect();
            let mean = vals.iter().sum::<f64>() / vals.len() as f64;
            vals.iter().map(|v| (v - mean).powi(2)).sum::<f64>()
        };
        let data = [2.0, 3.5, 5.0, 8.0];
        let sym = MomentUnits {
            features: vec![32.0, 4.0],
            feature_centres: vec![0.0, 0.0],
            feature_clamps: vec![(-30.0, 30.0), (-4.0, 4.0)],
            order: ClipOrder::ClampThenNorm,
            ..u[2].clone()
        };
        let r = spread(&u[2], &data) / spread(&sym, &data);
        assert!((r - 4.0).abs() < 1e-12, "ratio {r}");
    }

    proptest! {
        /// Whatever comes in (huge, tiny, infinite, NaN), the normalised vector respects the
        /// bounds the sensitivity is computed from.
        #[test]
        fn normalised_vectors_respect_the_planned_bounds(
            a in prop_oneof![any::<f64>(), -100.0..100.0f64],
            b in prop_oneof![any::<f64>(), -100.0..100.0f64],
            y in prop_oneof![any::<f64>(), -300.0..300.0f64],
        ) {
            for mu in linear_units() {
                let (mut x, mut yy) = (vec![a, b], y);
                mu.normalise(&mut x, &mut yy);
                let norm = (x[0] * x[0] + x[1] * x[1]).sqrt();
                prop_assert!(x.iter().all(|v| v.is_finite()) && yy.is_finite());
                // `linear::clip` computes the norm in floating point; the sensitivity allows
                // for that (`linear::event_sensitivity_sq`: ‖x‖² ≤ B²(1 + 2^-41)).
                prop_assert!(
                    norm <= mu.x_bound * (1.0 + 2f64.powi(-42)),
                    "‖x'‖ = {} > {}",
                    norm,
                    mu.x_bound
                );
                prop_assert!(yy.abs() <= mu.y_bound, "|y'| = {} > {}", yy.abs(), mu.y_bound);
                if mu.order == ClipOrder::NormThenClamp {
                    // Ranges hold per coordinate too.
                    for ((v, u), ((lo, hi), c)) in x.iter().zip(&mu.features).zip(mu.feature_clamps.iter().zip(&mu.feature_centres)) {
                        let raw = v * u + c;
                        prop_assert!(raw >= lo - 1e-9 && raw <= hi + 1e-9, "{} outside [{}, {}]", raw, lo, hi);
                    }
                }
            }
        }
    }
}
