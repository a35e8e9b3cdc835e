//! Studies built on many runs of one scenario: parameter sweeps and the frequency-limit finder.

pub mod limit;
pub mod sweep;
