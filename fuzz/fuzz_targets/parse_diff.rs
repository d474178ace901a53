//! Differential fuzz target: `LineParser::parse` (the hand-written fast path with its
//! serde_json fallback) must give exactly the result of `LineParser::parse_serde` (serde_json
//! alone, the reference) on any byte string, with the demo schema (scenario.md's Quillhaven
//! feed): the same event with numbers equal bit for bit (`to_bits`, so -0.0 is not 0.0), or
//! the same rejection (reason and field). So must `LineParser::parse_with_shape`, with a
//! shape learned from the demo layout and with the shape of the input itself (learned by a
//! first parse of it).
//! Run: `cargo fuzz run -s none parse_diff fuzz/corpus/parse_line` (the parse_line corpus is a
//! good seed).
#![no_main]

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::{LineShape, same_parse_result};

#[path = "common/demo_parser.rs"]
mod demo_parser;
use demo_parser::{parser, unit_hash};

/// A line of the demo layout (scenario.md's example event).
const DEMO_LINE: &str = r#"{"ts":"2026-03-02T08:14:07Z","card":"c-7f3a91","mode":"tram","zone":"harbour","fare_cents":240,"trip_km":3.8,"trip_minutes":14.5,"transfers":0}"#;

fuzz_target!(|data: &[u8]| {
    let fast = parser().parse(data, &unit_hash);
    let reference = parser().parse_serde(data, &unit_hash);
    assert!(
        same_parse_result(&fast, &reference),
        "parse {fast:?} but parse_serde {reference:?} on {:?}",
        String::from_utf8_lossy(data)
    );
    let mut demo = LineShape::new();
    parser()
        .parse_with_shape(DEMO_LINE.as_bytes(), &unit_hash, &mut demo)
        .expect("the demo line is valid");
    let mut shapes = [demo, LineShape::new()];
    for i in [0, 1, 1] {
        let shaped = parser().parse_with_shape(data, &unit_hash, &mut shapes[i]);
        assert!(
            same_parse_result(&shaped, &reference),
            "parse_with_shape {shaped:?} but parse_serde {reference:?} on {:?}",
            String::from_utf8_lossy(data)
        );
    }
});
