//! The DAC stage: a resistor ladder (ideal, R-2R or binary-weighted) with drawn resistor values, gain
//! error and offset, a zero-order hold that switches at each code's availability instant, and the output
//! amplifier of [`crate::stages::slew`].
//!
//! Bit weights are relative to the nominal full scale: an ideal ladder gives exactly `2^-(k+1)` for
//! bit `k` (MSB `k = 0`), and drawn resistors are NOT renormalised, so tolerance shows as gain error and
//! DNL as in a real part.

use rand::RngExt;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use serde::Serialize;

use crate::signal::stream::{CodeEvent, Timebase};
use crate::engine::clock::{DAC_CLOCK_PARAMS, DacClockCfg, FifoTiming, read_dac_clock};
use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::Dimension;
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, Rates, ReadContext, Role, Runtime,
    Upstream, mechanism,
};
use crate::stages::roles::{BudgetLine, Reconstructor};
use crate::stages::sar_adc::MAX_BITS;
use crate::stages::slew::{OUTPUT_AMP_PARAMS, OutputAmp, OutputAmpCfg, read_output_amp};

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Ladder {
    Ideal,
    R2r,
    Binary,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ToleranceDistribution {
    /// Uniform within +-tolerance.
    Uniform,
    /// Gaussian with sigma = tolerance / 3.
    Gaussian,
}

/// `kind = "dac"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DacCfg {
    /// Resolved: given, or the width of the codes arriving (0 until resolved).
    pub bits: u32,
    /// Code k gives low + k (high - low)/2^bits. Resolved: given, or the quantizer's range.
    pub range_v: (f64, f64),
    /// `range` was written in the scenario (otherwise the quantizer's range is taken).
    #[serde(skip)]
    pub range_given: bool,
    pub ladder: Ladder,
    /// Relative resistor tolerance (0.01 = 1 %).
    pub tolerance: f64,
    pub tolerance_distribution: ToleranceDistribution,
    pub offset_v: f64,
    /// Relative gain error (0.01 = +1 %).
    pub gain_error: f64,
    pub output: OutputAmpCfg,
    /// Rms of the reference's noise (V), drawn once per code update: the span (the reference) becomes
    /// span + e, scaling the code's level above the range's low end by (1 + e / span). 0 = a quiet reference.
    pub reference_noise_v: f64,
    /// The DAC's clock and the FIFO it reads codes through when they come from another clock.
    #[serde(flatten)]
    pub clock: DacClockCfg,
}

impl KindSpec for DacCfg {
    const NAME: &'static str = "dac";
    const ROLE: Role = Role::Reconstructor;
    const EXAMPLE: &'static str = r#"ladder = "r2r"
tolerance = "0.1%"
slew_rate = "10 V/us"
settling = "1 us""#;
    const PARAMS: &'static [Param] = {
        use Dimension as D;
        &[
            Param::fixed("bits", ParamKind::Integer),
            Param::fixed("range", ParamKind::Pair(D::Voltage)),
            Param::fixed("ladder", ParamKind::Choice(&["ideal", "r2r", "binary"])),
            Param::spread("tolerance", D::Ratio),
            Param::fixed(
                "tolerance_distribution",
                ParamKind::Choice(&["uniform", "gaussian"]),
            ),
            Param::spread("offset", D::Voltage),
            Param::spread("gain_error", D::Ratio),
            Param::spread("reference_noise", D::Voltage),
            OUTPUT_AMP_PARAMS[0],
            OUTPUT_AMP_PARAMS[1],
            OUTPUT_AMP_PARAMS[2],
            OUTPUT_AMP_PARAMS[3],
            DAC_CLOCK_PARAMS[0],
            DAC_CLOCK_PARAMS[1],
            DAC_CLOCK_PARAMS[2],
        ]
    };

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        read_dac(r)
    }

    /// Without `bits` the DAC takes the width of the codes arriving; without `range`, the quantizer's.
    fn resolve(&mut self, up: &mut Upstream) {
        if self.bits == 0 {
            self.bits = up.width_bits;
        }
        if !self.range_given {
            self.range_v = up.quantizer_range_v.unwrap_or((0.0, 0.0));
        }
        self.clock.resolve(up);
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        self.clock.echo_into(&mut v);
        v
    }

    fn ablations(&self) -> Vec<Ablation> {
        let mut out = self.output.ablations(Self::NAME);
        if self.ladder != Ladder::Ideal && self.tolerance > 0.0 {
            out.push(Ablation::new(
                mechanism::<Self>("tolerance"),
                "tolerance = 0",
                vec![KeyEdit::Set("tolerance", 0.0)],
            ));
        }
        out
    }

    fn rates(&self) -> Rates {
        Rates {
            lowpass_hz: self.output.bandwidth_hz(),
            highpass_hz: None,
        }
    }

    /// The DAC's span over the quantizer's: the chain's gain through the converters.
    fn passband_gain(&self, up: &Upstream) -> f64 {
        match up.quantizer_range_v {
            Some((lo, hi)) => {
                let (a, b) = self.range_v;
                (b - a) / (hi - lo)
            }
            None => 1.0,
        }
    }

    fn has_static_levels(&self) -> bool {
        self.bits >= 2
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let mut rng = ctx.rng.clone();
        Ok(Runtime::Reconstructor(Box::new(LabelledDac {
            dac: Dac::new(self, &mut rng),
            cfg: *self,
            label: ctx.label.clone(),
        })))
    }
}

fn read_dac(r: &mut TableReader<'_, '_>) -> std::result::Result<DacCfg, ScenarioError> {
    use Dimension as D;
    let bits = r.integer("bits", 1, MAX_BITS)?;
    let range = r.pair("range", D::Voltage)?;
    let ladder = r
        .choice(
            "ladder",
            &[
                ("ideal", Ladder::Ideal),
                ("r2r", Ladder::R2r),
                ("binary", Ladder::Binary),
            ],
        )?
        .map_or(Ladder::Ideal, |q| q.value);
    let tolerance = r.non_negative("tolerance", D::Ratio)?;
    if tolerance >= 1.0 {
        let span = r
            .take("tolerance")
            .map(|n| n.span.clone())
            .unwrap_or_default();
        return Err(r
            .error(
                &span,
                "tolerance",
                format!("must be below 1 (100 %), found {tolerance}"),
            )
            .with_hint("write a relative tolerance such as \"1%\" or 0.001"));
    }
    let tolerance_distribution = r
        .choice(
            "tolerance_distribution",
            &[
                ("uniform", ToleranceDistribution::Uniform),
                ("gaussian", ToleranceDistribution::Gaussian),
            ],
        )?
        .map_or(ToleranceDistribution::Uniform, |q| q.value);
    let offset_v = r.quantity("offset", D::Voltage)?.map_or(0.0, |q| q.value);
    let gain_error = match r.quantity("gain_error", D::Ratio)? {
        Some(g) if g.value <= -1.0 => {
            return Err(r.error(
                &g.span,
                "gain_error",
                format!("must be above -1 (-100 %), found {}", g.value),
            ));
        }
        g => g.map_or(0.0, |q| q.value),
    };
    let output = read_output_amp(r)?;
    Ok(DacCfg {
        bits: bits.as_ref().map_or(0, |b| b.value as u32),
        range_v: range.as_ref().map_or((0.0, 0.0), |q| q.value),
        range_given: range.is_some(),
        ladder,
        tolerance,
        tolerance_distribution,
        offset_v,
        gain_error,
        output,
        reference_noise_v: r.non_negative("reference_noise", D::Voltage)?,
        clock: read_dac_clock(r)?,
    })
}

/// A DAC with its configuration and label: the reconstructor role.
pub struct LabelledDac {
    dac: Dac,
    cfg: DacCfg,
    label: String,
}

impl Reconstructor for LabelledDac {
    fn render(
        &mut self,
        timebase: Timebase,
        n0: u64,
        events: &[CodeEvent],
        out: &mut [f64],
    ) -> usize {
        self.dac.render(timebase, n0, events, out)
    }
    fn level_v(&self, code: u32) -> f64 {
        self.dac.level_v(code)
    }
    fn bits(&self) -> u32 {
        self.cfg.bits
    }
    fn range_v(&self) -> (f64, f64) {
        self.cfg.range_v
    }
    fn fifo(&self) -> Option<FifoTiming> {
        self.cfg.clock.fifo_timing()
    }
    fn clock_ppm(&self) -> f64 {
        self.cfg.clock.clock_ppm
    }
    /// Half an update period for the zero-order hold, and the output amplifier's lag at `f_hz`.
    fn budget(&self, update_rate_hz: f64, f_hz: f64) -> Vec<BudgetLine> {
        let mut lines = vec![BudgetLine {
            stage: format!("{}: zero-order hold (half an update period)", self.label),
            seconds: 0.5 / update_rate_hz,
        }];
        if let Some(tau) = self.cfg.output.tau_s {
            let w = 2.0 * std::f64::consts::PI * f_hz;
            let lag = if w > 0.0 { (w * tau).atan() / w } else { tau };
            lines.push(BudgetLine {
                stage: format!("{}: output amplifier lag", self.label),
                seconds: lag,
            });
        }
        lines
    }
}

/// Smallest relative resistor value a draw may give (guards against a Gaussian draw at an absurd
/// tolerance making a resistor zero or negative).
const MIN_RESISTOR_FACTOR: f64 = 1e-6;

/// Drawn resistor values, relative to the nominal unit resistor R (= 1).
#[derive(Debug, Clone, PartialEq)]
enum Resistors {
    Ideal,
    /// Current-mode R-2R: `shunt[k]` (2R) from node k to bit k's switch, `series[k]` (R) between nodes
    /// k and k+1, `term` (2R) from the LSB node to ground. The reference drives node 0 (MSB end).
    R2r {
        shunt: Vec<f64>,
        series: Vec<f64>,
        term: f64,
    },
    /// Binary-weighted: `r[k]` (R 2^k) from the reference to the output bus for bit k.
    Binary {
        r: Vec<f64>,
    },
}

/// A DAC with its drawn ladder, zero-order hold and output amplifier.
#[derive(Debug, Clone)]
pub struct Dac {
    bits: u32,
    low_v: f64,
    full_scale_v: f64,
    gain_error: f64,
    offset_v: f64,
    /// Relative bit weights, MSB first.
    weights: Vec<f64>,
    #[cfg_attr(not(test), allow(dead_code))]
    resistors: Resistors,
    amp: OutputAmp,
    /// The level the hold presents to the amplifier now (V).
    target_v: f64,
    /// The instant the amplifier state refers to (s).
    t_cur_s: f64,
    /// Reference noise relative to the span (rms) and its random stream; None for a quiet reference.
    reference: Option<(f64, ChaCha8Rng)>,
}

/// One drawn resistor factor (1 + error).
fn draw_factor(cfg: &DacCfg, rng: &mut ChaCha8Rng) -> f64 {
    if cfg.tolerance == 0.0 {
        return 1.0;
    }
    let err = match cfg.tolerance_distribution {
        ToleranceDistribution::Uniform => cfg.tolerance * (2.0 * rng.random::<f64>() - 1.0),
        ToleranceDistribution::Gaussian => {
            let z: f64 = StandardNormal.sample(rng);
            z * cfg.tolerance / 3.0
        }
    };
    (1.0 + err).max(MIN_RESISTOR_FACTOR)
}

/// Bit currents of a current-mode R-2R ladder driven by Vref = 1 V with unit R, i.e. the weights
/// `I_k / (Vref / R)`. Nodal equations for nodes 1..n-1 (node 0 is held at Vref), solved as a
/// tridiagonal system (Thomas algorithm); both switch positions sit at 0 V.
fn r2r_weights(shunt: &[f64], series: &[f64], term: f64) -> Vec<f64> {
    let n = shunt.len();
    let mut v = vec![0.0; n];
    v[0] = 1.0;
    if n > 1 {
        let m = n - 1; // unknowns: nodes 1..n-1, index j -> node j + 1
        let mut diag = vec![0.0; m];
        let mut upper = vec![0.0; m]; // coefficient of V_{j+1} in row j
        let mut lower = vec![0.0; m]; // coefficient of V_{j-1} in row j
        let mut rhs = vec![0.0; m];
        for j in 0..m {
            let node = j + 1;
            let g_up = 1.0 / series[node - 1];
            let g_down = if node < n - 1 {
                1.0 / series[node]
            } else {
                1.0 / term
            };
            diag[j] = g_up + g_down + 1.0 / shunt[node];
            if node < n - 1 {
                upper[j] = -1.0 / series[node];
            }
            if j == 0 {
                rhs[j] = g_up * v[0];
            } else {
                lower[j] = -g_up;
            }
        }
        // Forward sweep.
        for j in 1..m {
            let w = lower[j] / diag[j - 1];
            diag[j] -= w * upper[j - 1];
            rhs[j] -= w * rhs[j - 1];
        }
        // Back substitution.
        v[m] = rhs[m - 1] / diag[m - 1];
        for j in (0..m - 1).rev() {
            v[j + 1] = (rhs[j] - upper[j] * v[j + 2]) / diag[j];
        }
    }
    v.iter().zip(shunt).map(|(vk, rk)| vk / rk).collect()
}

impl Dac {
    /// Build the DAC, drawing the ladder's resistors from `rng` (uniform within +-tolerance, or Gaussian
    /// with sigma = tolerance/3). Draw order: R-2R: for each bit from the MSB, its 2R shunt then the R
    /// towards the next bit; then the terminating 2R. Binary: one resistor per bit from the MSB. The ideal
    /// ladder (and a zero tolerance) draws nothing.
    ///
    /// The output starts settled at `level_v(0)` (the level before the first code arrives).
    pub fn new(cfg: &DacCfg, rng: &mut ChaCha8Rng) -> Dac {
        let n = cfg.bits as usize;
        let (resistors, weights) = match cfg.ladder {
            Ladder::Ideal => (
                Resistors::Ideal,
                (0..n).map(|k| 0.5f64.powi(k as i32 + 1)).collect(),
            ),
            Ladder::R2r => {
                let mut shunt = Vec::with_capacity(n);
                let mut series = Vec::with_capacity(n.saturating_sub(1));
                for k in 0..n {
                    shunt.push(2.0 * draw_factor(cfg, rng));
                    if k + 1 < n {
                        series.push(draw_factor(cfg, rng));
                    }
                }
                let term = 2.0 * draw_factor(cfg, rng);
                let w = r2r_weights(&shunt, &series, term);
                (
                    Resistors::R2r {
                        shunt,
                        series,
                        term,
                    },
                    w,
                )
            }
            Ladder::Binary => {
                let r: Vec<f64> = (0..n)
                    .map(|k| 2f64.powi(k as i32) * draw_factor(cfg, rng))
                    .collect();
                // Current Vref/r_k relative to the MSB's nominal Vref/R times 1/2.
                let w = r.iter().map(|rk| 0.5 / rk).collect();
                (Resistors::Binary { r }, w)
            }
        };
        let mut dac = Dac {
            bits: cfg.bits,
            low_v: cfg.range_v.0,
            full_scale_v: cfg.range_v.1 - cfg.range_v.0,
            gain_error: cfg.gain_error,
            offset_v: cfg.offset_v,
            weights,
            resistors,
            amp: OutputAmp::new(&cfg.output, 0.0),
            target_v: 0.0,
            t_cur_s: 0.0,
            // Drawn after the ladder, from the same stream, so a quiet reference leaves the ladder unchanged.
            reference: (cfg.reference_noise_v > 0.0).then(|| {
                (
                    cfg.reference_noise_v / (cfg.range_v.1 - cfg.range_v.0),
                    rng.clone(),
                )
            }),
        };
        dac.target_v = dac.level_v(0);
        dac.amp.set_value_v(dac.target_v);
        dac
    }

    /// Word width (bits).
    pub fn bits(&self) -> u32 {
        self.bits
    }

    /// Relative bit weights (MSB first); an ideal ladder gives `2^-(k+1)`, summing to `1 - 2^-bits`.
    pub fn bit_weights(&self) -> &[f64] {
        &self.weights
    }

    /// Static output (V) for `code` before the output amplifier:
    /// `low + full_scale * sum(weights of the set bits) * (1 + gain_error) + offset`.
    /// Bits above the word width are ignored.
    pub fn level_v(&self, code: u32) -> f64 {
        let mut sum = 0.0;
        for (k, w) in self.weights.iter().enumerate() {
            let bit = self.bits - 1 - k as u32;
            if (code >> bit) & 1 == 1 {
                sum += w;
            }
        }
        self.low_v + self.full_scale_v * sum * (1.0 + self.gain_error) + self.offset_v
    }

    /// Small-signal response of the output amplifier (the hold's own sinc is not included).
    pub fn amp_response(&self, f_hz: f64) -> num_complex::Complex64 {
        self.amp.response(f_hz)
    }

    /// Render the output (V) on grid samples `n0 .. n0 + out.len()` (sample n at `timebase.time_s(n)`).
    ///
    /// `events`: every code event not yet consumed, in time order. The DAC consumes those whose
    /// `t_avail_s` is at or before the last output sample's time and returns how many; the caller passes
    /// the rest again next time. The held level switches at exactly `t_avail_s` (a code available exactly
    /// at a grid instant shows at that sample); the amplifier is integrated exactly between event and grid
    /// instants. Events older than the state's instant take effect at that instant. Before the first
    /// code the held level is `level_v(0)`. State (held level, amplifier, time) carries across calls, so
    /// splitting a run into blocks gives identical results.
    pub fn render(
        &mut self,
        timebase: Timebase,
        n0: u64,
        events: &[CodeEvent],
        out: &mut [f64],
    ) -> usize {
        if self.amp.is_instant() {
            return self.render_cells(timebase, n0, events, out);
        }
        let mut i = 0;
        // An event within a millionth of a grid step after a grid instant is taken as at that instant: event
        // times are sums of floating-point terms, and a rounding error must not move a step by a whole grid step.
        let eps_s = 1e-6 * timebase.dt_s();
        let grid_dt_s = timebase.dt_s();
        // A whole grid step with no event in it uses the grid step itself (not the difference of two rounded
        // instants), so the amplifier's cached decay factor applies.
        let mut prev_t = if n0 > 0 {
            timebase.time_s(n0 - 1)
        } else {
            f64::NAN
        };
        let len = out.len();
        let mut j = 0;
        while j < len {
            let t_n = timebase.time_s(n0 + j as u64);
            while let Some(ev) = events.get(i) {
                if ev.t_avail_s > t_n + eps_s {
                    break;
                }
                let t_ev = ev.t_avail_s.min(t_n);
                if t_ev > self.t_cur_s {
                    self.amp.advance_const(self.target_v, t_ev - self.t_cur_s);
                    self.t_cur_s = t_ev;
                }
                self.target_v = self.level_v(ev.code);
                if let Some((rel, rng)) = &mut self.reference {
                    let z: f64 = StandardNormal.sample(rng);
                    self.target_v = self.low_v + (self.target_v - self.low_v) * (1.0 + *rel * z);
                }
                i += 1;
            }
            if self.t_cur_s != prev_t {
                // A partial step (after an event, or at the start): one step on its own.
                let dt = (t_n - self.t_cur_s).max(0.0);
                out[j] = self.amp.advance_const(self.target_v, dt);
                self.t_cur_s = self.t_cur_s.max(t_n);
                prev_t = t_n;
                j += 1;
            }
            // Whole grid steps up to the next event's step: the target is constant, one run.
            let end = match events.get(i) {
                Some(ev) => first_due_step(timebase, n0, j, len, ev.t_avail_s, eps_s),
                None => len,
            };
            if end > j {
                self.amp
                    .advance_const_run(self.target_v, grid_dt_s, &mut out[j..end]);
                let t_last = timebase.time_s(n0 + end as u64 - 1);
                self.t_cur_s = self.t_cur_s.max(t_last);
                prev_t = t_last;
                j = end;
            }
        }
        i
    }

    /// [`Dac::render`] without output dynamics: grid sample n holds the average of the zero-order hold over its
    /// cell `[t_n - dt/2, t_n + dt/2)`, so a step at any instant t_e inside a cell shows as the fraction of the
    /// cell after it. That is the hold convolved with a centred box one grid step wide: no delay, a droop of
    /// sinc(f dt) (0.2 dB at a tenth of the grid rate), and the first moment of every step (where the
    /// cross-correlation and the phase see it) exactly at t_e, whatever the grid rate; sampling the hold at the
    /// grid instants instead moves each step to the next grid instant, an error of up to a grid step. Events
    /// before the first cell's start take effect at its start. Consumes the events before the last cell's end.
    fn render_cells(
        &mut self,
        timebase: Timebase,
        n0: u64,
        events: &[CodeEvent],
        out: &mut [f64],
    ) -> usize {
        let dt = timebase.dt_s();
        let mut i = 0;
        let mut level = self.amp.clamp_v(self.target_v);
        for (j, y) in out.iter_mut().enumerate() {
            let t_n = timebase.time_s(n0 + j as u64);
            let lo = t_n - 0.5 * dt;
            let hi = t_n + 0.5 * dt;
            // y = final level - sum over the steps of (step size) x (time from the cell's start to the step) / dt.
            let mut early = 0.0;
            while let Some(ev) = events.get(i) {
                if ev.t_avail_s >= hi {
                    break;
                }
                self.target_v = self.level_v(ev.code);
                if let Some((rel, rng)) = &mut self.reference {
                    let z: f64 = StandardNormal.sample(rng);
                    self.target_v = self.low_v + (self.target_v - self.low_v) * (1.0 + *rel * z);
                }
                let next = self.amp.clamp_v(self.target_v);
                early += (next - level) * (ev.t_avail_s - lo).max(0.0);
                level = next;
                i += 1;
            }
            *y = if early == 0.0 {
                level
            } else {
                level - early / dt
            };
        }
        self.amp.set_value_v(level);
        self.t_cur_s = timebase.time_s(n0 + out.len() as u64) - 0.5 * dt;
        i
    }

    /// The per-step form of [`Dac::render`] (one amplifier step per grid sample), kept as the reference for the
    /// run-wise rendering.
    #[cfg(test)]
    fn render_per_step(
        &mut self,
        timebase: Timebase,
        n0: u64,
        events: &[CodeEvent],
        out: &mut [f64],
    ) -> usize {
        let mut i = 0;
        let eps_s = 1e-6 * timebase.dt_s();
        let grid_dt_s = timebase.dt_s();
        let mut prev_t = if n0 > 0 {
            timebase.time_s(n0 - 1)
        } else {
            f64::NAN
        };
        for (j, y) in out.iter_mut().enumerate() {
            let t_n = timebase.time_s(n0 + j as u64);
            while let Some(ev) = events.get(i) {
                if ev.t_avail_s > t_n + eps_s {
                    break;
                }
                let t_ev = ev.t_avail_s.min(t_n);
                if t_ev > self.t_cur_s {
                    self.amp.advance_const(self.target_v, t_ev - self.t_cur_s);
                    self.t_cur_s = t_ev;
                }
                self.target_v = self.level_v(ev.code);
                i += 1;
            }
            let dt = if self.t_cur_s == prev_t {
                grid_dt_s
            } else {
                (t_n - self.t_cur_s).max(0.0)
            };
            *y = self.amp.advance_const(self.target_v, dt);
            self.t_cur_s = self.t_cur_s.max(t_n);
            prev_t = t_n;
        }
        i
    }
}

/// The first block index `j` in `from..len` whose grid instant takes an event at `t_ev_s` (the event is due
/// once `t_ev_s <= time(n0 + j) + eps_s`, the rule of [`Dac::render`]), or `len` if none does.
fn first_due_step(
    tb: Timebase,
    n0: u64,
    from: usize,
    len: usize,
    t_ev_s: f64,
    eps_s: f64,
) -> usize {
    let due = |j: usize| t_ev_s.is_nan() || t_ev_s <= tb.time_s(n0 + j as u64) + eps_s;
    if from >= len || due(from) {
        return from.min(len);
    }
    // Estimate from the rate, then correct by single steps (the test above is monotonic in j).
    let est = ((t_ev_s - eps_s) * tb.rate_hz).ceil() - n0 as f64;
    let mut j = if est.is_nan() {
        len
    } else {
        est.clamp(from as f64 + 1.0, len as f64) as usize
    };
    while j > from + 1 && due(j - 1) {
        j -= 1;
    }
    while j < len && !due(j) {
        j += 1;
    }
    j
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn cfg(bits: u32, ladder: Ladder, tol: f64, dist: ToleranceDistribution) -> DacCfg {
        DacCfg {
            bits,
            range_v: (-5.0, 5.0),
            range_given: true,
            ladder,
            tolerance: tol,
            tolerance_distribution: dist,
            offset_v: 0.0,
            gain_error: 0.0,
            output: OutputAmpCfg::default(),
            reference_noise_v: 0.0,
            clock: DacClockCfg::default(),
        }
    }

    fn rng(seed: u64) -> ChaCha8Rng {
        ChaCha8Rng::seed_from_u64(seed)
    }

    #[test]
    fn ideal_and_nominal_ladders_give_binary_weights() {
        for bits in [1u32, 2, 3, 8, 16, 24] {
            for ladder in [Ladder::Ideal, Ladder::R2r, Ladder::Binary] {
                let dac = Dac::new(
                    &cfg(bits, ladder, 0.0, ToleranceDistribution::Uniform),
                    &mut rng(1),
                );
                let w = dac.bit_weights();
                assert_eq!(w.len(), bits as usize);
                for (k, wk) in w.iter().enumerate() {
                    let want = 0.5f64.powi(k as i32 + 1);
                    assert!(
                        (wk - want).abs() <= 1e-14 * want,
                        "{ladder:?} bits={bits} k={k}: {wk} vs {want}"
                    );
                }
                let sum: f64 = w.iter().sum();
                assert!((sum - (1.0 - 0.5f64.powi(bits as i32))).abs() < 1e-14);
            }
        }
    }

    /// Independent oracle: stamp every resistor into the full conductance matrix of the ladder nodes,
    /// replace node 0's row by "V0 = 1", solve by dense Gaussian elimination with partial pivoting, and
    /// return the current into each bit's shunt.
    fn dense_r2r_currents(shunt: &[f64], series: &[f64], term: f64) -> Vec<f64> {
        let n = shunt.len();
        let mut a = vec![vec![0.0; n + 1]; n]; // augmented matrix
        let stamp_to_ground = |a: &mut Vec<Vec<f64>>, i: usize, r: f64| a[i][i] += 1.0 / r;
        for (k, r) in shunt.iter().enumerate() {
            stamp_to_ground(&mut a, k, *r);
        }
        stamp_to_ground(&mut a, n - 1, term);
        for (k, r) in series.iter().enumerate() {
            let g = 1.0 / r;
            a[k][k] += g;
            a[k + 1][k + 1] += g;
            a[k][k + 1] -= g;
            a[k + 1][k] -= g;
        }
        for x in a[0].iter_mut() {
            *x = 0.0;
        }
        a[0][0] = 1.0;
        a[0][n] = 1.0;
        for col in 0..n {
            let piv = (col..n)
                .max_by(|&x, &y| a[x][col].abs().total_cmp(&a[y][col].abs()))
                .unwrap();
            a.swap(col, piv);
            let pivot_row = a[col].clone();
            for (row, r) in a.iter_mut().enumerate() {
                if row != col {
                    let f = r[col] / pivot_row[col];
                    for (x, p) in r.iter_mut().zip(&pivot_row).skip(col) {
                        *x -= f * p;
                    }
                }
            }
        }
        (0..n).map(|k| a[k][n] / a[k][k] / shunt[k]).collect()
    }

    #[test]
    fn drawn_r2r_weights_match_a_dense_nodal_solve() {
        for (seed, dist) in [
            (3u64, ToleranceDistribution::Uniform),
            (4, ToleranceDistribution::Gaussian),
            (5, ToleranceDistribution::Uniform),
        ] {
            for bits in [1u32, 2, 10, 16] {
                let dac = Dac::new(&cfg(bits, Ladder::R2r, 0.05, dist), &mut rng(seed));
                let Resistors::R2r {
                    shunt,
                    series,
                    term,
                } = &dac.resistors
                else {
                    panic!("not an R-2R ladder");
                };
                let want = dense_r2r_currents(shunt, series, *term);
                for (k, (w, d)) in dac.bit_weights().iter().zip(&want).enumerate() {
                    assert!((w - d).abs() < 1e-12, "bits={bits} k={k}: {w} vs {d}");
                }
                // The drawn ladder is not the nominal one.
                if bits > 1 {
                    assert!((dac.bit_weights()[0] - 0.5).abs() > 1e-6);
                }
            }
        }
    }

    #[test]
    fn drawn_binary_weights_follow_their_resistors_within_tolerance() {
        let tol = 0.01;
        let dac = Dac::new(
            &cfg(12, Ladder::Binary, tol, ToleranceDistribution::Uniform),
            &mut rng(9),
        );
        let Resistors::Binary { r } = &dac.resistors else {
            panic!("not binary");
        };
        let mut max_rel = 0.0f64;
        for (k, (w, rk)) in dac.bit_weights().iter().zip(r).enumerate() {
            assert_eq!(*w, 0.5 / rk);
            let nominal = 0.5f64.powi(k as i32 + 1);
            let rel = w / nominal - 1.0;
            // w ~ 1/(1 + d) with |d| <= tol.
            assert!(
                rel >= 1.0 / (1.0 + tol) - 1.0 - 1e-15 && rel <= 1.0 / (1.0 - tol) - 1.0 + 1e-15
            );
            max_rel = max_rel.max(rel.abs());
        }
        assert!(max_rel > 0.1 * tol);
    }

    #[test]
    fn level_follows_the_transfer_function_with_gain_error_and_offset() {
        let mut c = cfg(8, Ladder::Ideal, 0.0, ToleranceDistribution::Uniform);
        c.gain_error = 0.02;
        c.offset_v = -0.013;
        let dac = Dac::new(&c, &mut rng(0));
        for code in 0..256u32 {
            // Code k gives low + k (high - low) / 2^bits (the DacCfg contract), then gain and offset.
            let want = -5.0 + 10.0 * code as f64 / 256.0 * 1.02 - 0.013;
            assert!((dac.level_v(code) - want).abs() < 1e-14, "code {code}");
        }
        // Bits above the word width are ignored.
        assert_eq!(dac.level_v(0x1ff), dac.level_v(0xff));
    }

    #[test]
    fn tolerance_shows_as_gain_error_not_renormalised() {
        let dac = Dac::new(
            &cfg(12, Ladder::R2r, 0.01, ToleranceDistribution::Uniform),
            &mut rng(21),
        );
        let span = dac.level_v(0xfff) - dac.level_v(0);
        let nominal = 10.0 * (1.0 - 0.5f64.powi(12));
        assert!((span / nominal - 1.0).abs() > 1e-5, "span {span}");
    }

    /// DNL per transition k -> k+1, with the end-point LSB.
    fn dnl(dac: &Dac) -> Vec<f64> {
        let top = (1u32 << dac.bits()) - 1;
        let lsb = (dac.level_v(top) - dac.level_v(0)) / top as f64;
        (0..top)
            .map(|k| (dac.level_v(k + 1) - dac.level_v(k)) / lsb - 1.0)
            .collect()
    }

    #[test]
    fn r2r_worst_dnl_is_usually_at_the_mid_scale_carry() {
        // The major carry 0x7F -> 0x80 switches every bit, so the MSB's mismatch against the sum of the
        // rest is largest there: common practice, no source.
        let seeds = 300;
        let mut at_mid = 0;
        let mut nonmonotonic = 0;
        for seed in 0..seeds {
            let dac = Dac::new(
                &cfg(8, Ladder::R2r, 0.01, ToleranceDistribution::Uniform),
                &mut rng(1000 + seed),
            );
            let d = dnl(&dac);
            let worst = (0..d.len())
                .max_by(|&a, &b| d[a].abs().total_cmp(&d[b].abs()))
                .unwrap();
            if worst == 0x7f {
                at_mid += 1;
            }
            if d.iter().any(|x| *x < -1.0) {
                nonmonotonic += 1;
            }
        }
        assert!(
            at_mid * 2 > seeds,
            "worst DNL at mid-scale in {at_mid} of {seeds}"
        );
        // Any non-monotonic step is counted so a broken ladder with huge errors would show; at 1 %
        // and 8 bits the worst DNL is about 1 LSB, so non-monotonic draws are a minority.
        assert!(nonmonotonic * 2 < seeds, "{nonmonotonic} non-monotonic");
    }

    /// Events at irregular instants, some exactly on grid instants.
    fn events(rate: f64, count: usize) -> Vec<CodeEvent> {
        let mut r = rng(77);
        let mut t = 0.3 / rate;
        let mut v = Vec::new();
        for i in 0..count {
            if i % 5 == 0 {
                // land exactly on a grid instant (the same number Timebase::time_s gives)
                t = ((t * rate).ceil() + 3.0) / rate;
            } else {
                t += (1.0 + 6.0 * r.random::<f64>()) / rate;
            }
            v.push(CodeEvent {
                t_sample_s: t - 1e-7,
                t_avail_s: t,
                code: r.random::<u32>() & 0xff,
            });
        }
        v
    }

    #[test]
    fn a_code_due_at_a_grid_instant_fills_half_its_cell_and_an_ulp_later_changes_nothing() {
        // Availability times are sums like k/fs + t_conv; one ulp past the grid instant must not delay the step
        // by a whole grid step (that would act like sampling jitter of one grid step on the output). With the
        // cell average, a step at the grid instant fills the second half of its cell.
        let tb = Timebase::new(4.8e6);
        let mut dac = Dac::new(
            &cfg(8, Ladder::Ideal, 0.0, ToleranceDistribution::Uniform),
            &mut rng(1),
        );
        let t = tb.time_s(100);
        let ev = CodeEvent {
            t_sample_s: 0.0,
            t_avail_s: t * (1.0 + 4.0 * f64::EPSILON),
            code: 200,
        };
        assert!(ev.t_avail_s > t);
        let mut out = vec![0.0; 102];
        dac.render(tb, 0, &[ev], &mut out);
        let half = 0.5 * (dac.level_v(200) + dac.level_v(0));
        assert!((out[100] - half).abs() < 1e-9, "{} vs {half}", out[100]);
        assert_eq!(out[101], dac.level_v(200));
        assert_eq!(out[99], dac.level_v(0));
    }

    #[test]
    fn each_step_keeps_its_exact_instant_at_any_grid_rate() {
        // By construction: the cell averages of a unit step at t_e hold the step's area exactly, so the area
        // under (1 - y) from the first cell's start is t_e - (t_0 - dt/2), wherever t_e falls in its cell.
        for (rate, t_e) in [(1e6, 10.37e-6), (2e6, 10.37e-6), (3.3e6, 7.0123e-6), (1e6, 12e-6)] {
            let tb = Timebase::new(rate);
            let mut c = cfg(8, Ladder::Ideal, 0.0, ToleranceDistribution::Uniform);
            c.range_v = (0.0, 256.0);
            let mut dac = Dac::new(&c, &mut rng(1));
            let ev = CodeEvent {
                t_sample_s: 0.0,
                t_avail_s: t_e,
                code: 1,
            };
            let mut out = vec![0.0; 64];
            dac.render(tb, 0, &[ev], &mut out);
            let area: f64 = out.iter().map(|y| (1.0 - y) * tb.dt_s()).sum();
            assert!(
                (area - (t_e + 0.5 * tb.dt_s())).abs() < 1e-9 * tb.dt_s(),
                "{rate}: {area}"
            );
        }
    }

    #[test]
    fn reference_noise_scales_each_update_by_one_plus_e_over_the_span() {
        // The level above the range's low end, d, scales with the reference: d (1 + e / span), so the
        // output's rms spread is d sigma / span (common practice, no source).
        let (rate, sigma) = (1e6, 5e-3);
        let tb = Timebase::new(rate);
        let mut c = cfg(12, Ladder::Ideal, 0.0, ToleranceDistribution::Uniform);
        c.reference_noise_v = sigma;
        let span = c.range_v.1 - c.range_v.0;
        let mut dac = Dac::new(&c, &mut rng(3));
        let code = 3500;
        let d = dac.level_v(code) - c.range_v.0;
        let n = 20_000;
        // One update at the start of each grid cell, so each cell holds one draw.
        let evs: Vec<CodeEvent> = (0..n)
            .map(|k| CodeEvent {
                t_sample_s: 0.0,
                t_avail_s: tb.time_s(k as u64) - 0.5 * tb.dt_s(),
                code,
            })
            .collect();
        let mut out = vec![0.0; n];
        dac.render(tb, 0, &evs, &mut out);
        let mean = out.iter().sum::<f64>() / n as f64;
        let sd = (out.iter().map(|y| (y - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
        let want = d * sigma / span;
        assert!((sd / want - 1.0).abs() < 0.05, "{sd} vs {want}");
        assert!((mean - dac.level_v(code)).abs() < 5.0 * want / (n as f64).sqrt());
        // The ladder drawn before it is the same as with a quiet reference.
        c.reference_noise_v = 0.0;
        let quiet = Dac::new(&c, &mut rng(3));
        assert_eq!(quiet.level_v(code), dac.level_v(code));
    }

    #[test]
    fn zoh_output_without_amplifier_is_the_hold_averaged_over_each_cell() {
        let rate = 1e6;
        let tb = Timebase::new(rate);
        let mut dac = Dac::new(
            &cfg(8, Ladder::R2r, 0.01, ToleranceDistribution::Gaussian),
            &mut rng(5),
        );
        let evs = events(rate, 300);
        let mut out = vec![0.0; 1000];
        let used = dac.render(tb, 0, &evs, &mut out);
        let dt = tb.dt_s();
        let end = tb.time_s(999) + 0.5 * dt;
        assert_eq!(used, evs.iter().filter(|e| e.t_avail_s < end).count());
        assert!(used < evs.len());
        let mut on_grid = 0;
        for (n, y) in out.iter().enumerate() {
            let t = tb.time_s(n as u64);
            let (lo, hi) = (t - 0.5 * dt, t + 0.5 * dt);
            // Slow oracle: integrate the staircase over the cell.
            let mut code = evs.iter().rfind(|e| e.t_avail_s <= lo).map_or(0, |e| e.code);
            let mut at = lo;
            let mut area = 0.0;
            for e in evs.iter().filter(|e| e.t_avail_s > lo && e.t_avail_s < hi) {
                area += dac.level_v(code) * (e.t_avail_s - at);
                at = e.t_avail_s;
                code = e.code;
            }
            area += dac.level_v(code) * (hi - at);
            if evs.iter().any(|e| e.t_avail_s == t) {
                on_grid += 1;
            }
            assert!((*y - area / dt).abs() < 1e-9, "n={n}: {y} vs {}", area / dt);
        }
        assert!(on_grid > 10);
    }

    #[test]
    fn output_with_amplifier_matches_the_amplifier_stepped_by_hand() {
        let rate = 1e6;
        let tb = Timebase::new(rate);
        let mut c = cfg(8, Ladder::Binary, 0.01, ToleranceDistribution::Uniform);
        c.output = OutputAmpCfg {
            slew_rate_v_per_s: Some(2e6),
            tau_s: Some(0.7e-6),
            rails_v: Some((-4.0, 4.5)),
        };
        let mut dac = Dac::new(&c, &mut rng(8));
        let reference = dac.clone();
        let evs = events(rate, 300);
        let mut out = vec![0.0; 1000];
        dac.render(tb, 0, &evs, &mut out);

        let mut amp = OutputAmp::new(&c.output, reference.level_v(0));
        let mut level = reference.level_v(0);
        let mut t = 0.0;
        let mut k = 0;
        for (n, y) in out.iter().enumerate() {
            let tn = n as f64 / rate;
            while k < evs.len() && evs[k].t_avail_s <= tn {
                amp.advance_const(level, evs[k].t_avail_s - t);
                t = evs[k].t_avail_s;
                level = reference.level_v(evs[k].code);
                k += 1;
            }
            let want = amp.advance_const(level, tn - t);
            t = tn;
            assert!((y - want).abs() < 1e-12, "n={n}: {y} vs {want}");
        }
        // The amplifier really shapes the output (slew-limited edges differ from the held levels).
        let held_differs = out
            .iter()
            .enumerate()
            .filter(|(n, y)| {
                let tn = *n as f64 / rate;
                let code = evs
                    .iter()
                    .rfind(|e| e.t_avail_s <= tn)
                    .map_or(0, |e| e.code);
                (**y - reference.level_v(code)).abs() > 1e-3
            })
            .count();
        assert!(held_differs > 100);
    }

    #[test]
    fn rendering_in_blocks_is_byte_identical_to_one_block() {
        let rate = 1e6;
        let tb = Timebase::new(rate);
        let mut c = cfg(8, Ladder::R2r, 0.01, ToleranceDistribution::Uniform);
        c.output = OutputAmpCfg {
            slew_rate_v_per_s: Some(3e6),
            tau_s: Some(0.4e-6),
            rails_v: None,
        };
        let evs = events(rate, 300);
        let mut one = Dac::new(&c, &mut rng(2));
        let mut split = one.clone();
        let mut a = vec![0.0; 1000];
        let used = one.render(tb, 0, &evs, &mut a);
        let mut b = vec![0.0; 1000];
        let mut consumed = 0;
        for blk in 0..10 {
            let n0 = blk * 100;
            consumed += split.render(tb, n0 as u64, &evs[consumed..], &mut b[n0..n0 + 100]);
        }
        assert_eq!(consumed, used);
        for (x, y) in a.iter().zip(&b) {
            assert_eq!(x.to_bits(), y.to_bits());
        }
    }

    #[test]
    fn output_before_the_first_code_is_the_level_of_code_zero() {
        let mut c = cfg(8, Ladder::Ideal, 0.0, ToleranceDistribution::Uniform);
        c.offset_v = 0.25;
        c.output.tau_s = Some(1e-6);
        let mut dac = Dac::new(&c, &mut rng(0));
        let mut out = [1.0; 10];
        let used = dac.render(Timebase::new(1e6), 0, &[], &mut out);
        assert_eq!(used, 0);
        assert!(out.iter().all(|y| *y == -5.0 + 0.25));
    }

    #[test]
    fn run_wise_rendering_matches_per_step_rendering_with_events_on_and_off_the_grid() {
        let rate = 1e6;
        let tb = Timebase::new(rate);
        let amps = [
            // slew and settling: big code steps slew, then settle
            OutputAmpCfg {
                slew_rate_v_per_s: Some(2e6),
                tau_s: Some(0.5e-6),
                rails_v: None,
            },
            // with rails inside the range: some levels are clipped
            OutputAmpCfg {
                slew_rate_v_per_s: Some(3e6),
                tau_s: Some(0.3e-6),
                rails_v: Some((-4.0, 4.5)),
            },
            // settling only, slew only (without either, the cell-average rendering applies: tested above)
            OutputAmpCfg {
                slew_rate_v_per_s: None,
                tau_s: Some(2e-6),
                rails_v: None,
            },
            OutputAmpCfg {
                slew_rate_v_per_s: Some(1e6),
                tau_s: None,
                rails_v: None,
            },
        ];
        // Events at irregular instants (some exactly on grid instants, some a rounding error past one), and a
        // sparse set so that runs settle for long stretches.
        let mut evs = events(rate, 300);
        for (k, e) in evs.iter_mut().enumerate() {
            if k % 7 == 3 {
                e.t_avail_s = (e.t_avail_s * rate).round() / rate * (1.0 + 2.0 * f64::EPSILON);
            }
        }
        let sparse: Vec<CodeEvent> = events(rate, 300).into_iter().step_by(9).collect();
        for out_cfg in amps {
            for evs in [&evs, &sparse] {
                let mut c = cfg(8, Ladder::R2r, 0.01, ToleranceDistribution::Uniform);
                c.output = out_cfg;
                let mut fast = Dac::new(&c, &mut rng(4));
                let mut slow = fast.clone();
                for split in [1000usize, 37, 1] {
                    let (mut a, mut b) = (vec![0.0; 1000], vec![0.0; 1000]);
                    let (mut used_a, mut used_b) = (0, 0);
                    for n0 in (0..1000).step_by(split) {
                        let n1 = (n0 + split).min(1000);
                        used_a += fast.render(tb, n0 as u64, &evs[used_a..], &mut a[n0..n1]);
                        used_b +=
                            slow.render_per_step(tb, n0 as u64, &evs[used_b..], &mut b[n0..n1]);
                    }
                    assert_eq!(used_a, used_b);
                    for (n, (x, y)) in a.iter().zip(&b).enumerate() {
                        assert!(
                            (x - y).abs() < 1e-12,
                            "{out_cfg:?} split {split} n={n}: {x} vs {y}"
                        );
                    }
                    // Continue from the state reached (a second period of the same events, shifted).
                    fast = Dac::new(&c, &mut rng(4));
                    slow = fast.clone();
                }
            }
        }
    }

    #[test]
    fn first_due_step_is_the_first_grid_instant_that_takes_the_event() {
        let tb = Timebase::new(1e7);
        let eps = 1e-6 * tb.dt_s();
        let n0 = 123_456u64;
        for t_ev in [
            tb.time_s(n0 + 10),
            tb.time_s(n0 + 10) * (1.0 + 2.0 * f64::EPSILON),
            tb.time_s(n0 + 10) * (1.0 - 2.0 * f64::EPSILON),
            tb.time_s(n0 + 10) + 0.5 * tb.dt_s(),
            tb.time_s(n0 + 10) + 2.0 * eps,
            tb.time_s(n0) - 1.0,
            tb.time_s(n0 + 5000),
        ] {
            for from in [0usize, 3, 10, 11, 50] {
                let got = first_due_step(tb, n0, from, 50, t_ev, eps);
                // Slow oracle: scan.
                let want = (from..50)
                    .find(|&j| t_ev <= tb.time_s(n0 + j as u64) + eps)
                    .unwrap_or(50);
                assert_eq!(got, want, "t_ev {t_ev} from {from}");
            }
        }
    }
}
