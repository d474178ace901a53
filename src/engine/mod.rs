//! The pure core: parsing, windows, contribution bounding, aggregation, continual-release
//! mechanisms, noise, budget accounting and release planning.
//!
//! Architecture invariant: nothing under `engine` reads the OS clock, the OS random number
//! generator, files or sockets. Time arrives as [`time::Millis`] arguments and randomness
//! is derived from a [`noise::NoiseKey`] handed in by the caller.

pub mod accounting;
pub mod bound;
pub mod contribution;
pub mod core;
pub mod dd;
pub mod event;
pub mod ledger;
pub mod linear;
pub mod mechanism;
pub mod noise;
pub mod plan;
pub mod release;
pub mod time;

pub use self::core::{Counters, Engine, EngineError, EngineOptions};
