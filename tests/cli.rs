//! Black-box tests of the real `scrim` binary in a temporary directory: exit codes of the
//! contract, the demo end to end, replay determinism, and release records against the
//! shipped JSON Schema (ops/release.schema.json).

use std::path::Path;
use std::process::{Command, Output};

fn scrim(args: &[&str], dir: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_scrim"))
        .args(args)
        .current_dir(dir)
        .env_remove("RUST_LOG")
        .output()
        .expect("the scrim binary runs")
}

fn read_records(path: &Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(path)
        .expect("releases.jsonl exists")
        .lines()
        .map(|l| serde_json::from_str(l).expect("every line is JSON"))
        .collect()
}

fn schema() -> serde_json::Value {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("ops/release.schema.json"),
    )
    .expect("ops/release.schema.json ships with the repository");
    serde_json::from_str(&text).expect("the schema is JSON")
}

const SMALL_CONFIG: &str = r#"
[input]
time_field = "ts"

[window]
length = "1h"
allowed_lateness = "0s"

[privacy]
rho_per_epoch = 0.5
delta = 1e-9
epoch_windows = 4

[[stats]]
name = "taps"
kind = "count"
"#;

fn small_feed(hours: i64) -> String {
    let t0 = 1_772_409_600_000i64;
    let mut s = String::new();
    for h in 0..hours {
        for i in 0..5 {
            s += &format!("{{\"ts\":{}}}\n", t0 + h * 3_600_000 + i * 1000);
        }
    }
    s
}

#[test]
fn demo_runs_end_to_end_and_its_records_match_the_schema() {
    let dir = tempfile::tempdir().unwrap();
    let out = scrim(
        &["demo", "--seed", "7", "--days", "2", "--out", "demo-out"],
        dir.path(),
    );
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "demo failed: {}\n{}",
        stdout,
        String::from_utf8_lossy(&out.stderr)
    );
    for needle in [
        "Released vs true",
        "rejected",
        "Budget",
        "releases.jsonl",
        "dropped by contribution bounds",
    ] {
        assert!(
            stdout.contains(needle),
            "summary lacks {needle:?}:\n{stdout}"
        );
    }
    let recs = read_records(&dir.path().join("demo-out/releases.jsonl"));
    assert!(recs.len() > 100, "only {} records", recs.len());
    let validator = jsonschema::validator_for(&schema()).expect("the schema compiles");
    for (i, r) in recs.iter().enumerate() {
        if let Err(e) = validator.validate(r) {
            panic!("record {i} violates the schema: {e}\n{r}");
        }
        assert_eq!(r["seeded"], true, "--seed must mark every record");
        assert_eq!(r["seq"], i as u64, "seq is dense and increasing");
    }
    for kind in ["count", "sum", "mean", "linear"] {
        assert!(recs.iter().any(|r| r["kind"] == kind), "no {kind} record");
    }
}

#[test]
fn replay_is_reproducible_with_a_seed_and_fresh_without() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("c.toml"), SMALL_CONFIG).unwrap();
    std::fs::write(dir.path().join("in.jsonl"), small_feed(3)).unwrap();
    let run = |out: &str, seed: Option<&str>| {
        let mut args = vec!["replay", "--config", "c.toml", "--out", out];
        if let Some(s) = seed {
            args.extend(["--seed", s]);
        }
        args.push("in.jsonl");
        let o = scrim(&args, dir.path());
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        std::fs::read_to_string(dir.path().join(out).join("releases.jsonl")).unwrap()
    };
    let a = run("a", Some("11"));
    let b = run("b", Some("11"));
    assert_eq!(a, b, "same seed, same releases");
    let c = run("c", None);
    let d = run("d", None);
    assert_ne!(c, d, "OS-seeded noise differs between runs");
    assert!(c.contains("\"seeded\":false"));
}

#[test]
fn bad_config_exits_2_and_names_the_key() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("c.toml"),
        SMALL_CONFIG.replace("rho_per_epoch = 0.5", "rho_per_epoch = -1"),
    )
    .unwrap();
    std::fs::write(dir.path().join("in.jsonl"), small_feed(1)).unwrap();
    let o = scrim(&["replay", "--config", "c.toml", "in.jsonl"], dir.path());
    assert_eq!(o.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("rho_per_epoch"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let o = scrim(&["plan", "--config", "missing.toml"], dir.path());
    assert_eq!(o.status.code(), Some(2));
    let o = scrim(&["replay", "--bogus"], dir.path());
    assert_eq!(o.status.code(), Some(2));
}

#[test]
fn replay_fails_closed_with_exit_3_when_the_lifetime_budget_runs_out() {
    // Unit level, lifetime covers exactly one epoch of 4 windows; the feed spans 6 windows.
    let cfg = SMALL_CONFIG
        .replace("[input]\ntime_field = \"ts\"", "[input]\ntime_field = \"ts\"\nunit_field = \"card\"")
        .replace(
            "epoch_windows = 4",
            "epoch_windows = 4\nlifetime_rho = 0.5\nmax_events_per_window = 1\nmax_windows_per_epoch = 4",
        );
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("c.toml"), cfg).unwrap();
    let feed = small_feed(6).replace("{\"ts\"", "{\"card\":\"c-1\",\"ts\"");
    std::fs::write(dir.path().join("in.jsonl"), feed).unwrap();
    let o = scrim(
        &[
            "replay", "--config", "c.toml", "--out", "o", "--seed", "1", "in.jsonl",
        ],
        dir.path(),
    );
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("lifetime"));
    let recs = read_records(&dir.path().join("o/releases.jsonl"));
    assert!(
        recs.iter().all(|r| r["epoch"] == 0),
        "nothing from the unpaid epoch is released"
    );
    assert_eq!(recs.iter().filter(|r| r["scope"] == "window").count(), 4);
}

#[test]
fn plan_prints_the_budget_and_json_parses() {
    let dir = tempfile::tempdir().unwrap();
    let demo_cfg = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/demo.toml");
    let o = scrim(
        &["plan", "--config", demo_cfg.to_str().unwrap()],
        dir.path(),
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("epsilon") && text.contains("taps_by_zone"),
        "{text}"
    );
    let o = scrim(
        &["plan", "--json", "--config", demo_cfg.to_str().unwrap()],
        dir.path(),
    );
    assert!(o.status.success());
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("plan --json is JSON");
    assert!(v["epsilon_per_epoch"].as_f64().unwrap() > 0.0);
    assert_eq!(v["fits"], true);
}

#[test]
fn replay_off_a_terminal_writes_only_logs_and_the_summary_to_stderr() {
    // The progress bar is drawn only when stderr is a terminal; here stderr is a pipe, so
    // every line must be a JSON log line (tracing's format off a terminal) or the summary,
    // and no carriage return or escape sequence may appear (what a bar would draw).
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("c.toml"), SMALL_CONFIG).unwrap();
    std::fs::write(dir.path().join("in.jsonl"), small_feed(3)).unwrap();
    for threads in ["1", "3"] {
        for input in ["in.jsonl", "-"] {
            let mut cmd = Command::new(env!("CARGO_BIN_EXE_scrim"));
            cmd.args([
                "replay",
                "--config",
                "c.toml",
                "--out",
                "o",
                "--threads",
                threads,
                input,
            ])
            .current_dir(dir.path())
            .env_remove("RUST_LOG");
            if input == "-" {
                cmd.stdin(std::fs::File::open(dir.path().join("in.jsonl")).unwrap());
            }
            let o = cmd.output().expect("the scrim binary runs");
            assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
            let err = String::from_utf8(o.stderr).expect("stderr is UTF-8");
            assert!(
                !err.contains('\r') && !err.contains('\u{1b}'),
                "control characters on stderr: {err:?}"
            );
            for line in err.lines() {
                assert!(
                    line.starts_with("scrim replay: ")
                        || serde_json::from_str::<serde_json::Value>(line).is_ok(),
                    "threads {threads}, input {input}: unexpected stderr line {line:?}"
                );
            }
            assert!(err.contains("scrim replay: 15 lines"), "{err}");
        }
    }
}
