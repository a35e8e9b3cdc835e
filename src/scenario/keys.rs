//! The keys of `[simulation]`, `[source]` and `[analysis]` with their dimensions, beside the stage kinds' own
//! parameter lists: one place from which the spread check, the overrides' whole-number rule and the sweep's
//! value parser all read.

use crate::format::units::Dimension;
use crate::stages::kind::{Param, ParamKind};
use crate::stages::registry::KIND_PARAMS;

/// Numeric keys of the sections, by section.
pub const SECTION_PARAMS: &[(&str, Param)] = {
    use Dimension as D;
    &[
        ("simulation", Param::spread("analog_rate", D::Frequency)),
        ("simulation", Param::spread("duration", D::Time)),
        ("simulation", Param::spread("settle", D::Time)),
        ("simulation", Param::fixed("seed", ParamKind::Integer)),
        ("source", Param::spread("frequency", D::Frequency)),
        ("source", Param::spread("amplitude", D::Voltage)),
        ("source", Param::spread("offset", D::Voltage)),
        (
            "source",
            Param::fixed("phase", ParamKind::Quantity(D::Angle)),
        ),
        ("source", Param::spread("duty", D::Ratio)),
        ("source", Param::spread("start", D::Frequency)),
        ("source", Param::spread("stop", D::Frequency)),
        ("source", Param::spread("sweep_time", D::Time)),
        ("source", Param::spread("at", D::Time)),
        ("source", Param::spread("rms", D::Voltage)),
        ("source", Param::spread("bandwidth", D::Frequency)),
        ("source", Param::spread("beat", D::Time)),
        ("source", Param::spread("full_scale", D::Voltage)),
        ("source", Param::fixed("channel", ParamKind::Integer)),
        ("analysis", Param::spread("band", D::Frequency)),
        ("analysis", Param::fixed("harmonics", ParamKind::Integer)),
        (
            "analysis",
            Param::fixed("settling_band", ParamKind::Quantity(D::Ratio)),
        ),
        (
            "analysis",
            Param::fixed("latency_blocks", ParamKind::Integer),
        ),
    ]
};

/// Every numeric key of the sections and of every stage kind.
fn all_params() -> impl Iterator<Item = &'static Param> {
    SECTION_PARAMS
        .iter()
        .map(|(_, p)| p)
        .chain(KIND_PARAMS.iter().flat_map(|(_, ps)| ps.iter()))
}

/// The parameters of a section (`simulation`, `source`, `analysis`) or of a stage kind.
pub fn params_of(section_or_kind: &str) -> Vec<Param> {
    match crate::stages::registry::params_of(section_or_kind) {
        Some(ps) => ps.to_vec(),
        None => SECTION_PARAMS
            .iter()
            .filter(|(s, _)| *s == section_or_kind)
            .map(|(_, p)| *p)
            .collect(),
    }
}

/// The dimension of a quantity key, from its name (the last part of a path, e.g. `slew_rate` in
/// `stage.3.slew_rate`). A key name has one dimension wherever it appears (a test checks it). `None`: a plain
/// or whole number, or not a quantity.
pub fn quantity_dimension(key: &str) -> Option<Dimension> {
    let last = key.rsplit('.').next().unwrap_or(key);
    all_params().find_map(|p| match p.kind {
        ParamKind::Quantity(d) if p.key == last => Some(d),
        _ => None,
    })
}

/// Whether the key (the last part of a path) takes a whole number.
pub fn is_integer_key(key: &str) -> bool {
    let last = key.rsplit('.').next().unwrap_or(key);
    all_params().any(|p| p.key == last && p.is_integer())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_key_name_has_one_meaning_across_sections_and_kinds() {
        let all: Vec<&Param> = all_params().collect();
        for (i, a) in all.iter().enumerate() {
            for b in &all[..i] {
                if a.key == b.key {
                    assert_eq!(a.kind, b.kind, "`{}` is read two ways", a.key);
                }
            }
        }
    }

    #[test]
    fn dimensions_and_whole_numbers_come_from_the_lists() {
        assert_eq!(
            quantity_dimension("stage.3.slew_rate"),
            Some(Dimension::SlewRate)
        );
        assert_eq!(
            quantity_dimension("stage.2.dither_lsb"),
            Some(Dimension::Ratio)
        );
        assert_eq!(quantity_dimension("source.phase"), Some(Dimension::Angle));
        assert_eq!(quantity_dimension("stage.2.bits"), None);
        assert!(is_integer_key("stage.2.bits"));
        assert!(is_integer_key("simulation.seed"));
        assert!(!is_integer_key("stage.2.cutoff"));
    }
}
