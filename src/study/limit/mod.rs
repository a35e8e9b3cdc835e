//! The limit finder: the lowest sine frequency at which a chain starts to struggle, for four criteria, and the
//! mechanism behind each.
//!
//! Criteria (each against the chain's behaviour at the low end of the range, `from`):
//! - accuracy: ENOB (the output's, or the ADC's when the output has none) falls `enob_drop_bits` below its value
//!   at `from`;
//! - level: the output's gain falls `gain_drop_db` below its value at `from`;
//! - shape: waveform fidelity falls below `fidelity_min_db`;
//! - aliasing: the input passes the ADC's Nyquist frequency (computed, not searched).
//!
//! Method: a coarse logarithmic sweep from `from` to `to`, then bisection (in log frequency) of the first
//! crossing until the bracket is narrower than `tolerance` (2 %). Every run holds at least `min_cycles` cycles
//! of the input in its analysis window (20 in the coarse sweep; 100 while bisecting when the scenario samples
//! coherently, so that the coherent move of the frequency stays near 1 %): `simulation.duration` is lengthened
//! and `simulation.settle` set to at least two periods, never shortened below the scenario's own, and the total
//! is bounded by `max_grid_steps` (a note says when that left fewer cycles).
//!
//! Diagnosis: at a criterion's frequency (and at `from`) the chain is re-run with each non-ideality made ideal,
//! one at a time (edits of the scenario text, [`Edit`]); the mechanism is the one whose removal takes away the
//! most of the metric's fall from `from` to the criterion's frequency.

use rayon::prelude::*;
use serde::Serialize;

use crate::engine::plan::Plan;
use crate::error::{Error, Result};
use crate::format::units::format_si;
use crate::report::OutputDir;
use crate::report::plot::{self, Plot};
use crate::scenario::overrides::{Edit, ScenarioText};
use crate::scenario::{Scenario, Waveform};
use crate::stages::kind::Role;
use crate::study::sweep::{progress_bar, simulate, thread_pool};

/// Settings of the limit finder.
#[derive(Debug, Clone, Copy)]
pub struct LimitOptions {
    /// Low end (Hz); None: 1/50 of the lowest rate of interest of the chain (10 Hz when it has none).
    pub from_hz: Option<f64>,
    /// High end (Hz); None: min(analog_rate/20, 10 x ADC sample rate), kept inside what the meters can see.
    pub to_hz: Option<f64>,
    pub enob_drop_bits: f64,
    pub gain_drop_db: f64,
    pub fidelity_min_db: f64,
    /// Points of the coarse sweep.
    pub coarse_points: usize,
    /// Relative width of the final bracket (0.02 = 2 %).
    pub tolerance: f64,
    /// Cycles of the input in each analysis window (coarse sweep).
    pub min_cycles: f64,
    /// Upper bound on the grid steps of one run (bounds the lengthened duration).
    pub max_grid_steps: f64,
    pub threads: Option<usize>,
    pub progress: bool,
}

impl Default for LimitOptions {
    fn default() -> Self {
        LimitOptions {
            from_hz: None,
            to_hz: None,
            enob_drop_bits: 1.0,
            gain_drop_db: 3.0,
            fidelity_min_db: 6.0,
            coarse_points: 24,
            tolerance: 0.02,
            min_cycles: 20.0,
            max_grid_steps: 8e6,
            threads: None,
            progress: false,
        }
    }
}

/// What can limit a chain.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Criterion {
    Accuracy,
    Level,
    Shape,
    Aliasing,
}

impl Criterion {
    pub fn name(self) -> &'static str {
        match self {
            Criterion::Accuracy => "accuracy",
            Criterion::Level => "level",
            Criterion::Shape => "shape",
            Criterion::Aliasing => "aliasing",
        }
    }
}

/// The three metrics of one run at one frequency.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LimitPoint {
    pub requested_hz: f64,
    /// The frequency the run used (moved slightly for coherent sampling).
    pub frequency_hz: f64,
    /// ENOB used by the accuracy criterion (output, or ADC as a fallback).
    pub enob_bits: Option<f64>,
    pub gain_db: Option<f64>,
    pub fidelity_db: Option<f64>,
    /// Cycles of the input in the analysis window.
    pub cycles: f64,
    pub error: Option<String>,
}

/// One re-run with a non-ideality made ideal.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Ablation {
    /// What was changed, e.g. "stage.2 dac: slew_rate removed".
    pub change: String,
    /// The mechanism as stage kind and parameter, e.g. `dac.slew_rate`.
    pub mechanism: String,
    pub enob_bits: Option<f64>,
    pub gain_db: Option<f64>,
    pub fidelity_db: Option<f64>,
    /// How much of the row's loss the change wins back at the criterion's frequency (bits or dB): the metric
    /// with the change, capped at the unchanged chain's value at the low end, minus the unchanged chain's value
    /// at the criterion's frequency. The cap keeps a change that helps at every frequency (a faster converter's
    /// oversampling gain in the output band) from looking like more than a full recovery.
    pub recovery: Option<f64>,
    pub error: Option<String>,
}

/// One row of the table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CriterionResult {
    pub criterion: Criterion,
    /// Where the criterion is first met (the frequency used at the failing end of the final bracket); None
    /// when it is not reached in the range.
    pub frequency_hz: Option<f64>,
    /// The final bracket (passing, failing), frequencies used.
    pub bracket_hz: Option<(f64, f64)>,
    /// The threshold the metric was compared with.
    pub threshold: Option<f64>,
    /// The row's metric at `frequency_hz`.
    pub value: Option<f64>,
    /// The mechanism whose removal recovers the most, e.g. `dac.slew_rate`.
    pub mechanism: Option<String>,
    /// Label of the stage that mechanism belongs to.
    pub mechanism_stage: Option<String>,
    pub ablation: Vec<Ablation>,
    /// Other mechanisms whose recovery is within the criterion's significance of the chosen one's: the
    /// diagnosis cannot tell them apart.
    pub ties: Vec<String>,
    pub note: String,
}

/// The headline and the table: `limit` in limit.json.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Limit {
    pub frequency_hz: Option<f64>,
    pub criterion: Option<Criterion>,
    pub mechanism: Option<String>,
    pub criteria: Vec<CriterionResult>,
}

/// Everything the limit finder found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LimitReport {
    pub scenario: String,
    pub from_hz: f64,
    pub to_hz: f64,
    pub enob_drop_bits: f64,
    pub gain_drop_db: f64,
    pub fidelity_min_db: f64,
    /// "output" or "adc": whose ENOB the accuracy criterion follows.
    pub enob_source: String,
    pub limit: Limit,
    /// The coarse sweep.
    pub coarse: Vec<LimitPoint>,
    /// How runs were set up (durations), and anything the reader should know.
    pub notes: Vec<String>,
}

pub use crate::scenario::overrides::{Candidate, candidates};

/// Rates of interest of a chain: each stage's (the ADC's sample rate, low-pass cutoffs, amplifier and DAC
/// bandwidths), the analysis band. And the highest high-pass cutoff.
fn rates_of_interest(sc: &Scenario) -> (Vec<f64>, Option<f64>) {
    let mut v = Vec::new();
    let mut hp: Option<f64> = None;
    for st in &sc.stages {
        let r = st.kind.rates();
        v.extend(r.lowpass_hz);
        if let Some(h) = r.highpass_hz {
            hp = Some(hp.map_or(h, |x| x.max(h)));
        }
    }
    if let Some(b) = sc.analysis.band_hz {
        v.push(b);
    }
    (v, hp)
}

/// Runs of the scenario at chosen frequencies, with durations scaled for the cycles needed.
struct Runner<'a> {
    text: &'a ScenarioText,
    /// The scenario as run: with [`TestSine`]'s edits when the source is not a sine.
    base: &'a Scenario,
    /// Edits applied before every run's own ([`TestSine::edits`]).
    source_edits: &'a [Edit],
    max_grid_steps: f64,
    use_output_enob: bool,
}

impl Runner<'_> {
    /// Duration and settle for `cycles` cycles at `f_hz`: (duration, settle, cycles actually held).
    fn timing(&self, f_hz: f64, cycles: f64) -> (f64, f64, f64) {
        let sim = &self.base.simulation;
        let w0 = sim.duration_s - sim.settle_s;
        let cap_s = sim.duration_s.max(self.max_grid_steps / sim.analog_rate_hz);
        let settle = sim.settle_s.max(2.0 / f_hz);
        let want = settle + w0.max(cycles / f_hz);
        if want <= cap_s {
            return (want, settle, (want - settle) * f_hz);
        }
        // Bounded: keep at most a quarter of the run (or the scenario's own settle) for settling.
        let settle = settle.min(sim.settle_s.max(0.25 * cap_s));
        (cap_s, settle, (cap_s - settle) * f_hz)
    }

    fn point(&self, f_hz: f64, cycles: f64, extra: &[Edit]) -> LimitPoint {
        let (duration, settle, held) = self.timing(f_hz, cycles);
        let mut edits = self.source_edits.to_vec();
        edits.extend([
            Edit::Set("source.frequency".into(), f_hz),
            Edit::Set("simulation.duration".into(), duration),
            Edit::Set("simulation.settle".into(), settle),
        ]);
        edits.extend_from_slice(extra);
        let fail = |e: Error| LimitPoint {
            requested_hz: f_hz,
            frequency_hz: f_hz,
            enob_bits: None,
            gain_db: None,
            fidelity_db: None,
            cycles: held,
            error: Some(e.to_string()),
        };
        let sc = match self.text.with_edits(&edits) {
            Ok(s) => s,
            Err(e) => return fail(e),
        };
        match simulate(&sc) {
            Ok((_, used, m)) => {
                let enob = if self.use_output_enob {
                    m.output.enob_bits
                } else {
                    m.adc.as_ref().and_then(|a| a.enob_bits)
                };
                LimitPoint {
                    requested_hz: f_hz,
                    frequency_hz: used.unwrap_or(f_hz),
                    enob_bits: enob,
                    gain_db: m.output.gain_db,
                    fidelity_db: Some(m.output.fidelity_db),
                    cycles: held,
                    error: None,
                }
            }
            Err(e) => fail(e),
        }
    }
}

/// The metric a criterion follows.
fn metric(c: Criterion, p: &LimitPoint) -> Option<f64> {
    match c {
        Criterion::Accuracy => p.enob_bits,
        Criterion::Level => p.gain_db,
        Criterion::Shape => p.fidelity_db,
        Criterion::Aliasing => None,
    }
}

/// Find the limits of a scenario with a sine source (or the built-in chord, judged with a test sine in its place:
/// [`test_sine`]).
pub fn find_limits(text: &ScenarioText, opts: &LimitOptions) -> Result<LimitReport> {
    let base = text.scenario()?;
    check_options(&base, opts)?;
    let (plan, _) = Plan::new(&base)?;
    let mut notes = Vec::new();
    let (from_hz, to_hz) = frequency_range(&base, &plan, opts, &mut notes)?;
    let coherent = base.analysis.coherent;
    let fine_cycles = if coherent {
        opts.min_cycles.max(100.0)
    } else {
        opts.min_cycles
    };
    let (run_base, source_edits, source_note) = test_sine(text, &base, from_hz, opts)?;
    notes.extend(source_note);
    let mut runner = Runner {
        text,
        base: &run_base,
        source_edits: &source_edits,
        max_grid_steps: opts.max_grid_steps,
        use_output_enob: true,
    };
    let pool = thread_pool(opts.threads)?;
    let (first, coarse) = coarse_sweep(&mut runner, &pool, from_hz, to_hz, opts)?;
    let enob_source = if runner.use_output_enob {
        "output"
    } else {
        "adc"
    };
    coarse_notes(&coarse, opts, fine_cycles, coherent, &mut notes);

    // ---- thresholds, first crossings and the diagnosis at each
    // Without a converter there are no bits to lose: the output "ENOB" would only measure rounding noise.
    let has_adc = base
        .stages
        .iter()
        .any(|st| st.kind.role() == Role::Quantizer);
    let thresholds = [
        (
            Criterion::Accuracy,
            first
                .enob_bits
                .filter(|_| has_adc)
                .map(|e| e - opts.enob_drop_bits),
        ),
        (
            Criterion::Level,
            first.gain_db.map(|g| g - opts.gain_drop_db),
        ),
        (Criterion::Shape, Some(opts.fidelity_min_db)),
    ];
    let cands = candidates(&base);
    let search = Search {
        runner: &runner,
        coarse: &coarse,
        first: &first,
        cands: &cands,
        fine_cycles,
        tolerance: opts.tolerance,
        to_hz,
    };
    let mut criteria: Vec<CriterionResult> = pool.install(|| {
        thresholds
            .par_iter()
            .map(|&(c, thr)| match thr {
                Some(thr) => search.criterion(c, thr),
                None => CriterionResult::unmet(
                    c,
                    None,
                    if c == Criterion::Accuracy && !has_adc {
                        "not applicable: the chain has no converter".to_string()
                    } else {
                        format!("no {} metric at the low end", c.name())
                    },
                ),
            })
            .collect()
    });
    criteria.push(aliasing(&base, &plan));
    let head = criteria
        .iter()
        .filter(|r| r.frequency_hz.is_some())
        .min_by(|a, b| a.frequency_hz.unwrap().total_cmp(&b.frequency_hz.unwrap()));
    let limit = Limit {
        frequency_hz: head.and_then(|h| h.frequency_hz),
        criterion: head.map(|h| h.criterion),
        mechanism: head.and_then(|h| h.mechanism.clone()),
        criteria: criteria.clone(),
    };
    Ok(LimitReport {
        scenario: base.name.clone(),
        from_hz,
        to_hz,
        enob_drop_bits: opts.enob_drop_bits,
        gain_drop_db: opts.gain_drop_db,
        fidelity_min_db: opts.fidelity_min_db,
        enob_source: enob_source.into(),
        limit,
        coarse,
        notes,
    })
}

/// The options and the source the limit finder needs.
fn check_options(base: &Scenario, opts: &LimitOptions) -> Result<()> {
    if !matches!(
        base.source.waveform,
        Waveform::Sine { .. } | Waveform::Chord { .. }
    ) {
        return Err(Error::BadInput(format!(
            "{}: the limit finder varies source.frequency and needs a sine source (waveform = \"sine\"; the \
             built-in chord is judged with a test sine at its peak)",
            base.origin
        )));
    }
    for (name, v) in [
        ("--enob-drop", opts.enob_drop_bits),
        ("--gain-drop", opts.gain_drop_db),
    ] {
        if !(v.is_finite() && v > 0.0) {
            return Err(Error::BadInput(format!(
                "{name} must be a positive number, found {v}"
            )));
        }
    }
    if !opts.fidelity_min_db.is_finite() {
        return Err(Error::BadInput("--fidelity-min must be a number".into()));
    }
    Ok(())
}

/// The source the criteria follow: the scenario as run and the edits applied before each run's own, with a note.
///
/// The criteria vary a sine's frequency. A scenario whose source is the built-in chord (a listening signal,
/// [`Waveform::Chord`]) is judged with a test sine in its place: the chord's peak (`amplitude`) as the sine's
/// amplitude, so the chain sees the chord's largest excursion, its offset kept; the record is cut to the
/// scenario's settling plus `min_cycles` cycles at the low end `from_hz` (each run then lengthens it for its own
/// frequency exactly as for a sine scenario), since the chord's beats set the scenario's length, not the sine's
/// cycles. A sine source is run as written (no edits).
fn test_sine(
    text: &ScenarioText,
    base: &Scenario,
    from_hz: f64,
    opts: &LimitOptions,
) -> Result<(Scenario, Vec<Edit>, Option<String>)> {
    let Waveform::Chord { amplitude_v, .. } = base.source.waveform else {
        return Ok((base.clone(), Vec::new(), None));
    };
    let sim = &base.simulation;
    let duration_s = sim.duration_s.min(sim.settle_s + opts.min_cycles / from_hz);
    let edits = vec![
        Edit::SetStr("source.waveform".into(), "sine".into()),
        Edit::Remove("source.beat".into()),
        Edit::Set("source.frequency".into(), from_hz),
        Edit::Set("simulation.duration".into(), duration_s),
    ];
    let run = text.with_edits(&edits)?;
    let note = format!(
        "the source is the built-in chord: the criteria are judged with a test sine of the chord's peak, {} \
         (its offset kept), in its place; each run lasts {} of settling plus at least {} cycles ({} at {}) \
         instead of the chord's {}",
        format_si(amplitude_v, "V"),
        format_si(sim.settle_s, "s"),
        opts.min_cycles,
        format_si(duration_s, "s"),
        format_si(from_hz, "Hz"),
        format_si(sim.duration_s, "s"),
    );
    Ok((run, edits, Some(note)))
}

/// The frequency range searched: from a fiftieth of the lowest rate of interest (above any high-pass corner), up
/// to what the meters can measure.
fn frequency_range(
    base: &Scenario,
    plan: &Plan,
    opts: &LimitOptions,
    notes: &mut Vec<String>,
) -> Result<(f64, f64)> {
    let adc_fs = plan.adc.map(|a| a.sample_rate_hz);
    let analog = base.simulation.analog_rate_hz;
    let (rates, hp) = rates_of_interest(base);
    let from_hz = match opts.from_hz {
        Some(f) => f,
        None => {
            let lowest = rates.iter().copied().reduce(f64::min);
            let mut f = lowest.map_or(10.0, |r| r / 50.0);
            if let Some(h) = hp {
                f = f.max(5.0 * h);
            }
            f
        }
    };
    // The meters find the tone at the source frequency: the output's analysis band and the ADC's Nyquist
    // frequency bound what can be measured.
    // A band that is the converter's Nyquist band by default leaves the ceiling to the converter's rule below.
    let mut ceiling = if plan.out_band_rule == crate::engine::plan::BandRule::ConverterNyquist {
        f64::INFINITY
    } else {
        0.95 * plan.out_band_hz
    };
    let mut why = format!(
        "95 % of the output analysis band ({})",
        format_si(plan.out_band_hz, "Hz")
    );
    if let Some(fs) = adc_fs
        && 0.49 * fs < ceiling
    {
        ceiling = 0.49 * fs;
        why = format!(
            "just below the ADC's Nyquist frequency ({})",
            format_si(fs / 2.0, "Hz")
        );
    }
    let wanted_to = opts
        .to_hz
        .unwrap_or_else(|| (analog / 20.0).min(adc_fs.map_or(f64::INFINITY, |fs| 10.0 * fs)));
    let to_hz = if wanted_to > ceiling {
        notes.push(format!(
            "range ends at {} instead of {}: the meters measure the tone only up to {why}; above the ADC's \
             Nyquist frequency the aliasing criterion applies",
            format_si(ceiling, "Hz"),
            format_si(wanted_to, "Hz")
        ));
        ceiling
    } else {
        wanted_to
    };
    if !(from_hz.is_finite() && from_hz > 0.0 && to_hz > from_hz * 1.1) {
        return Err(Error::BadInput(format!(
            "the frequency range {}..{} is empty or inverted; give --from below --to (the meters reach up to \
             {why})",
            format_si(from_hz, "Hz"),
            format_si(to_hz, "Hz")
        )));
    }
    Ok((from_hz, to_hz))
}

/// The coarse log sweep over the range: the low end's point (which also decides whether the output's or the
/// ADC's ENOB is followed) and every point in order, the low end first.
fn coarse_sweep(
    runner: &mut Runner<'_>,
    pool: &rayon::ThreadPool,
    from_hz: f64,
    to_hz: f64,
    opts: &LimitOptions,
) -> Result<(LimitPoint, Vec<LimitPoint>)> {
    let n = opts.coarse_points.max(3);
    let freqs: Vec<f64> = (0..n)
        .map(|i| from_hz * (to_hz / from_hz).powf(i as f64 / (n - 1) as f64))
        .collect();
    let first = runner.point(from_hz, opts.min_cycles, &[]);
    if let Some(e) = &first.error {
        return Err(Error::Run(format!(
            "the run at the low end ({}) failed: {e}",
            format_si(from_hz, "Hz")
        )));
    }
    if first.enob_bits.is_none() {
        runner.use_output_enob = false;
    }
    let first = if runner.use_output_enob {
        first
    } else {
        runner.point(from_hz, opts.min_cycles, &[])
    };
    let bar = progress_bar(n, opts.progress, "coarse sweep");
    let runner = &*runner;
    let mut coarse: Vec<LimitPoint> = pool.install(|| {
        freqs[1..]
            .par_iter()
            .map(|&f| {
                let p = runner.point(f, opts.min_cycles, &[]);
                if let Some(b) = &bar {
                    b.inc(1);
                }
                p
            })
            .collect()
    });
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    coarse.insert(0, first.clone());
    Ok((first, coarse))
}

/// What the coarse sweep tells the reader: points skipped, the run lengths, the grid-step bound.
fn coarse_notes(
    coarse: &[LimitPoint],
    opts: &LimitOptions,
    fine_cycles: f64,
    coherent: bool,
    notes: &mut Vec<String>,
) {
    let failed: Vec<String> = coarse
        .iter()
        .filter_map(|p| {
            p.error
                .as_ref()
                .map(|e| format!("{}: {e}", format_si(p.requested_hz, "Hz")))
        })
        .collect();
    if !failed.is_empty() {
        notes.push(format!(
            "{} coarse point(s) could not be measured and were skipped: {}",
            failed.len(),
            failed.join("; ")
        ));
    }
    notes.push(format!(
        "each run holds at least {} cycles in its analysis window ({} while bisecting{}): simulation.duration \
         lengthened to settle + max(the scenario's window, cycles/f), simulation.settle = max(the scenario's, \
         2 periods), at most {:.0e} grid steps per run",
        opts.min_cycles,
        fine_cycles,
        if coherent {
            ", for steadier figures near the limit; a coherent tone moves by at most 0.1 %"
        } else {
            ""
        },
        opts.max_grid_steps
    ));
    if let Some(p) = coarse.iter().find(|p| p.cycles + 1e-9 < opts.min_cycles) {
        notes.push(format!(
            "the grid-step bound left only {:.1} cycles at {} (and fewer below)",
            p.cycles,
            format_si(p.requested_hz, "Hz")
        ));
    }
}

/// The aliasing criterion: computed, the quantizer's Nyquist frequency.
fn aliasing(base: &Scenario, plan: &Plan) -> CriterionResult {
    let quantizer = base
        .stages
        .iter()
        .find(|s| s.kind.role() == Role::Quantizer);
    match plan.adc {
        Some(a) => CriterionResult {
            criterion: Criterion::Aliasing,
            frequency_hz: Some(a.sample_rate_hz / 2.0),
            bracket_hz: None,
            threshold: None,
            value: None,
            mechanism: quantizer.map(|s| format!("{}.sample_rate", s.kind.kind_name())),
            mechanism_stage: quantizer.map(|s| s.label.clone()),
            ablation: Vec::new(),
            ties: Vec::new(),
            note: "computed: sample_rate / 2".into(),
        },
        None => CriterionResult::unmet(
            Criterion::Aliasing,
            None,
            "the chain has no converter".into(),
        ),
    }
}

/// Whether a chain keeps up to a frequency by one criterion (for `need`): the chain is run at the low end of
/// [`find_limits`]'s default range and at `up_to_hz` / 8, / 4, / 2 and `up_to_hz` itself (each with the same
/// lengthened durations as the limit finder), and the criterion is met when none of those runs crosses the
/// criterion's threshold. The metric is the worst run's: the ENOB drop (bits) or the gain drop (dB) from the
/// low end, or the lowest fidelity (dB).
#[derive(Debug, Clone)]
pub struct UpToCheck {
    pub criterion: Criterion,
    pub up_to_hz: f64,
    pub from_hz: f64,
    /// The metric's threshold (bits or dB).
    pub threshold: f64,
    /// True for the shape criterion (fidelity must stay at or above the threshold); false for the drops
    /// (which must stay below it).
    pub higher_is_better: bool,
    /// Set when the source is not a sine: how the check stands in for it ([`test_sine`]).
    pub source_note: Option<String>,
    opts: LimitOptions,
    has_adc: bool,
    /// The scenario as run (with `source_edits`).
    base: Scenario,
    source_edits: Vec<Edit>,
}

/// The outcome of one [`UpToCheck::check`].
#[derive(Debug, Clone, PartialEq)]
pub struct UpToResult {
    pub pass: bool,
    pub metric: Option<f64>,
    pub error: Option<String>,
}

impl UpToCheck {
    /// Set up the check of `criterion` (accuracy, level or shape) up to `up_to_hz` for `text`, with `opts`'s
    /// drops and fidelity floor. Bad input: a source that is not a sine, a frequency the meters cannot see, the
    /// accuracy criterion on a chain without a converter.
    pub fn new(
        text: &ScenarioText,
        criterion: Criterion,
        up_to_hz: f64,
        opts: &LimitOptions,
    ) -> Result<UpToCheck> {
        let base = text.scenario()?;
        check_options(&base, opts)?;
        let (plan, _) = Plan::new(&base)?;
        let mut notes = Vec::new();
        let o = LimitOptions {
            to_hz: Some(up_to_hz),
            ..*opts
        };
        let (from_hz, to_hz) = frequency_range(&base, &plan, &o, &mut notes).map_err(|_| {
            Error::BadInput(format!(
                "--up-to {}: too low for the limit criteria (the reference run is at {}, a fiftieth of the \
                 chain's lowest rate of interest); give a higher --up-to",
                format_si(up_to_hz, "Hz"),
                format_si(o.from_hz.unwrap_or(0.0), "Hz")
            ))
        })?;
        if to_hz < up_to_hz * 0.999 {
            return Err(Error::BadInput(format!(
                "--up-to {}: {}; give --up-to at or below {}",
                format_si(up_to_hz, "Hz"),
                notes.join("; "),
                format_si(to_hz, "Hz")
            )));
        }
        let has_adc = base
            .stages
            .iter()
            .any(|st| st.kind.role() == Role::Quantizer);
        let (threshold, higher_is_better) = match criterion {
            Criterion::Accuracy if !has_adc => {
                return Err(Error::BadInput(
                    "--criterion accuracy: the chain has no converter (no bits to lose); use --criterion \
                     level or shape"
                        .into(),
                ));
            }
            Criterion::Accuracy => (opts.enob_drop_bits, false),
            Criterion::Level => (opts.gain_drop_db, false),
            Criterion::Shape => (opts.fidelity_min_db, true),
            Criterion::Aliasing => {
                return Err(Error::BadInput(
                    "--criterion: choose accuracy, level or shape".into(),
                ));
            }
        };
        let (base, source_edits, source_note) = test_sine(text, &base, from_hz, opts)?;
        Ok(UpToCheck {
            criterion,
            up_to_hz,
            from_hz,
            threshold,
            higher_is_better,
            source_note,
            opts: *opts,
            has_adc,
            base,
            source_edits,
        })
    }

    /// The frequencies run, the low end first.
    pub fn frequencies_hz(&self) -> Vec<f64> {
        let mut v = vec![self.from_hz];
        v.extend(
            [8.0, 4.0, 2.0, 1.0]
                .iter()
                .map(|d| self.up_to_hz / d)
                .filter(|f| *f > self.from_hz * 1.01),
        );
        v
    }

    /// Run the chain of `text` with `extra` edits at the check's frequencies (in parallel) and judge it.
    pub fn check(&self, text: &ScenarioText, extra: &[Edit]) -> UpToResult {
        let mut runner = Runner {
            text,
            base: &self.base,
            source_edits: &self.source_edits,
            max_grid_steps: self.opts.max_grid_steps,
            use_output_enob: true,
        };
        let freqs = self.frequencies_hz();
        let first = runner.point(freqs[0], self.opts.min_cycles, extra);
        if let Some(e) = first.error {
            return UpToResult {
                pass: false,
                metric: None,
                error: Some(e),
            };
        }
        let first = if self.criterion == Criterion::Accuracy && first.enob_bits.is_none() {
            runner.use_output_enob = false;
            runner.point(freqs[0], self.opts.min_cycles, extra)
        } else {
            first
        };
        let runner = &runner;
        let rest: Vec<LimitPoint> = freqs[1..]
            .par_iter()
            .map(|&f| runner.point(f, self.opts.min_cycles, extra))
            .collect();
        let fail = |e: String| UpToResult {
            pass: false,
            metric: None,
            error: Some(e),
        };
        if let Some(e) = rest.iter().find_map(|p| p.error.clone()) {
            return fail(e);
        }
        let c = self.criterion;
        let values: Option<Vec<f64>> = std::iter::once(&first)
            .chain(&rest)
            .map(|p| metric(c, p))
            .collect();
        let Some(values) = values else {
            return fail(format!("no {} metric in a run", c.name()));
        };
        let worst = if self.higher_is_better {
            values.iter().copied().fold(f64::INFINITY, f64::min)
        } else {
            let lowest = values[1..].iter().copied().fold(f64::INFINITY, f64::min);
            (values[0] - lowest).max(0.0)
        };
        debug_assert!(self.has_adc || c != Criterion::Accuracy);
        let pass = if self.higher_is_better {
            worst >= self.threshold
        } else {
            worst < self.threshold
        };
        UpToResult {
            pass,
            metric: Some(worst),
            error: None,
        }
    }
}

mod output;
mod search;

pub use output::{folder_producer, table, write_limit};
use search::Search;

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::{AdcInput, StageKind};

    fn text(s: &str) -> ScenarioText {
        ScenarioText::new(s.to_string(), "test".into(), ".".into()).unwrap()
    }

    const CHAIN: &str = r#"
name = "t"
description = ""
[simulation]
analog_rate = "1 MHz"
duration = "20 ms"
settle = "2 ms"
[source]
waveform = "sine"
frequency = "100 Hz"
amplitude = "1 V"
offset = "2.5 V"
[[stage]]
kind = "filter"
order = 2
cutoff = "20 kHz"
[[stage]]
kind = "sample_hold"
aperture_jitter = "1 ns"
[[stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
clock = "1 MHz"
sample_rate = "50 kHz"
input = "live"
comparator_noise = "1 mV"
[[stage]]
kind = "link"
bit_error_rate = 1e-6
[[stage]]
kind = "dac"
ladder = "r2r"
tolerance = "1%"
slew_rate = "1 V/us"
bandwidth = "1 MHz"
range = ["0 V", "5 V"]
[[stage]]
kind = "amplifier"
gain = 2
slew_rate = "10 V/us"
"#;

    #[test]
    fn every_non_ideality_present_has_an_ablation_that_checks() {
        let t = text(CHAIN);
        let sc = t.scenario().unwrap();
        let c = candidates(&sc);
        let names: Vec<&str> = c.iter().map(|c| c.mechanism.as_str()).collect();
        assert_eq!(
            names,
            vec![
                "filter",
                "sample_hold.aperture_jitter",
                "sar_adc.input",
                "sar_adc.comparator_noise",
                "sar_adc.sample_rate",
                "link.bit_error_rate",
                "dac.slew_rate",
                "dac.settling",
                "dac.tolerance",
                "amplifier.slew_rate",
            ]
        );
        for cand in &c {
            let s = t
                .with_edits(&cand.edits)
                .unwrap_or_else(|e| panic!("{}: {e}", cand.change));
            match cand.mechanism.as_str() {
                "filter" => assert_eq!(s.stages.len(), sc.stages.len() - 1),
                "sar_adc.sample_rate" => match &s.stages[2].kind {
                    StageKind::SarAdc(a) => {
                        assert!((a.effective_sample_rate_hz() - 500e3).abs() < 1e-6);
                        assert!(a.conversion_time_s <= 2e-6 + 1e-15);
                    }
                    k => panic!("{k:?}"),
                },
                "sar_adc.input" => match &s.stages[2].kind {
                    StageKind::SarAdc(a) => assert_eq!(a.input, AdcInput::Held),
                    k => panic!("{k:?}"),
                },
                "dac.settling" => match &s.stages[4].kind {
                    StageKind::Dac(d) => assert_eq!(d.output.tau_s, None),
                    k => panic!("{k:?}"),
                },
                _ => assert_ne!(s, sc, "{}", cand.change),
            }
        }
    }

    #[test]
    fn runs_are_lengthened_for_low_frequencies_and_bounded() {
        let t = text(CHAIN);
        let sc = t.scenario().unwrap();
        let r = Runner {
            text: &t,
            base: &sc,
            source_edits: &[],
            max_grid_steps: 1e6,
            use_output_enob: true,
        };
        // 10 kHz: the scenario's own 18 ms window already holds 180 cycles.
        let (d, s, cyc) = r.timing(10e3, 20.0);
        assert!((d - 0.020).abs() < 1e-12 && (s - 0.002).abs() < 1e-12 && cyc > 179.0);
        // 100 Hz: 20 cycles need 200 ms of window after 20 ms of settling.
        let (d, s, cyc) = r.timing(100.0, 20.0);
        assert!((s - 0.02).abs() < 1e-12 && (d - 0.22).abs() < 1e-12 && (cyc - 20.0).abs() < 1e-9);
        // 1 Hz: bounded by 1e6 steps = 1 s.
        let (d, _, cyc) = r.timing(1.0, 20.0);
        assert!((d - 1.0).abs() < 1e-12 && cyc < 20.0);
    }

    #[test]
    fn a_source_that_is_not_a_sine_is_bad_input() {
        let t = text(&CHAIN.replace("waveform = \"sine\"", "waveform = \"triangle\""));
        let e = find_limits(&t, &LimitOptions::default()).unwrap_err();
        assert!(e.is_bad_input(), "{e}");
    }
}
