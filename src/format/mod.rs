//! The scenario file's primitives, below every other module: SI quantities with their dimensions
//! ([`units`]) and the spanned TOML reader that locates every value for error messages ([`reader`]).
//! Stage kinds read their own tables with these; [`crate::scenario`] assembles the whole file.

pub mod reader;
pub mod sci;
pub mod units;
