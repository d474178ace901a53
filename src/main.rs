//! The `scrim` binary: parses the command line, runs a command from [`scrim::app`], and
//! maps its error to the exit code of the contract (0 ok, 1 other, 2 bad config or
//! arguments, 3 budget cannot cover the plan).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};
use scrim::app::{self, AppError, KeySource};

#[derive(Parser)]
#[command(
    name = "scrim",
    version,
    about = "Differentially private continual releases from event feeds"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Generate the invented Quillhaven feed, run it through the pipeline and print a summary.
    Demo {
        /// Reproducible noise (and feed) from this seed; releases are marked `seeded`.
        #[arg(long)]
        seed: Option<u64>,
        /// Where to leave feed.jsonl and releases.jsonl.
        #[arg(long, default_value = "scrim-demo-out")]
        out: PathBuf,
        /// Days of feed to generate.
        #[arg(long, default_value_t = 7)]
        days: u32,
        /// After the run, serve the dashboard and HTTP API until Ctrl-C.
        #[arg(long)]
        serve: bool,
        /// Address for --serve.
        #[arg(long, default_value = "127.0.0.1:9650")]
        listen: std::net::SocketAddr,
    },
    /// Process a JSON-lines file (or `-` for stdin) by event time and write releases.
    Replay {
        /// Configuration file (TOML).
        #[arg(long)]
        config: PathBuf,
        /// Output directory (overrides output.dir).
        #[arg(long)]
        out: Option<PathBuf>,
        /// State directory (overrides state.dir).
        #[arg(long)]
        state: Option<PathBuf>,
        /// Reproducible noise from this seed; releases are marked `seeded`.
        #[arg(long)]
        seed: Option<u64>,
        /// Threads that parse lines and share each window close (the engine runs on one
        /// of them); the releases are the same for any number. Not used with --state.
        #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..=256))]
        threads: u16,
        /// Input file, or `-` for standard input.
        input: String,
    },
    /// The live daemon: sources, release scheduler, HTTP, metrics. SIGTERM/SIGINT drain and exit 0.
    Run {
        /// Configuration file (TOML).
        #[arg(long)]
        config: PathBuf,
        /// Reproducible noise from this seed. Refused unless --insecure-seed is also given:
        /// seeded noise is predictable and gives no privacy.
        #[arg(long)]
        seed: Option<u64>,
        /// Accept --seed in `run` (tests only; every release is marked `seeded`).
        #[arg(long)]
        insecure_seed: bool,
    },
    /// Inspect the state directory, or start a fresh epoch deliberately (to change the
    /// configuration mid-deployment).
    State {
        #[command(subcommand)]
        command: StateCommand,
    },
    /// Show the budget plan and the expected errors before any data.
    ///
    /// Per statistic and scope: std_error and 95% half-width, the bounds that drive the
    /// error; for the deployment: rho and (epsilon, delta), epochs allowed and when the
    /// lifetime budget runs out. `--what-if` compares against a changed configuration.
    Plan {
        /// Configuration file (TOML).
        #[arg(long)]
        config: PathBuf,
        /// Machine-readable output (JSON Schema: ops/plan.schema.json).
        #[arg(long)]
        json: bool,
        /// Compare with the configuration changed by KEY=VALUE (repeatable). VALUE is a
        /// literal (`privacy.max_windows_per_epoch=12`, `stats.fare_revenue.range=[0,450]`,
        /// `window.length=30m`, `mechanism=independent`) or `xF` to scale the configured
        /// value (`rho_per_epoch=x2`, `stats.fare_revenue.range=x0.5`). Keys:
        /// privacy.{rho_per_epoch, lifetime_rho, delta, epoch_windows, max_events_per_window,
        /// max_windows_per_epoch, mechanism} (the `privacy.` prefix may be left out),
        /// window.length, stats.NAME.weight, stats.NAME.range (sum and mean).
        #[arg(long = "what-if", value_name = "KEY=VALUE")]
        what_if: Vec<String>,
        /// Give std_errors for the record released when this window of the epoch closes
        /// (0-based, as the records' `leaf`); default: the epoch's last window.
        #[arg(long, value_name = "LEAF")]
        leaf: Option<u32>,
        /// When the deployment starts (RFC 3339), for the date its lifetime budget runs
        /// out; default: now.
        #[arg(long, value_name = "TIME", value_parser = parse_start)]
        start: Option<scrim::engine::time::Millis>,
    },
}

#[derive(Subcommand)]
enum StateCommand {
    /// Print what the state directory holds: format, pinned config fingerprint,
    /// generation and the ledger of fresh epochs. Reads only; never prints the key.
    Show {
        /// State directory.
        #[arg(long)]
        state: PathBuf,
        /// Machine-readable output.
        #[arg(long)]
        json: bool,
    },
    /// Abandon the current epoch and start a new one under --config (which may change
    /// bounds, budget or mechanism). The abandoned epoch's charge stays spent, the new
    /// epoch starts after the last closed window, seq continues, and the lifetime spend
    /// carries over (exit 3, nothing changed, if the new epoch does not fit in
    /// lifetime_rho). Stop `scrim run` first. Deletes the previous log of raw lines.
    NewEpoch {
        /// The configuration the new epoch runs under (TOML).
        #[arg(long)]
        config: PathBuf,
        /// State directory (default: state.dir of --config).
        #[arg(long)]
        state: Option<PathBuf>,
        /// Output directory holding releases.jsonl (default: output.dir of --config).
        #[arg(long)]
        out: Option<PathBuf>,
        /// The configuration the state runs under now; needed only for state directories
        /// created by an older scrim, which did not store it.
        #[arg(long)]
        previous_config: Option<PathBuf>,
        /// Why the epoch is cut short; recorded in the state's ledger.
        #[arg(long)]
        reason: String,
        /// Start the new epoch at this RFC 3339 time instead of right after the last closed
        /// window (never earlier); events before it are counted late.
        #[arg(long)]
        start: Option<String>,
        /// The seed the state was created with (seeded test states only).
        #[arg(long)]
        seed: Option<u64>,
    },
}

/// `--start`: an RFC 3339 time.
fn parse_start(s: &str) -> Result<scrim::engine::time::Millis, String> {
    scrim::engine::time::Millis::parse_rfc3339(s)
        .ok_or_else(|| format!("`{s}` is not an RFC 3339 time, e.g. 2026-03-02T00:00:00Z"))
}

fn key_source(seed: Option<u64>) -> KeySource {
    seed.map_or(KeySource::Os, KeySource::Seed)
}

fn run(cli: Cli) -> Result<(), AppError> {
    match cli.command {
        Command::Demo {
            seed,
            out,
            days,
            serve,
            listen,
        } => {
            let args = app::DemoArgs {
                key: key_source(seed),
                out,
                days,
                serve: serve.then_some(listen),
            };
            app::demo(&args, &mut std::io::stdout().lock())?;
            Ok(())
        }
        Command::Replay {
            config,
            out,
            state,
            seed,
            threads,
            input,
        } => {
            let s = app::replay(
                &config,
                out.as_deref(),
                state.as_deref(),
                key_source(seed),
                &input,
                usize::from(threads),
            )?;
            eprintln!(
                "scrim replay: {} lines, {} accepted, {} rejected, {} late, {} releases -> {}",
                s.lines,
                s.counters.accepted,
                s.counters.rejected_total(),
                s.counters.late,
                s.releases,
                s.output.display()
            );
            if let Some((n_units, n_bytes)) = s.unit_table {
                eprintln!(
                    "scrim replay: unit table: {n_units} units, {} bytes/unit",
                    if n_units == 0 {
                        0
                    } else {
                        n_bytes.div_ceil(n_units)
                    }
                );
            }
            match s.halted {
                Some(reason) => Err(AppError::Budget(reason)),
                None => Ok(()),
            }
        }
        Command::Run {
            config,
            seed,
            insecure_seed,
        } => {
            let key = match (seed, insecure_seed) {
                (Some(_), false) => {
                    return Err(AppError::Usage(
                        "--seed makes the noise predictable and is refused by `run`; add --insecure-seed only for tests".to_string(),
                    ));
                }
                (Some(s), true) => {
                    eprintln!(
                        "scrim: WARNING: --insecure-seed: noise is reproducible and releases are NOT private"
                    );
                    KeySource::Seed(s)
                }
                (None, _) => KeySource::Os,
            };
            let config = scrim::config::Config::load(&config)?;
            app::run_daemon(config, key)
        }
        Command::State {
            command: StateCommand::Show { state, json },
        } => app::state_show(&state, json, &mut std::io::stdout().lock()),
        Command::State {
            command:
                StateCommand::NewEpoch {
                    config,
                    state,
                    out,
                    previous_config,
                    reason,
                    start,
                    seed,
                },
        } => {
            let args = app::NewEpochArgs {
                config,
                state,
                out,
                previous_config,
                reason,
                start,
                key: key_source(seed),
            };
            app::state_new_epoch(&args, &mut std::io::stdout().lock())?;
            Ok(())
        }
        Command::Plan {
            config,
            json,
            what_if,
            leaf,
            start,
        } => {
            let args = app::PlanArgs {
                json,
                what_if,
                leaf,
                start,
            };
            let (report, fits) = app::plan_command(&config, &args)?;
            print!("{report}");
            if fits {
                Ok(())
            } else {
                Err(AppError::Budget(
                    "the lifetime budget cannot cover one epoch".to_string(),
                ))
            }
        }
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    // Structured logs: human-readable on a terminal, JSON lines otherwise (journald, files).
    // Log events carry counts and reasons only, never event contents or unit ids.
    let filter =
        || tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into());
    if std::io::IsTerminal::is_terminal(&std::io::stderr()) {
        tracing_subscriber::fmt()
            .with_writer(std::io::stderr)
            .with_env_filter(filter())
            .init();
    } else {
        tracing_subscriber::fmt()
            .json()
            .with_writer(std::io::stderr)
            .with_env_filter(filter())
            .init();
    }
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("scrim: {e}");
            ExitCode::from(e.exit_code() as u8)
        }
    }
}
