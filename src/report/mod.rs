//! Report writers: JSON, CSV, text tables, plots (PNG and SVG).

pub mod csv;
pub mod json;
pub mod plot;
pub mod table;
