//! Writes a Quillhaven feed ([`scrim::demo::DemoFeed`], fixed seed) to a file, one line per
//! event, for the throughput benchmark (`scripts/bench-replay.sh`) and for profiling.
//!
//! Run: `cargo run --release --example gen_feed -- --out feed.jsonl [--lines N] [--days D]
//! [--cards C] [--seed S]`
//!
//! Defaults: seed 2026, 200,000 cards, 7 days (one epoch of the demo configuration, so a
//! replay with `config/demo.toml` never exhausts the lifetime budget), at most 2,000,000
//! lines. `--lines 0` means "no line cap". The feed keeps its dirt (0.5% bad lines, 0.5%
//! late lines, stuck validators), so the benchmark pays for rejections and bounding too.
//! The generator is pure and seeded, so the same arguments always give the same bytes.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use scrim::demo::{DemoFeed, FeedSpec};

/// What to generate, from the command line.
struct Args {
    out: PathBuf,
    max_lines: u64,
    spec: FeedSpec,
}

fn usage() -> String {
    "usage: gen_feed --out PATH [--lines N (0 = all)] [--days D] [--cards C] [--seed S]".to_string()
}

fn parse_args() -> Result<Args, String> {
    let mut out = None;
    let mut max_lines = 2_000_000u64;
    let mut spec = FeedSpec {
        n_cards: 200_000,
        ..FeedSpec::default()
    };
    let mut args = std::env::args().skip(1);
    while let Some(flag) = args.next() {
        let mut value = || {
            args.next()
                .ok_or_else(|| format!("{flag} needs a value\n{}", usage()))
        };
        let number = |text: String| {
            text.parse::<u64>()
                .map_err(|e| format!("{flag} {text}: {e}"))
        };
        match flag.as_str() {
            "--out" => out = Some(PathBuf::from(value()?)),
            "--lines" => max_lines = number(value()?)?,
            "--days" => {
                spec.days = u32::try_from(number(value()?)?).map_err(|e| format!("--days: {e}"))?
            }
            "--cards" => {
                spec.n_cards =
                    u32::try_from(number(value()?)?).map_err(|e| format!("--cards: {e}"))?
            }
            "--seed" => spec.seed = number(value()?)?,
            _ => return Err(usage()),
        }
    }
    let out = out.ok_or_else(usage)?;
    Ok(Args {
        out,
        max_lines,
        spec,
    })
}

fn run(args: &Args) -> std::io::Result<u64> {
    let file = std::fs::File::create(&args.out)?;
    let mut w = std::io::BufWriter::with_capacity(1 << 20, file);
    let mut feed = DemoFeed::new(&args.spec);
    let mut n_lines = 0u64;
    for line in feed.by_ref() {
        if args.max_lines != 0 && n_lines >= args.max_lines {
            break;
        }
        w.write_all(&line)?;
        w.write_all(b"\n")?;
        n_lines += 1;
    }
    w.flush()?;
    Ok(n_lines)
}

fn main() -> ExitCode {
    let args = match parse_args() {
        Ok(a) => a,
        Err(msg) => {
            eprintln!("{msg}");
            return ExitCode::from(2);
        }
    };
    let started = std::time::Instant::now();
    match run(&args) {
        Ok(n_lines) => {
            let cap_hit = args.max_lines != 0 && n_lines == args.max_lines;
            eprintln!(
                "gen_feed: {n_lines} lines ({} cards, {} days, seed {}{}) -> {} in {:.1} s",
                args.spec.n_cards,
                args.spec.days,
                args.spec.seed,
                if cap_hit { ", line cap reached" } else { "" },
                args.out.display(),
                started.elapsed().as_secs_f64()
            );
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("gen_feed: writing {}: {e}", args.out.display());
            ExitCode::from(1)
        }
    }
}
