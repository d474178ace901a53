//! `scrim plan`: what the budget buys before any data, and what-if comparisons. Builds one
//! [`PlanView`] per configuration from the same [`Plan`] the engine uses, and renders it as
//! text or as the JSON of `ops/plan.schema.json`.
//!
//! What-if syntax (`--what-if KEY=VALUE`, repeatable): KEY is a config key, `privacy.` may be
//! left out, and a statistic is addressed by name (`stats.fare_revenue.range`). VALUE is a
//! literal in the config's own notation, or `xF` to scale the configured value by F.

use std::collections::BTreeMap;
use std::path::Path;

use serde::Serialize;

use crate::config::{Config, Mechanism, RawConfig, StatKind};
use crate::engine::accounting;
use crate::engine::mechanism::{self, MechanismKind};
use crate::engine::plan::{self, ComponentRole, Plan, PrivacyLevel, Scope};
use crate::engine::time::{DurationMs, Millis, parse_duration};

use super::AppError;

/// `z` with P(|Z| ≤ z) = 0.95 for a standard normal Z: the 95% half-width is `z · std_error`
/// (Φ⁻¹(0.975); checked against `statrs::distribution::Normal::inverse_cdf` in the tests).
/// The noise of counts and sums is (discrete) Gaussian, so the interval is close to exact.
pub const Z_95: f64 = 1.959_963_984_540_054;

/// Options of `scrim plan`.
#[derive(Clone, Debug, Default)]
pub struct PlanArgs {
    /// Print JSON (`ops/plan.schema.json`) instead of text.
    pub json: bool,
    /// `KEY=VALUE` changes to compare against the configuration (see the module docs).
    pub what_if: Vec<String>,
    /// Leaf (0-based window of the epoch, as in release records) at which std_errors are
    /// given; `None`: the epoch's last window.
    pub leaf: Option<u32>,
    /// When the deployment starts, for the date the lifetime budget runs out; `None`: now.
    pub start: Option<Millis>,
}

/// One applied what-if change.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct WhatIfChange {
    /// The config key, in full (`privacy.rho_per_epoch`, `stats.fare_revenue.range`).
    pub key: String,
    /// The configured value.
    pub from: serde_json::Value,
    /// The what-if value.
    pub to: serde_json::Value,
}

/// `scrim plan`: loads `config_path`, applies the what-ifs and renders the report. Returns
/// the report and whether the configured plan fits its lifetime budget.
pub fn plan_command(config_path: &Path, args: &PlanArgs) -> Result<(String, bool), AppError> {
    let config = Config::load(config_path)?;
    let what_if = if args.what_if.is_empty() {
        None
    } else {
        // The raw form is re-read so that a changed config passes every check of
        // `Config::try_from` again (errors then name the key, as for the file itself).
        let raw = raw_config(config_path)?;
        Some(apply_what_ifs(&raw, &config, &args.what_if)?)
    };
    let start = args.start.unwrap_or_else(crate::runtime::now);
    plan_report(
        &config,
        what_if.as_ref().map(|(c, ch)| (c, ch.as_slice())),
        args.json,
        args.leaf,
        start,
    )
}

/// Renders the plan of `config` (and, with `what_if`, of the changed configuration beside
/// it) as text or JSON. `leaf`: where std_errors are evaluated (default: the last window of
/// the epoch). `start`: the deployment's first event time, for the exhaustion date.
pub fn plan_report(
    config: &Config,
    what_if: Option<(&Config, &[WhatIfChange])>,
    json: bool,
    leaf: Option<u32>,
    start: Millis,
) -> Result<(String, bool), AppError> {
    let base = plan_view(config, leaf, start)?;
    let fits = base.fits;
    let other = match what_if {
        Some((cfg, changes)) => Some((plan_view(cfg, leaf, start)?, changes)),
        None => None,
    };
    if json {
        let out = PlanOutput {
            what_if: other.as_ref().map(|(w, changes)| WhatIfView {
                changes: changes.to_vec(),
                comparison: comparison(&base, w),
                plan: w,
            }),
            plan: &base,
        };
        let text = serde_json::to_string_pretty(&out).map_err(|e| AppError::Io {
            context: "rendering the plan as JSON".to_string(),
            source: std::io::Error::other(e),
        })?;
        return Ok((text + "\n", fits));
    }
    let text = match &other {
        None => render_text(&base),
        Some((w, changes)) => render_what_if(&base, w, changes),
    };
    Ok((text, fits))
}

// -------------------------------------------------------------------------------------------
// The view: every number `plan` reports (the JSON boundary of ops/plan.schema.json)
// -------------------------------------------------------------------------------------------

/// `plan --json`: the plan, and the what-if beside it when asked for.
#[derive(Serialize)]
struct PlanOutput<'a> {
    #[serde(flatten)]
    plan: &'a PlanView,
    what_if: Option<WhatIfView<'a>>,
}

/// The what-if part of `plan --json`.
#[derive(Serialize)]
struct WhatIfView<'a> {
    changes: Vec<WhatIfChange>,
    plan: &'a PlanView,
    comparison: Vec<ScopeComparison>,
}

/// Baseline against what-if for one statistic and scope.
#[derive(Serialize)]
struct ScopeComparison {
    stat: String,
    scope: String,
    /// The headline std_error of the baseline (see [`ScopeView::headline`]).
    std_error: f64,
    what_if_std_error: f64,
    /// `what_if_std_error / std_error`.
    ratio: f64,
}

/// Everything `plan` says about one configuration.
#[derive(Clone, Debug, Serialize)]
pub struct PlanView {
    level: &'static str,
    unit: Option<String>,
    mechanism: &'static str,
    epoch_windows: u32,
    window_ms: i64,
    max_events_per_window: Option<u32>,
    max_windows_per_epoch: Option<u32>,
    rho_per_epoch: f64,
    rho_spent_per_epoch: f64,
    lifetime_rho: Option<f64>,
    epochs_allowed: Option<u64>,
    epsilon_per_epoch: f64,
    delta: f64,
    fits: bool,
    deployment: DeploymentView,
    schedule: ScheduleView,
    leaf: u32,
    stats: Vec<StatView>,
}

/// The guarantee of the whole deployment.
#[derive(Clone, Debug, Serialize)]
struct DeploymentView {
    /// zCDP over every epoch the budget pays for ([`Plan::deployment_rho`]).
    rho: f64,
    /// ε of `rho` at `delta` (Canonne, Kamath & Steinke 2020 conversion).
    epsilon: f64,
    delta: f64,
    /// Epochs released (None: unlimited at event level).
    epochs: Option<u64>,
    /// `sequential` (unit level) or `parallel` (event level).
    composition: &'static str,
}

/// When the budget runs out at the configured cadence.
#[derive(Clone, Debug, Serialize)]
struct ScheduleView {
    /// Start of the first window (the start time floored to the window grid).
    start: String,
    epoch_ms: i64,
    /// How long the lifetime budget lasts (None: unlimited).
    budget_ms: Option<i64>,
    /// End of the last window that is released (None: never).
    releases_stop_at: Option<String>,
}

/// One statistic.
#[derive(Clone, Debug, Serialize)]
struct StatView {
    name: String,
    kind: &'static str,
    groups: usize,
    rho_share: f64,
    rho: f64,
    components: Vec<ComponentView>,
    scopes: Vec<ScopeView>,
    std_error_end_of_epoch: BTreeMap<String, BTreeMap<String, Vec<f64>>>,
    error_drivers: Vec<DriverView>,
    dominant_bound: Option<String>,
}

/// One noise component of a statistic.
#[derive(Clone, Debug, Serialize)]
struct ComponentView {
    role: &'static str,
    grid: f64,
    per_event_l2: f64,
    sensitivity_l2: f64,
    sigma: f64,
    rho: f64,
}

/// One released scope at the plan's leaf, for the configured mechanism.
#[derive(Clone, Debug, Serialize)]
struct ScopeView {
    scope: String,
    first_leaf: u32,
    last_leaf: u32,
    /// One per component ([`Plan::scope_std_errors`]).
    std_error: Vec<f64>,
    /// `Z_95 · std_error`.
    half_width_95: Vec<f64>,
    /// Mean statistics: [`plan::mean_std_error_times_count`]; None otherwise.
    mean_std_error_times_count: Option<f64>,
}

impl ScopeView {
    /// The one number that summarises the scope's error: the mean's `std_error × count`
    /// bound, or the first component's std_error.
    fn headline(&self) -> f64 {
        self.mean_std_error_times_count
            .unwrap_or_else(|| self.std_error.first().copied().unwrap_or(f64::NAN))
    }
}

/// How one configured bound drives a statistic's error.
#[derive(Clone, Debug, Serialize)]
struct DriverView {
    /// The config key.
    bound: String,
    value: serde_json::Value,
    /// What the bound multiplies the epoch's L2 sensitivity (hence every std_error) by:
    /// relative to a bound of 1 for the per-unit caps; the per-event bound in value units
    /// for a range.
    factor: f64,
    /// The bound halved (caps: rounded down), or None when it cannot be halved.
    halved: Option<serde_json::Value>,
    /// Headline std_error with the halved bound over the configured one.
    std_error_ratio_if_halved: Option<f64>,
}

/// The plan of `config` with errors at `leaf` (default: the epoch's last window).
fn plan_view(config: &Config, leaf: Option<u32>, start: Millis) -> Result<PlanView, AppError> {
    let plan = Plan::new(config)?;
    let horizon = plan.epoch_windows;
    let leaf = match leaf {
        None => horizon - 1,
        Some(l) if l < horizon => l,
        Some(l) => {
            return Err(AppError::Usage(format!(
                "--leaf {l} is outside the epoch: privacy.epoch_windows is {horizon}, so leaves are 0 to {}",
                horizon - 1
            )));
        }
    };
    let alt: Vec<Plan> = [
        Mechanism::Tree,
        Mechanism::SqrtFactorization,
        Mechanism::Independent,
    ]
    .into_iter()
    .map(|m| {
        let mut c = config.clone();
        c.privacy.mechanism = m;
        Plan::new(&c)
    })
    .collect::<Result<_, _>>()?;
    let stats = (0..plan.stats.len())
        .map(|si| stat_view(config, &plan, &alt, si, leaf))
        .collect();
    let (unit, lifetime_rho, k, m) = match &plan.level {
        PrivacyLevel::Event => (None, None, None, None),
        PrivacyLevel::Unit {
            field,
            lifetime_rho,
            max_events_per_window,
            max_windows_per_epoch,
        } => (
            Some(field.clone()),
            Some(*lifetime_rho),
            Some(*max_events_per_window),
            Some(*max_windows_per_epoch),
        ),
    };
    let window_ms = config.window.length.0;
    let epoch_ms = window_ms.saturating_mul(i64::from(horizon));
    let first_window = start.0.div_euclid(window_ms) * window_ms;
    let budget_ms = plan
        .epochs_allowed()
        .map(|n| epoch_ms.saturating_mul(i64::try_from(n).unwrap_or(i64::MAX)));
    let deployment_rho = plan.deployment_rho();
    Ok(PlanView {
        level: if unit.is_some() { "unit" } else { "event" },
        unit,
        mechanism: plan.mechanism.as_str(),
        epoch_windows: horizon,
        window_ms,
        max_events_per_window: k,
        max_windows_per_epoch: m,
        rho_per_epoch: plan.rho_per_epoch,
        rho_spent_per_epoch: plan.rho_spent_per_epoch(),
        lifetime_rho,
        epochs_allowed: plan.epochs_allowed(),
        epsilon_per_epoch: plan.epsilon_per_epoch(),
        delta: plan.delta,
        fits: plan.epochs_allowed().is_none_or(|n| n >= 1),
        deployment: DeploymentView {
            rho: deployment_rho,
            epsilon: accounting::epsilon_for(deployment_rho, plan.delta),
            delta: plan.delta,
            epochs: plan.epochs_allowed(),
            composition: if lifetime_rho.is_some() {
                "sequential"
            } else {
                "parallel"
            },
        },
        schedule: ScheduleView {
            start: Millis(first_window).to_rfc3339(),
            epoch_ms,
            budget_ms,
            releases_stop_at: budget_ms
                .and_then(|b| first_window.checked_add(b))
                .map(|t| Millis(t).to_rfc3339()),
        },
        leaf,
        stats,
    })
}

fn stat_view(config: &Config, plan: &Plan, alt: &[Plan], si: usize, leaf: u32) -> StatView {
    let s = &plan.stats[si];
    let end = plan.epoch_windows - 1;
    let scopes = s
        .scopes
        .iter()
        .map(|scope| scope_view(plan, si, *scope, leaf))
        .collect();
    let std_error_end_of_epoch = alt
        .iter()
        .map(|p| {
            let by_scope = p.stats[si]
                .scopes
                .iter()
                .map(|scope| (scope.label(), p.scope_std_errors(si, *scope, end)))
                .collect();
            (p.mechanism.as_str().to_string(), by_scope)
        })
        .collect();
    let error_drivers = error_drivers(config, plan, si);
    let dominant_bound = error_drivers
        .iter()
        .filter(|d| d.bound.starts_with("privacy."))
        .max_by(|a, b| a.factor.total_cmp(&b.factor))
        .or_else(|| error_drivers.first())
        .map(|d| d.bound.clone());
    StatView {
        name: s.name.clone(),
        kind: s.kind,
        groups: s.groups.len(),
        rho_share: s.rho_share,
        rho: s.rho(),
        components: s
            .components
            .iter()
            .map(|c| ComponentView {
                role: component_label(&c.role),
                grid: c.quantum(),
                per_event_l2: c.event_sens_sq.sqrt() * c.quantum(),
                sensitivity_l2: c.sensitivity_sq.sqrt() * c.quantum(),
                sigma: (c.sigma2 as f64).sqrt() * c.quantum(),
                rho: c.rho,
            })
            .collect(),
        scopes,
        std_error_end_of_epoch,
        error_drivers,
        dominant_bound,
    }
}

fn scope_view(plan: &Plan, si: usize, scope: Scope, leaf: u32) -> ScopeView {
    let std_error = plan.scope_std_errors(si, scope, leaf);
    let range = scope.range(leaf);
    let mean_std_error_times_count = match plan.stats[si].components[0].role {
        ComponentRole::CentredSum { lo, hi, .. } => Some(plan::mean_std_error_times_count(
            std_error[0],
            std_error[1],
            (hi - lo) / 2.0,
        )),
        _ => None,
    };
    ScopeView {
        scope: scope.label(),
        first_leaf: range.first,
        last_leaf: range.last,
        half_width_95: std_error.iter().map(|e| Z_95 * e).collect(),
        std_error,
        mean_std_error_times_count,
    }
}

/// The headline error of statistic `si`: its `epoch_to_date` scope at the end of the epoch.
fn headline(plan: &Plan, si: usize) -> f64 {
    scope_view(plan, si, Scope::EpochToDate, plan.epoch_windows - 1).headline()
}

/// The bounds that scale statistic `si`'s noise, with what each multiplies the sensitivity by
/// and the effect of halving it (the configuration re-planned with only that bound halved).
///
/// Derivation of the factors: the epoch sensitivity is
/// `Δ² = mechanism::sensitivity_sq(kind, T, D, k·S, m)` (see `plan_component`), where `S` is
/// the per-event bound, `k` the events kept per unit and window and `m` the windows per unit
/// and epoch, and every std_error is proportional to Δ at a fixed ρ. The factor of `k` is
/// `Δ(k)/Δ(1)` and that of `m` is `Δ(m)/Δ(1)`, both on the first component. A range enters
/// through `S` in value units, so its factor is `S` itself and is not compared with the caps.
fn error_drivers(config: &Config, plan: &Plan, si: usize) -> Vec<DriverView> {
    let mut out = Vec::new();
    let base = headline(plan, si);
    let comp = &plan.stats[si].components[0];
    let per_event = comp.event_sens_sq.sqrt();
    let sens = |k: f64, m: u32| {
        mechanism::sensitivity_sq(
            plan.mechanism,
            plan.epoch_windows,
            comp.dim,
            k * per_event,
            m,
        )
        .sqrt()
    };
    // Re-plans `cfg` and returns the headline ratio; None if the changed plan cannot be made
    // (e.g. the grid would overflow), in which case the driver shows no ratio.
    let ratio = |cfg: &Config| Plan::new(cfg).ok().map(|p| headline(&p, si) / base);
    if let (PrivacyLevel::Unit { .. }, Some(b)) = (&plan.level, config.privacy.unit_bounds) {
        let k = b.max_events_per_window;
        let m = b.max_windows_per_epoch;
        // Halves one per-unit cap (when it can be halved) and re-plans.
        let halve = |cap: u32, set: fn(&mut crate::config::UnitBounds, u32)| {
            (cap >= 2).then(|| {
                let mut c = config.clone();
                if let Some(u) = c.privacy.unit_bounds.as_mut() {
                    set(u, cap / 2);
                }
                (cap / 2, ratio(&c))
            })
        };
        let halve_k = halve(k, |u, v| u.max_events_per_window = v);
        out.push(DriverView {
            bound: "privacy.max_events_per_window".to_string(),
            value: k.into(),
            factor: sens(f64::from(k), m) / sens(1.0, m),
            halved: halve_k.map(|(h, _)| h.into()),
            std_error_ratio_if_halved: halve_k.and_then(|(_, r)| r),
        });
        let halve_m = halve(m, |u, v| u.max_windows_per_epoch = v);
        out.push(DriverView {
            bound: "privacy.max_windows_per_epoch".to_string(),
            value: m.into(),
            factor: sens(f64::from(k), m) / sens(f64::from(k), 1),
            halved: halve_m.map(|(h, _)| h.into()),
            std_error_ratio_if_halved: halve_m.and_then(|(_, r)| r),
        });
    }
    let stat = &config.stats[si];
    if let StatKind::Sum { range, .. } | StatKind::Mean { range, .. } = &stat.kind {
        let (lo, hi) = *range;
        let mut c = config.clone();
        if let StatKind::Sum { range, .. } | StatKind::Mean { range, .. } = &mut c.stats[si].kind {
            *range = (lo / 2.0, hi / 2.0);
        }
        let per_event = match &stat.kind {
            StatKind::Mean { .. } => (hi - lo) / 2.0,
            _ => lo.abs().max(hi.abs()),
        };
        out.push(DriverView {
            bound: format!("stats.{}.range", stat.name),
            value: serde_json::json!([lo, hi]),
            factor: per_event,
            halved: Some(serde_json::json!([lo / 2.0, hi / 2.0])),
            std_error_ratio_if_halved: ratio(&c),
        });
    }
    out
}

fn component_label(role: &ComponentRole) -> &'static str {
    match role {
        ComponentRole::Count => "count",
        ComponentRole::Sum { .. } => "sum",
        ComponentRole::CentredSum { .. } => "centred sum",
        ComponentRole::Moments { .. } => "moments",
    }
}

/// Baseline against what-if for every statistic and scope both plans release.
fn comparison(base: &PlanView, what_if: &PlanView) -> Vec<ScopeComparison> {
    let mut out = Vec::new();
    for (b, w) in base.stats.iter().zip(&what_if.stats) {
        for bs in &b.scopes {
            if let Some(ws) = w.scopes.iter().find(|ws| ws.scope == bs.scope) {
                out.push(ScopeComparison {
                    stat: b.name.clone(),
                    scope: bs.scope.clone(),
                    std_error: bs.headline(),
                    what_if_std_error: ws.headline(),
                    ratio: ws.headline() / bs.headline(),
                });
            }
        }
    }
    out
}

// -------------------------------------------------------------------------------------------
// What-if parsing
// -------------------------------------------------------------------------------------------

/// Keys `--what-if` accepts, as listed in error messages and `--help`.
pub const WHAT_IF_KEYS: &str = "privacy.rho_per_epoch, privacy.lifetime_rho, privacy.delta, \
privacy.epoch_windows, privacy.max_events_per_window, privacy.max_windows_per_epoch, \
privacy.mechanism, window.length, stats.NAME.weight, stats.NAME.range";

/// The privacy keys that may be written without `privacy.`.
const PRIVACY_KEYS: [&str; 7] = [
    "rho_per_epoch",
    "lifetime_rho",
    "delta",
    "epoch_windows",
    "max_events_per_window",
    "max_windows_per_epoch",
    "mechanism",
];

/// The configuration file's raw form with the same environment overrides as [`Config::load`].
fn raw_config(path: &Path) -> Result<RawConfig, AppError> {
    let text = std::fs::read_to_string(path).map_err(|source| {
        AppError::Config(crate::config::ConfigError::Read {
            path: path.to_path_buf(),
            source,
        })
    })?;
    // `Config::load` already refused SCRIM_* variables that are not valid UTF-8, so every
    // variable that matters is here.
    let env = std::env::vars_os()
        .filter_map(|(n, v)| Some((n.into_string().ok()?, v.into_string().ok()?)))
        .filter(|(n, _)| n.to_lowercase().starts_with("scrim_"))
        .collect();
    Ok(RawConfig::parse(
        &text,
        &format!("config file {}", path.display()),
        env,
    )?)
}

/// A what-if VALUE: a literal, or `xF` (scale the configured value by F).
enum WhatIfValue<'a> {
    Literal(&'a str),
    Scale(f64),
}

fn usage(spec: &str, why: impl std::fmt::Display) -> AppError {
    AppError::Usage(format!("--what-if {spec}: {why}"))
}

fn parse_value<'a>(spec: &str, value: &'a str) -> Result<WhatIfValue<'a>, AppError> {
    let Some(factor) = value.strip_prefix('x') else {
        return Ok(WhatIfValue::Literal(value));
    };
    match factor.parse::<f64>() {
        Ok(f) if f.is_finite() && f > 0.0 => Ok(WhatIfValue::Scale(f)),
        _ => Err(usage(
            spec,
            format!(
                "`x{factor}` is not a scale factor: write x followed by a positive number, e.g. x2 or x0.5"
            ),
        )),
    }
}

fn number(spec: &str, key: &str, v: WhatIfValue<'_>, configured: f64) -> Result<f64, AppError> {
    match v {
        WhatIfValue::Scale(f) => Ok(configured * f),
        WhatIfValue::Literal(s) => s
            .parse::<f64>()
            .ok()
            .filter(|x| x.is_finite())
            .ok_or_else(|| usage(spec, format!("`{s}` is not a number: give {key} a number (e.g. {key}={configured}) or a scale factor (e.g. {key}=x2)"))),
    }
}

fn whole(spec: &str, key: &str, v: WhatIfValue<'_>, configured: u32) -> Result<i64, AppError> {
    let x = number(spec, key, v, f64::from(configured))?;
    if x.fract() != 0.0 || x.abs() > 1e15 {
        return Err(usage(
            spec,
            format!(
                "{key} takes a whole number and this gives {x}; give the value itself, e.g. {key}={}",
                x.round().max(1.0)
            ),
        ));
    }
    Ok(x as i64)
}

/// Applies every `KEY=VALUE` to the raw configuration and validates the result like a file.
pub fn apply_what_ifs(
    raw: &RawConfig,
    config: &Config,
    specs: &[String],
) -> Result<(Config, Vec<WhatIfChange>), AppError> {
    let mut raw = raw.clone();
    let mut changes: Vec<WhatIfChange> = Vec::new();
    for spec in specs {
        let Some((key, value)) = spec.split_once('=') else {
            return Err(usage(
                spec,
                "expected KEY=VALUE, e.g. --what-if rho_per_epoch=x2 or --what-if privacy.max_windows_per_epoch=12",
            ));
        };
        let key = key.trim();
        let value = value.trim();
        let key = if PRIVACY_KEYS.contains(&key) {
            format!("privacy.{key}")
        } else {
            key.to_string()
        };
        if changes.iter().any(|c| c.key == key) {
            return Err(usage(
                spec,
                format!("{key} is given twice; keep one --what-if per key"),
            ));
        }
        let v = parse_value(spec, value)?;
        let change = apply_one(&mut raw, config, spec, &key, v)?;
        changes.push(change);
    }
    let changed = Config::try_from(raw).map_err(|e| {
        AppError::Usage(format!(
            "--what-if {}: the changed configuration is invalid: {e} (a key that must change \
             with it takes another --what-if, e.g. --what-if lifetime_rho=x2)",
            specs.join(" --what-if ")
        ))
    })?;
    Ok((changed, changes))
}

fn apply_one(
    raw: &mut RawConfig,
    config: &Config,
    spec: &str,
    key: &str,
    v: WhatIfValue<'_>,
) -> Result<WhatIfChange, AppError> {
    let change = |from: serde_json::Value, to: serde_json::Value| WhatIfChange {
        key: key.to_string(),
        from,
        to,
    };
    let unit_only = |name: &str| {
        usage(
            spec,
            format!(
                "{name} exists only at unit level (input.unit_field set); this configuration protects single events"
            ),
        )
    };
    let p = &config.privacy;
    let privacy = raw.privacy.get_or_insert_with(Default::default);
    match key {
        "privacy.rho_per_epoch" => {
            let to = number(spec, key, v, p.rho_per_epoch)?;
            privacy.rho_per_epoch = Some(to);
            Ok(change(p.rho_per_epoch.into(), to.into()))
        }
        "privacy.delta" => {
            let to = number(spec, key, v, p.delta)?;
            privacy.delta = Some(to);
            Ok(change(p.delta.into(), to.into()))
        }
        "privacy.lifetime_rho" => {
            let from = p.unit_bounds.ok_or_else(|| unit_only(key))?.lifetime_rho;
            let to = number(spec, key, v, from)?;
            privacy.lifetime_rho = Some(to);
            Ok(change(from.into(), to.into()))
        }
        "privacy.epoch_windows" => {
            let to = whole(spec, key, v, p.epoch_windows)?;
            privacy.epoch_windows = Some(to);
            Ok(change(p.epoch_windows.into(), to.into()))
        }
        "privacy.max_events_per_window" => {
            let from = p
                .unit_bounds
                .ok_or_else(|| unit_only(key))?
                .max_events_per_window;
            let to = whole(spec, key, v, from)?;
            privacy.max_events_per_window = Some(to);
            Ok(change(from.into(), to.into()))
        }
        "privacy.max_windows_per_epoch" => {
            let from = p
                .unit_bounds
                .ok_or_else(|| unit_only(key))?
                .max_windows_per_epoch;
            let to = whole(spec, key, v, from)?;
            privacy.max_windows_per_epoch = Some(to);
            Ok(change(from.into(), to.into()))
        }
        "privacy.mechanism" => {
            let WhatIfValue::Literal(name) = v else {
                return Err(usage(
                    spec,
                    "a mechanism cannot be scaled: name one of tree, sqrt-factorization, independent",
                ));
            };
            if MechanismKind::parse(name).is_none() {
                return Err(usage(
                    spec,
                    format!(
                        "`{name}` is not a mechanism: valid values are tree, sqrt-factorization, independent"
                    ),
                ));
            }
            privacy.mechanism = Some(name.to_string());
            Ok(change(p.mechanism.label().into(), name.into()))
        }
        "window.length" => {
            let from = config.window.length;
            let to = match v {
                WhatIfValue::Scale(f) => {
                    let ms = from.0 as f64 * f;
                    if ms.fract() != 0.0 || ms > 1e15 {
                        return Err(usage(
                            spec,
                            format!("{from} x{f} is not a whole number of milliseconds; give a duration, e.g. window.length=30m"),
                        ));
                    }
                    DurationMs(ms as i64)
                }
                WhatIfValue::Literal(s) => parse_duration(s).map_err(|_| {
                    usage(
                        spec,
                        format!("`{s}` is not a duration: write a whole number and ms, s, m, h or d, e.g. window.length=30m"),
                    )
                })?,
            };
            raw.window.get_or_insert_with(Default::default).length = Some(to.to_string());
            Ok(change(from.to_string().into(), to.to_string().into()))
        }
        _ => apply_stat(raw, config, spec, key, v),
    }
}

/// `stats.NAME.weight` and `stats.NAME.range`.
fn apply_stat(
    raw: &mut RawConfig,
    config: &Config,
    spec: &str,
    key: &str,
    v: WhatIfValue<'_>,
) -> Result<WhatIfChange, AppError> {
    let unknown = || {
        usage(
            spec,
            format!(
                "unknown key `{key}`: valid keys are {WHAT_IF_KEYS} (the privacy. prefix may be left out; NAME is a statistic's name)"
            ),
        )
    };
    let Some((name, field)) = key
        .strip_prefix("stats.")
        .and_then(|rest| rest.rsplit_once('.'))
    else {
        return Err(unknown());
    };
    let Some(idx) = config.stats.iter().position(|s| s.name == name) else {
        let names: Vec<&str> = config.stats.iter().map(|s| s.name.as_str()).collect();
        return Err(usage(
            spec,
            format!(
                "no statistic is named `{name}`; the configured ones are {}",
                names.join(", ")
            ),
        ));
    };
    let stat = &config.stats[idx];
    // `Config` holds the stats in file order, so index `idx` is the same raw table.
    let Some(raw_stat) = raw.stats.as_mut().and_then(|s| s.get_mut(idx)) else {
        return Err(unknown());
    };
    let change = |from: serde_json::Value, to: serde_json::Value| WhatIfChange {
        key: key.to_string(),
        from,
        to,
    };
    match field {
        "weight" => {
            let to = number(spec, key, v, stat.weight)?;
            raw_stat.weight = Some(to);
            Ok(change(stat.weight.into(), to.into()))
        }
        "range" => {
            let (StatKind::Sum { range, .. } | StatKind::Mean { range, .. }) = &stat.kind else {
                return Err(usage(
                    spec,
                    format!(
                        "{name} is a {} statistic and has no range: range applies to sum and mean statistics",
                        stat.kind.label()
                    ),
                ));
            };
            let (lo, hi) = *range;
            let to = match v {
                // Scaling a bound scales both ends about zero, as tightening a clamp does.
                WhatIfValue::Scale(f) => (lo * f, hi * f),
                WhatIfValue::Literal(s) => parse_range(s).ok_or_else(|| {
                    usage(
                        spec,
                        format!("`{s}` is not a range: write [lo,hi] (e.g. {key}=[{lo},{hi}]) or a scale factor (e.g. {key}=x0.5)"),
                    )
                })?,
            };
            raw_stat.range = Some(vec![to.0, to.1]);
            Ok(change(
                serde_json::json!([lo, hi]),
                serde_json::json!([to.0, to.1]),
            ))
        }
        _ if matches!(stat.kind, StatKind::Linear(_)) => Err(usage(
            spec,
            format!(
                "`{field}` cannot be planned for {name}: a linear model's bounds set the units of its sufficient statistics, and their effect on the coefficients depends on the data; valid keys are {WHAT_IF_KEYS}"
            ),
        )),
        _ => Err(unknown()),
    }
}

/// `[lo,hi]` or `lo,hi`.
fn parse_range(s: &str) -> Option<(f64, f64)> {
    let inner = s
        .strip_prefix('[')
        .and_then(|t| t.strip_suffix(']'))
        .unwrap_or(s);
    let (lo, hi) = inner.split_once(',')?;
    let lo: f64 = lo.trim().parse().ok()?;
    let hi: f64 = hi.trim().parse().ok()?;
    (lo.is_finite() && hi.is_finite()).then_some((lo, hi))
}

// -------------------------------------------------------------------------------------------
// Text
// -------------------------------------------------------------------------------------------

/// About five significant digits, without exponents for everyday magnitudes.
fn sig(x: f64) -> String {
    let a = x.abs();
    if x == 0.0 {
        "0".to_string()
    } else if !x.is_finite() || !(1e-3..1e9).contains(&a) {
        format!("{x:.4e}")
    } else {
        let decimals = (4 - a.log10().floor() as i32).clamp(0, 7) as usize;
        let text = format!("{x:.decimals$}");
        if text.contains('.') {
            text.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            text
        }
    }
}

/// A configured value for text: numbers through [`sig`], ranges as `[lo, hi]`.
fn value_text(v: &serde_json::Value) -> String {
    match v {
        serde_json::Value::Number(n) => n.as_f64().map_or_else(|| n.to_string(), sig),
        serde_json::Value::Array(items) => format!(
            "[{}]",
            items.iter().map(value_text).collect::<Vec<_>>().join(", ")
        ),
        serde_json::Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

/// Mechanisms in the order the config documentation lists them.
const MECHANISM_ORDER: [&str; 3] = ["tree", "sqrt-factorization", "independent"];

fn duration(ms: Option<i64>) -> String {
    ms.map_or_else(|| "unlimited".to_string(), |m| DurationMs(m).to_string())
}

fn level_line(v: &PlanView) -> String {
    match (&v.unit, v.max_events_per_window, v.max_windows_per_epoch) {
        (Some(field), Some(k), Some(m)) => {
            format!("unit level on `{field}` (≤ {k} events per window, ≤ {m} windows per epoch)")
        }
        _ => "event level (neighbours differ in one event)".to_string(),
    }
}

fn lifetime_line(v: &PlanView) -> String {
    match (
        &v.schedule.releases_stop_at,
        v.epochs_allowed,
        v.lifetime_rho,
    ) {
        (Some(stop), Some(n), Some(l)) => format!(
            "rho {l} covers {n} epoch(s) = {}: starting {}, releases stop at {stop}",
            duration(v.schedule.budget_ms),
            v.schedule.start
        ),
        _ => {
            "no cap: epochs hold disjoint events (parallel composition); the budget never runs out"
                .to_string()
        }
    }
}

fn header(v: &PlanView) -> String {
    let mut out = String::new();
    out += &format!("privacy        {}\n", level_line(v));
    out += &format!(
        "budget         rho {} per epoch of {} windows × {} = {}; (epsilon {:.4}, delta {:e}) per epoch\n",
        v.rho_per_epoch,
        v.epoch_windows,
        DurationMs(v.window_ms),
        DurationMs(v.schedule.epoch_ms),
        v.epsilon_per_epoch,
        v.delta
    );
    out += &format!(
        "deployment     rho {} ({} composition{}): (epsilon {:.4}, delta {:e}) for the whole deployment\n",
        sig(v.deployment.rho),
        v.deployment.composition,
        v.deployment
            .epochs
            .map_or(String::new(), |n| format!(" of {n} epoch(s)")),
        v.deployment.epsilon,
        v.deployment.delta
    );
    out += &format!("lifetime       {}\n", lifetime_line(v));
    out += &format!("mechanism      {}\n", v.mechanism);
    out += &format!("errors at      {}\n\n", leaf_label(v));
    out
}

fn leaf_label(v: &PlanView) -> String {
    if v.leaf + 1 == v.epoch_windows {
        format!(
            "leaf {} (the epoch's last window); 95% half-width = {Z_95:.2} × std_error",
            v.leaf
        )
    } else {
        format!(
            "leaf {} (window {} of {} in the epoch); 95% half-width = {Z_95:.2} × std_error",
            v.leaf,
            v.leaf + 1,
            v.epoch_windows
        )
    }
}

fn drivers_text(s: &StatView) -> String {
    if s.error_drivers.is_empty() {
        return "  error drivers: none but the budget (one event adds 1 at event level)\n"
            .to_string();
    }
    let mut out = String::from("  error drivers (std_error is proportional to each):\n");
    for d in &s.error_drivers {
        let what = if d.bound.starts_with("privacy.") {
            format!("noise ×{} vs a cap of 1", sig(d.factor))
        } else {
            format!("{} per event", sig(d.factor))
        };
        let halved = match (&d.halved, d.std_error_ratio_if_halved) {
            (Some(h), Some(r)) => format!("; at {}: std_error ×{r:.3}", value_text(h)),
            _ => String::new(),
        };
        let mark = if s.dominant_bound.as_deref() == Some(d.bound.as_str()) {
            "  <- dominant"
        } else {
            ""
        };
        out += &format!(
            "    {:<34} {:<10} {what}{halved}{mark}\n",
            d.bound,
            value_text(&d.value)
        );
    }
    out
}

fn render_text(v: &PlanView) -> String {
    let mut out = header(v);
    for s in &v.stats {
        out += &format!(
            "{} ({}, {} group(s), rho {:.6})\n",
            s.name, s.kind, s.groups, s.rho
        );
        for c in &s.components {
            out += &format!(
                "  {:<12} per-event L2 {:.6e}  epoch sensitivity L2 {:.6e}  node sigma {:.6e}\n",
                c.role, c.per_event_l2, c.sensitivity_l2, c.sigma
            );
        }
        out += &drivers_text(s);
        out += &format!(
            "  {:<16}{:>22}{:>22}\n",
            "scope", "std_error", "95% half-width"
        );
        for sc in &s.scopes {
            let (e, h) = match sc.mean_std_error_times_count {
                Some(b) => (format!("≤ {}/n", sig(b)), format!("≤ {}/n", sig(Z_95 * b))),
                None => (sig(sc.std_error[0]), sig(sc.half_width_95[0])),
            };
            out += &format!("  {:<16}{e:>22}{h:>22}\n", sc.scope);
        }
        if s.kind == "mean" {
            out += "  (n: events in the scope; the mean's std_error is at most this, by the delta method)\n";
        }
        out += "  std_error at the end of an epoch by mechanism (same budget):\n";
        out += &format!("    {:<16}", "scope");
        for m in MECHANISM_ORDER {
            out += &format!("{m:>22}");
        }
        out += "\n";
        for sc in &s.scopes {
            out += &format!("    {:<16}", sc.scope);
            let cells: Vec<&Vec<f64>> = MECHANISM_ORDER
                .iter()
                .filter_map(|m| s.std_error_end_of_epoch.get(*m)?.get(&sc.scope))
                .collect();
            let best = (0..cells.len())
                .min_by(|a, b| cells[*a][0].total_cmp(&cells[*b][0]))
                .unwrap_or(0);
            for (mi, e) in cells.iter().enumerate() {
                let cell = e.iter().map(|x| sig(*x)).collect::<Vec<_>>().join("/");
                let mark = if mi == best { "*" } else { " " };
                out += &format!("{cell:>21}{mark}");
            }
            out += "\n";
        }
        out += "\n";
    }
    out += "* lowest std_error for that scope. Means list sum/count components; linear lists\n";
    out += "  the per-coordinate std_error of its sufficient statistics (normalised units).\n";
    out
}

fn render_what_if(base: &PlanView, w: &PlanView, changes: &[WhatIfChange]) -> String {
    let mut out = String::new();
    for (i, c) in changes.iter().enumerate() {
        let label = if i == 0 { "what-if" } else { "" };
        out += &format!(
            "{label:<15}{}: {} -> {}\n",
            c.key,
            value_text(&c.from),
            value_text(&c.to)
        );
    }
    out += "\n";
    let row = |name: &str, a: String, b: String| format!("{name:<24}{a:>22}   {b}\n");
    out += &row("", "baseline".to_string(), "what-if".to_string());
    let level = |v: &PlanView| match &v.unit {
        Some(u) => format!("unit ({u})"),
        None => "event".to_string(),
    };
    let cap = |c: Option<u32>| c.map_or("-".to_string(), |c| c.to_string());
    out += &row("privacy level", level(base), level(w));
    out += &row(
        "max events per window",
        cap(base.max_events_per_window),
        cap(w.max_events_per_window),
    );
    out += &row(
        "max windows per epoch",
        cap(base.max_windows_per_epoch),
        cap(w.max_windows_per_epoch),
    );
    out += &row("mechanism", base.mechanism.into(), w.mechanism.into());
    out += &row(
        "window × epoch",
        format!("{} × {}", DurationMs(base.window_ms), base.epoch_windows),
        format!("{} × {}", DurationMs(w.window_ms), w.epoch_windows),
    );
    out += &row(
        "rho per epoch",
        sig(base.rho_per_epoch),
        sig(w.rho_per_epoch),
    );
    out += &row(
        "epsilon per epoch",
        format!("{:.4}", base.epsilon_per_epoch),
        format!("{:.4}", w.epsilon_per_epoch),
    );
    out += &row(
        "delta",
        format!("{:e}", base.delta),
        format!("{:e}", w.delta),
    );
    out += &row(
        "deployment rho",
        sig(base.deployment.rho),
        sig(w.deployment.rho),
    );
    out += &row(
        "deployment epsilon",
        format!("{:.4}", base.deployment.epsilon),
        format!("{:.4}", w.deployment.epsilon),
    );
    let epochs = |v: &PlanView| {
        v.epochs_allowed
            .map_or("unlimited".into(), |n| n.to_string())
    };
    out += &row("epochs allowed", epochs(base), epochs(w));
    out += &row(
        "budget lasts",
        duration(base.schedule.budget_ms),
        duration(w.schedule.budget_ms),
    );
    let stop = |v: &PlanView| {
        v.schedule
            .releases_stop_at
            .clone()
            .unwrap_or_else(|| "never".into())
    };
    out += &row("releases stop at", stop(base), stop(w));
    out += &format!(
        "\nstd_error and 95% half-width (= {Z_95:.2} × std_error) {}\n\n",
        if base.leaf + 1 == base.epoch_windows && w.leaf + 1 == w.epoch_windows {
            "at the end of the epoch".to_string()
        } else {
            format!("when leaf {} closes", base.leaf)
        }
    );
    for (b, ws) in base.stats.iter().zip(&w.stats) {
        out += &format!("{} ({})\n", b.name, b.kind);
        out += &format!(
            "  {:<16}{:>32}{:>10}{:>32}\n",
            "scope", "std_error", "ratio", "95% half-width"
        );
        let suffix = if b.kind == "mean" { "/n" } else { "" };
        for bs in &b.scopes {
            let Some(wsc) = ws.scopes.iter().find(|x| x.scope == bs.scope) else {
                continue;
            };
            let (x, y) = (bs.headline(), wsc.headline());
            let cell = |a: f64, b: f64| format!("{}{suffix} -> {}{suffix}", sig(a), sig(b));
            out += &format!(
                "  {:<16}{:>32}{:>10}{:>32}\n",
                bs.scope,
                cell(x, y),
                format!("×{:.3}", y / x),
                cell(Z_95 * x, Z_95 * y)
            );
        }
        if b.kind == "mean" {
            out += "  (means: bound on std_error × n for n events in the scope)\n";
        }
        if b.kind == "linear" {
            out += "  (linear: noise of the sufficient statistics in normalised units)\n";
        }
        out += "\n";
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    const CONFIG: &str = r#"
[input]
time_field = "ts"
unit_field = "card"

[window]
length = "1h"

[privacy]
rho_per_epoch = 0.5
lifetime_rho = 2.0
delta = 1e-9
epoch_windows = 24
max_events_per_window = 2
max_windows_per_epoch = 8

[[stats]]
name = "taps"
kind = "count"
trailing = [6]

[[stats]]
name = "fares"
kind = "sum"
field = "fare"
range = [0, 900]

[[stats]]
name = "trip"
kind = "mean"
field = "minutes"
range = [0, 120]
"#;

    fn config() -> (RawConfig, Config) {
        let raw = RawConfig::parse(CONFIG, "test", Default::default()).unwrap();
        let cfg = Config::try_from(raw.clone()).unwrap();
        (raw, cfg)
    }

    fn what_if(specs: &[&str]) -> Result<(Config, Vec<WhatIfChange>), AppError> {
        let (raw, cfg) = config();
        let specs: Vec<String> = specs.iter().map(|s| s.to_string()).collect();
        apply_what_ifs(&raw, &cfg, &specs)
    }

    fn message(r: Result<(Config, Vec<WhatIfChange>), AppError>) -> String {
        match r {
            Err(e @ AppError::Usage(_)) => e.to_string(),
            Err(other) => panic!("expected a usage error, got {other}"),
            Ok(_) => panic!("expected an error"),
        }
    }

    #[test]
    fn z_95_is_the_normal_quantile() {
        // Reference: statrs (general-purpose library), Φ⁻¹(0.975).
        use statrs::distribution::{ContinuousCDF, Normal};
        let n = Normal::new(0.0, 1.0).unwrap();
        assert!((n.inverse_cdf(0.975) - Z_95).abs() < 1e-12);
    }

    #[test]
    fn what_ifs_scale_and_set_config_values() {
        let (c, ch) = what_if(&["rho_per_epoch=x2", "stats.fares.range=[0,450]"]).unwrap();
        assert_eq!(c.privacy.rho_per_epoch, 1.0);
        assert_eq!(ch[0].key, "privacy.rho_per_epoch");
        assert_eq!(ch[0].from, serde_json::json!(0.5));
        match &c.stats[1].kind {
            StatKind::Sum { range, .. } => assert_eq!(*range, (0.0, 450.0)),
            other => panic!("{other:?}"),
        }
        let (c, _) =
            what_if(&["privacy.max_windows_per_epoch=x0.5", "window.length=x0.5"]).unwrap();
        assert_eq!(c.privacy.unit_bounds.unwrap().max_windows_per_epoch, 4);
        assert_eq!(c.window.length, DurationMs(1_800_000));
        let (c, _) = what_if(&["stats.trip.range=x0.5", "mechanism=independent"]).unwrap();
        assert_eq!(c.privacy.mechanism, Mechanism::Independent);
        match &c.stats[2].kind {
            StatKind::Mean { range, .. } => assert_eq!(*range, (0.0, 60.0)),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn what_if_errors_name_the_key_and_the_fix() {
        let m = message(what_if(&["privacy.bogus=1"]));
        assert!(
            m.contains("privacy.bogus") && m.contains("privacy.rho_per_epoch"),
            "{m}"
        );
        let m = message(what_if(&["stats.nope.range=x2"]));
        assert!(m.contains("nope") && m.contains("taps, fares, trip"), "{m}");
        let m = message(what_if(&["stats.taps.range=x2"]));
        assert!(m.contains("count") && m.contains("sum and mean"), "{m}");
        let m = message(what_if(&["max_windows_per_epoch=x1.3"]));
        assert!(
            m.contains("whole number") && m.contains("max_windows_per_epoch=10"),
            "{m}"
        );
        let m = message(what_if(&["max_windows_per_epoch=100"]));
        assert!(
            m.contains("privacy.max_windows_per_epoch") && m.contains("epoch_windows"),
            "{m}"
        );
        let m = message(what_if(&["rho_per_epoch=x-1"]));
        assert!(m.contains("scale factor"), "{m}");
        let m = message(what_if(&["rho_per_epoch"]));
        assert!(m.contains("KEY=VALUE"), "{m}");
        let m = message(what_if(&["rho_per_epoch=x2", "privacy.rho_per_epoch=1"]));
        assert!(m.contains("twice"), "{m}");
        let m = message(what_if(&["rho_per_epoch=x8"]));
        assert!(m.contains("lifetime_rho"), "{m}");
        let m = message(what_if(&["mechanism=x2"]));
        assert!(m.contains("tree, sqrt-factorization, independent"), "{m}");
        let m = message(what_if(&["window.length=1hour"]));
        assert!(m.contains("duration"), "{m}");
    }

    #[test]
    fn doubling_rho_divides_std_errors_by_root_two() {
        // σ² = Δ²/(2ρ) (Bun & Steinke 2016): twice the ρ, σ/√2; up to the integer rounding
        // of σ² on the grid (relative ≤ 2^-32, plan.rs module docs).
        let (_, base) = config();
        let (w, changes) = what_if(&["rho_per_epoch=x2", "lifetime_rho=x2"]).unwrap();
        let start = Millis(0);
        let b = plan_view(&base, None, start).unwrap();
        let v = plan_view(&w, None, start).unwrap();
        for c in comparison(&b, &v) {
            assert!(
                (c.ratio - 0.5f64.sqrt()).abs() < 1e-8,
                "{} {}: {}",
                c.stat,
                c.scope,
                c.ratio
            );
        }
        let (text, fits) = plan_report(&base, Some((&w, &changes)), false, None, start).unwrap();
        assert!(fits);
        assert!(text.contains("privacy.rho_per_epoch: 0.5 -> 1\n"), "{text}");
        assert!(text.contains("×0.707"), "{text}");
    }

    #[test]
    fn the_schedule_counts_epochs_at_the_window_cadence() {
        // 2.0 / 0.5 = 4 epochs of 24 one-hour windows = 4 days from the start's window.
        let (_, cfg) = config();
        let start = Millis::parse_rfc3339("2026-03-02T08:30:00Z").unwrap();
        let v = plan_view(&cfg, None, start).unwrap();
        assert_eq!(v.epochs_allowed, Some(4));
        assert_eq!(v.schedule.start, "2026-03-02T08:00:00Z");
        assert_eq!(
            v.schedule.releases_stop_at.as_deref(),
            Some("2026-03-06T08:00:00Z")
        );
        assert_eq!(v.deployment.rho, 2.0);
        assert_eq!(
            v.deployment.epsilon,
            accounting::epsilon_for(2.0, 1e-9),
            "the deployment's epsilon converts its whole rho"
        );
    }

    #[test]
    fn error_drivers_follow_the_sensitivity_formula() {
        // Tree, T = 24 (h = 5 levels): Δ² ∝ m·Σ_{l<5} min(2^l, m) (privacy-math.md §8), so
        // Δ² ∝ 8·(1+2+4+8+8) = 184 at m = 8, 4·(1+2+4+4+4) = 60 at m = 4 and 1·5 = 5 at m = 1:
        // the factor of m = 8 (against a cap of 1) is √(184/5), halving it gives √(60/184);
        // the factor of k is k (the leaf bound is k·S).
        let (_, cfg) = config();
        let v = plan_view(&cfg, None, Millis(0)).unwrap();
        let taps = &v.stats[0];
        let k = &taps.error_drivers[0];
        assert_eq!(k.bound, "privacy.max_events_per_window");
        assert!((k.factor - 2.0).abs() < 1e-12);
        assert!((k.std_error_ratio_if_halved.unwrap() - 0.5).abs() < 1e-6);
        let m = &taps.error_drivers[1];
        assert!(
            (m.factor - (184f64 / 5.0).sqrt()).abs() < 1e-9,
            "{}",
            m.factor
        );
        let expected = (60f64 / 184.0).sqrt();
        assert!((m.std_error_ratio_if_halved.unwrap() - expected).abs() < 1e-6);
        assert_eq!(
            taps.dominant_bound.as_deref(),
            Some("privacy.max_windows_per_epoch")
        );
        let fares = &v.stats[1];
        let range = fares.error_drivers.last().unwrap();
        assert_eq!(range.bound, "stats.fares.range");
        assert_eq!(range.factor, 900.0);
        assert!((range.std_error_ratio_if_halved.unwrap() - 0.5).abs() < 1e-6);
    }
}
