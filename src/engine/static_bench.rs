//! The static bench: the ADC's slow-ramp and code-density tests and the DAC's every-code levels, on the
//! scenario's own converters (built through their kinds, with the same seeds as a run), driven through the
//! quantizer and reconstructor roles.

use serde::Serialize;

use crate::engine::pipeline::build_context;
use crate::error::{Error, Result};
use crate::measure::static_test::{self, StaticResult};
use crate::scenario::Scenario;
use crate::scenario::overrides::{ScenarioText, candidates};
use crate::signal::stream::{CodeEvent, Timebase};
use crate::stages::Probe;
use crate::stages::kind::{Role, Runtime, Upstream};
use crate::stages::roles::{DcStaticInfo, Quantizer, Reconstructor};

/// Static results of the ADC.
#[derive(Debug, Clone, Serialize)]
pub struct AdcStatic {
    /// The code-density (histogram) test with the bench's own sine of known amplitude and offset (IEEE Std
    /// 1241); its fields sit directly under `static.adc`.
    #[serde(flatten)]
    pub code_density: StaticResult,
    /// The code-density sine's known amplitude and offset (V).
    pub code_density_amplitude_v: f64,
    pub code_density_offset_v: f64,
    pub ramp: StaticResult,
    /// Samples used by each test.
    pub code_density_samples: usize,
    pub ramp_samples: usize,
    /// When codes are missing: the changes to the hold or the converter that clear them (or at least halve
    /// their number), fewest missing codes first. Empty when no codes are missing or no single change helps.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub missing_code_causes: Vec<MissingCodeCause>,
}

/// A non-ideality whose removal clears or halves the code-density test's missing codes.
#[derive(Debug, Clone, Serialize)]
pub struct MissingCodeCause {
    /// As stage kind and parameter, e.g. `sample_hold.droop`.
    pub mechanism: String,
    /// The change made, e.g. "track-and-hold: droop = 0".
    pub change: String,
    /// Missing codes with the change.
    pub missing_codes: u32,
}

/// Remove each non-ideality of the hold and the converter in turn (as the stage kinds list them,
/// [`crate::stages::kind::KindSpec::ablations`]) and re-run the code-density test: the changes that clear the
/// `missing` codes, or at least halve them, fewest first.
pub fn missing_code_causes(
    text: &ScenarioText,
    sc: &Scenario,
    missing: u32,
) -> Result<Vec<MissingCodeCause>> {
    if missing == 0 {
        return Ok(Vec::new());
    }
    // Each try is a whole code-density test: run them side by side.
    use rayon::prelude::*;
    let mut out: Vec<MissingCodeCause> = candidates(sc)
        .into_par_iter()
        .filter(|c| {
            matches!(
                sc.stages[c.stage_index].kind.role(),
                Role::Hold | Role::Quantizer
            )
        })
        .filter_map(|c| {
            // A change the scenario cannot take (or a bench it cannot run) explains nothing.
            let changed = text.with_edits(&c.edits).ok()?;
            let m = static_tests(&changed).ok()?.adc?.code_density.missing_codes;
            (2 * m <= missing).then_some(MissingCodeCause {
                mechanism: c.mechanism,
                change: c.change,
                missing_codes: m,
            })
        })
        .collect();
    out.sort_by_key(|c| c.missing_codes);
    Ok(out)
}

/// Static results of the DAC.
#[derive(Debug, Clone, Serialize)]
pub struct DacStatic {
    #[serde(flatten)]
    pub result: StaticResult,
    /// Settled output of every code relative to the zero-code output (V).
    pub levels_v: Vec<f64>,
}

/// The DC-transfer static test of an oversampling (delta-sigma) converter: DC levels across its stable range
/// (an ADC) or codes held across the word's range (a DAC), each level's output averaged over a window after the
/// filters settle; the linearity figures ([`static_test::DcLinearity`]) from those averages.
#[derive(Debug, Clone, Serialize)]
pub struct DcTransfer {
    /// Input level (ADC) or the held code's ideal output (DAC) per level (V). Levels whose loop overloaded are
    /// not here but in `overloaded_levels_v`.
    pub level_v: Vec<f64>,
    /// DAC: the code held at each level.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub code: Vec<u32>,
    /// Averaged output per level on the ideal transfer (V): ADC, the low end plus the mean code in LSB; DAC, the
    /// mean output voltage.
    pub mean_output_v: Vec<f64>,
    /// ADC: the mean code per level.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub mean_code: Vec<f64>,
    /// Standard error of each level's mean (LSB of the word), by batch means over 16 batches.
    pub mean_error_lsb: Vec<f64>,
    /// ADC: the rms code noise per level (LSB of the word) and its largest value.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub noise_rms_lsb: Vec<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub noise_rms_max_lsb: Option<f64>,
    /// ADC: log2(full-scale range / the largest rms noise) (bits).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub effective_resolution_bits: Option<f64>,
    /// ADC: log2(full-scale range / (6.6 x the largest rms noise)): the bits that do not flicker, the peak-to-peak
    /// noise taken as 6.6 rms (common practice, no source).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub noise_free_bits: Option<f64>,
    #[serde(flatten)]
    pub linearity: static_test::DcLinearity,
    /// The levels span +-`stable_half_span_v` about mid-range: the ADC's largest stable input amplitude (as
    /// report.json's `max_stable_input_v`), the DAC's full scale.
    pub stable_half_span_v: f64,
    /// Levels where the loop overloaded (V) and the overload events there.
    pub overloaded_levels_v: Vec<f64>,
    pub overloads: u64,
    /// Words discarded while the filters settle, and words averaged, per level.
    pub settle_words: usize,
    pub average_words: usize,
    /// Why DNL and missing codes are not given.
    pub dnl_and_missing_codes: String,
}

/// `static.adc` and `static.dac`; for oversampling converters `static.adc_dc_transfer` and
/// `static.dac_dc_transfer` instead.
#[derive(Debug, Clone, Serialize)]
pub struct Static {
    pub adc: Option<AdcStatic>,
    pub dac: Option<DacStatic>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub adc_dc_transfer: Option<DcTransfer>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dac_dc_transfer: Option<DcTransfer>,
}

/// What `convchain static` writes.
#[derive(Debug, Clone, Serialize)]
pub struct StaticReport {
    pub scenario: String,
    #[serde(rename = "static")]
    pub stat: Static,
}

struct FnProbe<F: Fn(f64) -> f64>(F);
impl<F: Fn(f64) -> f64> Probe for FnProbe<F> {
    fn value_at(&self, t_s: f64) -> f64 {
        (self.0)(t_s)
    }
}

/// The scenario's converters as the bench sees them: where its quantizer sits (with what each stage receives
/// from the ones before it), and its reconstructor with its label.
struct Bench<'a> {
    sc: &'a Scenario,
    quantizer_at: Option<usize>,
    upstream: Vec<Upstream>,
    reconstructor_at: Option<usize>,
    reconstructor: Option<(String, Box<dyn Reconstructor>)>,
}

impl<'a> Bench<'a> {
    fn new(sc: &'a Scenario) -> Result<Bench<'a>> {
        let mut bench = Bench {
            sc,
            quantizer_at: None,
            upstream: Vec::with_capacity(sc.stages.len()),
            reconstructor_at: None,
            reconstructor: None,
        };
        let mut up = Upstream::default();
        for (i, st) in sc.stages.iter().enumerate() {
            bench.upstream.push(up);
            match st.kind.role() {
                Role::Quantizer => bench.quantizer_at = Some(i),
                Role::Reconstructor => {
                    bench.reconstructor_at = Some(i);
                    let mut ctx =
                        build_context(sc.simulation.seed, i as u64 + 1, &st.label, None, up);
                    if let Runtime::Reconstructor(r) = st.kind.build(&mut ctx)? {
                        bench.reconstructor = Some((st.label.clone(), r));
                    }
                }
                _ => {}
            }
            st.kind.pass_on(&mut up);
        }
        Ok(bench)
    }

    /// A fresh reconstructor (each DC level starts from the same draws).
    fn reconstructor(&self, at: usize) -> Result<Box<dyn Reconstructor>> {
        let st = &self.sc.stages[at];
        let mut ctx = build_context(
            self.sc.simulation.seed,
            at as u64 + 1,
            &st.label,
            None,
            self.upstream[at],
        );
        match st.kind.build(&mut ctx)? {
            Runtime::Reconstructor(r) => Ok(r),
            _ => Err(Error::Run("the DAC could not be built".into())),
        }
    }

    /// A fresh quantizer (each test starts from the same draws), with the hold before it if there is one (the
    /// hold hands itself over through the build context; a bench keeps its level errors, not its timing).
    fn quantizer(&self, at: usize) -> Result<Box<dyn Quantizer>> {
        let first = match at.checked_sub(1) {
            Some(h) if self.sc.stages[h].kind.role() == Role::Hold => h,
            _ => at,
        };
        let mut pending = None;
        for (i, st) in self.sc.stages.iter().enumerate().take(at + 1).skip(first) {
            let mut ctx = build_context(
                self.sc.simulation.seed,
                i as u64 + 1,
                &st.label,
                None,
                self.upstream[i],
            );
            ctx.pending_hold = pending.take();
            match st.kind.build(&mut ctx)? {
                Runtime::Quantizer(q) => return Ok(q),
                _ => pending = ctx.pending_hold.take(),
            }
        }
        Err(Error::Run("the quantizer could not be built".into()))
    }
}

/// Static tests of the scenario's ADC and DAC, drawn with the same seeds as a run. An oversampling (delta-sigma)
/// converter gets the DC-transfer test instead of the per-code ones.
pub fn static_tests(sc: &Scenario) -> Result<Static> {
    let bench = Bench::new(sc)?;
    let mut dac_res = None;
    let mut dac_dc = None;
    if let Some((label, dac)) = &bench.reconstructor {
        if let Some(info) = dac.dc_static() {
            let at = bench.reconstructor_at.unwrap_or_default();
            let dacs = (0..DC_LEVELS)
                .map(|_| bench.reconstructor(at))
                .collect::<Result<Vec<_>>>()?;
            dac_dc = Some(dac_dc_transfer(sc, label, dacs, info)?);
        } else {
            let bits = dac.bits();
            if bits < 2 {
                return Err(Error::BadInput(format!(
                    "{}: {}: static tests need a DAC of at least 2 bits",
                    sc.origin, label
                )));
            }
            let n = 1u64 << bits;
            let absolute: Vec<f64> = (0..n).map(|k| dac.level_v(k as u32)).collect();
            let (lo, hi) = dac.range_v();
            let q = (hi - lo) / n as f64;
            let result = static_test::dac_from_levels(&absolute, lo, q);
            let zero = absolute[0];
            dac_res = Some(DacStatic {
                result,
                levels_v: absolute.iter().map(|v| v - zero).collect(),
            });
        }
    }
    let mut adc_res = None;
    let mut adc_dc = None;
    if let Some(at) = bench.quantizer_at {
        let probe_adc = bench.quantizer(at)?;
        if let Some(info) = probe_adc.dc_static() {
            let adcs = (0..DC_LEVELS)
                .map(|_| bench.quantizer(at))
                .collect::<Result<Vec<_>>>()?;
            adc_dc = Some(adc_dc_transfer(
                sc,
                &sc.stages[at].label,
                adcs,
                info,
                &|v| v,
            )?);
        } else {
            adc_res = Some(adc_static(sc, || bench.quantizer(at))?);
        }
    }
    if adc_res.is_none() && dac_res.is_none() && adc_dc.is_none() && dac_dc.is_none() {
        return Err(Error::BadInput(format!(
            "{}: the chain has no ADC or DAC to test",
            sc.origin
        )));
    }
    Ok(Static {
        adc: adc_res,
        dac: dac_res,
        adc_dc_transfer: adc_dc,
        dac_dc_transfer: dac_dc,
    })
}

/// DC levels of the DC-transfer test.
const DC_LEVELS: usize = 33;
/// Words averaged at each level, in [`DC_BATCHES`] batches for the mean's standard error.
const DC_AVERAGE_WORDS: usize = 4096;
const DC_BATCHES: usize = 16;

const DC_NOT_APPLICABLE: &str = "do not apply: an oversampling converter's word is finer than its noise, so it has no per-code transitions to locate; its linearity is the DC transfer's INL";

/// The DC-transfer test of a delta-sigma ADC: `adcs` (one fresh converter per level, [`DC_LEVELS`] of them)
/// driven by DC levels evenly over +-`info.stable_half_span_v` about mid-range, each passed through `front` (the
/// identity on the bench; a test models a nonlinear stage before the converter with it).
fn adc_dc_transfer(
    sc: &Scenario,
    label: &str,
    adcs: Vec<Box<dyn Quantizer>>,
    info: DcStaticInfo,
    front: &(dyn Fn(f64) -> f64 + Sync),
) -> Result<DcTransfer> {
    use rayon::prelude::*;
    let first = adcs
        .first()
        .ok_or_else(|| Error::Run("no converter for the DC-transfer test".into()))?;
    let bits = first.bits();
    let (lo, hi) = first.range_v();
    let mid = 0.5 * (lo + hi);
    let lsb = (hi - lo) / f64::powi(2.0, bits as i32);
    let n = adcs.len();
    let level = |j: usize| mid + info.stable_half_span_v * (2.0 * j as f64 / (n - 1) as f64 - 1.0);
    let settle = info.settle_words;
    // One level: (mean code, rms code, standard error of the mean (codes), overloads).
    let per_level: Vec<(f64, f64, f64, u64)> = adcs
        .into_par_iter()
        .enumerate()
        .map(|(j, mut adc)| {
            let v = front(level(j));
            let probe = FnProbe(move |_t: f64| v);
            for k in 0..settle as u64 {
                adc.convert(k, &probe);
            }
            let codes: Vec<f64> = (settle as u64..(settle + DC_AVERAGE_WORDS) as u64)
                .map(|k| f64::from(adc.convert(k, &probe).code))
                .collect();
            let (m, rms, err) = static_test::mean_rms_error(&codes, DC_BATCHES);
            (m, rms, err, adc.overloads().unwrap_or(0))
        })
        .collect();
    let mut out = DcCollect::default();
    for (j, &(m, rms, err, ov)) in per_level.iter().enumerate() {
        out.overloads += ov;
        if ov > 0 {
            out.overloaded.push(level(j));
            continue;
        }
        out.level_v.push(level(j));
        out.mean_code.push(m);
        out.mean_output_v.push(lo + m * lsb);
        out.noise_rms_lsb.push(rms);
        out.mean_error_lsb.push(err);
    }
    let linearity = out.linearity(sc, label, hi - lo, lsb)?;
    let noise_max = out.noise_rms_lsb.iter().fold(0.0f64, |a, &b| a.max(b));
    let full = f64::powi(2.0, bits as i32);
    let resolution = |k: f64| (full / (k * noise_max).max(1.0)).log2();
    Ok(DcTransfer {
        level_v: out.level_v,
        code: Vec::new(),
        mean_output_v: out.mean_output_v,
        mean_code: out.mean_code,
        mean_error_lsb: out.mean_error_lsb,
        noise_rms_lsb: out.noise_rms_lsb,
        noise_rms_max_lsb: Some(noise_max),
        effective_resolution_bits: Some(resolution(1.0)),
        noise_free_bits: Some(resolution(6.6)),
        linearity,
        stable_half_span_v: info.stable_half_span_v,
        overloaded_levels_v: out.overloaded,
        overloads: out.overloads,
        settle_words: settle,
        average_words: DC_AVERAGE_WORDS,
        dnl_and_missing_codes: DC_NOT_APPLICABLE.into(),
    })
}

/// What the levels of a DC-transfer test gathered.
#[derive(Default)]
struct DcCollect {
    level_v: Vec<f64>,
    code: Vec<u32>,
    mean_code: Vec<f64>,
    mean_output_v: Vec<f64>,
    noise_rms_lsb: Vec<f64>,
    mean_error_lsb: Vec<f64>,
    overloaded: Vec<f64>,
    overloads: u64,
}

impl DcCollect {
    fn linearity(
        &self,
        sc: &Scenario,
        label: &str,
        full_scale_v: f64,
        lsb_v: f64,
    ) -> Result<static_test::DcLinearity> {
        if self.level_v.len() < 3 {
            return Err(Error::BadInput(format!(
                "{}: {label}: the noise-shaping loop overloaded at {} of {} DC levels, too many for a DC-transfer test; lower ntf_gain or order, or add quantizer_bits, so the loop is stable over its range",
                sc.origin,
                self.overloaded.len(),
                self.overloaded.len() + self.level_v.len()
            )));
        }
        Ok(static_test::dc_linearity(
            &self.level_v,
            &self.mean_output_v,
            full_scale_v,
            lsb_v,
        ))
    }
}

/// The DC-transfer test of a delta-sigma DAC: `dacs` (one fresh DAC per level) each holding one code, the codes
/// evenly over the word's range; its output, rendered at the modulator clock, averaged over
/// [`DC_AVERAGE_WORDS`] words after the interpolation filters settle (any analog filter after it with a gain of 1
/// at DC leaves that mean as it is).
fn dac_dc_transfer(
    sc: &Scenario,
    label: &str,
    dacs: Vec<Box<dyn Reconstructor>>,
    info: DcStaticInfo,
) -> Result<DcTransfer> {
    use rayon::prelude::*;
    let first = dacs
        .first()
        .ok_or_else(|| Error::Run("no DAC for the DC-transfer test".into()))?;
    let bits = first.bits();
    let (lo, hi) = first.range_v();
    let lsb = (hi - lo) / f64::powi(2.0, bits as i32);
    let top = (1u64 << bits) - 1;
    let n = dacs.len();
    let code_at = |j: usize| ((top as f64) * j as f64 / (n - 1) as f64).round() as u32;
    let settle = info.settle_words;
    let osr = (info.clock_hz / info.word_rate_hz).round().max(1.0) as usize;
    let tb = Timebase::new(info.clock_hz);
    let words = settle + DC_AVERAGE_WORDS;
    // One level: (mean output (V), standard error of the mean (V), overloads).
    let per_level: Vec<(f64, f64, u64)> = dacs
        .into_par_iter()
        .enumerate()
        .map(|(j, mut dac)| {
            let code = code_at(j);
            let events: Vec<CodeEvent> = (0..words)
                .map(|k| {
                    let t = k as f64 / info.word_rate_hz;
                    CodeEvent {
                        t_sample_s: t,
                        t_avail_s: t,
                        code,
                    }
                })
                .collect();
            // The output averaged over each word period (a boxcar of one word), then the words after settling.
            let mut word_means = Vec::with_capacity(DC_AVERAGE_WORDS);
            let mut block = vec![0.0; osr];
            let mut taken = 0;
            for k in 0..words {
                taken += dac.render(tb, (k * osr) as u64, &events[taken..], &mut block);
                if k >= settle {
                    word_means.push(block.iter().sum::<f64>() / osr as f64);
                }
            }
            let (m, _, err) = static_test::mean_rms_error(&word_means, DC_BATCHES);
            (m, err, dac.overloads().unwrap_or(0))
        })
        .collect();
    let mut out = DcCollect::default();
    for (j, &(m, err, ov)) in per_level.iter().enumerate() {
        let ideal = lo + f64::from(code_at(j)) * lsb;
        out.overloads += ov;
        if ov > 0 {
            out.overloaded.push(ideal);
            continue;
        }
        out.level_v.push(ideal);
        out.code.push(code_at(j));
        out.mean_output_v.push(m);
        out.mean_error_lsb.push(err / lsb);
    }
    let linearity = out.linearity(sc, label, hi - lo, lsb)?;
    Ok(DcTransfer {
        level_v: out.level_v,
        code: out.code,
        mean_output_v: out.mean_output_v,
        mean_code: Vec::new(),
        mean_error_lsb: out.mean_error_lsb,
        noise_rms_lsb: Vec::new(),
        noise_rms_max_lsb: None,
        effective_resolution_bits: None,
        noise_free_bits: None,
        linearity,
        stable_half_span_v: info.stable_half_span_v,
        overloaded_levels_v: out.overloaded,
        overloads: out.overloads,
        settle_words: settle,
        average_words: DC_AVERAGE_WORDS,
        dnl_and_missing_codes: DC_NOT_APPLICABLE.into(),
    })
}

fn adc_static(sc: &Scenario, make: impl Fn() -> Result<Box<dyn Quantizer>>) -> Result<AdcStatic> {
    let probe_adc = make()?;
    let bits = probe_adc.bits();
    if bits < 2 {
        return Err(Error::BadInput(format!(
            "{}: static tests need an ADC of at least 2 bits",
            sc.origin
        )));
    }
    let (lo, hi) = probe_adc.range_v();
    let n_codes = 1usize << bits;
    let q = (hi - lo) / n_codes as f64;
    let fs = probe_adc.sample_rate_hz();
    // The ideal transfer's origin: ideal transitions at origin + k q (IEEE Std 1241's centred transfer has its
    // first at low + q/2, a truncating one at low + q).
    let origin = lo + (probe_adc.ideal_first_transition_lsb() - 1.0) * q;
    // Slow ramp: 16 samples per LSB (capped), from 2 LSB below to 2 LSB above the range.
    let ramp_n = (n_codes * 16).clamp(4096, 1 << 22);
    let v0 = lo - 2.0 * q;
    let v1 = hi + 2.0 * q;
    let dur = ramp_n as f64 / fs;
    let slope = (v1 - v0) / dur;
    let probe = FnProbe(|t: f64| v0 + slope * t);
    let mut adc = make()?;
    let mut ramp_v = Vec::with_capacity(ramp_n);
    let mut codes = Vec::with_capacity(ramp_n);
    for k in 0..ramp_n as u64 {
        let ev = adc.convert(k, &probe);
        ramp_v.push(v0 + slope * adc.sample_time_s(k));
        codes.push(ev.code);
    }
    let ramp = static_test::adc_ramp(&ramp_v, &codes, bits, origin, q);
    // Code density: a sine around mid-range, coherent with the record, no faster than the converter allows for a
    // static test; the record then grows to hold at least 8 cycles. It overdrives the range by 2 % or 2 LSB,
    // whichever is more, and by twice as much again (up to six times) while an end code is never hit: both end
    // transitions must lie inside the sine's swing, or they cannot be measured (an offset of more than the
    // overdrive would otherwise hide).
    let f_want = (fs / 97.3).min(probe_adc.static_sine_limit_hz());
    let cd_n = (n_codes * 64)
        .max((8.0 * fs / f_want).ceil() as usize)
        .clamp(1 << 16, 1 << 22);
    let f = crate::measure::coherent::coherent_frequency(f_want, fs, cd_n)
        .map(|(f, _)| f)
        .unwrap_or(f_want);
    let c = 0.5 * (lo + hi);
    let half = 0.5 * (hi - lo);
    let mut over = (0.02 * half).max(2.0 * q);
    let w = 2.0 * std::f64::consts::PI * f;
    let mut hist = vec![0u64; n_codes];
    let mut a;
    let mut tries = 0;
    loop {
        a = half + over;
        let probe = FnProbe(|t: f64| c + a * (w * t).sin());
        let mut adc = make()?;
        hist.iter_mut().for_each(|h| *h = 0);
        for k in 0..cd_n as u64 {
            let ev = adc.convert(k, &probe);
            hist[ev.code as usize] += 1;
        }
        tries += 1;
        if (hist[0] > 0 && hist[n_codes - 1] > 0) || tries == 6 {
            break;
        }
        over *= 2.0;
    }
    // The bench made the sine, so its amplitude and offset are known (IEEE Std 1241's code-density test with a
    // known input): offset and gain errors are measured, not fitted away by the end bins.
    let code_density = static_test::adc_code_density(&hist, Some(a), Some(c), origin, q);
    Ok(AdcStatic {
        code_density,
        code_density_amplitude_v: a,
        code_density_offset_v: c,
        ramp,
        code_density_samples: cd_n,
        ramp_samples: ramp_n,
        missing_code_causes: Vec::new(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// The field recorder demo with `edits` (from, to) made to its text.
    fn recorder(edits: &[(&str, &str)]) -> Scenario {
        let mut text = include_str!("../../scenarios/field-recorder.toml").to_string();
        for (from, to) in edits {
            assert!(text.contains(from), "{from}");
            text = text.replace(from, to);
        }
        crate::scenario::parse_str(&text, "t.toml", Path::new(".")).unwrap()
    }

    /// The ADC with its loop's zeros at DC (NTF numerator (1 - z^-1)^L).
    const DC_ZEROS: (&str, &str) = (
        "quantizer_bits = 1\n",
        "quantizer_bits = 1\nzeros = \"dc\"\n",
    );

    /// The bound an ideal converter's INL keeps (LSB): with the NTF's zeros at DC, the mean of y = u + NTF e
    /// over a window is u plus a telescoping sum of the bounded loop state over the window's length, so the
    /// loop's DC transfer is its STF's, 1 (R. Schreier and G. C. Temes, Understanding Delta-Sigma Data
    /// Converters, 2005, chapter 2, from memory); what is left in each level's mean is noise of standard error
    /// s_j (batch means), and a least-squares residual has a variance no larger than its point's. Five times the
    /// largest s_j (the chance that any of 31 Gaussian residuals passes it is below 2e-5), plus half an LSB for
    /// the output word's rounding.
    fn noise_bound_lsb(d: &DcTransfer) -> f64 {
        5.0 * d.mean_error_lsb.iter().fold(0.0f64, |a, &b| a.max(b)) + 0.5
    }

    #[test]
    fn an_ideal_delta_sigma_adc_is_linear_within_its_noise() {
        let sc = recorder(&[DC_ZEROS]);
        let st = static_tests(&sc).unwrap();
        assert!(st.adc.is_none() && st.dac.is_none());
        let d = st.adc_dc_transfer.unwrap();
        let bound = noise_bound_lsb(&d);
        assert!(
            d.linearity.inl_max_lsb <= bound,
            "INL {} LSB, bound {bound} LSB",
            d.linearity.inl_max_lsb
        );
        assert!(d.level_v.len() >= 25, "{} levels", d.level_v.len());
        // The levels span the loop's stated largest stable amplitude (report.json's max_stable_input_v).
        let crate::stages::StageKind::DeltaSigmaAdc(cfg) = &sc.stages[1].kind else {
            panic!("the second stage is the ADC")
        };
        let half = 0.5 * (cfg.range_v.1 - cfg.range_v.0);
        assert!((d.stable_half_span_v - cfg.design().max_stable * half).abs() < 1e-12);
        // Offset: none in the model beyond the noise; gain error: the decimation FIR's gain at DC, within its
        // passband ripple (0.01 dB peak to peak: 1150 ppm at most).
        assert!(d.linearity.offset_lsb.abs() <= bound);
        assert!(d.linearity.gain_error_ppm.abs() < 1150.0);
        // Noise-free bits below effective bits by log2(6.6) (the definitions).
        let (e, f) = (
            d.effective_resolution_bits.unwrap(),
            d.noise_free_bits.unwrap(),
        );
        assert!(
            (e - f - 6.6f64.log2()).abs() < 1e-9 && e < 24.0 && e > 14.0,
            "{e} {f}"
        );
    }

    #[test]
    fn a_cubic_front_shows_as_the_cubic_s_curve() {
        // A front y = x + c x^3 / h^2 before an ideal converter: the end-point INL at each level is the cubic's
        // deviation from the chord through the end levels, referred back through the chord's slope (the
        // definition of end-point INL, by hand), within the converter's noise bound.
        let sc = recorder(&[DC_ZEROS]);
        let bench = Bench::new(&sc).unwrap();
        let at = bench.quantizer_at.unwrap();
        let info = bench.quantizer(at).unwrap().dc_static().unwrap();
        let h = info.stable_half_span_v;
        let c = 2e-4;
        let f = move |x: f64| x + c * x * x * x / (h * h);
        let adcs = (0..DC_LEVELS)
            .map(|_| bench.quantizer(at).unwrap())
            .collect();
        let d = adc_dc_transfer(&sc, "adc", adcs, info, &f).unwrap();
        let x = &d.level_v;
        let (x0, x1) = (x[0], x[x.len() - 1]);
        let b = (f(x1) - f(x0)) / (x1 - x0);
        let lsb = 4.0 / f64::powi(2.0, 24);
        let bound = noise_bound_lsb(&d);
        for (j, &xj) in x.iter().enumerate() {
            let want_lsb = (f(xj) - (f(x0) + b * (xj - x0))) / b / lsb;
            let got = d.linearity.inl_endpoint_lsb[j];
            assert!(
                (got - want_lsb).abs() <= bound,
                "{xj} V: {got} LSB, want {want_lsb}"
            );
        }
        // The curve is far above the noise: 0.385 c h at its peak (x = h / sqrt 3).
        assert!(d.linearity.inl_endpoint_max_lsb > 20.0 * bound);
    }

    #[test]
    fn a_delta_sigma_dac_with_fixed_elements_bends_and_with_rotated_ones_does_not() {
        // Mismatched unit elements always chosen in the same order are a static nonlinearity; data-weighted
        // averaging shapes their error out of the band (R. T. Baird and T. S. Fiez, IEEE Trans. Circuits Syst.
        // II 42(12), 1995), so the DC transfer is linear within its noise.
        let dwa = static_tests(&recorder(&[]))
            .unwrap()
            .dac_dc_transfer
            .unwrap();
        let fixed = static_tests(&recorder(&[(
            "element_selection = \"dwa\"",
            "element_selection = \"fixed\"",
        )]))
        .unwrap()
        .dac_dc_transfer
        .unwrap();
        let bound = noise_bound_lsb(&dwa);
        assert!(
            dwa.linearity.inl_max_lsb <= bound,
            "DWA: INL {} LSB, bound {bound}",
            dwa.linearity.inl_max_lsb
        );
        assert!(
            fixed.linearity.inl_max_lsb > 5.0 * noise_bound_lsb(&fixed),
            "fixed: INL {} LSB, bound {}",
            fixed.linearity.inl_max_lsb,
            noise_bound_lsb(&fixed)
        );
        assert_eq!(dwa.code.len(), dwa.level_v.len());
    }
}
