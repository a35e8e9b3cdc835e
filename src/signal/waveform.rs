//! The source's waveform as a scenario describes it (peak volts, hertz, seconds): data that the scenario reads,
//! the source generates and the meters recognise.

use std::path::PathBuf;

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

/// Phase of a chirp in cycles at `t_s` (the sweep restarts, with phase 0, every `sweep_s`).
///
/// Linear law: f(tau) = f0 + (f1 - f0) tau / T, cycles = f0 tau + (f1 - f0) tau^2 / (2 T).
/// Logarithmic law: f(tau) = f0 k^(tau/T), k = f1/f0, cycles = f0 T / ln k (k^(tau/T) - 1). The logarithmic
/// law needs f0, f1 > 0; otherwise (or when f0 = f1) the linear law is used.
pub fn chirp_cycles(f0: f64, f1: f64, sweep_s: f64, law: ChirpLaw, t_s: f64) -> f64 {
    let mut tau = t_s - (t_s / sweep_s).floor() * sweep_s;
    if tau >= sweep_s {
        tau -= sweep_s;
    }
    let tau = tau.max(0.0);
    let log_ok = f0 > 0.0 && f1 > 0.0 && f0 != f1;
    match law {
        ChirpLaw::Logarithmic if log_ok => {
            let ln_k = (f1 / f0).ln();
            f0 * sweep_s / ln_k * (ln_k * tau / sweep_s).exp_m1()
        }
        _ => f0 * tau + (f1 - f0) * tau * tau / (2.0 * sweep_s),
    }
}
