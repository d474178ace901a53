//! scrim turns live event feeds into differentially private continual releases.
//!
//! The crate has two halves. [`engine`] is the pure core: it takes parsed events and
//! clock ticks and returns releases, with no I/O, no wall clock and no global randomness.
//! Everything else (configuration loading, the command line, files, HTTP, metrics) is a
//! thin shell around it. See DEVELOPERS.md for the architecture map.
#![forbid(unsafe_code)]

pub mod app;
pub mod config;
pub mod demo;
pub mod engine;
pub mod output;
pub mod runtime;
