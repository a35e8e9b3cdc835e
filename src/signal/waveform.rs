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
    /// A built-in music-like signal: a four-chord progression, one chord every `beat_s`, each struck and
    /// decaying ([`chord_excursion`]); the progression repeats. `amplitude_v` bounds the peak.
    Chord {
        amplitude_v: f64,
        beat_s: f64,
    },
}

impl Waveform {
    /// The name a scenario gives the waveform (`source.waveform`).
    pub fn name(&self) -> &'static str {
        match self {
            Waveform::Sine { .. } => "sine",
            Waveform::Square { .. } => "square",
            Waveform::Triangle { .. } => "triangle",
            Waveform::Sawtooth { .. } => "sawtooth",
            Waveform::Multitone { .. } => "multitone",
            Waveform::Chirp { .. } => "chirp",
            Waveform::Step { .. } => "step",
            Waveform::Dc => "dc",
            Waveform::Noise { .. } => "noise",
            Waveform::Wav { .. } => "wav",
            Waveform::Chord { .. } => "chord",
        }
    }

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
            Waveform::Chord { .. } => Some(CHORD_HIGHEST_HZ),
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

/// The chords of [`Waveform::Chord`], in order: A major, D major, E major, A major (equal temperament,
/// A4 = 440 Hz; common practice, no source). Each row: bass (the root an octave down), root, third, fifth (Hz).
const CHORDS_HZ: [[f64; 4]; 4] = [
    [110.0, 220.0, 277.182_630_976_872, 329.627_556_912_870],
    [
        146.832_383_958_704,
        293.664_767_917_408,
        369.994_422_711_634,
        440.0,
    ],
    [
        164.813_778_456_435,
        329.627_556_912_870,
        415.304_697_579_945,
        493.883_301_256_124,
    ],
    [110.0, 220.0, 277.182_630_976_872, 329.627_556_912_870],
];
/// Relative levels of bass, root, third and fifth; they sum to 3.1, so the peak never exceeds the amplitude.
const CHORD_LEVELS: [f64; 4] = [0.6, 1.0, 0.8, 0.7];
/// The highest note of [`CHORDS_HZ`] (B4).
pub const CHORD_HIGHEST_HZ: f64 = 493.883_301_256_124;
/// Attack of each chord (raised cosine), seconds; shortened to a tenth of the beat for short beats.
const CHORD_ATTACK_S: f64 = 0.01;
/// Release at the end of each beat (raised cosine), seconds; shortened to a fifth of the beat for short beats.
const CHORD_RELEASE_S: f64 = 0.03;

/// The excursion (V, before the source's offset) of [`Waveform::Chord`] at `t_s`: in beat k (from
/// `k beat_s` to `(k + 1) beat_s`) the chord `CHORDS_HZ[k mod 4]` sounds, its notes starting in sine phase at the
/// beat, under a raised-cosine attack, an exponential decay (time constant half a beat: a struck or plucked
/// string's fading, roughly) and a raised-cosine release that ends the beat at zero, so the signal is
/// continuous with a continuous slope. The notes' levels sum to one: |value| <= `amplitude_v` at every instant.
/// Zero before t = 0 and for a beat that is not positive and finite.
pub fn chord_excursion(amplitude_v: f64, beat_s: f64, t_s: f64) -> f64 {
    if !(beat_s.is_finite() && beat_s > 0.0) || t_s < 0.0 {
        return 0.0;
    }
    let k = (t_s / beat_s).floor();
    let tau = (t_s - k * beat_s).clamp(0.0, beat_s);
    let chord = &CHORDS_HZ[(k as u64 % CHORDS_HZ.len() as u64) as usize];
    let attack_s = CHORD_ATTACK_S.min(0.1 * beat_s);
    let release_s = CHORD_RELEASE_S.min(0.2 * beat_s);
    let ramp = |u: f64| 0.5 - 0.5 * (std::f64::consts::PI * u.clamp(0.0, 1.0)).cos();
    let envelope =
        ramp(tau / attack_s) * ramp((beat_s - tau) / release_s) * (-2.0 * tau / beat_s).exp();
    let total: f64 = CHORD_LEVELS.iter().sum();
    let tone: f64 = chord
        .iter()
        .zip(CHORD_LEVELS)
        .map(|(f, a)| a * (2.0 * std::f64::consts::PI * f * tau).sin())
        .sum();
    amplitude_v * envelope * tone / total
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn chord_stays_within_its_amplitude_starts_each_beat_at_zero_and_is_continuous() {
        let (a, beat) = (0.5, 0.4);
        let dt = 1.0 / 96_000.0;
        let mut prev = chord_excursion(a, beat, 0.0);
        assert_eq!(prev, 0.0);
        let mut peak = 0.0f64;
        let mut largest_step = 0.0f64;
        for i in 1..(4.0 * 4.0 * beat / dt) as usize {
            let v = chord_excursion(a, beat, i as f64 * dt);
            peak = peak.max(v.abs());
            largest_step = largest_step.max((v - prev).abs());
            prev = v;
        }
        assert!(peak <= a && peak > 0.5 * a, "peak {peak}");
        // No click at the beat boundaries: the largest step between samples is that of the notes themselves
        // (2 pi f A dt at the highest note, 494 Hz), not a jump.
        let smooth = 2.0 * std::f64::consts::PI * CHORD_HIGHEST_HZ * a * dt;
        assert!(largest_step < smooth, "{largest_step} vs {smooth}");
        for k in 0..8 {
            assert!(chord_excursion(a, beat, k as f64 * beat).abs() < 1e-12);
        }
        assert_eq!(chord_excursion(a, 0.0, 1.0), 0.0);
        assert_eq!(chord_excursion(a, beat, -1.0), 0.0);
    }

    #[test]
    fn chord_plays_the_notes_of_its_beat() {
        // In the second beat (D major), a three-parameter projection finds D4 (293.66 Hz) and not C#4.
        let (a, beat) = (1.0, 0.5);
        let rate = 48_000.0;
        let n = (0.4 * rate) as usize;
        let t0 = beat + 0.05;
        let project = |f: f64| {
            let (mut s, mut c) = (0.0, 0.0);
            for i in 0..n {
                let t = t0 + i as f64 / rate;
                let v = chord_excursion(a, beat, t);
                s += v * (2.0 * std::f64::consts::PI * f * t).sin();
                c += v * (2.0 * std::f64::consts::PI * f * t).cos();
            }
            2.0 * s.hypot(c) / n as f64
        };
        assert!(project(293.664_767_917_408) > 10.0 * project(277.182_630_976_872));
        assert!(project(277.182_630_976_872) < 0.02);
    }
}
