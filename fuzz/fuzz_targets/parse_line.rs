//! Fuzz target: the event line parser with the demo schema (scenario.md's Quillhaven feed).
//!
//! Any byte string must be either a valid event or a rejection with a known reason; nothing
//! may panic, and a rejection must never carry line content (only schema field names).
//! Run: `cargo fuzz run -s none parse_line fuzz/corpus/parse_line` (README, "Hardening figures").
#![no_main]

use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::{LineParser, RejectReason, Schema};

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

const FIELDS: [&str; 8] = [
    "ts",
    "card",
    "zone",
    "mode",
    "fare_cents",
    "trip_km",
    "trip_minutes",
    "transfers",
];

fuzz_target!(|data: &[u8]| {
    match parser().parse(data, &unit_hash) {
        Ok(event) => {
            // A valid event has one value per schema field and finite numbers.
            assert_eq!(event.categories.len(), 2);
            assert_eq!(event.numbers.len(), 4);
            assert!(
                event.numbers.iter().all(|v| v.is_finite()),
                "non-finite number accepted"
            );
        }
        Err(rejection) => {
            assert!(RejectReason::ALL.contains(&rejection.reason));
            if let Some(field) = &rejection.field {
                assert!(
                    FIELDS.contains(&field.as_ref()),
                    "rejection names {field}, not a schema field"
                );
            }
            assert!(!rejection.to_string().is_empty());
        }
    }
});
