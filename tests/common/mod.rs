//! Scaffolding shared by the black-box tests of `scrim run` (tests/daemon.rs, tests/load.rs,
//! tests/ops.rs):
//! starting the real binary on ports chosen at run time, plain HTTP/1.1 requests without a
//! client stack (crates.md), Prometheus text lookups and polling.
#![allow(dead_code)] // each test crate uses its own subset

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// A running `scrim run`, killed when dropped.
pub struct Daemon {
    pub child: Child,
    /// The HTTP address it printed.
    pub http: String,
    /// The address of TCP source 0 it printed (empty without a TCP source).
    pub tcp: String,
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Writes `cfg` to `dir/scrim.toml` and starts `scrim run` there with the extra environment
/// `env` (and no inherited `SCRIM_*` variables, which would configure the daemon). Reads the
/// HTTP address it prints on stderr, and the TCP source's when `cfg` declares one (`tcp` is
/// empty otherwise); panics with what the daemon printed if it exits or prints nothing
/// within 60 s.
pub fn start_run(dir: &Path, cfg: &str, env: &[(&str, &str)]) -> Daemon {
    std::fs::write(dir.join("scrim.toml"), cfg).expect("write config");
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_scrim"));
    for (k, _) in std::env::vars_os() {
        if k.to_string_lossy().starts_with("SCRIM_") {
            cmd.env_remove(k);
        }
    }
    cmd.args(["run", "--config", "scrim.toml"])
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    for (k, v) in env {
        cmd.env(k, v);
    }
    let mut child = cmd.spawn().expect("scrim runs");
    let stderr = child.stderr.take().expect("stderr piped");
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stderr).lines().map_while(Result::ok) {
            let _ = tx.send(line);
        }
    });
    let wants_tcp = cfg.contains("kind = \"tcp\"");
    let (mut http, mut tcp) = (None, None);
    let mut seen = Vec::new();
    let deadline = Instant::now() + Duration::from_secs(60);
    while (http.is_none() || (wants_tcp && tcp.is_none())) && Instant::now() < deadline {
        if let Ok(line) = rx.recv_timeout(Duration::from_millis(200)) {
            if let Some(a) = line.strip_prefix("scrim: http listening on ") {
                http = Some(a.trim().to_string());
            }
            if let Some(a) = line.strip_prefix("scrim: tcp source 0 listening on ") {
                tcp = Some(a.trim().to_string());
            }
            seen.push(line);
        }
        if let Ok(Some(status)) = child.try_wait() {
            panic!("scrim run exited with {status}:\n{}", seen.join("\n"));
        }
    }
    // Keep draining stderr so the daemon never blocks on a full pipe.
    std::thread::spawn(move || while rx.recv().is_ok() {});
    let http = http.unwrap_or_else(|| panic!("no http address printed:\n{}", seen.join("\n")));
    if wants_tcp && tcp.is_none() {
        panic!("no tcp address printed:\n{}", seen.join("\n"));
    }
    Daemon {
        child,
        http,
        tcp: tcp.unwrap_or_default(),
    }
}

/// A plain HTTP/1.1 GET with extra header lines `headers` (each ending in CRLF): (status,
/// body), chunked bodies decoded. A connection that fails gives status 0.
pub fn request(addr: &str, path: &str, headers: &str) -> (u16, String) {
    let Ok(mut s) = TcpStream::connect(addr) else {
        return (0, String::new());
    };
    s.set_read_timeout(Some(Duration::from_secs(10)))
        .expect("timeout");
    if write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\n{headers}Connection: close\r\n\r\n"
    )
    .is_err()
    {
        return (0, String::new());
    }
    let mut buf = Vec::new();
    let _ = s.read_to_end(&mut buf);
    let text = String::from_utf8_lossy(&buf).into_owned();
    let status = text
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = text
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default();
    let body = if text
        .to_ascii_lowercase()
        .contains("transfer-encoding: chunked")
    {
        dechunk(&body)
    } else {
        body
    };
    (status, body)
}

/// `request` without extra headers.
pub fn get(addr: &str, path: &str) -> (u16, String) {
    request(addr, path, "")
}

/// Decodes an HTTP/1.1 chunked body.
fn dechunk(body: &str) -> String {
    let mut out = String::new();
    let mut rest = body;
    while let Some((size, tail)) = rest.split_once("\r\n") {
        let n = usize::from_str_radix(size.trim(), 16).unwrap_or(0);
        if n == 0 || tail.len() < n {
            break;
        }
        out.push_str(&tail[..n]);
        rest = tail[n..].trim_start_matches("\r\n");
    }
    out
}

/// The value of the Prometheus sample `name` (with its labels) in `text`, NaN if absent.
pub fn metric(text: &str, name: &str) -> f64 {
    text.lines()
        .find(|l| l.starts_with(name) && l[name.len()..].starts_with(' '))
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|v| v.parse().ok())
        .unwrap_or(f64::NAN)
}

/// Wall-clock milliseconds since the Unix epoch (event times of live feeds).
pub fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// Polls `f` every 100 ms until it holds; panics after `secs` seconds naming `what`.
pub fn wait_until(mut f: impl FnMut() -> bool, secs: u64, what: &str) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while Instant::now() < deadline {
        if f() {
            return;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    panic!("timed out waiting for {what}");
}
