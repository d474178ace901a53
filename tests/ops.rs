//! Tests of the ops kit in `ops/`: the Prometheus rules (promtool), the metrics those rules
//! use against a live `scrim run`, the dashboard page in headless Chromium (against fixture
//! servers and against a live daemon fed the demo feed), the systemd unit and the runbook.
//!
//! External tools: `promtool` (Debian package `prometheus`), `chromium` and
//! `systemd-analyze` (package `systemd`). When one is not on PATH the test that needs it
//! prints `skipped: <tool> not installed` and passes, unless `SCRIMTEST_REQUIRE_TOOLS=1`,
//! which turns the skip into a failure (CI installs the tools and sets it). Variables that
//! start with `SCRIM_` are configuration overrides for the daemon, so every child process
//! started here gets an environment without them.
//!
//! The screenshot of the live dashboard is left at `target/dashboard.png` (next to the
//! `tmp` directory Cargo gives integration tests, so it follows `CARGO_TARGET_DIR`).

mod common;

use common::{Daemon, get, metric, now_ms, start_run, wait_until};
use std::collections::{BTreeMap, BTreeSet};
use std::io::{Read, Write};
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use serde_json::{Value, json};

const DASHBOARD: &str = include_str!("../ops/dashboard.html");
const ALERTS: &str = include_str!("../ops/alerts.yml");
const ALERT_TESTS: &str = include_str!("../ops/alerts.test.yml");
const RUNBOOK: &str = include_str!("../ops/RUNBOOK.md");
const UNIT: &str = include_str!("../ops/scrim.service");

/// The two-sided 95% normal quantile Φ⁻¹(0.975) the dashboard uses for its bands (any
/// normal table; statrs agrees to 1e-9, checked in `dashboard_band_quantile_matches_statrs`).
const Z95: f64 = 1.959963984540054;

// ---- tools and processes -------------------------------------------------------------------

/// Finds `name` on PATH. Missing: skip (None) or, under SCRIMTEST_REQUIRE_TOOLS=1, fail.
fn tool(name: &str) -> Option<PathBuf> {
    let found = std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|d| d.join(name))
            .find(|p| {
                use std::os::unix::fs::PermissionsExt;
                p.metadata()
                    .is_ok_and(|m| m.is_file() && m.permissions().mode() & 0o111 != 0)
            })
    });
    if found.is_none() {
        assert!(
            std::env::var("SCRIMTEST_REQUIRE_TOOLS").as_deref() != Ok("1"),
            "{name} not installed, and SCRIMTEST_REQUIRE_TOOLS=1 requires it (apt-get install chromium prometheus systemd)"
        );
        println!("skipped: {name} not installed");
    }
    found
}

/// A command whose environment has no `SCRIM_*` variables (they would configure the daemon).
fn command(program: impl AsRef<std::ffi::OsStr>) -> Command {
    let mut cmd = Command::new(program);
    for (k, _) in std::env::vars_os() {
        if k.to_string_lossy().starts_with("SCRIM_") {
            cmd.env_remove(k);
        }
    }
    cmd
}

/// Runs `cmd` to completion with `stdin` as input, killing it after `secs`.
fn run_with_timeout(mut cmd: Command, stdin: Option<&[u8]>, secs: u64) -> Output {
    cmd.stdin(if stdin.is_some() {
        Stdio::piped()
    } else {
        Stdio::null()
    })
    .stdout(Stdio::piped())
    .stderr(Stdio::piped());
    let mut child = cmd
        .spawn()
        .unwrap_or_else(|e| panic!("starting {cmd:?}: {e}"));
    if let Some(input) = stdin {
        let mut pipe = child.stdin.take().unwrap();
        let input = input.to_vec();
        std::thread::spawn(move || {
            let _ = pipe.write_all(&input);
        });
    }
    let drain = |r: Option<Box<dyn Read + Send>>| {
        std::thread::spawn(move || {
            let mut buf = Vec::new();
            if let Some(mut r) = r {
                let _ = r.read_to_end(&mut buf);
            }
            buf
        })
    };
    let out = drain(
        child
            .stdout
            .take()
            .map(|s| Box::new(s) as Box<dyn Read + Send>),
    );
    let err = drain(
        child
            .stderr
            .take()
            .map(|s| Box::new(s) as Box<dyn Read + Send>),
    );
    let deadline = Instant::now() + Duration::from_secs(secs);
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            panic!("{cmd:?} did not finish within {secs} s");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    Output {
        status,
        stdout: out.join().unwrap(),
        stderr: err.join().unwrap(),
    }
}

fn repo() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

fn start_daemon(dir: &Path, cfg: &str) -> Daemon {
    start_run(dir, cfg, &[])
}

fn get_json(addr: &str, path: &str) -> Value {
    let (status, body) = get(addr, path);
    assert_eq!(status, 200, "GET {path}: {body}");
    serde_json::from_str(&body).unwrap_or_else(|e| panic!("GET {path}: {e}: {body}"))
}

/// Every release, following the cursor of `/v1/releases` until an empty page.
fn all_releases(addr: &str) -> Vec<Value> {
    let mut out = Vec::new();
    let mut after: Option<u64> = None;
    loop {
        let q = after.map_or(String::new(), |a| format!("after={a}&"));
        let page = get_json(addr, &format!("/v1/releases?{q}limit=5000"));
        let recs = page["releases"].as_array().cloned().unwrap_or_default();
        if recs.is_empty() {
            return out;
        }
        after = page["next_after"].as_u64();
        out.extend(recs);
    }
}

/// Runs headless Chromium with the flags the ops task fixes, plus `extra`; returns the DOM.
fn chromium_dom(chromium: &Path, url: &str, extra: &[String]) -> String {
    let profile = tempfile::tempdir().unwrap();
    let mut cmd = command(chromium);
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
    ])
    .arg(format!("--user-data-dir={}", profile.path().display()))
    .arg("--virtual-time-budget=15000")
    .args(extra)
    .arg("--dump-dom")
    .arg(url);
    let out = run_with_timeout(cmd, None, 180);
    let dom = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success() && dom.contains("</html>"),
        "chromium failed ({}):\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    dom
}

// ---- a small reader for the serialised DOM -------------------------------------------------

/// One start tag of the dumped DOM: name, attributes, byte range of the tag itself.
#[derive(Debug, Clone)]
struct Tag {
    name: String,
    attrs: BTreeMap<String, String>,
    start: usize,
    end: usize,
}

impl Tag {
    fn attr(&self, k: &str) -> Option<&str> {
        self.attrs.get(k).map(String::as_str)
    }
    fn has_class(&self, c: &str) -> bool {
        self.attr("class")
            .is_some_and(|v| v.split_whitespace().any(|x| x == c))
    }
}

fn unescape(s: &str) -> String {
    s.replace("&quot;", "\"")
        .replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&#39;", "'")
        .replace("&amp;", "&")
}

/// Start tags in document order. Chromium serialises attributes as `name="value"` with
/// `&quot;`/`&amp;` escapes; script and style bodies are skipped (they may contain `<`).
fn tags(html: &str) -> Vec<Tag> {
    let b = html.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while let Some(off) = html[i..].find('<') {
        let start = i + off;
        let mut j = start + 1;
        if j >= b.len() || !b[j].is_ascii_alphabetic() {
            i = start + 1;
            continue;
        }
        while j < b.len() && (b[j].is_ascii_alphanumeric() || b[j] == b'-') {
            j += 1;
        }
        let name = html[start + 1..j].to_ascii_lowercase();
        let mut attrs = BTreeMap::new();
        loop {
            while j < b.len() && b[j].is_ascii_whitespace() {
                j += 1;
            }
            if j >= b.len() || b[j] == b'>' || b[j] == b'/' {
                break;
            }
            let k0 = j;
            while j < b.len() && !b[j].is_ascii_whitespace() && b[j] != b'=' && b[j] != b'>' {
                j += 1;
            }
            let key = html[k0..j].to_string();
            let mut val = String::new();
            if j < b.len() && b[j] == b'=' {
                j += 1;
                if j < b.len() && b[j] == b'"' {
                    let close = html[j + 1..].find('"').map_or(b.len(), |c| j + 1 + c);
                    val = unescape(&html[j + 1..close]);
                    j = close + 1;
                } else {
                    let v0 = j;
                    while j < b.len() && !b[j].is_ascii_whitespace() && b[j] != b'>' {
                        j += 1;
                    }
                    val = unescape(&html[v0..j]);
                }
            }
            attrs.insert(key, val);
        }
        let end = html[j..].find('>').map_or(b.len(), |c| j + c + 1);
        i = end;
        if name == "script" || name == "style" {
            i = html[end..]
                .find(&format!("</{name}"))
                .map_or(b.len(), |c| end + c);
        }
        out.push(Tag {
            name,
            attrs,
            start,
            end,
        });
    }
    out
}

/// The text right after a tag up to the next tag (a leaf element's own text), unescaped.
fn text_after(html: &str, t: &Tag) -> String {
    let rest = &html[t.end..];
    unescape(&rest[..rest.find('<').unwrap_or(rest.len())])
}

fn by_id<'a>(all: &'a [Tag], id: &str) -> &'a Tag {
    all.iter()
        .find(|t| t.attr("id") == Some(id))
        .unwrap_or_else(|| panic!("no #{id} in the DOM"))
}

/// Tags inside a `<section>` (the series panels hold no nested sections).
fn inside_section<'a>(html: &str, all: &'a [Tag], section: &Tag) -> Vec<&'a Tag> {
    let close = html[section.end..]
        .find("</section>")
        .map_or(html.len(), |c| section.end + c);
    all.iter()
        .filter(|t| t.start > section.start && t.start < close)
        .collect()
}

fn panels(all: &[Tag]) -> BTreeMap<String, &Tag> {
    all.iter()
        .filter(|t| t.name == "section" && t.has_class("series-panel"))
        .map(|t| (t.attr("data-stat").unwrap_or_default().to_string(), t))
        .collect()
}

// ---- alert rules: text-level checks that need no tool --------------------------------------

/// `(name, block text)` for every `- alert:` entry.
fn alert_blocks(yaml: &str) -> Vec<(String, String)> {
    let mut out: Vec<(String, String)> = Vec::new();
    for line in yaml.lines() {
        let t = line.trim_start();
        if let Some(name) = t.strip_prefix("- alert:") {
            out.push((name.trim().to_string(), String::new()));
        } else if t.starts_with("- record:") || t.starts_with("- name:") {
            out.push((String::new(), String::new()));
        } else if let Some((_, block)) = out.last_mut() {
            block.push_str(line);
            block.push('\n');
        }
    }
    out.into_iter().filter(|(n, _)| !n.is_empty()).collect()
}

/// GitHub's heading anchor: lower case, punctuation dropped, spaces to hyphens.
fn anchor(heading: &str) -> String {
    heading
        .trim()
        .to_lowercase()
        .chars()
        .filter(|c| c.is_alphanumeric() || *c == ' ' || *c == '-' || *c == '_')
        .map(|c| if c == ' ' { '-' } else { c })
        .collect()
}

fn runbook_anchors() -> BTreeSet<String> {
    RUNBOOK
        .lines()
        .filter_map(|l| l.strip_prefix("## ").or_else(|| l.strip_prefix("# ")))
        .map(anchor)
        .collect()
}

/// Against the ops task's list of alerts and Prometheus' alerting-rule fields: every alert
/// exists, has `for`, a severity, summary, description and a `runbook_url` whose anchor is a
/// heading of RUNBOOK.md (GitHub's anchor rule); the runbook's own links resolve.
#[test]
fn every_required_alert_is_defined_documented_and_linked_to_its_runbook_section() {
    // The alert set the ops task asks for, plus ScrimDown (without it, every other alert goes
    // quiet exactly when the daemon is down).
    let expected: BTreeSet<&str> = [
        "ScrimDown",
        "ScrimBudgetLow",
        "ScrimBudgetCritical",
        "ScrimBudgetExhausted",
        "ScrimEpochRolloverUnfunded",
        "ScrimNoRecentRelease",
        "ScrimRejectionSpike",
        "ScrimWatermarkStuck",
    ]
    .into_iter()
    .collect();
    let blocks = alert_blocks(ALERTS);
    let names: BTreeSet<&str> = blocks.iter().map(|(n, _)| n.as_str()).collect();
    assert_eq!(names, expected);
    let anchors = runbook_anchors();
    for (name, block) in &blocks {
        for key in [
            "expr:",
            "for:",
            "severity:",
            "summary:",
            "description:",
            "runbook_url:",
        ] {
            assert!(block.contains(key), "{name} lacks {key}");
        }
        let severity = block
            .lines()
            .find_map(|l| l.trim().strip_prefix("severity:"))
            .unwrap()
            .trim();
        assert!(
            ["warning", "critical"].contains(&severity),
            "{name}: severity {severity}"
        );
        let url = format!("runbook_url: \"ops/RUNBOOK.md#{}\"", name.to_lowercase());
        assert!(block.contains(&url), "{name} must link {url}");
        assert!(
            anchors.contains(&name.to_lowercase()),
            "RUNBOOK.md has no section '## {name}'"
        );
    }
    // The runbook's own links point at sections that exist.
    for part in RUNBOOK.split("](#").skip(1) {
        let target = &part[..part.find(')').unwrap()];
        assert!(
            anchors.contains(target),
            "RUNBOOK.md links #{target}, which is no heading"
        );
    }
    // What never to do is spelled out.
    for must in [
        "state directory",
        "lifetime_rho",
        "replay old data",
        "--insecure-seed",
        "journalctl",
        "/v1/budget",
        "/metrics",
    ] {
        assert!(RUNBOOK.contains(must), "RUNBOOK.md should mention {must}");
    }
}

/// Coverage of ops/alerts.test.yml: each alert appears once with expected alerts (fires)
/// and once with `exp_alerts: []` (must not fire), as the ops task requires.
#[test]
fn every_alert_has_a_firing_and_a_quiet_unit_test() {
    let mut firing = BTreeSet::new();
    let mut quiet = BTreeSet::new();
    let lines: Vec<&str> = ALERT_TESTS.lines().collect();
    for (i, l) in lines.iter().enumerate() {
        let Some(name) = l.trim().strip_prefix("alertname:") else {
            continue;
        };
        let next = lines[i + 1..]
            .iter()
            .map(|l| l.trim())
            .find(|l| !l.is_empty() && !l.starts_with('#'))
            .unwrap();
        match next {
            "exp_alerts: []" => quiet.insert(name.trim().to_string()),
            "exp_alerts:" => firing.insert(name.trim().to_string()),
            other => panic!("unexpected line after alertname {name}: {other}"),
        };
    }
    for (name, _) in alert_blocks(ALERTS) {
        assert!(
            firing.contains(&name),
            "{name} has no firing test in ops/alerts.test.yml"
        );
        assert!(
            quiet.contains(&name),
            "{name} has no not-firing test in ops/alerts.test.yml"
        );
    }
}

/// promtool (Prometheus' own checker) accepts the rules and passes their unit tests.
#[test]
fn alert_rules_pass_promtool_check_and_unit_tests() {
    let Some(promtool) = tool("promtool") else {
        return;
    };
    for args in [
        ["check", "rules", "ops/alerts.yml"],
        ["test", "rules", "ops/alerts.test.yml"],
    ] {
        let mut cmd = command(&promtool);
        cmd.args(args).current_dir(repo());
        let out = run_with_timeout(cmd, None, 120);
        assert!(
            out.status.success(),
            "promtool {}:\n{}{}",
            args.join(" "),
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

/// The PromQL of every `expr:` in a rules file (single-line or `|` block).
fn rule_exprs(yaml: &str) -> Vec<String> {
    let lines: Vec<&str> = yaml.lines().collect();
    let mut out = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let Some(rest) = l.trim_start().strip_prefix("expr:") else {
            continue;
        };
        let rest = rest.trim();
        if rest.starts_with('|') || rest.starts_with('>') {
            let indent = l.len() - l.trim_start().len();
            let body: Vec<&str> = lines[i + 1..]
                .iter()
                .take_while(|b| b.trim().is_empty() || b.len() - b.trim_start().len() > indent)
                .copied()
                .collect();
            out.push(body.join("\n"));
        } else {
            out.push(rest.trim_matches(|c| c == '"' || c == '\'').to_string());
        }
    }
    out
}

/// Metric names an expression reads: identifiers that are not functions, keywords, label
/// names (in `{...}` or after by/on/without/ignoring/group_*) or durations.
fn expr_metric_names(expr: &str) -> BTreeSet<String> {
    const KEYWORDS: [&str; 5] = ["and", "or", "unless", "bool", "offset"];
    // Aggregation operators may put `by (...)` between their name and their parentheses.
    const AGGREGATORS: [&str; 12] = [
        "sum",
        "min",
        "max",
        "avg",
        "count",
        "stddev",
        "stdvar",
        "topk",
        "bottomk",
        "quantile",
        "count_values",
        "group",
    ];
    const GROUPING: [&str; 6] = [
        "by",
        "on",
        "without",
        "ignoring",
        "group_left",
        "group_right",
    ];
    // Drop string literals, label matchers and range selectors first.
    let mut cleaned = String::new();
    let mut depth: Option<char> = None;
    for c in expr.chars() {
        match (depth, c) {
            (None, '"') => depth = Some('"'),
            (Some('"'), '"') => depth = None,
            (None, '{') => depth = Some('}'),
            (None, '[') => depth = Some(']'),
            (Some(close), c) if c == close => depth = None,
            (None, c) => cleaned.push(c),
            _ => {}
        }
        if depth.is_some() && cleaned.ends_with(|x: char| x.is_alphanumeric() || x == '_') {
            cleaned.push(' ');
        }
    }
    let chars: Vec<char> = cleaned.chars().collect();
    let mut names = BTreeSet::new();
    let mut i = 0;
    let mut skip_group = false;
    while i < chars.len() {
        let c = chars[i];
        if c.is_ascii_digit() {
            // A number (1e-3, 0.25) or a duration: skip the whole token.
            while i < chars.len() && (chars[i].is_ascii_alphanumeric() || chars[i] == '.') {
                i += 1;
            }
            continue;
        }
        if c.is_ascii_alphabetic() || c == '_' || c == ':' {
            let s = i;
            while i < chars.len()
                && (chars[i].is_ascii_alphanumeric() || chars[i] == '_' || chars[i] == ':')
            {
                i += 1;
            }
            let word: String = chars[s..i].iter().collect();
            let next = chars[i..].iter().find(|c| !c.is_whitespace()).copied();
            if GROUPING.contains(&word.as_str()) {
                skip_group = true;
            } else if !(KEYWORDS.contains(&word.as_str())
                || AGGREGATORS.contains(&word.as_str())
                || next == Some('('))
            {
                names.insert(word);
            }
            continue;
        }
        if c == '(' && skip_group {
            // by (job, instance): label names, not metrics.
            while i < chars.len() && chars[i] != ')' {
                i += 1;
            }
            skip_group = false;
        }
        i += 1;
    }
    names
}

/// The helper that lists metric names in PromQL, on an expression with every construct the
/// rules use (aggregation with `by`, `on`, label matchers, ranges, numbers, recorded names).
#[test]
fn the_metric_name_extractor_reads_promql() {
    // Checked by hand against the PromQL grammar (prometheus.io/docs/prometheus/latest/querying).
    let got = expr_metric_names(
        "sum by (job, instance) (rate(a_total{outcome=\"rejected\"}[15m])) / on (job) b_seconds > 1e-3 and c unless d:rec == 1",
    );
    let want: BTreeSet<String> = ["a_total", "b_seconds", "c", "d:rec"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    assert_eq!(got, want);
}

fn feed_config(dir: &Path, body: &str) -> String {
    format!(
        "{body}\n[[sources]]\nkind = \"file\"\npath = \"{feed}\"\n\n[http]\nlisten = \"127.0.0.1:0\"\n\n[output]\ndir = \"{out}\"\n\n[state]\ndir = \"{state}\"\n",
        feed = dir.join("feed.jsonl").display(),
        out = dir.join("out").display(),
        state = dir.join("state").display()
    )
}

/// Against a running `scrim run`: every metric the rules read is in its `/metrics`, and
/// `promtool check metrics` (the exposition-format and naming lint) accepts the page.
#[test]
fn live_metrics_pass_promtool_and_hold_every_metric_the_alerts_use() {
    let dir = tempfile::tempdir().unwrap();
    // Unit level, so the budget gauges are finite and the bounding counters are exercised.
    let body = r#"
[input]
time_field = "ts"
unit_field = "card"

[window]
length = "1h"
allowed_lateness = "5m"
idle_close = "2m"

[privacy]
rho_per_epoch = 0.5
lifetime_rho = 4.0
delta = 1e-9
epoch_windows = 24
max_events_per_window = 3
max_windows_per_epoch = 24

[[stats]]
name = "taps"
kind = "count"
group_by = ["zone"]
[stats.keys]
zone = ["harbour", "uplands"]
"#;
    let t = now_ms();
    let mut feed = String::new();
    for i in 0..40 {
        let zone = if i % 3 == 0 { "uplands" } else { "harbour" };
        feed.push_str(&format!(
            "{{\"ts\":{},\"card\":\"c-{}\",\"zone\":\"{zone}\"}}\n",
            t - 3_600_000 + i * 1000,
            i % 7
        ));
    }
    feed.push_str("not json\n{\"ts\":1,\"card\":\"c-1\",\"zone\":\"atlantis\"}\n");
    std::fs::write(dir.path().join("feed.jsonl"), &feed).unwrap();
    let d = start_daemon(dir.path(), &feed_config(dir.path(), body));
    let total = |m: &str| {
        ["accepted", "rejected", "late"]
            .iter()
            .map(|o| metric(m, &format!("scrim_events_total{{outcome=\"{o}\"}}")))
            .sum::<f64>()
    };
    wait_until(
        || total(&get(&d.http, "/metrics").1) == 42.0,
        60,
        "all 42 lines counted",
    );
    let (status, text) = get(&d.http, "/metrics");
    assert_eq!(status, 200);

    // Every metric the rules read is exported (names from `# TYPE` lines). Recording rules
    // (`a:b:c`) must be defined in the same file; `up` is made by Prometheus per target.
    let exported: BTreeSet<&str> = text
        .lines()
        .filter_map(|l| l.strip_prefix("# TYPE "))
        .filter_map(|l| l.split_whitespace().next())
        .collect();
    let recorded: BTreeSet<String> = ALERTS
        .lines()
        .filter_map(|l| l.trim().strip_prefix("- record:"))
        .map(|r| r.trim().to_string())
        .collect();
    let mut used = BTreeSet::new();
    for e in rule_exprs(ALERTS) {
        used.extend(expr_metric_names(&e));
    }
    // Guard against a parser that finds nothing: these are certainly used.
    for sure in [
        "scrim_budget_remaining_rho",
        "scrim_events_total",
        "scrim_last_release_timestamp_seconds",
    ] {
        assert!(used.contains(sure), "extractor missed {sure}: {used:?}");
    }
    for name in &used {
        if name.contains(':') {
            assert!(
                recorded.contains(name),
                "{name} is used but no recording rule defines it"
            );
        } else if name != "up" {
            assert!(
                exported.contains(name.as_str()),
                "ops/alerts.yml reads {name}, which /metrics does not export:\n{text}"
            );
        }
    }

    // promtool's own lint of the exposition format and naming conventions.
    let Some(promtool) = tool("promtool") else {
        return;
    };
    let mut cmd = command(&promtool);
    cmd.args(["check", "metrics"]);
    let out = run_with_timeout(cmd, Some(text.as_bytes()), 60);
    assert!(
        out.status.success(),
        "promtool check metrics:\n{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

// ---- systemd unit ----------------------------------------------------------------------

/// Against the ops task's directive list, then systemd itself: `systemd-analyze verify`
/// parses the unit without unknown keys, and `systemd-analyze security` rates its sandbox.
#[test]
fn systemd_unit_has_the_required_hardening_and_verifies() {
    let directives: BTreeMap<&str, Vec<&str>> = UNIT
        .lines()
        .map(str::trim)
        .filter(|l| !l.starts_with('#') && l.contains('='))
        .filter_map(|l| l.split_once('='))
        .fold(BTreeMap::new(), |mut m, (k, v)| {
            m.entry(k.trim()).or_default().push(v.trim());
            m
        });
    let one = |k: &str| -> &str {
        let v = directives
            .get(k)
            .unwrap_or_else(|| panic!("scrim.service lacks {k}="));
        v.last().unwrap()
    };
    // What the ops task asks for.
    assert_eq!(one("User"), "scrim");
    assert_eq!(one("DynamicUser"), "no");
    assert_eq!(
        one("ExecStart"),
        "/usr/local/bin/scrim run --config /etc/scrim/scrim.toml"
    );
    assert_eq!(one("StateDirectory"), "scrim");
    assert_eq!(one("StateDirectoryMode"), "0700");
    assert_eq!(one("ProtectSystem"), "strict");
    assert_eq!(one("ProtectHome"), "yes");
    assert_eq!(one("PrivateTmp"), "yes");
    assert_eq!(one("NoNewPrivileges"), "yes");
    assert_eq!(one("PrivateDevices"), "yes");
    assert_eq!(one("RestrictAddressFamilies"), "AF_INET AF_INET6 AF_UNIX");
    assert_eq!(one("CapabilityBoundingSet"), "");
    assert_eq!(one("SystemCallFilter"), "@system-service");
    assert_eq!(one("KillSignal"), "SIGTERM");
    assert!(one("TimeoutStopSec").parse::<u32>().is_ok_and(|s| s >= 10));
    assert_eq!(one("Restart"), "on-failure");
    assert_eq!(one("UMask"), "0077");
    // Exit 2 (bad config / mismatched state) and 3 (over budget) are refusals, not crashes.
    assert_eq!(one("RestartPreventExitStatus"), "2 3");
    // No SCRIM_ variable in the unit's environment: they are config overrides.
    assert!(
        directives
            .get("Environment")
            .into_iter()
            .flatten()
            .all(|e| !e.contains("SCRIM_"))
    );

    let Some(analyze) = tool("systemd-analyze") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    // verify checks that ExecStart is executable: point it at the binary this build made.
    let unit = UNIT.replace("/usr/local/bin/scrim", env!("CARGO_BIN_EXE_scrim"));
    let path = dir.path().join("scrim.service");
    std::fs::write(&path, unit).unwrap();
    let mut cmd = command(&analyze);
    cmd.arg("verify").arg(&path);
    let out = run_with_timeout(cmd, None, 60);
    let msgs = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        out.status.success() && !msgs.contains("Unknown key"),
        "systemd-analyze verify:\n{msgs}"
    );
    // systemd's own exposure rating of the sandbox ("OK" or better on its scale).
    let mut cmd = command(&analyze);
    cmd.args(["security", "--offline=yes", "--no-pager"])
        .arg(&path);
    let out = run_with_timeout(cmd, None, 60);
    let text = String::from_utf8_lossy(&out.stdout);
    let rating = text
        .lines()
        .find_map(|l| l.split_once("Overall exposure level for scrim.service:"))
        .map(|(_, r)| r.trim().to_string())
        .unwrap_or_else(|| {
            panic!(
                "no overall exposure in:\n{text}{}",
                String::from_utf8_lossy(&out.stderr)
            )
        });
    let mut parts = rating.split_whitespace();
    let score: f64 = parts.next().unwrap().parse().unwrap();
    let word = parts.next().unwrap_or_default();
    assert!(
        matches!(word, "OK" | "SAFE") && score < 3.0,
        "exposure {rating}"
    );
}

// ---- dashboard: fixtures -----------------------------------------------------------------

/// The page's band multiplier is Φ⁻¹(0.975), checked against statrs' normal quantile.
#[test]
fn dashboard_band_quantile_matches_statrs() {
    use statrs::distribution::{ContinuousCDF, Normal};
    let n = Normal::new(0.0, 1.0).unwrap();
    assert!((n.inverse_cdf(0.975) - Z95).abs() < 1e-9);
    let in_page = format!("const Z95 = {Z95};");
    assert!(
        DASHBOARD.contains(&in_page),
        "the page must use Z95 = {Z95}"
    );
}

/// The page loads nothing from outside (no CDN, fonts or remote scripts) and builds its DOM
/// without innerHTML, so release fields can never inject markup.
#[test]
fn dashboard_is_self_contained() {
    // No CDN, no remote fonts or scripts: the only URL is the SVG namespace.
    for (i, _) in DASHBOARD.match_indices("://") {
        let before = &DASHBOARD[i.saturating_sub(5)..i];
        let after = &DASHBOARD[i..(i + 40).min(DASHBOARD.len())];
        assert!(
            after.starts_with("://www.w3.org/2000/svg") && before.ends_with("http"),
            "external reference near {before}{after}"
        );
    }
    for banned in ["<script src", "<link", "@import", "innerHTML"] {
        assert!(!DASHBOARD.contains(banned), "dashboard contains {banned}");
    }
    assert!(
        DASHBOARD.contains("connect-src 'self'"),
        "the CSP keeps fetches on the serving origin"
    );
}

/// One fixture API: what `/v1/budget` and `/v1/ingest` return (`None`: 401, a daemon with an
/// operator token) and the records behind `/v1/releases`.
struct Scenario {
    budget: Value,
    ingest: Option<Value>,
    releases: Vec<Value>,
}

/// Serves `/<name>/` (the page), `/<name>/v1/budget` and `/<name>/v1/releases` for every
/// scenario, pages capped at `page_cap` records, and logs every request target.
fn serve_fixtures(
    scenarios: BTreeMap<&'static str, Scenario>,
    page_cap: usize,
) -> (String, Arc<Mutex<Vec<String>>>) {
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = listener.local_addr().unwrap().to_string();
    let log = Arc::new(Mutex::new(Vec::new()));
    let scenarios = Arc::new(scenarios);
    let log2 = log.clone();
    std::thread::spawn(move || {
        for conn in listener.incoming() {
            let Ok(mut conn) = conn else { continue };
            let (scenarios, log) = (scenarios.clone(), log2.clone());
            std::thread::spawn(move || {
                let mut head = Vec::new();
                let mut byte = [0u8; 1];
                while !head.ends_with(b"\r\n\r\n") {
                    match conn.read(&mut byte) {
                        Ok(1) => head.push(byte[0]),
                        _ => return,
                    }
                }
                let head = String::from_utf8_lossy(&head).into_owned();
                let target = head.split_whitespace().nth(1).unwrap_or("/").to_string();
                log.lock().unwrap().push(target.clone());
                let (path, query) = target.split_once('?').unwrap_or((&target, ""));
                let param = |k: &str| {
                    query
                        .split('&')
                        .find_map(|kv| kv.strip_prefix(&format!("{k}=")))
                        .map(str::to_string)
                };
                let mut parts = path.trim_start_matches('/').splitn(2, '/');
                let name = parts.next().unwrap_or_default();
                let rest = parts.next().unwrap_or_default();
                let (status, ctype, body) = match (scenarios.get(name), rest) {
                    (Some(_), "") => (200, "text/html; charset=utf-8", DASHBOARD.to_string()),
                    (Some(s), "v1/budget") => (200, "application/json", s.budget.to_string()),
                    (Some(s), "v1/ingest") => match &s.ingest {
                        Some(v) => (200, "application/json", v.to_string()),
                        None => (401, "text/plain", "operator token required".to_string()),
                    },
                    (Some(s), "v1/releases") => {
                        let after: Option<u64> = param("after").and_then(|a| a.parse().ok());
                        let limit: usize = param("limit")
                            .and_then(|a| a.parse().ok())
                            .unwrap_or(500)
                            .min(page_cap);
                        let page: Vec<&Value> = s
                            .releases
                            .iter()
                            .filter(|r| after.is_none_or(|a| r["seq"].as_u64().unwrap() > a))
                            .take(limit)
                            .collect();
                        let next = page.last().map(|r| r["seq"].as_u64().unwrap()).or(after);
                        (
                            200,
                            "application/json",
                            json!({ "releases": page, "next_after": next }).to_string(),
                        )
                    }
                    _ => (404, "text/plain", "not found".to_string()),
                };
                let _ = write!(
                    conn,
                    "HTTP/1.1 {status} X\r\nContent-Type: {ctype}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
                    body.len()
                );
            });
        }
    });
    (addr, log)
}

const HOUR_MS: i64 = 3_600_000;

fn iso(ms: i64) -> String {
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(ms) * 1_000_000).unwrap();
    t.format(&time::format_description::well_known::Rfc3339)
        .unwrap()
}

/// Two days of hourly records for four statistics (the Quillhaven demo's shapes): a count
/// by zone (window and epoch_to_date scopes), a mean with undefined windows, a linear model
/// (plus an invented `boardings` feature) with one window without a fit, and one seeded
/// record when `seeded_leaf` is set.
fn fixture_releases(seeded_leaf: Option<i64>) -> Vec<Value> {
    let t0 = 1_772_409_600_000; // 2026-03-02T00:00:00Z
    let guarantee = json!({"unit": "card", "level": "unit", "rho": 0.5, "lifetime_rho": 4.0,
                           "epsilon": 3.2, "delta": 1e-9, "mechanism": "tree"});
    let mut out = Vec::new();
    let mut push = |mut r: Value| {
        r["seq"] = json!(out.len());
        r["guarantee"] = guarantee.clone();
        out.push(r);
    };
    for h in 0..48i64 {
        let (start, end) = (iso(t0 + h * HOUR_MS), iso(t0 + (h + 1) * HOUR_MS));
        for zone in ["harbour", "uplands"] {
            let bump = if zone == "uplands" { 10.0 } else { 0.0 };
            let value = if h == 47 && zone == "harbour" {
                131.2
            } else {
                100.0 + 50.0 * (h as f64 / 4.0).sin() + bump
            };
            push(
                json!({"stat": "taps_by_zone", "kind": "count", "scope": "window", "group": {"zone": zone},
                        "window_start": start, "window_end": end, "value": value, "std_error": 5.9,
                        "epoch": 0, "leaf": h, "seeded": seeded_leaf == Some(h)}),
            );
            push(
                json!({"stat": "taps_by_zone", "kind": "count", "scope": "epoch_to_date", "group": {"zone": zone},
                        "window_start": iso(t0), "window_end": end, "value": 100.0 * (h + 1) as f64,
                        "std_error": 5.9 * ((h + 2) as f64).log2(), "epoch": 0, "leaf": h, "seeded": false}),
            );
        }
        let undefined = [10, 11, 30].contains(&h);
        push(
            json!({"stat": "trip_minutes_mean", "kind": "mean", "scope": "window", "group": {},
                    "window_start": start, "window_end": end,
                    "value": if undefined { Value::Null } else { json!(14.0 + (h as f64 / 5.0).cos()) },
                    // Window 40 had few rows: a band 50 times the usual width.
                    "std_error": if undefined { Value::Null } else if h == 40 { json!(40.0) } else { json!(0.8) },
                    "note": if undefined { "noisy count below 1: the mean is undefined for this scope" } else { "std_error by the delta method (first order)" },
                    "epoch": 0, "leaf": h, "seeded": false}),
        );
        let no_fit = h == 20;
        push(
            json!({"stat": "trip_model", "kind": "linear", "scope": "window", "group": {},
                    "window_start": start, "window_end": end,
                    "value": if no_fit { Value::Null } else { json!({"intercept": 4.0 + 0.1 * (h as f64).sin(), "boardings": 0.7, "transfers": 3.1, "trip_km": 2.6 + 0.05 * (h as f64).cos()}) },
                    "std_error": if no_fit { Value::Null } else { json!({"intercept": 0.4, "boardings": 0.2, "transfers": 0.3, "trip_km": 0.05}) },
                    "epoch": 0, "leaf": h, "seeded": false}),
        );
    }
    out
}

fn fixture_stats() -> Value {
    json!([
        {"name": "taps_by_zone", "kind": "count", "rho_per_epoch": 0.2, "spent_rho": 0.4},
        {"name": "fare_revenue", "kind": "sum", "rho_per_epoch": 0.1, "spent_rho": 0.2},
        {"name": "trip_minutes_mean", "kind": "mean", "rho_per_epoch": 0.1, "spent_rho": 0.2},
        {"name": "trip_model", "kind": "linear", "rho_per_epoch": 0.1, "spent_rho": 0.2}
    ])
}

fn fixture_scenarios() -> BTreeMap<&'static str, Scenario> {
    let unit = json!({"level": "unit", "unit": "card", "rho_per_epoch": 0.5, "epsilon_per_epoch": 3.2,
        "delta": 1e-9, "lifetime_rho": 4.0, "lifetime_spent_rho": 1.0, "lifetime_remaining_rho": 3.0,
        "epochs_charged": 2, "epochs_allowed": 8, "epoch": 1, "epoch_windows": 720,
        "epoch_windows_closed": 100, "exhausted": null, "stats": fixture_stats()});
    let mut exhausted = unit.clone();
    for (k, v) in [
        ("lifetime_spent_rho", json!(4.0)),
        ("lifetime_remaining_rho", json!(0.0)),
        ("epochs_charged", json!(8)),
        ("epoch", json!(8)),
        ("epoch_windows_closed", json!(0)),
        (
            "exhausted",
            json!(
                "lifetime budget exhausted: epoch 8 needs rho 0.5 but only 0 of privacy.lifetime_rho = 4 remains"
            ),
        ),
    ] {
        exhausted[k] = v;
    }
    let event = json!({"level": "event", "unit": null, "rho_per_epoch": 0.5, "epsilon_per_epoch": 3.2,
        "delta": 1e-9, "lifetime_rho": null, "lifetime_spent_rho": 0.5, "lifetime_remaining_rho": null,
        "epochs_charged": 1, "epochs_allowed": null, "epoch": 0, "epoch_windows": 720,
        "epoch_windows_closed": 0, "exhausted": null, "stats": fixture_stats()});
    // Unit level, no event yet: nothing charged, the first epoch not started.
    let mut fresh = unit.clone();
    for (k, v) in [
        ("lifetime_spent_rho", json!(0.0)),
        ("lifetime_remaining_rho", json!(4.0)),
        ("epochs_charged", json!(0)),
        ("epoch", Value::Null),
        ("epoch_windows_closed", json!(0)),
    ] {
        fresh[k] = v;
    }
    BTreeMap::from([
        (
            "unit",
            Scenario {
                budget: unit,
                ingest: Some(
                    json!({"accepted": 12345, "rejected": 67, "late": 8, "bounded": 90,
                    "rejected_by_reason": {"invalid_json": 67}}),
                ),
                releases: fixture_releases(Some(3)),
            },
        ),
        (
            "fresh",
            Scenario {
                budget: fresh,
                ingest: Some(
                    json!({"accepted": 0, "rejected": 0, "late": 0, "bounded": 0,
                    "rejected_by_reason": {}}),
                ),
                releases: Vec::new(),
            },
        ),
        (
            "exhausted",
            Scenario {
                budget: exhausted,
                // A daemon with an operator token: /v1/ingest answers 401.
                ingest: None,
                releases: fixture_releases(None)[..40].to_vec(),
            },
        ),
        (
            "event",
            Scenario {
                budget: event,
                ingest: Some(
                    json!({"accepted": 0, "rejected": 0, "late": 0, "bounded": 0,
                    "rejected_by_reason": {}}),
                ),
                releases: Vec::new(),
            },
        ),
    ])
}

/// Number of `M` (move-to) commands in an SVG path: its sub-paths.
fn subpaths(d: &str) -> usize {
    d.matches('M').count()
}

fn assert_healthy_page(html: &str, all: &[Tag]) {
    let body = all.iter().find(|t| t.name == "body").unwrap();
    assert_eq!(
        body.attr("data-loaded"),
        Some("1"),
        "the first render did not complete"
    );
    assert!(
        by_id(all, "banner-error").attrs.contains_key("hidden"),
        "error banner shown"
    );
    let errors = by_id(all, "js-errors");
    assert!(
        text_after(html, errors).trim().is_empty(),
        "script errors: {}",
        text_after(html, errors)
    );
}

/// The page in headless Chromium against a fixture API with known answers: the cursor
/// protocol of contract.md, the gauge geometry, the budget projection (engine charging rule),
/// counts, the seeded banner, one panel per statistic, bands of ±1.96·std_error, gaps for
/// undefined values, linear coefficients, clipped outlier bands and the grid layout.
#[test]
fn dashboard_renders_the_unit_level_fixture_with_paging_bands_gaps_and_budget() {
    let Some(chromium) = tool("chromium") else {
        return;
    };
    let scenarios = fixture_scenarios();
    let n_records = scenarios["unit"].releases.len();
    let releases = scenarios["unit"].releases.clone();
    // A page cap far below the page's own limit forces the cursor through many pages.
    let page_cap = 37;
    let (addr, log) = serve_fixtures(scenarios, page_cap);
    let t_before = now_ms();
    // 1400 px wide: the series grid has two columns (cards at least 560 px wide).
    let html = chromium_dom(
        &chromium,
        &format!("http://{addr}/unit/"),
        &["--window-size=1400,1000".to_string()],
    );
    let t_after = now_ms();
    let all = tags(&html);
    assert_healthy_page(&html, &all);
    let body = all.iter().find(|t| t.name == "body").unwrap();
    assert_eq!(
        body.attr("data-records"),
        Some(n_records.to_string().as_str())
    );

    // Cursor: first page without `after`, then after = last seq of the previous page, until
    // a page is empty; later polls resume from the same cursor (contract.md, HTTP).
    let afters: Vec<Option<u64>> = log
        .lock()
        .unwrap()
        .iter()
        .filter(|t| t.starts_with("/unit/v1/releases"))
        .map(|t| {
            t.split(['?', '&'])
                .find_map(|kv| kv.strip_prefix("after="))
                .map(|a| a.parse().unwrap())
        })
        .collect();
    let n_pages = n_records.div_ceil(page_cap);
    let mut want: Vec<Option<u64>> = vec![None];
    want.extend((1..=n_pages).map(|p| Some(((p * page_cap).min(n_records) - 1) as u64)));
    assert!(
        afters.len() > want.len(),
        "no poll after the first pull: {afters:?}"
    );
    assert_eq!(afters[..want.len()], want[..], "cursor sequence");
    assert!(
        afters[want.len()..]
            .iter()
            .all(|a| *a == Some(n_records as u64 - 1)),
        "{afters:?}"
    );

    // Budget gauge: 1.0 of 4.0 spent. The arc ends at angle π(1 − 1/4) on a radius-90 circle
    // centred at (110, 110): (110 + 90 cos 135°, 110 − 90 sin 135°) = (46.36, 46.36).
    let gauge = by_id(&all, "budget-gauge");
    assert_eq!(gauge.attr("data-level"), Some("unit"));
    assert_eq!(gauge.attr("data-fraction"), Some("0.25"));
    assert_eq!(gauge.attr("data-state"), Some("ok"));
    let arc = all.iter().find(|t| t.has_class("gauge-value")).unwrap();
    assert_eq!(arc.attr("d"), Some("M 20 110 A 90 90 0 0 1 46.36 46.36"));
    let progress = by_id(&all, "epoch-progress");
    assert_eq!(
        (progress.attr("data-closed"), progress.attr("data-total")),
        (Some("100"), Some("720"))
    );
    assert_eq!(text_after(&html, by_id(&all, "epochs")), "2 of 8");

    // Projection: an epoch is charged when its first window closes (src/engine/core.rs,
    // close_next), so with 100 windows of epoch 1 closed, epochs 0 and 1 are paid for, epoch 1
    // covers 720 − 100 more windows and the 8 − 2 uncharged epochs 720 each: 4940 windows of
    // one hour. The page evaluates Date.now() between t_before and t_after plus at most the
    // 15 s of virtual time Chromium may add.
    let eta = by_id(&all, "exhaustion-eta");
    assert_eq!(eta.attr("data-remaining-windows"), Some("4940"));
    assert_eq!(eta.attr("data-window-ms"), Some("3600000"));
    let at: i64 = eta.attr("data-eta-ms").unwrap().parse().unwrap();
    let ahead = 4940 * HOUR_MS;
    assert!(
        at >= t_before + ahead - 1000 && at <= t_after + ahead + 16_000,
        "eta {at} vs [{t_before}, {t_after}] + {ahead}"
    );

    for (name, n) in [
        ("accepted", "12345"),
        ("rejected", "67"),
        ("late", "8"),
        ("bounded", "90"),
    ] {
        let tile = all
            .iter()
            .find(|t| t.attr("data-count") == Some(name))
            .unwrap();
        assert_eq!(tile.attr("data-value"), Some(n), "{name}");
    }
    assert!(
        !by_id(&all, "banner-seeded").attrs.contains_key("hidden"),
        "a seeded record must raise the banner"
    );
    assert!(by_id(&all, "banner-exhausted").attrs.contains_key("hidden"));

    // One panel per statistic, in the budget's order, including one without releases yet.
    let p = panels(&all);
    assert_eq!(
        p.keys().map(String::as_str).collect::<Vec<_>>(),
        [
            "fare_revenue",
            "taps_by_zone",
            "trip_minutes_mean",
            "trip_model"
        ]
    );
    assert_eq!(p["fare_revenue"].attr("data-points"), Some("0"));

    // Count: default group (first in code-point order) and scope "window", 48 points, one
    // unbroken line, a band covering value ± 1.96·se everywhere, latest shown with its band.
    let inner = inside_section(&html, &all, p["taps_by_zone"]);
    assert_eq!(p["taps_by_zone"].attr("data-points"), Some("48"));
    let line = inner
        .iter()
        .find(|t| t.name == "path" && t.has_class("line"))
        .unwrap();
    assert_eq!(subpaths(line.attr("d").unwrap()), 1);
    assert_eq!(line.attr("data-runs"), Some("1"));
    let band = inner
        .iter()
        .find(|t| t.name == "path" && t.has_class("band"))
        .unwrap();
    assert!(band.attr("d").unwrap().ends_with('Z') && subpaths(band.attr("d").unwrap()) == 1);
    let svg = inner
        .iter()
        .find(|t| t.name == "svg" && t.has_class("chart-svg"))
        .unwrap();
    let (y_min, y_max): (f64, f64) = (
        svg.attr("data-y-min").unwrap().parse().unwrap(),
        svg.attr("data-y-max").unwrap().parse().unwrap(),
    );
    for r in releases.iter().filter(|r| {
        r["stat"] == "taps_by_zone" && r["scope"] == "window" && r["group"]["zone"] == "harbour"
    }) {
        let (v, se) = (
            r["value"].as_f64().unwrap(),
            r["std_error"].as_f64().unwrap(),
        );
        assert!(
            y_min <= v - Z95 * se && v + Z95 * se <= y_max,
            "band {v}±{} outside [{y_min}, {y_max}]",
            Z95 * se
        );
    }
    let latest = inner.iter().find(|t| t.has_class("latest")).unwrap();
    // 1.959964 × 5.9 = 11.5638, shown to 3 significant digits.
    assert_eq!(
        text_after(&html, latest),
        "latest (2026-03-04 00:00): 131.2 ± 11.6 (95%)"
    );
    let options: Vec<String> = inner
        .iter()
        .filter(|t| t.name == "option")
        .map(|t| text_after(&html, t))
        .collect();
    assert_eq!(
        options,
        [
            "zone = harbour",
            "zone = uplands",
            "each window",
            "epoch to date"
        ]
    );

    // Mean: undefined windows 10–11 and 30 leave gaps: three runs in the line and the band.
    let inner = inside_section(&html, &all, p["trip_minutes_mean"]);
    let line = inner
        .iter()
        .find(|t| t.name == "path" && t.has_class("line"))
        .unwrap();
    assert_eq!(line.attr("data-runs"), Some("3"));
    assert_eq!(subpaths(line.attr("d").unwrap()), 3);
    let band = inner
        .iter()
        .find(|t| t.name == "path" && t.has_class("band"))
        .unwrap();
    assert_eq!(subpaths(band.attr("d").unwrap()), 3);
    // Window 40's band (±1.96·40 = ±78) is 50 times the median band (±1.96·0.8). The y range
    // must hold every value and every band cut at BAND_CAP = 4 median bands (the page's rule),
    // so that one band is clipped at the plot edge instead of stretching the range.
    let svg = inner
        .iter()
        .find(|t| t.name == "svg" && t.has_class("chart-svg"))
        .unwrap();
    assert_eq!(svg.attr("data-bands-clipped"), Some("1"));
    let (y_min, y_max): (f64, f64) = (
        svg.attr("data-y-min").unwrap().parse().unwrap(),
        svg.attr("data-y-max").unwrap().parse().unwrap(),
    );
    let points: Vec<(f64, f64)> = releases
        .iter()
        .filter(|r| r["stat"] == "trip_minutes_mean" && r["value"].is_number())
        .map(|r| {
            (
                r["value"].as_f64().unwrap(),
                Z95 * r["std_error"].as_f64().unwrap(),
            )
        })
        .collect();
    let mut halves: Vec<f64> = points.iter().map(|p| p.1).collect();
    halves.sort_by(f64::total_cmp);
    let cap = 4.0 * halves[halves.len() / 2];
    let lo = points
        .iter()
        .map(|(v, h)| v - h.min(cap))
        .fold(f64::INFINITY, f64::min);
    let hi = points
        .iter()
        .map(|(v, h)| v + h.min(cap))
        .fold(f64::NEG_INFINITY, f64::max);
    assert!(
        y_min <= lo && hi <= y_max,
        "[{y_min}, {y_max}] must hold [{lo}, {hi}]"
    );
    assert!(
        y_max - y_min < 40.0,
        "one wide band stretched the range to [{y_min}, {y_max}]"
    );
    assert!(
        band.attr("clip-path")
            .is_some_and(|c| c.starts_with("url(#plot-clip-"))
    );

    // Every chart is drawn for the laid-out grid: the count chart (first panel drawn) is as
    // wide as the mean chart in the other column, and both fit in half the window.
    let chart_width = |stat: &str| -> f64 {
        let inner = inside_section(&html, &all, p[stat]);
        let svg = inner
            .iter()
            .find(|t| t.name == "svg" && t.has_class("chart-svg"))
            .unwrap();
        svg.attr("width").unwrap().parse().unwrap()
    };
    assert_eq!(
        chart_width("taps_by_zone"),
        chart_width("trip_minutes_mean")
    );
    assert!(
        chart_width("taps_by_zone") < 700.0,
        "{}",
        chart_width("taps_by_zone")
    );

    // Linear: one chart per coefficient, intercept first (JSON objects arrive with sorted
    // keys, so "boardings" comes before it on the wire), each broken at the window without a fit.
    let inner = inside_section(&html, &all, p["trip_model"]);
    let coefs: Vec<&str> = inner
        .iter()
        .filter(|t| t.name == "figure")
        .filter_map(|t| t.attr("data-coef"))
        .collect();
    assert_eq!(coefs, ["intercept", "boardings", "transfers", "trip_km"]);
    let lines: Vec<&&Tag> = inner
        .iter()
        .filter(|t| t.name == "path" && t.has_class("line"))
        .collect();
    assert_eq!(lines.len(), 4);
    assert!(lines.iter().all(|l| l.attr("data-runs") == Some("2")));
}

/// The budget states the page must tell apart: exhausted (red banner with the reason),
/// event level (no lifetime cap) and a stream that has not started (nothing charged yet).
#[test]
fn dashboard_shows_exhaustion_event_level_and_fresh_budgets() {
    let Some(chromium) = tool("chromium") else {
        return;
    };
    let (addr, _) = serve_fixtures(fixture_scenarios(), 500);
    // Three page loads at once: Chromium's start-up, not the page, is the slow part.
    let [exhausted, event, fresh] = std::thread::scope(|s| {
        ["exhausted", "event", "fresh"]
            .map(|name| {
                let (chromium, addr) = (&chromium, &addr);
                s.spawn(move || chromium_dom(chromium, &format!("http://{addr}/{name}/"), &[]))
            })
            .map(|h| h.join().unwrap())
    });

    let html = exhausted;
    let all = tags(&html);
    assert_healthy_page(&html, &all);
    let banner = by_id(&all, "banner-exhausted");
    assert!(
        !banner.attrs.contains_key("hidden"),
        "exhausted budget must show the red banner"
    );
    let banner_text = &html[banner.end..banner.end + html[banner.end..].find("</div>").unwrap()];
    assert!(
        banner_text.contains("epoch 8 needs rho 0.5"),
        "banner shows the reason: {banner_text}"
    );
    assert!(
        by_id(&all, "banner-seeded").attrs.contains_key("hidden"),
        "no seeded record here"
    );
    let gauge = by_id(&all, "budget-gauge");
    assert_eq!(
        (gauge.attr("data-state"), gauge.attr("data-fraction")),
        (Some("exhausted"), Some("1"))
    );
    let eta = by_id(&all, "exhaustion-eta");
    assert_eq!(text_after(&html, eta), "exhausted");
    // Epoch 8 has no window closed, so it is not charged: 8 of 8 charged leaves 0 windows
    // (counting its 720 windows as covered would be the off-by-one-epoch mistake).
    assert_eq!(eta.attr("data-remaining-windows"), Some("0"));
    // This fixture's /v1/ingest answers 401 (operator token): the exact counts stay hidden
    // and the rest of the page works.
    assert_eq!(
        by_id(&all, "counts").attr("data-access"),
        Some("token-required")
    );
    assert!(
        all.iter()
            .filter(|t| t.attr("data-count").is_some())
            .all(|t| t.attr("data-value").is_none()),
        "no count is shown without the token"
    );

    let html = event;
    let all = tags(&html);
    assert_healthy_page(&html, &all);
    let body = all.iter().find(|t| t.name == "body").unwrap();
    assert_eq!(body.attr("data-records"), Some("0"));
    let gauge = by_id(&all, "budget-gauge");
    assert_eq!(
        (gauge.attr("data-level"), gauge.attr("data-state")),
        (Some("event"), Some("uncapped"))
    );
    let texts: Vec<String> = all
        .iter()
        .filter(|t| t.name == "text")
        .map(|t| text_after(&html, t))
        .collect();
    assert!(
        texts.iter().any(|t| t == "event level: no lifetime cap"),
        "{texts:?}"
    );
    let eta = by_id(&all, "exhaustion-eta");
    assert_eq!(text_after(&html, eta), "never (no lifetime cap)");
    assert_eq!(eta.attr("data-remaining-windows"), Some(""));
    assert_eq!(
        text_after(&html, by_id(&all, "epochs")),
        "1 (no lifetime cap)"
    );
    for t in ["banner-seeded", "banner-exhausted"] {
        assert!(by_id(&all, t).attrs.contains_key("hidden"), "{t} shown");
    }
    // Panels exist for every statistic before any release, and say so.
    let p = panels(&all);
    assert_eq!(p.len(), 4);
    assert!(p.values().all(|t| t.attr("data-points") == Some("0")));

    // Before the first event no epoch is charged: all 8 allowed epochs of 720 windows are
    // ahead (8 × 720 = 5760), and no date can be given without a release's window length.
    let html = fresh;
    let all = tags(&html);
    assert_healthy_page(&html, &all);
    let eta = by_id(&all, "exhaustion-eta");
    assert_eq!(eta.attr("data-remaining-windows"), Some("5760"));
    assert_eq!(eta.attr("data-eta-ms"), Some(""));
    assert_eq!(
        text_after(&html, eta),
        "5,760 windows (date after the first release)"
    );
    assert_eq!(
        text_after(&html, by_id(&all, "epoch-label")),
        "no epoch started yet (720 windows per epoch)"
    );
    assert_eq!(by_id(&all, "budget-gauge").attr("data-fraction"), Some("0"));
}

// ---- dashboard: the live daemon on the demo feed -------------------------------------------

/// A released value that can be plotted: a finite number, or an object (linear) with one.
fn defined(v: &Value) -> bool {
    match v {
        Value::Number(n) => n.as_f64().is_some_and(f64::is_finite),
        Value::Object(m) => m.values().any(defined),
        _ => false,
    }
}

/// The records of the series the dashboard shows first for `stat`: the group whose label
/// ("k = v" pairs by key, or "all (ungrouped)") is first in code-point order, scope
/// "window" (every statistic releases it).
fn default_series<'a>(releases: &'a [Value], stat: &str) -> Vec<&'a Value> {
    let label = |g: &Value| -> String {
        let m = g.as_object().cloned().unwrap_or_default();
        if m.is_empty() {
            return "all (ungrouped)".to_string();
        }
        let mut keys: Vec<&String> = m.keys().collect();
        keys.sort();
        keys.iter()
            .map(|k| format!("{k} = {}", m[*k].as_str().unwrap_or_default()))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let recs: Vec<&Value> = releases.iter().filter(|r| r["stat"] == stat).collect();
    let Some(first) = recs.iter().map(|r| label(&r["group"])).min() else {
        return Vec::new();
    };
    recs.into_iter()
        .filter(|r| label(&r["group"]) == first && r["scope"] == "window")
        .collect()
}

/// config/demo.toml without the sections `run` takes from the deployment (sources, http,
/// output, state), which the caller supplies.
fn demo_stats_and_privacy() -> String {
    let demo = std::fs::read_to_string(repo().join("config/demo.toml")).expect("config/demo.toml");
    let mut keep = true;
    let mut out = String::new();
    for line in demo.lines() {
        let t = line.trim();
        if t.starts_with('[') {
            let name = t.trim_matches(|c| c == '[' || c == ']').trim();
            let top = name.split('.').next().unwrap_or_default();
            keep = !["sources", "http", "output", "state"].contains(&top);
        }
        if keep {
            out.push_str(line);
            out.push('\n');
        }
    }
    out
}

/// End to end: `scrim demo --seed 1 --days 2` makes the feed, `scrim run` reads it from a
/// file source, and the page in Chromium shows what the daemon's own API reports (records,
/// counts, budget level, seeded flag, a line per statistic). Leaves target/dashboard.png.
#[test]
fn dashboard_renders_a_live_daemon_fed_the_demo_feed() {
    let Some(chromium) = tool("chromium") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let demo_out = dir.path().join("demo");
    let mut cmd = command(env!("CARGO_BIN_EXE_scrim"));
    cmd.args(["demo", "--seed", "1", "--days", "2", "--out"])
        .arg(&demo_out);
    let out = run_with_timeout(cmd, None, 300);
    assert!(
        out.status.success(),
        "scrim demo: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let feed = demo_out.join("feed.jsonl");
    assert!(
        feed.metadata().is_ok_and(|m| m.len() > 0),
        "demo left no feed"
    );
    std::fs::copy(&feed, dir.path().join("feed.jsonl")).unwrap();

    let d = start_daemon(
        dir.path(),
        &feed_config(dir.path(), &demo_stats_and_privacy()),
    );
    // Wait until the feed is consumed and the windows it closes are published: the record
    // count and the input counters stop moving.
    let mut last = (usize::MAX, String::new());
    let mut stable = 0;
    wait_until(
        || {
            let n = all_releases(&d.http).len();
            let b = get_json(&d.http, "/v1/ingest");
            let counts = format!("{} {} {}", b["accepted"], b["rejected"], b["late"]);
            stable = if n > 0 && (n, counts.clone()) == last {
                stable + 1
            } else {
                0
            };
            last = (n, counts);
            stable >= 5
        },
        300,
        "releases from the demo feed",
    );
    let releases = all_releases(&d.http);
    let budget = get_json(&d.http, "/v1/budget");
    let ingest = get_json(&d.http, "/v1/ingest");
    // The consumer endpoint carries no exact count (they are operator data).
    for name in ["accepted", "rejected", "late", "bounded"] {
        assert!(budget.get(name).is_none(), "/v1/budget leaks {name}");
    }

    let shot = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .parent()
        .unwrap()
        .join("dashboard.png");
    let _ = std::fs::remove_file(&shot);
    let html = chromium_dom(
        &chromium,
        &format!("http://{}/", d.http),
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1400,1000".to_string(),
        ],
    );
    // The page saw the daemon at some moment between the snapshots taken before and after.
    let releases_after = all_releases(&d.http).len();
    let ingest_after = get_json(&d.http, "/v1/ingest");
    let all = tags(&html);
    assert_healthy_page(&html, &all);
    let body = all.iter().find(|t| t.name == "body").unwrap();
    let n_shown: usize = body.attr("data-records").unwrap().parse().unwrap();
    assert!(
        (releases.len()..=releases_after).contains(&n_shown),
        "{n_shown} records shown, {} .. {releases_after} published",
        releases.len()
    );
    let gauge = by_id(&all, "budget-gauge");
    assert_eq!(gauge.attr("data-level"), budget["level"].as_str());
    for name in ["accepted", "rejected", "late", "bounded"] {
        let tile = all
            .iter()
            .find(|t| t.attr("data-count") == Some(name))
            .unwrap();
        let shown: u64 = tile.attr("data-value").unwrap().parse().unwrap();
        let (lo, hi) = (
            ingest[name].as_u64().unwrap(),
            ingest_after[name].as_u64().unwrap(),
        );
        assert!(
            (lo..=hi).contains(&shown),
            "{name}: {shown} not in {lo}..={hi}"
        );
    }
    let seeded = releases.iter().any(|r| r["seeded"] == true);
    assert_eq!(
        !by_id(&all, "banner-seeded").attrs.contains_key("hidden"),
        seeded
    );

    let p = panels(&all);
    let stats: Vec<&str> = budget["stats"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["name"].as_str().unwrap())
        .collect();
    assert!(!stats.is_empty());
    assert_eq!(p.len(), stats.len(), "one panel per statistic");
    // The page draws a line exactly when its default selection (first group in code-point
    // order, scope "window") holds a defined value.
    for stat in &stats {
        let panel = p
            .get(*stat)
            .unwrap_or_else(|| panic!("no panel for {stat}"));
        let inner = inside_section(&html, &all, panel);
        let drawn = inner
            .iter()
            .filter(|t| t.name == "path" && t.has_class("line"))
            .any(|t| t.attr("d").is_some_and(|d| d.starts_with('M')));
        let expected = default_series(&releases, stat)
            .iter()
            .any(|r| defined(&r["value"]));
        assert_eq!(
            drawn, expected,
            "{stat}: line drawn = {drawn}, default series has values = {expected}"
        );
    }
    // Two days of the demo feed give every statistic plottable values in its default series;
    // when one has none the pipeline, not the page, is at fault: say so with the records' notes.
    for stat in &stats {
        let recs = default_series(&releases, stat);
        let notes: BTreeSet<&str> = recs
            .iter()
            .filter_map(|r| r["note"].as_str())
            .take(3)
            .collect();
        assert!(
            recs.iter().any(|r| defined(&r["value"])),
            "{stat}: none of the {} records of its default series has a value (a pipeline problem); notes: {notes:?}",
            recs.len()
        );
    }

    let png =
        std::fs::read(&shot).unwrap_or_else(|e| panic!("no screenshot at {}: {e}", shot.display()));
    assert!(
        png.starts_with(b"\x89PNG\r\n\x1a\n") && png.len() > 10_000,
        "screenshot is not a rendered PNG"
    );
    println!("dashboard screenshot: {}", shot.display());
}
