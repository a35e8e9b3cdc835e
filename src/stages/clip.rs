//! The `clip` stage: an ideal limiter that holds its output between two voltages, as an input protection
//! network or a stage running into its supply does. Memoryless: `y = min(max(x, low), high)`.

use num_complex::Complex64;
use serde::Serialize;

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::{Dimension, format_si};
use crate::stages::AnalogStage;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ReadContext, Role, Runtime,
};

/// `kind = "clip"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ClipCfg {
    /// The output never falls below this (V).
    pub low_v: f64,
    /// The output never rises above this (V).
    pub high_v: f64,
}

impl KindSpec for ClipCfg {
    const NAME: &'static str = "clip";
    const ROLE: Role = Role::Analog;
    const EXAMPLE: &'static str = r#"low = "-0.9 V"
high = "0.95 V""#;
    const PARAMS: &'static [Param] = &[
        Param::spread("low", Dimension::Voltage),
        Param::spread("high", Dimension::Voltage),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        let low = r.req_quantity("low", Dimension::Voltage, "\"-1 V\"")?;
        let high = r.req_quantity("high", Dimension::Voltage, "\"1 V\"")?;
        if low.value >= high.value {
            return Err(r
                .error(
                    &high.span,
                    "high",
                    format!(
                        "high ({}) must be above low ({})",
                        format_si(high.value, "V"),
                        format_si(low.value, "V")
                    ),
                )
                .with_hint("swap the two, or widen the window"));
        }
        Ok(ClipCfg {
            low_v: low.value,
            high_v: high.value,
        })
    }

    fn ablations(&self) -> Vec<Ablation> {
        vec![Ablation::new(
            Self::NAME.to_string(),
            "clip removed",
            vec![KeyEdit::RemoveStage],
        )]
    }

    fn build(&self, _ctx: &mut BuildContext) -> Result<Runtime> {
        Ok(Runtime::Analog(Box::new(Clip { cfg: *self })))
    }
}

/// The limiter on the grid.
#[derive(Debug, Clone)]
pub struct Clip {
    cfg: ClipCfg,
}

impl AnalogStage for Clip {
    fn tick(&mut self, x_v: f64) -> f64 {
        x_v.clamp(self.cfg.low_v, self.cfg.high_v)
    }

    /// Unity inside the window (the small-signal view; clipping is what the meters then see as distortion).
    fn response(&self, _f_hz: f64) -> Option<Complex64> {
        Some(Complex64::new(1.0, 0.0))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_output_stays_in_the_window_and_passes_what_is_inside() {
        let mut c = Clip {
            cfg: ClipCfg {
                low_v: -0.5,
                high_v: 1.0,
            },
        };
        assert_eq!(c.tick(-3.0), -0.5);
        assert_eq!(c.tick(0.25), 0.25);
        assert_eq!(c.tick(7.0), 1.0);
    }
}
