//! The static bench: the ADC's slow-ramp and code-density tests and the DAC's every-code levels, on the
//! scenario's own converters (built through their kinds, with the same seeds as a run), driven through the
//! quantizer and reconstructor roles.

use serde::Serialize;

use crate::engine::pipeline::build_context;
use crate::error::{Error, Result};
use crate::measure::static_test::{self, StaticResult};
use crate::scenario::Scenario;
use crate::scenario::overrides::{ScenarioText, candidates};
use crate::stages::Probe;
use crate::stages::kind::{Role, Runtime, Upstream};
use crate::stages::roles::{Quantizer, Reconstructor};

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

/// `static.adc` and `static.dac`.
#[derive(Debug, Clone, Serialize)]
pub struct Static {
    pub adc: Option<AdcStatic>,
    pub dac: Option<DacStatic>,
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
    reconstructor: Option<(String, Box<dyn Reconstructor>)>,
}

impl<'a> Bench<'a> {
    fn new(sc: &'a Scenario) -> Result<Bench<'a>> {
        let mut bench = Bench {
            sc,
            quantizer_at: None,
            upstream: Vec::with_capacity(sc.stages.len()),
            reconstructor: None,
        };
        let mut up = Upstream::default();
        for (i, st) in sc.stages.iter().enumerate() {
            bench.upstream.push(up);
            match st.kind.role() {
                Role::Quantizer => bench.quantizer_at = Some(i),
                Role::Reconstructor => {
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

/// Static tests of the scenario's ADC and DAC, drawn with the same seeds as a run.
pub fn static_tests(sc: &Scenario) -> Result<Static> {
    // An oversampling converter has no code transitions to find: its long words are set by its shaped noise and
    // its filters, and stepping or sweeping it measures those, not a ladder. Say so rather than print nonsense.
    if let Some((i, st)) = sc
        .stages
        .iter()
        .enumerate()
        .find(|(_, s)| s.kind.kind_name().starts_with("delta_sigma"))
    {
        return Err(Error::BadInput(format!(
            "{}: stage {} ({}): static tests (DNL, INL, missing codes) measure code transitions, which a delta-sigma converter does not have; measure it with `convchain run` (SNR, THD, SFDR, the noise floor) or replace it by a SAR, flash or pipelined converter for a static test",
            sc.origin,
            i + 1,
            st.kind.kind_name()
        )));
    }
    let bench = Bench::new(sc)?;
    let mut dac_res = None;
    if let Some((label, dac)) = &bench.reconstructor {
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
    let adc_res = match bench.quantizer_at {
        Some(at) => Some(adc_static(sc, || bench.quantizer(at))?),
        None => None,
    };
    if adc_res.is_none() && dac_res.is_none() {
        return Err(Error::BadInput(format!(
            "{}: the chain has no ADC or DAC to test",
            sc.origin
        )));
    }
    Ok(Static {
        adc: adc_res,
        dac: dac_res,
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
