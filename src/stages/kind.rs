//! What a stage kind says about itself: [`KindSpec`].
//!
//! Each kind's file (`sar_adc.rs`, `dac.rs`, ...) holds its configuration type, and implements this trait on it:
//! the name written in scenarios, the role it plays in the chain, its parameters (dimension, whole-numbered or
//! not, whether a Monte-Carlo spread may be put on it), how its table is read, how it fills its defaults from
//! the stages before it, which of its non-idealities the limit finder may remove, the rates it makes
//! interesting, its passband gain, and how its runtime model is built. The registry (`registry.rs`) lists the
//! kinds once and derives every table from these answers.

use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::signal::stream::Timebase;
use crate::stages::AnalogStage;
use crate::stages::roles::{CodeStage, Hold, Quantizer, Reconstructor};

/// The part a stage plays in the chain. The chain grammar is written in roles:
/// `analog* [hold? quantizer code* reconstructor] analog*`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// A continuous-time stage on the analog grid ([`AnalogStage`]).
    Analog,
    /// A sample-and-hold in front of a quantizer ([`Hold`]).
    Hold,
    /// Turns the analog input into codes at sampling instants (an ADC: [`Quantizer`]).
    Quantizer,
    /// Carries codes (a link: [`CodeStage`]).
    Code,
    /// Turns codes back into a voltage on the grid (a DAC: [`Reconstructor`]).
    Reconstructor,
}

/// How a parameter's value is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ParamKind {
    /// A number or an SI quantity string of this dimension (`"1 kHz"`, `"13 V/us"`, `"1%"`).
    Quantity(Dimension),
    /// `[low, high]` of this dimension.
    Pair(Dimension),
    /// A whole number.
    Integer,
    /// A plain number (no unit).
    Number,
    /// One of the listed words.
    Choice(&'static [&'static str]),
    /// `true` or `false`.
    Bool,
    /// Free text.
    Text,
}

/// One key a stage kind reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Param {
    pub key: &'static str,
    pub kind: ParamKind,
    /// A Monte-Carlo `[spread]` may draw this key (continuous values only).
    pub spread: bool,
}

impl Param {
    /// A quantity that may carry a spread.
    pub const fn spread(key: &'static str, dim: Dimension) -> Param {
        Param {
            key,
            kind: ParamKind::Quantity(dim),
            spread: true,
        }
    }
    /// A plain number (no unit) that may carry a spread: a bare spread is in the key's own unit, `%` or `ppm`
    /// a fraction of the written value (a converter's `clock_ppm`, spread by a crystal's tolerance).
    pub const fn spread_number(key: &'static str) -> Param {
        Param {
            key,
            kind: ParamKind::Number,
            spread: true,
        }
    }
    /// A parameter without a spread.
    pub const fn fixed(key: &'static str, kind: ParamKind) -> Param {
        Param {
            key,
            kind,
            spread: false,
        }
    }
    /// The key's dimension, for quantities and pairs.
    pub fn dimension(&self) -> Option<Dimension> {
        match self.kind {
            ParamKind::Quantity(d) | ParamKind::Pair(d) => Some(d),
            _ => None,
        }
    }
    /// The key takes a whole number.
    pub fn is_integer(&self) -> bool {
        self.kind == ParamKind::Integer
    }
}

/// What reading a stage's table may need from the rest of the scenario.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReadContext {
    /// `simulation.analog_rate` (Hz).
    pub analog_rate_hz: f64,
}

/// What the stages before one tell it, for resolving defaults (a DAC takes the width of the codes arriving and
/// the ADC's range unless given). Each kind updates it for the stages after it.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Upstream {
    /// Width of the codes leaving the last digital stage (0 before any).
    pub width_bits: u32,
    /// The quantizer's input range (V).
    pub quantizer_range_v: Option<(f64, f64)>,
    /// The nominal rate of the codes (Hz): the quantizer's, or the last `resample`'s.
    pub sample_rate_hz: Option<f64>,
    /// Offset (ppm) of the clock that paces the codes (the quantizer's `clock_ppm`).
    pub clock_ppm: f64,
    /// The codes are already paced by the DAC's own clock (an asynchronous `resample` produced them).
    pub clock_follows_dac: bool,
}

impl Upstream {
    /// What a converter of the quantizer role tells the stages after it: its word, input range, nominal sample
    /// rate and clock offset.
    pub fn set_quantizer(
        &mut self,
        bits: u32,
        range_v: (f64, f64),
        sample_rate_hz: f64,
        clock_ppm: f64,
    ) {
        self.width_bits = bits;
        self.quantizer_range_v = Some(range_v);
        self.sample_rate_hz = Some(sample_rate_hz);
        self.clock_ppm = clock_ppm;
    }
}

/// A change that removes a non-ideality, relative to the stage's own table.
#[derive(Debug, Clone, PartialEq)]
pub enum KeyEdit {
    /// Set the key to a number (SI base units).
    Set(&'static str, f64),
    /// Set the key to a string (a choice).
    SetStr(&'static str, &'static str),
    /// Remove the key (the default applies).
    Remove(&'static str),
    /// Remove the whole stage.
    RemoveStage,
}

/// One ablation the limit finder may try: a non-ideality of the stage and the edits that make it ideal.
#[derive(Debug, Clone, PartialEq)]
pub struct Ablation {
    /// `kind.key`, e.g. `dac.slew_rate` (or just the kind, e.g. `filter`, when the whole stage goes).
    pub mechanism: String,
    /// What the change does, for tables: `slew_rate removed`.
    pub change: String,
    pub edits: Vec<KeyEdit>,
}

impl Ablation {
    pub fn new(mechanism: String, change: impl Into<String>, edits: Vec<KeyEdit>) -> Ablation {
        Ablation {
            mechanism,
            change: change.into(),
            edits,
        }
    }

    /// One ablation per listed non-ideality that is present (non-zero): the key set to 0.
    pub fn zeroed<K: KindSpec>(keys: &[(&'static str, f64)]) -> Vec<Ablation> {
        keys.iter()
            .filter(|(_, v)| *v > 0.0)
            .map(|&(name, _)| {
                Ablation::new(
                    mechanism::<K>(name),
                    format!("{name} = 0"),
                    vec![KeyEdit::Set(name, 0.0)],
                )
            })
            .collect()
    }

    /// A converter whose latency counts clocks, sampled ten times faster: the same latency in cycles.
    pub fn tenfold_clock<K: KindSpec>(sample_rate_hz: f64) -> Ablation {
        let fs10 = 10.0 * sample_rate_hz;
        Ablation::new(
            mechanism::<K>("sample_rate"),
            format!(
                "sample_rate raised tenfold to {} (same latency in cycles)",
                crate::format::units::format_si(fs10, "Hz")
            ),
            vec![KeyEdit::Set("sample_rate", fs10)],
        )
    }
}

/// What the engine plans around a quantizer before anything is built.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct QuantizerTiming {
    /// The rate at which conversions start (Hz).
    pub sample_rate_hz: f64,
    /// From the sampling instant until the code is available (s).
    pub conversion_time_s: f64,
    pub bits: u32,
    /// Input range `[low, high]` (V).
    pub range_v: (f64, f64),
    /// Offset of the converter's clock (ppm); `sample_rate_hz` already includes it.
    pub clock_ppm: f64,
}

/// Rates a stage makes interesting for the limit finder's coarse sweep.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Rates {
    /// Corner or sampling rates where a low-pass behaviour sets in (Hz).
    pub lowpass_hz: Option<f64>,
    /// A high-pass corner (Hz).
    pub highpass_hz: Option<f64>,
}

/// What building a runtime model needs.
pub struct BuildContext {
    /// The stage's label (its `name`, or `stage.N kind`).
    pub label: String,
    /// The analog grid; `None` for a static bench, which converts at exact instants only.
    pub timebase: Option<Timebase>,
    /// This stage's own random stream (`engine::pipeline::stage_rng(seed, index)`).
    pub rng: ChaCha8Rng,
    /// A stream for a hold that a quantizer owns, derived from the quantizer's index (see the hold's file).
    pub hold_rng: ChaCha8Rng,
    /// A static bench: timing errors (aperture jitter) left out, levels kept.
    pub static_bench: bool,
    /// What the stages before this one resolved to.
    pub upstream: Upstream,
    /// A hold read just before, waiting for the quantizer that follows it.
    pub pending_hold: Option<Box<dyn Hold>>,
}

/// A built stage, by role.
pub enum Runtime {
    Analog(Box<dyn AnalogStage>),
    /// A hold is handed to the quantizer after it (through [`BuildContext::pending_hold`]).
    Hold,
    Quantizer(Box<dyn Quantizer>),
    Code(Box<dyn CodeStage>),
    Reconstructor(Box<dyn Reconstructor>),
}

/// A stage kind's description, implemented by its configuration type. See the module documentation.
pub trait KindSpec: Sized + Clone + std::fmt::Debug + PartialEq + Serialize {
    /// The name written as `kind = "..."`.
    const NAME: &'static str;
    const ROLE: Role;
    /// Every key the kind reads (besides `kind` and `name`).
    const PARAMS: &'static [Param];
    /// The body of a typical `[[stage]]` table of this kind, with some non-idealities (for the conformance kit
    /// and documentation; it must read in a chain around a 1 kHz, 1 V sine with a +-2.5 V converter range).
    const EXAMPLE: &'static str;

    /// Read the stage's table. Keys not read are reported as unknown by the caller.
    fn read(
        r: &mut TableReader<'_, '_>,
        ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError>;

    /// Fill defaults that come from the stages before, and tell the stages after what this one produces.
    fn resolve(&mut self, _up: &mut Upstream) {}

    /// Non-idealities the limit finder may remove, with the edits that remove each.
    fn ablations(&self) -> Vec<Ablation> {
        Vec::new()
    }

    /// Rates this stage makes interesting.
    fn rates(&self) -> Rates {
        Rates::default()
    }

    /// Passband voltage gain (V/V), given what came before (a DAC scales its range over the ADC's).
    fn passband_gain(&self, _up: &Upstream) -> f64 {
        1.0
    }

    /// A quantizer's timing, for the engine's plan.
    fn quantizer_timing(&self) -> Option<QuantizerTiming> {
        None
    }

    /// A code stage's delay for codes arriving at `sample_rate_hz` (s), for the engine's plan.
    fn transport_s(&self, _sample_rate_hz: f64) -> f64 {
        0.0
    }

    /// A converter word of at least two bits, which static tests and Monte-Carlo statics can measure.
    fn has_static_levels(&self) -> bool {
        false
    }

    /// The resolved configuration as written in report.json (SI units in the key names).
    fn echo(&self) -> serde_json::Value {
        serde_json::to_value(self).unwrap_or(serde_json::Value::Null)
    }

    /// Build the runtime model.
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime>;
}

/// The prefix of a mechanism name: `kind.key`.
pub fn mechanism<K: KindSpec>(key: &str) -> String {
    format!("{}.{key}", K::NAME)
}
