//! Report writers: JSON, CSV, text tables, WAV listening files and generated demo audio.

pub mod csv;
pub mod demo_audio;
pub mod json;
pub mod table;
pub mod wav;
