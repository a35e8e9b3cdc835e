//! Studies built on many runs of one scenario: parameter sweeps, the frequency-limit finder, Monte-Carlo, and
//! the row files that let a study be split over machines (shards) and merged.

pub mod array_job;
pub mod limit;
pub mod montecarlo;
pub mod need;
pub mod shard;
pub mod sweep;

/// Every kind of study that writes row files, for `merge`.
pub const STUDIES: &[shard::StudyKind] = &[sweep::STUDY, montecarlo::STUDY];
