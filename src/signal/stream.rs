//! Stream types. An analog stream is volts on a uniform time grid; a digital stream is codes with the
//! instant each was sampled and the instant it becomes available. They are different types on purpose.

/// A uniform time grid: sample n is at `n / rate_hz` seconds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Timebase {
    pub rate_hz: f64,
}

impl Timebase {
    /// # Panics
    /// If `rate_hz` is not finite and positive (the scenario checker guarantees it is).
    pub fn new(rate_hz: f64) -> Self {
        assert!(
            rate_hz.is_finite() && rate_hz > 0.0,
            "rate must be positive"
        );
        Timebase { rate_hz }
    }
    /// Grid step (s).
    pub fn dt_s(&self) -> f64 {
        1.0 / self.rate_hz
    }
    /// Time of grid sample `n` (computed, never accumulated, so it does not drift).
    pub fn time_s(&self, n: u64) -> f64 {
        n as f64 / self.rate_hz
    }
}

/// One converted sample travelling through the digital part of the chain.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CodeEvent {
    /// Nominal sampling instant t_k (before aperture delay and jitter).
    pub t_sample_s: f64,
    /// Instant the code becomes available to the next stage.
    pub t_avail_s: f64,
    /// The code, 0..2^bits - 1.
    pub code: u32,
}

/// Analog samples on a uniform grid starting at grid index `n0`.
#[derive(Debug, Clone, PartialEq)]
pub struct AnalogRecord {
    pub timebase: Timebase,
    /// Grid index of the first sample.
    pub n0: u64,
    pub volts: Vec<f64>,
}

impl AnalogRecord {
    pub fn t0_s(&self) -> f64 {
        self.timebase.time_s(self.n0)
    }
}

/// Codes of a given width, in order of sampling.
#[derive(Debug, Clone, PartialEq)]
pub struct CodeRecord {
    pub bits: u32,
    /// Nominal conversion rate.
    pub sample_rate_hz: f64,
    pub codes: Vec<CodeEvent>,
}
