//! Studies made of many runs of one scenario: Monte-Carlo, and the row files that let a study be split over
//! machines (shards) and merged.

pub mod montecarlo;
pub mod shard;
