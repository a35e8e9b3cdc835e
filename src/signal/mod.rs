//! Signal types and helpers that stages, the engine and the meters share: the stream types (a uniform time
//! grid, analog records, code events and records), the source's waveform description, and the interleaved
//! rotation used by sine sources and one-tone fits. Nothing here depends on another module of the crate.

pub(crate) mod rotation;
pub mod stream;
pub mod waveform;
