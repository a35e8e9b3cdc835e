//! Report writers: JSON, CSV, NumPy .npy, text tables, plots (PNG and SVG), WAV listening files and generated demo audio,
//! and the output folder they go into.

pub mod csv;
pub mod demo_audio;
pub mod document;
pub mod figures;
pub mod json;
pub mod npy;
pub mod outdir;
pub mod plot;
pub mod table;
pub mod wav;
pub mod waveforms;

pub use outdir::{MARKER, OutputDir, Producer};
