//! Differential fuzz target: `LineParser::parse` (the hand-written fast path with its
//! serde_json fallback) must give exactly the result of `LineParser::parse_serde` (serde_json
//! alone, the reference) on any byte string, with the demo schema (scenario.md's Quillhaven
//! feed): the same event with numbers equal bit for bit (`to_bits`, so -0.0 is not 0.0), or
//! the same rejection (reason and field).
//! Run: `cargo fuzz run -s none parse_diff fuzz/corpus/parse_line` (the parse_line corpus is a
//! good seed).
#![no_main]

use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::{Event, LineParser, Schema};

/// The demo schema of config/demo.toml: zone and mode categories, four numeric fields.
fn parser() -> &'static LineParser {
    static PARSER: OnceLock<LineParser> = OnceLock::new();
    PARSER.get_or_init(|| {
        let list = |xs: &[&str]| xs.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        LineParser::new(Schema {
            time_field: "ts".into(),
            unit_field: Some("card".into()),
            categories: vec![
                (
                    "zone".into(),
                    list(&[
                        "harbour",
                        "old-town",
                        "uplands",
                        "riverside",
                        "airport-link",
                    ]),
                ),
                ("mode".into(), list(&["tram", "ferry", "bus"])),
            ],
            numbers: list(&["fare_cents", "trip_km", "trip_minutes", "transfers"]),
            max_line_bytes: 65536,
        })
        .expect("the demo schema is valid")
    })
}

/// Stand-in for the engine's keyed unit hash (any function works for the parser).
fn unit_hash(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
        (h ^ u64::from(*b)).wrapping_mul(0x0100_0000_01b3)
    })
}

/// Events compare with numbers bit for bit.
fn same_event(a: &Event, b: &Event) -> bool {
    a.time == b.time
        && a.unit == b.unit
        && a.categories == b.categories
        && a.numbers.len() == b.numbers.len()
        && a.numbers
            .iter()
            .zip(&b.numbers)
            .all(|(x, y)| x.to_bits() == y.to_bits())
}

fuzz_target!(|data: &[u8]| {
    let fast = parser().parse(data, &unit_hash);
    let reference = parser().parse_serde(data, &unit_hash);
    let same = match (&fast, &reference) {
        (Ok(x), Ok(y)) => same_event(x, y),
        (Err(x), Err(y)) => x == y,
        _ => false,
    };
    assert!(
        same,
        "parse {fast:?} but parse_serde {reference:?} on {:?}",
        String::from_utf8_lossy(data)
    );
});
