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
//! # Files (directory 0700, files 0600)
//! - `key` — the 32-byte noise key (absent for seeded runs, whose key is the seed's).
//! - `meta.json` — format version, config fingerprint, key fingerprint, seeded flag.
//! - `wal` — records `[len u32 LE][check u32 LE][kind u8][payload]`, where `check` is the
//!   first 4 bytes of BLAKE3 over kind and payload. A torn final record (crash during a
//!   write) is cut off; a bad record followed by valid data is corruption and refuses start.

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::noise::NoiseKey;
use crate::engine::time::Millis;

/// State format version written by this build.
pub const FORMAT_VERSION: u32 = 1;

const KIND_LINE: u8 = 1;
const KIND_TICK: u8 = 2;
const KIND_REJECT: u8 = 3;
const KIND_OFFSET: u8 = 4;
const KIND_FINISH: u8 = 5;
const KIND_BATCH: u8 = 6;

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
        "the configuration changed since this state was created (privacy-relevant fingerprint {old} → {new}): bounds, budget, epoch length, mechanism, statistics, keys or weights may not change mid-stream. Restore the old config, or start a new deployment with a new state directory after a privacy review (the old budget stays spent)"
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
    /// I/O failure.
    #[error("state directory {path}: {source}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// OS error.
        source: std::io::Error,
    },
}

#[derive(Serialize, Deserialize)]
struct Meta {
    format: u32,
    config_fingerprint: String,
    key_fingerprint: String,
    seeded: bool,
}

/// An open state directory.
pub struct StateDir {
    dir: PathBuf,
    wal: BufWriter<File>,
    dirty: bool,
}

fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> StateError + '_ {
    move |source| StateError::Io {
        path: path.to_path_buf(),
        source,
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

impl StateDir {
    /// Opens `dir`, creating it on first start. `seed` replaces the stored key (tests and
    /// replays). Returns the state, the noise key and the logged records to replay.
    pub fn open(
        dir: &Path,
        config_fingerprint: &str,
        seed: Option<u64>,
    ) -> Result<(StateDir, NoiseKey, Vec<WalRecord>), StateError> {
        create_private_dir(dir).map_err(io_err(dir))?;
        let meta_path = dir.join("meta.json");
        let key_path = dir.join("key");
        let wal_path = dir.join("wal");
        let key = match seed {
            Some(s) => NoiseKey::from_seed(s),
            None if key_path.exists() => {
                let mut bytes = Vec::new();
                File::open(&key_path)
                    .and_then(|mut f| f.read_to_end(&mut bytes))
                    .map_err(io_err(&key_path))?;
                let arr: [u8; 32] =
                    bytes
                        .as_slice()
                        .try_into()
                        .map_err(|_| StateError::Corrupt {
                            path: key_path.clone(),
                            detail: format!("expected 32 bytes, found {}", bytes.len()),
                        })?;
                NoiseKey::from_bytes(arr)
            }
            None => {
                if meta_path.exists() {
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
        let fp = key_fingerprint(&key);
        if meta_path.exists() {
            let text = std::fs::read_to_string(&meta_path).map_err(io_err(&meta_path))?;
            let meta: Meta = serde_json::from_str(&text).map_err(|e| StateError::Corrupt {
                path: meta_path.clone(),
                detail: e.to_string(),
            })?;
            if meta.format > FORMAT_VERSION {
                return Err(StateError::NewerFormat {
                    path: meta_path,
                    found: meta.format,
                    supported: FORMAT_VERSION,
                });
            }
            if meta.key_fingerprint != fp {
                return Err(StateError::KeyMismatch {
                    path: meta_path,
                    detail: if meta.seeded {
                        "it was seeded with another seed".into()
                    } else {
                        "its key file differs".into()
                    },
                });
            }
            if meta.config_fingerprint != config_fingerprint {
                return Err(StateError::ConfigChanged {
                    old: meta.config_fingerprint,
                    new: config_fingerprint.to_string(),
                });
            }
        } else {
            let meta = Meta {
                format: FORMAT_VERSION,
                config_fingerprint: config_fingerprint.to_string(),
                key_fingerprint: fp,
                seeded: seed.is_some(),
            };
            let text = serde_json::to_string_pretty(&meta).unwrap_or_default();
            write_atomic(&meta_path, text.as_bytes()).map_err(io_err(&meta_path))?;
        }
        let (records, valid_len) = read_wal(&wal_path)?;
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
        if let Ok(d) = File::open(dir) {
            let _ = d.sync_all();
        }
        Ok((
            StateDir {
                dir: dir.to_path_buf(),
                wal: BufWriter::with_capacity(1 << 20, wal),
                dirty: false,
            },
            key,
            records,
        ))
    }

    fn append(&mut self, kind: u8, payload: &[u8]) -> std::io::Result<()> {
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

/// Reads every valid record; returns them and the byte length of the valid prefix.
fn read_wal(path: &Path) -> Result<(Vec<WalRecord>, u64), StateError> {
    let mut bytes = Vec::new();
    match File::open(path) {
        Ok(mut f) => {
            f.read_to_end(&mut bytes).map_err(io_err(path))?;
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok((Vec::new(), 0)),
        Err(e) => {
            return Err(StateError::Io {
                path: path.to_path_buf(),
                source: e,
            });
        }
    }
    let mut out = Vec::new();
    let mut pos = 0usize;
    while pos < bytes.len() {
        let rest = &bytes[pos..];
        let torn = |detail: &str| -> Result<(Vec<WalRecord>, u64), StateError> {
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
        out.push(rec);
        pos += 9 + len;
    }
    Ok((out, pos as u64))
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn records_round_trip_and_a_torn_tail_is_cut() {
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, recs) = StateDir::open(dir.path(), "fp", Some(1)).unwrap();
        assert!(recs.is_empty());
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
        let (_, _, recs) = StateDir::open(dir.path(), "fp", Some(1)).unwrap();
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

    #[test]
    fn refusals() {
        let dir = tempfile::tempdir().unwrap();
        let (mut s, _, _) = StateDir::open(dir.path(), "fp", Some(1)).unwrap();
        s.log_line(b"a").unwrap();
        s.log_line(b"b").unwrap();
        s.sync().unwrap();
        drop(s);
        assert!(matches!(
            StateDir::open(dir.path(), "other", Some(1)),
            Err(StateError::ConfigChanged { .. })
        ));
        assert!(matches!(
            StateDir::open(dir.path(), "fp", Some(2)),
            Err(StateError::KeyMismatch { .. })
        ));
        assert!(matches!(
            StateDir::open(dir.path(), "fp", None),
            Err(StateError::KeyMismatch { .. })
        ));
        // Flip a byte inside the first record: corruption, not a torn tail.
        let wal = dir.path().join("wal");
        let mut bytes = std::fs::read(&wal).unwrap();
        bytes[9] ^= 0xff;
        std::fs::write(&wal, &bytes).unwrap();
        let err = StateDir::open(dir.path(), "fp", Some(1))
            .err()
            .expect("corrupt");
        assert!(matches!(err, StateError::Corrupt { .. }), "{err}");
        // A newer format.
        let meta = dir.path().join("meta.json");
        let text = std::fs::read_to_string(&meta)
            .unwrap()
            .replace("\"format\": 1", "\"format\": 99");
        std::fs::write(&meta, text).unwrap();
        assert!(matches!(
            StateDir::open(dir.path(), "fp", Some(1)),
            Err(StateError::NewerFormat { .. })
        ));
    }

    #[test]
    fn files_are_private() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        let sd = dir.path().join("state");
        let (mut s, _, _) = StateDir::open(&sd, "fp", None).unwrap();
        s.log_line(b"x").unwrap();
        s.sync().unwrap();
        let mode = |p: &Path| std::fs::metadata(p).unwrap().permissions().mode() & 0o777;
        assert_eq!(mode(&sd), 0o700);
        assert_eq!(mode(&sd.join("key")), 0o600);
        assert_eq!(mode(&sd.join("wal")), 0o600);
        assert_eq!(mode(&sd.join("meta.json")), 0o600);
    }
}
