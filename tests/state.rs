//! The state directory through the real binary: every refusal of issue 7 (truncated and
//! damaged files, changed bound, changed budget, state older than the output), and the
//! deliberate fresh epoch (`scrim state new-epoch`) — seq and epochs continue, the lifetime
//! spend carries over and is charged additively, a crash at any step leaves a usable state,
//! and `run` restarts from the new generation.
//!
//! Budget arithmetic is zCDP's additive composition (Bun & Steinke 2016, Lemma 2.3): the
//! checks below count how many epochs a lifetime budget pays for after a carried spend.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;

/// 2026-03-02T00:00:00Z in epoch milliseconds (computed with `date -u -d`), a window boundary.
const T0: i64 = 1_772_409_600_000;
const HOUR: i64 = 3_600_000;

fn scrim(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> Output {
    let mut c = Command::new(env!("CARGO_BIN_EXE_scrim"));
    c.args(args)
        .current_dir(dir)
        .stdin(Stdio::null())
        .env("RUST_LOG", "warn");
    for (k, v) in env {
        c.env(k, v);
    }
    c.output().expect("scrim runs")
}

fn text(o: &Output) -> String {
    format!(
        "status {:?}\nstdout: {}\nstderr: {}",
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    )
}

/// A unit-level config with four hourly windows per epoch; `bound` is
/// max_events_per_window, the budget is `rho` per epoch against `lifetime`.
fn config(bound: u32, rho: f64, lifetime: f64) -> String {
    format!(
        r#"
[input]
time_field = "ts"
unit_field = "card"
[window]
length = "1h"
allowed_lateness = "0s"
[privacy]
rho_per_epoch = {rho}
lifetime_rho = {lifetime}
delta = 1e-9
epoch_windows = 4
max_events_per_window = {bound}
max_windows_per_epoch = 4
[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a", "b"]
"#
    )
}

/// Three cards tapping in zone a and b in each hour of `hours`.
fn feed(hours: std::ops::Range<i64>) -> String {
    let mut out = String::new();
    for h in hours {
        for card in 0..3 {
            let zone = if card % 2 == 0 { "a" } else { "b" };
            out.push_str(&format!(
                "{{\"ts\":{},\"card\":\"c{card}\",\"zone\":\"{zone}\"}}\n",
                T0 + h * HOUR + 60_000 * (card + 1)
            ));
        }
    }
    out
}

fn records(path: &Path) -> Vec<Value> {
    std::fs::read_to_string(path)
        .unwrap_or_default()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

fn replay(d: &Path, cfg: &str, state: &str, out: &str, input: &str) -> Output {
    scrim(
        d,
        &[
            "replay", "--config", cfg, "--seed", "7", "--state", state, "--out", out, input,
        ],
        &[],
    )
}

fn new_epoch(d: &Path, cfg: &str, state: &str, out: &str, env: &[(&str, &str)]) -> Output {
    scrim(
        d,
        &[
            "state",
            "new-epoch",
            "--config",
            cfg,
            "--state",
            state,
            "--out",
            out,
            "--seed",
            "7",
            "--reason",
            "looser bound after review PR-12",
        ],
        env,
    )
}

fn show(d: &Path, state: &str) -> Value {
    let o = scrim(d, &["state", "show", "--state", state, "--json"], &[]);
    assert!(o.status.success(), "{}", text(&o));
    serde_json::from_slice(&o.stdout).unwrap()
}

/// Writes the configs and feeds of a scenario: c1 (bound 2, rho 1, lifetime 4), c2 (bound
/// 3, rho 0.5, lifetime 2.5), hours 0..6 in `in1`, hours 4..14 in `in2`.
fn setup(d: &Path) {
    std::fs::write(d.join("c1.toml"), config(2, 1.0, 4.0)).unwrap();
    std::fs::write(d.join("c2.toml"), config(3, 0.5, 2.5)).unwrap();
    std::fs::write(d.join("in1.jsonl"), feed(0..6)).unwrap();
    std::fs::write(d.join("in2.jsonl"), feed(4..14)).unwrap();
}

/// Files of a directory with their contents, to prove that nothing changed.
fn snapshot(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut v: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| {
            let e = e.unwrap();
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    v.sort();
    v
}

#[test]
fn new_epoch_changes_the_config_and_continues_seq_epochs_and_budget() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    setup(d);
    // Generation 0: hours 0..6 under c1 — epoch 0 (hours 0-3) and epoch 1 (hours 4-5, cut
    // short later): 2 epochs × rho 1 = 2 spent. Two zones × one window scope + the
    // epoch_to_date scope: records per window = 2 × 2.
    let o = replay(d, "c1.toml", "s", "o", "in1.jsonl");
    assert!(o.status.success(), "{}", text(&o));
    let gen0 = records(&d.join("o/releases.jsonl"));
    assert!(!gen0.is_empty());
    let n0 = gen0.len() as u64;
    assert_eq!(gen0.last().unwrap()["epoch"], 1);

    // The changed bound without new-epoch is still refused.
    let o = replay(d, "c2.toml", "s", "o", "in2.jsonl");
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(text(&o).contains("configuration changed"), "{}", text(&o));
    assert!(text(&o).contains("scrim state new-epoch"), "{}", text(&o));

    let o = new_epoch(d, "c2.toml", "s", "o", &[]);
    assert!(o.status.success(), "{}", text(&o));
    let out = String::from_utf8_lossy(&o.stdout).into_owned();
    assert!(out.contains("generation 1 started"), "{out}");
    assert!(out.contains("epoch 1 abandoned"), "{out}");

    let s = show(d, "s");
    assert_eq!(s["generation"], 1);
    assert_eq!(s["format"], 3);
    assert_eq!(s["event_hash"], "siphash24-v1");
    assert_eq!(
        s["log_records"], 0,
        "the new generation starts with an empty log"
    );
    let g = &s["generations"][0];
    assert_eq!(
        g["spent_rho"], 2.0,
        "2 epochs × rho 1 (additive composition)"
    );
    assert_eq!(g["epochs_charged"], 2);
    assert_eq!(g["abandoned_epoch"], 1);
    assert_eq!(g["first_epoch"], 2);
    assert_eq!(g["next_seq"], n0);
    assert_eq!(
        g["start_ms"],
        T0 + 6 * HOUR,
        "first window after the last closed one"
    );
    assert_eq!(g["reason"], "looser bound after review PR-12");
    // The old log (raw input lines) is gone.
    assert!(!d.join("s/wal").exists());

    // The old configuration is now refused too.
    let o = replay(d, "c1.toml", "s", "o", "in2.jsonl");
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));

    // Generation 1 under c2: hours 4 and 5 are before its start (late); hours 6-9 are epoch
    // 2 (2 + 0.5 = 2.5 ≤ 2.5, affordable), hours 10-13 would be epoch 3 (3.0 > 2.5): the
    // budget runs out, exit 3, and epoch 3 releases nothing. Without the carried 2.0 the
    // lifetime of 2.5 would pay for 5 epochs.
    let o = replay(d, "c2.toml", "s", "o", "in2.jsonl");
    assert_eq!(o.status.code(), Some(3), "{}", text(&o));
    assert!(
        text(&o).contains("lifetime budget exhausted"),
        "{}",
        text(&o)
    );
    assert!(text(&o).contains(" 6 late"), "{}", text(&o));
    let all = records(&d.join("o/releases.jsonl"));
    assert_eq!(
        &all[..gen0.len()],
        &gen0[..],
        "published records never change"
    );
    let new = &all[gen0.len()..];
    assert_eq!(
        new.len(),
        4 * 4,
        "four windows of epoch 2, four records each"
    );
    for (i, r) in all.iter().enumerate() {
        assert_eq!(
            r["seq"], i as u64,
            "seq dense and unique across generations"
        );
    }
    for r in new {
        assert_eq!(r["epoch"], 2);
        assert_eq!(r["guarantee"]["rho"], 0.5);
        assert_eq!(r["guarantee"]["lifetime_rho"], 2.5);
    }
    assert_eq!(new[0]["window_start"], "2026-03-02T06:00:00Z");
    assert_eq!(new[0]["leaf"], 0);

    // A further new epoch beyond lifetime_rho: exit 3 and nothing changes.
    std::fs::write(d.join("c3.toml"), config(3, 1.0, 3.0)).unwrap();
    let (state_before, out_before) = (snapshot(&d.join("s")), snapshot(&d.join("o")));
    let o = new_epoch(d, "c3.toml", "s", "o", &[]);
    assert_eq!(o.status.code(), Some(3), "{}", text(&o));
    assert!(text(&o).contains("nothing was changed"), "{}", text(&o));
    assert_eq!(snapshot(&d.join("s")), state_before);
    assert_eq!(snapshot(&d.join("o")), out_before);
}

#[test]
fn a_crash_at_any_step_of_new_epoch_leaves_a_usable_state() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    setup(d);
    for step in 1..=4 {
        let (s, o) = (format!("s{step}"), format!("o{step}"));
        let r = replay(d, "c1.toml", &s, &o, "in1.jsonl");
        assert!(r.status.success(), "{}", text(&r));
        let step_text = step.to_string();
        let r = new_epoch(
            d,
            "c2.toml",
            &s,
            &o,
            &[("SCRIMTEST_NEW_EPOCH_ABORT_AFTER", &step_text)],
        );
        assert_eq!(r.status.code(), Some(86), "step {step}: {}", text(&r));
        assert!(
            text(&r).contains("aborting after new-epoch step"),
            "{}",
            text(&r)
        );
        // Before the ledger is replaced (step 4) the old generation is current, after it
        // the new one; either way the state opens and the other config is refused.
        let committed = step >= 4;
        assert_eq!(
            show(d, &s)["generation"],
            u64::from(committed),
            "step {step}"
        );
        let bad = if committed { "c1.toml" } else { "c2.toml" };
        let r = replay(d, bad, &s, &o, "in2.jsonl");
        assert_eq!(r.status.code(), Some(2), "step {step}: {}", text(&r));
        if !committed {
            // Leftovers do not block a second, complete new-epoch.
            let r = new_epoch(d, "c2.toml", &s, &o, &[]);
            assert!(r.status.success(), "step {step}: {}", text(&r));
        }
        let r = replay(d, "c2.toml", &s, &o, "in2.jsonl");
        assert_eq!(r.status.code(), Some(3), "step {step}: {}", text(&r));
        let names: Vec<String> = snapshot(&d.join(&s)).into_iter().map(|(n, _)| n).collect();
        assert!(
            !names.iter().any(|n| n == "wal" || n.ends_with(".tmp")),
            "step {step}: {names:?}"
        );
        // The same releases as the uninterrupted run of the first test's scenario.
        let all = records(&d.join(&o).join("releases.jsonl"));
        for (i, r) in all.iter().enumerate() {
            assert_eq!(r["seq"], i as u64, "step {step}");
        }
        assert_eq!(all.last().unwrap()["epoch"], 2, "step {step}");
    }
}

#[test]
fn every_refusal_names_the_problem_and_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    setup(d);
    std::fs::write(d.join("short.jsonl"), feed(0..3)).unwrap();
    // s_old holds hours 0..3, s holds hours 0..6 with its releases in o.
    let o = replay(d, "c1.toml", "s_old", "o_old", "short.jsonl");
    assert!(o.status.success(), "{}", text(&o));
    let o = replay(d, "c1.toml", "s", "o", "in1.jsonl");
    assert!(o.status.success(), "{}", text(&o));
    let refused = |state: &str, cfg: &str, what: &str, needle: &str| {
        let o = replay(d, cfg, state, "o", "in1.jsonl");
        assert_eq!(o.status.code(), Some(2), "{what}: {}", text(&o));
        assert!(text(&o).contains(needle), "{what}: {}", text(&o));
    };

    // State older than the output: both files named, and the way out.
    let o = replay(d, "c1.toml", "s_old", "o", "short.jsonl");
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    let msg = text(&o);
    assert!(msg.contains("older than the output"), "{msg}");
    assert!(
        msg.contains("o/releases.jsonl") && msg.contains("s_old"),
        "{msg}"
    );
    assert!(msg.contains("from the same backup"), "{msg}");
    // The daemon refuses the same way, before opening any port.
    let run_cfg = format!(
        "{}\n[http]\nlisten = \"127.0.0.1:0\"\n[output]\ndir = \"o\"\n[state]\ndir = \"s_old\"\n",
        config(2, 1.0, 4.0)
    );
    std::fs::write(d.join("run.toml"), run_cfg).unwrap();
    let o = scrim(
        d,
        &[
            "run",
            "--config",
            "run.toml",
            "--seed",
            "7",
            "--insecure-seed",
        ],
        &[],
    );
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(text(&o).contains("older than the output"), "{}", text(&o));

    // Changed bound, changed budget.
    std::fs::write(d.join("bound.toml"), config(3, 1.0, 4.0)).unwrap();
    std::fs::write(d.join("budget.toml"), config(2, 1.0, 5.0)).unwrap();
    refused("s", "bound.toml", "changed bound", "configuration changed");
    refused(
        "s",
        "budget.toml",
        "changed budget",
        "configuration changed",
    );

    let backup = |name: &str| std::fs::read(d.join("s").join(name)).unwrap();
    let restore = |name: &str, bytes: &[u8]| std::fs::write(d.join("s").join(name), bytes).unwrap();
    // A flipped byte in the log (not at its end) and in the stored configuration.
    let wal = backup("wal");
    let mut flipped = wal.clone();
    flipped[12] ^= 0x20;
    restore("wal", &flipped);
    refused("s", "c1.toml", "flipped log byte", "is corrupt");
    restore("wal", &wal);
    let conf = backup("config.toml");
    let mut flipped = conf.clone();
    let at = flipped.len() - 3;
    flipped[at] ^= 0x01;
    restore("config.toml", &flipped);
    refused("s", "c1.toml", "flipped config byte", "is corrupt");
    restore("config.toml", &conf);
    // Truncated files: meta.json; the log cut to a third (its torn tail is cut, which
    // loses records, so the state no longer covers releases.jsonl).
    let meta = backup("meta.json");
    restore("meta.json", &meta[..meta.len() / 2]);
    refused("s", "c1.toml", "truncated meta.json", "is corrupt");
    restore("meta.json", &meta);
    restore("wal", &wal[..wal.len() / 3]);
    refused("s", "c1.toml", "truncated log", "older than the output");
    restore("wal", &wal);
    let o = replay(d, "c1.toml", "s", "o", "in1.jsonl");
    assert!(o.status.success(), "restored: {}", text(&o));

    // After a new epoch: a truncated or edited ledger is refused, never cut back.
    let o = new_epoch(d, "c2.toml", "s", "o", &[]);
    assert!(o.status.success(), "{}", text(&o));
    let ledger = backup("ledger.jsonl");
    restore("ledger.jsonl", &ledger[..ledger.len() - 10]);
    refused("s", "c2.toml", "truncated ledger", "is corrupt");
    let edited = String::from_utf8(ledger.clone())
        .unwrap()
        .replace("\"spent_rho\":2.0", "\"spent_rho\":0.0");
    restore("ledger.jsonl", edited.as_bytes());
    refused("s", "c2.toml", "edited ledger", "is corrupt");
    restore("ledger.jsonl", &ledger);

    // new-epoch itself: a start before the last closed window; a changed privacy unit; a
    // state that does not exist.
    let o = scrim(
        d,
        &[
            "state",
            "new-epoch",
            "--config",
            "c2.toml",
            "--state",
            "s",
            "--out",
            "o",
            "--seed",
            "7",
            "--reason",
            "x",
            "--start",
            "2026-03-02T01:00:00Z",
        ],
        &[],
    );
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(
        text(&o).contains("before the end of the last closed window"),
        "{}",
        text(&o)
    );
    std::fs::write(
        d.join("event.toml"),
        config(2, 0.5, 4.0)
            .replace("unit_field = \"card\"\n", "")
            .replace("lifetime_rho = 4\n", "")
            .replace("lifetime_rho = 4.0\n", "")
            .replace("max_events_per_window = 2\n", "")
            .replace("max_windows_per_epoch = 4\n", ""),
    )
    .unwrap();
    let o = new_epoch(d, "event.toml", "s", "o", &[]);
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(
        text(&o).contains("changes the privacy unit"),
        "{}",
        text(&o)
    );
    let o = new_epoch(d, "c2.toml", "nowhere", "o", &[]);
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(text(&o).contains("holds no scrim state"), "{}", text(&o));
}

/// A format-1 state (created before the configuration was stored) needs
/// `--previous-config`, whose fingerprint must be the pinned one.
#[test]
fn a_state_without_stored_config_needs_the_previous_config() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    setup(d);
    let o = replay(d, "c1.toml", "s", "o", "in1.jsonl");
    assert!(o.status.success(), "{}", text(&o));
    std::fs::remove_file(d.join("s/config.toml")).unwrap();
    let o = new_epoch(d, "c2.toml", "s", "o", &[]);
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(text(&o).contains("--previous-config"), "{}", text(&o));
    let with_previous = |prev: &str| {
        scrim(
            d,
            &[
                "state",
                "new-epoch",
                "--config",
                "c2.toml",
                "--state",
                "s",
                "--out",
                "o",
                "--seed",
                "7",
                "--reason",
                "x",
                "--previous-config",
                prev,
            ],
            &[],
        )
    };
    let o = with_previous("c2.toml");
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(
        text(&o).contains("--previous-config has fingerprint"),
        "{}",
        text(&o)
    );
    let o = with_previous("c1.toml");
    assert!(o.status.success(), "{}", text(&o));
    assert_eq!(show(d, "s")["generations"][0]["spent_rho"], 2.0);
}

struct Daemon {
    child: Child,
    http: String,
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Daemon {
    fn start(dir: &Path, cfg: &str) -> Daemon {
        let mut child = Command::new(env!("CARGO_BIN_EXE_scrim"))
            .args(["run", "--config", cfg, "--seed", "7", "--insecure-seed"])
            .current_dir(dir)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("scrim runs");
        let stderr = child.stderr.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                let _ = tx.send(line);
            }
        });
        let deadline = Instant::now() + Duration::from_secs(30);
        let mut http = None;
        while http.is_none() && Instant::now() < deadline {
            if let Ok(line) = rx.recv_timeout(Duration::from_millis(200))
                && let Some(a) = line.strip_prefix("scrim: http listening on ")
            {
                http = Some(a.trim().to_string());
            }
        }
        std::thread::spawn(move || while rx.recv().is_ok() {});
        Daemon {
            child,
            http: http.expect("http address printed"),
        }
    }

    fn budget(&self) -> Value {
        self.get_json("/v1/budget")
    }

    /// The exact ingest counts (operator endpoint; no token configured here).
    fn ingest(&self) -> Value {
        self.get_json("/v1/ingest")
    }

    fn get_json(&self, path: &str) -> Value {
        let mut s = TcpStream::connect(&self.http).expect("connect http");
        s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
        write!(
            s,
            "GET {path} HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
        )
        .unwrap();
        let mut buf = String::new();
        s.read_to_string(&mut buf).unwrap();
        let body = buf.split_once("\r\n\r\n").map(|x| x.1).unwrap_or_default();
        serde_json::from_str(body).unwrap_or(Value::Null)
    }

    fn stop(mut self) {
        Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status()
            .unwrap();
        let status = self.child.wait().unwrap();
        assert!(status.success(), "exit status {status}");
    }
}

fn wait_until(mut f: impl FnMut() -> bool, what: &str) {
    let deadline = Instant::now() + Duration::from_secs(30);
    while Instant::now() < deadline {
        if f() {
            return;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    panic!("timed out waiting for {what}");
}

#[test]
fn run_restarts_from_a_new_generation() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // One-second windows, four per epoch; event times in the past, so every window closes
    // at once (watermark, then idle_close by the wall clock for the last one).
    let run_cfg = |bound: u32, rho: f64| {
        format!(
            r#"
[input]
time_field = "ts"
unit_field = "card"
[window]
length = "1s"
allowed_lateness = "0s"
idle_close = "1s"
[privacy]
rho_per_epoch = {rho}
lifetime_rho = 10.0
delta = 1e-9
epoch_windows = 4
max_events_per_window = {bound}
max_windows_per_epoch = 4
[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["a", "b"]
[[sources]]
kind = "file"
path = "feed.jsonl"
[http]
listen = "127.0.0.1:0"
[output]
dir = "out"
[state]
dir = "state"
"#
        )
    };
    std::fs::write(d.join("r1.toml"), run_cfg(2, 0.5)).unwrap();
    std::fs::write(d.join("r2.toml"), run_cfg(3, 0.25)).unwrap();
    let second = 1000;
    let t = |s: i64, card: i64| {
        format!(
            "{{\"ts\":{},\"card\":\"c{card}\",\"zone\":\"{}\"}}\n",
            T0 + s * second + 10 * card,
            if card % 2 == 0 { "a" } else { "b" }
        )
    };
    // Seconds 0..6: epochs 0 and 1 (cut short after its second window).
    let first: String = (0..6).flat_map(|s| (0..3).map(move |c| t(s, c))).collect();
    std::fs::write(d.join("feed.jsonl"), &first).unwrap();
    let out = d.join("out/releases.jsonl");
    let per_window = 2 * 2; // two zones × (window, epoch_to_date)
    let daemon = Daemon::start(d, "r1.toml");
    wait_until(
        || records(&out).len() == 6 * per_window,
        "generation 0 releases",
    );
    wait_until(
        || daemon.budget()["lifetime_spent_rho"] == 1.0,
        "2 epochs × 0.5 spent",
    );
    daemon.stop();
    let gen0 = records(&out);

    let o = scrim(
        d,
        &[
            "state",
            "new-epoch",
            "--config",
            "r2.toml",
            "--seed",
            "7",
            "--reason",
            "bound 3",
        ],
        &[],
    );
    assert!(o.status.success(), "{}", text(&o));

    // Seconds 6..9 follow: three windows of epoch 2, generation 1's first. The file source
    // is read again from its start; the 18 events of seconds 0..6 are before the new epoch:
    // late.
    let more: String = (6..9).flat_map(|s| (0..3).map(move |c| t(s, c))).collect();
    std::fs::OpenOptions::new()
        .append(true)
        .open(d.join("feed.jsonl"))
        .unwrap()
        .write_all(more.as_bytes())
        .unwrap();
    let daemon = Daemon::start(d, "r2.toml");
    wait_until(
        || records(&out).len() == 9 * per_window,
        "generation 1 releases",
    );
    wait_until(
        || daemon.budget()["epoch_windows_closed"] == 3,
        "budget view",
    );
    let b = daemon.budget();
    // 1.0 carried + 0.25 for epoch 2 (additive composition).
    assert_eq!(b["lifetime_spent_rho"], 1.25, "{b}");
    assert_eq!(b["epochs_charged"], 3, "{b}");
    assert_eq!(b["epoch"], 2, "{b}");
    let counts = daemon.ingest();
    assert_eq!(counts["late"], 18, "{counts}");
    assert_eq!(counts["accepted"], 9, "{counts}");
    assert_eq!(b["epoch_windows_closed"], 3, "{b}");
    assert_eq!(b["rho_per_epoch"], 0.25, "{b}");
    daemon.stop();
    let all = records(&out);
    assert_eq!(&all[..gen0.len()], &gen0[..]);
    for (i, r) in all.iter().enumerate() {
        assert_eq!(r["seq"], i as u64);
    }
    for r in &all[gen0.len()..] {
        assert_eq!(r["epoch"], 2);
        assert_eq!(r["guarantee"]["rho"], 0.25);
    }
    assert_eq!(all[gen0.len()]["window_start"], "2026-03-02T00:00:06Z");
}
