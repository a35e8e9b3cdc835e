//! Meters: spectra, dynamic metrics, sine fits, latency and static tests. Pure functions of records;
//! nothing here knows about TOML or files.

pub mod audio;
pub mod chain;
pub mod coherent;
pub mod delay;
pub mod fidelity;
pub mod imd;
pub mod latency;
pub mod metrics;
pub mod paths;
pub mod sine_record;
pub mod sinefit;
pub mod spectrum;
pub mod static_test;
pub mod step;
pub mod window;
