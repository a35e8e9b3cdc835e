//! The `filter` stage kind: its configuration, how its table is read, and what it says about itself. The
//! runtime model (design and realisation on the grid) is [`super::Filter`].

use serde::Serialize;

use crate::error::{Error, Result};
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::{Dimension, format_si};
use super::Filter;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, Rates, ReadContext, Role, Runtime,
};

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum FilterResponse {
    Lowpass,
    Highpass,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FilterFamily {
    Butterworth,
    Bessel,
    /// Type I Chebyshev with the given passband ripple (dB).
    Chebyshev {
        ripple_db: f64,
    },
    /// Cascade of identical first-order RC sections, scaled so the whole has its -3 dB point at the cutoff.
    Rc,
}

/// `kind = "filter"`: a continuous-time filter realised on the analog grid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FilterCfg {
    pub response: FilterResponse,
    pub family: FilterFamily,
    /// 1..=8
    pub order: u32,
    /// -3 dB frequency (butterworth, bessel, rc); passband edge where gain = -ripple (chebyshev).
    pub cutoff_hz: f64,
}

/// The echo in report.json: the family by name, its ripple (null but for Chebyshev).
impl Serialize for FilterCfg {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct;
        let (family, ripple_db) = match self.family {
            FilterFamily::Butterworth => ("butterworth", None),
            FilterFamily::Bessel => ("bessel", None),
            FilterFamily::Chebyshev { ripple_db } => ("chebyshev", Some(ripple_db)),
            FilterFamily::Rc => ("rc", None),
        };
        let mut st = s.serialize_struct("FilterCfg", 5)?;
        st.serialize_field("response", &self.response)?;
        st.serialize_field("family", family)?;
        st.serialize_field("ripple_db", &ripple_db)?;
        st.serialize_field("order", &self.order)?;
        st.serialize_field("cutoff_hz", &self.cutoff_hz)?;
        st.end()
    }
}

impl KindSpec for FilterCfg {
    const NAME: &'static str = "filter";
    const ROLE: Role = Role::Analog;
    const EXAMPLE: &'static str = r#"response = "lowpass"
family = "butterworth"
order = 2
cutoff = "10 kHz""#;
    const PARAMS: &'static [Param] = &[
        Param::fixed("response", ParamKind::Choice(&["lowpass", "highpass"])),
        Param::fixed(
            "family",
            ParamKind::Choice(&["butterworth", "bessel", "chebyshev", "rc"]),
        ),
        Param::fixed("order", ParamKind::Integer),
        Param::spread("cutoff", Dimension::Frequency),
        Param::spread("ripple", Dimension::Decibels),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        use Dimension as D;
        #[derive(Clone, Copy, PartialEq)]
        enum Fam {
            Butterworth,
            Bessel,
            Chebyshev,
            Rc,
        }
        let response = r
            .choice(
                "response",
                &[
                    ("lowpass", FilterResponse::Lowpass),
                    ("highpass", FilterResponse::Highpass),
                ],
            )?
            .map_or(FilterResponse::Lowpass, |q| q.value);
        let fam = r
            .choice(
                "family",
                &[
                    ("butterworth", Fam::Butterworth),
                    ("bessel", Fam::Bessel),
                    ("chebyshev", Fam::Chebyshev),
                    ("rc", Fam::Rc),
                ],
            )?
            .map_or(Fam::Butterworth, |q| q.value);
        let order = r
            .integer("order", 1, 8)?
            .ok_or_else(|| r.missing("order", "4"))?
            .value as u32;
        let cutoff = r.req_positive("cutoff", D::Frequency, "\"20 kHz\"")?;
        let nyquist = ctx.analog_rate_hz / 2.0;
        if cutoff.value >= nyquist {
            return Err(r
            .error(
                &cutoff.span,
                "cutoff",
                format!(
                    "cutoff {} must be below half the analog rate ({})",
                    format_si(cutoff.value, "Hz"),
                    format_si(nyquist, "Hz")
                ),
            )
            .with_hint(format!(
                "lower cutoff, or raise simulation.analog_rate above {} (10x or more is better)",
                format_si(2.0 * cutoff.value, "Hz")
            )));
        }
        let ripple = r.quantity("ripple", D::Decibels)?;
        let family = match (fam, ripple) {
            (Fam::Chebyshev, None) => {
                return Err(r.missing("ripple", "\"0.5 dB\"").with_hint(
                    "a chebyshev filter needs its passband ripple: add ripple = \"0.5 dB\"",
                ));
            }
            (Fam::Chebyshev, Some(q)) if q.value <= 0.0 => {
                return Err(r
                    .error(
                        &q.span,
                        "ripple",
                        format!("must be greater than 0 dB, found {} dB", q.value),
                    )
                    .with_hint(
                        "write the ripple as a positive number of decibels, e.g. \"0.5 dB\"",
                    ));
            }
            (Fam::Chebyshev, Some(q)) => FilterFamily::Chebyshev { ripple_db: q.value },
            (_, Some(q)) => {
                return Err(r
                    .error(
                        &q.span,
                        "ripple",
                        "ripple is only used by family = \"chebyshev\"",
                    )
                    .with_hint("remove ripple, or set family = \"chebyshev\""));
            }
            (Fam::Butterworth, None) => FilterFamily::Butterworth,
            (Fam::Bessel, None) => FilterFamily::Bessel,
            (Fam::Rc, None) => FilterFamily::Rc,
        };
        Ok(FilterCfg {
            response,
            family,
            order,
            cutoff_hz: cutoff.value,
        })
    }

    /// The whole stage removed: a flat path.
    fn ablations(&self) -> Vec<Ablation> {
        vec![Ablation::new(
            Self::NAME.to_string(),
            "filter removed (flat)",
            vec![KeyEdit::RemoveStage],
        )]
    }

    fn rates(&self) -> Rates {
        match self.response {
            FilterResponse::Lowpass => Rates {
                lowpass_hz: Some(self.cutoff_hz),
                highpass_hz: None,
            },
            FilterResponse::Highpass => Rates {
                lowpass_hz: None,
                highpass_hz: Some(self.cutoff_hz),
            },
        }
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let tb = ctx
            .timebase
            .ok_or_else(|| Error::Run("a filter needs the analog grid".into()))?;
        Ok(Runtime::Analog(Box::new(Filter::new(self, tb))))
    }
}
