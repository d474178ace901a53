//! Differential fuzz target: `LineParser::parse` (the hand-written fast path with its
//! serde_json fallback) must give exactly the result of `LineParser::parse_serde` (serde_json
//! alone, the reference) on any byte string, with the demo schema (scenario.md's Quillhaven
//! feed): the same event with numbers equal bit for bit (`to_bits`, so -0.0 is not 0.0), or
//! the same rejection (reason and field).
//! Run: `cargo fuzz run -s none parse_diff fuzz/corpus/parse_line` (the parse_line corpus is a
//! good seed).
#![no_main]

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::Event;

#[path = "common/demo_parser.rs"]
mod demo_parser;
use demo_parser::{parser, unit_hash};

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
