//! The `network` stage: codes sent in packets over a network with a variable delay, into a jitter buffer.
//!
//! Codes are grouped into packets of P = round(`packet` x fs) codes (fs the rate the codes arrive at, the
//! ADC's). A packet is sent when its last code arrives. It takes `delay` + J to cross the network, J drawn
//! afresh for each packet from `jitter_law` with standard deviation `jitter` and mean zero (so `delay` is the
//! mean one-way delay whatever the law). The receiver plays the packet out at send + `delay` +
//! `jitter_buffer`, its codes at the pace they were sent; a packet that arrives after that instant
//! (J > `jitter_buffer`) is lost: it is counted, the instant its first code should have played is kept, and
//! its codes are concealed: `concealment = "repeat"` plays the last packet received again (mid-scale before
//! any arrived), `"silence"` plays mid-scale codes (2^(N-1) of an N-bit offset-binary word, the zero of an
//! audio word). Every code therefore leaves (P - 1)/fs + `delay` + `jitter_buffer` after it arrived (the
//! packet's fill time plus the playout instant), lost or not: this is the stage's budget. A partial packet
//! at the end of a run is never sent.
//!
//! The laws of J (sigma = `jitter`), all of mean zero:
//! - `"fixed"`: J = 0 (`jitter` must then be 0);
//! - `"uniform"`: uniform on [-sqrt(3) sigma, sqrt(3) sigma];
//! - `"normal"`: Gaussian N(0, sigma^2); the fraction lost is the normal tail Q(jitter_buffer / sigma);
//! - `"pareto"`: heavy-tailed, one-sided queueing: J = X - E[X], X Pareto of shape (tail index) alpha =
//!   `jitter_shape` (> 2, so the variance is finite) and scale x_m, P(X > x) = (x_m / x)^alpha for x >= x_m,
//!   E[X] = alpha x_m / (alpha - 1), Var X = x_m^2 alpha / ((alpha - 1)^2 (alpha - 2)); x_m is set so the
//!   standard deviation is sigma. The fraction lost is (x_m / (jitter_buffer + E[X]))^alpha.
//!   (Pareto law: N. L. Johnson, S. Kotz and N. Balakrishnan, "Continuous Univariate Distributions", vol. 1,
//!   2nd ed., 1994, chapter 20.)

use rand::RngExt;
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
    Upstream, mechanism,
};
use crate::stages::roles::{BudgetLine, CodeStage};

/// The most loss instants kept for the report (the count is always complete).
pub const LOSS_TIMES_MAX: usize = 1000;

/// How the network's extra delay J is distributed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum JitterLaw {
    Fixed,
    Uniform,
    Normal,
    Pareto,
}

/// What a lost packet is replaced with.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Concealment {
    /// The last packet received, again.
    Repeat,
    /// Mid-scale codes.
    Silence,
}

/// `kind = "network"`: packets over a network with jitter, into a jitter buffer.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct NetworkCfg {
    /// Packet interval as written (s).
    pub packet_s: f64,
    /// Codes per packet: round(packet x fs) (resolved from the ADC's rate; 0 until resolved).
    pub packet_codes: u32,
    /// Mean one-way delay (s).
    pub delay_s: f64,
    /// Standard deviation of the one-way delay (s).
    pub jitter_s: f64,
    pub jitter_law: JitterLaw,
    /// Pareto tail index (used by the pareto law only).
    pub jitter_shape: f64,
    /// Playout this long after the mean arrival (s).
    pub jitter_buffer_s: f64,
    pub concealment: Concealment,
}

impl NetworkCfg {
    /// Codes per packet at `sample_rate_hz`.
    pub fn codes_per_packet(&self, sample_rate_hz: f64) -> u32 {
        (self.packet_s * sample_rate_hz).round().max(0.0) as u32
    }

    /// The latency every code takes for codes arriving at `sample_rate_hz`: (P - 1)/fs + delay +
    /// jitter_buffer (s).
    pub fn latency_s(&self, sample_rate_hz: f64) -> f64 {
        let p = self.codes_per_packet(sample_rate_hz).max(1);
        (f64::from(p) - 1.0) / sample_rate_hz + self.delay_s + self.jitter_buffer_s
    }

    /// The Pareto law's scale x_m and mean for standard deviation `jitter_s` and shape `jitter_shape`.
    fn pareto_scale_mean(&self) -> (f64, f64) {
        let a = self.jitter_shape;
        let xm = self.jitter_s * (a - 1.0) * ((a - 2.0) / a).sqrt();
        (xm, a * xm / (a - 1.0))
    }

    /// The probability that a packet is lost: P(J > jitter_buffer) (for tests and documentation; the normal
    /// law's tail is not computed here).
    pub fn loss_probability(&self) -> Option<f64> {
        let (s, d) = (self.jitter_s, self.jitter_buffer_s);
        match self.jitter_law {
            _ if s == 0.0 => Some(0.0),
            JitterLaw::Fixed => Some(0.0),
            JitterLaw::Uniform => {
                let h = 3f64.sqrt() * s;
                Some(((h - d) / (2.0 * h)).clamp(0.0, 1.0))
            }
            JitterLaw::Pareto => {
                let (xm, mean) = self.pareto_scale_mean();
                Some((xm / (d + mean)).min(1.0).powf(self.jitter_shape))
            }
            JitterLaw::Normal => None,
        }
    }
}

const LAWS: &[(&str, JitterLaw)] = &[
    ("fixed", JitterLaw::Fixed),
    ("uniform", JitterLaw::Uniform),
    ("normal", JitterLaw::Normal),
    ("pareto", JitterLaw::Pareto),
];
const CONCEALMENTS: &[(&str, Concealment)] = &[
    ("repeat", Concealment::Repeat),
    ("silence", Concealment::Silence),
];

impl KindSpec for NetworkCfg {
    const NAME: &'static str = "network";
    const ROLE: Role = Role::Code;
    const EXAMPLE: &'static str = r#"packet = "1 ms"
delay = "2 ms"
jitter = "0.2 ms"
jitter_law = "normal"
jitter_buffer = "1 ms"
concealment = "repeat""#;
    const PARAMS: &'static [Param] = &[
        Param::fixed("packet", ParamKind::Quantity(Dimension::Time)),
        Param::spread("delay", Dimension::Time),
        Param::spread("jitter", Dimension::Time),
        Param::fixed(
            "jitter_law",
            ParamKind::Choice(&["fixed", "uniform", "normal", "pareto"]),
        ),
        Param::fixed("jitter_shape", ParamKind::Number),
        Param::spread("jitter_buffer", Dimension::Time),
        Param::fixed("concealment", ParamKind::Choice(&["repeat", "silence"])),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        let packet_s = r.req_positive("packet", Dimension::Time, "\"1 ms\"")?.value;
        let delay_s = r.non_negative("delay", Dimension::Time)?;
        let law = r.choice("jitter_law", LAWS)?;
        let jitter_law = law.as_ref().map_or(JitterLaw::Normal, |l| l.value);
        let jitter_s = match r.quantity("jitter", Dimension::Time)? {
            None => 0.0,
            Some(q) if q.value < 0.0 => {
                return Err(r.error(
                    &q.span,
                    "jitter",
                    format!("must not be negative, found {}", si(q.value, "s")),
                ));
            }
            Some(q) if q.value > 0.0 && jitter_law == JitterLaw::Fixed => {
                return Err(r
                    .error(
                        &q.span,
                        "jitter",
                        format!(
                            "a fixed law has no spread, found jitter = {}",
                            si(q.value, "s")
                        ),
                    )
                    .with_hint(
                        "remove jitter, or choose jitter_law = \"uniform\", \"normal\" or \"pareto\"",
                    ));
            }
            Some(q) => q.value,
        };
        let jitter_shape = match r.number("jitter_shape")? {
            None => 3.0,
            Some(s) if jitter_law != JitterLaw::Pareto => {
                return Err(r
                    .error(&s.span, "jitter_shape", "only the pareto law has a shape")
                    .with_hint("remove jitter_shape, or set jitter_law = \"pareto\""));
            }
            Some(s) if !(s.value > 2.0 && s.value <= 100.0) => {
                return Err(r
                    .error(
                        &s.span,
                        "jitter_shape",
                        format!("must be above 2 and at most 100, found {}", s.value),
                    )
                    .with_hint(
                        "it is the Pareto tail index alpha; at or below 2 the delay has no finite \
                         standard deviation (3 is a heavy tail)",
                    ));
            }
            Some(s) => s.value,
        };
        let has_buffer = r.has("jitter_buffer");
        let jitter_buffer_s = r.non_negative("jitter_buffer", Dimension::Time)?;
        if jitter_s > 0.0 && !has_buffer {
            return Err(r
                .missing("jitter_buffer", "\"3 ms\"")
                .with_hint(format!(
                    "a jittered network needs a jitter buffer: how long after the mean arrival packets \
                     are played (packets later than that are lost), e.g. jitter_buffer = \"{}\" (3 x jitter)",
                    si(3.0 * jitter_s, "s")
                )));
        }
        let concealment = r
            .choice("concealment", CONCEALMENTS)?
            .map_or(Concealment::Repeat, |c| c.value);
        Ok(NetworkCfg {
            packet_s,
            packet_codes: 0,
            delay_s,
            jitter_s,
            jitter_law,
            jitter_shape,
            jitter_buffer_s,
            concealment,
        })
    }

    fn resolve(&mut self, up: &mut Upstream) {
        if let Some(fs) = up.sample_rate_hz {
            self.packet_codes = self.codes_per_packet(fs);
        }
    }

    fn ablations(&self) -> Vec<Ablation> {
        if self.jitter_s > 0.0 {
            vec![Ablation::new(
                mechanism::<Self>("jitter"),
                "jitter = 0",
                vec![KeyEdit::Set("jitter", 0.0)],
            )]
        } else {
            Vec::new()
        }
    }

    /// The packet interval, the mean delay and the jitter buffer.
    fn transport_s(&self, sample_rate_hz: f64) -> f64 {
        f64::from(self.codes_per_packet(sample_rate_hz).max(1)) / sample_rate_hz
            + self.delay_s
            + self.jitter_buffer_s
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let fs = ctx.upstream.sample_rate_hz.ok_or_else(|| {
            Error::BadInput(format!("{}: a network needs an ADC before it", ctx.label))
        })?;
        if self.codes_per_packet(fs) == 0 {
            return Err(Error::BadInput(format!(
                "{}: the packet ({}) is shorter than one sample at {}",
                ctx.label,
                si(self.packet_s, "s"),
                si(fs, "Hz")
            )));
        }
        Ok(Runtime::Code(Box::new(Network::new(
            self,
            fs,
            ctx.upstream.width_bits,
            ctx.rng.clone(),
            ctx.label.clone(),
        ))))
    }
}

/// A packet network with jitter, a jitter buffer and concealment of lost packets.
#[derive(Debug, Clone)]
pub struct Network {
    cfg: NetworkCfg,
    packet: usize,
    /// Pareto scale and mean (pareto law only).
    pareto_xm: f64,
    pareto_mean: f64,
    mid_code: u32,
    rng: ChaCha8Rng,
    /// The packet being filled (capacity `packet`, reused).
    pending: Vec<CodeEvent>,
    /// The codes of the last packet received.
    last_good: Vec<u32>,
    sent: u64,
    lost: u64,
    loss_times_s: Vec<f64>,
    label: String,
}

impl Network {
    /// A network for `bits`-wide codes arriving at `sample_rate_hz`; jitter drawn from `rng`.
    pub fn new(
        cfg: &NetworkCfg,
        sample_rate_hz: f64,
        bits: u32,
        rng: ChaCha8Rng,
        label: String,
    ) -> Network {
        let packet = cfg.codes_per_packet(sample_rate_hz).max(1) as usize;
        let (pareto_xm, pareto_mean) = cfg.pareto_scale_mean();
        Network {
            cfg: *cfg,
            packet,
            pareto_xm,
            pareto_mean,
            mid_code: 1u32 << (bits.clamp(1, 32) - 1),
            rng,
            pending: Vec::with_capacity(packet),
            last_good: Vec::with_capacity(packet),
            sent: 0,
            lost: 0,
            loss_times_s: Vec::new(),
            label,
        }
    }

    /// Packets sent so far.
    pub fn packets_sent(&self) -> u64 {
        self.sent
    }

    /// One draw of the extra delay J (s), mean zero, standard deviation `jitter`.
    fn draw_jitter(&mut self) -> f64 {
        let s = self.cfg.jitter_s;
        if s == 0.0 {
            return 0.0;
        }
        match self.cfg.jitter_law {
            JitterLaw::Fixed => 0.0,
            JitterLaw::Uniform => (2.0 * self.rng.random::<f64>() - 1.0) * 3f64.sqrt() * s,
            JitterLaw::Normal => {
                let z: f64 = StandardNormal.sample(&mut self.rng);
                s * z
            }
            JitterLaw::Pareto => {
                let u = 1.0 - self.rng.random::<f64>(); // (0, 1]
                self.pareto_xm * u.powf(-1.0 / self.cfg.jitter_shape) - self.pareto_mean
            }
        }
    }
}

impl CodeStage for Network {
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        self.pending.push(ev);
        if self.pending.len() < self.packet {
            return;
        }
        self.sent += 1;
        let fill_s = ev.t_avail_s - self.pending[0].t_avail_s;
        let playout_s = fill_s + self.cfg.delay_s + self.cfg.jitter_buffer_s;
        let j = self.draw_jitter();
        if j > self.cfg.jitter_buffer_s {
            self.lost += 1;
            if self.loss_times_s.len() < LOSS_TIMES_MAX {
                self.loss_times_s.push(self.pending[0].t_avail_s + playout_s);
            }
            let repeat = self.cfg.concealment == Concealment::Repeat
                && self.last_good.len() == self.pending.len();
            for (i, e) in self.pending.iter_mut().enumerate() {
                e.code = if repeat {
                    self.last_good[i]
                } else {
                    self.mid_code
                };
            }
        } else {
            self.last_good.clear();
            self.last_good.extend(self.pending.iter().map(|e| e.code));
        }
        out.extend(self.pending.drain(..).map(|e| CodeEvent {
            t_avail_s: e.t_avail_s + playout_s,
            ..e
        }));
    }

    fn packets_lost(&self) -> u64 {
        self.lost
    }

    fn packet_loss_times_s(&self) -> &[f64] {
        &self.loss_times_s
    }

    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine> {
        let p = self.packet;
        vec![
            BudgetLine {
                stage: format!(
                    "{}: packet fill ({} samples at {})",
                    self.label,
                    p,
                    si(sample_rate_hz, "Hz")
                ),
                seconds: (p as f64 - 1.0) / sample_rate_hz,
            },
            BudgetLine {
                stage: format!("{}: one-way delay (mean)", self.label),
                seconds: self.cfg.delay_s,
            },
            BudgetLine {
                stage: format!(
                    "{}: jitter buffer ({} jitter, {} law)",
                    self.label,
                    si(self.cfg.jitter_s, "s"),
                    match self.cfg.jitter_law {
                        JitterLaw::Fixed => "fixed",
                        JitterLaw::Uniform => "uniform",
                        JitterLaw::Normal => "normal",
                        JitterLaw::Pareto => "pareto",
                    }
                ),
                seconds: self.cfg.jitter_buffer_s,
            },
        ]
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn cfg(law: JitterLaw, jitter_s: f64, buffer_s: f64) -> NetworkCfg {
        NetworkCfg {
            packet_s: 1e-3,
            packet_codes: 0,
            delay_s: 5e-3,
            jitter_s,
            jitter_law: law,
            jitter_shape: 3.0,
            jitter_buffer_s: buffer_s,
            concealment: Concealment::Silence,
        }
    }

    fn stream(n: usize, rate: f64) -> Vec<CodeEvent> {
        (0..n)
            .map(|k| {
                let t = k as f64 / rate;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t + 0.2 / rate,
                    code: 1000 + (k % 50) as u32,
                }
            })
            .collect()
    }

    /// The normal tail Q(x) = erfc(x / sqrt 2) / 2 for x >= 0, with erfc by M. Abramowitz and I. A. Stegun,
    /// "Handbook of Mathematical Functions", 1964, formula 7.1.26 (absolute error below 1.5e-7).
    fn q_tail(x: f64) -> f64 {
        let z = x / 2f64.sqrt();
        let t = 1.0 / (1.0 + 0.327_591_1 * z);
        let poly = t
            * (0.254_829_592
                + t * (-0.284_496_736 + t * (1.421_413_741 + t * (-1.453_152_027 + t * 1.061_405_429))));
        0.5 * poly * (-z * z).exp()
    }

    /// Send `n` one-code packets; return the fraction lost.
    fn loss_fraction(c: &NetworkCfg, n: usize, seed: u64) -> f64 {
        let fs = 1e3; // one code per 1 ms packet
        let mut net = Network::new(c, fs, 12, ChaCha8Rng::seed_from_u64(seed), "n".into());
        let mut out = Vec::with_capacity(n);
        for e in stream(n, fs) {
            net.push(e, &mut out);
        }
        assert_eq!(net.packets_sent(), n as u64);
        net.packets_lost() as f64 / n as f64
    }

    #[test]
    fn the_fraction_lost_follows_the_jitter_laws_tail() {
        // Each packet is lost independently with probability p = P(J > D), so the count lost out of n is
        // binomial(n, p): the fraction's standard error is sqrt(p (1 - p) / n). We allow 3 standard errors
        // (common practice, no source). Normal law: J ~ N(0, sigma^2), so p = P(Z > D / sigma) = Q(D / sigma).
        let n = 200_000;
        let sigma = 1e-3;
        for (k, (law, d_over_sigma)) in [
            (JitterLaw::Normal, 0.5),
            (JitterLaw::Normal, 1.0),
            (JitterLaw::Normal, 2.0),
            (JitterLaw::Uniform, 0.5),
            (JitterLaw::Uniform, 1.5),
            (JitterLaw::Pareto, 0.0),
            (JitterLaw::Pareto, 2.0),
        ]
        .into_iter()
        .enumerate()
        {
            let c = cfg(law, sigma, d_over_sigma * sigma);
            let p = match law {
                JitterLaw::Normal => q_tail(d_over_sigma),
                // The closed forms of the module documentation.
                _ => c.loss_probability().unwrap(),
            };
            let got = loss_fraction(&c, n, 100 + k as u64);
            let se = (p * (1.0 - p) / n as f64).sqrt();
            assert!(
                (got - p).abs() < 3.0 * se,
                "{law:?} D = {d_over_sigma} sigma: lost {got}, expected {p} +- {se}"
            );
        }
        // The closed forms themselves, by hand: uniform on +-sqrt(3) sigma beyond 0.5 sigma:
        // (sqrt 3 - 0.5) / (2 sqrt 3); Pareto alpha = 3 at D = 0: x_m = 2 sigma sqrt(1/3), mean 1.5 x_m,
        // (1 / 1.5)^3 = 8/27.
        let u = cfg(JitterLaw::Uniform, sigma, 0.5 * sigma).loss_probability().unwrap();
        assert!((u - (3f64.sqrt() - 0.5) / (2.0 * 3f64.sqrt())).abs() < 1e-12);
        let p = cfg(JitterLaw::Pareto, sigma, 0.0).loss_probability().unwrap();
        assert!((p - 8.0 / 27.0).abs() < 1e-12);
        // Q itself against its tabled values (Abramowitz and Stegun, table 26.1): Q(1) = 0.158655,
        // Q(2) = 0.022750.
        assert!((q_tail(1.0) - 0.158_655).abs() < 1e-6);
        assert!((q_tail(2.0) - 0.022_750).abs() < 1e-6);
    }

    #[test]
    fn the_drawn_jitter_has_mean_zero_and_the_asked_spread() {
        for law in [JitterLaw::Uniform, JitterLaw::Normal, JitterLaw::Pareto] {
            let c = cfg(law, 2e-3, 0.0);
            let mut net = Network::new(&c, 1e3, 12, ChaCha8Rng::seed_from_u64(5), "n".into());
            let n = 400_000;
            let (mut s1, mut s2) = (0.0, 0.0);
            for _ in 0..n {
                let j = net.draw_jitter();
                s1 += j;
                s2 += j * j;
            }
            let mean = s1 / n as f64;
            let sd = (s2 / n as f64 - mean * mean).sqrt();
            // The Pareto law of shape 3 has an infinite fourth moment: its sample spread converges slowly,
            // so it gets a wider bound (5 % rather than 1 %).
            let tol = if law == JitterLaw::Pareto { 0.05 } else { 0.01 };
            assert!(mean.abs() < 0.02 * 2e-3, "{law:?}: mean {mean}");
            assert!((sd / 2e-3 - 1.0).abs() < tol, "{law:?}: sd {sd}");
        }
    }

    #[test]
    fn every_code_leaves_after_fill_delay_and_buffer_and_lost_packets_are_concealed() {
        let fs = 48e3;
        for concealment in [Concealment::Repeat, Concealment::Silence] {
            let mut c = cfg(JitterLaw::Normal, 1e-3, 0.5e-3);
            c.concealment = concealment;
            let mut net = Network::new(&c, fs, 12, ChaCha8Rng::seed_from_u64(9), "n".into());
            let evs = stream(48 * 400 + 7, fs);
            let mut out = Vec::new();
            for e in &evs {
                net.push(*e, &mut out);
            }
            assert_eq!(out.len(), 48 * 400, "the partial packet stays");
            let want = c.latency_s(fs);
            assert!((want - (47.0 / fs + 5e-3 + 0.5e-3)).abs() < 1e-15);
            for (a, o) in evs.iter().zip(&out) {
                assert!((o.t_avail_s - a.t_avail_s - want).abs() < 1e-12);
            }
            let lost = net.packets_lost();
            assert!(lost > 50 && lost < 200, "{lost} of 400 (Q(0.5) = 0.31)");
            assert_eq!(net.packet_loss_times_s().len(), lost as usize);
            let mut concealed = 0;
            for (p, chunk) in out.chunks(48).enumerate() {
                let first = evs[p * 48];
                let t_play = first.t_avail_s + want;
                let is_lost = net
                    .packet_loss_times_s()
                    .iter()
                    .any(|t| (t - t_play).abs() < 1e-12);
                let original: Vec<u32> = evs[p * 48..p * 48 + 48].iter().map(|e| e.code).collect();
                let got: Vec<u32> = chunk.iter().map(|e| e.code).collect();
                if !is_lost {
                    assert_eq!(got, original, "packet {p} received");
                    continue;
                }
                concealed += 1;
                match concealment {
                    Concealment::Silence => assert!(got.iter().all(|&c| c == 2048)),
                    // A packet of 48 codes holds whole 50-code cycles shifted: repeating the previous one
                    // differs from the original.
                    Concealment::Repeat if p > 0 => {
                        let prev: Vec<u32> = out[(p - 1) * 48..p * 48].iter().map(|e| e.code).collect();
                        assert_eq!(got, prev, "packet {p} repeats the one before");
                        assert_ne!(got, original);
                    }
                    Concealment::Repeat => {}
                }
            }
            assert_eq!(concealed, lost);
        }
    }
}
