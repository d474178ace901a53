//! Differential fuzz target: `LineParser::parse` (the hand-written fast path with its
//! serde_json fallback) must give exactly the result of `LineParser::parse_serde` (serde_json
//! alone, the reference) on any byte string, with the demo schema (scenario.md's Quillhaven
//! feed): the same event with numbers equal bit for bit (`to_bits`, so -0.0 is not 0.0), or
//! the same rejection (reason and field).
//! Run: `cargo fuzz run -s none parse_diff fuzz/corpus/parse_line` (the parse_line corpus is a
//! good seed).
#![no_main]

use libfuzzer_sys::fuzz_target;
use scrim::engine::event::same_parse_result;

#[path = "common/demo_parser.rs"]
mod demo_parser;
use demo_parser::{parser, unit_hash};

fuzz_target!(|data: &[u8]| {
    let fast = parser().parse(data, &unit_hash);
    let reference = parser().parse_serde(data, &unit_hash);
    assert!(
        same_parse_result(&fast, &reference),
        "parse {fast:?} but parse_serde {reference:?} on {:?}",
        String::from_utf8_lossy(data)
    );
});
