//! Configuration: the TOML file plus `SCRIM_*` environment overrides, read in two stages.
//!
//! Stage 1 is [`RawConfig`]: a serde mirror of the file in which every key is optional and
//! every table denies unknown keys. Stage 2 is [`Config`], built by `TryFrom<RawConfig>`: it
//! fills in defaults, parses durations and addresses, and checks every single-key and
//! cross-key rule of the outside contract (contract.md, "Config"), so the rest of scrim only
//! ever sees a configuration that is known to be valid ("parse, don't validate").
//!
//! Every [`ConfigError`] names the key path it is about (`privacy.delta`, `stats[1].range`),
//! or the file and line for TOML syntax errors, and says what would be valid. Validation stops
//! at the first error. Unknown keys are looked for first, in sorted order; the rules of stage 2
//! run in a fixed order (sections, then stats in file order, then keys in the order of this
//! module). Only when several values have the wrong type is it unspecified which one is named,
//! since the config crate stores tables as hash maps.
//!
//! Environment overrides use the prefix `SCRIM_` and `__` between path segments
//! (`SCRIM_PRIVACY__RHO_PER_EPOCH=0.25`); a single `_` would split names such as
//! `rho_per_epoch` (crates.md, config 0.15 notes). Because unknown keys are errors, a stray
//! `SCRIM_*` variable stops start-up; the error then names the variable.

use std::cell::Cell;
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;
use serde::de;

pub use crate::engine::time::DurationMs;
use crate::engine::time::parse_duration;

// ---------------------------------------------------------------------------------------------
// Resolved configuration (stage 2)
// ---------------------------------------------------------------------------------------------

/// A complete, validated configuration. Only [`Config::load`], [`Config::load_with_env`],
/// [`Config::from_toml_str`] and `TryFrom<RawConfig>` build one, so holding a `Config` is
/// proof that every rule of contract.md held.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    /// `[input]`: how to read each event line.
    pub input: InputConfig,
    /// `[window]`: event-time windows.
    pub window: WindowConfig,
    /// `[privacy]`: budget, unit and mechanism.
    pub privacy: PrivacyConfig,
    /// `[[stats]]`, in file order (at least one).
    pub stats: Vec<StatConfig>,
    /// `[[sources]]`, in file order; empty when the file has none (only `run` reads sources).
    pub sources: Vec<SourceConfig>,
    /// `[http]` (run only).
    pub http: HttpConfig,
    /// `[output]`.
    pub output: OutputConfig,
    /// `[state]`.
    pub state: StateConfig,
}

/// `[input]`: the fields every event line carries.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputConfig {
    /// Event-time field: RFC 3339 string or integer epoch milliseconds.
    pub time_field: String,
    /// The privacy unit's field; `None` means event-level privacy.
    pub unit_field: Option<String>,
    /// Longest accepted line in bytes (64 ..= 16 MiB, default 65536).
    pub max_line_bytes: usize,
}

/// `[window]`: tumbling event-time windows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WindowConfig {
    /// Window length (at least 1 s).
    pub length: DurationMs,
    /// How long after its end a window still accepts events (default 5m, below 100 lengths).
    pub allowed_lateness: DurationMs,
    /// `run` only: close windows by wall clock after this much quiet (default 2m, at least 1 s).
    pub idle_close: DurationMs,
}

/// The continual-release mechanism (`privacy.mechanism`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Mechanism {
    /// `"tree"`: binary-tree (dyadic) aggregation, the default.
    Tree,
    /// `"sqrt-factorization"`: the square-root matrix factorisation of the prefix-sum matrix.
    SqrtFactorization,
    /// `"independent"`: fresh noise on every window, prefix sums add up window noises.
    Independent,
}

impl Mechanism {
    /// Every mechanism with its config name, in the order error messages list them.
    const NAMES: [(&'static str, Mechanism); 3] = [
        ("tree", Mechanism::Tree),
        ("sqrt-factorization", Mechanism::SqrtFactorization),
        ("independent", Mechanism::Independent),
    ];

    /// The config and release-record name (`"tree"`, `"sqrt-factorization"`, `"independent"`).
    pub fn label(&self) -> &'static str {
        match self {
            Mechanism::Tree => "tree",
            Mechanism::SqrtFactorization => "sqrt-factorization",
            Mechanism::Independent => "independent",
        }
    }
}

/// Per-unit contribution bounds; present exactly when `input.unit_field` is set.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct UnitBounds {
    /// Cap on the zCDP ρ one unit may lose over all epochs (≥ `rho_per_epoch`).
    pub lifetime_rho: f64,
    /// Events one unit may contribute to one window (1 ..= 1,000,000).
    pub max_events_per_window: u32,
    /// Windows of one epoch a unit may contribute to (1 ..= `epoch_windows`).
    pub max_windows_per_epoch: u32,
}

/// `[privacy]`: the budget and how it is spent.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PrivacyConfig {
    /// zCDP ρ spent by one epoch's releases, all stats together.
    pub rho_per_epoch: f64,
    /// δ used only to report an (ε, δ) conversion; in (0, 1e-3].
    pub delta: f64,
    /// Windows (tree leaves) per epoch, 1 ..= 2^20.
    pub epoch_windows: u32,
    /// The continual-release mechanism (default tree).
    pub mechanism: Mechanism,
    /// Some iff `input.unit_field` is set.
    pub unit_bounds: Option<UnitBounds>,
}

/// One `[[stats]]` entry.
#[derive(Debug, Clone, PartialEq)]
pub struct StatConfig {
    /// `[a-z0-9_]+`, unique among the stats.
    pub name: String,
    /// What is released, with its value fields and bounds.
    pub kind: StatKind,
    /// Grouping fields, each with its public key list, in `group_by` order.
    pub group_by: Vec<GroupField>,
    /// Share of `rho_per_epoch` relative to the other stats' weights (finite, > 0).
    pub weight: f64,
    /// Extra trailing scopes, in windows (each 2 ..= epoch_windows, unique).
    pub trailing: Vec<u32>,
}

/// A grouping field and its declared public domain.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct GroupField {
    /// The event field.
    pub field: String,
    /// The public keys, in file order (1 ..= 10,000, unique, non-empty strings).
    pub keys: Vec<String>,
}

/// What a stat releases.
#[derive(Debug, Clone, PartialEq)]
pub enum StatKind {
    /// `kind = "count"`: the number of (bounded) events.
    Count,
    /// `kind = "sum"`: the sum of `field`, each value clamped into `range`.
    Sum {
        /// The numeric field summed.
        field: String,
        /// Clamp range `(lo, hi)`, finite, `lo < hi`.
        range: (f64, f64),
    },
    /// `kind = "mean"`: a noisy sum over a noisy count, values clamped into `range`.
    Mean {
        /// The numeric field averaged.
        field: String,
        /// Clamp range `(lo, hi)`, finite, `lo < hi`.
        range: (f64, f64),
    },
    /// `kind = "linear"`: a linear model fitted from noisy sufficient statistics.
    Linear(LinearConfig),
}

impl StatKind {
    /// The config and release-record name of the kind.
    pub fn label(&self) -> &'static str {
        match self {
            StatKind::Count => "count",
            StatKind::Sum { .. } => "sum",
            StatKind::Mean { .. } => "mean",
            StatKind::Linear(_) => "linear",
        }
    }
}

/// The four kind names, in the order error messages list them.
const KIND_NAMES: [&str; 4] = ["count", "sum", "mean", "linear"];

/// A `kind = "linear"` stat: target ~ (1 +) features.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearConfig {
    /// The response field.
    pub target: String,
    /// The feature fields (non-empty, unique, not the target), in file order.
    pub features: Vec<String>,
    /// Whether the model has an intercept (default true).
    pub intercept: bool,
    /// L2 clip of the feature vector (finite, > 0).
    pub feature_norm_bound: f64,
    /// Optional per-feature clamps |x_j| ≤ b_j (one per feature, finite, > 0). They let the
    /// engine normalise each feature by its own scale, so a feature with a small range is
    /// not drowned by noise sized for the largest one.
    pub feature_bounds: Option<Vec<f64>>,
    /// Optional per-feature ranges `lo ≤ x_j ≤ hi` (one per feature, finite, lo < hi, inside
    /// ±`feature_norm_bound`; not together with `feature_bounds`). With an intercept the
    /// engine accumulates the moments centred on each range's midpoint, so a feature whose
    /// values sit far from 0 (a distance, a count) is not drowned by noise sized for a
    /// symmetric bound twice as wide.
    pub feature_ranges: Option<Vec<(f64, f64)>>,
    /// Clip of |target| (finite, > 0).
    pub target_bound: f64,
    /// Optional range `lo ≤ y ≤ hi` of the target, inside ±`target_bound` (centred like the
    /// feature ranges when the model has an intercept).
    pub target_range: Option<(f64, f64)>,
    /// How the model is fitted from the noisy statistics.
    pub fit: FitConfig,
}

/// `fit = "ridge"` (with `ridge_lambda`, default 0) or `fit = "l1"` (with `l1_radius`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FitConfig {
    /// Ridge regression with penalty `lambda ≥ 0` (finite).
    Ridge {
        /// The ridge penalty.
        lambda: f64,
    },
    /// Least squares constrained to the L1 ball of `radius > 0` (finite).
    L1 {
        /// The L1 ball radius.
        radius: f64,
    },
}

/// One `[[sources]]` entry (`run` only).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum SourceConfig {
    /// `kind = "stdin"`: lines from standard input (at most one such source).
    Stdin,
    /// `kind = "file"`: lines from a file.
    File {
        /// The file to read.
        path: PathBuf,
    },
    /// `kind = "tcp"`: lines from TCP clients.
    Tcp {
        /// Listening address (an IP and port; host names are not resolved).
        listen: SocketAddr,
        /// Concurrent connections accepted (default 256, at least 1).
        max_connections: usize,
        /// A connection silent this long is closed (default 5m, at least 1 s).
        idle_timeout: DurationMs,
    },
}

/// `[http]` (`run` only).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HttpConfig {
    /// Listening address; default 127.0.0.1:9650 (loopback only).
    pub listen: SocketAddr,
    /// File holding the bearer token that `/metrics` and `/v1/ingest` (exact operational
    /// counts, not differentially private) require; `None`: those endpoints are open to
    /// whoever reaches the listener.
    pub operator_token_file: Option<PathBuf>,
}

/// `[output]`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutputConfig {
    /// Directory of `releases.jsonl`; default `out`.
    pub dir: PathBuf,
}

/// `[state]`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StateConfig {
    /// Checkpoint directory; default `state`.
    pub dir: PathBuf,
    /// How often `run` writes a checkpoint; default 1m, at least 1 s.
    pub checkpoint_interval: DurationMs,
}

/// The event fields the configuration needs, in the shape of the line parser's schema.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct EventFields {
    /// `input.time_field`.
    pub time_field: String,
    /// `input.unit_field`.
    pub unit_field: Option<String>,
    /// Grouping fields with their public key lists, in order of first use across the stats.
    /// Each field appears once; when several stats group by it, its list is the union of
    /// theirs, in order of first mention.
    pub categories: Vec<(String, Vec<String>)>,
    /// Numeric fields (sum/mean `field`, linear `target` and `features`), in order of first
    /// use, each once.
    pub numbers: Vec<String>,
    /// `input.max_line_bytes`.
    pub max_line_bytes: usize,
}

// ---------------------------------------------------------------------------------------------
// Errors
// ---------------------------------------------------------------------------------------------

/// Why a configuration was refused. Every message names the key path (or the file and line)
/// and says what would be valid.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The configuration file could not be read (missing, unreadable, not UTF-8).
    #[error("cannot read config file {}: {source}", path.display())]
    Read {
        /// The file.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// The text is not valid TOML; `message` is the TOML parser's and gives line and column.
    #[error("{origin} is not valid TOML: {message}")]
    Syntax {
        /// `config file <path>` or `config text`.
        origin: String,
        /// The parser's description, with line, column and a snippet.
        message: String,
    },
    /// A `SCRIM_*` environment variable cannot be applied as an override.
    #[error("environment variable {variable} cannot be used as a config override: {reason}")]
    Environment {
        /// The variable's name as found in the environment.
        variable: String,
        /// Why, and what to do instead.
        reason: String,
    },
    /// A key scrim does not know (a typo, or a stray `SCRIM_*` variable).
    #[error("unknown key `{key}` in {table}; valid keys there are: {valid}{}", stray_env_note(.variable))]
    UnknownKey {
        /// Full path of the unknown key.
        key: String,
        /// The table it appeared in, e.g. `[privacy]` or `the top-level table`.
        table: String,
        /// The keys that table accepts, comma-separated.
        valid: String,
        /// The environment variable that set it, if it came from the environment.
        variable: Option<String>,
    },
    /// A value of the wrong type.
    #[error("`{key}` has the wrong type: expected {expected}, found {found}{}", env_note(.variable))]
    WrongType {
        /// Full path of the key.
        key: String,
        /// The type the key takes.
        expected: String,
        /// What was found instead.
        found: String,
        /// The environment variable that set it, if it came from the environment.
        variable: Option<String>,
    },
    /// A required key is absent.
    #[error("missing required key `{key}`: {help}")]
    Missing {
        /// Full path of the key.
        key: String,
        /// What the key means and what values it takes.
        help: String,
    },
    /// A key that exists but may not be used in this context (e.g. `l1_radius` with ridge).
    #[error("`{key}` is not allowed here: {reason}")]
    NotAllowed {
        /// Full path of the key.
        key: String,
        /// Why, and what to do instead.
        reason: String,
    },
    /// A value out of range or inconsistent with another key.
    #[error("invalid `{key}`: {reason}")]
    Invalid {
        /// Full path of the key.
        key: String,
        /// What is wrong and what would be valid.
        reason: String,
    },
}

/// The tail of a message for a key that an environment variable created.
fn stray_env_note(variable: &Option<String>) -> String {
    match variable {
        Some(var) => format!(
            " (this key comes from the environment variable {var}: scrim reads every SCRIM_* \
             variable as a config override, so unset or rename it)"
        ),
        None => String::new(),
    }
}

/// The tail of a message for a value that an environment variable set.
fn env_note(variable: &Option<String>) -> String {
    match variable {
        Some(var) => format!(" (set by the environment variable {var}, a config override)"),
        None => String::new(),
    }
}

fn invalid(key: impl Into<String>, reason: impl Into<String>) -> ConfigError {
    ConfigError::Invalid {
        key: key.into(),
        reason: reason.into(),
    }
}

fn missing(key: impl Into<String>, help: impl Into<String>) -> ConfigError {
    ConfigError::Missing {
        key: key.into(),
        help: help.into(),
    }
}

fn not_allowed(key: impl Into<String>, reason: impl Into<String>) -> ConfigError {
    ConfigError::NotAllowed {
        key: key.into(),
        reason: reason.into(),
    }
}

// ---------------------------------------------------------------------------------------------
// Raw configuration (stage 1)
// ---------------------------------------------------------------------------------------------

/// The file as written, before defaults and checks. Every key is optional here so that stage 2
/// can say precisely which required key is missing.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the top-level table")]
pub struct RawConfig {
    /// `[input]`.
    pub input: Option<RawInput>,
    /// `[window]`.
    pub window: Option<RawWindow>,
    /// `[privacy]`.
    pub privacy: Option<RawPrivacy>,
    /// `[[stats]]`.
    pub stats: Option<Vec<RawStat>>,
    /// `[[sources]]`.
    pub sources: Option<Vec<RawSource>>,
    /// `[http]`.
    pub http: Option<RawHttp>,
    /// `[output]`.
    pub output: Option<RawOutput>,
    /// `[state]`.
    pub state: Option<RawState>,
}

/// `[input]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [input] table")]
pub struct RawInput {
    /// `time_field`.
    #[serde(default, deserialize_with = "strict::text")]
    pub time_field: Option<String>,
    /// `unit_field`.
    #[serde(default, deserialize_with = "strict::text")]
    pub unit_field: Option<String>,
    /// `max_line_bytes`; signed so that a negative number gets a range message, not a type one.
    #[serde(default, deserialize_with = "strict::int")]
    pub max_line_bytes: Option<i64>,
}

/// `[window]` as written (durations still strings).
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [window] table")]
pub struct RawWindow {
    /// `length`.
    #[serde(default, deserialize_with = "strict::text")]
    pub length: Option<String>,
    /// `allowed_lateness`.
    #[serde(default, deserialize_with = "strict::text")]
    pub allowed_lateness: Option<String>,
    /// `idle_close`.
    #[serde(default, deserialize_with = "strict::text")]
    pub idle_close: Option<String>,
}

/// `[privacy]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [privacy] table")]
pub struct RawPrivacy {
    /// `rho_per_epoch`.
    #[serde(default, deserialize_with = "strict::num")]
    pub rho_per_epoch: Option<f64>,
    /// `lifetime_rho`.
    #[serde(default, deserialize_with = "strict::num")]
    pub lifetime_rho: Option<f64>,
    /// `delta`.
    #[serde(default, deserialize_with = "strict::num")]
    pub delta: Option<f64>,
    /// `epoch_windows`.
    #[serde(default, deserialize_with = "strict::int")]
    pub epoch_windows: Option<i64>,
    /// `max_events_per_window`.
    #[serde(default, deserialize_with = "strict::int")]
    pub max_events_per_window: Option<i64>,
    /// `max_windows_per_epoch`.
    #[serde(default, deserialize_with = "strict::int")]
    pub max_windows_per_epoch: Option<i64>,
    /// `mechanism`.
    #[serde(default, deserialize_with = "strict::text")]
    pub mechanism: Option<String>,
}

/// One `[[stats]]` entry as written: the union of the keys of all four kinds.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [[stats]] table")]
pub struct RawStat {
    /// `name`.
    #[serde(default, deserialize_with = "strict::text")]
    pub name: Option<String>,
    /// `kind`.
    #[serde(default, deserialize_with = "strict::text")]
    pub kind: Option<String>,
    /// `group_by`.
    #[serde(default, deserialize_with = "strict::texts")]
    pub group_by: Option<Vec<String>>,
    /// `weight`.
    #[serde(default, deserialize_with = "strict::num")]
    pub weight: Option<f64>,
    /// `trailing`.
    #[serde(default, deserialize_with = "strict::ints")]
    pub trailing: Option<Vec<i64>>,
    /// `[stats.keys]`: group field → public keys. A `BTreeMap` so checks run in a fixed order.
    #[serde(default, deserialize_with = "strict::key_lists")]
    pub keys: Option<BTreeMap<String, Vec<String>>>,
    /// `field` (sum, mean).
    #[serde(default, deserialize_with = "strict::text")]
    pub field: Option<String>,
    /// `range` (sum, mean).
    #[serde(default, deserialize_with = "strict::nums")]
    pub range: Option<Vec<f64>>,
    /// `target` (linear).
    #[serde(default, deserialize_with = "strict::text")]
    pub target: Option<String>,
    /// `features` (linear).
    #[serde(default, deserialize_with = "strict::texts")]
    pub features: Option<Vec<String>>,
    /// `intercept` (linear).
    #[serde(default, deserialize_with = "strict::flag")]
    pub intercept: Option<bool>,
    /// `feature_norm_bound` (linear).
    #[serde(default, deserialize_with = "strict::num")]
    pub feature_norm_bound: Option<f64>,
    /// `feature_bounds` (linear, optional).
    #[serde(default, deserialize_with = "strict::nums")]
    pub feature_bounds: Option<Vec<f64>>,
    /// `feature_ranges` (linear, optional).
    #[serde(default, deserialize_with = "strict::num_lists")]
    pub feature_ranges: Option<Vec<Vec<f64>>>,
    /// `target_bound` (linear).
    #[serde(default, deserialize_with = "strict::num")]
    pub target_bound: Option<f64>,
    /// `target_range` (linear, optional).
    #[serde(default, deserialize_with = "strict::nums")]
    pub target_range: Option<Vec<f64>>,
    /// `fit` (linear).
    #[serde(default, deserialize_with = "strict::text")]
    pub fit: Option<String>,
    /// `ridge_lambda` (linear, fit = "ridge").
    #[serde(default, deserialize_with = "strict::num")]
    pub ridge_lambda: Option<f64>,
    /// `l1_radius` (linear, fit = "l1").
    #[serde(default, deserialize_with = "strict::num")]
    pub l1_radius: Option<f64>,
}

/// One `[[sources]]` entry as written: the union of the keys of all source kinds.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [[sources]] table")]
pub struct RawSource {
    /// `kind`.
    #[serde(default, deserialize_with = "strict::text")]
    pub kind: Option<String>,
    /// `path` (file).
    #[serde(default, deserialize_with = "strict::text")]
    pub path: Option<String>,
    /// `listen` (tcp).
    #[serde(default, deserialize_with = "strict::text")]
    pub listen: Option<String>,
    /// `max_connections` (tcp).
    #[serde(default, deserialize_with = "strict::int")]
    pub max_connections: Option<i64>,
    /// `idle_timeout` (tcp).
    #[serde(default, deserialize_with = "strict::text")]
    pub idle_timeout: Option<String>,
}

/// `[http]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [http] table")]
pub struct RawHttp {
    /// `listen`.
    #[serde(default, deserialize_with = "strict::text")]
    pub listen: Option<String>,
    /// `operator_token_file`.
    #[serde(default, deserialize_with = "strict::text")]
    pub operator_token_file: Option<String>,
}

/// `[output]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [output] table")]
pub struct RawOutput {
    /// `dir`.
    #[serde(default, deserialize_with = "strict::text")]
    pub dir: Option<String>,
}

/// `[state]` as written.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "the [state] table")]
pub struct RawState {
    /// `dir`.
    #[serde(default, deserialize_with = "strict::text")]
    pub dir: Option<String>,
    /// `checkpoint_interval`.
    #[serde(default, deserialize_with = "strict::text")]
    pub checkpoint_interval: Option<String>,
}

/// Strict scalar deserializers for the raw structs.
///
/// The config crate's own conversions are lenient in ways that matter for privacy settings:
/// it rounds `epoch_windows = 1.5` to 2 and reads `true` as 1. These visitors look at the
/// value's real type instead (`deserialize_any`) and accept only a number for a number, an
/// integer for an integer, a string for a string and a boolean for a boolean. Strings are also
/// parsed as numbers and booleans because environment overrides always arrive as text; the
/// effect on the file is that a quoted number such as `delta = "1e-9"` is accepted too.
mod strict {
    use std::collections::BTreeMap;
    use std::fmt;

    use serde::Deserialize;
    use serde::de::{self, Deserializer, Unexpected, Visitor};

    /// A number: integer or float, or text that parses as one.
    struct Num(f64);
    /// An integer, or text that parses as one; floats are refused, never rounded.
    struct Int(i64);
    /// A string; numbers and booleans are refused.
    struct Text(String);
    /// A boolean, or the text `true` / `false`.
    struct Flag(bool);

    struct NumVisitor;
    impl Visitor<'_> for NumVisitor {
        type Value = f64;
        fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
            f.write_str("a number")
        }
        fn visit_i64<E: de::Error>(self, v: i64) -> Result<f64, E> {
            // Integers up to 2^53 convert exactly, far beyond any bound in a config.
            Ok(v as f64)
        }
        fn visit_u64<E: de::Error>(self, v: u64) -> Result<f64, E> {
            Ok(v as f64)
        }
        fn visit_f64<E: de::Error>(self, v: f64) -> Result<f64, E> {
            Ok(v)
        }
        fn visit_str<E: de::Error>(self, v: &str) -> Result<f64, E> {
            v.trim()
                .parse()
                .map_err(|_| E::invalid_type(Unexpected::Str(v), &self))
        }
    }
    impl<'de> Deserialize<'de> for Num {
        fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
            d.deserialize_any(NumVisitor).map(Num)
        }
    }

    struct IntVisitor;
    impl Visitor<'_> for IntVisitor {
        type Value = i64;
        fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
            f.write_str("an integer")
        }
        fn visit_i64<E: de::Error>(self, v: i64) -> Result<i64, E> {
            Ok(v)
        }
        fn visit_u64<E: de::Error>(self, v: u64) -> Result<i64, E> {
            i64::try_from(v).map_err(|_| E::invalid_value(Unexpected::Unsigned(v), &self))
        }
        fn visit_f64<E: de::Error>(self, v: f64) -> Result<i64, E> {
            Err(E::invalid_type(Unexpected::Float(v), &self))
        }
        fn visit_str<E: de::Error>(self, v: &str) -> Result<i64, E> {
            v.trim()
                .parse()
                .map_err(|_| E::invalid_type(Unexpected::Str(v), &self))
        }
    }
    impl<'de> Deserialize<'de> for Int {
        fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
            d.deserialize_any(IntVisitor).map(Int)
        }
    }

    struct TextVisitor;
    impl Visitor<'_> for TextVisitor {
        type Value = String;
        fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
            f.write_str("a string")
        }
        fn visit_str<E: de::Error>(self, v: &str) -> Result<String, E> {
            Ok(v.to_string())
        }
        fn visit_string<E: de::Error>(self, v: String) -> Result<String, E> {
            Ok(v)
        }
    }
    impl<'de> Deserialize<'de> for Text {
        fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
            d.deserialize_any(TextVisitor).map(Text)
        }
    }

    struct FlagVisitor;
    impl Visitor<'_> for FlagVisitor {
        type Value = bool;
        fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
            f.write_str("a boolean (true or false)")
        }
        fn visit_bool<E: de::Error>(self, v: bool) -> Result<bool, E> {
            Ok(v)
        }
        fn visit_str<E: de::Error>(self, v: &str) -> Result<bool, E> {
            match v.trim() {
                "true" => Ok(true),
                "false" => Ok(false),
                _ => Err(E::invalid_type(Unexpected::Str(v), &self)),
            }
        }
    }
    impl<'de> Deserialize<'de> for Flag {
        fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
            d.deserialize_any(FlagVisitor).map(Flag)
        }
    }

    pub(super) fn num<'de, D: Deserializer<'de>>(d: D) -> Result<Option<f64>, D::Error> {
        Ok(Option::<Num>::deserialize(d)?.map(|v| v.0))
    }
    pub(super) fn int<'de, D: Deserializer<'de>>(d: D) -> Result<Option<i64>, D::Error> {
        Ok(Option::<Int>::deserialize(d)?.map(|v| v.0))
    }
    pub(super) fn text<'de, D: Deserializer<'de>>(d: D) -> Result<Option<String>, D::Error> {
        Ok(Option::<Text>::deserialize(d)?.map(|v| v.0))
    }
    pub(super) fn flag<'de, D: Deserializer<'de>>(d: D) -> Result<Option<bool>, D::Error> {
        Ok(Option::<Flag>::deserialize(d)?.map(|v| v.0))
    }
    pub(super) fn nums<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Vec<f64>>, D::Error> {
        Ok(Option::<Vec<Num>>::deserialize(d)?.map(|v| v.into_iter().map(|x| x.0).collect()))
    }
    pub(super) fn num_lists<'de, D: Deserializer<'de>>(
        d: D,
    ) -> Result<Option<Vec<Vec<f64>>>, D::Error> {
        Ok(Option::<Vec<Vec<Num>>>::deserialize(d)?.map(|v| {
            v.into_iter()
                .map(|l| l.into_iter().map(|x| x.0).collect())
                .collect()
        }))
    }
    pub(super) fn ints<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Vec<i64>>, D::Error> {
        Ok(Option::<Vec<Int>>::deserialize(d)?.map(|v| v.into_iter().map(|x| x.0).collect()))
    }
    pub(super) fn texts<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Vec<String>>, D::Error> {
        Ok(Option::<Vec<Text>>::deserialize(d)?.map(|v| v.into_iter().map(|x| x.0).collect()))
    }
    pub(super) fn key_lists<'de, D: Deserializer<'de>>(
        d: D,
    ) -> Result<Option<BTreeMap<String, Vec<String>>>, D::Error> {
        let lists = Option::<BTreeMap<String, Vec<Text>>>::deserialize(d)?;
        Ok(lists.map(|m| {
            m.into_iter()
                .map(|(k, v)| (k, v.into_iter().map(|x| x.0).collect()))
                .collect()
        }))
    }
}

// ---------------------------------------------------------------------------------------------
// Limits and defaults (contract.md and the config task; each says where it comes from)
// ---------------------------------------------------------------------------------------------

/// Default `input.max_line_bytes`: 64 KiB, far above a normal event line.
const DEFAULT_MAX_LINE_BYTES: usize = 65_536;
/// Smallest `max_line_bytes`: below 64 bytes no realistic event with a timestamp fits.
const MIN_MAX_LINE_BYTES: usize = 64;
/// Largest `max_line_bytes`: 16 MiB bounds the memory one line can take.
const MAX_MAX_LINE_BYTES: usize = 16 * 1024 * 1024;
/// Largest `delta`. Common practice (NIST SP 800-226, recalled): δ must be far below 1/n for n
/// units, or a mechanism that publishes one whole record with probability δ would qualify;
/// 1e-3 is a loose ceiling that still rejects values such as 0.01 or 0.1.
const MAX_DELTA: f64 = 1e-3;
/// Largest `epoch_windows`: 2^20 leaves keeps a tree's depth at 21 levels.
const MAX_EPOCH_WINDOWS: i64 = 1 << 20;
/// Largest `max_events_per_window`: the per-unit sensitivity factor stays below 1e6.
const MAX_EVENTS_PER_WINDOW: i64 = 1_000_000;
/// Most keys one group field may declare (the released table has one cell per key).
const MAX_GROUP_KEYS: usize = 10_000;
/// Allowed lateness must stay below this many window lengths (windows open that long are
/// held in memory).
const MAX_LATENESS_WINDOWS: i64 = 100;
/// Default `sources[].max_connections`.
const DEFAULT_MAX_CONNECTIONS: usize = 256;
/// One second, the smallest window length, idle_close, idle_timeout and checkpoint interval.
const ONE_SECOND: DurationMs = DurationMs(1_000);

// ---------------------------------------------------------------------------------------------
// Loading
// ---------------------------------------------------------------------------------------------

/// Environment variables with this prefix (any case, as the config crate lowercases names)
/// are overrides.
const ENV_PREFIX: &str = "scrim_";
/// Separator between path segments in variable names.
const ENV_SEPARATOR: &str = "__";
/// Arrays of tables cannot be addressed from the environment: the config crate would replace
/// the whole array with a table keyed by the index.
const ENV_UNREACHABLE: [&str; 2] = ["stats", "sources"];

impl Config {
    /// File + environment (`SCRIM_` prefix, `__` separator, e.g. SCRIM_PRIVACY__RHO_PER_EPOCH).
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let mut env = HashMap::new();
        for (name, value) in std::env::vars_os() {
            // Names that are not Unicode cannot spell a config key; the config crate skips
            // them too.
            let Ok(name) = name.into_string() else {
                continue;
            };
            if !name.to_lowercase().starts_with(ENV_PREFIX) {
                continue;
            }
            let value = value.into_string().map_err(|_| ConfigError::Environment {
                variable: name.clone(),
                reason: "its value is not valid UTF-8".into(),
            })?;
            env.insert(name, value);
        }
        Config::load_with_env(path, env)
    }

    /// Same, with an injected environment map instead of the process env (tests).
    /// Variables without the `SCRIM_` prefix are ignored, as in the process environment.
    pub fn load_with_env(path: &Path, env: HashMap<String, String>) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let raw = RawConfig::parse(&text, &format!("config file {}", path.display()), env)?;
        Config::try_from(raw)
    }

    /// Parses TOML text with no environment overrides.
    pub fn from_toml_str(toml: &str) -> Result<Config, ConfigError> {
        let raw = RawConfig::parse(toml, "config text", HashMap::new())?;
        Config::try_from(raw)
    }
}

impl RawConfig {
    /// Stage 1: merges the TOML text with the `SCRIM_*` variables of `env`, checks that every
    /// key is known and that every table is a table, and deserializes.
    ///
    /// `origin` names the text in syntax errors (`config file <path>`).
    pub fn parse(
        toml: &str,
        origin: &str,
        env: HashMap<String, String>,
    ) -> Result<RawConfig, ConfigError> {
        let overrides = EnvOverrides::new(&env)?;
        let env_map: config::Map<String, String> = env.into_iter().collect();
        let merged = config::Config::builder()
            .add_source(config::File::from_str(toml, config::FileFormat::Toml))
            .add_source(
                config::Environment::with_prefix("SCRIM")
                    .prefix_separator("_")
                    .separator(ENV_SEPARATOR)
                    .source(Some(env_map)),
            )
            .build()
            .map_err(|err| match err {
                config::ConfigError::FileParse { cause, .. } => ConfigError::Syntax {
                    origin: origin.to_string(),
                    message: cause.to_string(),
                },
                // The only other source is the environment map, already checked above, so
                // this is not expected; keep the crate's message rather than guess.
                other => ConfigError::Environment {
                    variable: "SCRIM_*".into(),
                    reason: other.to_string(),
                },
            })?;
        let tree = config::Source::collect(&merged)
            .map_err(|err| invalid("(top level)", err.to_string()))?;
        check_keys(&tree, &overrides)?;
        merged
            .try_deserialize::<RawConfig>()
            .map_err(|err| deserialize_error(err, &overrides))
    }
}

/// The `SCRIM_*` variables of an environment map and the key path each one sets.
struct EnvOverrides {
    /// (variable name as given, lowercase dotted key path), sorted by variable name.
    by_path: Vec<(String, String)>,
}

impl EnvOverrides {
    /// Collects the overrides and refuses those that would address an array of tables.
    fn new(env: &HashMap<String, String>) -> Result<EnvOverrides, ConfigError> {
        let mut by_path: Vec<(String, String)> = env
            .keys()
            .filter_map(|name| {
                // The same transformation as config 0.15's `Environment::collect`: lowercase,
                // strip `scrim_`, turn `__` into `.`.
                let lower = name.to_lowercase();
                let rest = lower.strip_prefix(ENV_PREFIX)?;
                Some((name.clone(), rest.replace(ENV_SEPARATOR, ".")))
            })
            .collect();
        by_path.sort();
        for (variable, path) in &by_path {
            let root = path.split('.').next().unwrap_or_default();
            if ENV_UNREACHABLE.contains(&root) {
                return Err(ConfigError::Environment {
                    variable: variable.clone(),
                    reason: format!(
                        "[[{root}]] entries cannot be overridden from the environment (an array \
                         of tables has no variable names); edit the config file instead"
                    ),
                });
            }
        }
        Ok(EnvOverrides { by_path })
    }

    /// The variable that set `key` or something below it, if any.
    fn variable_for(&self, key: &str) -> Option<String> {
        self.by_path
            .iter()
            .find(|(_, path)| {
                path == key
                    || path
                        .strip_prefix(key)
                        .is_some_and(|rest| rest.starts_with('.'))
            })
            .map(|(variable, _)| variable.clone())
    }
}

// ---------------------------------------------------------------------------------------------
// Stage 1 checks: unknown keys and table shapes
// ---------------------------------------------------------------------------------------------

/// The key names serde derive declares for `T`, captured from the list it passes to
/// `deserialize_struct`. The "valid keys" of unknown-key messages come from here, so they
/// cannot drift from the structs that actually parse the file.
fn declared_keys<T: for<'de> Deserialize<'de>>() -> &'static [&'static str] {
    let seen = Cell::new(&[][..]);
    // The probe always returns an error after recording the names; only the names matter.
    let _ = T::deserialize(KeyProbe(&seen));
    seen.get()
}

/// A deserializer that records the field list of the struct asked of it and produces nothing.
struct KeyProbe<'a>(&'a Cell<&'static [&'static str]>);

impl<'de> de::Deserializer<'de> for KeyProbe<'_> {
    type Error = de::value::Error;

    fn deserialize_any<V: de::Visitor<'de>>(self, _visitor: V) -> Result<V::Value, Self::Error> {
        Err(de::Error::custom(
            "the key probe only reads struct field names",
        ))
    }

    fn deserialize_struct<V: de::Visitor<'de>>(
        self,
        _name: &'static str,
        fields: &'static [&'static str],
        _visitor: V,
    ) -> Result<V::Value, Self::Error> {
        self.0.set(fields);
        Err(de::Error::custom(
            "the key probe only reads struct field names",
        ))
    }

    serde::forward_to_deserialize_any! {
        bool i8 i16 i32 i64 i128 u8 u16 u32 u64 u128 f32 f64 char str string bytes byte_buf
        option unit unit_struct newtype_struct seq tuple tuple_struct map enum identifier
        ignored_any
    }
}

/// Joins a key path and a key.
fn join(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

/// A short description of a value's type for wrong-type messages.
fn describe(value: &config::Value) -> String {
    match &value.kind {
        config::ValueKind::Nil => "nothing".into(),
        config::ValueKind::Boolean(b) => format!("boolean `{b}`"),
        config::ValueKind::I64(_)
        | config::ValueKind::I128(_)
        | config::ValueKind::U64(_)
        | config::ValueKind::U128(_) => "an integer".into(),
        config::ValueKind::Float(_) => "a float".into(),
        config::ValueKind::String(s) => format!("string {s:?}"),
        config::ValueKind::Table(_) => "a table".into(),
        config::ValueKind::Array(_) => "an array".into(),
    }
}

/// Refuses any key of `table` outside `valid`, in sorted key order (the merged tree is a hash
/// map, so sorting is what makes the reported key the same on every run).
fn check_table_keys(
    table: &config::Map<String, config::Value>,
    path: &str,
    label: &str,
    valid: &[&str],
    env: &EnvOverrides,
) -> Result<(), ConfigError> {
    let mut names: Vec<&String> = table.keys().collect();
    names.sort();
    match names
        .into_iter()
        .find(|name| !valid.contains(&name.as_str()))
    {
        Some(name) => {
            let key = join(path, name);
            Err(ConfigError::UnknownKey {
                variable: env.variable_for(&key),
                key,
                table: label.to_string(),
                valid: valid.join(", "),
            })
        }
        None => Ok(()),
    }
}

/// The value at `key` as a table, or a wrong-type error.
fn as_table<'v>(
    value: &'v config::Value,
    key: &str,
    expected: &str,
    env: &EnvOverrides,
) -> Result<&'v config::Map<String, config::Value>, ConfigError> {
    match &value.kind {
        config::ValueKind::Table(t) => Ok(t),
        _ => Err(ConfigError::WrongType {
            key: key.to_string(),
            expected: expected.to_string(),
            found: describe(value),
            variable: env.variable_for(key),
        }),
    }
}

/// Walks the merged tree and refuses unknown keys and non-table sections, with messages that
/// name the full key path, list the valid keys, and point at the environment variable when
/// one set the key.
fn check_keys(
    tree: &config::Map<String, config::Value>,
    env: &EnvOverrides,
) -> Result<(), ConfigError> {
    check_table_keys(
        tree,
        "",
        "the top-level table",
        declared_keys::<RawConfig>(),
        env,
    )?;
    let sections: [(&str, &[&str]); 6] = [
        ("input", declared_keys::<RawInput>()),
        ("window", declared_keys::<RawWindow>()),
        ("privacy", declared_keys::<RawPrivacy>()),
        ("http", declared_keys::<RawHttp>()),
        ("output", declared_keys::<RawOutput>()),
        ("state", declared_keys::<RawState>()),
    ];
    for (name, valid) in sections {
        if let Some(value) = tree.get(name) {
            let label = format!("[{name}]");
            let table = as_table(value, name, &format!("a table ({label})"), env)?;
            check_table_keys(table, name, &label, valid, env)?;
        }
    }
    let arrays: [(&str, &[&str]); 2] = [
        ("stats", declared_keys::<RawStat>()),
        ("sources", declared_keys::<RawSource>()),
    ];
    for (name, valid) in arrays {
        let Some(value) = tree.get(name) else {
            continue;
        };
        let label = format!("[[{name}]]");
        let config::ValueKind::Array(entries) = &value.kind else {
            return Err(ConfigError::WrongType {
                key: name.into(),
                expected: format!("an array of tables (write each entry as {label})"),
                found: describe(value),
                variable: env.variable_for(name),
            });
        };
        for (idx, entry) in entries.iter().enumerate() {
            let path = format!("{name}[{idx}]");
            let table = as_table(entry, &path, &format!("a table ({label})"), env)?;
            check_table_keys(table, &path, &label, valid, env)?;
            if name == "stats"
                && let Some(keys) = table.get("keys")
            {
                // The keys table is free-form (one list per group field); only its shape is
                // checked here, its contents in stage 2.
                as_table(keys, &format!("{path}.keys"), "a table ([stats.keys])", env)?;
            }
        }
    }
    Ok(())
}

/// Turns a deserialization error of the config crate into a [`ConfigError`] with the key path.
fn deserialize_error(err: config::ConfigError, env: &EnvOverrides) -> ConfigError {
    match err {
        config::ConfigError::Type {
            origin,
            unexpected,
            expected,
            key,
        } => {
            let key = key.map_or_else(|| "(top level)".into(), |k| dotted(&k));
            let from_env = origin.as_deref() == Some("the environment");
            ConfigError::WrongType {
                variable: if from_env {
                    env.variable_for(&key).or_else(|| Some("SCRIM_*".into()))
                } else {
                    None
                },
                expected: friendly_type(expected),
                found: unexpected.to_string(),
                key,
            }
        }
        config::ConfigError::At { error, key, .. } => {
            let key = key.map_or_else(|| "(top level)".into(), |k| dotted(&k));
            let message = error.to_string();
            // serde's standard wording is "invalid type: <found>, expected <expected>".
            match message
                .strip_prefix("invalid type: ")
                .and_then(|rest| rest.split_once(", expected "))
            {
                Some((found, expected)) => ConfigError::WrongType {
                    variable: env.variable_for(&key),
                    expected: friendly_type(expected),
                    found: found.to_string(),
                    key,
                },
                None => invalid(key, message),
            }
        }
        config::ConfigError::NotFound(key) => missing(key, "see contract.md for the required keys"),
        other => invalid("(top level)", other.to_string()),
    }
}

/// Restores the dot the config crate leaves out after an index (`stats[0]group_by` becomes
/// `stats[0].group_by`), so keys read the same as in the rest of this module.
fn dotted(key: &str) -> String {
    let mut out = String::with_capacity(key.len() + 4);
    let mut prev = None;
    for c in key.chars() {
        if prev == Some(']') && c != '[' && c != '.' {
            out.push('.');
        }
        out.push(c);
        prev = Some(c);
    }
    out
}

/// Says types in TOML words rather than serde's or the config crate's.
fn friendly_type(expected: &str) -> String {
    match expected {
        "a sequence" => "an array".into(),
        "a map" => "a table".into(),
        "a floating point" => "a number".into(),
        e if e.contains("bit integer") => "an integer".into(),
        e => e.to_string(),
    }
}

// ---------------------------------------------------------------------------------------------
// Stage 2: defaults and rules
// ---------------------------------------------------------------------------------------------

impl TryFrom<RawConfig> for Config {
    type Error = ConfigError;

    /// Resolves defaults and checks every rule; returns the first violation.
    fn try_from(raw: RawConfig) -> Result<Config, ConfigError> {
        let input = resolve_input(raw.input.unwrap_or_default())?;
        let window = resolve_window(raw.window.unwrap_or_default())?;
        let privacy = resolve_privacy(raw.privacy.unwrap_or_default(), &input)?;
        let raw_stats = raw.stats.unwrap_or_default();
        if raw_stats.is_empty() {
            return Err(missing(
                "stats",
                "add at least one [[stats]] table with name and kind (\"count\", \"sum\", \
                 \"mean\" or \"linear\")",
            ));
        }
        let stats = raw_stats
            .into_iter()
            .enumerate()
            .map(|(idx, stat)| resolve_stat(idx, stat, &input, &privacy))
            .collect::<Result<Vec<_>, _>>()?;
        check_across_stats(&stats)?;
        let sources = resolve_sources(raw.sources.unwrap_or_default())?;
        let http = resolve_http(raw.http.unwrap_or_default())?;
        let output = OutputConfig {
            dir: resolve_dir(raw.output.unwrap_or_default().dir, "output.dir", "out")?,
        };
        let raw_state = raw.state.unwrap_or_default();
        let state = StateConfig {
            dir: resolve_dir(raw_state.dir, "state.dir", "state")?,
            checkpoint_interval: duration_at_least(
                raw_state.checkpoint_interval,
                "state.checkpoint_interval",
                "1m",
                ONE_SECOND,
            )?,
        };
        Ok(Config {
            input,
            window,
            privacy,
            stats,
            sources,
            http,
            output,
            state,
        })
    }
}

/// A required, non-empty event field name.
fn field_name(value: Option<String>, key: &str, help: &str) -> Result<String, ConfigError> {
    match value {
        None => Err(missing(key, help)),
        Some(name) if name.is_empty() => Err(invalid(
            key,
            "must not be empty: give the event field's name",
        )),
        Some(name) => Ok(name),
    }
}

fn resolve_input(raw: RawInput) -> Result<InputConfig, ConfigError> {
    let time_field = field_name(
        raw.time_field,
        "input.time_field",
        "name the event field that holds the event time (RFC 3339 or epoch milliseconds)",
    )?;
    let unit_field = match raw.unit_field {
        None => None,
        Some(unit) => {
            let unit = field_name(Some(unit), "input.unit_field", "")?;
            if unit == time_field {
                return Err(invalid(
                    "input.unit_field",
                    format!(
                        "\"{unit}\" is also input.time_field; the privacy unit must be a different field"
                    ),
                ));
            }
            Some(unit)
        }
    };
    let max_line_bytes = match raw.max_line_bytes {
        None => DEFAULT_MAX_LINE_BYTES,
        Some(n) => match usize::try_from(n) {
            Ok(n) if (MIN_MAX_LINE_BYTES..=MAX_MAX_LINE_BYTES).contains(&n) => n,
            _ => {
                return Err(invalid(
                    "input.max_line_bytes",
                    format!(
                        "{n} is out of range: valid values are {MIN_MAX_LINE_BYTES} ..= {MAX_MAX_LINE_BYTES} (16 MiB)"
                    ),
                ));
            }
        },
    };
    Ok(InputConfig {
        time_field,
        unit_field,
        max_line_bytes,
    })
}

/// Parses an optional duration (falling back to `default`) and checks it is at least `min`.
fn duration_at_least(
    value: Option<String>,
    key: &str,
    default: &str,
    min: DurationMs,
) -> Result<DurationMs, ConfigError> {
    let text = value.as_deref().unwrap_or(default);
    let duration = parse_duration(text).map_err(|err| invalid(key, err.to_string()))?;
    if duration < min {
        return Err(invalid(
            key,
            format!("\"{text}\" is too short: the minimum is {min}"),
        ));
    }
    Ok(duration)
}

fn resolve_window(raw: RawWindow) -> Result<WindowConfig, ConfigError> {
    let Some(length_text) = raw.length else {
        return Err(missing(
            "window.length",
            "give the window length as a duration, e.g. \"1h\" (s, m, h, d)",
        ));
    };
    let length = duration_at_least(Some(length_text), "window.length", "", ONE_SECOND)?;
    let lateness_is_default = raw.allowed_lateness.is_none();
    let allowed_lateness = duration_at_least(
        raw.allowed_lateness,
        "window.allowed_lateness",
        "5m",
        DurationMs(0),
    )?;
    // Saturating: a product beyond i64 milliseconds is beyond any lateness anyway.
    let max_lateness = length.0.saturating_mul(MAX_LATENESS_WINDOWS);
    if allowed_lateness.0 >= max_lateness {
        let default_note = if lateness_is_default {
            " (5m is the default; set it lower for short windows)"
        } else {
            ""
        };
        return Err(invalid(
            "window.allowed_lateness",
            format!(
                "{allowed_lateness}{default_note} must be less than {MAX_LATENESS_WINDOWS} window lengths ({}), \
                 since every window that long stays open in memory",
                DurationMs(max_lateness)
            ),
        ));
    }
    let idle_close = duration_at_least(raw.idle_close, "window.idle_close", "2m", ONE_SECOND)?;
    Ok(WindowConfig {
        length,
        allowed_lateness,
        idle_close,
    })
}

/// A required finite, strictly positive number.
fn positive(value: f64, key: &str, what: &str) -> Result<f64, ConfigError> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(invalid(
            key,
            format!("{value} is not allowed: {what} must be a finite number greater than 0"),
        ))
    }
}

/// An integer in `lo..=hi`, as u32 (every such bound here fits in u32).
fn int_in(value: i64, key: &str, lo: i64, hi: i64, why: &str) -> Result<u32, ConfigError> {
    match u32::try_from(value) {
        Ok(v) if (lo..=hi).contains(&value) => Ok(v),
        _ => Err(invalid(
            key,
            format!("{value} is out of range: valid values are {lo} ..= {hi}{why}"),
        )),
    }
}

fn resolve_privacy(raw: RawPrivacy, input: &InputConfig) -> Result<PrivacyConfig, ConfigError> {
    let rho_per_epoch = positive(
        raw.rho_per_epoch.ok_or_else(|| {
            missing(
                "privacy.rho_per_epoch",
                "the zCDP budget one epoch's releases spend, a number > 0 (e.g. 0.5)",
            )
        })?,
        "privacy.rho_per_epoch",
        "the zCDP budget per epoch",
    )?;
    let delta = raw.delta.ok_or_else(|| {
        missing(
            "privacy.delta",
            "the δ of the reported (ε, δ), in (0, 1e-3], e.g. 1e-9",
        )
    })?;
    if !(delta > 0.0 && delta <= MAX_DELTA) {
        return Err(invalid(
            "privacy.delta",
            format!(
                "{delta} is out of range: valid values are in (0, {MAX_DELTA}]; δ should be far \
                 below 1/n for n privacy units (common practice), e.g. 1e-9"
            ),
        ));
    }
    let epoch_windows = int_in(
        raw.epoch_windows.ok_or_else(|| {
            missing(
                "privacy.epoch_windows",
                "the number of windows per epoch (tree leaves), 1 ..= 1048576",
            )
        })?,
        "privacy.epoch_windows",
        1,
        MAX_EPOCH_WINDOWS,
        " (2^20)",
    )?;
    let mechanism = match raw.mechanism.as_deref() {
        None => Mechanism::Tree,
        Some(name) => Mechanism::NAMES.iter().find(|(n, _)| *n == name).map(|(_, m)| *m).ok_or_else(|| {
            invalid(
                "privacy.mechanism",
                format!("\"{name}\" is not a mechanism: valid values are \"tree\", \"sqrt-factorization\", \"independent\""),
            )
        })?,
    };
    let unit_bounds = match &input.unit_field {
        Some(unit) => {
            let requirement = |key: &str, help: &str| {
                missing(
                    format!("privacy.{key}"),
                    format!(
                        "required because input.unit_field = \"{unit}\" makes the privacy unit a whole {unit}: {help}"
                    ),
                )
            };
            let lifetime_rho = raw.lifetime_rho.ok_or_else(|| {
                requirement(
                    "lifetime_rho",
                    "the cap on ρ one unit may lose over all epochs",
                )
            })?;
            let lifetime_rho = positive(lifetime_rho, "privacy.lifetime_rho", "the lifetime ρ")?;
            if lifetime_rho < rho_per_epoch {
                return Err(invalid(
                    "privacy.lifetime_rho",
                    format!(
                        "{lifetime_rho} is below privacy.rho_per_epoch ({rho_per_epoch}): a unit must be able \
                         to afford at least one epoch, so lifetime_rho ≥ rho_per_epoch"
                    ),
                ));
            }
            let max_events = raw.max_events_per_window.ok_or_else(|| {
                requirement(
                    "max_events_per_window",
                    "events one unit may contribute per window",
                )
            })?;
            let max_events_per_window = int_in(
                max_events,
                "privacy.max_events_per_window",
                1,
                MAX_EVENTS_PER_WINDOW,
                "",
            )?;
            let max_windows = raw.max_windows_per_epoch.ok_or_else(|| {
                requirement(
                    "max_windows_per_epoch",
                    "windows of one epoch a unit may contribute to",
                )
            })?;
            let max_windows_per_epoch = int_in(
                max_windows,
                "privacy.max_windows_per_epoch",
                1,
                i64::from(epoch_windows),
                " (at most privacy.epoch_windows)",
            )?;
            Some(UnitBounds {
                lifetime_rho,
                max_events_per_window,
                max_windows_per_epoch,
            })
        }
        None => {
            let event_level = "without input.unit_field scrim gives event-level privacy: every event is its \
                               own unit, so there is no per-unit bound and epochs compose in parallel; set \
                               input.unit_field to protect whole units, or remove this key";
            let present = [
                ("lifetime_rho", raw.lifetime_rho.is_some()),
                ("max_events_per_window", raw.max_events_per_window.is_some()),
                ("max_windows_per_epoch", raw.max_windows_per_epoch.is_some()),
            ];
            if let Some((key, _)) = present.iter().find(|(_, set)| *set) {
                return Err(not_allowed(format!("privacy.{key}"), event_level));
            }
            None
        }
    };
    Ok(PrivacyConfig {
        rho_per_epoch,
        delta,
        epoch_windows,
        mechanism,
        unit_bounds,
    })
}

/// Which keys each stat kind takes beyond the common ones (name, kind, group_by, weight,
/// trailing, keys).
fn kind_keys(kind: &str) -> &'static [&'static str] {
    match kind {
        "sum" | "mean" => &["field", "range"],
        "linear" => &[
            "target",
            "features",
            "intercept",
            "feature_norm_bound",
            "feature_bounds",
            "feature_ranges",
            "target_bound",
            "target_range",
            "fit",
            "ridge_lambda",
            "l1_radius",
        ],
        _ => &[],
    }
}

/// The kind-specific keys present in a raw stat, in declaration order.
fn present_kind_keys(raw: &RawStat) -> Vec<&'static str> {
    let present = [
        ("field", raw.field.is_some()),
        ("range", raw.range.is_some()),
        ("target", raw.target.is_some()),
        ("features", raw.features.is_some()),
        ("intercept", raw.intercept.is_some()),
        ("feature_norm_bound", raw.feature_norm_bound.is_some()),
        ("feature_bounds", raw.feature_bounds.is_some()),
        ("feature_ranges", raw.feature_ranges.is_some()),
        ("target_bound", raw.target_bound.is_some()),
        ("target_range", raw.target_range.is_some()),
        ("fit", raw.fit.is_some()),
        ("ridge_lambda", raw.ridge_lambda.is_some()),
        ("l1_radius", raw.l1_radius.is_some()),
    ];
    present
        .iter()
        .filter(|(_, set)| *set)
        .map(|(key, _)| *key)
        .collect()
}

/// Refuses a stat field that is the time or unit field: those are parsed specially and never
/// aggregated (the unit id must never be released).
fn check_value_field(field: &str, key: &str, input: &InputConfig) -> Result<(), ConfigError> {
    if field == input.time_field {
        return Err(invalid(
            key,
            format!("\"{field}\" is input.time_field; a stat cannot use the event time as a value"),
        ));
    }
    if input.unit_field.as_deref() == Some(field) {
        return Err(invalid(
            key,
            format!(
                "\"{field}\" is input.unit_field; the privacy unit's id is never aggregated or released"
            ),
        ));
    }
    Ok(())
}

fn resolve_stat(
    idx: usize,
    raw: RawStat,
    input: &InputConfig,
    privacy: &PrivacyConfig,
) -> Result<StatConfig, ConfigError> {
    let at = format!("stats[{idx}]");
    let key = |name: &str| format!("{at}.{name}");

    let name = raw
        .name
        .clone()
        .ok_or_else(|| missing(key("name"), "give the stat a name matching [a-z0-9_]+"))?;
    if name.is_empty()
        || !name
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_')
    {
        return Err(invalid(
            key("name"),
            format!("\"{name}\" is not a valid name: use one or more of a-z, 0-9 and _"),
        ));
    }
    let kind_name = raw.kind.clone().ok_or_else(|| {
        missing(
            key("kind"),
            "one of \"count\", \"sum\", \"mean\", \"linear\"",
        )
    })?;
    if !KIND_NAMES.contains(&kind_name.as_str()) {
        return Err(invalid(
            key("kind"),
            format!(
                "\"{kind_name}\" is not a kind: valid kinds are \"count\", \"sum\", \"mean\", \"linear\""
            ),
        ));
    }
    let allowed = kind_keys(&kind_name);
    if let Some(extra) = present_kind_keys(&raw)
        .into_iter()
        .find(|k| !allowed.contains(k))
    {
        let owner = if kind_keys("sum").contains(&extra) {
            "kind = \"sum\" or \"mean\""
        } else {
            "kind = \"linear\""
        };
        return Err(not_allowed(
            key(extra),
            format!("kind = \"{kind_name}\" does not take {extra}; it belongs to {owner}"),
        ));
    }

    let weight = positive(raw.weight.unwrap_or(1.0), &key("weight"), "a stat's weight")?;

    let mut trailing = Vec::new();
    for (t_idx, &windows) in raw.trailing.iter().flatten().enumerate() {
        let t_key = format!("{at}.trailing[{t_idx}]");
        let windows = int_in(
            windows,
            &t_key,
            2,
            i64::from(privacy.epoch_windows),
            " (a trailing scope spans at least 2 windows and at most privacy.epoch_windows)",
        )?;
        if trailing.contains(&windows) {
            return Err(invalid(
                t_key,
                format!("{windows} appears twice; list each trailing scope once"),
            ));
        }
        trailing.push(windows);
    }

    let group_by = resolve_groups(
        &at,
        raw.group_by.clone().unwrap_or_default(),
        raw.keys.clone().unwrap_or_default(),
        input,
    )?;

    let kind = match kind_name.as_str() {
        "count" => StatKind::Count,
        "sum" | "mean" => {
            let field = field_name(
                raw.field,
                &key("field"),
                "name the numeric event field to aggregate",
            )?;
            check_value_field(&field, &key("field"), input)?;
            let range = raw.range.ok_or_else(|| {
                missing(
                    key("range"),
                    "give the clamp range as [lo, hi] with finite lo < hi, e.g. [0, 900]",
                )
            })?;
            let range = match range.as_slice() {
                &[lo, hi] if lo.is_finite() && hi.is_finite() && lo < hi => (lo, hi),
                _ => {
                    return Err(invalid(
                        key("range"),
                        format!(
                            "{range:?} is not a range: write [lo, hi] with two finite numbers and lo < hi"
                        ),
                    ));
                }
            };
            if kind_name == "sum" {
                StatKind::Sum { field, range }
            } else {
                StatKind::Mean { field, range }
            }
        }
        _ => StatKind::Linear(resolve_linear(&at, raw, input)?),
    };
    Ok(StatConfig {
        name,
        kind,
        group_by,
        weight,
        trailing,
    })
}

fn resolve_groups(
    at: &str,
    group_by: Vec<String>,
    mut keys: BTreeMap<String, Vec<String>>,
    input: &InputConfig,
) -> Result<Vec<GroupField>, ConfigError> {
    let mut groups: Vec<GroupField> = Vec::with_capacity(group_by.len());
    for (g_idx, field) in group_by.into_iter().enumerate() {
        let g_key = format!("{at}.group_by[{g_idx}]");
        if field.is_empty() {
            return Err(invalid(
                g_key,
                "must not be empty: give the event field to group by",
            ));
        }
        check_value_field(&field, &g_key, input)?;
        if groups.iter().any(|g| g.field == field) {
            return Err(invalid(
                g_key,
                format!("\"{field}\" appears twice in group_by; list each field once"),
            ));
        }
        let k_key = format!("{at}.keys.{field}");
        let Some(list) = keys.remove(&field) else {
            return Err(missing(
                k_key,
                format!(
                    "group field \"{field}\" needs its public key list, e.g. [stats.keys] {field} = [\"a\", \"b\"]: \
                     released groups come from this list, never from the data"
                ),
            ));
        };
        if list.is_empty() || list.len() > MAX_GROUP_KEYS {
            return Err(invalid(
                k_key,
                format!(
                    "has {} keys: a group field takes 1 ..= {MAX_GROUP_KEYS} keys",
                    list.len()
                ),
            ));
        }
        let mut seen = BTreeSet::new();
        for (k_idx, group_key) in list.iter().enumerate() {
            if group_key.is_empty() {
                return Err(invalid(
                    format!("{k_key}[{k_idx}]"),
                    "keys must be non-empty strings",
                ));
            }
            if !seen.insert(group_key.as_str()) {
                return Err(invalid(
                    format!("{k_key}[{k_idx}]"),
                    format!("\"{group_key}\" appears twice; list each key once"),
                ));
            }
        }
        groups.push(GroupField { field, keys: list });
    }
    // What remains are key lists for fields the stat does not group by: almost surely a
    // forgotten group_by entry, so refuse rather than ignore.
    if let Some(field) = keys.keys().next() {
        return Err(not_allowed(
            format!("{at}.keys.{field}"),
            format!(
                "\"{field}\" is not in {at}.group_by; add it to group_by or remove its key list"
            ),
        ));
    }
    Ok(groups)
}

fn resolve_linear(
    at: &str,
    raw: RawStat,
    input: &InputConfig,
) -> Result<LinearConfig, ConfigError> {
    let key = |name: &str| format!("{at}.{name}");
    let target = field_name(
        raw.target,
        &key("target"),
        "name the numeric event field the model predicts",
    )?;
    check_value_field(&target, &key("target"), input)?;
    let features = raw.features.ok_or_else(|| {
        missing(
            key("features"),
            "list the numeric feature fields, e.g. [\"trip_km\"]",
        )
    })?;
    if features.is_empty() {
        return Err(invalid(
            key("features"),
            "is empty: list at least one numeric feature field",
        ));
    }
    for (f_idx, feature) in features.iter().enumerate() {
        let f_key = format!("{at}.features[{f_idx}]");
        if feature.is_empty() {
            return Err(invalid(
                f_key,
                "must not be empty: give a numeric event field",
            ));
        }
        check_value_field(feature, &f_key, input)?;
        if *feature == target {
            return Err(invalid(
                f_key,
                format!("\"{feature}\" is the target; a feature must be another field"),
            ));
        }
        if features[..f_idx].contains(feature) {
            return Err(invalid(
                f_key,
                format!("\"{feature}\" appears twice; list each feature once"),
            ));
        }
    }
    let feature_norm_bound = positive(
        raw.feature_norm_bound.ok_or_else(|| {
            missing(
                key("feature_norm_bound"),
                "the L2 clip of the feature vector, a finite number > 0",
            )
        })?,
        &key("feature_norm_bound"),
        "a clipping bound",
    )?;
    let feature_bounds = match &raw.feature_bounds {
        None => None,
        Some(b) => {
            if b.len() != features.len() {
                return Err(invalid(
                    key("feature_bounds"),
                    format!(
                        "{} bounds for {} features: give one clamp |x| ≤ b per feature, in the order of `features`",
                        b.len(),
                        features.len()
                    ),
                ));
            }
            let mut out = Vec::with_capacity(b.len());
            for v in b {
                out.push(positive(*v, &key("feature_bounds"), "a clipping bound")?);
            }
            Some(out)
        }
    };
    let target_bound = positive(
        raw.target_bound.ok_or_else(|| {
            missing(
                key("target_bound"),
                "the clip of |target|, a finite number > 0",
            )
        })?,
        &key("target_bound"),
        "a clipping bound",
    )?;
    let feature_ranges = match &raw.feature_ranges {
        None => None,
        Some(ranges) => {
            if feature_bounds.is_some() {
                return Err(not_allowed(
                    key("feature_ranges"),
                    "give either feature_bounds (|x| ≤ b) or feature_ranges ([lo, hi]) per feature, not both",
                ));
            }
            if ranges.len() != features.len() {
                return Err(invalid(
                    key("feature_ranges"),
                    format!(
                        "{} ranges for {} features: give one [lo, hi] per feature, in the order of `features`",
                        ranges.len(),
                        features.len()
                    ),
                ));
            }
            let mut out = Vec::with_capacity(ranges.len());
            for (r_idx, r) in ranges.iter().enumerate() {
                out.push(bounded_range(
                    r,
                    &format!("{}[{r_idx}]", key("feature_ranges")),
                    feature_norm_bound,
                    "feature_norm_bound",
                )?);
            }
            Some(out)
        }
    };
    let target_range = match &raw.target_range {
        None => None,
        Some(r) => Some(bounded_range(
            r,
            &key("target_range"),
            target_bound,
            "target_bound",
        )?),
    };
    let fit = match raw.fit.as_deref().unwrap_or("ridge") {
        "ridge" => {
            if raw.l1_radius.is_some() {
                return Err(not_allowed(
                    key("l1_radius"),
                    "l1_radius only applies with fit = \"l1\"",
                ));
            }
            let lambda = raw.ridge_lambda.unwrap_or(0.0);
            if !(lambda.is_finite() && lambda >= 0.0) {
                return Err(invalid(
                    key("ridge_lambda"),
                    format!(
                        "{lambda} is not allowed: the ridge penalty must be a finite number ≥ 0"
                    ),
                ));
            }
            FitConfig::Ridge { lambda }
        }
        "l1" => {
            if raw.ridge_lambda.is_some() {
                return Err(not_allowed(
                    key("ridge_lambda"),
                    "ridge_lambda only applies with fit = \"ridge\"",
                ));
            }
            let radius = raw.l1_radius.ok_or_else(|| {
                missing(
                    key("l1_radius"),
                    "fit = \"l1\" needs the L1 ball radius, a finite number > 0",
                )
            })?;
            FitConfig::L1 {
                radius: positive(radius, &key("l1_radius"), "the L1 radius")?,
            }
        }
        other => {
            return Err(invalid(
                key("fit"),
                format!("\"{other}\" is not a fit: valid values are \"ridge\", \"l1\""),
            ));
        }
    };
    Ok(LinearConfig {
        target,
        features,
        intercept: raw.intercept.unwrap_or(true),
        feature_norm_bound,
        feature_bounds,
        feature_ranges,
        target_bound,
        target_range,
        fit,
    })
}

/// A `[lo, hi]` clamp range of the linear kind: two finite numbers, lo < hi, both within
/// ±`bound` (the L2 or |y| clip it narrows, named `bound_key` in the message).
fn bounded_range(
    r: &[f64],
    at: &str,
    bound: f64,
    bound_key: &str,
) -> Result<(f64, f64), ConfigError> {
    match *r {
        [lo, hi] if lo.is_finite() && hi.is_finite() && lo < hi => {
            if lo < -bound || hi > bound {
                return Err(invalid(
                    at.to_string(),
                    format!(
                        "[{lo}, {hi}] reaches outside ±{bound} ({bound_key}): the range narrows that clip, so keep it within it or raise {bound_key}"
                    ),
                ));
            }
            Ok((lo, hi))
        }
        _ => Err(invalid(
            at.to_string(),
            format!("{r:?} is not a range: write [lo, hi] with two finite numbers and lo < hi"),
        )),
    }
}

/// The numeric fields a stat reads, in order.
fn number_fields(stat: &StatConfig) -> Vec<&str> {
    match &stat.kind {
        StatKind::Count => Vec::new(),
        StatKind::Sum { field, .. } | StatKind::Mean { field, .. } => vec![field.as_str()],
        StatKind::Linear(lin) => std::iter::once(lin.target.as_str())
            .chain(lin.features.iter().map(String::as_str))
            .collect(),
    }
}

/// Rules between stats: unique names, and no field both a category and a number. The second
/// exists because the line parser reads each field once, either into a public domain or as a
/// number ([`EventFields`]). Stats may group by the same field with different key lists; the
/// parser's domain is then their union.
fn check_across_stats(stats: &[StatConfig]) -> Result<(), ConfigError> {
    let mut names: HashMap<&str, usize> = HashMap::new();
    let mut numbers: HashMap<&str, usize> = HashMap::new();
    for (idx, stat) in stats.iter().enumerate() {
        if let Some(first) = names.insert(&stat.name, idx) {
            return Err(invalid(
                format!("stats[{idx}].name"),
                format!(
                    "\"{}\" is already the name of stats[{first}]; stat names must be unique",
                    stat.name
                ),
            ));
        }
        for field in number_fields(stat) {
            numbers.entry(field).or_insert(idx);
        }
    }
    // Reported at the group_by entry, in stat order.
    for (idx, stat) in stats.iter().enumerate() {
        for (g_idx, group) in stat.group_by.iter().enumerate() {
            if let Some(&other) = numbers.get(group.field.as_str()) {
                return Err(invalid(
                    format!("stats[{idx}].group_by[{g_idx}]"),
                    format!(
                        "\"{}\" is read as a number by stats[{other}]; a field is either a category with \
                         a key list or a number, not both",
                        group.field
                    ),
                ));
            }
        }
    }
    Ok(())
}

fn resolve_sources(raw: Vec<RawSource>) -> Result<Vec<SourceConfig>, ConfigError> {
    let mut sources = Vec::with_capacity(raw.len());
    for (idx, src) in raw.into_iter().enumerate() {
        let at = format!("sources[{idx}]");
        let key = |name: &str| format!("{at}.{name}");
        let kind = src
            .kind
            .as_deref()
            .ok_or_else(|| missing(key("kind"), "one of \"stdin\", \"file\", \"tcp\""))?;
        let allowed: &[&str] = match kind {
            "stdin" => &[],
            "file" => &["path"],
            "tcp" => &["listen", "max_connections", "idle_timeout"],
            other => {
                return Err(invalid(
                    key("kind"),
                    format!(
                        "\"{other}\" is not a source kind: valid kinds are \"stdin\", \"file\", \"tcp\""
                    ),
                ));
            }
        };
        let present = [
            ("path", src.path.is_some()),
            ("listen", src.listen.is_some()),
            ("max_connections", src.max_connections.is_some()),
            ("idle_timeout", src.idle_timeout.is_some()),
        ];
        if let Some((extra, _)) = present
            .iter()
            .find(|(name, set)| *set && !allowed.contains(name))
        {
            return Err(not_allowed(
                key(extra),
                format!(
                    "a \"{kind}\" source does not take {extra} (file takes path; tcp takes listen, max_connections, idle_timeout)"
                ),
            ));
        }
        let source = match kind {
            "stdin" => {
                if sources.contains(&SourceConfig::Stdin) {
                    return Err(invalid(
                        key("kind"),
                        "standard input can be read by only one source",
                    ));
                }
                SourceConfig::Stdin
            }
            "file" => {
                let path = src.path.unwrap_or_default();
                if path.is_empty() {
                    return Err(missing(key("path"), "a file source needs path = \"...\""));
                }
                SourceConfig::File {
                    path: PathBuf::from(path),
                }
            }
            _ => {
                let listen_text = src.listen.ok_or_else(|| {
                    missing(
                        key("listen"),
                        "a tcp source needs listen = \"IP:PORT\", e.g. \"127.0.0.1:9651\"",
                    )
                })?;
                let listen = socket_addr(&listen_text, &key("listen"))?;
                if sources.iter().any(
                    |s| matches!(s, SourceConfig::Tcp { listen: other, .. } if *other == listen),
                ) {
                    return Err(invalid(
                        key("listen"),
                        format!("{listen} is already used by another tcp source"),
                    ));
                }
                let max_connections = match src.max_connections {
                    None => DEFAULT_MAX_CONNECTIONS,
                    Some(n) => match usize::try_from(n) {
                        Ok(n) if n >= 1 => n,
                        _ => {
                            return Err(invalid(
                                key("max_connections"),
                                format!("{n} is not allowed: at least 1"),
                            ));
                        }
                    },
                };
                let idle_timeout =
                    duration_at_least(src.idle_timeout, &key("idle_timeout"), "5m", ONE_SECOND)?;
                SourceConfig::Tcp {
                    listen,
                    max_connections,
                    idle_timeout,
                }
            }
        };
        sources.push(source);
    }
    Ok(sources)
}

/// Parses `IP:PORT` (IPv6 as `[::1]:9650`); host names are refused so nothing is resolved at
/// start-up.
fn socket_addr(text: &str, key: &str) -> Result<SocketAddr, ConfigError> {
    text.parse().map_err(|_| {
        invalid(key, format!("\"{text}\" is not an address: write IP:PORT, e.g. \"127.0.0.1:9650\" or \"[::1]:9650\""))
    })
}

fn resolve_http(raw: RawHttp) -> Result<HttpConfig, ConfigError> {
    let listen = socket_addr(
        raw.listen.as_deref().unwrap_or("127.0.0.1:9650"),
        "http.listen",
    )?;
    let operator_token_file = match raw.operator_token_file {
        None => None,
        Some(p) if p.trim().is_empty() => {
            return Err(invalid(
                "http.operator_token_file",
                "is empty: give the path of a file holding the operator token, or leave the key out",
            ));
        }
        Some(p) => Some(PathBuf::from(p)),
    };
    Ok(HttpConfig {
        listen,
        operator_token_file,
    })
}

fn resolve_dir(value: Option<String>, key: &str, default: &str) -> Result<PathBuf, ConfigError> {
    let dir = value.unwrap_or_else(|| default.to_string());
    if dir.is_empty() {
        return Err(invalid(
            key,
            format!("must not be empty: give a directory (default \"{default}\")"),
        ));
    }
    Ok(PathBuf::from(dir))
}

// ---------------------------------------------------------------------------------------------
// Derived views
// ---------------------------------------------------------------------------------------------

/// Bumped whenever the fingerprint encoding changes, so old and new hashes never collide.
const FINGERPRINT_DOMAIN: &str = "scrim config fingerprint v1";

/// A length-prefixed encoder feeding blake3: every item is `tag, value` with both lengths
/// written first, so no two different configurations encode to the same bytes.
struct FingerprintWriter(blake3::Hasher);

impl FingerprintWriter {
    fn bytes(&mut self, tag: &str, value: &[u8]) {
        for part in [tag.as_bytes(), value] {
            self.0.update(&(part.len() as u64).to_le_bytes());
            self.0.update(part);
        }
    }
    fn text(&mut self, tag: &str, value: &str) {
        self.bytes(tag, value.as_bytes());
    }
    /// Floats by their exact bits: 0.1 and 0.1000000000000001 are different guarantees.
    fn float(&mut self, tag: &str, value: f64) {
        self.bytes(tag, &value.to_bits().to_le_bytes());
    }
    fn int(&mut self, tag: &str, value: i64) {
        self.bytes(tag, &value.to_le_bytes());
    }
    /// Lengths and sizes; usize is at most 64 bits on every supported target.
    fn count(&mut self, tag: &str, value: usize) {
        self.bytes(tag, &(value as u64).to_le_bytes());
    }
}

impl Config {
    /// Every field name the events must carry, for the parser schema.
    pub fn event_fields(&self) -> EventFields {
        let mut categories: Vec<(String, Vec<String>)> = Vec::new();
        let mut numbers: Vec<String> = Vec::new();
        for stat in &self.stats {
            for group in &stat.group_by {
                match categories
                    .iter_mut()
                    .find(|(field, _)| *field == group.field)
                {
                    // A field shared by several stats: the union, in order of first mention.
                    Some((_, domain)) => {
                        for key in &group.keys {
                            if !domain.contains(key) {
                                domain.push(key.clone());
                            }
                        }
                    }
                    None => categories.push((group.field.clone(), group.keys.clone())),
                }
            }
            for field in number_fields(stat) {
                if !numbers.iter().any(|n| n == field) {
                    numbers.push(field.to_string());
                }
            }
        }
        EventFields {
            time_field: self.input.time_field.clone(),
            unit_field: self.input.unit_field.clone(),
            categories,
            numbers,
            max_line_bytes: self.input.max_line_bytes,
        }
    }

    /// A stable hash (blake3, hex) of everything that affects the privacy guarantee: the
    /// `[input]` section, the window length, the whole privacy section and every stat (name,
    /// kind, fields, ranges, bounds, fit, group keys, weight, trailing), in order. State saved
    /// under one fingerprint must not be resumed under another.
    ///
    /// `allowed_lateness`, `max_line_bytes` and `idle_close` are in as well: they do not
    /// change one unit's sensitivity, but they decide which events are accepted and when a
    /// logged wall-clock tick closes a window, so a log of inputs replayed under other values
    /// could derive releases that differ from those already published (the same tree nodes,
    /// hence the same noise, over different data).
    ///
    /// Left out, because they cannot change what a release reveals (contract.md, "Config"):
    /// sources, http, output and state.
    pub fn fingerprint(&self) -> String {
        let mut w = FingerprintWriter(blake3::Hasher::new());
        w.text("domain", FINGERPRINT_DOMAIN);
        w.text("input.time_field", &self.input.time_field);
        match &self.input.unit_field {
            Some(unit) => w.text("input.unit_field", unit),
            None => w.text("input.unit_field.none", ""),
        }
        w.count("input.max_line_bytes", self.input.max_line_bytes);
        w.int("window.length", self.window.length.0);
        w.int("window.allowed_lateness", self.window.allowed_lateness.0);
        w.int("window.idle_close", self.window.idle_close.0);
        let p = &self.privacy;
        w.float("privacy.rho_per_epoch", p.rho_per_epoch);
        w.float("privacy.delta", p.delta);
        w.int("privacy.epoch_windows", i64::from(p.epoch_windows));
        w.text("privacy.mechanism", p.mechanism.label());
        if let Some(b) = &p.unit_bounds {
            w.float("privacy.lifetime_rho", b.lifetime_rho);
            w.int(
                "privacy.max_events_per_window",
                i64::from(b.max_events_per_window),
            );
            w.int(
                "privacy.max_windows_per_epoch",
                i64::from(b.max_windows_per_epoch),
            );
        }
        w.count("stats.len", self.stats.len());
        for stat in &self.stats {
            w.text("stat.name", &stat.name);
            w.text("stat.kind", stat.kind.label());
            match &stat.kind {
                StatKind::Count => {}
                StatKind::Sum { field, range } | StatKind::Mean { field, range } => {
                    w.text("stat.field", field);
                    w.float("stat.range.lo", range.0);
                    w.float("stat.range.hi", range.1);
                }
                StatKind::Linear(lin) => {
                    w.text("stat.target", &lin.target);
                    w.count("stat.features.len", lin.features.len());
                    for feature in &lin.features {
                        w.text("stat.feature", feature);
                    }
                    w.int("stat.intercept", i64::from(lin.intercept));
                    w.float("stat.feature_norm_bound", lin.feature_norm_bound);
                    if let Some(b) = &lin.feature_bounds {
                        w.count("stat.feature_bounds.len", b.len());
                        for v in b {
                            w.float("stat.feature_bound", *v);
                        }
                    }
                    if let Some(ranges) = &lin.feature_ranges {
                        w.count("stat.feature_ranges.len", ranges.len());
                        for (lo, hi) in ranges {
                            w.float("stat.feature_range.lo", *lo);
                            w.float("stat.feature_range.hi", *hi);
                        }
                    }
                    w.float("stat.target_bound", lin.target_bound);
                    if let Some((lo, hi)) = lin.target_range {
                        w.float("stat.target_range.lo", lo);
                        w.float("stat.target_range.hi", hi);
                    }
                    match lin.fit {
                        FitConfig::Ridge { lambda } => w.float("stat.fit.ridge", lambda),
                        FitConfig::L1 { radius } => w.float("stat.fit.l1", radius),
                    }
                }
            }
            w.count("stat.group_by.len", stat.group_by.len());
            for group in &stat.group_by {
                w.text("stat.group.field", &group.field);
                w.count("stat.group.keys.len", group.keys.len());
                for key in &group.keys {
                    w.text("stat.group.key", key);
                }
            }
            w.float("stat.weight", stat.weight);
            w.count("stat.trailing.len", stat.trailing.len());
            for &t in &stat.trailing {
                w.int("stat.trailing", i64::from(t));
            }
        }
        w.0.finalize().to_hex().to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn key_probe_reads_serde_field_names() {
        // The declared keys must be exactly the struct fields, in declaration order.
        assert_eq!(
            declared_keys::<RawHttp>(),
            &["listen", "operator_token_file"]
        );
        assert_eq!(declared_keys::<RawState>(), &["dir", "checkpoint_interval"]);
        assert_eq!(
            declared_keys::<RawConfig>(),
            &[
                "input", "window", "privacy", "stats", "sources", "http", "output", "state"
            ]
        );
    }

    #[test]
    fn dotted_restores_the_dot_after_an_index() {
        assert_eq!(dotted("stats[0]group_by"), "stats[0].group_by");
        assert_eq!(dotted("stats[1]range[0]"), "stats[1].range[0]");
        assert_eq!(dotted("stats[1].keys.zone[2]"), "stats[1].keys.zone[2]");
        assert_eq!(dotted("privacy.delta"), "privacy.delta");
    }

    #[test]
    fn env_names_map_to_key_paths_like_the_config_crate() {
        // config 0.15 Environment::collect: lowercase, strip "scrim_", "__" -> "." (crates.md).
        let env: HashMap<String, String> = [
            ("SCRIM_PRIVACY__RHO_PER_EPOCH", "1"),
            ("scrim_window__length", "1h"),
            ("PATH", "/bin"),
            ("SCRIMSHAW", "x"),
        ]
        .into_iter()
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect();
        let o = EnvOverrides::new(&env).unwrap();
        assert_eq!(
            o.variable_for("privacy.rho_per_epoch").as_deref(),
            Some("SCRIM_PRIVACY__RHO_PER_EPOCH")
        );
        assert_eq!(
            o.variable_for("privacy").as_deref(),
            Some("SCRIM_PRIVACY__RHO_PER_EPOCH")
        );
        assert_eq!(
            o.variable_for("window.length").as_deref(),
            Some("scrim_window__length")
        );
        assert_eq!(o.variable_for("priv"), None);
        assert_eq!(o.by_path.len(), 2);
    }
}
