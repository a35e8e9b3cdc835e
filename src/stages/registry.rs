//! The registry: every stage kind, listed once. The list generates the closed [`StageKind`] enum, the kind
//! names, parameter look-up and one exhaustive dispatch per [`KindSpec`] method. Adding a kind is its own file
//! and one line here.

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::stages::kind::{
    Ablation, BuildContext, KindSpec, Param, QuantizerTiming, Rates, ReadContext, Role, Runtime,
    Upstream,
};

macro_rules! stage_kinds {
    ($($variant:ident($($path:ident)::+)),+ $(,)?) => {
        /// A stage's resolved configuration, by kind.
        #[derive(Debug, Clone, PartialEq)]
        pub enum StageKind {
            $($variant($crate::stages::$($path)::+),)+
        }

        /// Every kind's name, in registry order.
        pub const KIND_NAMES: &[&str] = &[$(<$crate::stages::$($path)::+ as KindSpec>::NAME,)+];

        /// Every kind's name with its parameters, in registry order.
        pub const KIND_PARAMS: &[(&str, &[Param])] = &[$((
            <$crate::stages::$($path)::+ as KindSpec>::NAME,
            <$crate::stages::$($path)::+ as KindSpec>::PARAMS,
        ),)+];

        impl StageKind {
            /// Read a stage table of kind `name`; `None` for a name no kind has.
            pub fn read(
                name: &str,
                r: &mut TableReader<'_, '_>,
                ctx: &ReadContext,
            ) -> Option<std::result::Result<StageKind, ScenarioError>> {
                $(if name == <$crate::stages::$($path)::+ as KindSpec>::NAME {
                    return Some(<$crate::stages::$($path)::+ as KindSpec>::read(r, ctx).map(StageKind::$variant));
                })+
                None
            }

            /// The kind as written in a scenario file.
            pub fn kind_name(&self) -> &'static str {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as KindSpec>::NAME,)+
                }
            }

            pub fn role(&self) -> Role {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as KindSpec>::ROLE,)+
                }
            }

            pub fn params(&self) -> &'static [Param] {
                match self {
                    $(StageKind::$variant(_) => <$crate::stages::$($path)::+ as KindSpec>::PARAMS,)+
                }
            }

            pub fn resolve(&mut self, up: &mut Upstream) {
                match self {
                    $(StageKind::$variant(c) => c.resolve(up),)+
                }
            }

            pub fn ablations(&self) -> Vec<Ablation> {
                match self {
                    $(StageKind::$variant(c) => c.ablations(),)+
                }
            }

            pub fn rates(&self) -> Rates {
                match self {
                    $(StageKind::$variant(c) => c.rates(),)+
                }
            }

            pub fn passband_gain(&self, up: &Upstream) -> f64 {
                match self {
                    $(StageKind::$variant(c) => c.passband_gain(up),)+
                }
            }

            pub fn quantizer_timing(&self) -> Option<QuantizerTiming> {
                match self {
                    $(StageKind::$variant(c) => c.quantizer_timing(),)+
                }
            }

            pub fn transport_s(&self, sample_rate_hz: f64) -> f64 {
                match self {
                    $(StageKind::$variant(c) => c.transport_s(sample_rate_hz),)+
                }
            }

            pub fn has_static_levels(&self) -> bool {
                match self {
                    $(StageKind::$variant(c) => c.has_static_levels(),)+
                }
            }

            pub fn echo(&self) -> serde_json::Value {
                match self {
                    $(StageKind::$variant(c) => c.echo(),)+
                }
            }

            pub fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
                match self {
                    $(StageKind::$variant(c) => c.build(ctx),)+
                }
            }
        }
    };
}

stage_kinds! {
    SampleHold(sample_hold::SampleHoldCfg),
    SarAdc(sar_adc::SarAdcCfg),
    Link(link::LinkCfg),
    Dac(dac::DacCfg),
    Filter(filter_kind::FilterCfg),
    Amplifier(amplifier::AmplifierCfg),
}

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
