//! convchain: time-domain simulation of analog -> ADC -> digital -> DAC -> analog chains,
//! measured the way a bench measures them.
//!
//! The library is organised by concern:
//! - [`scenario`]: the TOML scenario format, SI-unit parsing and validation into a checked [`scenario::Scenario`];
//! - [`signal`]: stream types (time grid, analog and code records) and signal helpers shared by stages, engine
//!   and meters;
//! - [`stages`]: one file per stage kind (sources, filters, sample-and-hold, SAR ADC, link, DAC, amplifier);
//! - [`engine`]: the streaming pipeline that runs a scenario on a uniform analog grid, in blocks;
//! - [`measure`]: spectra, dynamic metrics, sine fits, latency, static tests;
//! - [`report`]: JSON, CSV and text output;
//! - [`capture`]: recordings made outside convchain (WAV, CSV exports) read and measured (`convchain analyze`);
//! - [`runner`]: a whole run, from a checked scenario to files in a folder;
//! - [`study`]: many runs of one scenario: parameter sweeps, the frequency-limit finder, Monte-Carlo, and the
//!   shards and merging that spread a study over machines.
//!
//! Units are explicit in names: `_s` seconds, `_hz` hertz, `_v` volts, `_db` decibels.
//!
//! ```
//! let sc = convchain::scenario::parse_str(convchain::DEFAULT_SCENARIO, "<demo>", std::path::Path::new(".")).unwrap();
//! assert!(!sc.stages.is_empty());
//! ```

pub mod capture;
pub mod engine;
pub mod error;
pub mod format;
pub mod measure;
pub mod report;
pub mod runner;
pub mod scenario;
pub mod signal;
pub mod stages;
pub mod study;
pub mod text;

pub use error::Error;
pub use runner::{RunOptions, run_to_dir, static_to_dir};

/// The scenario `convchain run` uses when none is given (an invented demo: a 16-bit audio interface).
pub const DEFAULT_SCENARIO: &str = include_str!("../scenarios/studio-interface.toml");
