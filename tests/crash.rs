//! Crash safety of `scrim replay --state`: killing the real binary with SIGKILL at random
//! points and restarting it must end with exactly the releases of an uninterrupted run with
//! the same seed — identical records, no seq gap or duplicate, no epoch beyond the budget.

use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

fn scrim(dir: &Path, args: &[&str]) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_scrim"));
    c.args(args)
        .current_dir(dir)
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    c
}

/// A small deterministic PRNG for kill delays (xorshift64*; Vigna 2016).
struct Delays(u64);
impl Delays {
    fn next_ms(&mut self, lo: u64, hi: u64) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        lo + self.0.wrapping_mul(0x2545_f491_4f6c_dd1d) % (hi - lo)
    }
}

fn crash_and_compare(kills: usize) {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Input: the demo generator's feed (invented data), 2 days.
    let o = scrim(d, &["demo", "--seed", "3", "--days", "2", "--out", "demo"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let cfg = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/demo.toml");
    let cfg = cfg.to_str().unwrap();

    let started = std::time::Instant::now();
    let clean = scrim(
        d,
        &[
            "replay",
            "--config",
            cfg,
            "--seed",
            "9",
            "--state",
            "s1",
            "--out",
            "o1",
            "demo/feed.jsonl",
        ],
    )
    .output()
    .unwrap();
    assert!(
        clean.status.success(),
        "{}",
        String::from_utf8_lossy(&clean.stderr)
    );
    let expected = std::fs::read_to_string(d.join("o1/releases.jsonl")).unwrap();
    assert!(expected.lines().count() > 100);
    // Kill points spread over most of an uninterrupted run, however fast this build and
    // machine make it (a fixed range was all "after the end" once replay got faster).
    // Each run resumes where the last one was killed, so the runs get shorter, and the
    // machine's speed drifts (a clean run that took 7 s under load was followed by runs
    // that finished within 2 s): a run that ends before its kill halves the range.
    let clean_ms = started.elapsed().as_millis() as u64;
    let mut latest_kill_ms = (clean_ms * 4 / 5).max(3);

    let mut delays = Delays(0x5eed_1234_abcd_0001);
    let mut killed = 0;
    for _ in 0..kills {
        let mut child = scrim(
            d,
            &[
                "replay",
                "--config",
                cfg,
                "--seed",
                "9",
                "--state",
                "s2",
                "--out",
                "o2",
                "demo/feed.jsonl",
            ],
        )
        .spawn()
        .unwrap();
        std::thread::sleep(Duration::from_millis(delays.next_ms(1, latest_kill_ms)));
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap(); // SIGKILL
            killed += 1;
        } else {
            latest_kill_ms = (latest_kill_ms / 2).max(3);
        }
        let _ = child.wait();
    }
    let last = scrim(
        d,
        &[
            "replay",
            "--config",
            cfg,
            "--seed",
            "9",
            "--state",
            "s2",
            "--out",
            "o2",
            "demo/feed.jsonl",
        ],
    )
    .output()
    .unwrap();
    assert!(
        last.status.success(),
        "{}",
        String::from_utf8_lossy(&last.stderr)
    );
    let got = std::fs::read_to_string(d.join("o2/releases.jsonl")).unwrap();
    assert!(
        killed >= kills / 2,
        "only {killed} of {kills} runs were still running when killed"
    );
    if got != expected {
        let (g, e): (Vec<_>, Vec<_>) = (got.lines().collect(), expected.lines().collect());
        let first = g.iter().zip(&e).position(|(a, b)| a != b);
        let show = |v: &[&str]| first.and_then(|i| v.get(i)).map_or("", |l| l).to_string();
        panic!(
            "releases differ after {killed} kills: {} vs {} lines, first difference at line {first:?}:\n got {}\nwant {}",
            g.len(),
            e.len(),
            show(&g),
            show(&e)
        );
    }
    // Every epoch in the output was paid for: the demo's lifetime covers 4 epochs.
    let max_epoch = got
        .lines()
        .map(|l| {
            serde_json::from_str::<serde_json::Value>(l).unwrap()["epoch"]
                .as_u64()
                .unwrap()
        })
        .max()
        .unwrap();
    assert!(max_epoch < 4);
}

#[test]
fn sigkill_at_random_points_changes_nothing() {
    crash_and_compare(20);
}

/// The long version: `cargo test --release --test crash -- --ignored`.
#[test]
#[ignore]
fn sigkill_many_times() {
    crash_and_compare(200);
}
