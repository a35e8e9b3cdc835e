//! Report writers: JSON, CSV, text tables.

pub mod csv;
pub mod json;
pub mod table;
