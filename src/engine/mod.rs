//! The streaming pipeline: runs a checked scenario on a uniform analog grid, in blocks.

pub mod audio;
pub mod clock;
pub mod decimate;
pub mod pipeline;
pub mod plan;
pub mod probe;
pub mod static_bench;
