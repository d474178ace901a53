//! Black-box tests of `scrim run`: the real binary on loopback ports chosen at run time,
//! TCP and file sources, cursor pulls, metrics that add up, backpressure, shutdown and
//! restart from the state directory.

mod common;

use common::{Daemon, get, metric, now_ms, request, start_run, wait_until};
use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

fn config(dir: &Path, with_file: bool) -> String {
    let file = if with_file {
        format!(
            "\n[[sources]]\nkind = \"file\"\npath = \"{}\"\n",
            dir.join("feed.jsonl").display()
        )
    } else {
        String::new()
    };
    format!(
        r#"
[input]
time_field = "ts"

[window]
length = "1s"
allowed_lateness = "0s"
idle_close = "1s"

[privacy]
rho_per_epoch = 0.5
delta = 1e-9
epoch_windows = 1024

[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["harbour", "uplands"]

[[sources]]
kind = "tcp"
listen = "127.0.0.1:0"
{file}
[http]
listen = "127.0.0.1:0"

[output]
dir = "{out}"

[state]
dir = "{state}"
"#,
        out = dir.join("out").display(),
        state = dir.join("state").display()
    )
}

fn start(dir: &Path, cfg: &str, env: &[(&str, &str)]) -> Daemon {
    start_run(dir, cfg, env)
}

/// `get` with an `Authorization: Bearer` header.
fn get_bearer(addr: &str, path: &str, token: &str) -> (u16, String) {
    request(addr, path, &format!("Authorization: Bearer {token}\r\n"))
}

#[test]
fn live_daemon_ingests_releases_and_counts_everything() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("feed.jsonl"), "").unwrap();
    let d = start(dir.path(), &config(dir.path(), true), &[]);
    wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");

    let mut sent = 0u64;
    let mut bad = 0u64;
    // Three TCP connections, good and bad lines.
    let mut conns: Vec<TcpStream> = (0..3)
        .map(|_| TcpStream::connect(&d.tcp).unwrap())
        .collect();
    for round in 0..3 {
        for (i, c) in conns.iter_mut().enumerate() {
            for j in 0..20 {
                let zone = if (i + j) % 2 == 0 {
                    "harbour"
                } else {
                    "uplands"
                };
                writeln!(c, "{{\"ts\":{},\"zone\":\"{zone}\"}}", now_ms()).unwrap();
                sent += 1;
            }
            writeln!(c, "{{\"ts\":{},\"zone\":\"atlantis\"}}", now_ms()).unwrap();
            writeln!(c, "not json").unwrap();
            sent += 2;
            bad += 2;
        }
        // And the file source.
        let mut f = std::fs::OpenOptions::new()
            .append(true)
            .open(dir.path().join("feed.jsonl"))
            .unwrap();
        for _ in 0..10 {
            writeln!(f, "{{\"ts\":{},\"zone\":\"harbour\"}}", now_ms()).unwrap();
            sent += 1;
        }
        let _ = round;
        std::thread::sleep(Duration::from_millis(700));
    }
    for c in &mut conns {
        c.flush().unwrap();
    }
    drop(conns);
    let total = |m: &str| {
        metric(m, "scrim_events_total{outcome=\"accepted\"}")
            + metric(m, "scrim_events_total{outcome=\"rejected\"}")
            + metric(m, "scrim_events_total{outcome=\"late\"}")
    };
    wait_until(
        || total(&get(&d.http, "/metrics").1) == sent as f64,
        30,
        "all events counted",
    );
    let m = get(&d.http, "/metrics").1;
    assert_eq!(
        metric(&m, "scrim_events_total{outcome=\"rejected\"}"),
        bad as f64,
        "{m}"
    );
    assert!(
        m.contains("scrim_rejected_events_total{reason=\"unknown_category\"} 9"),
        "{m}"
    );
    assert!(
        m.contains("scrim_rejected_events_total{reason=\"invalid_json\"} 9"),
        "{m}"
    );

    // Releases appear once windows close (watermark or idle_close), pulled with a cursor.
    wait_until(
        || {
            let (_, body) = get(&d.http, "/v1/releases?limit=1000");
            serde_json::from_str::<serde_json::Value>(&body)
                .map(|v| v["releases"].as_array().map_or(0, Vec::len) >= 8)
                .unwrap_or(false)
        },
        30,
        "releases",
    );
    let (_, body) = get(&d.http, "/v1/releases?limit=3");
    let page: serde_json::Value = serde_json::from_str(&body).unwrap();
    let first = page["releases"].as_array().unwrap().clone();
    assert_eq!(first.len(), 3);
    let next = page["next_after"].as_u64().unwrap();
    assert_eq!(next, first[2]["seq"].as_u64().unwrap());
    let (_, body) = get(&d.http, &format!("/v1/releases?after={next}&limit=2"));
    let page2: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(page2["releases"][0]["seq"].as_u64().unwrap(), next + 1);
    assert_eq!(page2["releases"][0]["seeded"], false);

    let (status, budget) = get(&d.http, "/v1/budget");
    assert_eq!(status, 200);
    let b: serde_json::Value = serde_json::from_str(&budget).unwrap();
    assert_eq!(b["rho_per_epoch"], 0.5);
    assert_eq!(get(&d.http, "/healthz").0, 200);
    assert_eq!(get(&d.http, "/").0, 200);

    // SIGTERM: drains and exits 0.
    let pid = d.child.id();
    Command::new("kill")
        .args(["-TERM", &pid.to_string()])
        .status()
        .unwrap();
    let mut d = d;
    let deadline = Instant::now() + Duration::from_secs(20);
    let status = loop {
        if let Some(s) = d.child.try_wait().unwrap() {
            break s;
        }
        assert!(
            Instant::now() < deadline,
            "daemon did not stop after SIGTERM"
        );
        std::thread::sleep(Duration::from_millis(50));
    };
    assert!(status.success(), "exit status {status}");
    // Releases are also in the file, one JSON object per line.
    let text = std::fs::read_to_string(dir.path().join("out/releases.jsonl")).unwrap();
    assert!(text.lines().count() >= 8);
}

#[test]
fn restart_resumes_from_state_without_losing_or_duplicating() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config(dir.path(), false);
    let accepted_before;
    {
        let d = start(dir.path(), &cfg, &[]);
        wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");
        let mut c = TcpStream::connect(&d.tcp).unwrap();
        for i in 0..500 {
            writeln!(
                c,
                "{{\"ts\":{},\"zone\":\"{}\"}}",
                now_ms(),
                if i % 2 == 0 { "harbour" } else { "uplands" }
            )
            .unwrap();
        }
        c.flush().unwrap();
        wait_until(
            || {
                metric(
                    &get(&d.http, "/metrics").1,
                    "scrim_events_total{outcome=\"accepted\"}",
                ) == 500.0
            },
            20,
            "accepted",
        );
        accepted_before = 500.0;
        // SIGTERM while windows are still open.
        Command::new("kill")
            .args(["-TERM", &d.child.id().to_string()])
            .status()
            .unwrap();
        let mut d = d;
        let s = d.child.wait().unwrap();
        assert!(s.success());
    }
    let before = std::fs::read_to_string(dir.path().join("out/releases.jsonl")).unwrap_or_default();
    let d = start(dir.path(), &cfg, &[]);
    wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");
    let m = get(&d.http, "/metrics").1;
    assert_eq!(
        metric(&m, "scrim_events_total{outcome=\"accepted\"}"),
        accepted_before,
        "accepted events survive a restart"
    );
    // The open windows close by idle_close; the records published before are unchanged
    // and seq continues without gaps or duplicates.
    wait_until(
        || {
            std::fs::read_to_string(dir.path().join("out/releases.jsonl"))
                .unwrap_or_default()
                .lines()
                .count()
                > before.lines().count()
        },
        30,
        "releases after restart",
    );
    let after = std::fs::read_to_string(dir.path().join("out/releases.jsonl")).unwrap();
    assert!(after.starts_with(&before), "published records never change");
    let seqs: Vec<u64> = after
        .lines()
        .map(|l| {
            serde_json::from_str::<serde_json::Value>(l).unwrap()["seq"]
                .as_u64()
                .unwrap()
        })
        .collect();
    for (i, s) in seqs.iter().enumerate() {
        assert_eq!(*s, i as u64, "seq dense and unique");
    }
}

#[test]
fn slow_engine_makes_the_sender_block_instead_of_growing_memory() {
    let dir = tempfile::tempdir().unwrap();
    let d = start(
        dir.path(),
        &config(dir.path(), false),
        &[("SCRIMTEST_SLOW_ENGINE_MS", "2000")],
    );
    wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");
    let mut c = TcpStream::connect(&d.tcp).unwrap();
    // The slowed engine takes one batch (≤ 512 lines) every 2 s, about 60 KB/s. Once the
    // ingest queue (64 batches) and the socket buffers are full, one 200 KB write cannot
    // finish within 3 s: the sender is blocked by TCP flow control.
    c.set_write_timeout(Some(Duration::from_secs(3))).unwrap();
    let line = format!(
        "{{\"ts\":{},\"zone\":\"harbour\",\"pad\":\"{}\"}}\n",
        now_ms(),
        "x".repeat(200)
    );
    let chunk = line.repeat(1000);
    let mut written = 0usize;
    let blocked = loop {
        match c.write(chunk.as_bytes()) {
            Ok(n) => written += n,
            Err(_) => break true,
        }
        if written > 200 * 1024 * 1024 {
            break false;
        }
    };
    assert!(
        blocked,
        "the sender was never blocked after {written} bytes"
    );
    let rss_kib = std::fs::read_to_string(format!("/proc/{}/status", d.child.id()))
        .unwrap()
        .lines()
        .find_map(|l| {
            l.strip_prefix("VmRSS:").map(|v| {
                v.trim()
                    .trim_end_matches(" kB")
                    .trim()
                    .parse::<u64>()
                    .unwrap()
            })
        })
        .unwrap();
    assert!(
        rss_kib < 200 * 1024,
        "daemon RSS {rss_kib} KiB while the sender is blocked after {written} bytes"
    );
}

/// A unit-level config whose lifetime pays for 2 epochs of 4 one-second windows, with a TCP
/// source that closes idle connections after 1 s.
fn unit_config(dir: &Path) -> String {
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
rho_per_epoch = 0.5
lifetime_rho = 1.0
delta = 1e-9
epoch_windows = 4
max_events_per_window = 2
max_windows_per_epoch = 4

[[stats]]
name = "taps"
kind = "count"

[[sources]]
kind = "tcp"
listen = "127.0.0.1:0"
idle_timeout = "1s"

[http]
listen = "127.0.0.1:0"

[output]
dir = "{out}"

[state]
dir = "{state}"
"#,
        out = dir.join("out").display(),
        state = dir.join("state").display()
    )
}

#[test]
fn idle_connections_are_closed_and_the_budget_eta_counts_down() {
    let dir = tempfile::tempdir().unwrap();
    let d = start(dir.path(), &unit_config(dir.path()), &[]);
    wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");

    // Before any event: a whole epoch ahead, and the lifetime pays for 2 × 4 windows of 1 s.
    let m = get(&d.http, "/metrics").1;
    assert_eq!(metric(&m, "scrim_epoch_windows_remaining"), 4.0, "{m}");
    assert_eq!(
        metric(&m, "scrim_budget_exhaustion_eta_seconds"),
        8.0,
        "{m}"
    );

    // Idle timeout: a silent connection is closed by the daemon after ~1 s. One that sent a
    // line and then went quiet is closed too, and its line still counts.
    let mut silent = TcpStream::connect(&d.tcp).unwrap();
    let mut talker = TcpStream::connect(&d.tcp).unwrap();
    writeln!(talker, "{{\"ts\":{},\"card\":\"c1\"}}", now_ms()).unwrap();
    talker.flush().unwrap();
    wait_until(
        || metric(&get(&d.http, "/metrics").1, "scrim_tcp_connections") == 2.0,
        10,
        "two connections open",
    );
    let opened = Instant::now();
    for s in [&mut silent, &mut talker] {
        s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
        let mut buf = [0u8; 16];
        // EOF (Ok(0)) or a reset: either way the daemon hung up, well before our 10 s.
        let n = s.read(&mut buf).unwrap_or(0);
        assert_eq!(n, 0, "the daemon sends nothing on an ingest connection");
    }
    let waited = opened.elapsed();
    assert!(
        waited < Duration::from_secs(8),
        "idle connections closed after {waited:?}"
    );
    wait_until(
        || metric(&get(&d.http, "/metrics").1, "scrim_tcp_connections") == 0.0,
        10,
        "connections closed",
    );
    wait_until(
        || {
            metric(
                &get(&d.http, "/metrics").1,
                "scrim_events_total{outcome=\"accepted\"}",
            ) == 1.0
        },
        10,
        "the talker's line counted",
    );

    // The ETA follows the windows: once the first window has closed, the current epoch is
    // charged (spent 0.5), and what remains is its T − closed windows plus one whole epoch.
    wait_until(
        || metric(&get(&d.http, "/metrics").1, "scrim_budget_spent_rho") == 0.5,
        20,
        "first epoch charged",
    );
    let mut conn = TcpStream::connect(&d.tcp).unwrap();
    for _ in 0..3 {
        writeln!(conn, "{{\"ts\":{},\"card\":\"c2\"}}", now_ms()).unwrap();
        conn.flush().unwrap();
        std::thread::sleep(Duration::from_millis(600));
    }
    let m = get(&d.http, "/metrics").1;
    let remaining = metric(&m, "scrim_epoch_windows_remaining");
    let spent = metric(&m, "scrim_budget_spent_rho");
    let eta = metric(&m, "scrim_budget_exhaustion_eta_seconds");
    assert!((1.0..=4.0).contains(&remaining), "{m}");
    // Whole epochs left after the charged ones, plus the current epoch's rest when one is
    // under way (remaining < 4), one second per window.
    let whole = (1.0 - spent) / 0.5 * 4.0;
    let current = if remaining < 4.0 { remaining } else { 0.0 };
    assert_eq!(eta, whole + current, "{m}");
    assert!(eta < 8.0, "the ETA went down: {m}");
}

#[test]
fn exact_counts_stay_behind_the_operator_token() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    let token = "0123456789abcdef0123456789abcdef";
    let token_path = dir.path().join("operator.token");
    std::fs::write(&token_path, format!("{token}\n")).unwrap();
    let cfg = unit_config(dir.path()).replace(
        "[http]\nlisten = \"127.0.0.1:0\"",
        &format!(
            "[http]\nlisten = \"127.0.0.1:0\"\noperator_token_file = \"{}\"",
            token_path.display()
        ),
    );
    assert!(cfg.contains("operator_token_file"));

    // A token file others can read is refused at start, naming the key and the fix.
    std::fs::set_permissions(&token_path, std::fs::Permissions::from_mode(0o644)).unwrap();
    std::fs::write(dir.path().join("scrim.toml"), &cfg).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_scrim"))
        .args(["run", "--config", "scrim.toml"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("http.operator_token_file") && err.contains("chmod 600"),
        "{err}"
    );

    std::fs::set_permissions(&token_path, std::fs::Permissions::from_mode(0o600)).unwrap();
    let d = start(dir.path(), &cfg, &[]);
    wait_until(|| get(&d.http, "/readyz").0 == 200, 20, "readyz");
    let mut conn = TcpStream::connect(&d.tcp).unwrap();
    writeln!(conn, "{{\"ts\":{},\"card\":\"c1\"}}", now_ms()).unwrap();
    writeln!(conn, "not json").unwrap();
    conn.flush().unwrap();
    wait_until(
        || {
            let (_, body) = get_bearer(&d.http, "/v1/ingest", token);
            serde_json::from_str::<serde_json::Value>(&body)
                .is_ok_and(|v| v["accepted"] == 1 && v["rejected"] == 1)
        },
        10,
        "counts on /v1/ingest with the token",
    );
    // Without the token (or with a wrong one) the operator endpoints answer 401.
    assert_eq!(get(&d.http, "/metrics").0, 401);
    assert_eq!(get(&d.http, "/v1/ingest").0, 401);
    assert_eq!(get_bearer(&d.http, "/metrics", "0123456789abcdef").0, 401);
    let (status, text) = get_bearer(&d.http, "/metrics", token);
    assert_eq!(status, 200);
    assert_eq!(
        metric(&text, "scrim_events_total{outcome=\"accepted\"}"),
        1.0
    );
    // Consumer endpoints stay open and carry no exact count.
    let (status, body) = get(&d.http, "/v1/budget");
    assert_eq!(status, 200);
    let b: serde_json::Value = serde_json::from_str(&body).unwrap();
    for name in ["accepted", "rejected", "late", "bounded"] {
        assert!(b.get(name).is_none(), "/v1/budget shows {name}: {body}");
    }
    assert_eq!(get(&d.http, "/v1/releases").0, 200);
}
