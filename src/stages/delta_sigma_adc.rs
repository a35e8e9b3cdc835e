//! The `delta_sigma_adc` stage: an oversampling converter. A noise-shaping loop ([`super::delta_sigma`]) samples
//! the input at the modulator clock (`oversampling` x the output rate) with a quantizer of 1 to 5 bits; a
//! decimation chain ([`super::multirate`]) brings its output down to the output rate: a sinc^K (CIC) stage to 4
//! x the output rate, then one FIR that compensates the CIC's droop, sets the passband, and decimates the
//! rest of the way. The FIR is linear phase, or (`filter_phase = "minimum"`) its minimum-phase counterpart: the same
//! magnitude with most of the delay gone and the phase no longer linear near the band edge.
//!
//! Delay (the latency budget): the CIC's K (R - 1) / 2 modulator clocks, plus the FIR's (taps - 1) / 2 samples at
//! its input rate when linear phase, or its phase delay at the fundamental when minimum phase; plus one modulator
//! clock for the output register. Output code k is computed from the modulator samples up to the sampling
//! instant k / fs, so that delay shows in the codes themselves, as it does in a real converter.
//!
//! Output: the decimated value on the ideal transfer of IEEE Std 1241 (code k centred on `low + k q`, q = the
//! range over 2^bits), clipped to the word. The loop overloads above its largest stable input, which the design
//! finds by simulation and states (`max_stable_input_v`); overload events are counted in the report.

use std::collections::HashMap;
use std::sync::{Arc, Mutex, OnceLock};

use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

use crate::error::Result;
use crate::format::reader::{ScenarioError, TableReader};
use crate::format::units::{Dimension, format_si};
use crate::signal::stream::CodeEvent;
use crate::stages::Probe;
use crate::stages::delta_sigma::{Modulator, Ntf, design_ntf, max_stable_amplitude};
use crate::stages::kind::{
    Ablation, BuildContext, KeyEdit, KindSpec, Param, ParamKind, QuantizerTiming, Rates,
    ReadContext, Role, Runtime, Upstream, mechanism,
};
use crate::stages::multirate::{
    CicDecimator, DesignedFir, FirDecimator, LowpassSpec, cic_magnitude, design_lowpass,
    fir_phase_delay_samples, minimum_phase,
};
use crate::stages::roles::{BudgetLine, DcStaticInfo, Hold, Quantizer};
use crate::stages::sample_hold::SampleHold;

/// The decimation FIR's phase.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FilterPhase {
    Linear,
    Minimum,
}

/// Where the NTF's zeros sit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum NtfZeros {
    /// All at DC: (1 - z^-1)^L over the poles.
    Dc,
    /// Spread over the band to minimise its noise.
    Spread,
}

/// `kind = "delta_sigma_adc"`
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DeltaSigmaAdcCfg {
    /// Output word (bits).
    pub bits: u32,
    pub range_v: (f64, f64),
    /// Output rate (Hz).
    pub sample_rate_hz: f64,
    /// The loop and decimation-filter keys (shared with the delta-sigma DAC).
    #[serde(flatten)]
    pub shaping: Shaping,
    /// Rms noise added to the input at each modulator sample (V): the sampling capacitor's kT/C noise and the
    /// loop's own input-referred noise.
    pub input_noise_v: f64,
    /// Offset of the converter's clock from nominal (ppm; see [`crate::engine::clock`]).
    #[serde(skip_serializing_if = "crate::engine::clock::is_zero")]
    pub clock_ppm: f64,
}

impl DeltaSigmaAdcCfg {
    /// The timing on the converter's own clock: the sample rate `1 + clock_ppm 1e-6` times its nominal value
    /// (the same configuration when `clock_ppm` is 0).
    pub fn clocked(&self) -> DeltaSigmaAdcCfg {
        DeltaSigmaAdcCfg {
            sample_rate_hz: self.sample_rate_hz * crate::engine::clock::clock_scale(self.clock_ppm),
            ..*self
        }
    }
    pub fn lsb_v(&self) -> f64 {
        (self.range_v.1 - self.range_v.0) / f64::powi(2.0, self.bits as i32)
    }
    pub fn modulator_clock_hz(&self) -> f64 {
        self.sample_rate_hz * f64::from(self.shaping.oversampling)
    }
    pub fn levels(&self) -> u32 {
        self.shaping.levels()
    }
    /// The designed loop and filters (cached: the same keys give the same design).
    pub fn design(&self) -> Arc<Design> {
        self.shaping.design()
    }
    /// The decimation chain's delay at `f_hz` (s); see [`Shaping::delay_s`].
    pub fn delay_s(&self, f_hz: f64) -> f64 {
        self.shaping.delay_s(self.sample_rate_hz, f_hz)
    }
}

/// What the keys design: the NTF, its largest stable input, the decimation FIR.
#[derive(Debug, Clone)]
pub struct Design {
    pub ntf: Ntf,
    /// Largest stable sine amplitude, a fraction of half the range.
    pub max_stable: f64,
    pub fir: DesignedFir,
    pub cic_factor: usize,
    pub fir_factor: usize,
    /// The delay of the linear-phase design, in word periods: the CIC's and the linear FIR's (taps - 1)/2. With
    /// `filter_phase = "minimum"` it is what linear phase would have given.
    pub linear_delay_out: f64,
}

impl Design {
    /// The words the filters take to settle after a step: twice the CIC's and the FIR's impulse responses,
    /// and 16 more.
    pub fn settle_words(&self, oversampling: u32, cic_order: u32) -> usize {
        let osr = f64::from(oversampling);
        let cic = f64::from(cic_order) * self.cic_factor as f64 / osr;
        let fir = self.fir.taps.len() as f64 / self.fir_factor as f64;
        (2.0 * (cic + fir)).ceil() as usize + 16
    }
}

fn design(cfg: &Shaping) -> Arc<Design> {
    type Key = (u32, u32, u32, u64, NtfZeros, FilterPhase, [u64; 4], u32);
    static CACHE: OnceLock<Mutex<HashMap<Key, Arc<Design>>>> = OnceLock::new();
    let key: Key = (
        cfg.oversampling,
        cfg.order,
        cfg.quantizer_bits,
        cfg.ntf_gain.to_bits(),
        cfg.zeros,
        cfg.phase,
        [
            cfg.passband_edge.to_bits(),
            cfg.stopband_edge.to_bits(),
            cfg.ripple_db.to_bits(),
            cfg.attenuation_db.to_bits(),
        ],
        cfg.cic_order,
    );
    let cache = CACHE.get_or_init(|| Mutex::new(HashMap::new()));
    if let Some(d) = cache.lock().ok().and_then(|c| c.get(&key).cloned()) {
        return d;
    }
    let d = Arc::new(compute_design(cfg));
    if let Ok(mut c) = cache.lock() {
        c.insert(key, d.clone());
    }
    d
}

fn compute_design(cfg: &Shaping) -> Design {
    let osr = f64::from(cfg.oversampling);
    let ntf = design_ntf(
        cfg.order as usize,
        osr,
        cfg.ntf_gain,
        cfg.zeros == NtfZeros::Spread,
    );
    let max_stable = max_stable_amplitude(&ntf, cfg.levels(), osr);
    let (cic_factor, fir_factor) = cfg.factors();
    let k = cfg.cic_order as usize;
    // The FIR runs at fir_factor x the output rate; frequencies below are fractions of that rate.
    let d = fir_factor as f64;
    let spec = LowpassSpec {
        pass: cfg.passband_edge / d,
        stop: cfg.stopband_edge / d,
        ripple_db: cfg.ripple_db,
        atten_db: cfg.attenuation_db,
    };
    let droop = move |f: f64| cic_magnitude(k, cic_factor, f / cic_factor as f64);
    let mut fir = if fir_factor > 1 {
        design_lowpass(&spec, &|f| 1.0 / droop(f), 8001)
    } else {
        DesignedFir {
            taps: vec![1.0],
            ripple_db: 0.0,
            atten_db: 0.0,
        }
    };
    // Delays in output samples (scaled to seconds by `Design::delay_s`).
    let cic_delay_out = k as f64 * (cic_factor as f64 - 1.0) / 2.0 / osr;
    let fir_delay_out = (fir.taps.len() as f64 - 1.0) / 2.0 / d;
    if cfg.phase == FilterPhase::Minimum && fir.taps.len() > 1 {
        let floor = 10f64.powf(-(cfg.attenuation_db + 30.0) / 20.0);
        fir.taps = minimum_phase(&fir.taps, floor);
        let (ripple_db, atten_db) = crate::stages::multirate::measure_lowpass(
            &fir.taps,
            &spec,
            &|f| 1.0 / droop(f),
            512,
        );
        fir.ripple_db = ripple_db;
        fir.atten_db = atten_db;
    }
    Design {
        ntf,
        max_stable,
        fir,
        cic_factor,
        fir_factor,
        // Output samples; converted to seconds by `delay_s`.
        linear_delay_out: cic_delay_out + fir_delay_out,
    }
}



/// The keys of the noise-shaping loop and its rate-change filter, shared by the delta-sigma ADC and DAC.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Shaping {
    /// Modulator clock over the converter's word rate.
    pub oversampling: u32,
    /// Loop order (1 to 5).
    pub order: u32,
    /// The loop's quantizer (1 to 5 bits: 2 to 32 levels).
    pub quantizer_bits: u32,
    /// Largest NTF gain over all frequencies.
    pub ntf_gain: f64,
    pub zeros: NtfZeros,
    /// The rate-change FIR's phase (`filter_phase` in scenarios and reports).
    #[serde(rename = "filter_phase")]
    pub phase: FilterPhase,
    /// Passband and stop-band edges, fractions of the word rate.
    pub passband_edge: f64,
    pub stopband_edge: f64,
    /// Peak-to-peak passband ripple (dB) and stop-band attenuation (dB) the FIR must meet.
    pub ripple_db: f64,
    pub attenuation_db: f64,
    /// Order of the CIC stage.
    pub cic_order: u32,
}

impl Shaping {
    pub fn levels(&self) -> u32 {
        1 << self.quantizer_bits
    }
    /// The FIR's rate-change factor (4: `oversampling` is a multiple of 4) and the CIC's (the rest).
    pub fn factors(&self) -> (usize, usize) {
        let osr = self.oversampling as usize;
        (osr / 4, 4)
    }
    /// The designed loop and filters (cached: the same keys give the same design).
    pub fn design(&self) -> Arc<Design> {
        design(self)
    }
    /// The filters' delay at `f_hz` (s) for word rate `fs_hz`: linear phase, the CIC's K (R - 1)/2 fast clocks
    /// and the FIR's (taps - 1)/2; minimum phase, the CIC's plus the FIR's phase delay at `f_hz`.
    pub fn delay_s(&self, fs_hz: f64, f_hz: f64) -> f64 {
        let d = self.design();
        match self.phase {
            FilterPhase::Linear => d.linear_delay_out / fs_hz,
            FilterPhase::Minimum => {
                let osr = f64::from(self.oversampling);
                let k = f64::from(self.cic_order);
                let cic = k * (d.cic_factor as f64 - 1.0) / 2.0 / (osr * fs_hz);
                let rate = d.fir_factor as f64 * fs_hz;
                let f = (f_hz / rate).clamp(0.0, 0.5);
                cic + fir_phase_delay_samples(&d.fir.taps, f) / rate
            }
        }
    }
}

/// Read the [`Shaping`] keys (with their defaults) and check that the loop they design is stable.
pub fn read_shaping(r: &mut TableReader<'_, '_>) -> std::result::Result<Shaping, ScenarioError> {
    use Dimension as D;
    let osr = r.integer("oversampling", 4, 1024)?;
    let oversampling = osr.as_ref().map_or(64, |v| v.value as u32);
    if let Some(o) = &osr
        && o.value % 4 != 0
    {
        return Err(r
            .error(
                &o.span,
                "oversampling",
                format!("must be a multiple of 4, found {}", o.value),
            )
            .with_hint("the rate-change FIR works at 4 x the word rate: write 32, 64, 128 or another multiple of 4"));
    }
    let order = r.integer("order", 1, 5)?.map_or(4, |v| v.value as u32);
    let quantizer_bits = r
        .integer("quantizer_bits", 1, 5)?
        .map_or(1, |v| v.value as u32);
    let gain = r.number("ntf_gain")?;
    let ntf_gain = match &gain {
        Some(g) if !(g.value > 1.0 && g.value <= 8.0) => {
            return Err(r
                .error(
                    &g.span,
                    "ntf_gain",
                    format!("must be above 1 and at most 8, found {}", g.value),
                )
                .with_hint("1.5 is the usual choice for a 1-bit quantizer; multi-bit loops take 2 to 4"));
        }
        Some(g) => g.value,
        None => 1.5,
    };
    let zeros = r
        .choice("zeros", &[("dc", NtfZeros::Dc), ("spread", NtfZeros::Spread)])?
        .map_or(NtfZeros::Spread, |c| c.value);
    let phase = r
        .choice(
            "filter_phase",
            &[("linear", FilterPhase::Linear), ("minimum", FilterPhase::Minimum)],
        )?
        .map_or(FilterPhase::Linear, |c| c.value);
    let pass = r.number("passband_edge")?;
    let stop = r.number("stopband_edge")?;
    let passband_edge = pass.as_ref().map_or(0.45, |p| p.value);
    let stopband_edge = stop.as_ref().map_or(0.55, |p| p.value);
    if !(passband_edge > 0.0 && passband_edge < 0.5) {
        let span = pass.map(|p| p.span).unwrap_or_default();
        return Err(r
            .error(
                &span,
                "passband_edge",
                format!("must lie between 0 and 0.5 (of the output rate), found {passband_edge}"),
            )
            .with_hint("0.45 keeps 20 kHz of a 48 kHz output (the usual audio choice)"));
    }
    if !(stopband_edge > passband_edge && stopband_edge <= 1.0) {
        let span = stop
            .map(|p| p.span)
            .or(pass.map(|p| p.span))
            .unwrap_or_default();
        return Err(r
            .error(
                &span,
                "stopband_edge",
                format!(
                    "must lie above passband_edge ({passband_edge}) and at most 1 (of the output rate), found {stopband_edge}"
                ),
            )
            .with_hint("0.55 lets only the transition band alias; 0.5 lets nothing alias"));
    }
    let ripple = r.positive("ripple", D::Decibels)?;
    let atten = r.positive("attenuation", D::Decibels)?;
    let ripple_db = ripple.map_or(0.01, |q| q.value);
    let attenuation_db = match atten {
        Some(a) if a.value < 20.0 || a.value > 160.0 => {
            return Err(r
                .error(
                    &a.span,
                    "attenuation",
                    format!("must be from 20 dB to 160 dB, found {} dB", a.value),
                )
                .with_hint("100 dB suits a 16-bit output, 120 dB a 20-bit one"));
        }
        Some(a) => a.value,
        None => 100.0,
    };
    let cic_order = r
        .integer("cic_order", 1, 8)?
        .map_or(order + 1, |v| v.value as u32);
    let sh = Shaping {
    oversampling,
    order,
    quantizer_bits,
    ntf_gain,
    zeros,
    phase,
    passband_edge,
    stopband_edge,
    ripple_db,
    attenuation_db,
    cic_order,
    };
    let d = sh.design();
    if d.max_stable < 0.05 {
    let span = gain.map(|g| g.span).unwrap_or_default();
    return Err(r
    .error(
        &span,
        "ntf_gain",
        format!(
        "the loop (order {order}, {quantizer_bits}-bit quantizer, NTF gain {ntf_gain}) is unstable even for a small input"
        ),
    )
    .with_hint("lower ntf_gain (1.5 for a 1-bit quantizer), lower the order, or add quantizer bits"));
    }
    Ok(sh)
}

impl KindSpec for DeltaSigmaAdcCfg {
    const NAME: &'static str = "delta_sigma_adc";
    const ROLE: Role = Role::Quantizer;
    const EXAMPLE: &'static str = r#"bits = 20
range = ["-2.5 V", "2.5 V"]
sample_rate = "48 kHz"
oversampling = 64
order = 4
quantizer_bits = 1
input_noise = "20 uV""#;
    const PARAMS: &'static [Param] = {
        use Dimension as D;
        &[
            Param::fixed("bits", ParamKind::Integer),
            Param::fixed("range", ParamKind::Pair(D::Voltage)),
            Param::spread("sample_rate", D::Frequency),
            Param::fixed("modulator_clock", ParamKind::Quantity(D::Frequency)),
            Param::fixed("oversampling", ParamKind::Integer),
            Param::fixed("order", ParamKind::Integer),
            Param::fixed("quantizer_bits", ParamKind::Integer),
            Param::fixed("ntf_gain", ParamKind::Number),
            Param::fixed("zeros", ParamKind::Choice(&["dc", "spread"])),
            Param::fixed("filter_phase", ParamKind::Choice(&["linear", "minimum"])),
            Param::fixed("passband_edge", ParamKind::Number),
            Param::fixed("stopband_edge", ParamKind::Number),
            Param::fixed("ripple", ParamKind::Quantity(D::Decibels)),
            Param::fixed("attenuation", ParamKind::Quantity(D::Decibels)),
            Param::fixed("cic_order", ParamKind::Integer),
            Param::spread("input_noise", D::Voltage),
            Param::spread_number("clock_ppm"),
        ]
    };

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        use Dimension as D;
        let bits = r.integer("bits", 4, 24)?.map_or(24, |b| b.value as u32);
        let range = r
            .pair("range", D::Voltage)?
            .ok_or_else(|| r.missing("range", "[\"-2.5 V\", \"2.5 V\"]"))?;
        let sh = read_shaping(r)?;
        let oversampling = sh.oversampling;
        let sample_rate = r.positive("sample_rate", D::Frequency)?;
        let clock = r.positive("modulator_clock", D::Frequency)?;
        let osr = f64::from(oversampling);
        let sample_rate_hz = match (&sample_rate, &clock) {
            (Some(fs), None) => fs.value,
            (None, Some(c)) => c.value / osr,
            (Some(fs), Some(c)) => {
                if ((fs.value * osr) / c.value - 1.0).abs() > 1e-9 {
                    return Err(r
                        .error(
                            &c.span,
                            "modulator_clock",
                            format!(
                                "is not sample_rate x oversampling ({} x {oversampling} = {})",
                                format_si(fs.value, "Hz"),
                                format_si(fs.value * osr, "Hz")
                            ),
                        )
                        .with_hint("give either sample_rate or modulator_clock, with oversampling"));
                }
                fs.value
            }
            (None, None) => return Err(r.missing("sample_rate", "\"48 kHz\"")),
        };
        let cfg = DeltaSigmaAdcCfg {
            bits,
            range_v: range.value,
            sample_rate_hz,
            shaping: sh,
            input_noise_v: r.non_negative("input_noise", D::Voltage)?,
            clock_ppm: crate::engine::clock::read_clock_ppm(r)?,
        };
        Ok(cfg)
    }

    fn resolve(&mut self, up: &mut Upstream) {
        up.set_quantizer(self.bits, self.range_v, self.sample_rate_hz, self.clock_ppm);
    }

    fn ablations(&self) -> Vec<Ablation> {
        let mut out = Vec::new();
        out.extend(Ablation::zeroed::<Self>(&[("input_noise", self.input_noise_v)]));
        if self.shaping.quantizer_bits < 5 {
            out.push(Ablation::new(
                mechanism::<Self>("quantizer_bits"),
                "quantizer_bits raised to 5",
                vec![KeyEdit::Set("quantizer_bits", 5.0)],
            ));
        }
        let fs2 = 2.0 * self.sample_rate_hz;
        out.push(Ablation::new(
            mechanism::<Self>("sample_rate"),
            format!(
                "sample_rate doubled to {} (same oversampling)",
                format_si(fs2, "Hz")
            ),
            vec![
                KeyEdit::Set("sample_rate", fs2),
                KeyEdit::Remove("modulator_clock"),
            ],
        ));
        out
    }

    fn rates(&self) -> Rates {
        Rates {
            lowpass_hz: Some(self.shaping.passband_edge * self.sample_rate_hz),
            highpass_hz: None,
        }
    }

    fn quantizer_timing(&self) -> Option<QuantizerTiming> {
        let c = self.clocked();
        Some(QuantizerTiming {
            sample_rate_hz: c.sample_rate_hz,
            conversion_time_s: 1.0 / c.modulator_clock_hz(),
            bits: self.bits,
            range_v: self.range_v,
            clock_ppm: self.clock_ppm,
        })
    }

    fn echo(&self) -> serde_json::Value {
        let mut v = serde_json::to_value(self).unwrap_or(serde_json::Value::Null);
        let d = self.design();
        let half = 0.5 * (self.range_v.1 - self.range_v.0);
        v["lsb_v"] = serde_json::json!(self.lsb_v());
        v["modulator_clock_hz"] = serde_json::json!(self.modulator_clock_hz());
        v["ntf_max_gain"] = serde_json::json!(d.ntf.max_gain);
        v["max_stable_input_v"] = serde_json::json!(d.max_stable * half);
        v["max_stable_input_dbfs"] = serde_json::json!(20.0 * d.max_stable.log10());
        v["decimation"] = serde_json::json!({
            "cic_order": self.shaping.cic_order,
            "cic_factor": d.cic_factor,
            "fir_factor": d.fir_factor,
            "fir_taps": d.fir.taps.len(),
            "passband_hz": self.shaping.passband_edge * self.sample_rate_hz,
            "stopband_hz": self.shaping.stopband_edge * self.sample_rate_hz,
            "ripple_db": d.fir.ripple_db,
            "attenuation_db": d.fir.atten_db,
            "delay_linear_phase_s": d.linear_delay_out / self.sample_rate_hz,
        });
        v
    }

    /// The loop samples through the hold read just before it, or an ideal one.
    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let hold: Box<dyn Hold> = match ctx.pending_hold.take() {
            Some(h) => h,
            None => Box::new(SampleHold::ideal()),
        };
        let d = self.design();
        Ok(Runtime::Quantizer(Box::new(DeltaSigmaQuantizer {
            cfg: self.clocked(),
            modulator: Modulator::new(&d.ntf, self.levels()),
            cic: CicDecimator::new(self.shaping.cic_order as usize, d.cic_factor),
            fir: FirDecimator::new(&d.fir.taps, d.fir_factor),
            design: d,
            next_m: None,
            stream: StreamTail::new(),
            rng: ctx.rng.clone(),
            hold,
            clipped: 0,
            label: ctx.label.clone(),
        })))
    }
}

/// The last [`StreamTail::LEN`] values of a stream, in a ring (bounded memory whatever the run's length).
#[derive(Debug, Clone)]
pub struct StreamTail {
    buf: Vec<f64>,
    pos: usize,
    filled: bool,
}

impl StreamTail {
    /// 2^16 modulator clocks: 1024 output samples at 64 x oversampling.
    pub const LEN: usize = 1 << 16;
    pub fn new() -> StreamTail {
        StreamTail {
            buf: vec![0.0; Self::LEN],
            pos: 0,
            filled: false,
        }
    }
    #[inline]
    pub fn push(&mut self, v: f64) {
        self.buf[self.pos] = v;
        self.pos += 1;
        if self.pos == Self::LEN {
            self.pos = 0;
            self.filled = true;
        }
    }
    /// The values held, oldest first.
    pub fn ordered(&self) -> Vec<f64> {
        if self.filled {
            let mut v = self.buf[self.pos..].to_vec();
            v.extend_from_slice(&self.buf[..self.pos]);
            v
        } else {
            self.buf[..self.pos].to_vec()
        }
    }
}

impl Default for StreamTail {
    fn default() -> Self {
        Self::new()
    }
}

/// A delta-sigma converter at run time: the quantizer role.
pub struct DeltaSigmaQuantizer {
    cfg: DeltaSigmaAdcCfg,
    design: Arc<Design>,
    modulator: Modulator,
    cic: CicDecimator,
    fir: FirDecimator,
    /// The next modulator clock to run.
    next_m: Option<i64>,
    /// The loop's latest output levels, for the bit-stream spectrum.
    stream: StreamTail,
    rng: ChaCha8Rng,
    hold: Box<dyn Hold>,
    clipped: u64,
    label: String,
}

impl DeltaSigmaQuantizer {
    /// Run the loop and the filters through modulator clock `m_end` (inclusive); the last filter output.
    fn run_to(&mut self, m_end: i64, probe: &dyn Probe) -> f64 {
        let osr = i64::from(self.cfg.shaping.oversampling);
        let mut m = self.next_m.unwrap_or(m_end - osr + 1);
        let f_mod = self.cfg.modulator_clock_hz();
        let (low, high) = self.cfg.range_v;
        let mid = 0.5 * (low + high);
        let half = 0.5 * (high - low);
        let noise = self.cfg.input_noise_v / half;
        let step = self.modulator.step_size();
        let centre = i64::from(self.modulator.levels()) - 1;
        let mut last = None;
        while m <= m_end {
            let t = m.max(0) as f64 / f_mod;
            let held = self.hold.acquire(t, probe);
            self.hold.release(t + 1.0 / f_mod);
            let mut u = (held.v - mid) / half;
            if noise > 0.0 {
                let z: f64 = StandardNormal.sample(&mut self.rng);
                u += noise * z;
            }
            // The filters run on the level index centred on mid-scale (2 i - (levels - 1)), so their empty
            // start-up state reads as mid-scale rather than as the lowest level.
            let i = self.modulator.step(u);
            self.stream.push(self.modulator.level(i));
            if let Some(c) = self.cic.push(2 * i64::from(i) - centre)
                && let Some(y) = self.fir.push(c)
            {
                last = Some(0.5 * step * y);
            }
            m += 1;
        }
        self.next_m = Some(m);
        last.unwrap_or(0.0)
    }
}

impl Quantizer for DeltaSigmaQuantizer {
    fn sample_time_s(&self, k: u64) -> f64 {
        k as f64 / self.cfg.sample_rate_hz
    }
    fn latest_input_needed_s(&self, k: u64) -> f64 {
        self.sample_time_s(k) + self.hold.lookahead_s()
    }
    fn history_needed_s(&self) -> f64 {
        let period = 1.0 / self.cfg.sample_rate_hz;
        let t_mod = 1.0 / self.cfg.modulator_clock_hz();
        self.hold.lookahead_s() + self.hold.history_needed_s(t_mod) + 2.0 * period
    }
    fn convert(&mut self, k: u64, probe: &dyn Probe) -> CodeEvent {
        let m_end = k as i64 * i64::from(self.cfg.shaping.oversampling);
        let y = self.run_to(m_end, probe);
        let full = f64::powi(2.0, self.cfg.bits as i32);
        let x = (y + 1.0) / 2.0 * full;
        if !(-0.5..full - 0.5).contains(&x) {
            self.clipped += 1;
        }
        let code = x.round().clamp(0.0, full - 1.0) as u32;
        let t_k = self.sample_time_s(k);
        CodeEvent {
            t_sample_s: t_k,
            t_avail_s: t_k + 1.0 / self.cfg.modulator_clock_hz(),
            code,
        }
    }
    fn codes_clipped(&self) -> u64 {
        self.clipped
    }
    fn overloads(&self) -> Option<u64> {
        Some(self.modulator.overloads())
    }
    fn modulator_stream(&self) -> Option<(f64, Vec<f64>)> {
        Some((self.cfg.modulator_clock_hz(), self.stream.ordered()))
    }
    fn dc_static(&self) -> Option<DcStaticInfo> {
        let half = 0.5 * (self.cfg.range_v.1 - self.cfg.range_v.0);
        Some(DcStaticInfo {
            stable_half_span_v: self.design.max_stable * half,
            settle_words: self
                .design
                .settle_words(self.cfg.shaping.oversampling, self.cfg.shaping.cic_order),
            clock_hz: self.cfg.modulator_clock_hz(),
            word_rate_hz: self.cfg.sample_rate_hz,
        })
    }
    fn bits(&self) -> u32 {
        self.cfg.bits
    }
    fn range_v(&self) -> (f64, f64) {
        self.cfg.range_v
    }
    fn sample_rate_hz(&self) -> f64 {
        self.cfg.sample_rate_hz
    }
    fn ideal_first_transition_lsb(&self) -> f64 {
        0.5
    }
    fn budget(&self) -> Vec<BudgetLine> {
        self.budget_at(0.0)
    }
    fn budget_at(&self, f_hz: f64) -> Vec<BudgetLine> {
        let mut lines = self.hold.budget();
        let taps = self.design.fir.taps.len();
        let what = match self.cfg.shaping.phase {
            FilterPhase::Linear => format!(
                "decimation filter (sinc^{} by {}, {taps}-tap linear-phase FIR by {})",
                self.cfg.shaping.cic_order, self.design.cic_factor, self.design.fir_factor
            ),
            FilterPhase::Minimum => format!(
                "decimation filter (sinc^{} by {}, {taps}-tap minimum-phase FIR by {}, at {}; linear phase: {})",
                self.cfg.shaping.cic_order,
                self.design.cic_factor,
                self.design.fir_factor,
                format_si(f_hz, "Hz"),
                format_si(self.design.linear_delay_out / self.cfg.sample_rate_hz, "s")
            ),
        };
        lines.push(BudgetLine {
            stage: format!("{}: {what}", self.label),
            seconds: self.cfg.delay_s(f_hz),
        });
        lines.push(BudgetLine {
            stage: format!("{}: output register (one modulator clock)", self.label),
            seconds: 1.0 / self.cfg.modulator_clock_hz(),
        });
        lines
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stages::FnProbe;
    use std::f64::consts::PI;

    pub(crate) fn cfg() -> DeltaSigmaAdcCfg {
        DeltaSigmaAdcCfg {
            bits: 24,
            range_v: (-1.0, 1.0),
            sample_rate_hz: 48_000.0,
            shaping: Shaping {
                oversampling: 64,
                order: 4,
                quantizer_bits: 1,
                ntf_gain: 1.5,
                zeros: NtfZeros::Spread,
                phase: FilterPhase::Linear,
                passband_edge: 0.45,
                stopband_edge: 0.55,
                ripple_db: 0.01,
                attenuation_db: 100.0,
                cic_order: 5,
            },
            input_noise_v: 0.0,
            clock_ppm: 0.0,
        }
    }

    fn quantizer(c: &DeltaSigmaAdcCfg) -> DeltaSigmaQuantizer {
        let d = c.design();
        DeltaSigmaQuantizer {
            cfg: *c,
            modulator: Modulator::new(&d.ntf, c.levels()),
            cic: CicDecimator::new(c.shaping.cic_order as usize, d.cic_factor),
            fir: FirDecimator::new(&d.fir.taps, d.fir_factor),
            design: d,
            next_m: None,
            stream: StreamTail::new(),
            rng: rand::SeedableRng::seed_from_u64(1),
            hold: Box::new(SampleHold::ideal()),
            clipped: 0,
            label: "ds".into(),
        }
    }

    /// Convert `n` outputs of a sine of `amp` (fraction of full scale) at `f_hz`; the output in volts.
    fn convert_sine(c: &DeltaSigmaAdcCfg, amp: f64, f_hz: f64, n: usize) -> Vec<f64> {
        let mut q = quantizer(c);
        let probe = FnProbe(move |t: f64| amp * (2.0 * PI * f_hz * t).sin());
        let lsb = c.lsb_v();
        (0..n as u64)
            .map(|k| c.range_v.0 + f64::from(q.convert(k, &probe).code) * lsb)
            .collect()
    }

    /// Amplitude, phase of `A sin(w n + phase)` (rad) and rms residual of a three-parameter fit (IEEE Std 1241)
    /// at `f_norm` cycles per sample.
    fn fit(x: &[f64], f_norm: f64) -> (f64, f64, f64) {
        let f = crate::measure::sinefit::fit3(x, 1.0, f_norm, 0.0);
        // fit3 gives A cos(w n + phi); A sin(w n + phi + pi/2) is the same wave.
        (f.amplitude_v, f.phase_rad + PI / 2.0, f.residual_rms_v)
    }

    #[test]
    fn the_codes_follow_the_input_with_the_stated_delay() {
        // A 1 kHz sine at -6 dBFS: the amplitude comes through (passband ripple 0.01 dB) and the phase lag equals
        // the stated decimation delay (linear phase: exact).
        let c = cfg();
        let f = 1000.0;
        let n = 4800;
        let y = convert_sine(&c, 0.5, f, n);
        let tail = &y[1200..];
        let (amp, phase, res) = fit(tail, f / c.sample_rate_hz);
        assert!((amp / 0.5 - 1.0).abs() < 2e-3, "amplitude {amp}");
        // Phase at the tail's start: the input's phase there is 2 pi f 1200 / fs; the output lags by the delay.
        let d = c.delay_s(f);
        let expect = (2.0 * PI * f * (1200.0 / c.sample_rate_hz - d)).rem_euclid(2.0 * PI);
        let got = phase.rem_euclid(2.0 * PI);
        let diff = (got - expect + PI).rem_euclid(2.0 * PI) - PI;
        assert!(diff.abs() < 2.0 * PI * f * 1e-6, "lag off by {} us", diff / (2.0 * PI * f) * 1e6);
        // Noise: a 4th-order 1-bit loop at 64x has an ideal SQNR well above 100 dB (Schreier and Temes 2005,
        // eq. 4.2 for the pure differentiator: 6.02 + 1.76 - 10 log10(pi^8 / 9) + 90 log10 64 = 131 dB; the
        // limited out-of-band gain gives up a good part of it): ask for better than 16 bits here.
        let snr = 20.0 * (amp / 2f64.sqrt() / res).log10();
        assert!(snr > 98.0, "SNR {snr} dB");
    }

    #[test]
    fn minimum_phase_cuts_the_delay_and_keeps_the_level() {
        let mut c = cfg();
        let lin = c.delay_s(1000.0);
        c.shaping.phase = FilterPhase::Minimum;
        let min = c.delay_s(1000.0);
        assert!(min < lin / 3.0, "{min} vs {lin}");
        let y = convert_sine(&c, 0.5, 1000.0, 4800);
        let (amp, _, _) = fit(&y[1200..], 1000.0 / 48_000.0);
        assert!((amp / 0.5 - 1.0).abs() < 3e-3, "amplitude {amp}");
        // Linear-phase delay for the defaults: the FIR is a few hundred taps at 4 fs (Kaiser 1974's length for
        // 100 dB over a 0.1 fs transition is about 257 taps), so 25 to 50 output samples in all.
        let samples = lin * 48_000.0;
        assert!((25.0..50.0).contains(&samples), "{samples} samples");
    }

    #[test]
    fn overdrive_is_counted_and_the_codes_stay_in_range() {
        let c = cfg();
        let mut q = quantizer(&c);
        let probe = FnProbe(|t: f64| 1.4 * (2.0 * PI * 500.0 * t).sin());
        for k in 0..2000 {
            let ev = q.convert(k, &probe);
            assert!(ev.code < 1 << 24);
        }
        assert!(q.overloads().unwrap() > 0);
    }

    #[test]
    fn the_stream_tail_keeps_the_last_values_in_order() {
        let mut t = StreamTail::new();
        for i in 0..10 {
            t.push(i as f64);
        }
        assert_eq!(t.ordered(), (0..10).map(|i| i as f64).collect::<Vec<_>>());
        let n = StreamTail::LEN + 5;
        for i in 0..n {
            t.push(i as f64);
        }
        let v = t.ordered();
        assert_eq!(v.len(), StreamTail::LEN);
        assert_eq!(v[0], (n - StreamTail::LEN) as f64);
        assert_eq!(*v.last().unwrap(), (n - 1) as f64);
    }

    #[test]
    fn the_budget_names_the_filter_and_sums_to_the_design_delay() {
        let c = cfg();
        let q = quantizer(&c);
        let lines = q.budget_at(1000.0);
        assert!(lines.iter().any(|l| l.stage.contains("linear-phase FIR")));
        let total: f64 = lines.iter().map(|l| l.seconds).sum();
        let d = c.delay_s(1000.0) + 1.0 / c.modulator_clock_hz();
        assert!((total - d).abs() < 1e-12);
    }
}
