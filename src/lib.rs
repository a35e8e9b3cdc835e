//! convchain: time-domain simulation of analog -> ADC -> digital -> DAC -> analog chains,
//! measured the way a bench measures them.
//!
//! The library is organised by concern:
//! - [`scenario`]: the TOML scenario format, SI-unit parsing and validation into a checked [`scenario::Scenario`];
//! - [`stages`]: one file per stage kind (sources, filters, sample-and-hold, SAR ADC, link, DAC, amplifier);
//! - [`engine`]: the streaming pipeline that runs a scenario on a uniform analog grid, in blocks;
//! - [`measure`]: spectra, dynamic metrics, sine fits, latency, static tests;
//! - [`report`]: JSON, CSV and text output.
//!
//! Units are explicit in names: `_s` seconds, `_hz` hertz, `_v` volts, `_db` decibels.

pub mod engine;
pub mod error;
pub mod measure;
pub mod report;
pub mod scenario;
pub mod stages;

pub use error::Error;
