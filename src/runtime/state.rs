//! Crash-safe state: a write-ahead log of everything the engine consumed, the noise key,
//! and metadata that pins the configuration the guarantee was planned for.
//!
//! # Why a log of inputs is enough
//! The engine is deterministic and every node's noise is derived from the key and the
//! node's identity. Feeding the same inputs (lines, wall-clock ticks that closed windows,
//! I/O-level rejections) to a fresh engine with the same key therefore rebuilds exactly the
//! same state — open windows, bounding counters, tree nodes *with the same noise*, ledger
//! and release sequence — and regenerates exactly the same releases with the same `seq`.
//! A restart can never draw a second noisy copy of a published quantity.
//!
//! # Write-ahead order
//! The driver appends inputs to the log before the engine sees them, and calls
//! [`StateDir::sync`] (fsync) before any release they caused is written to
//! `releases.jsonl` or shown over HTTP. On restart, regenerated releases whose `seq` is
//! already in `releases.jsonl` are checked and skipped; later ones are written once.
//!
//! # Generations
//! The configuration is pinned by fingerprint. The only way to change it is a deliberate
//! fresh epoch (`scrim state new-epoch`), which starts a new *generation*: the old one is
//! replayed with the configuration it was pinned to, what it spent and where it stopped are
//! recorded in `ledger.jsonl`, and the new generation starts from that carry
//! ([`crate::engine::core::Carry`]) with an empty log. See [`Current::commit`] for the
//! crash-safe order.
//!
//! # Files (directory 0700, files 0600)
//! - `key` — the 32-byte noise key (absent for seeded runs, whose key is the seed's).
//! - `meta.json` — format version, the first generation's config fingerprint, key
//!   fingerprint, seeded flag.
//! - `config.toml` (generation 0) or `config.N.toml` — the resolved configuration the
//!   current generation is pinned to, first line a checksum of the rest; its fingerprint
//!   must be the generation's. Lets `new-epoch` replay the log without the old file.
//! - `wal` (generation 0) or `wal.N` — records `[len u32 LE][check u32 LE][kind u8][payload]`,
//!   where `check` is the first 4 bytes of BLAKE3 over kind and payload. A torn final record
//!   (crash during a write) is cut off; a bad record followed by valid data is corruption
//!   and refuses start.
//! - `ledger.jsonl` — one checksummed JSON line per generation after the first
//!   ([`Generation`]); rewritten atomically, never cut.
//! - `lock` — held (advisory `flock`) by the one process using the directory.

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::config::Config;
use crate::engine::Engine;
use crate::engine::core::Carry;
use crate::engine::event::RejectReason;
use crate::engine::noise::{EventHash, NoiseKey};
use crate::engine::time::Millis;

/// Newest state format this build reads, and the one it creates.
///
/// - 1: no `ledger.jsonl`; events hashed with keyed BLAKE3 (`EventHash::Blake3`).
/// - 2: as 1, with generations (`ledger.jsonl`). `new-epoch` raises a format-1 state to 2
///   before it writes a ledger, so builds that only know format 1 refuse it instead of
///   ignoring the ledger.
/// - 3: `meta.json` records the event hash (`event_hash`), SipHash-2-4 for every state
///   created since. Builds that know only 1 and 2 would hash its events with BLAKE3, so
///   they must refuse it, and do: they refuse any format above theirs.
///
/// Formats 1 and 2 stay readable and keep BLAKE3 for their whole life (see
/// [`EventHash`]): a state's event hash never changes.
pub const FORMAT_VERSION: u32 = 3;
/// Lowest format that may have generations.
const FORMAT_GENERATIONS: u32 = 2;

const KIND_LINE: u8 = 1;
const KIND_TICK: u8 = 2;
const KIND_REJECT: u8 = 3;
const KIND_OFFSET: u8 = 4;
const KIND_FINISH: u8 = 5;
const KIND_BATCH: u8 = 6;

const META: &str = "meta.json";
const KEY: &str = "key";
const LEDGER: &str = "ledger.jsonl";
const LOCK: &str = "lock";

/// One logged input.
#[derive(Clone, Debug, PartialEq)]
pub enum WalRecord {
    /// A raw input line.
    Line(Vec<u8>),
    /// A wall-clock tick that closed at least one window.
    Tick(Millis),
    /// An I/O-level rejection (its reason label).
    Reject(String),
    /// A file source's byte offset after the preceding lines.
    Offset {
        /// Source index in the config.
        source: u32,
        /// Byte offset.
        offset: u64,
    },
    /// End of input (replay): every window with data was closed.
    Finish,
    /// Several lines logged atomically, with the offset of a file source after them.
    Batch {
        /// The lines.
        lines: Vec<Vec<u8>>,
        /// `(source, offset)` for file sources.
        offset: Option<(u32, u64)>,
    },
}

fn seq_text(seq: &Option<u64>) -> String {
    seq.map_or_else(
        || "no release".to_string(),
        |s| format!("releases up to seq {s}"),
    )
}

/// Why the state directory cannot be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StateError {
    /// A file failed its checksum or parse.
    #[error(
        "state file {path} is corrupt ({detail}); refusing to start. Restore the state directory from a backup; do not delete it (that would reset the privacy budget)"
    )]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What was wrong.
        detail: String,
    },
    /// Written by a newer scrim.
    #[error(
        "state in {path} has format {found}, newer than this build's {supported}; run a newer scrim"
    )]
    NewerFormat {
        /// meta.json.
        path: PathBuf,
        /// Found version.
        found: u32,
        /// Supported version.
        supported: u32,
    },
    /// The config changed in a way that breaks the guarantee mid-stream.
    #[error(
        "the configuration changed since this state was created (privacy-relevant fingerprint {old} → {new}): bounds, budget, epoch length, mechanism, statistics, keys or weights may not change mid-stream. Restore the old config; or, after a privacy review, change it deliberately with `scrim state new-epoch --config NEW --reason TEXT`, which abandons the current epoch and charges the new configuration on top of what was spent"
    )]
    ConfigChanged {
        /// Fingerprint in the state.
        old: String,
        /// Fingerprint of the config given.
        new: String,
    },
    /// The key source differs (seeded vs OS, or another seed).
    #[error(
        "state in {path} was created with a different noise key ({detail}); use the same --seed (or none) as when it was created"
    )]
    KeyMismatch {
        /// meta.json.
        path: PathBuf,
        /// Explanation.
        detail: String,
    },
    /// Another process holds the directory's lock.
    #[error(
        "state directory {path} is in use by another scrim process; stop it first (one process per state directory)"
    )]
    InUse {
        /// The directory.
        path: PathBuf,
    },
    /// There is no state to continue.
    #[error("{path} holds no scrim state (no meta.json); there is nothing to continue")]
    Missing {
        /// The directory.
        path: PathBuf,
    },
    /// `releases.jsonl` holds records the state cannot regenerate.
    #[error(
        "{releases} holds releases up to seq {published} but the state in {state} reproduces {}: the state is older than the output (restored from an older backup, or its log lost records). Refusing to start: continuing would publish other data under seq numbers and noise already used. Restore the state directory and releases.jsonl from the same backup, or the newest state that covers the file; never delete or edit releases.jsonl to get past this",
        seq_text(.reproduced)
    )]
    OlderThanOutput {
        /// releases.jsonl.
        releases: PathBuf,
        /// The state directory.
        state: PathBuf,
        /// Last seq in releases.jsonl.
        published: u64,
        /// Last seq the state regenerates (or that earlier generations published).
        reproduced: Option<u64>,
    },
    /// A format-1 state has no stored configuration.
    #[error(
        "state in {path} has no stored configuration (it was created by an older scrim); give the configuration it runs under with --previous-config FILE"
    )]
    NoPreviousConfig {
        /// The directory.
        path: PathBuf,
    },
    /// `--previous-config` is not the configuration the state is pinned to.
    #[error(
        "--previous-config has fingerprint {given}, but the state's current generation is pinned to {pinned}; give the configuration it actually ran under"
    )]
    PreviousConfigMismatch {
        /// Fingerprint of the state's current generation.
        pinned: String,
        /// Fingerprint of the file given.
        given: String,
    },
    /// The new configuration protects another unit (or switches event/unit level).
    #[error(
        "the new configuration changes the privacy unit ({old} → {new}); what was spent for one unit says nothing about another, so this is a new deployment with its own state directory, not a new epoch"
    )]
    UnitChanged {
        /// The old unit (`event level` or the unit field).
        old: String,
        /// The new one.
        new: String,
    },
    /// `--start` lies before the end of the last released window.
    #[error(
        "--start {start} is before the end of the last closed window ({earliest}); a new epoch can only start after everything already released"
    )]
    StartTooEarly {
        /// Requested start.
        start: String,
        /// End of the last closed window.
        earliest: String,
    },
    /// The lifetime budget cannot pay for one epoch of the new configuration.
    #[error(
        "the new configuration needs rho {needed} for its first epoch but the deployment already spent {spent} of privacy.lifetime_rho = {lifetime}; nothing was changed (a smaller rho_per_epoch may fit; raising lifetime_rho needs a privacy review)"
    )]
    OverBudget {
        /// Lifetime spend so far.
        spent: f64,
        /// One epoch of the new configuration.
        needed: f64,
        /// The new configuration's cap.
        lifetime: f64,
    },
    /// The configuration cannot be stored faithfully (a bug: the rendering lost a setting).
    #[error("cannot store the configuration in the state directory: {0}")]
    Unrepresentable(String),
    /// I/O failure.
    #[error("state directory {path}: {source}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// OS error.
        source: std::io::Error,
    },
}

#[derive(Clone, Serialize, Deserialize)]
struct Meta {
    format: u32,
    config_fingerprint: String,
    key_fingerprint: String,
    seeded: bool,
    /// [`EventHash::name`]; absent before format 3 (BLAKE3).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    event_hash: Option<String>,
}

impl Meta {
    /// The state's event hash: recorded from format 3 on, BLAKE3 before.
    fn event_hash(&self, path: &Path) -> Result<EventHash, StateError> {
        match (&self.event_hash, self.format >= 3) {
            (None, false) => Ok(EventHash::Blake3),
            (Some(name), true) => EventHash::from_name(name).ok_or_else(|| {
                corrupt(
                    path,
                    format!(
                        "unknown event_hash {name:?} (this build knows blake3-v1 and siphash24-v1)"
                    ),
                )
            }),
            (None, true) => Err(corrupt(path, "format 3 or later without event_hash")),
            (Some(_), false) => Err(corrupt(
                path,
                format!("event_hash recorded in a format {} state", self.format),
            )),
        }
    }
}

/// One generation after the first, as recorded in `ledger.jsonl`: what the deployment had
/// spent and where it stood when the generation began. A file boundary type.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Generation {
    /// 1, 2, … in order.
    pub generation: u32,
    /// Wall-clock time of `new-epoch` (RFC 3339).
    pub created: String,
    /// The operator's reason.
    pub reason: String,
    /// Fingerprint of the configuration this generation is pinned to.
    pub config_fingerprint: String,
    /// Fingerprint of the previous generation's configuration.
    pub previous_fingerprint: String,
    /// Start of the first window, epoch ms (None: set by the first event).
    pub start_ms: Option<i64>,
    /// Index of the first epoch; lower indices belong to earlier generations.
    pub first_epoch: u64,
    /// `seq` of the first release.
    pub next_seq: u64,
    /// zCDP spent by all earlier generations, the abandoned epoch included.
    pub spent_rho: f64,
    /// Epochs charged by all earlier generations.
    pub epochs_charged: u64,
    /// The previous generation's epoch that was charged but cut short, if any.
    pub abandoned_epoch: Option<u64>,
    /// First 8 bytes of BLAKE3 (hex) over this record serialised with `check` empty.
    pub check: String,
}

impl Generation {
    fn checksum(&self) -> String {
        let mut bare = self.clone();
        bare.check = String::new();
        let text = serde_json::to_string(&bare).unwrap_or_default();
        hex8(blake3::hash(text.as_bytes()).as_bytes())
    }

    /// The engine's starting point for this generation.
    pub fn carry(&self) -> Carry {
        Carry {
            start: self.start_ms.map(Millis),
            first_epoch: self.first_epoch,
            next_seq: self.next_seq,
            spent_rho: self.spent_rho,
            epochs_charged: self.epochs_charged,
        }
    }
}

fn hex8(bytes: &[u8]) -> String {
    bytes.iter().take(8).map(|b| format!("{b:02x}")).collect()
}

/// An open state directory.
pub struct StateDir {
    dir: PathBuf,
    wal: BufWriter<File>,
    dirty: bool,
    generation: u32,
    carry: Carry,
    /// See [`StateDir::discard_unconfirmed_lines`]; `None` once anything was appended.
    trailing_lines_from: Option<u64>,
    /// Held for the lifetime of the value: one process per state directory.
    _lock: File,
}

fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> StateError + '_ {
    move |source| StateError::Io {
        path: path.to_path_buf(),
        source,
    }
}

fn corrupt(path: &Path, detail: impl Into<String>) -> StateError {
    StateError::Corrupt {
        path: path.to_path_buf(),
        detail: detail.into(),
    }
}

fn check(kind: u8, payload: &[u8]) -> u32 {
    let mut h = blake3::Hasher::new();
    h.update(&[kind]);
    h.update(payload);
    let b = h.finalize();
    u32::from_le_bytes([
        b.as_bytes()[0],
        b.as_bytes()[1],
        b.as_bytes()[2],
        b.as_bytes()[3],
    ])
}

fn key_fingerprint(key: &NoiseKey) -> String {
    // A keyed hash of a constant under the key: identifies the key without revealing it.
    format!("{:016x}", key.hash64("state-key-fingerprint", b"scrim"))
}

/// Writes `bytes` to `path` atomically: temp file, fsync, rename, fsync the directory.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    let tmp = path.with_extension("tmp");
    {
        let mut f = private_file(&tmp, true)?;
        f.write_all(bytes)?;
        f.sync_all()?;
    }
    std::fs::rename(&tmp, path)?;
    File::open(dir)?.sync_all()
}

fn private_file(path: &Path, truncate: bool) -> std::io::Result<File> {
    let mut o = OpenOptions::new();
    o.write(true).create(true);
    if truncate {
        o.truncate(true);
    } else {
        o.append(true);
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        o.mode(0o600);
    }
    o.open(path)
}

fn create_private_dir(dir: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(dir, std::fs::Permissions::from_mode(0o700))?;
    }
    Ok(())
}

fn sync_dir(dir: &Path) -> Result<(), StateError> {
    File::open(dir)
        .and_then(|d| d.sync_all())
        .map_err(io_err(dir))
}

/// Takes the directory's advisory lock, so that no second process (a daemon and a
/// `new-epoch`, say) appends to or deletes a log another one is using. The OS releases it
/// when the process exits, however it exits.
fn lock_dir(dir: &Path) -> Result<File, StateError> {
    let path = dir.join(LOCK);
    let f = private_file(&path, false).map_err(io_err(&path))?;
    match f.try_lock() {
        Ok(()) => Ok(f),
        Err(std::fs::TryLockError::WouldBlock) => Err(StateError::InUse {
            path: dir.to_path_buf(),
        }),
        Err(std::fs::TryLockError::Error(e)) => Err(StateError::Io { path, source: e }),
    }
}

/// Log file of generation `g`.
fn wal_name(g: u32) -> String {
    if g == 0 {
        "wal".to_string()
    } else {
        format!("wal.{g}")
    }
}

/// Stored configuration of generation `g`.
fn config_name(g: u32) -> String {
    if g == 0 {
        "config.toml".to_string()
    } else {
        format!("config.{g}.toml")
    }
}

/// The generation a per-generation file name belongs to.
fn generation_of(name: &str) -> Option<u32> {
    match name {
        "wal" | "config.toml" => Some(0),
        _ => name
            .strip_prefix("wal.")
            .or_else(|| {
                name.strip_prefix("config.")
                    .and_then(|r| r.strip_suffix(".toml"))
            })
            .and_then(|n| n.parse().ok())
            .filter(|g| *g > 0),
    }
}

fn read_meta(dir: &Path) -> Result<Option<Meta>, StateError> {
    let path = dir.join(META);
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(StateError::Io { path, source: e }),
    };
    let meta: Meta = serde_json::from_str(&text).map_err(|e| corrupt(&path, e.to_string()))?;
    if meta.format > FORMAT_VERSION {
        return Err(StateError::NewerFormat {
            path,
            found: meta.format,
            supported: FORMAT_VERSION,
        });
    }
    meta.event_hash(&path)?;
    Ok(Some(meta))
}

fn write_meta(dir: &Path, meta: &Meta) -> Result<(), StateError> {
    let path = dir.join(META);
    let text = serde_json::to_string_pretty(meta).unwrap_or_default();
    write_atomic(&path, text.as_bytes()).map_err(io_err(&path))
}

/// The noise key: the seed's, or the stored one (created from the OS when there is no
/// state yet).
fn load_key(dir: &Path, seed: Option<u64>, meta: Option<&Meta>) -> Result<NoiseKey, StateError> {
    let key_path = dir.join(KEY);
    let meta_path = dir.join(META);
    let key = match seed {
        Some(s) => NoiseKey::from_seed(s),
        None if key_path.exists() => {
            let mut bytes = Vec::new();
            File::open(&key_path)
                .and_then(|mut f| f.read_to_end(&mut bytes))
                .map_err(io_err(&key_path))?;
            let arr: [u8; 32] = bytes.as_slice().try_into().map_err(|_| {
                corrupt(
                    &key_path,
                    format!("expected 32 bytes, found {}", bytes.len()),
                )
            })?;
            NoiseKey::from_bytes(arr)
        }
        None => {
            if meta.is_some() {
                return Err(StateError::KeyMismatch {
                    path: meta_path,
                    detail: "the state was created with --seed but none was given".to_string(),
                });
            }
            let key = crate::runtime::os_noise_key().map_err(io_err(&key_path))?;
            write_atomic(&key_path, key.as_bytes()).map_err(io_err(&key_path))?;
            key
        }
    };
    if let Some(meta) = meta
        && meta.key_fingerprint != key_fingerprint(&key)
    {
        return Err(StateError::KeyMismatch {
            path: meta_path,
            detail: if meta.seeded {
                "it was seeded with another seed".into()
            } else {
                "its key file differs".into()
            },
        });
    }
    // The event hash travels with the key, so every engine built from a state hashes
    // events as the state always has.
    match meta {
        Some(meta) => Ok(key.with_event_hash(meta.event_hash(&meta_path)?)),
        None => Ok(key),
    }
}

/// Reads `ledger.jsonl`. Every line must be complete and pass its checksum, and the
/// generations must be numbered 1, 2, … A damaged ledger is refused, never cut: the
/// file is only ever replaced atomically (so a crash cannot tear it), and dropping its last
/// line would fall back to a generation whose log is already deleted — silently resetting
/// what was spent.
fn read_ledger(dir: &Path) -> Result<Vec<Generation>, StateError> {
    let path = dir.join(LEDGER);
    let text = match std::fs::read(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(e) => return Err(StateError::Io { path, source: e }),
    };
    if !text.is_empty() && text.last() != Some(&b'\n') {
        return Err(corrupt(&path, "the last line is incomplete"));
    }
    let mut out = Vec::new();
    for (i, line) in text
        .split(|&b| b == b'\n')
        .filter(|l| !l.is_empty())
        .enumerate()
    {
        let g: Generation = serde_json::from_slice(line)
            .map_err(|e| corrupt(&path, format!("line {}: {e}", i + 1)))?;
        if g.check != g.checksum() {
            return Err(corrupt(&path, format!("line {}: checksum mismatch", i + 1)));
        }
        if g.generation as usize != i + 1 {
            return Err(corrupt(
                &path,
                format!("line {} records generation {}", i + 1, g.generation),
            ));
        }
        out.push(g);
    }
    Ok(out)
}

/// First line of a stored configuration: `# check <hex>` over the rest.
const CONFIG_CHECK_PREFIX: &str = "# scrim state config, do not edit; check ";

/// Renders the privacy-relevant part of `config` (and `idle_close`, which decides when ticks
/// close windows and so matters to a replay of the log) as TOML, and proves the rendering
/// faithful: parsing it back gives the same fingerprint and `idle_close`.
pub fn render_config(config: &Config) -> Result<String, StateError> {
    use crate::config::{FitConfig, StatKind};
    use std::fmt::Write as _;
    let mut t = String::new();
    let f = |x: f64| format!("{x:?}");
    // `let _ =`: writing to a String cannot fail.
    let _ = writeln!(t, "[input]");
    let _ = writeln!(t, "time_field = {}", toml_str(&config.input.time_field));
    if let Some(u) = &config.input.unit_field {
        let _ = writeln!(t, "unit_field = {}", toml_str(u));
    }
    let _ = writeln!(t, "max_line_bytes = {}", config.input.max_line_bytes);
    let w = &config.window;
    let _ = writeln!(t, "\n[window]");
    let _ = writeln!(t, "length = \"{}ms\"", w.length.0);
    let _ = writeln!(t, "allowed_lateness = \"{}ms\"", w.allowed_lateness.0);
    let _ = writeln!(t, "idle_close = \"{}ms\"", w.idle_close.0);
    let p = &config.privacy;
    let _ = writeln!(t, "\n[privacy]");
    let _ = writeln!(t, "rho_per_epoch = {}", f(p.rho_per_epoch));
    let _ = writeln!(t, "delta = {}", f(p.delta));
    let _ = writeln!(t, "epoch_windows = {}", p.epoch_windows);
    let _ = writeln!(t, "mechanism = {}", toml_str(p.mechanism.label()));
    if let Some(b) = &p.unit_bounds {
        let _ = writeln!(t, "lifetime_rho = {}", f(b.lifetime_rho));
        let _ = writeln!(t, "max_events_per_window = {}", b.max_events_per_window);
        let _ = writeln!(t, "max_windows_per_epoch = {}", b.max_windows_per_epoch);
    }
    let list = |v: &mut dyn Iterator<Item = String>| v.collect::<Vec<_>>().join(", ");
    for s in &config.stats {
        let _ = writeln!(t, "\n[[stats]]");
        let _ = writeln!(t, "name = {}", toml_str(&s.name));
        let _ = writeln!(t, "kind = {}", toml_str(s.kind.label()));
        let _ = writeln!(t, "weight = {}", f(s.weight));
        if !s.trailing.is_empty() {
            let _ = writeln!(
                t,
                "trailing = [{}]",
                list(&mut s.trailing.iter().map(|n| n.to_string()))
            );
        }
        if !s.group_by.is_empty() {
            let _ = writeln!(
                t,
                "group_by = [{}]",
                list(&mut s.group_by.iter().map(|g| toml_str(&g.field)))
            );
        }
        match &s.kind {
            StatKind::Count => {}
            StatKind::Sum { field, range } | StatKind::Mean { field, range } => {
                let _ = writeln!(t, "field = {}", toml_str(field));
                let _ = writeln!(t, "range = [{}, {}]", f(range.0), f(range.1));
            }
            StatKind::Linear(l) => {
                let _ = writeln!(t, "target = {}", toml_str(&l.target));
                let _ = writeln!(
                    t,
                    "features = [{}]",
                    list(&mut l.features.iter().map(|x| toml_str(x)))
                );
                let _ = writeln!(t, "intercept = {}", l.intercept);
                let _ = writeln!(t, "feature_norm_bound = {}", f(l.feature_norm_bound));
                if let Some(b) = &l.feature_bounds {
                    let _ = writeln!(
                        t,
                        "feature_bounds = [{}]",
                        list(&mut b.iter().map(|x| f(*x)))
                    );
                }
                if let Some(r) = &l.feature_ranges {
                    let _ = writeln!(
                        t,
                        "feature_ranges = [{}]",
                        list(&mut r.iter().map(|(lo, hi)| format!("[{}, {}]", f(*lo), f(*hi))))
                    );
                }
                let _ = writeln!(t, "target_bound = {}", f(l.target_bound));
                if let Some((lo, hi)) = l.target_range {
                    let _ = writeln!(t, "target_range = [{}, {}]", f(lo), f(hi));
                }
                match l.fit {
                    FitConfig::Ridge { lambda } => {
                        let _ = writeln!(t, "fit = \"ridge\"\nridge_lambda = {}", f(lambda));
                    }
                    FitConfig::L1 { radius } => {
                        let _ = writeln!(t, "fit = \"l1\"\nl1_radius = {}", f(radius));
                    }
                }
            }
        }
        if !s.group_by.is_empty() {
            let _ = writeln!(t, "[stats.keys]");
            for g in &s.group_by {
                let _ = writeln!(
                    t,
                    "{} = [{}]",
                    toml_str(&g.field),
                    list(&mut g.keys.iter().map(|k| toml_str(k)))
                );
            }
        }
    }
    let back = Config::from_toml_str(&t).map_err(|e| StateError::Unrepresentable(e.to_string()))?;
    if back.fingerprint() != config.fingerprint()
        || back.window.idle_close != config.window.idle_close
    {
        return Err(StateError::Unrepresentable(
            "the rendered configuration has another fingerprint".to_string(),
        ));
    }
    let sum = hex8(blake3::hash(t.as_bytes()).as_bytes());
    Ok(format!("{CONFIG_CHECK_PREFIX}{sum}\n{t}"))
}

/// A TOML basic string: quotes, backslashes and control characters escaped.
fn toml_str(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            c if (c as u32) < 0x20 || c as u32 == 0x7f => {
                out.push_str(&format!("\\u{:04x}", c as u32));
            }
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// Reads a stored configuration and checks its checksum and its fingerprint.
fn read_config(path: &Path, fingerprint: &str) -> Result<Config, StateError> {
    let text = std::fs::read_to_string(path).map_err(io_err(path))?;
    let (first, body) = text
        .split_once('\n')
        .ok_or_else(|| corrupt(path, "no checksum line"))?;
    let sum = first
        .strip_prefix(CONFIG_CHECK_PREFIX)
        .ok_or_else(|| corrupt(path, "no checksum line"))?;
    if sum != hex8(blake3::hash(body.as_bytes()).as_bytes()) {
        return Err(corrupt(path, "checksum mismatch"));
    }
    let config = Config::from_toml_str(body).map_err(|e| corrupt(path, e.to_string()))?;
    if config.fingerprint() != fingerprint {
        return Err(corrupt(
            path,
            format!(
                "its fingerprint {} is not the generation's {fingerprint}",
                config.fingerprint()
            ),
        ));
    }
    Ok(config)
}

/// Removes what belongs to no live generation: logs and configurations of older
/// generations (finishing a `new-epoch` interrupted after its commit), empty ones of newer
/// generations (left by a `new-epoch` interrupted before it), and temp files. A *non-empty*
/// log of a newer generation means the ledger lost a generation that ran: corruption.
fn cleanup(dir: &Path, current: u32) -> Result<(), StateError> {
    let mut removed = false;
    let entries = std::fs::read_dir(dir).map_err(io_err(dir))?;
    for entry in entries {
        let entry = entry.map_err(io_err(dir))?;
        let name = entry.file_name();
        let Some(name) = name.to_str() else { continue };
        let path = entry.path();
        let stale = match generation_of(name) {
            Some(g) if g == current => false,
            Some(g) if g > current && name.starts_with("wal") => {
                let len = entry.metadata().map_err(io_err(&path))?.len();
                if len > 0 {
                    return Err(corrupt(
                        &dir.join(LEDGER),
                        format!(
                            "it records {current} generation(s) but the log {name} of a later one holds data"
                        ),
                    ));
                }
                true
            }
            Some(_) => true,
            None => name.ends_with(".tmp"),
        };
        if stale {
            std::fs::remove_file(&path).map_err(io_err(&path))?;
            removed = true;
        }
    }
    if removed {
        sync_dir(dir)?;
    }
    Ok(())
}

/// Reads a generation's log (cutting nothing).
fn read_generation_log(dir: &Path, g: u32) -> Result<(PathBuf, WalRead), StateError> {
    let wal_path = dir.join(wal_name(g));
    if g > 0 && !wal_path.exists() {
        return Err(corrupt(
            &wal_path,
            "the log of the current generation is missing",
        ));
    }
    let read = read_wal(&wal_path)?;
    Ok((wal_path, read))
}

impl StateDir {
    /// Opens `dir` for `config`, creating it on first start. `seed` replaces the stored key
    /// (tests and replays). Returns the state, the noise key and the logged records of the
    /// current generation, which [`replay_log`] feeds to an engine built with
    /// [`StateDir::carry`].
    pub fn open(
        dir: &Path,
        config: &Config,
        seed: Option<u64>,
    ) -> Result<(StateDir, NoiseKey, Vec<WalRecord>), StateError> {
        create_private_dir(dir).map_err(io_err(dir))?;
        let lock = lock_dir(dir)?;
        let fingerprint = config.fingerprint();
        let meta = read_meta(dir)?;
        let key = load_key(dir, seed, meta.as_ref())?;
        let meta = match meta {
            Some(m) => m,
            None => {
                // The configuration first, then meta.json, whose presence marks the state
                // as created: a crash in between leaves a state that is created again.
                let path = dir.join(config_name(0));
                let text = render_config(config)?;
                write_atomic(&path, text.as_bytes()).map_err(io_err(&path))?;
                let meta = Meta {
                    format: FORMAT_VERSION,
                    config_fingerprint: fingerprint.clone(),
                    key_fingerprint: key_fingerprint(&key),
                    seeded: seed.is_some(),
                    event_hash: Some(key.event_hash().name().to_string()),
                };
                write_meta(dir, &meta)?;
                meta
            }
        };
        let generations = read_ledger(dir)?;
        if !generations.is_empty() && meta.format < FORMAT_GENERATIONS {
            return Err(corrupt(
                &dir.join(META),
                format!(
                    "format {} but ledger.jsonl records generations",
                    meta.format
                ),
            ));
        }
        let g = generations.len() as u32;
        let pinned = generations
            .last()
            .map_or(&meta.config_fingerprint, |x| &x.config_fingerprint);
        if *pinned != fingerprint {
            return Err(StateError::ConfigChanged {
                old: pinned.clone(),
                new: fingerprint,
            });
        }
        let config_path = dir.join(config_name(g));
        if config_path.exists() {
            read_config(&config_path, pinned)?;
        } else if g == 0 {
            // A state created by an older build: store the configuration now (the
            // fingerprint check above proved it is the pinned one).
            let text = render_config(config)?;
            write_atomic(&config_path, text.as_bytes()).map_err(io_err(&config_path))?;
        } else {
            return Err(corrupt(&config_path, "missing"));
        }
        cleanup(dir, g)?;
        let (wal_path, read) = read_generation_log(dir, g)?;
        let (records, valid_len) = (read.records, read.valid_len);
        // Cut a torn tail so new records follow the last valid one.
        if wal_path.exists() {
            let f = OpenOptions::new()
                .write(true)
                .open(&wal_path)
                .map_err(io_err(&wal_path))?;
            f.set_len(valid_len).map_err(io_err(&wal_path))?;
            f.sync_all().map_err(io_err(&wal_path))?;
        }
        let wal = private_file(&wal_path, false).map_err(io_err(&wal_path))?;
        sync_dir(dir)?;
        Ok((
            StateDir {
                dir: dir.to_path_buf(),
                wal: BufWriter::with_capacity(1 << 20, wal),
                dirty: false,
                generation: g,
                carry: generations
                    .last()
                    .map(Generation::carry)
                    .unwrap_or_default(),
                trailing_lines_from: read.trailing_lines_from,
                _lock: lock,
            },
            key,
            records,
        ))
    }

    /// Where the current generation starts (the default for the first generation).
    pub fn carry(&self) -> &Carry {
        &self.carry
    }

    /// The current generation (0 until the first `new-epoch`).
    pub fn generation(&self) -> u32 {
        self.generation
    }

    /// `replay --state`, before it reads on: cuts the line records logged after the last
    /// offset record. [`replay_log`] skips them and the replay reads those lines again from
    /// the input at that offset; left in the log, they would sit before the next offset
    /// record and be replayed — counted twice — after the next restart. (A log ends with
    /// such lines when a crash struck after the write buffer reached the file but before the
    /// next offset record.) Does nothing for logs that do not end that way.
    pub fn discard_unconfirmed_lines(&mut self) -> std::io::Result<()> {
        if let Some(end) = self.trailing_lines_from.take() {
            self.wal.flush()?;
            let f = self.wal.get_ref();
            f.set_len(end)?;
            f.sync_all()?;
        }
        Ok(())
    }

    fn append(&mut self, kind: u8, payload: &[u8]) -> std::io::Result<()> {
        self.trailing_lines_from = None;
        let len =
            u32::try_from(payload.len()).map_err(|_| std::io::Error::other("record too large"))?;
        self.wal.write_all(&len.to_le_bytes())?;
        self.wal.write_all(&check(kind, payload).to_le_bytes())?;
        self.wal.write_all(&[kind])?;
        self.wal.write_all(payload)?;
        self.dirty = true;
        Ok(())
    }

    /// Logs one input line.
    pub fn log_line(&mut self, line: &[u8]) -> std::io::Result<()> {
        self.append(KIND_LINE, line)
    }

    /// Logs a tick that closed windows.
    pub fn log_tick(&mut self, now: Millis) -> std::io::Result<()> {
        self.append(KIND_TICK, &now.0.to_le_bytes())
    }

    /// Logs an I/O-level rejection.
    pub fn log_reject(&mut self, label: &str) -> std::io::Result<()> {
        self.append(KIND_REJECT, label.as_bytes())
    }

    /// Logs a file source's offset.
    pub fn log_offset(&mut self, source: u32, offset: u64) -> std::io::Result<()> {
        let mut p = source.to_le_bytes().to_vec();
        p.extend_from_slice(&offset.to_le_bytes());
        self.append(KIND_OFFSET, &p)
    }

    /// Logs a batch of lines (and a file offset) as one record: after a crash either all
    /// of it is in the log or none, so a file source never re-reads lines the log replays.
    pub fn log_batch(
        &mut self,
        lines: &[Vec<u8>],
        offset: Option<(u32, u64)>,
    ) -> std::io::Result<()> {
        let size: usize = lines.iter().map(|l| l.len() + 4).sum::<usize>() + 17;
        let mut p = Vec::with_capacity(size);
        match offset {
            Some((src, off)) => {
                p.push(1);
                p.extend_from_slice(&src.to_le_bytes());
                p.extend_from_slice(&off.to_le_bytes());
            }
            None => p.extend_from_slice(&[0; 13]),
        }
        p.extend_from_slice(&(lines.len() as u32).to_le_bytes());
        for l in lines {
            p.extend_from_slice(&(l.len() as u32).to_le_bytes());
            p.extend_from_slice(l);
        }
        self.append(KIND_BATCH, &p)
    }

    /// Logs the end of input.
    pub fn log_finish(&mut self) -> std::io::Result<()> {
        self.append(KIND_FINISH, &[])
    }

    /// Makes every logged record durable (write + fsync).
    pub fn sync(&mut self) -> std::io::Result<()> {
        if self.dirty {
            self.wal.flush()?;
            self.wal.get_ref().sync_data()?;
            self.dirty = false;
        }
        Ok(())
    }

    /// The directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }
}

/// A log as read back.
struct WalRead {
    records: Vec<WalRecord>,
    /// Byte length of the valid prefix.
    valid_len: u64,
    /// Where the run of line records after the last offset record starts, when the log ends
    /// with such a run (see [`StateDir::discard_unconfirmed_lines`]).
    trailing_lines_from: Option<u64>,
}

/// Reads every valid record.
fn read_wal(path: &Path) -> Result<WalRead, StateError> {
    let mut bytes = Vec::new();
    match File::open(path) {
        Ok(mut f) => {
            f.read_to_end(&mut bytes).map_err(io_err(path))?;
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Ok(WalRead {
                records: Vec::new(),
                valid_len: 0,
                trailing_lines_from: None,
            });
        }
        Err(e) => {
            return Err(StateError::Io {
                path: path.to_path_buf(),
                source: e,
            });
        }
    }
    let mut out = Vec::new();
    let mut pos = 0usize;
    // End of the last record that is not a line, and whether it was an offset record.
    let mut last_non_line: Option<(usize, bool)> = None;
    while pos < bytes.len() {
        let rest = &bytes[pos..];
        let torn = |detail: &str| -> Result<WalRead, StateError> {
            Err(StateError::Corrupt {
                path: path.to_path_buf(),
                detail: format!("{detail} at byte {pos}"),
            })
        };
        if rest.len() < 9 {
            break; // torn header at the tail
        }
        let len = u32::from_le_bytes([rest[0], rest[1], rest[2], rest[3]]) as usize;
        let sum = u32::from_le_bytes([rest[4], rest[5], rest[6], rest[7]]);
        let kind = rest[8];
        if rest.len() < 9 + len {
            break; // torn payload at the tail
        }
        let payload = &rest[9..9 + len];
        let is_last = pos + 9 + len == bytes.len();
        if check(kind, payload) != sum {
            if is_last {
                break; // a torn final write
            }
            return torn("checksum mismatch");
        }
        let rec = match kind {
            KIND_LINE => WalRecord::Line(payload.to_vec()),
            KIND_TICK if len == 8 => WalRecord::Tick(Millis(i64::from_le_bytes(
                payload.try_into().unwrap_or([0; 8]),
            ))),
            KIND_REJECT => WalRecord::Reject(String::from_utf8_lossy(payload).into_owned()),
            KIND_OFFSET if len == 12 => WalRecord::Offset {
                source: u32::from_le_bytes([payload[0], payload[1], payload[2], payload[3]]),
                offset: u64::from_le_bytes(payload[4..12].try_into().unwrap_or([0; 8])),
            },
            KIND_FINISH => WalRecord::Finish,
            KIND_BATCH => match decode_batch(payload) {
                Some(r) => r,
                None => return torn("malformed batch record"),
            },
            _ => return torn("unknown record kind"),
        };
        let is_line = matches!(rec, WalRecord::Line(_));
        let is_offset = matches!(rec, WalRecord::Offset { .. });
        out.push(rec);
        pos += 9 + len;
        if !is_line {
            last_non_line = Some((pos, is_offset));
        }
    }
    let trailing_lines_from = match last_non_line {
        None if pos > 0 => Some(0),
        Some((end, true)) if end < pos => Some(end as u64),
        _ => None,
    };
    Ok(WalRead {
        records: out,
        valid_len: pos as u64,
        trailing_lines_from,
    })
}

fn decode_batch(p: &[u8]) -> Option<WalRecord> {
    let u32_at = |i: usize| {
        p.get(i..i + 4)
            .map(|b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]))
    };
    let offset = match p.first()? {
        1 => Some((
            u32_at(1)?,
            u64::from_le_bytes(p.get(5..13)?.try_into().ok()?),
        )),
        _ => None,
    };
    let n = u32_at(13)? as usize;
    let mut pos = 17;
    let mut lines = Vec::with_capacity(n.min(1 << 16));
    for _ in 0..n {
        let len = u32_at(pos)? as usize;
        lines.push(p.get(pos + 4..pos + 4 + len)?.to_vec());
        pos += 4 + len;
    }
    (pos == p.len()).then_some(WalRecord::Batch { lines, offset })
}

/// Reads `releases.jsonl`, cutting a torn last line; returns the last published seq.
pub fn published_seq(path: &Path) -> Result<Option<u64>, StateError> {
    let text = match std::fs::read(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => {
            return Err(StateError::Io {
                path: path.to_path_buf(),
                source: e,
            });
        }
    };
    let complete = text.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
    if complete < text.len() {
        let f = OpenOptions::new()
            .write(true)
            .open(path)
            .map_err(io_err(path))?;
        f.set_len(complete as u64).map_err(io_err(path))?;
        f.sync_all().map_err(io_err(path))?;
    }
    let last = text[..complete]
        .split(|&b| b == b'\n')
        .rfind(|l| !l.is_empty());
    match last {
        None => Ok(None),
        Some(l) => {
            let v: serde_json::Value =
                serde_json::from_slice(l).map_err(|e| StateError::Corrupt {
                    path: path.to_path_buf(),
                    detail: e.to_string(),
                })?;
            Ok(v.get("seq").and_then(serde_json::Value::as_u64))
        }
    }
}

/// Where the inputs stood at the end of a generation's log.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct LogPosition {
    /// Per configured source: the byte offset a file source resumes from.
    pub file_offsets: Vec<u64>,
    /// `replay --state`: the input offset it resumes from.
    pub input_offset: u64,
    /// The log ends with the end of input (`replay` finished).
    pub finished: bool,
}

/// Feeds a generation's logged inputs to `engine`, exactly as they were first consumed.
/// Lines logged one by one (by `replay --state`) after its last offset record are
/// skipped: the replay re-reads them from the input, and no release depended on them (an
/// offset record is always logged, and synced, before a release is published).
pub fn replay_log(engine: &mut Engine, records: &[WalRecord], n_sources: usize) -> LogPosition {
    let mut pos = LogPosition {
        file_offsets: vec![0; n_sources],
        ..LogPosition::default()
    };
    let last_offset_at = records
        .iter()
        .rposition(|r| matches!(r, WalRecord::Offset { .. }));
    let set_offset = |pos: &mut LogPosition, source: u32, offset: u64| {
        pos.input_offset = offset;
        if let Some(o) = pos.file_offsets.get_mut(source as usize) {
            *o = offset;
        }
    };
    for (i, r) in records.iter().enumerate() {
        match r {
            WalRecord::Line(l) if last_offset_at.is_some_and(|j| i < j) => engine.handle_line(l),
            WalRecord::Line(_) => {}
            WalRecord::Tick(t) => engine.handle_tick(*t),
            WalRecord::Reject(label) => {
                if let Some(reason) = RejectReason::ALL.iter().find(|x| x.label() == label) {
                    engine.count_rejection(*reason);
                }
            }
            WalRecord::Offset { source, offset } => set_offset(&mut pos, *source, *offset),
            WalRecord::Finish => {
                engine.finish();
                pos.finished = true;
            }
            WalRecord::Batch { lines, offset } => {
                for l in lines {
                    engine.handle_line(l);
                }
                if let Some((src, off)) = offset {
                    set_offset(&mut pos, *src, *off);
                }
            }
        }
    }
    pos
}

/// The check behind "state older than output": every record in `releases.jsonl` must be
/// one the state regenerates (or one an earlier generation published, below
/// `carry.next_seq`). `reproduced` is the last seq regenerated from the current log.
///
/// Otherwise the state is older than the output (restored from an older backup than the
/// file, or its log lost whole records), and continuing would make the engine assign the
/// published seq numbers — and the noise of the published tree nodes — to other data:
/// the difference between the two copies would expose it. So it refuses.
pub fn check_output(
    published: Option<u64>,
    reproduced: Option<u64>,
    carry: &Carry,
    releases: &Path,
    state: &Path,
) -> Result<(), StateError> {
    let covered = reproduced.or(carry.next_seq.checked_sub(1));
    match published {
        Some(p) if covered.is_none_or(|c| p > c) => Err(StateError::OlderThanOutput {
            releases: releases.to_path_buf(),
            state: state.to_path_buf(),
            published: p,
            reproduced: covered,
        }),
        _ => Ok(()),
    }
}

/// Records an earlier generation published that `releases.jsonl` lacks (the file is older
/// than the state): they cannot be regenerated once their log is gone. `(first, last)`
/// seq, for a warning. No privacy harm — nothing is released twice — but a gap in the file.
pub fn missing_from_output(published: Option<u64>, carry: &Carry) -> Option<(u64, u64)> {
    let last_before = carry.next_seq.checked_sub(1)?;
    let first_missing = published.map_or(0, |p| p + 1);
    (first_missing <= last_before).then_some((first_missing, last_before))
}

/// Test hook (debug builds only): `SCRIMTEST_NEW_EPOCH_ABORT_AFTER=N` ends the process
/// after step `N` of [`Current::commit`] without any cleanup (`process::exit` runs no
/// destructors; every step is already durable, so this is what a crash leaves on disk), to
/// prove that a crash at any point leaves a usable state. Exit code 86. Not prefixed
/// SCRIM_, which the config loader reserves for overrides.
fn crash_point(step: u32) {
    if cfg!(debug_assertions)
        && std::env::var("SCRIMTEST_NEW_EPOCH_ABORT_AFTER")
            .ok()
            .and_then(|v| v.parse::<u32>().ok())
            == Some(step)
    {
        eprintln!("scrim: test hook: aborting after new-epoch step {step}");
        std::process::exit(86);
    }
}

/// The current generation of an existing state, opened (and locked) to start the next one.
pub struct Current {
    dir: PathBuf,
    meta: Meta,
    generations: Vec<Generation>,
    /// The noise key.
    pub key: NoiseKey,
    /// The configuration the current generation is pinned to.
    pub config: Config,
    /// Its logged inputs.
    pub records: Vec<WalRecord>,
    _lock: File,
}

impl Current {
    /// Opens the current generation of the state in `dir` without changing it. Its
    /// configuration comes from the state (`config.toml`) or, for states created by an older
    /// build, from `previous` — whose fingerprint must be the pinned one either way.
    pub fn open(
        dir: &Path,
        seed: Option<u64>,
        previous: Option<&Config>,
    ) -> Result<Current, StateError> {
        let Some(meta) = read_meta(dir)? else {
            return Err(StateError::Missing {
                path: dir.to_path_buf(),
            });
        };
        let lock = lock_dir(dir)?;
        let key = load_key(dir, seed, Some(&meta))?;
        let generations = read_ledger(dir)?;
        let g = generations.len() as u32;
        let pinned = generations
            .last()
            .map_or(&meta.config_fingerprint, |x| &x.config_fingerprint)
            .clone();
        if let Some(p) = previous
            && p.fingerprint() != pinned
        {
            return Err(StateError::PreviousConfigMismatch {
                pinned,
                given: p.fingerprint(),
            });
        }
        let config_path = dir.join(config_name(g));
        let config = if config_path.exists() {
            read_config(&config_path, &pinned)?
        } else if g > 0 {
            return Err(corrupt(&config_path, "missing"));
        } else {
            previous.cloned().ok_or(StateError::NoPreviousConfig {
                path: dir.to_path_buf(),
            })?
        };
        cleanup(dir, g)?;
        let records = read_generation_log(dir, g)?.1.records;
        Ok(Current {
            dir: dir.to_path_buf(),
            meta,
            generations,
            key,
            config,
            records,
            _lock: lock,
        })
    }

    /// The current generation number.
    pub fn generation(&self) -> u32 {
        self.generations.len() as u32
    }

    /// Where the current generation started.
    pub fn carry(&self) -> Carry {
        self.generations
            .last()
            .map(Generation::carry)
            .unwrap_or_default()
    }

    /// The fingerprint the current generation is pinned to.
    pub fn fingerprint(&self) -> &str {
        self.generations
            .last()
            .map_or(&self.meta.config_fingerprint, |x| &x.config_fingerprint)
    }

    /// Starts the next generation, pinned to `config`, from `next` (its `generation` and
    /// `check` are filled in here). Steps, each durable before the next:
    ///
    /// 1. `meta.json` format → 2, so builds that know no generations refuse the state;
    /// 2. `config.N.toml` (temp, fsync, rename, fsync directory);
    /// 3. an empty `wal.N`, fsynced, directory fsynced;
    /// 4. `ledger.jsonl` with the new line, replaced atomically — **the commit point**;
    /// 5. the old log and configuration deleted (they hold raw lines: data minimisation).
    ///
    /// A crash before 4 leaves the old generation current and intact: `open` deletes the
    /// empty `wal.N` and `config.N.toml` as leftovers. A crash after 4 leaves the new one
    /// current: `open` finishes step 5. Either way the state is usable, and tests/state.rs
    /// aborts the real binary after each step to check it.
    pub fn commit(self, config: &Config, mut next: Generation) -> Result<Generation, StateError> {
        let dir = &self.dir;
        let g = self.generation() + 1;
        let text = render_config(config)?;
        next.generation = g;
        next.config_fingerprint = config.fingerprint();
        next.check = next.checksum();
        if self.meta.format < FORMAT_GENERATIONS {
            let meta = Meta {
                format: FORMAT_GENERATIONS,
                ..self.meta.clone()
            };
            write_meta(dir, &meta)?;
        }
        crash_point(1);
        let config_path = dir.join(config_name(g));
        write_atomic(&config_path, text.as_bytes()).map_err(io_err(&config_path))?;
        crash_point(2);
        let wal_path = dir.join(wal_name(g));
        private_file(&wal_path, true)
            .and_then(|f| f.sync_all())
            .map_err(io_err(&wal_path))?;
        sync_dir(dir)?;
        crash_point(3);
        let mut ledger = String::new();
        for old in self.generations.iter().chain(std::iter::once(&next)) {
            ledger.push_str(&serde_json::to_string(old).unwrap_or_default());
            ledger.push('\n');
        }
        let ledger_path = dir.join(LEDGER);
        write_atomic(&ledger_path, ledger.as_bytes()).map_err(io_err(&ledger_path))?;
        crash_point(4);
        cleanup(dir, g)?;
        Ok(next)
    }
}

/// What `scrim state show` prints; reads the directory without the key and changes nothing.
#[derive(Debug, Serialize)]
pub struct Summary {
    /// The directory.
    pub dir: PathBuf,
    /// meta.json format.
    pub format: u32,
    /// Created with `--seed`.
    pub seeded: bool,
    /// Identifies the key without revealing it.
    pub key_fingerprint: String,
    /// The keyed hash of unit ids and bounding priorities ([`EventHash::name`]).
    pub event_hash: &'static str,
    /// Current generation.
    pub generation: u32,
    /// Fingerprint the current generation is pinned to.
    pub config_fingerprint: String,
    /// The stored configuration of the current generation exists.
    pub config_stored: bool,
    /// Valid records in the current log.
    pub log_records: usize,
    /// Bytes of the current log.
    pub log_bytes: u64,
    /// Every generation after the first.
    pub generations: Vec<Generation>,
}

/// Reads the state in `dir` for `scrim state show`.
pub fn inspect(dir: &Path) -> Result<Summary, StateError> {
    let Some(meta) = read_meta(dir)? else {
        return Err(StateError::Missing {
            path: dir.to_path_buf(),
        });
    };
    let generations = read_ledger(dir)?;
    let g = generations.len() as u32;
    let pinned = generations
        .last()
        .map_or(&meta.config_fingerprint, |x| &x.config_fingerprint)
        .clone();
    let config_path = dir.join(config_name(g));
    let config_stored = config_path.exists();
    if config_stored {
        read_config(&config_path, &pinned)?;
    }
    let read = read_generation_log(dir, g)?.1;
    Ok(Summary {
        dir: dir.to_path_buf(),
        format: meta.format,
        event_hash: meta.event_hash(&dir.join(META))?.name(),
        seeded: meta.seeded,
        key_fingerprint: meta.key_fingerprint,
        generation: g,
        config_fingerprint: pinned,
        config_stored,
        log_records: read.records.len(),
        log_bytes: read.valid_len,
        generations,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A small unit-level config; `bound` and `rho` vary it.
    fn cfg_with(bound: u32, rho: f64) -> Config {
        Config::from_toml_str(&format!(
            r#"
[input]
time_field = "ts"
unit_field = "card"
[window]
length = "1h"
allowed_lateness = "0s"
[privacy]
rho_per_epoch = {rho}
lifetime_rho = 4.0
delta = 1e-9
epoch_windows = 8
max_events_per_window = {bound}
max_windows_per_epoch = 4
[[stats]]
name = "c"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a", "b"]
"#
        ))
        .unwrap()
    }

    fn cfg() -> Config {
        cfg_with(2, 0.5)
    }

    #[test]
    fn records_round_trip_and_a_torn_tail_is_cut() {
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, recs) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        assert!(recs.is_empty());
        assert_eq!(s.generation(), 0);
        assert_eq!(*s.carry(), Carry::default());
        s.log_line(b"{\"ts\":1}").unwrap();
        s.log_tick(Millis(42)).unwrap();
        s.log_offset(3, 99).unwrap();
        s.log_batch(&[b"x".to_vec(), b"yz".to_vec()], Some((1, 7)))
            .unwrap();
        s.log_batch(&[], None).unwrap();
        s.sync().unwrap();
        drop(s);
        // Simulate a crash in the middle of a record.
        let wal = dir.path().join("wal");
        let mut f = OpenOptions::new().append(true).open(&wal).unwrap();
        f.write_all(&[7, 0, 0, 0, 1, 2]).unwrap();
        drop(f);
        let (_, _, recs) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        assert_eq!(
            recs,
            vec![
                WalRecord::Line(b"{\"ts\":1}".to_vec()),
                WalRecord::Tick(Millis(42)),
                WalRecord::Offset {
                    source: 3,
                    offset: 99
                },
                WalRecord::Batch {
                    lines: vec![b"x".to_vec(), b"yz".to_vec()],
                    offset: Some((1, 7))
                },
                WalRecord::Batch {
                    lines: vec![],
                    offset: None
                },
            ]
        );
    }

    /// Lines logged after the last offset record are read again from the input by a
    /// resumed replay; their old copies are cut so that no later restart counts them twice.
    #[test]
    fn lines_after_the_last_offset_are_discarded_before_a_replay_resumes() {
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, _) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        s.log_line(b"a").unwrap();
        s.log_offset(0, 2).unwrap();
        s.log_line(b"b").unwrap();
        s.log_line(b"c").unwrap();
        s.sync().unwrap();
        drop(s);
        let (mut s, _, recs) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        assert_eq!(recs.len(), 4);
        s.discard_unconfirmed_lines().unwrap();
        s.log_line(b"b").unwrap();
        s.log_offset(0, 4).unwrap();
        s.sync().unwrap();
        drop(s);
        let (mut s, _, recs) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        let offset = |o| WalRecord::Offset {
            source: 0,
            offset: o,
        };
        let line = |l: &[u8]| WalRecord::Line(l.to_vec());
        assert_eq!(
            recs,
            vec![line(b"a"), offset(2), line(b"b"), offset(4)],
            "the stale copies of b and c are gone"
        );
        // A log that ends with an offset (or holds no line) keeps everything.
        s.discard_unconfirmed_lines().unwrap();
        drop(s);
        assert_eq!(
            StateDir::open(dir.path(), &cfg(), Some(1)).unwrap().2.len(),
            4
        );
        // Lines and no offset at all: the replay reads everything again.
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, _) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        s.log_line(b"a").unwrap();
        s.sync().unwrap();
        drop(s);
        let (mut s, _, _) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        s.discard_unconfirmed_lines().unwrap();
        drop(s);
        assert!(
            StateDir::open(dir.path(), &cfg(), Some(1))
                .unwrap()
                .2
                .is_empty()
        );
    }

    fn assert_corrupt(r: Result<(StateDir, NoiseKey, Vec<WalRecord>), StateError>, what: &str) {
        match r {
            Err(StateError::Corrupt { .. }) => {}
            Err(e) => panic!("{what}: expected corrupt, got {e}"),
            Ok(_) => panic!("{what}: expected corrupt, it opened"),
        }
    }

    #[test]
    fn refusals() {
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, _) = StateDir::open(dir.path(), &cfg(), Some(1)).unwrap();
        s.log_line(b"a").unwrap();
        s.log_line(b"b").unwrap();
        s.sync().unwrap();
        // One process per directory.
        assert!(matches!(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            Err(StateError::InUse { .. })
        ));
        drop(s);
        // A changed bound and a changed budget are config changes.
        for (changed, what) in [(cfg_with(3, 0.5), "bound"), (cfg_with(2, 0.25), "budget")] {
            match StateDir::open(dir.path(), &changed, Some(1)) {
                Err(e @ StateError::ConfigChanged { .. }) => {
                    assert!(
                        e.to_string().contains("scrim state new-epoch"),
                        "{what}: {e}"
                    )
                }
                Err(e) => panic!("{what}: {e}"),
                Ok(_) => panic!("changed {what} accepted"),
            }
        }
        assert!(matches!(
            StateDir::open(dir.path(), &cfg(), Some(2)),
            Err(StateError::KeyMismatch { .. })
        ));
        assert!(matches!(
            StateDir::open(dir.path(), &cfg(), None),
            Err(StateError::KeyMismatch { .. })
        ));
        // Flip a byte inside the first record: corruption, not a torn tail.
        let wal = dir.path().join("wal");
        let good = std::fs::read(&wal).unwrap();
        let mut bytes = good.clone();
        bytes[9] ^= 0xff;
        std::fs::write(&wal, &bytes).unwrap();
        assert_corrupt(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            "flipped wal byte",
        );
        std::fs::write(&wal, &good).unwrap();
        // A flipped byte in the stored configuration, and a truncated one.
        let conf = dir.path().join("config.toml");
        let good_conf = std::fs::read(&conf).unwrap();
        let mut bytes = good_conf.clone();
        let at = bytes.len() - 5;
        bytes[at] ^= 0x01;
        std::fs::write(&conf, &bytes).unwrap();
        assert_corrupt(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            "flipped config byte",
        );
        std::fs::write(&conf, &good_conf[..good_conf.len() / 2]).unwrap();
        assert_corrupt(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            "truncated config",
        );
        std::fs::write(&conf, &good_conf).unwrap();
        // A truncated meta.json.
        let meta = dir.path().join("meta.json");
        let good_meta = std::fs::read_to_string(&meta).unwrap();
        std::fs::write(&meta, &good_meta[..good_meta.len() / 2]).unwrap();
        assert_corrupt(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            "truncated meta",
        );
        // A newer format.
        std::fs::write(&meta, good_meta.replace("\"format\": 3", "\"format\": 99")).unwrap();
        assert!(matches!(
            StateDir::open(dir.path(), &cfg(), Some(1)),
            Err(StateError::NewerFormat { .. })
        ));
        std::fs::write(&meta, &good_meta).unwrap();
        assert!(StateDir::open(dir.path(), &cfg(), Some(1)).is_ok());
    }

    #[test]
    fn a_truncated_key_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        drop(StateDir::open(dir.path(), &cfg(), None).unwrap());
        let key = dir.path().join("key");
        let bytes = std::fs::read(&key).unwrap();
        std::fs::write(&key, &bytes[..31]).unwrap();
        assert_corrupt(StateDir::open(dir.path(), &cfg(), None), "truncated key");
    }

    fn next_generation(spent: f64) -> Generation {
        Generation {
            generation: 0,
            created: "2026-03-02T00:00:00Z".into(),
            reason: "test".into(),
            config_fingerprint: String::new(),
            previous_fingerprint: String::new(),
            start_ms: Some(1_772_409_600_000),
            first_epoch: 2,
            next_seq: 40,
            spent_rho: spent,
            epochs_charged: 2,
            abandoned_epoch: Some(1),
            check: String::new(),
        }
    }

    /// A state written before format 3 (no `event_hash`) keeps hashing events with BLAKE3,
    /// also after `new-epoch`; a new state records SipHash-2-4; inconsistent records are
    /// refused.
    #[test]
    fn the_event_hash_is_the_one_the_state_records() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        let (s, key, _) = StateDir::open(d, &cfg(), Some(1)).unwrap();
        assert_eq!(key.event_hash(), EventHash::SipHash24);
        drop(s);
        let meta = d.join("meta.json");
        let new_meta = std::fs::read_to_string(&meta).unwrap();
        assert!(new_meta.contains("\"format\": 3"), "{new_meta}");

        // The same state as an older build wrote it: format 1, no event_hash.
        let mut legacy: serde_json::Value = serde_json::from_str(&new_meta).unwrap();
        legacy["format"] = 1.into();
        legacy.as_object_mut().unwrap().remove("event_hash");
        std::fs::write(&meta, legacy.to_string()).unwrap();
        let (s, key, _) = StateDir::open(d, &cfg(), Some(1)).unwrap();
        assert_eq!(key.event_hash(), EventHash::Blake3);
        assert_eq!(inspect(d).unwrap().event_hash, "blake3-v1");
        // new-epoch raises it to format 2 only, and it stays BLAKE3.
        let cur_cfg = cfg_with(3, 1.0);
        drop(s);
        let cur = Current::open(d, Some(1), Some(&cfg())).unwrap();
        assert_eq!(cur.key.event_hash(), EventHash::Blake3);
        cur.commit(&cur_cfg, next_generation(1.0)).unwrap();
        let text = std::fs::read_to_string(&meta).unwrap();
        assert!(
            text.contains("\"format\": 2") && !text.contains("event_hash"),
            "{text}"
        );
        let (_s, key, _) = StateDir::open(d, &cur_cfg, Some(1)).unwrap();
        assert_eq!(key.event_hash(), EventHash::Blake3);
        drop(_s);

        // Inconsistent records: format 3 without a hash, an unknown hash, a hash in format 2.
        let mut v: serde_json::Value = serde_json::from_str(&new_meta).unwrap();
        v.as_object_mut().unwrap().remove("event_hash");
        let fresh = tempfile::tempdir().unwrap();
        let f = fresh.path();
        drop(StateDir::open(f, &cfg(), Some(1)).unwrap());
        let fmeta = f.join("meta.json");
        std::fs::write(&fmeta, v.to_string()).unwrap();
        assert_corrupt(
            StateDir::open(f, &cfg(), Some(1)),
            "format 3 without event_hash",
        );
        std::fs::write(&fmeta, new_meta.replace("siphash24-v1", "md5")).unwrap();
        assert_corrupt(StateDir::open(f, &cfg(), Some(1)), "unknown event hash");
        std::fs::write(&fmeta, new_meta.replace("\"format\": 3", "\"format\": 2")).unwrap();
        assert_corrupt(StateDir::open(f, &cfg(), Some(1)), "event hash in format 2");
        std::fs::write(&fmeta, &new_meta).unwrap();
        assert!(StateDir::open(f, &cfg(), Some(1)).is_ok());
    }

    #[test]
    fn a_generation_is_committed_and_its_damage_refused() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        let (mut s, _, _) = StateDir::open(d, &cfg(), Some(1)).unwrap();
        s.log_line(b"raw line").unwrap();
        s.sync().unwrap();
        drop(s);
        let cur = Current::open(d, Some(1), None).unwrap();
        assert_eq!(
            cur.config,
            cfg(),
            "the stored configuration is the pinned one"
        );
        assert_eq!(cur.records.len(), 1);
        let new_cfg = cfg_with(3, 1.0);
        let g = cur.commit(&new_cfg, next_generation(1.0)).unwrap();
        assert_eq!(g.generation, 1);
        // The old log (raw lines) and configuration are gone; the old config is refused.
        assert!(!d.join("wal").exists());
        assert!(!d.join("config.toml").exists());
        assert!(matches!(
            StateDir::open(d, &cfg(), Some(1)),
            Err(StateError::ConfigChanged { .. })
        ));
        let (s, _, recs) = StateDir::open(d, &new_cfg, Some(1)).unwrap();
        assert!(recs.is_empty());
        assert_eq!(s.generation(), 1);
        assert_eq!(*s.carry(), g.carry());
        drop(s);
        let text = std::fs::read_to_string(d.join("meta.json")).unwrap();
        assert!(text.contains("\"format\": 3"), "{text}");
        assert!(text.contains("\"event_hash\": \"siphash24-v1\""), "{text}");

        // A half-written ledger line (as if a crash tore it, which the atomic rename rules
        // out) is refused, never cut: cutting would resurrect generation 0, whose log is gone.
        let ledger = d.join("ledger.jsonl");
        let good = std::fs::read(&ledger).unwrap();
        std::fs::write(&ledger, &good[..good.len() - 20]).unwrap();
        assert_corrupt(StateDir::open(d, &new_cfg, Some(1)), "half-written ledger");
        // A flipped byte inside the spend: checksum mismatch.
        let text = String::from_utf8(good.clone()).unwrap();
        std::fs::write(
            &ledger,
            text.replace("\"spent_rho\":1.0", "\"spent_rho\":0.0"),
        )
        .unwrap();
        assert_corrupt(StateDir::open(d, &new_cfg, Some(1)), "edited ledger");
        std::fs::write(&ledger, &good).unwrap();

        // Leftovers of an interrupted next new-epoch (temp file, empty log) are removed; a
        // log of a generation the ledger does not record that holds data is corruption.
        std::fs::write(d.join("ledger.tmp"), b"{\"generation\":2").unwrap();
        std::fs::write(d.join("wal.2"), b"").unwrap();
        drop(StateDir::open(d, &new_cfg, Some(1)).unwrap());
        assert!(!d.join("ledger.tmp").exists() && !d.join("wal.2").exists());
        std::fs::write(d.join("wal.2"), b"data").unwrap();
        assert_corrupt(StateDir::open(d, &new_cfg, Some(1)), "orphan log with data");
    }

    #[test]
    fn the_stored_configuration_reproduces_the_fingerprint() {
        let demo = Config::from_toml_str(crate::app::DEMO_CONFIG).unwrap();
        let odd = Config::from_toml_str(
            r#"
[input]
time_field = "ts"
max_line_bytes = 4096
[window]
length = "90s"
allowed_lateness = "1500ms"
idle_close = "7s"
[privacy]
rho_per_epoch = 0.1
delta = 3e-10
epoch_windows = 5
mechanism = "sqrt-factorization"
[[stats]]
name = "s"
kind = "sum"
field = "v"
range = [-0.3, 1e6]
weight = 0.7
trailing = [2, 3]
group_by = ["k"]
[stats.keys]
k = ["quote\"d", "back\\slash", "tab\tand é"]
[[stats]]
name = "l"
kind = "linear"
target = "y"
features = ["v"]
intercept = false
feature_norm_bound = 2.5
target_bound = 1.0
fit = "l1"
l1_radius = 3.0
"#,
        )
        .unwrap();
        for c in [demo, odd, cfg()] {
            let text = render_config(&c).unwrap();
            let dir = tempfile::tempdir().unwrap();
            let path = dir.path().join("config.toml");
            std::fs::write(&path, &text).unwrap();
            let back = read_config(&path, &c.fingerprint()).unwrap();
            assert_eq!(back.fingerprint(), c.fingerprint());
            assert_eq!(back.window, c.window);
            assert_eq!(back.stats, c.stats);
            assert_eq!(back.privacy, c.privacy);
        }
    }

    #[test]
    fn files_are_private() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let sd = dir.path().join("state");
        let (mut s, _, _) = StateDir::open(&sd, &cfg(), None).unwrap();
        s.log_line(b"x").unwrap();
        s.sync().unwrap();
        let mode = |p: &Path| std::fs::metadata(p).unwrap().permissions().mode() & 0o777;
        assert_eq!(mode(&sd), 0o700);
        for f in ["key", "wal", "meta.json", "config.toml", "lock"] {
            assert_eq!(mode(&sd.join(f)), 0o600, "{f}");
        }
        drop(s);
        let cur = Current::open(&sd, None, None).unwrap();
        cur.commit(&cfg_with(3, 0.5), next_generation(0.5)).unwrap();
        for f in ["wal.1", "config.1.toml", "ledger.jsonl", "meta.json"] {
            assert_eq!(mode(&sd.join(f)), 0o600, "{f}");
        }
    }
}
