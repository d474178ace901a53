//! The release record: scrim's public output boundary (`releases.jsonl` and the HTTP API).
//!
//! This is one of the few serialisable types; its field names are fixed by the outside
//! contract and its shape by `ops/release.schema.json`. A record is built by the engine
//! from an [`EpochCharge`](crate::engine::ledger::EpochCharge), i.e. only after the epoch's
//! budget was charged, and never changes once published.

use std::borrow::Borrow;
use std::collections::BTreeMap;
use std::fmt;
use std::ops::Deref;
use std::sync::Arc;

use serde::{Deserialize, Deserializer, Serialize, Serializer};

/// An immutable string shared between records: one window close gives every group a
/// record with the same statistic name, kind, scope label and window bounds, and cloning
/// this costs a reference count instead of an allocation (issue 9: per-record string
/// copies were most of closing a window with 100,000 groups). It serialises and compares
/// exactly as the string it holds.
#[derive(Clone, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct SharedStr(Arc<str>);

impl SharedStr {
    /// The text.
    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl Deref for SharedStr {
    type Target = str;
    fn deref(&self) -> &str {
        &self.0
    }
}

impl Borrow<str> for SharedStr {
    fn borrow(&self) -> &str {
        &self.0
    }
}

impl AsRef<str> for SharedStr {
    fn as_ref(&self) -> &str {
        &self.0
    }
}

impl From<&str> for SharedStr {
    fn from(s: &str) -> Self {
        SharedStr(Arc::from(s))
    }
}

impl From<String> for SharedStr {
    fn from(s: String) -> Self {
        SharedStr(Arc::from(s))
    }
}

impl From<SharedStr> for String {
    fn from(s: SharedStr) -> Self {
        s.0.to_string()
    }
}

impl PartialEq<str> for SharedStr {
    fn eq(&self, other: &str) -> bool {
        *self.0 == *other
    }
}

impl PartialEq<&str> for SharedStr {
    fn eq(&self, other: &&str) -> bool {
        *self.0 == **other
    }
}

impl PartialEq<String> for SharedStr {
    fn eq(&self, other: &String) -> bool {
        *self.0 == **other
    }
}

impl fmt::Display for SharedStr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl fmt::Debug for SharedStr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        fmt::Debug::fmt(&*self.0, f)
    }
}

impl Serialize for SharedStr {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&self.0)
    }
}

impl<'de> Deserialize<'de> for SharedStr {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        String::deserialize(deserializer).map(SharedStr::from)
    }
}

/// The privacy guarantee that covers one record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Guarantee {
    /// The privacy unit field (e.g. `card`); `null` for event-level privacy.
    pub unit: Option<String>,
    /// `"unit"` or `"event"`.
    pub level: String,
    /// zCDP of one epoch of releases, all statistics together.
    pub rho: f64,
    /// Lifetime zCDP cap (unit level), `null` at event level.
    pub lifetime_rho: Option<f64>,
    /// ε of one epoch at `delta` (Canonne, Kamath & Steinke 2020 conversion).
    pub epsilon: f64,
    /// δ.
    pub delta: f64,
    /// `tree`, `sqrt-factorization` or `independent`.
    pub mechanism: String,
}

/// Noisy sufficient statistics carried by linear records, so consumers can refit.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Statistics {
    /// Coordinate names (e.g. `n`, `sum:trip_km`, `xx:trip_km:transfers`, `yy`).
    pub names: Vec<String>,
    /// Released values, value units.
    pub values: Vec<f64>,
    /// Standard deviation of the noise of every coordinate (they are independent).
    pub std_error: f64,
    /// Unit of each component of z = (1, features…, target): statistics are in normalised
    /// units, z'_a = (z_a − centres\[a\]) / scales\[a\], and coordinate (a, b) is Σ z'_a z'_b.
    pub scales: Vec<f64>,
    /// Centre of each component of z, in value units (0 for the constant and whenever the
    /// configuration gives no ranges): see `scales`.
    pub centres: Vec<f64>,
}

/// One release record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Release {
    /// Strictly increasing across restarts.
    pub seq: u64,
    /// Statistic name.
    pub stat: SharedStr,
    /// `count`, `sum`, `mean` or `linear`.
    pub kind: SharedStr,
    /// `window`, `epoch_to_date` or `trailing:N`.
    pub scope: SharedStr,
    /// Group keys (empty when ungrouped), shared by the group's records of one close.
    pub group: Arc<BTreeMap<String, String>>,
    /// Start of the span (RFC 3339, UTC).
    pub window_start: SharedStr,
    /// End of the span, exclusive.
    pub window_end: SharedStr,
    /// Released estimate: a number; `null` for an undefined mean; an object for linear.
    pub value: serde_json::Value,
    /// Standard deviation of the estimate's noise, same shape as `value`.
    pub std_error: serde_json::Value,
    /// Epoch number.
    pub epoch: u64,
    /// Leaf (window) index within the epoch of the window that triggered the release.
    pub leaf: u32,
    /// The guarantee (one per engine, shared by its records).
    pub guarantee: Arc<Guarantee>,
    /// True when the noise came from a fixed seed (tests and replays only): not private.
    pub seeded: bool,
    /// Why a value is null, or how `std_error` was computed when it is approximate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    /// The seq of an earlier record this one improves on.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub supersedes: Option<u64>,
    /// Linear kind: the noisy sufficient statistics.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub statistics: Option<Statistics>,
    /// Linear kind: condition number of the (scaled, centred) system that was solved.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub condition_number: Option<f64>,
    /// Linear kind: `ridge` or `l1`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fit: Option<String>,
    /// The exact (un-noised) value, kept only when the engine runs with
    /// `EngineOptions::danger_keep_truth` for the demo and tests. Never serialised.
    #[serde(skip)]
    pub truth: Option<serde_json::Value>,
}

/// A JSON number, or `null` when not finite (JSON has no NaN).
pub fn number(x: f64) -> serde_json::Value {
    serde_json::Number::from_f64(x).map_or(serde_json::Value::Null, serde_json::Value::Number)
}
