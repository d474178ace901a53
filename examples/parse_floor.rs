//! The throughput floor of issue 9: reads a feed file and deserialises every line with
//! serde_json into scrim's event representation ([`scrim::engine::event::Event`]) through
//! [`LineParser::parse_serde`] (the serde_json reference path of scrim's own parser, built
//! from the demo configuration's schema), on one thread, and does nothing else. The floor
//! stays "serde_json into scrim's Event" even though `scrim replay` parses with the faster
//! [`LineParser::parse`] (a hand-written fast path with the same results), so replay may
//! now beat the floor; the ratio of the two is still the cost of everything after parsing
//! measured against a serde_json reader.
//!
//! Run: `cargo run --release --example parse_floor -- FEED [--fast [--no-shape]] [--keyed-hash]`
//!
//! `--fast` parses with [`LineParser::parse_with_shape`] instead (what `scrim replay` does:
//! the fast path, and lines laid out like the ones before them read along their learned
//! [`LineShape`](scrim::engine::event::LineShape)), so the two rates can be printed side by
//! side. `--no-shape` makes it [`LineParser::parse`] (the fast path alone). Each line is
//! handed over as bytes and checked for UTF-8 on its own; `scrim replay` checks whole
//! chunks at once and hands their lines over as text
//! ([`RawLine::Text`](scrim::engine::event::RawLine)), which is a little cheaper.
//!
//! The parser needs a function that maps a raw unit id to a `u64`. By default the floor
//! uses 64-bit FNV-1a (a few cycles per byte, not keyed), because the keyed hash scrim
//! applies (SipHash-2-4, or BLAKE3 in older states) is privacy work, not deserialisation,
//! and belongs to scrim's side of the ratio. `--keyed-hash` parses through
//! [`scrim::engine::core::LineDecoder`] instead (scrim's keyed hash, exactly as `scrim
//! replay`; `--fast` is implied), which shows how much of scrim's time the unit hash takes.
//!
//! Output (stdout, one line):
//! `lines=N ok=N rejected=N seconds=S lines_per_s=R hash=fnv1a|keyed parser=serde|fast|shape`.

use std::io::{BufRead, BufReader};
use std::process::ExitCode;

use scrim::config::Config;
#[cfg(doc)]
use scrim::engine::event::LineParser;
use scrim::engine::event::{Event, LineShape, Rejection};
use scrim::engine::noise::NoiseKey;
use scrim::engine::{Engine, EngineOptions};

/// 64-bit FNV-1a (Fowler, Noll, Vo; offset basis and prime from the published parameters).
fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h = 0xcbf2_9ce4_8422_2325u64;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Folds an event into a checksum so the optimiser cannot drop the parse.
fn fold(acc: u64, ev: &Event) -> u64 {
    let mut acc = acc ^ ev.time.0 as u64 ^ ev.unit.unwrap_or(0);
    for c in &ev.categories {
        acc = acc.rotate_left(5) ^ u64::from(*c);
    }
    for x in &ev.numbers {
        acc = acc.rotate_left(7) ^ x.to_bits();
    }
    acc
}

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let keyed = args.iter().any(|a| a == "--keyed-hash");
    let fast = keyed || args.iter().any(|a| a == "--fast");
    let shaped = fast && !args.iter().any(|a| a == "--no-shape");
    let mut shape = LineShape::new();
    let Some(path) = args.iter().find(|a| !a.starts_with("--")) else {
        eprintln!("usage: parse_floor FEED [--fast [--no-shape]] [--keyed-hash]");
        return ExitCode::from(2);
    };
    // The demo configuration is the one the benchmark replays; the engine builds the parser
    // from it exactly as `scrim replay` does. Its noise key is irrelevant without --keyed-hash.
    let engine = Config::from_toml_str(scrim::app::DEMO_CONFIG)
        .map_err(|e| e.to_string())
        .and_then(|c| {
            Engine::new(&c, NoiseKey::from_seed(1), EngineOptions::default())
                .map_err(|e| e.to_string())
        });
    let engine = match engine {
        Ok(e) => e,
        Err(msg) => {
            eprintln!("parse_floor: demo configuration: {msg}");
            return ExitCode::from(2);
        }
    };
    let decoder = engine.line_decoder();
    let file = match std::fs::File::open(path) {
        Ok(f) => f,
        Err(e) => {
            eprintln!("parse_floor: opening {path}: {e}");
            return ExitCode::from(1);
        }
    };
    let started = std::time::Instant::now();
    // The same reading loop as `scrim::app::pump` (1 MiB buffer, one reused line buffer).
    let mut reader = BufReader::with_capacity(1 << 20, file);
    let mut line = Vec::with_capacity(4096);
    let (mut n_lines, mut n_ok, mut checksum) = (0u64, 0u64, 0u64);
    loop {
        line.clear();
        match reader.read_until(b'\n', &mut line) {
            Ok(0) => break,
            Ok(_) => {}
            Err(e) => {
                eprintln!("parse_floor: reading {path}: {e}");
                return ExitCode::from(1);
            }
        }
        n_lines += 1;
        let mut body: &[u8] = &line;
        if let Some(b) = body.strip_suffix(b"\n") {
            body = b;
        }
        if let Some(b) = body.strip_suffix(b"\r") {
            body = b;
        }
        let parsed: Result<Event, Rejection> = if keyed && shaped {
            decoder.decode_with(body, &mut shape)
        } else if keyed {
            decoder.decode(body)
        } else if shaped {
            decoder
                .parser()
                .parse_with_shape(body, &fnv1a64, &mut shape)
        } else if fast {
            decoder.parser().parse(body, &fnv1a64)
        } else {
            decoder.parser().parse_serde(body, &fnv1a64)
        };
        match parsed {
            Ok(ev) => {
                n_ok += 1;
                checksum = fold(checksum, &ev);
            }
            Err(rej) => checksum ^= rej.reason.index() as u64,
        }
    }
    let seconds = started.elapsed().as_secs_f64();
    std::hint::black_box(checksum);
    println!(
        "lines={n_lines} ok={n_ok} rejected={} seconds={seconds:.3} lines_per_s={:.0} hash={} parser={}",
        n_lines - n_ok,
        n_lines as f64 / seconds,
        if keyed { "keyed" } else { "fnv1a" },
        match (fast, shaped) {
            (true, true) => "shape",
            (true, false) => "fast",
            _ => "serde",
        }
    );
    ExitCode::SUCCESS
}
