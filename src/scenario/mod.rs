//! Scenario files: the TOML format, SI-unit values, and validation into a checked [`Scenario`].
//!
//! The types in this module are the contract between the file format and the engine: every value is
//! resolved (defaults applied, units converted to SI base units, cross-stage defaults filled in) and
//! checked before the engine sees it. The engine never reads TOML.

use std::path::{Path, PathBuf};

pub use reader::ScenarioError;

/// The commented starter scenario written by `convchain init`. It parses (a test checks it).
pub const STARTER: &str = include_str!("starter.toml");

/// Parse and check a scenario. `origin` names the file in messages; relative WAV paths resolve against
/// `base_dir`. Non-fatal remarks end up in [`Scenario::warnings`].
pub fn parse_str(text: &str, origin: &str, base_dir: &Path) -> Result<Scenario, ScenarioError> {
    let map = reader::SourceMap::new(origin, text);
    let root = reader::parse_document(&map)?;
    let sc = validate::build(&map, &root, base_dir)?;
    sanity::check(&map, &root, &sc)?;
    Ok(sc)
}

/// Read a scenario file and parse it. An unreadable file gives [`crate::Error::Read`], a bad scenario
/// [`crate::Error::BadInput`] with the located message.
pub fn load(path: &Path) -> Result<Scenario, crate::Error> {
    let text = crate::text::read_user_text(path, "a scenario file (TOML)")?;
    let base_dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    Ok(parse_str(&text, &path.display().to_string(), &base_dir)?)
}

/// A checked scenario, ready to run.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// Output folder name (`out/<name>/`).
    pub name: String,
    pub description: String,
    /// Where the scenario came from: a file path, or `<embedded default>`.
    pub origin: String,
    /// Folder that relative paths in the scenario (WAV sources) are resolved against.
    pub base_dir: PathBuf,
    pub simulation: Simulation,
    pub source: Source,
    /// The signal path, in order.
    pub stages: Vec<Stage>,
    pub analysis: Analysis,
    /// `[spread]`: values drawn afresh for each Monte-Carlo run, in file order (empty for a single run).
    pub spread: Vec<Spread>,
    /// Non-fatal remarks found while checking (e.g. an analog rate below 20x the highest source frequency).
    pub warnings: Vec<String>,
}

/// `[simulation]`
#[derive(Debug, Clone, PartialEq)]
pub struct Simulation {
    /// Rate of the uniform grid on which continuous-time stages run.
    pub analog_rate_hz: f64,
    /// Total simulated time, from t = 0.
    pub duration_s: f64,
    /// Analysis starts here; start-up transients before it are skipped.
    pub settle_s: f64,
    /// Base seed; each stage derives its own ChaCha stream from it and its index.
    pub seed: u64,
}

/// `[source]`
#[derive(Debug, Clone, PartialEq)]
pub struct Source {
    pub waveform: Waveform,
    /// Added to every waveform (volts).
    pub offset_v: f64,
}

/// Law of a chirp's frequency against time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ChirpLaw {
    Linear,
    Logarithmic,
}

/// One tone of a multitone source.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Tone {
    pub frequency_hz: f64,
    /// Peak amplitude (volts).
    pub amplitude_v: f64,
    pub phase_rad: f64,
}

/// The source's waveform. Periodic amplitudes are peak volts around `offset_v`.
#[derive(Debug, Clone, PartialEq)]
pub enum Waveform {
    Sine {
        frequency_hz: f64,
        amplitude_v: f64,
        phase_rad: f64,
    },
    /// Duty is the fraction of the period spent high (0..1).
    Square {
        frequency_hz: f64,
        amplitude_v: f64,
        duty: f64,
    },
    Triangle {
        frequency_hz: f64,
        amplitude_v: f64,
    },
    /// Rising ramp from -amplitude to +amplitude each period.
    Sawtooth {
        frequency_hz: f64,
        amplitude_v: f64,
    },
    Multitone {
        tones: Vec<Tone>,
    },
    /// A sine whose frequency moves from `start_hz` to `stop_hz` over `sweep_s`, then repeats.
    Chirp {
        start_hz: f64,
        stop_hz: f64,
        sweep_s: f64,
        law: ChirpLaw,
        amplitude_v: f64,
    },
    /// `offset_v` before `at_s`, `offset_v + amplitude_v` from then on.
    Step {
        at_s: f64,
        amplitude_v: f64,
    },
    /// Just `offset_v`.
    Dc,
    /// Gaussian noise of the given rms; band-limited to `bandwidth_hz` when given.
    Noise {
        rms_v: f64,
        bandwidth_hz: Option<f64>,
    },
    /// A WAV file; sample value +-1.0 (full scale) maps to +-`full_scale_v` volts.
    Wav {
        /// As written in the scenario: relative paths are taken from [`Scenario::base_dir`].
        path: PathBuf,
        /// Zero-based channel index.
        channel: usize,
        full_scale_v: f64,
        /// Replay the file from the start when it ends.
        repeat: bool,
    },
}

impl Waveform {
    /// The highest frequency the source puts out by design (for the analog-rate checks), if it has one.
    pub fn highest_frequency_hz(&self) -> Option<f64> {
        match self {
            Waveform::Sine { frequency_hz, .. }
            | Waveform::Square { frequency_hz, .. }
            | Waveform::Triangle { frequency_hz, .. }
            | Waveform::Sawtooth { frequency_hz, .. } => Some(*frequency_hz),
            Waveform::Multitone { tones } => tones.iter().map(|t| t.frequency_hz).reduce(f64::max),
            Waveform::Chirp {
                start_hz, stop_hz, ..
            } => Some(start_hz.max(*stop_hz)),
            Waveform::Noise { bandwidth_hz, .. } => *bandwidth_hz,
            Waveform::Step { .. } | Waveform::Dc | Waveform::Wav { .. } => None,
        }
    }

    /// The frequency of the fundamental for single-tone periodic sources.
    pub fn fundamental_hz(&self) -> Option<f64> {
        match self {
            Waveform::Sine { frequency_hz, .. }
            | Waveform::Square { frequency_hz, .. }
            | Waveform::Triangle { frequency_hz, .. }
            | Waveform::Sawtooth { frequency_hz, .. } => Some(*frequency_hz),
            _ => None,
        }
    }
}

/// One stage of the signal path.
#[derive(Debug, Clone, PartialEq)]
pub struct Stage {
    /// A short label for reports: `stage.<index> <kind>` (index from 1, as in the file), or the stage's `name`.
    pub label: String,
    pub kind: StageKind,
}

#[derive(Debug, Clone, PartialEq)]
pub enum StageKind {
    SampleHold(SampleHoldCfg),
    SarAdc(SarAdcCfg),
    Link(LinkCfg),
    Dac(DacCfg),
    Filter(FilterCfg),
    Amplifier(AmplifierCfg),
}

impl StageKind {
    /// The stage kind as written in a scenario file.
    pub fn kind_name(&self) -> &'static str {
        match self {
            StageKind::SampleHold(_) => "sample_hold",
            StageKind::SarAdc(_) => "sar_adc",
            StageKind::Link(_) => "link",
            StageKind::Dac(_) => "dac",
            StageKind::Filter(_) => "filter",
            StageKind::Amplifier(_) => "amplifier",
        }
    }
}

/// `kind = "sample_hold"`. All zero = an ideal hold.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SampleHoldCfg {
    /// Time constant with which the hold capacitor tracks the input (0 = ideal tracking).
    pub acquisition_s: f64,
    /// Pure delay between the nominal sampling instant and the moment the switch opens.
    pub aperture_delay_s: f64,
    /// Rms of a Gaussian timing error added to each sampling instant.
    pub aperture_jitter_s: f64,
    /// Rate at which the held voltage falls while holding (V/s; negative rises).
    pub droop_v_per_s: f64,
    /// Pedestal added to the held value when the switch opens (V).
    pub hold_step_v: f64,
}

/// What a SAR converter compares during its bit trials.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AdcInput {
    /// The value captured at the sampling instant (from an upstream `sample_hold`, or an ideal one).
    Held,
    /// No hold: each bit trial compares the input at the moment of that trial.
    Live,
}

/// Dither added before quantisation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DitherKind {
    None,
    /// Rectangular PDF, `dither_lsb` peak-to-peak.
    Rpdf,
    /// Triangular PDF, `dither_lsb` peak-to-peak.
    Tpdf,
}

/// `kind = "sar_adc"`
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SarAdcCfg {
    pub bits: u32,
    /// Input range `[low, high]` (V); q = (high - low) / 2^bits.
    pub range_v: (f64, f64),
    /// Bit-trial clock (resolved: given, or `cycles / conversion_time`).
    pub clock_hz: f64,
    /// Clock cycles per conversion (default bits + 1).
    pub cycles: u32,
    /// Time from the sampling instant until the code is available (resolved: given, or `cycles / clock`).
    pub conversion_time_s: f64,
    /// None = free-running: the next conversion starts when the previous one ends.
    pub sample_rate_hz: Option<f64>,
    pub input: AdcInput,
    pub comparator_offset_v: f64,
    /// Rms of Gaussian noise added to each comparison.
    pub comparator_noise_v: f64,
    /// Relative sigma of each unit capacitor of the internal DAC.
    pub capacitor_mismatch: f64,
    pub dither: DitherKind,
    /// Dither size, LSB peak-to-peak.
    pub dither_lsb: f64,
}

impl SarAdcCfg {
    /// The rate at which conversions start.
    pub fn effective_sample_rate_hz(&self) -> f64 {
        self.sample_rate_hz.unwrap_or(1.0 / self.conversion_time_s)
    }
    /// One LSB (volts).
    pub fn lsb_v(&self) -> f64 {
        (self.range_v.1 - self.range_v.0) / f64::powi(2.0, self.bits as i32)
    }
}

/// `kind = "link"`: a digital transport between converter and DAC.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinkCfg {
    /// Fixed transport delay.
    pub delay_s: f64,
    /// Samples per frame; a frame leaves when full (1 = no framing).
    pub frame: u32,
    /// Probability that any one transported bit is flipped.
    pub bit_error_rate: f64,
    /// Word width on the link (resolved: given, or the upstream width). A narrower word drops LSBs; a
    /// wider one pads with zero LSBs.
    pub bits: u32,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ladder {
    Ideal,
    R2r,
    Binary,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ToleranceDistribution {
    /// Uniform within +-tolerance.
    Uniform,
    /// Gaussian with sigma = tolerance / 3.
    Gaussian,
}

/// The output amplifier model shared by `dac` and `amplifier`:
/// dv/dt = clamp((target - v)/tau, -slew, +slew), then clipped to the rails.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct OutputAmpCfg {
    /// None = unlimited.
    pub slew_rate_v_per_s: Option<f64>,
    /// First-order time constant (from `settling`, or `bandwidth` as 1/(2 pi f)); None = instantaneous.
    pub tau_s: Option<f64>,
    /// Output swing limits `[low, high]`; None = unlimited.
    pub rails_v: Option<(f64, f64)>,
}

/// `kind = "dac"`
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DacCfg {
    /// Resolved: given, or the width of the codes arriving.
    pub bits: u32,
    /// Code k gives low + k (high - low)/2^bits.
    pub range_v: (f64, f64),
    pub ladder: Ladder,
    /// Relative resistor tolerance (0.01 = 1 %).
    pub tolerance: f64,
    pub tolerance_distribution: ToleranceDistribution,
    pub offset_v: f64,
    /// Relative gain error (0.01 = +1 %).
    pub gain_error: f64,
    pub output: OutputAmpCfg,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
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

/// `kind = "amplifier"`
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AmplifierCfg {
    /// Voltage gain (V/V).
    pub gain: f64,
    /// Added at the output (V).
    pub offset_v: f64,
    pub output: OutputAmpCfg,
}

/// Spectral window used by the meters.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WindowKind {
    Rectangular,
    Hann,
    Hamming,
    BlackmanHarris,
    FlatTop,
}

impl WindowKind {
    /// Every window, in declaration order.
    pub const ALL: [WindowKind; 5] = [
        WindowKind::Rectangular,
        WindowKind::Hann,
        WindowKind::Hamming,
        WindowKind::BlackmanHarris,
        WindowKind::FlatTop,
    ];
}

/// `[analysis]`
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Analysis {
    /// Band for the analog output's metrics; None = up to the output analysis stream's Nyquist frequency.
    pub band_hz: Option<f64>,
    pub window: WindowKind,
    /// Move a sine source to the nearest coherent frequency (IEEE Std 1241).
    pub coherent: bool,
    /// Highest harmonic counted in THD (and removed for SNR).
    pub harmonics: u32,
}

/// How a `[spread]` value is drawn around its nominal.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SpreadLaw {
    /// Gaussian; the amount is the standard deviation.
    Gaussian,
    /// Uniform within +-amount.
    Uniform,
}

/// One `[spread]` entry: the value at `path` is drawn for each Monte-Carlo run.
#[derive(Debug, Clone, PartialEq)]
pub struct Spread {
    /// Key path as for overrides: `stage.4.offset`, `source.frequency`.
    pub path: String,
    pub law: SpreadLaw,
    /// Sigma (Gaussian) or half-width (uniform): a fraction of the nominal when `relative`, else in the key's
    /// SI base unit (V, Hz, s, V/s, V/V for gains, dB for ripple, plain number for ratios).
    pub amount: f64,
    pub relative: bool,
    /// The value written in the scenario, SI base units.
    pub nominal: f64,
}

impl Spread {
    /// Sigma or half-width in the key's SI base unit.
    pub fn absolute_amount(&self) -> f64 {
        if self.relative {
            self.amount * self.nominal.abs()
        } else {
            self.amount
        }
    }
}

pub mod overrides;
pub mod reader;
pub mod sanity;
pub mod units;
pub mod validate;
