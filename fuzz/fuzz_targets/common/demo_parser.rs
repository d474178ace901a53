//! What the parser fuzz targets share: the demo schema's parser and a stand-in unit hash.
//! Included with `#[path]` by `parse_line.rs` and `parse_diff.rs`.

use std::sync::OnceLock;

use scrim::engine::event::{LineParser, Schema};

/// The demo schema of config/demo.toml: zone and mode categories, four numeric fields.
pub fn parser() -> &'static LineParser {
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
pub fn unit_hash(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
        (h ^ u64::from(*b)).wrapping_mul(0x0100_0000_01b3)
    })
}
