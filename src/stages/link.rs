//! The `link` stage: a digital transport between converter and DAC, with a fixed delay, framing, random
//! bit errors and word-width conversion.
//!
//! Each arriving code is first converted to the link's width (a narrower word drops LSBs, a wider one
//! pads zero LSBs), then its bits are sent MSB first through a binary symmetric channel: every
//! transported bit flips independently with probability `bit_error_rate`. Flips are drawn by geometric
//! skipping (the number of good bits before the next flip), so the cost is per flip, not per bit.
//! Codes are collected into frames of `frame` codes; a frame leaves when its last code arrives and
//! reaches the far end `delay` later, where the receiver plays its codes out at the pace they were
//! sent (code i of the frame `i` sample spacings after the first). Every code therefore arrives the same
//! time after it was produced: `delay` plus the time the frame took to fill, (frame - 1) sample periods.
//! A partial frame at the end of a run never leaves.

use rand::RngExt;
use rand_chacha::ChaCha8Rng;

use serde::Serialize;

use crate::signal::stream::CodeEvent;
use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, ReadContext, Role, Runtime,
    Upstream, mechanism,
};
use crate::stages::roles::{BudgetLine, CodeStage};
use crate::stages::sar_adc::MAX_BITS;

/// `kind = "link"`: a digital transport between converter and DAC.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LinkCfg {
    /// Fixed transport delay.
    pub delay_s: f64,
    /// Samples per frame; a frame leaves when full (1 = no framing).
    pub frame: u32,
    /// Probability that any one transported bit is flipped.
    pub bit_error_rate: f64,
    /// Word width on the link (resolved: given, or the upstream width; 0 until resolved). A narrower word
    /// drops LSBs; a wider one pads with zero LSBs.
    pub bits: u32,
}

impl KindSpec for LinkCfg {
    const NAME: &'static str = "link";
    const ROLE: Role = Role::Code;
    const EXAMPLE: &'static str = r#"delay = "100 us"
frame = 4
bit_error_rate = "1 ppm""#;
    const PARAMS: &'static [Param] = &[
        Param::spread("delay", Dimension::Time),
        Param::fixed("frame", ParamKind::Integer),
        Param::spread("bit_error_rate", Dimension::Ratio),
        Param::fixed("bits", ParamKind::Integer),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        read_link(r)
    }

    /// Without `bits`, the link carries the width arriving.
    fn resolve(&mut self, up: &mut Upstream) {
        if self.bits == 0 {
            self.bits = up.width_bits;
        }
        up.width_bits = self.bits;
    }

    fn ablations(&self) -> Vec<Ablation> {
        if self.bit_error_rate > 0.0 {
            vec![Ablation::new(
                mechanism::<Self>("bit_error_rate"),
                "bit_error_rate = 0",
                vec![KeyEdit::Set("bit_error_rate", 0.0)],
            )]
        } else {
            Vec::new()
        }
    }

    /// The delay plus the time a frame takes to fill.
    fn transport_s(&self, sample_rate_hz: f64) -> f64 {
        self.delay_s + self.frame as f64 / sample_rate_hz
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let in_bits = ctx.upstream.width_bits;
        Ok(Runtime::Code(Box::new(LabelledLink {
            link: Link::new(self, in_bits, ctx.rng.clone()),
            label: ctx.label.clone(),
        })))
    }
}

fn read_link(r: &mut TableReader<'_, '_>) -> std::result::Result<LinkCfg, ScenarioError> {
    let delay_s = r.non_negative("delay", Dimension::Time)?;
    let frame = r
        .integer("frame", 1, 1 << 24)?
        .map_or(1, |q| q.value as u32);
    let bit_error_rate = r.non_negative("bit_error_rate", Dimension::Ratio)?;
    if bit_error_rate > 0.5 {
        let span = r
            .take("bit_error_rate")
            .map(|n| n.span.clone())
            .unwrap_or_default();
        return Err(r
            .error(
                &span,
                "bit_error_rate",
                format!("must be at most 0.5, found {bit_error_rate}"),
            )
            .with_hint("it is the probability that one bit is flipped, e.g. \"1 ppm\""));
    }
    let bits = r.integer("bits", 1, MAX_BITS)?;
    Ok(LinkCfg {
        delay_s,
        frame,
        bit_error_rate,
        bits: bits.as_ref().map_or(0, |b| b.value as u32),
    })
}

/// A link with its label: the code-stage role.
pub struct LabelledLink {
    link: Link,
    label: String,
}

impl CodeStage for LabelledLink {
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        self.link.push(ev, out)
    }
    fn bits_flipped(&self) -> u64 {
        self.link.bits_flipped()
    }
    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine> {
        vec![BudgetLine {
            stage: format!("{}: delay and frame wait", self.label),
            seconds: self.link.mean_latency_s(sample_rate_hz),
        }]
    }
}

/// A digital link with delay, framing, bit errors and width conversion.
#[derive(Debug, Clone)]
pub struct Link {
    /// Fixed transport delay (s).
    delay_s: f64,
    /// Codes per frame (>= 1).
    frame: usize,
    /// Probability of a flip per transported bit.
    bit_error_rate: f64,
    /// ln(1 - bit_error_rate), for the geometric skip.
    ln_keep: f64,
    in_bits: u32,
    out_bits: u32,
    rng: ChaCha8Rng,
    /// Codes of the frame being filled (capacity `frame`, reused).
    pending: Vec<CodeEvent>,
    flipped: u64,
    /// Good bits still to send before the next flipped one.
    skip: u64,
}

impl Link {
    /// A link carrying codes that arrive `in_bits` wide as `cfg.bits`-wide words. Randomness (bit errors
    /// only) comes from `rng`. A `frame` of 0 is taken as 1.
    pub fn new(cfg: &LinkCfg, in_bits: u32, rng: ChaCha8Rng) -> Link {
        let frame = cfg.frame.max(1) as usize;
        let p = cfg.bit_error_rate.clamp(0.0, 1.0);
        let mut link = Link {
            delay_s: cfg.delay_s,
            frame,
            bit_error_rate: p,
            ln_keep: (-p).ln_1p(),
            in_bits,
            out_bits: cfg.bits,
            rng,
            pending: Vec::with_capacity(frame),
            flipped: 0,
            skip: 0,
        };
        link.skip = link.draw_skip();
        link
    }

    /// Word width on the link (bits).
    pub fn out_bits(&self) -> u32 {
        self.out_bits
    }

    /// Number of good bits before the next flip: geometric with P(K = k) = (1 - p)^k p, drawn as
    /// floor(ln U / ln(1 - p)) with U uniform in (0, 1]. `u64::MAX` (never) when p = 0.
    fn draw_skip(&mut self) -> u64 {
        if self.bit_error_rate == 0.0 {
            return u64::MAX;
        }
        let u = 1.0 - self.rng.random::<f64>(); // (0, 1]
        // p = 1 gives ln_keep = -inf and K = 0; the cast saturates for huge K.
        (u.ln() / self.ln_keep).floor() as u64
    }

    /// Convert `code` from the input width to the link width.
    fn convert(&self, code: u32) -> u32 {
        let c = code as u64 & mask(self.in_bits);
        let c = if self.out_bits < self.in_bits {
            c >> (self.in_bits - self.out_bits)
        } else {
            c << (self.out_bits - self.in_bits)
        };
        (c & mask(self.out_bits)) as u32
    }

    /// Push one arriving code (arrival instant = its `t_avail_s`). Codes that leave the link (a whole
    /// frame, when this code completes it) are appended to `out` in order; code i of the frame becomes
    /// available at its own arrival + (last arrival - first arrival) + delay, i.e. the frame is played out at
    /// the pace it was filled; `t_sample_s` is kept.
    pub fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        let mut code = self.convert(ev.code);
        if self.bit_error_rate > 0.0 {
            let w = self.out_bits as u64;
            let mut pos = 0u64; // bits of this word already sent, MSB first
            loop {
                let remaining = w - pos;
                if self.skip >= remaining {
                    self.skip -= remaining;
                    break;
                }
                pos += self.skip;
                code ^= 1u32 << (w - 1 - pos);
                self.flipped += 1;
                pos += 1;
                self.skip = self.draw_skip();
            }
        }
        self.pending.push(CodeEvent { code, ..ev });
        if self.pending.len() >= self.frame {
            let fill_s = ev.t_avail_s - self.pending[0].t_avail_s;
            let delay_s = self.delay_s;
            out.extend(self.pending.drain(..).map(|e| CodeEvent {
                t_avail_s: e.t_avail_s + fill_s + delay_s,
                ..e
            }));
        }
    }

    /// Bits flipped so far.
    pub fn bits_flipped(&self) -> u64 {
        self.flipped
    }

    /// Latency (s) this link adds for codes arriving uniformly at `sample_rate_hz`: the delay plus the
    /// time a frame of F codes takes to fill, (F - 1) periods (the same for every code, since the far
    /// end plays the frame out at the pace it was filled).
    pub fn mean_latency_s(&self, sample_rate_hz: f64) -> f64 {
        self.delay_s + (self.frame as f64 - 1.0) / sample_rate_hz
    }
}

/// The low `bits` bits set (bits <= 64).
fn mask(bits: u32) -> u64 {
    if bits >= 64 {
        u64::MAX
    } else {
        (1u64 << bits) - 1
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn cfg(delay_s: f64, frame: u32, ber: f64, bits: u32) -> LinkCfg {
        LinkCfg {
            delay_s,
            frame,
            bit_error_rate: ber,
            bits,
        }
    }

    fn stream(n: usize, rate: f64, bits: u32, seed: u64) -> Vec<CodeEvent> {
        let mut r = ChaCha8Rng::seed_from_u64(seed);
        (0..n)
            .map(|k| {
                let t = k as f64 / rate;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t + 0.37 / rate,
                    code: (r.random::<u64>() & mask(bits)) as u32,
                }
            })
            .collect()
    }

    fn run(link: &mut Link, evs: &[CodeEvent]) -> Vec<CodeEvent> {
        let mut out = Vec::new();
        for e in evs {
            link.push(*e, &mut out);
        }
        out
    }

    #[test]
    fn delay_only_shifts_the_availability_instant() {
        let delay = 3.3e-6;
        let mut link = Link::new(&cfg(delay, 1, 0.0, 12), 12, ChaCha8Rng::seed_from_u64(1));
        let evs = stream(500, 1e5, 12, 2);
        let out = run(&mut link, &evs);
        assert_eq!(out.len(), evs.len());
        for (a, b) in evs.iter().zip(&out) {
            assert_eq!(b.code, a.code);
            assert_eq!(b.t_sample_s, a.t_sample_s);
            assert_eq!(b.t_avail_s, a.t_avail_s + delay);
        }
        assert_eq!(link.bits_flipped(), 0);
        assert_eq!(link.mean_latency_s(1e5), delay);
    }

    #[test]
    fn framing_groups_codes_and_releases_them_with_the_last_arrival() {
        let delay = 1e-6;
        let mut link = Link::new(&cfg(delay, 4, 0.0, 8), 8, ChaCha8Rng::seed_from_u64(1));
        let evs = stream(10, 1e5, 8, 3);
        let mut out = Vec::new();
        for (k, e) in evs.iter().enumerate() {
            link.push(*e, &mut out);
            // Nothing leaves until a frame is full.
            assert_eq!(out.len(), (k + 1) / 4 * 4, "after {} pushes", k + 1);
        }
        assert_eq!(out.len(), 8);
        for (i, o) in out.iter().enumerate() {
            let first = evs[i / 4 * 4];
            let last = evs[i / 4 * 4 + 3];
            // Released when the frame is full, played out at the pace it was filled.
            assert!(o.t_avail_s >= last.t_avail_s + delay - 1e-15);
            let want = evs[i].t_avail_s + (last.t_avail_s - first.t_avail_s) + delay;
            assert!((o.t_avail_s - want).abs() < 1e-15);
            assert_eq!(o.code, evs[i].code);
            assert_eq!(o.t_sample_s, evs[i].t_sample_s);
        }
    }

    #[test]
    fn measured_mean_latency_matches_the_formula() {
        let rate = 48e3;
        let delay = 2e-4;
        let mut link = Link::new(&cfg(delay, 5, 0.0, 16), 16, ChaCha8Rng::seed_from_u64(1));
        let evs = stream(1000, rate, 16, 4); // 200 whole frames
        let out = run(&mut link, &evs);
        assert_eq!(out.len(), 1000);
        let mean = evs
            .iter()
            .zip(&out)
            .map(|(a, b)| b.t_avail_s - a.t_avail_s)
            .sum::<f64>()
            / 1000.0;
        let want = link.mean_latency_s(rate);
        assert!((mean - want).abs() < 1e-12, "{mean} vs {want}");
        assert!((want - (delay + 4.0 / rate)).abs() < 1e-15);
    }

    /// Run `words` codes of width `bits` at bit error rate `p`; return (flips counted by the link,
    /// flips seen as differing bits, flips per bit position from the MSB).
    fn flip_experiment(p: f64, bits: u32, words: usize, seed: u64) -> (u64, u64, Vec<u64>) {
        let mut link = Link::new(&cfg(0.0, 1, p, bits), bits, ChaCha8Rng::seed_from_u64(seed));
        let evs = stream(words, 1e6, bits, seed + 1);
        let out = run(&mut link, &evs);
        let mut per_pos = vec![0u64; bits as usize];
        let mut seen = 0;
        for (a, b) in evs.iter().zip(&out) {
            let x = a.code ^ b.code;
            seen += x.count_ones() as u64;
            for (i, c) in per_pos.iter_mut().enumerate() {
                *c += ((x >> (bits - 1 - i as u32)) & 1) as u64;
            }
        }
        (link.bits_flipped(), seen, per_pos)
    }

    #[test]
    fn bit_flip_rate_is_within_binomial_bounds() {
        // The number of flips in n independent bits is binomial(n, p): mean n p, sigma sqrt(n p (1-p));
        // we allow 5 sigma (common practice, no source).
        for (p, seed) in [(1e-3, 10u64), (1e-2, 11), (0.25, 12)] {
            let bits = 16;
            let words = 62_500; // 1e6 bits
            let n = (bits as usize * words) as f64;
            let (counted, seen, per_pos) = flip_experiment(p, bits, words, seed);
            assert_eq!(counted, seen);
            let mean = n * p;
            let sigma = (n * p * (1.0 - p)).sqrt();
            assert!(
                (counted as f64 - mean).abs() < 5.0 * sigma,
                "p={p}: {counted} flips, expected {mean} +- {sigma}"
            );
            // Each bit position gets its share, binomial(n / bits, p).
            let m = n / bits as f64;
            let s = (m * p * (1.0 - p)).sqrt();
            for (i, c) in per_pos.iter().enumerate() {
                assert!((*c as f64 - m * p).abs() < 5.0 * s, "p={p} pos {i}: {c}");
            }
        }
    }

    #[test]
    fn no_errors_at_zero_and_every_bit_flips_at_one() {
        let (counted, seen, _) = flip_experiment(0.0, 12, 1000, 1);
        assert_eq!((counted, seen), (0, 0));
        let (counted, seen, _) = flip_experiment(1.0, 12, 1000, 1);
        assert_eq!((counted, seen), (12_000, 12_000));
    }

    #[test]
    fn width_conversion_drops_or_pads_lsbs() {
        let e = |code| CodeEvent {
            t_sample_s: 0.0,
            t_avail_s: 0.0,
            code,
        };
        let mut out = Vec::new();
        let mut narrow = Link::new(&cfg(0.0, 1, 0.0, 12), 16, ChaCha8Rng::seed_from_u64(0));
        narrow.push(e(0xABCD), &mut out);
        narrow.push(e(0x000F), &mut out);
        let mut wide = Link::new(&cfg(0.0, 1, 0.0, 16), 12, ChaCha8Rng::seed_from_u64(0));
        wide.push(e(0xABC), &mut out);
        let mut same = Link::new(&cfg(0.0, 1, 0.0, 10), 10, ChaCha8Rng::seed_from_u64(0));
        same.push(e(0x3FF), &mut out);
        same.push(e(0x7FF), &mut out); // bits above the input width are ignored
        let codes: Vec<u32> = out.iter().map(|o| o.code).collect();
        assert_eq!(codes, vec![0xABC, 0x000, 0xABC0, 0x3FF, 0x3FF]);
        let mut full = Link::new(&cfg(0.0, 1, 0.0, 32), 24, ChaCha8Rng::seed_from_u64(0));
        out.clear();
        full.push(e(0xFF_FFFF), &mut out);
        assert_eq!(out[0].code, 0xFFFF_FF00);
    }

    #[test]
    fn the_same_seed_gives_the_same_errors() {
        let a = flip_experiment(0.01, 14, 5000, 99);
        let b = flip_experiment(0.01, 14, 5000, 99);
        assert_eq!(a, b);
        let c = flip_experiment(0.01, 14, 5000, 98);
        assert_ne!(a.2, c.2);
    }
}
