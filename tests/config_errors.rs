//! Integration tests of the configuration loader's public API.
//!
//! The reference for every check is the outside contract, contract.md ("Config": key names,
//! required keys, defaults, "every error names the key and says what would be valid") and the
//! rules listed in the config task brief that implements it. Each rule has a case that breaks
//! it in an otherwise valid file and asserts both the error variant and that the message names
//! the key path; boundary values on the valid side are checked to load, so a rule that is too
//! strict fails as well as one that is too loose.

use std::collections::HashMap;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use scrim::config::{
    Config, ConfigError, DurationMs, FitConfig, GroupField, Mechanism, SourceConfig, StatKind,
    UnitBounds,
};

/// A valid unit-level configuration with one stat of every kind. Every line that the cases
/// below edit occurs exactly once (checked by [`edit`]).
/// stats[0] = taps_by_zone (count), [1] = fare_revenue (sum), [2] = mean_trip (mean),
/// [3] = trip_model (linear).
const BASE: &str = r#"
[input]
time_field = "ts"
unit_field = "card"

[window]
length = "1h"

[privacy]
rho_per_epoch = 0.5
lifetime_rho = 4.0
delta = 1e-9
epoch_windows = 168
max_events_per_window = 4
max_windows_per_epoch = 48

[[stats]]
name = "taps_by_zone"
kind = "count"
group_by = ["zone"]
trailing = [24]
[stats.keys]
zone = ["harbour", "old-town", "uplands"]

[[stats]]
name = "fare_revenue"
kind = "sum"
field = "fare_cents"
range = [0, 900]

[[stats]]
name = "mean_trip"
kind = "mean"
field = "trip_minutes"
range = [0, 120]

[[stats]]
name = "trip_model"
kind = "linear"
target = "trip_minutes"
features = ["trip_km", "transfers"]
feature_norm_bound = 40.0
target_bound = 180.0
"#;

/// The unit-level lines of [`BASE`]; removing them gives an event-level configuration.
const UNIT_LINES: [(&str, &str); 4] = [
    ("unit_field = \"card\"\n", ""),
    ("lifetime_rho = 4.0\n", ""),
    ("max_events_per_window = 4\n", ""),
    ("max_windows_per_epoch = 48\n", ""),
];

/// Applies text replacements to [`BASE`]; each `from` must occur exactly once, so a case can
/// never silently test the unedited file.
fn edit(edits: &[(&str, &str)]) -> String {
    let mut text = BASE.to_string();
    for (from, to) in edits {
        assert_eq!(
            text.matches(from).count(),
            1,
            "edit target {from:?} must occur exactly once"
        );
        text = text.replacen(from, to, 1);
    }
    text
}

/// Adds `line` right after the `name = "<stat>"` line of that stat.
fn add_to_stat(stat: &str, line: &str) -> (String, String) {
    let name_line = format!("name = \"{stat}\"");
    (name_line.clone(), format!("{name_line}\n{line}"))
}

fn load(text: &str) -> Result<Config, ConfigError> {
    Config::from_toml_str(text)
}

/// Asserts that `text` is refused, that the message names `key` in backticks, and that the
/// variant is the expected one. Returns the message for further checks.
fn refused(text: &str, key: &str, variant: fn(&ConfigError) -> bool) -> String {
    let err = match load(text) {
        Ok(_) => panic!("expected an error naming `{key}`, but the config loaded:\n{text}"),
        Err(err) => err,
    };
    let message = err.to_string();
    assert!(
        message.contains(&format!("`{key}`")),
        "message should name `{key}`: {message}"
    );
    assert!(variant(&err), "unexpected variant for `{key}`: {err:?}");
    message
}

fn refused_edit(edits: &[(&str, &str)], key: &str, variant: fn(&ConfigError) -> bool) -> String {
    refused(&edit(edits), key, variant)
}

fn is_invalid(e: &ConfigError) -> bool {
    matches!(e, ConfigError::Invalid { .. })
}
fn is_missing(e: &ConfigError) -> bool {
    matches!(e, ConfigError::Missing { .. })
}
fn is_not_allowed(e: &ConfigError) -> bool {
    matches!(e, ConfigError::NotAllowed { .. })
}
fn is_unknown(e: &ConfigError) -> bool {
    matches!(e, ConfigError::UnknownKey { .. })
}
fn is_wrong_type(e: &ConfigError) -> bool {
    matches!(e, ConfigError::WrongType { .. })
}

fn loads(edits: &[(&str, &str)]) -> Config {
    let text = edit(edits);
    load(&text).unwrap_or_else(|e| panic!("should load: {e}\n{text}"))
}

fn manifest_path(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(rel)
}

fn env_of(pairs: &[(&str, &str)]) -> HashMap<String, String> {
    pairs
        .iter()
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect()
}

// ---- the base file, defaults ---------------------------------------------------------------

#[test]
fn base_loads_with_contract_defaults() {
    // Defaults from contract.md and the config brief: max_line_bytes 65536, lateness 5m,
    // idle_close 2m, mechanism tree, weight 1.0, trailing [], group_by [], intercept true,
    // fit ridge with lambda 0, http 127.0.0.1:9650, output "out", state "state" every 1m.
    let c = load(BASE).unwrap();
    assert_eq!(c.input.time_field, "ts");
    assert_eq!(c.input.unit_field.as_deref(), Some("card"));
    assert_eq!(c.input.max_line_bytes, 65_536);
    assert_eq!(c.window.length, DurationMs(3_600_000));
    assert_eq!(c.window.allowed_lateness, DurationMs(300_000));
    assert_eq!(c.window.idle_close, DurationMs(120_000));
    assert_eq!(c.privacy.mechanism, Mechanism::Tree);
    assert_eq!(
        c.privacy.unit_bounds,
        Some(UnitBounds {
            lifetime_rho: 4.0,
            max_events_per_window: 4,
            max_windows_per_epoch: 48
        })
    );
    assert_eq!(c.stats.len(), 4);
    assert_eq!(c.stats[0].weight, 1.0);
    assert_eq!(c.stats[0].trailing, vec![24]);
    assert_eq!(
        c.stats[0].group_by,
        vec![GroupField {
            field: "zone".into(),
            keys: vec!["harbour".into(), "old-town".into(), "uplands".into()]
        }]
    );
    assert!(c.stats[1].group_by.is_empty());
    assert!(c.stats[1].trailing.is_empty());
    assert_eq!(
        c.stats[1].kind,
        StatKind::Sum {
            field: "fare_cents".into(),
            range: (0.0, 900.0)
        }
    );
    assert_eq!(
        c.stats[2].kind,
        StatKind::Mean {
            field: "trip_minutes".into(),
            range: (0.0, 120.0)
        }
    );
    let StatKind::Linear(lin) = &c.stats[3].kind else {
        panic!("stats[3] should be linear")
    };
    assert!(lin.intercept);
    assert_eq!(lin.fit, FitConfig::Ridge { lambda: 0.0 });
    assert_eq!(
        lin.features,
        vec!["trip_km".to_string(), "transfers".to_string()]
    );
    assert!(c.sources.is_empty());
    assert_eq!(
        c.http.listen,
        "127.0.0.1:9650".parse::<SocketAddr>().unwrap()
    );
    assert_eq!(c.output.dir, PathBuf::from("out"));
    assert_eq!(c.state.dir, PathBuf::from("state"));
    assert_eq!(c.state.checkpoint_interval, DurationMs(60_000));
}

#[test]
fn event_level_config_loads_without_unit_bounds() {
    // contract.md: "omit [unit_field] for event-level privacy".
    let c = loads(&UNIT_LINES);
    assert_eq!(c.input.unit_field, None);
    assert_eq!(c.privacy.unit_bounds, None);
}

#[test]
fn demo_config_loads_and_matches_the_scenario() {
    // scenario.md: ts/card events, zones and modes as listed; the brief: hourly windows, one
    // week epochs (7 × 24 = 168 windows), bounds 2 events/window and 24 windows/epoch.
    let c = Config::load_with_env(&manifest_path("config/demo.toml"), HashMap::new()).unwrap();
    assert_eq!(c.input.time_field, "ts");
    assert_eq!(c.input.unit_field.as_deref(), Some("card"));
    assert_eq!(c.window.length, DurationMs(3_600_000));
    assert_eq!(c.window.allowed_lateness, DurationMs(5 * 60_000));
    assert_eq!(c.privacy.epoch_windows, 7 * 24);
    assert_eq!(c.privacy.rho_per_epoch, 1.0);
    assert_eq!(c.privacy.delta, 1e-9);
    assert_eq!(
        c.privacy.unit_bounds,
        Some(UnitBounds {
            lifetime_rho: 4.0,
            max_events_per_window: 2,
            max_windows_per_epoch: 24
        })
    );
    let names: Vec<&str> = c.stats.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "taps_by_zone",
            "taps_by_mode",
            "fare_revenue",
            "mean_trip_minutes",
            "trip_model"
        ]
    );
    let fields = c.event_fields();
    assert_eq!(
        fields.categories,
        vec![
            (
                "zone".to_string(),
                [
                    "harbour",
                    "old-town",
                    "uplands",
                    "riverside",
                    "airport-link"
                ]
                .map(String::from)
                .to_vec()
            ),
            (
                "mode".to_string(),
                ["tram", "ferry", "bus"].map(String::from).to_vec()
            ),
        ]
    );
    assert_eq!(
        fields.numbers,
        ["fare_cents", "trip_minutes", "trip_km", "transfers"]
    );
    assert_eq!(fields.time_field, "ts");
    assert_eq!(fields.unit_field.as_deref(), Some("card"));
    let StatKind::Linear(lin) = &c.stats[4].kind else {
        panic!("trip_model should be linear")
    };
    assert_eq!((lin.feature_norm_bound, lin.target_bound), (30.0, 120.0));
    assert_eq!(lin.feature_bounds, None);
    assert_eq!(
        lin.feature_ranges.as_deref(),
        Some(&[(0.0, 30.0), (0.0, 4.0)][..])
    );
    assert_eq!(lin.target_range, Some((0.0, 120.0)));
}

/// A minimal config with one linear stat and extra keys `extra` in its table.
fn linear_with(extra: &str) -> String {
    format!(
        r#"
[input]
time_field = "ts"
[window]
length = "1h"
[privacy]
rho_per_epoch = 1.0
delta = 1e-9
epoch_windows = 24
[[stats]]
name = "m"
kind = "linear"
target = "y"
features = ["a", "b"]
feature_norm_bound = 10.0
target_bound = 50.0
{extra}
"#
    )
}

#[test]
fn linear_ranges_are_validated_with_the_key_and_the_fix() {
    let cases = [
        (
            "feature_ranges = [[0, 5]]",
            "stats[0].feature_ranges",
            "1 ranges for 2 features",
        ),
        (
            "feature_ranges = [[0, 5], [3, 3]]",
            "stats[0].feature_ranges[1]",
            "lo < hi",
        ),
        (
            "feature_ranges = [[0, 5], [0, 11]]",
            "stats[0].feature_ranges[1]",
            "outside ±10 (feature_norm_bound)",
        ),
        (
            "feature_ranges = [[0, 5], [0, 1]]\nfeature_bounds = [5, 1]",
            "stats[0].feature_ranges",
            "not both",
        ),
        (
            "target_range = [-60, 0]",
            "stats[0].target_range",
            "outside ±50 (target_bound)",
        ),
        ("target_range = [1]", "stats[0].target_range", "not a range"),
    ];
    for (extra, key, reason) in cases {
        let err = Config::from_toml_str(&linear_with(extra))
            .expect_err(extra)
            .to_string();
        assert!(err.contains(key) && err.contains(reason), "{extra}: {err}");
    }
    let ok = Config::from_toml_str(&linear_with(
        "feature_ranges = [[0, 5], [-1, 1]]\ntarget_range = [0, 50]",
    ))
    .expect("valid ranges");
    let StatKind::Linear(lin) = &ok.stats[0].kind else {
        panic!("linear")
    };
    assert_eq!(
        lin.feature_ranges.as_deref(),
        Some(&[(0.0, 5.0), (-1.0, 1.0)][..])
    );
    // Ranges are part of the state fingerprint (they change the sensitivity and the data).
    let other = Config::from_toml_str(&linear_with(
        "feature_ranges = [[0, 6], [-1, 1]]\ntarget_range = [0, 50]",
    ))
    .expect("valid ranges");
    assert_ne!(ok.fingerprint(), other.fingerprint());
}

#[test]
fn example_config_loads_with_run_sections() {
    let c = Config::load_with_env(&manifest_path("config/example.toml"), HashMap::new()).unwrap();
    assert_eq!(c.sources.len(), 2);
    assert_eq!(
        c.sources[0],
        SourceConfig::Tcp {
            listen: "127.0.0.1:9651".parse().unwrap(),
            max_connections: 256,
            idle_timeout: DurationMs(300_000)
        }
    );
    assert!(matches!(&c.sources[1], SourceConfig::File { .. }));
    assert_eq!(c.stats[0].trailing, vec![24, 168]);
    assert_eq!(c.stats[0].weight, 2.0);
    let StatKind::Linear(lin) = &c.stats[3].kind else {
        panic!("stats[3] should be linear")
    };
    assert_eq!(lin.fit, FitConfig::Ridge { lambda: 1.0 });
}

// ---- required keys ---------------------------------------------------------------------------

#[test]
fn required_keys_are_named_when_missing() {
    refused_edit(
        &[("time_field = \"ts\"\n", "")],
        "input.time_field",
        is_missing,
    );
    refused_edit(&[("length = \"1h\"\n", "")], "window.length", is_missing);
    refused_edit(
        &[("rho_per_epoch = 0.5\n", "")],
        "privacy.rho_per_epoch",
        is_missing,
    );
    refused_edit(&[("delta = 1e-9\n", "")], "privacy.delta", is_missing);
    refused_edit(
        &[("epoch_windows = 168\n", "")],
        "privacy.epoch_windows",
        is_missing,
    );
    refused_edit(
        &[("name = \"fare_revenue\"\n", "")],
        "stats[1].name",
        is_missing,
    );
    refused_edit(&[("kind = \"sum\"\n", "")], "stats[1].kind", is_missing);
    refused_edit(
        &[("field = \"fare_cents\"\n", "")],
        "stats[1].field",
        is_missing,
    );
    refused_edit(&[("range = [0, 900]\n", "")], "stats[1].range", is_missing);
    refused_edit(
        &[("field = \"trip_minutes\"\n", "")],
        "stats[2].field",
        is_missing,
    );
    refused_edit(&[("range = [0, 120]\n", "")], "stats[2].range", is_missing);
    refused_edit(
        &[("target = \"trip_minutes\"\n", "")],
        "stats[3].target",
        is_missing,
    );
    refused_edit(
        &[("features = [\"trip_km\", \"transfers\"]\n", "")],
        "stats[3].features",
        is_missing,
    );
    refused_edit(
        &[("feature_norm_bound = 40.0\n", "")],
        "stats[3].feature_norm_bound",
        is_missing,
    );
    refused_edit(
        &[("target_bound = 180.0\n", "")],
        "stats[3].target_bound",
        is_missing,
    );
}

#[test]
fn at_least_one_stat_is_required() {
    let no_stats = BASE.split("[[stats]]").next().unwrap();
    let message = refused(no_stats, "stats", is_missing);
    assert!(message.contains("[[stats]]"), "{message}");
    refused(&format!("stats = []\n{no_stats}"), "stats", is_missing);
}

// ---- [input] ---------------------------------------------------------------------------------

#[test]
fn max_line_bytes_range_is_64_to_16_mib() {
    assert_eq!(
        loads(&[(
            "time_field = \"ts\"",
            "time_field = \"ts\"\nmax_line_bytes = 64"
        )])
        .input
        .max_line_bytes,
        64
    );
    let top = 16 * 1024 * 1024;
    let at_top = format!("time_field = \"ts\"\nmax_line_bytes = {top}");
    assert_eq!(
        loads(&[("time_field = \"ts\"", at_top.as_str())])
            .input
            .max_line_bytes,
        top
    );
    for bad in ["63".to_string(), (top + 1).to_string(), "-1".to_string()] {
        let line = format!("time_field = \"ts\"\nmax_line_bytes = {bad}");
        let message = refused_edit(
            &[("time_field = \"ts\"", line.as_str())],
            "input.max_line_bytes",
            is_invalid,
        );
        assert!(message.contains("64 ..= 16777216"), "{message}");
    }
}

#[test]
fn unit_field_must_differ_from_time_field_and_names_must_not_be_empty() {
    refused_edit(
        &[("unit_field = \"card\"", "unit_field = \"ts\"")],
        "input.unit_field",
        is_invalid,
    );
    refused_edit(
        &[("time_field = \"ts\"", "time_field = \"\"")],
        "input.time_field",
        is_invalid,
    );
}

// ---- [window] --------------------------------------------------------------------------------

#[test]
fn window_length_is_at_least_one_second() {
    // 1s windows need a lateness below 100 s, so the 5m default must be lowered too.
    let one_second = loads(&[(
        "length = \"1h\"",
        "length = \"1s\"\nallowed_lateness = \"99s\"",
    )]);
    assert_eq!(one_second.window.length, DurationMs(1000));
    let message = refused_edit(
        &[("length = \"1h\"", "length = \"1s\"")],
        "window.allowed_lateness",
        is_invalid,
    );
    assert!(
        message.contains("default"),
        "a defaulted value should say so: {message}"
    );
    refused_edit(
        &[("length = \"1h\"", "length = \"999ms\"")],
        "window.length",
        is_invalid,
    );
    refused_edit(
        &[("length = \"1h\"", "length = \"0s\"")],
        "window.length",
        is_invalid,
    );
    let message = refused_edit(
        &[("length = \"1h\"", "length = \"1 hour\"")],
        "window.length",
        is_invalid,
    );
    assert!(message.contains("ms, s, m, h or d"), "{message}");
}

#[test]
fn allowed_lateness_is_below_a_hundred_window_lengths() {
    let ok = loads(&[(
        "length = \"1h\"",
        "length = \"1h\"\nallowed_lateness = \"0s\"",
    )]);
    assert_eq!(ok.window.allowed_lateness, DurationMs(0));
    // 100 × 1h = 6000m; 5999m is the largest whole-minute value strictly below it.
    let ok = loads(&[(
        "length = \"1h\"",
        "length = \"1h\"\nallowed_lateness = \"5999m\"",
    )]);
    assert_eq!(ok.window.allowed_lateness, DurationMs(5999 * 60_000));
    refused_edit(
        &[(
            "length = \"1h\"",
            "length = \"1h\"\nallowed_lateness = \"100h\"",
        )],
        "window.allowed_lateness",
        is_invalid,
    );
    refused_edit(
        &[(
            "length = \"1h\"",
            "length = \"1h\"\nallowed_lateness = \"-5m\"",
        )],
        "window.allowed_lateness",
        is_invalid,
    );
}

#[test]
fn idle_close_is_at_least_one_second() {
    assert_eq!(
        loads(&[("length = \"1h\"", "length = \"1h\"\nidle_close = \"1s\"")])
            .window
            .idle_close,
        DurationMs(1000)
    );
    refused_edit(
        &[("length = \"1h\"", "length = \"1h\"\nidle_close = \"0s\"")],
        "window.idle_close",
        is_invalid,
    );
}

// ---- [privacy] -------------------------------------------------------------------------------

#[test]
fn rho_per_epoch_is_finite_and_positive() {
    for bad in ["0", "-0.5", "inf", "nan"] {
        let line = format!("rho_per_epoch = {bad}");
        refused_edit(
            &[("rho_per_epoch = 0.5", line.as_str())],
            "privacy.rho_per_epoch",
            is_invalid,
        );
    }
}

#[test]
fn delta_is_in_zero_to_one_thousandth() {
    // Upper bound 1e-3: δ must be far below 1/n (common practice; NIST SP 800-226, recalled).
    assert_eq!(
        loads(&[("delta = 1e-9", "delta = 1e-3")]).privacy.delta,
        1e-3
    );
    for bad in ["0", "-1e-9", "1.1e-3", "0.5", "nan"] {
        let line = format!("delta = {bad}");
        let message = refused_edit(
            &[("delta = 1e-9", line.as_str())],
            "privacy.delta",
            is_invalid,
        );
        assert!(
            message.contains("1/n"),
            "the message should say why: {message}"
        );
    }
}

#[test]
fn epoch_windows_is_one_to_two_to_the_twenty() {
    // Lower edge: 1 window per epoch needs trailing and max_windows_per_epoch ≤ 1.
    let one = loads(&[
        ("epoch_windows = 168", "epoch_windows = 1"),
        ("max_windows_per_epoch = 48", "max_windows_per_epoch = 1"),
        ("trailing = [24]\n", ""),
    ]);
    assert_eq!(one.privacy.epoch_windows, 1);
    assert_eq!(
        loads(&[("epoch_windows = 168", "epoch_windows = 1048576")])
            .privacy
            .epoch_windows,
        1 << 20
    );
    for bad in ["0", "1048577", "-3"] {
        let line = format!("epoch_windows = {bad}");
        refused_edit(
            &[("epoch_windows = 168", line.as_str())],
            "privacy.epoch_windows",
            is_invalid,
        );
    }
}

#[test]
fn mechanism_names_are_the_three_of_the_contract() {
    for (name, mechanism) in [
        ("tree", Mechanism::Tree),
        ("sqrt-factorization", Mechanism::SqrtFactorization),
        ("independent", Mechanism::Independent),
    ] {
        let line = format!("epoch_windows = 168\nmechanism = \"{name}\"");
        let c = loads(&[("epoch_windows = 168", line.as_str())]);
        assert_eq!(c.privacy.mechanism, mechanism);
        assert_eq!(mechanism.label(), name);
    }
    let message = refused_edit(
        &[(
            "epoch_windows = 168",
            "epoch_windows = 168\nmechanism = \"laplace\"",
        )],
        "privacy.mechanism",
        is_invalid,
    );
    assert!(message.contains("\"sqrt-factorization\""), "{message}");
}

#[test]
fn unit_bounds_are_required_with_a_unit_field() {
    for (line, key) in [
        ("lifetime_rho = 4.0\n", "privacy.lifetime_rho"),
        (
            "max_events_per_window = 4\n",
            "privacy.max_events_per_window",
        ),
        (
            "max_windows_per_epoch = 48\n",
            "privacy.max_windows_per_epoch",
        ),
    ] {
        let message = refused_edit(&[(line, "")], key, is_missing);
        assert!(message.contains("unit_field"), "{message}");
    }
}

#[test]
fn unit_bounds_are_rejected_without_a_unit_field() {
    for (line, key) in [
        ("lifetime_rho = 4.0\n", "privacy.lifetime_rho"),
        (
            "max_events_per_window = 4\n",
            "privacy.max_events_per_window",
        ),
        (
            "max_windows_per_epoch = 48\n",
            "privacy.max_windows_per_epoch",
        ),
    ] {
        // Keep exactly this bound, drop the unit field and the other two.
        let edits: Vec<(&str, &str)> = UNIT_LINES
            .iter()
            .copied()
            .filter(|(from, _)| *from != line)
            .collect();
        let message = refused_edit(&edits, key, is_not_allowed);
        assert!(
            message.contains("event-level"),
            "the message should explain event-level privacy: {message}"
        );
    }
}

#[test]
fn lifetime_rho_covers_at_least_one_epoch() {
    let equal = loads(&[("lifetime_rho = 4.0", "lifetime_rho = 0.5")]);
    assert_eq!(equal.privacy.unit_bounds.unwrap().lifetime_rho, 0.5);
    refused_edit(
        &[("lifetime_rho = 4.0", "lifetime_rho = 0.4")],
        "privacy.lifetime_rho",
        is_invalid,
    );
    refused_edit(
        &[("lifetime_rho = 4.0", "lifetime_rho = inf")],
        "privacy.lifetime_rho",
        is_invalid,
    );
}

#[test]
fn per_unit_event_and_window_bounds_have_their_ranges() {
    let top = loads(&[(
        "max_events_per_window = 4",
        "max_events_per_window = 1000000",
    )]);
    assert_eq!(
        top.privacy.unit_bounds.unwrap().max_events_per_window,
        1_000_000
    );
    for bad in ["0", "1000001"] {
        let line = format!("max_events_per_window = {bad}");
        refused_edit(
            &[("max_events_per_window = 4", line.as_str())],
            "privacy.max_events_per_window",
            is_invalid,
        );
    }
    let all = loads(&[("max_windows_per_epoch = 48", "max_windows_per_epoch = 168")]);
    assert_eq!(all.privacy.unit_bounds.unwrap().max_windows_per_epoch, 168);
    for bad in ["0", "169"] {
        let line = format!("max_windows_per_epoch = {bad}");
        refused_edit(
            &[("max_windows_per_epoch = 48", line.as_str())],
            "privacy.max_windows_per_epoch",
            is_invalid,
        );
    }
}

// ---- [[stats]] -------------------------------------------------------------------------------

#[test]
fn stat_names_match_the_pattern_and_are_unique() {
    for bad in ["Taps", "taps-by-zone", "", "taps by zone", "é"] {
        let line = format!("name = \"{bad}\"");
        refused_edit(
            &[("name = \"fare_revenue\"", line.as_str())],
            "stats[1].name",
            is_invalid,
        );
    }
    let message = refused_edit(
        &[("name = \"mean_trip\"", "name = \"fare_revenue\"")],
        "stats[2].name",
        is_invalid,
    );
    assert!(
        message.contains("stats[1]"),
        "should point at the first use: {message}"
    );
}

#[test]
fn unknown_kind_lists_the_four_kinds() {
    let message = refused_edit(
        &[("kind = \"sum\"", "kind = \"median\"")],
        "stats[1].kind",
        is_invalid,
    );
    for kind in ["\"count\"", "\"sum\"", "\"mean\"", "\"linear\""] {
        assert!(message.contains(kind), "{message}");
    }
}

#[test]
fn keys_of_other_kinds_are_not_allowed() {
    let (from, to) = add_to_stat("taps_by_zone", "field = \"fare_cents\"");
    refused_edit(&[(&from, &to)], "stats[0].field", is_not_allowed);
    let (from, to) = add_to_stat("fare_revenue", "target = \"x\"");
    refused_edit(&[(&from, &to)], "stats[1].target", is_not_allowed);
    let (from, to) = add_to_stat("trip_model", "range = [0, 1]");
    refused_edit(&[(&from, &to)], "stats[3].range", is_not_allowed);
}

#[test]
fn weight_is_finite_and_positive() {
    let (from, to) = add_to_stat("fare_revenue", "weight = 0.25");
    assert_eq!(loads(&[(&from, &to)]).stats[1].weight, 0.25);
    for bad in ["0", "-1", "inf", "nan"] {
        let (from, to) = add_to_stat("fare_revenue", &format!("weight = {bad}"));
        refused_edit(&[(&from, &to)], "stats[1].weight", is_invalid);
    }
}

#[test]
fn trailing_entries_are_two_to_epoch_windows_and_unique() {
    assert_eq!(
        loads(&[("trailing = [24]", "trailing = [2, 168]")]).stats[0].trailing,
        vec![2, 168]
    );
    refused_edit(
        &[("trailing = [24]", "trailing = [1]")],
        "stats[0].trailing[0]",
        is_invalid,
    );
    refused_edit(
        &[("trailing = [24]", "trailing = [24, 169]")],
        "stats[0].trailing[1]",
        is_invalid,
    );
    refused_edit(
        &[("trailing = [24]", "trailing = [24, 24]")],
        "stats[0].trailing[1]",
        is_invalid,
    );
}

#[test]
fn group_fields_need_valid_key_lists() {
    let zone = "zone = [\"harbour\", \"old-town\", \"uplands\"]";
    refused_edit(&[(zone, "")], "stats[0].keys.zone", is_missing);
    refused_edit(&[(zone, "zone = []")], "stats[0].keys.zone", is_invalid);
    refused_edit(
        &[(zone, "zone = [\"harbour\", \"harbour\"]")],
        "stats[0].keys.zone[1]",
        is_invalid,
    );
    refused_edit(
        &[(zone, "zone = [\"harbour\", \"\"]")],
        "stats[0].keys.zone[1]",
        is_invalid,
    );
    refused_edit(
        &[("group_by = [\"zone\"]", "group_by = [\"zone\", \"zone\"]")],
        "stats[0].group_by[1]",
        is_invalid,
    );
    refused_edit(
        &[("group_by = [\"zone\"]", "group_by = [\"\"]")],
        "stats[0].group_by[0]",
        is_invalid,
    );
}

#[test]
fn a_group_field_takes_at_most_ten_thousand_keys() {
    let list = |n: usize| {
        (0..n)
            .map(|i| format!("\"k{i}\""))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let zone = "zone = [\"harbour\", \"old-town\", \"uplands\"]";
    let at_limit = format!("zone = [{}]", list(10_000));
    assert_eq!(
        loads(&[(zone, at_limit.as_str())]).stats[0].group_by[0]
            .keys
            .len(),
        10_000
    );
    let over = format!("zone = [{}]", list(10_001));
    refused_edit(&[(zone, over.as_str())], "stats[0].keys.zone", is_invalid);
}

#[test]
fn field_names_keep_their_case() {
    // Event field names are JSON keys, which are case-sensitive (RFC 8259 §4 compares member
    // names as strings); only environment variable names are case-folded.
    let c = loads(&[
        ("group_by = [\"zone\"]", "group_by = [\"Zone\"]"),
        ("zone = [\"harbour\"", "Zone = [\"harbour\""),
        ("field = \"fare_cents\"", "field = \"fareCents\""),
    ]);
    assert_eq!(c.stats[0].group_by[0].field, "Zone");
    assert_eq!(c.event_fields().numbers[0], "fareCents");
    refused_edit(
        &[("group_by = [\"zone\"]", "group_by = [\"Zone\"]")],
        "stats[0].keys.Zone",
        is_missing,
    );
}

#[test]
fn keys_for_fields_not_grouped_by_are_an_error() {
    let zone = "zone = [\"harbour\", \"old-town\", \"uplands\"]";
    let with_mode = format!("{zone}\nmode = [\"tram\"]");
    let message = refused_edit(
        &[(zone, with_mode.as_str())],
        "stats[0].keys.mode",
        is_not_allowed,
    );
    assert!(message.contains("group_by"), "{message}");
}

#[test]
fn ranges_are_two_finite_numbers_in_order() {
    assert_eq!(
        loads(&[("range = [0, 900]", "range = [-5.5, 1e6]")]).stats[1].kind,
        StatKind::Sum {
            field: "fare_cents".into(),
            range: (-5.5, 1e6)
        }
    );
    for bad in [
        "[900, 0]",
        "[1, 1]",
        "[0]",
        "[0, 1, 2]",
        "[0, inf]",
        "[nan, 1]",
        "[-inf, 0]",
    ] {
        let line = format!("range = {bad}");
        refused_edit(
            &[("range = [0, 900]", line.as_str())],
            "stats[1].range",
            is_invalid,
        );
    }
    refused_edit(
        &[("range = [0, 120]", "range = [120, 0]")],
        "stats[2].range",
        is_invalid,
    );
}

#[test]
fn clipping_bounds_are_finite_and_positive() {
    for bad in ["0", "-40", "inf", "nan"] {
        let line = format!("feature_norm_bound = {bad}");
        refused_edit(
            &[("feature_norm_bound = 40.0", line.as_str())],
            "stats[3].feature_norm_bound",
            is_invalid,
        );
        let line = format!("target_bound = {bad}");
        refused_edit(
            &[("target_bound = 180.0", line.as_str())],
            "stats[3].target_bound",
            is_invalid,
        );
    }
}

#[test]
fn stats_cannot_use_the_time_or_unit_field() {
    refused_edit(
        &[("field = \"fare_cents\"", "field = \"ts\"")],
        "stats[1].field",
        is_invalid,
    );
    refused_edit(
        &[("field = \"fare_cents\"", "field = \"card\"")],
        "stats[1].field",
        is_invalid,
    );
    refused_edit(
        &[("target = \"trip_minutes\"", "target = \"card\"")],
        "stats[3].target",
        is_invalid,
    );
    refused_edit(
        &[(
            "features = [\"trip_km\", \"transfers\"]",
            "features = [\"trip_km\", \"ts\"]",
        )],
        "stats[3].features[1]",
        is_invalid,
    );
    let message = refused_edit(
        &[
            ("group_by = [\"zone\"]", "group_by = [\"card\"]"),
            ("zone = [", "card = ["),
        ],
        "stats[0].group_by[0]",
        is_invalid,
    );
    assert!(message.contains("unit_field"), "{message}");
}

#[test]
fn linear_features_are_non_empty_unique_and_not_the_target() {
    let features = "features = [\"trip_km\", \"transfers\"]";
    refused_edit(
        &[(features, "features = []")],
        "stats[3].features",
        is_invalid,
    );
    refused_edit(
        &[(features, "features = [\"trip_km\", \"trip_km\"]")],
        "stats[3].features[1]",
        is_invalid,
    );
    refused_edit(
        &[(features, "features = [\"trip_minutes\"]")],
        "stats[3].features[0]",
        is_invalid,
    );
}

#[test]
fn fit_options_go_with_their_fit() {
    let add = |line: &str| add_to_stat("trip_model", line);
    let (f, t) = add("fit = \"l1\"\nl1_radius = 10.0");
    let StatKind::Linear(lin) = &loads(&[(&f, &t)]).stats[3].kind else {
        panic!()
    };
    assert_eq!(lin.fit, FitConfig::L1 { radius: 10.0 });
    let (f, t) = add("fit = \"ridge\"\nridge_lambda = 2.5");
    let StatKind::Linear(lin) = &loads(&[(&f, &t)]).stats[3].kind else {
        panic!()
    };
    assert_eq!(lin.fit, FitConfig::Ridge { lambda: 2.5 });
    let (f, t) = add("intercept = false");
    let StatKind::Linear(lin) = &loads(&[(&f, &t)]).stats[3].kind else {
        panic!()
    };
    assert!(!lin.intercept);

    let (f, t) = add("fit = \"l1\"");
    refused_edit(&[(&f, &t)], "stats[3].l1_radius", is_missing);
    let (f, t) = add("l1_radius = 10.0");
    refused_edit(&[(&f, &t)], "stats[3].l1_radius", is_not_allowed);
    let (f, t) = add("fit = \"l1\"\nl1_radius = 10.0\nridge_lambda = 1.0");
    refused_edit(&[(&f, &t)], "stats[3].ridge_lambda", is_not_allowed);
    let (f, t) = add("fit = \"l1\"\nl1_radius = 0");
    refused_edit(&[(&f, &t)], "stats[3].l1_radius", is_invalid);
    let (f, t) = add("ridge_lambda = -1");
    refused_edit(&[(&f, &t)], "stats[3].ridge_lambda", is_invalid);
    let (f, t) = add("fit = \"lasso\"");
    let message = refused_edit(&[(&f, &t)], "stats[3].fit", is_invalid);
    assert!(
        message.contains("\"ridge\"") && message.contains("\"l1\""),
        "{message}"
    );
}

#[test]
fn stats_sharing_a_group_field_get_the_union_of_its_keys() {
    // The line parser reads each field into one public domain (its Schema takes one key list
    // per category), so event_fields() must hand it the union, each key once.
    // A [stats.keys] table must come last in its stat, so it goes after the range line.
    let group = add_to_stat("fare_revenue", "group_by = [\"zone\"]");
    let keys = (
        "range = [0, 900]",
        "range = [0, 900]\n[stats.keys]\nzone = [\"uplands\", \"riverside\", \"harbour\"]",
    );
    let c = loads(&[(&group.0, &group.1), keys]);
    assert_eq!(
        c.stats[1].group_by[0].keys,
        ["uplands", "riverside", "harbour"]
    );
    assert_eq!(
        c.event_fields().categories,
        vec![(
            "zone".to_string(),
            ["harbour", "old-town", "uplands", "riverside"]
                .map(String::from)
                .to_vec()
        )]
    );
}

#[test]
fn a_field_is_either_a_category_or_a_number() {
    let group = add_to_stat("mean_trip", "group_by = [\"trip_km\"]");
    let keys = (
        "range = [0, 120]",
        "range = [0, 120]\n[stats.keys]\ntrip_km = [\"short\", \"long\"]",
    );
    refused_edit(
        &[(&group.0, &group.1), keys],
        "stats[2].group_by[0]",
        is_invalid,
    );
}

// ---- [[sources]], [http], [output], [state] --------------------------------------------------

fn with_sources(block: &str) -> String {
    format!("{BASE}\n{block}")
}

#[test]
fn sources_resolve_with_defaults() {
    let c = load(&with_sources(
        "[[sources]]\nkind = \"stdin\"\n[[sources]]\nkind = \"file\"\npath = \"feed.jsonl\"\n\
         [[sources]]\nkind = \"tcp\"\nlisten = \"[::1]:9651\"\n\
         [[sources]]\nkind = \"tcp\"\nlisten = \"0.0.0.0:9652\"\nmax_connections = 8\nidle_timeout = \"30s\"\n",
    ))
    .unwrap();
    assert_eq!(
        c.sources,
        vec![
            SourceConfig::Stdin,
            SourceConfig::File {
                path: PathBuf::from("feed.jsonl")
            },
            SourceConfig::Tcp {
                listen: "[::1]:9651".parse().unwrap(),
                max_connections: 256,
                idle_timeout: DurationMs(300_000)
            },
            SourceConfig::Tcp {
                listen: "0.0.0.0:9652".parse().unwrap(),
                max_connections: 8,
                idle_timeout: DurationMs(30_000)
            },
        ]
    );
}

#[test]
fn source_rules_name_the_source_key() {
    refused(
        &with_sources("[[sources]]\npath = \"x\"\n"),
        "sources[0].kind",
        is_missing,
    );
    let message = refused(
        &with_sources("[[sources]]\nkind = \"udp\"\n"),
        "sources[0].kind",
        is_invalid,
    );
    assert!(message.contains("\"tcp\""), "{message}");
    refused(
        &with_sources("[[sources]]\nkind = \"file\"\n"),
        "sources[0].path",
        is_missing,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"tcp\"\n"),
        "sources[0].listen",
        is_missing,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"tcp\"\nlisten = \"localhost:9651\"\n"),
        "sources[0].listen",
        is_invalid,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1\"\n"),
        "sources[0].listen",
        is_invalid,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:1\"\npath = \"x\"\n"),
        "sources[0].path",
        is_not_allowed,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"stdin\"\nlisten = \"127.0.0.1:1\"\n"),
        "sources[0].listen",
        is_not_allowed,
    );
    refused(
        &with_sources(
            "[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:1\"\nmax_connections = 0\n",
        ),
        "sources[0].max_connections",
        is_invalid,
    );
    refused(
        &with_sources(
            "[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:1\"\nidle_timeout = \"0s\"\n",
        ),
        "sources[0].idle_timeout",
        is_invalid,
    );
    refused(
        &with_sources("[[sources]]\nkind = \"stdin\"\n[[sources]]\nkind = \"stdin\"\n"),
        "sources[1].kind",
        is_invalid,
    );
    refused(
        &with_sources(
            "[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:1\"\n[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:1\"\n",
        ),
        "sources[1].listen",
        is_invalid,
    );
}

#[test]
fn run_sections_are_checked() {
    refused(
        &format!("{BASE}\n[http]\nlisten = \"nowhere\"\n"),
        "http.listen",
        is_invalid,
    );
    refused(
        &format!("{BASE}\n[output]\ndir = \"\"\n"),
        "output.dir",
        is_invalid,
    );
    refused(
        &format!("{BASE}\n[state]\ncheckpoint_interval = \"500ms\"\n"),
        "state.checkpoint_interval",
        is_invalid,
    );
    let c = load(&format!("{BASE}\n[http]\nlisten = \"0.0.0.0:80\"\n[output]\ndir = \"rel\"\n[state]\ndir = \"/s\"\ncheckpoint_interval = \"1s\"\n")).unwrap();
    assert_eq!(c.http.listen, "0.0.0.0:80".parse::<SocketAddr>().unwrap());
    assert_eq!(c.output.dir, PathBuf::from("rel"));
    assert_eq!(c.state.dir, PathBuf::from("/s"));
    assert_eq!(c.state.checkpoint_interval, DurationMs(1000));
}

// ---- unknown keys, types, syntax -------------------------------------------------------------

#[test]
fn unknown_keys_are_named_with_the_valid_keys_of_their_table() {
    let message = refused(
        &format!("{BASE}\n[metrics]\nport = 1\n"),
        "metrics",
        is_unknown,
    );
    assert!(
        message.contains("privacy") && message.contains("sources"),
        "{message}"
    );
    let message = refused_edit(
        &[("delta = 1e-9", "delta = 1e-9\nrho = 1")],
        "privacy.rho",
        is_unknown,
    );
    assert!(
        message.contains("rho_per_epoch") && message.contains("[privacy]"),
        "{message}"
    );
    let (f, t) = add_to_stat("fare_revenue", "feild = \"x\"");
    let message = refused_edit(&[(&f, &t)], "stats[1].feild", is_unknown);
    assert!(message.contains("field, range"), "{message}");
    let message = refused(
        &with_sources("[[sources]]\nkind = \"tcp\"\nport = 9651\n"),
        "sources[0].port",
        is_unknown,
    );
    assert!(message.contains("listen"), "{message}");
    let message = refused_edit(
        &[(
            "time_field = \"ts\"",
            "time_field = \"ts\"\ntimefield = \"ts\"",
        )],
        "input.timefield",
        is_unknown,
    );
    // A file-borne typo must not be blamed on the environment.
    assert!(!message.contains("environment"), "{message}");
}

#[test]
fn wrong_types_name_the_key_and_the_expected_type() {
    let message = refused_edit(
        &[("rho_per_epoch = 0.5", "rho_per_epoch = \"half\"")],
        "privacy.rho_per_epoch",
        is_wrong_type,
    );
    assert!(message.contains("a number"), "{message}");
    // Floats are never rounded into integer keys, booleans never read as numbers.
    let message = refused_edit(
        &[("epoch_windows = 168", "epoch_windows = 1.5")],
        "privacy.epoch_windows",
        is_wrong_type,
    );
    assert!(message.contains("an integer"), "{message}");
    refused_edit(
        &[("max_events_per_window = 4", "max_events_per_window = true")],
        "privacy.max_events_per_window",
        is_wrong_type,
    );
    refused_edit(
        &[("rho_per_epoch = 0.5", "rho_per_epoch = true")],
        "privacy.rho_per_epoch",
        is_wrong_type,
    );
    let message = refused_edit(
        &[("group_by = [\"zone\"]", "group_by = \"zone\"")],
        "stats[0].group_by",
        is_wrong_type,
    );
    assert!(message.contains("an array"), "{message}");
    refused_edit(
        &[("time_field = \"ts\"", "time_field = 5")],
        "input.time_field",
        is_wrong_type,
    );
    refused_edit(
        &[("range = [0, 900]", "range = [0, \"x\"]")],
        "stats[1].range[1]",
        is_wrong_type,
    );
    let (f, t) = add_to_stat("trip_model", "intercept = \"maybe\"");
    refused_edit(&[(&f, &t)], "stats[3].intercept", is_wrong_type);
    let (head, rest) = BASE.split_once("[privacy]").unwrap();
    let tail = &rest[rest.find("[[stats]]").unwrap()..];
    let message = refused(
        &format!("privacy = 3\n{head}{tail}"),
        "privacy",
        is_wrong_type,
    );
    assert!(message.contains("a table"), "{message}");
    let message = refused(
        &format!("{}\n[http]\nlisten = 9650\n", BASE),
        "http.listen",
        is_wrong_type,
    );
    assert!(message.contains("a string"), "{message}");
}

#[test]
fn sections_must_be_tables() {
    let text = format!(
        "window = \"1h\"\n{}",
        edit(&[("[window]\nlength = \"1h\"\n", "")])
    );
    let message = refused(&text, "window", is_wrong_type);
    assert!(message.contains("a table"), "{message}");
    let text = format!("stats = 3\n{}", BASE.split("[[stats]]").next().unwrap());
    let message = refused(&text, "stats", is_wrong_type);
    assert!(message.contains("[[stats]]"), "{message}");
}

#[test]
fn toml_syntax_errors_give_the_line() {
    let err = load("[input]\ntime_field = \"ts\"\nunit_field = card\n").unwrap_err();
    assert!(matches!(err, ConfigError::Syntax { .. }), "{err:?}");
    let message = err.to_string();
    assert!(message.contains("line 3"), "{message}");
}

#[test]
fn a_missing_file_is_a_read_error_naming_the_path() {
    let err =
        Config::load_with_env(Path::new("/nonexistent/scrim.toml"), HashMap::new()).unwrap_err();
    assert!(matches!(err, ConfigError::Read { .. }), "{err:?}");
    assert!(err.to_string().contains("/nonexistent/scrim.toml"));
}

// ---- environment overrides ------------------------------------------------------------------

fn write_base() -> tempfile::NamedTempFile {
    let mut file = tempfile::NamedTempFile::new().unwrap();
    std::io::Write::write_all(&mut file, BASE.as_bytes()).unwrap();
    file
}

#[test]
fn environment_overrides_scalars() {
    let file = write_base();
    let env = env_of(&[
        ("SCRIM_PRIVACY__RHO_PER_EPOCH", "0.25"),
        ("SCRIM_WINDOW__ALLOWED_LATENESS", "10m"),
        ("SCRIM_HTTP__LISTEN", "0.0.0.0:9000"),
        ("scrim_input__max_line_bytes", "1024"),
        // Not ours: no SCRIM_ prefix (SCRIMSHAW lacks the `_` after SCRIM).
        ("PATH", "/usr/bin"),
        ("SCRIMSHAW", "whalebone"),
    ]);
    let c = Config::load_with_env(file.path(), env).unwrap();
    assert_eq!(c.privacy.rho_per_epoch, 0.25);
    assert_eq!(c.window.allowed_lateness, DurationMs(600_000));
    assert_eq!(c.http.listen, "0.0.0.0:9000".parse::<SocketAddr>().unwrap());
    assert_eq!(c.input.max_line_bytes, 1024);
    // Overrides go through the same rules as the file.
    let err =
        Config::load_with_env(file.path(), env_of(&[("SCRIM_PRIVACY__DELTA", "0.5")])).unwrap_err();
    assert!(err.to_string().contains("`privacy.delta`"), "{err}");
}

#[test]
fn a_stray_scrim_variable_is_an_unknown_key_blamed_on_the_environment() {
    let file = write_base();
    for (variable, key) in [
        ("SCRIM_PRIVACY__RHO", "privacy.rho"),
        ("SCRIM_LOG_LEVEL", "log_level"),
        ("SCRIM_FOO__BAR", "foo"),
    ] {
        let err = Config::load_with_env(file.path(), env_of(&[(variable, "1")])).unwrap_err();
        assert!(matches!(err, ConfigError::UnknownKey { .. }), "{err:?}");
        let message = err.to_string();
        assert!(message.contains(&format!("`{key}`")), "{message}");
        assert!(
            message.contains("environment") && message.contains(variable),
            "{message}"
        );
    }
}

#[test]
fn wrong_types_from_the_environment_name_the_variable() {
    let file = write_base();
    let err = Config::load_with_env(
        file.path(),
        env_of(&[("SCRIM_PRIVACY__EPOCH_WINDOWS", "many")]),
    )
    .unwrap_err();
    assert!(matches!(err, ConfigError::WrongType { .. }), "{err:?}");
    let message = err.to_string();
    assert!(
        message.contains("`privacy.epoch_windows`")
            && message.contains("SCRIM_PRIVACY__EPOCH_WINDOWS"),
        "{message}"
    );
}

#[test]
fn array_entries_cannot_be_overridden_from_the_environment() {
    let file = write_base();
    let err =
        Config::load_with_env(file.path(), env_of(&[("SCRIM_STATS__0__WEIGHT", "2")])).unwrap_err();
    assert!(matches!(err, ConfigError::Environment { .. }), "{err:?}");
    let message = err.to_string();
    assert!(
        message.contains("SCRIM_STATS__0__WEIGHT") && message.contains("[[stats]]"),
        "{message}"
    );
}

// ---- fingerprint -----------------------------------------------------------------------------

fn fingerprint(edits: &[(&str, &str)]) -> String {
    loads(edits).fingerprint()
}

#[test]
fn fingerprint_is_a_blake3_hex_digest_and_stable() {
    let fp = fingerprint(&[]);
    // blake3's default output is 32 bytes, i.e. 64 hex digits (BLAKE3 specification §2.6).
    assert_eq!(fp.len(), 64);
    assert!(fp.bytes().all(|b| b.is_ascii_hexdigit()));
    assert_eq!(fp, fingerprint(&[]));
}

#[test]
fn fingerprint_changes_with_anything_that_affects_the_guarantee() {
    let base = fingerprint(&[]);
    let weight = add_to_stat("fare_revenue", "weight = 2.0");
    let no_intercept = add_to_stat("trip_model", "intercept = false");
    let ridge = add_to_stat("trip_model", "ridge_lambda = 1.0");
    let changed = [
        fingerprint(&[("max_events_per_window = 4", "max_events_per_window = 5")]),
        fingerprint(&[("max_windows_per_epoch = 48", "max_windows_per_epoch = 47")]),
        fingerprint(&[("lifetime_rho = 4.0", "lifetime_rho = 4.5")]),
        fingerprint(&[("rho_per_epoch = 0.5", "rho_per_epoch = 0.5000000000000001")]),
        fingerprint(&[("delta = 1e-9", "delta = 1e-10")]),
        fingerprint(&[("epoch_windows = 168", "epoch_windows = 169")]),
        fingerprint(&[(
            "epoch_windows = 168",
            "epoch_windows = 168\nmechanism = \"independent\"",
        )]),
        fingerprint(&[("length = \"1h\"", "length = \"2h\"")]),
        // Lateness and line length decide which events a replayed log accepts.
        fingerprint(&[(
            "length = \"1h\"",
            "length = \"1h\"\nallowed_lateness = \"6m\"",
        )]),
        fingerprint(&[(
            "time_field = \"ts\"",
            "time_field = \"ts\"\nmax_line_bytes = 4096",
        )]),
        // idle_close decides which logged wall-clock ticks close windows on replay.
        fingerprint(&[("length = \"1h\"", "length = \"1h\"\nidle_close = \"7m\"")]),
        fingerprint(&[("time_field = \"ts\"", "time_field = \"time\"")]),
        fingerprint(&[("unit_field = \"card\"", "unit_field = \"rider\"")]),
        fingerprint(&UNIT_LINES),
        fingerprint(&[("range = [0, 900]", "range = [0, 901]")]),
        fingerprint(&[("feature_norm_bound = 40.0", "feature_norm_bound = 41.0")]),
        fingerprint(&[("target_bound = 180.0", "target_bound = 100.0")]),
        fingerprint(&[("name = \"fare_revenue\"", "name = \"fares\"")]),
        fingerprint(&[("field = \"fare_cents\"", "field = \"fare\"")]),
        fingerprint(&[("kind = \"sum\"", "kind = \"mean\"")]),
        fingerprint(&[("trailing = [24]", "trailing = [24, 48]")]),
        fingerprint(&[(
            "zone = [\"harbour\", \"old-town\", \"uplands\"]",
            "zone = [\"harbour\", \"old-town\"]",
        )]),
        fingerprint(&[(&weight.0, &weight.1)]),
        fingerprint(&[(&no_intercept.0, &no_intercept.1)]),
        fingerprint(&[(&ridge.0, &ridge.1)]),
    ];
    for (idx, fp) in changed.iter().enumerate() {
        assert_ne!(*fp, base, "change #{idx} should alter the fingerprint");
    }
    let distinct: std::collections::HashSet<&String> = changed.iter().collect();
    assert_eq!(
        distinct.len(),
        changed.len(),
        "every change should give its own fingerprint"
    );
}

#[test]
fn fingerprint_ignores_run_only_settings() {
    // contract.md: sources, http, output and state are run-only; they cannot change what a
    // release reveals. (`idle_close` is run-only too but is pinned: it decides which logged
    // ticks close windows when the log is replayed.)
    let base = fingerprint(&[]);
    let run_only = format!(
        "{BASE}\n[http]\nlisten = \"0.0.0.0:1234\"\n[output]\ndir = \"elsewhere\"\n[state]\ndir = \"s2\"\n\
         checkpoint_interval = \"10m\"\n[[sources]]\nkind = \"tcp\"\nlisten = \"127.0.0.1:9651\"\n"
    );
    assert_eq!(load(&run_only).unwrap().fingerprint(), base);
    // The environment's http.listen override is equally irrelevant.
    let file = write_base();
    let c = Config::load_with_env(
        file.path(),
        env_of(&[("SCRIM_HTTP__LISTEN", "10.0.0.1:80")]),
    )
    .unwrap();
    assert_eq!(c.fingerprint(), base);
}

#[test]
fn fingerprint_does_not_depend_on_key_table_order() {
    // [stats.keys] is a table: the order its fields are written in carries no meaning; the
    // group_by list alone fixes the order.
    let two = |first: &str, second: &str| {
        let text = edit(&[
            ("group_by = [\"zone\"]", "group_by = [\"zone\", \"mode\"]"),
            (
                "zone = [\"harbour\", \"old-town\", \"uplands\"]",
                &format!("{first}\n{second}"),
            ),
        ]);
        load(&text).unwrap().fingerprint()
    };
    let zone = "zone = [\"harbour\", \"old-town\", \"uplands\"]";
    let mode = "mode = [\"tram\", \"bus\"]";
    assert_eq!(two(zone, mode), two(mode, zone));
}
