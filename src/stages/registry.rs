//! The registry: the macro that turns the one list of stage kinds (in `stages/mod.rs`) into each kind's module,
//! the closed [`StageKind`] enum, the kind names, parameter look-up and one exhaustive dispatch per
//! [`KindSpec`] method, and the look-ups built on them. Adding a kind is its own file and one line in that list.
//!
//! [`KindSpec`]: crate::stages::kind::KindSpec

use crate::stages::kind::Param;
pub use crate::stages::{KIND_EXAMPLES, KIND_NAMES, KIND_PARAMS, StageKind};

/// `module => Variant(ConfigType)` for each kind: declares `pub mod module;` and generates the registry from the
/// list.
macro_rules! stage_kinds {
    ($($module:ident => $variant:ident($cfg:ident)),+ $(,)?) => {
        $(pub mod $module;)+
        $crate::stages::registry::stage_kinds!(@types $($variant($module::$cfg)),+);
    };
    (@types $($variant:ident($($path:ident)::+)),+) => {
        /// A stage's resolved configuration, by kind.
        #[derive(Debug, Clone, PartialEq)]
        pub enum StageKind {
            $($variant($crate::stages::$($path)::+),)+
        }

        /// Every kind's name, in registry order.
        pub const KIND_NAMES: &[&str] = &[$(<$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::NAME,)+];

        /// Every kind's name with its parameters, in registry order.
        pub const KIND_PARAMS: &[(&str, &[$crate::stages::kind::Param])] = &[$((
            <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::NAME,
            <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::PARAMS,
        ),)+];

        /// Every kind's name with its example table body ([`$crate::stages::kind::KindSpec::EXAMPLE`]), in registry order.
        pub const KIND_EXAMPLES: &[(&str, $crate::stages::kind::Role, &str)] = &[$((
            <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::NAME,
            <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::ROLE,
            <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::EXAMPLE,
        ),)+];

        impl StageKind {
            /// Read a stage table of kind `name`; `None` for a name no kind has.
            pub fn read(
                name: &str,
                r: &mut $crate::format::reader::TableReader<'_, '_>,
                ctx: &$crate::stages::kind::ReadContext,
            ) -> Option<std::result::Result<StageKind, $crate::format::reader::ScenarioError>> {
                $(if name == <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::NAME {
                    return Some(<$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::read(r, ctx).map(StageKind::$variant));
                })+
                None
            }

            /// The kind as written in a scenario file.
            pub fn kind_name(&self) -> &'static str {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::NAME,)+
                }
            }

            pub fn role(&self) -> $crate::stages::kind::Role {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::ROLE,)+
                }
            }

            pub fn params(&self) -> &'static [$crate::stages::kind::Param] {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::PARAMS,)+
                }
            }

            pub fn resolve(&mut self, up: &mut $crate::stages::kind::Upstream) {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::resolve(c, up),)+
                }
            }

            /// Tell `up` what this (resolved) stage hands to the stages after it, as [`resolve`](Self::resolve)
            /// does, without changing the stage.
            pub fn pass_on(&self, up: &mut $crate::stages::kind::Upstream) {
                self.clone().resolve(up);
            }

            pub fn ablations(&self) -> Vec<$crate::stages::kind::Ablation> {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::ablations(c),)+
                }
            }

            pub fn rates(&self) -> $crate::stages::kind::Rates {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::rates(c),)+
                }
            }

            pub fn passband_gain(&self, up: &$crate::stages::kind::Upstream) -> f64 {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::passband_gain(c, up),)+
                }
            }

            pub fn quantizer_timing(&self) -> Option<$crate::stages::kind::QuantizerTiming> {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::quantizer_timing(c),)+
                }
            }

            pub fn transport_s(&self, sample_rate_hz: f64) -> f64 {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::transport_s(c, sample_rate_hz),)+
                }
            }

            pub fn has_static_levels(&self) -> bool {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::has_static_levels(c),)+
                }
            }

            pub fn echo(&self) -> serde_json::Value {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::echo(c),)+
                }
            }

            pub fn build(&self, ctx: &mut $crate::stages::kind::BuildContext) -> $crate::error::Result<$crate::stages::kind::Runtime> {
                match self {
                    $(StageKind::$variant(c) => <$crate::stages::$($path)::+ as $crate::stages::kind::KindSpec>::build(c, ctx),)+
                }
            }
        }
    };
}

pub(crate) use stage_kinds;

/// The parameters of the kind named `name`.
pub fn params_of(name: &str) -> Option<&'static [Param]> {
    KIND_PARAMS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|(_, p)| *p)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kind_names_are_unique_and_every_kind_has_parameters_listed_once() {
        for (i, (name, params)) in KIND_PARAMS.iter().enumerate() {
            assert!(
                KIND_PARAMS[..i].iter().all(|(n, _)| n != name),
                "{name} twice"
            );
            for (j, p) in params.iter().enumerate() {
                assert!(
                    params[..j].iter().all(|q| q.key != p.key),
                    "{name}.{} twice",
                    p.key
                );
                assert!(
                    !(p.spread && p.is_integer()),
                    "{name}.{}: a whole-numbered key cannot carry a spread",
                    p.key
                );
                assert!(
                    !p.key.is_empty() && p.key != "kind" && p.key != "name",
                    "{name}: reserved key"
                );
            }
        }
        assert_eq!(KIND_NAMES.len(), KIND_PARAMS.len());
    }
}
