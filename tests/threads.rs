//! `scrim replay --threads N` gives byte-identical releases for every N (issue 9): parsing
//! runs on several threads but the engine sees the verdicts in input order. Checked on a
//! dirty demo feed (bad lines, late lines, stuck validators) that spans many parse chunks,
//! with the demo configuration (all stat kinds, unit bounding on) and a fixed seed.

use std::io::Write;
use std::path::Path;
use std::process::Command;

use scrim::demo::{DemoFeed, FeedSpec};

/// Writes a feed of `days` days for `n_cards` cards; returns its line count.
fn write_feed(path: &Path, n_cards: u32, days: u32) -> u64 {
    let mut out = std::io::BufWriter::new(std::fs::File::create(path).expect("create feed"));
    let mut n_lines = 0;
    for line in DemoFeed::new(&FeedSpec {
        n_cards,
        days,
        ..FeedSpec::default()
    }) {
        out.write_all(&line)
            .and_then(|()| out.write_all(b"\n"))
            .expect("write feed");
        n_lines += 1;
    }
    out.flush().expect("flush feed");
    n_lines
}

/// Runs the real binary and returns (releases.jsonl bytes, stderr).
fn replay(dir: &Path, feed: &Path, threads: u32) -> (Vec<u8>, String) {
    let out = dir.join(format!("out-{threads}"));
    let config = dir.join("demo.toml");
    let run = Command::new(env!("CARGO_BIN_EXE_scrim"))
        .args(["replay", "--config"])
        .arg(&config)
        .arg("--out")
        .arg(&out)
        .args(["--seed", "1", "--threads", &threads.to_string()])
        .arg(feed)
        .env_remove("RUST_LOG")
        .output()
        .expect("the scrim binary runs");
    let stderr = String::from_utf8_lossy(&run.stderr).into_owned();
    assert!(
        run.status.success(),
        "replay --threads {threads} failed: {stderr}"
    );
    (
        std::fs::read(out.join("releases.jsonl")).expect("releases.jsonl"),
        stderr,
    )
}

#[test]
fn releases_do_not_depend_on_the_number_of_parse_threads() {
    let dir = tempfile::tempdir().expect("temp dir");
    std::fs::write(dir.path().join("demo.toml"), scrim::app::DEMO_CONFIG).expect("write config");
    let feed = dir.path().join("feed.jsonl");
    let n_lines = write_feed(&feed, 3_000, 3);
    // Many chunks, so chunks are parsed out of order by the two threads.
    let feed_bytes = std::fs::metadata(&feed).expect("feed").len();
    assert!(
        feed_bytes > 8 * scrim::runtime::parse_pool::CHUNK_BYTES as u64,
        "feed of {feed_bytes} bytes is too small to exercise chunking"
    );

    let (one, log_one) = replay(dir.path(), &feed, 1);
    assert!(log_one.contains(&format!("{n_lines} lines")), "{log_one}");
    assert!(log_one.contains("unit table:"), "{log_one}");
    let n_records = one.iter().filter(|b| **b == b'\n').count();
    assert!(n_records > 1000, "only {n_records} records");
    for threads in [2, 3] {
        let (many, log_many) = replay(dir.path(), &feed, threads);
        assert!(
            many == one,
            "releases differ between --threads 1 and --threads {threads}"
        );
        // The summary (line, accepted, rejected, late counts, unit table) is the same too,
        // apart from the output directory it names.
        assert_eq!(
            log_many.replace(&format!("out-{threads}"), "out-1"),
            log_one
        );
    }
}

#[test]
fn threads_flag_rejects_zero() {
    let run = Command::new(env!("CARGO_BIN_EXE_scrim"))
        .args(["replay", "--config", "x.toml", "--threads", "0", "-"])
        .output()
        .expect("the scrim binary runs");
    // clap usage errors exit with 2 (the contract's code for bad arguments).
    assert_eq!(run.status.code(), Some(2));
}
