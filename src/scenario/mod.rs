//! Scenario files: the TOML format, SI-unit values, and validation into a checked [`Scenario`].
//!
//! The types in this module are the contract between the file format and the engine: every value is
//! resolved (defaults applied, units converted to SI base units, cross-stage defaults filled in) and
//! checked before the engine sees it. The engine never reads TOML.

use std::path::{Path, PathBuf};

pub use crate::format::reader::ScenarioError;

/// The commented starter scenario written by `convchain init`. It parses (a test checks it).
pub const STARTER: &str = include_str!("starter.toml");

/// Parse and check a scenario. `origin` names the file in messages; relative WAV paths resolve against
/// `base_dir`. Non-fatal remarks end up in [`Scenario::warnings`].
pub fn parse_str(text: &str, origin: &str, base_dir: &Path) -> Result<Scenario, ScenarioError> {
    let map = crate::format::reader::SourceMap::new(origin, text);
    let root = crate::format::reader::parse_document(&map)?;
    let mut sc = validate::build(&map, &root, base_dir)?;
    sanity::check(&map, &root, &sc)?;
    sanity::note_slips(&map, &root, &mut sc);
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
    /// The signal path, in order (with `[[path]]` tables: the first path's stages).
    pub stages: Vec<Stage>,
    /// `[[path]]`: named chains fed by the same source, run and measured side by side; empty for a scenario
    /// written as one `[[stage]]` list.
    pub paths: Vec<NamedPath>,
    pub analysis: Analysis,
    /// `[spread]`: values drawn afresh for each Monte-Carlo run, in file order (empty for a single run).
    pub spread: Vec<Spread>,
    /// `[compare]`: a recording of the built chain that `run` measures beside the simulated output (`run
    /// --compare` takes its place); studies leave it alone.
    pub compare: Option<crate::capture::compare::CompareSpec>,
    /// Non-fatal remarks found while checking (e.g. an analog rate below 20x the highest source frequency),
    /// as printed; they include the text of every [`Slip`].
    pub warnings: Vec<String>,
    /// Legal values that are almost surely slips ([`sanity::note_slips`]), located.
    pub slips: Vec<Slip>,
    /// Where each `[[stage]]` table (`stage.N`) and each stage's `slew_rate` (`stage.N.slew_rate`) is written:
    /// "file:line:column", for warnings made after a run.
    pub locations: Vec<(String, String)>,
}

/// A value that is legal but almost surely a slip: where it is, why it is suspicious and what was probably
/// meant. Printed by `check` and `run`, listed in report.json's `warnings`; never an error.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Slip {
    /// "file:line:column" of the value (or of its table).
    pub location: String,
    /// Key path: `stage.5.slew_rate`, `simulation.analog_rate`.
    pub key: String,
    /// Why the value is suspicious, with the figures.
    pub message: String,
    /// What was probably meant, or what to change.
    pub suggestion: String,
}

impl Slip {
    /// The one-line form printed after "warning: ".
    pub fn text(&self) -> String {
        format!(
            "{}: {}: {}; {}",
            self.location, self.key, self.message, self.suggestion
        )
    }

    /// Where `key` is written, from [`Scenario::locations`] ("" when unknown).
    pub fn location_of(sc: &Scenario, key: &str) -> String {
        sc.locations
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, l)| l.clone())
            .unwrap_or_default()
    }
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

pub use crate::signal::waveform::{ChirpLaw, Source, Tone, Waveform};

/// One `[[path]]`: a named chain of its own `[[path.stage]]` tables, fed by the scenario's source.
#[derive(Debug, Clone, PartialEq)]
pub struct NamedPath {
    /// Letters, digits, - and _ (labels the report's `paths` entries).
    pub name: String,
    pub description: String,
    pub stages: Vec<Stage>,
}

impl Scenario {
    /// The scenario with `path`'s stages as its one chain (no paths): what the engine runs for that path.
    pub fn for_path(&self, path: &NamedPath) -> Scenario {
        let mut sc = self.clone();
        sc.stages = path.stages.clone();
        sc.paths = Vec::new();
        sc
    }
}

/// One stage of the signal path.
#[derive(Debug, Clone, PartialEq)]
pub struct Stage {
    /// A short label for reports: `stage.<index> <kind>` (index from 1, as in the file), or the stage's `name`.
    pub label: String,
    pub kind: StageKind,
}

pub use crate::stages::StageKind;
pub use crate::stages::amplifier::AmplifierCfg;
pub use crate::stages::dac::{DacCfg, Ladder, ToleranceDistribution};
pub use crate::stages::filter::{FilterCfg, FilterFamily, FilterResponse};
pub use crate::stages::link::LinkCfg;
pub use crate::stages::sample_hold::SampleHoldCfg;
pub use crate::stages::sar_adc::{AdcInput, DitherKind, SarAdcCfg};
pub use crate::stages::slew::OutputAmpCfg;

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

    /// The name a scenario uses for the window.
    pub fn name(self) -> &'static str {
        match self {
            WindowKind::Rectangular => "rectangular",
            WindowKind::Hann => "hann",
            WindowKind::Hamming => "hamming",
            WindowKind::BlackmanHarris => "blackman-harris",
            WindowKind::FlatTop => "flat-top",
        }
    }
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
    /// The band a step source's output settles into, as a fraction of its step (default 0.01).
    pub settling_band: f64,
    /// Blocks the output analysis record is cut into to track the measured latency over the run
    /// (`latency.over_time`); 0 = not tracked (the default).
    pub latency_blocks: u32,
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

pub mod keys;
pub mod overrides;
mod path_list;
pub mod sanity;
mod source_table;
mod spread;
mod stage_list;
pub use stage_list::MAX_HOPS;
pub mod validate;
