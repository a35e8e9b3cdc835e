//! The `codec` stage: a frame-based audio coder and decoder between converter and DAC.
//!
//! Delay: codes are gathered into frames of `frame` codes; the coder also waits for `lookahead` codes beyond
//! the frame before it can code it. Every code leaves (F + L) sample periods after it arrived, F = `frame`,
//! L = `lookahead`, fs the rate the codes arrive at (the ADC's): the algorithmic delay of a frame-based codec
//! (common practice, no source). A partial frame at the end of a run never leaves.
//!
//! Coding noise, when `coding_snr` is given: the coding error is modelled as white Gaussian noise added to
//! the codes, whose level follows each frame's RMS: for a frame of codes c_i, with mid-scale m = 2^(N-1) (the
//! zero of an offset-binary word of N bits), the frame's RMS is r = sqrt(mean((c_i - m)^2)) and every code of
//! the frame gets noise of standard deviation r x 10^(-coding_snr/20); the sum is rounded to a whole code and
//! clamped to the word's range. Over a stationary signal the noise power is therefore `coding_snr` below the
//! signal power across the whole band 0 .. fs/2 (a real perceptual coder shapes its noise under the signal's
//! spectrum instead; this is the simple, documented stand-in). Noise is drawn from the stage's own stream, so
//! runs repeat. Without `coding_snr` the codec is transparent: the codes pass untouched and the budget line
//! and report.json's stage entry say so.

use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

use crate::engine::pipeline::si;
use crate::error::{Error, Result};
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::signal::stream::CodeEvent;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, ReadContext, Role, Runtime,
    mechanism,
};
use crate::stages::roles::{BudgetLine, CodeStage};

/// Longest frame or look-ahead (samples).
pub const MAX_FRAME: i128 = 1 << 20;

/// `kind = "codec"`: frame-based coding with look-ahead and optional coding noise.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CodecCfg {
    /// Samples per frame.
    pub frame: u32,
    /// Samples the coder waits for beyond the frame.
    pub lookahead: u32,
    /// Signal to coding-noise ratio (dB); `None`: transparent.
    pub coding_snr_db: Option<f64>,
}

impl CodecCfg {
    /// The algorithmic delay (F + L) / fs for codes arriving at `sample_rate_hz` (s).
    pub fn delay_s(&self, sample_rate_hz: f64) -> f64 {
        (f64::from(self.frame) + f64::from(self.lookahead)) / sample_rate_hz
    }
}

impl KindSpec for CodecCfg {
    const NAME: &'static str = "codec";
    const ROLE: Role = Role::Code;
    const EXAMPLE: &'static str = r#"frame = 48
lookahead = 12
coding_snr = "50 dB""#;
    const PARAMS: &'static [Param] = &[
        Param::fixed("frame", ParamKind::Integer),
        Param::fixed("lookahead", ParamKind::Integer),
        Param::spread("coding_snr", Dimension::Decibels),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        let frame = r
            .integer("frame", 1, MAX_FRAME)?
            .ok_or_else(|| r.missing("frame", "480"))?
            .value as u32;
        let lookahead = r
            .integer("lookahead", 0, MAX_FRAME)?
            .map_or(0, |l| l.value as u32);
        let coding_snr_db = match r.quantity("coding_snr", Dimension::Decibels)? {
            None => None,
            Some(q) if !(q.value > 0.0 && q.value <= 200.0) => {
                return Err(r
                    .error(
                        &q.span,
                        "coding_snr",
                        format!("must be above 0 dB and at most 200 dB, found {} dB", q.value),
                    )
                    .with_hint(
                        "it is the signal to coding-noise ratio, e.g. \"40 dB\"; leave it out for a \
                         transparent codec",
                    ));
            }
            Some(q) => Some(q.value),
        };
        Ok(CodecCfg {
            frame,
            lookahead,
            coding_snr_db,
        })
    }

    fn ablations(&self) -> Vec<Ablation> {
        match self.coding_snr_db {
            Some(_) => vec![Ablation::new(
                mechanism::<Self>("coding_snr"),
                "coding_snr removed (transparent)",
                vec![KeyEdit::Remove("coding_snr")],
            )],
            None => Vec::new(),
        }
    }

    fn transport_s(&self, sample_rate_hz: f64) -> f64 {
        self.delay_s(sample_rate_hz)
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        v["transparent"] = serde_json::json!(self.coding_snr_db.is_none());
        v["coding_noise"] = serde_json::json!(match self.coding_snr_db {
            Some(_) => "white, following each frame's rms",
            None => "none (transparent)",
        });
        v
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let fs = ctx.upstream.sample_rate_hz.ok_or_else(|| {
            Error::BadInput(format!("{}: a codec needs an ADC before it", ctx.label))
        })?;
        Ok(Runtime::Code(Box::new(Codec::new(
            self,
            fs,
            ctx.upstream.width_bits,
            ctx.rng.clone(),
            ctx.label.clone(),
        ))))
    }
}

/// A frame-based codec: delay (F + L) / fs, and white coding noise at `coding_snr` below each frame's RMS.
#[derive(Debug, Clone)]
pub struct Codec {
    cfg: CodecCfg,
    delay_s: f64,
    /// Noise standard deviation over the frame's RMS (0: transparent).
    noise_ratio: f64,
    mid_code: f64,
    max_code: f64,
    rng: ChaCha8Rng,
    /// The frame being filled (capacity `frame`, reused).
    pending: Vec<CodeEvent>,
    label: String,
}

impl Codec {
    /// A codec for `bits`-wide codes arriving at `sample_rate_hz`; noise from `rng`.
    pub fn new(
        cfg: &CodecCfg,
        sample_rate_hz: f64,
        bits: u32,
        rng: ChaCha8Rng,
        label: String,
    ) -> Codec {
        let bits = bits.clamp(1, 32);
        let frame = cfg.frame.max(1) as usize;
        Codec {
            cfg: *cfg,
            delay_s: cfg.delay_s(sample_rate_hz),
            noise_ratio: cfg.coding_snr_db.map_or(0.0, |s| 10f64.powf(-s / 20.0)),
            mid_code: 2f64.powi(bits as i32 - 1),
            max_code: 2f64.powi(bits as i32) - 1.0,
            rng,
            pending: Vec::with_capacity(frame),
            label,
        }
    }
}

impl CodeStage for Codec {
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        self.pending.push(ev);
        if self.pending.len() < self.cfg.frame.max(1) as usize {
            return;
        }
        if self.noise_ratio > 0.0 {
            let n = self.pending.len() as f64;
            let ms = self
                .pending
                .iter()
                .map(|e| (f64::from(e.code) - self.mid_code).powi(2))
                .sum::<f64>()
                / n;
            let sigma = ms.sqrt() * self.noise_ratio;
            for e in self.pending.iter_mut() {
                let z: f64 = StandardNormal.sample(&mut self.rng);
                let c = (f64::from(e.code) + sigma * z)
                    .round()
                    .clamp(0.0, self.max_code);
                e.code = c as u32;
            }
        }
        let d = self.delay_s;
        out.extend(self.pending.drain(..).map(|e| CodeEvent {
            t_avail_s: e.t_avail_s + d,
            ..e
        }));
    }

    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine> {
        let coding = match self.cfg.coding_snr_db {
            Some(s) => format!("coding noise {s} dB below the signal"),
            None => "transparent: no coding noise".to_string(),
        };
        vec![BudgetLine {
            stage: format!(
                "{}: frame {} + look-ahead {} samples at {} ({coding})",
                self.label,
                self.cfg.frame,
                self.cfg.lookahead,
                si(sample_rate_hz, "Hz")
            ),
            seconds: self.cfg.delay_s(sample_rate_hz),
        }]
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn sine_stream(n: usize, rate: f64, bits: u32, amp_codes: f64) -> Vec<CodeEvent> {
        let mid = 2f64.powi(bits as i32 - 1);
        (0..n)
            .map(|k| {
                let t = k as f64 / rate;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t + 0.3 / rate,
                    code: (mid + amp_codes * (std::f64::consts::TAU * 1000.0 * t).sin()).round()
                        as u32,
                }
            })
            .collect()
    }

    fn run(codec: &mut Codec, evs: &[CodeEvent]) -> Vec<CodeEvent> {
        let mut out = Vec::new();
        for e in evs {
            codec.push(*e, &mut out);
        }
        out
    }

    #[test]
    fn a_transparent_codec_delays_by_frame_and_lookahead_and_keeps_the_codes() {
        // Frame 480, look-ahead 240 at 48 kHz: 720 / 48000 = 15 ms.
        let cfg = CodecCfg {
            frame: 480,
            lookahead: 240,
            coding_snr_db: None,
        };
        let fs = 48e3;
        let mut c = Codec::new(&cfg, fs, 16, ChaCha8Rng::seed_from_u64(1), "c".into());
        let evs = sine_stream(480 * 3 + 100, fs, 16, 20000.0);
        let out = run(&mut c, &evs);
        assert_eq!(out.len(), 480 * 3);
        for (a, o) in evs.iter().zip(&out) {
            assert_eq!(o.code, a.code);
            assert!((o.t_avail_s - a.t_avail_s - 15e-3).abs() < 1e-12);
        }
        let b = c.budget(fs);
        assert!((b[0].seconds - 15e-3).abs() < 1e-15);
        assert!(b[0].stage.contains("transparent"), "{}", b[0].stage);
    }

    #[test]
    fn coding_noise_sits_at_the_asked_ratio_below_the_signal() {
        // 1 kHz sine at 48 kHz, frames of 480 (whole periods): the noise power is the signal power (about
        // mid-scale) x 10^(-snr/10); measured over 2000 frames the ratio is within 0.1 dB (the estimate's own
        // spread is 10 log10(1 + sqrt(2/N)) for N = 960 000 Gaussian draws: 0.006 dB; rounding to whole codes
        // adds 1/12 code^2, far below).
        for snr in [20.0, 40.0, 60.0] {
            let cfg = CodecCfg {
                frame: 480,
                lookahead: 0,
                coding_snr_db: Some(snr),
            };
            let fs = 48e3;
            let mut c = Codec::new(&cfg, fs, 16, ChaCha8Rng::seed_from_u64(7), "c".into());
            let evs = sine_stream(480 * 2000, fs, 16, 20000.0);
            let out = run(&mut c, &evs);
            let mid = 32768.0;
            let ps: f64 = evs.iter().map(|e| (e.code as f64 - mid).powi(2)).sum();
            let pn: f64 = evs
                .iter()
                .zip(&out)
                .map(|(a, o)| (o.code as f64 - a.code as f64).powi(2))
                .sum();
            let got = 10.0 * (ps / pn).log10();
            assert!((got - snr).abs() < 0.1, "asked {snr} dB, got {got} dB");
        }
    }

    #[test]
    fn noisy_codes_stay_in_the_word_and_runs_repeat() {
        let cfg = CodecCfg {
            frame: 16,
            lookahead: 4,
            coding_snr_db: Some(3.0),
        };
        let evs = sine_stream(1600, 48e3, 8, 127.0); // full scale: clamping must happen
        let mut a = Codec::new(&cfg, 48e3, 8, ChaCha8Rng::seed_from_u64(3), "c".into());
        let mut b = Codec::new(&cfg, 48e3, 8, ChaCha8Rng::seed_from_u64(3), "c".into());
        let oa = run(&mut a, &evs);
        let ob = run(&mut b, &evs);
        assert!(oa.iter().all(|e| e.code <= 255));
        assert!(oa.iter().any(|e| e.code == 255) && oa.iter().any(|e| e.code == 0));
        assert_eq!(
            oa.iter().map(|e| e.code).collect::<Vec<_>>(),
            ob.iter().map(|e| e.code).collect::<Vec<_>>()
        );
    }
}
