//! Fuzz target: the event line parser with the demo schema (scenario.md's Quillhaven feed).
//!
//! Any byte string must be either a valid event or a rejection with a known reason; nothing
//! may panic, and a rejection must never carry line content (only schema field names).
//! Run: `cargo fuzz run -s none parse_line fuzz/corpus/parse_line` (README, "Hardening figures").
#![no_main]

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::RejectReason;

#[path = "common/demo_parser.rs"]
mod demo_parser;
use demo_parser::{parser, unit_hash};

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
