//! Fuzz target: the config loader, and the planner and engine set-up behind it.
//!
//! Any text must either load into a `Config` that the planner and the engine accept or
//! refuse with an error, or be refused with a `ConfigError` whose message is not empty;
//! nothing may panic.
//! Run: `cargo fuzz run -s none config fuzz/corpus/config` (README, "Hardening figures").
#![no_main]

use libfuzzer_sys::fuzz_target;
use scrim::config::Config;
use scrim::engine::noise::NoiseKey;
use scrim::engine::{Engine, EngineOptions};

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    match Config::from_toml_str(text) {
        Ok(config) => {
            // Planning and engine construction must not panic for any accepted config;
            // refusing (e.g. a grid that would overflow) is fine.
            let _ = Engine::new(&config, NoiseKey::from_seed(0), EngineOptions::default());
        }
        Err(e) => assert!(!e.to_string().is_empty(), "empty config error"),
    }
});
