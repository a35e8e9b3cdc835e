//! `convchain montecarlo` and `convchain merge`: arguments and printing (Ctrl-C is in `interrupt`).

use std::fmt::Write as _;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Instant;

use clap::Args;

use convchain::Error;
use convchain::report::plot::format_si;
use convchain::scenario::overrides::ScenarioText;
use convchain::study::montecarlo::{self, McOptions, Requirement, Stats, Summary};
use convchain::study::shard::{self, Shard};
use convchain::study::sweep;

use super::interrupt::{self, CANCEL, INTERRUPTED_EXIT, Interrupted};

#[derive(Args, Debug)]
pub struct McArgs {
    /// Scenario file (TOML); its [spread] table says which values vary. Without it, the embedded demo.
    scenario: Option<PathBuf>,
    /// Study only this path of a scenario with [[path]] tables (default: the first); stage.N keys then
    /// address its stages.
    #[arg(long, value_name = "NAME")]
    path: Option<String>,
    /// Number of runs in the whole study.
    #[arg(long)]
    runs: u64,
    /// Base seed (default: the scenario's simulation.seed); run i uses a seed derived from it and i.
    #[arg(long)]
    seed: Option<u64>,
    /// A requirement each run passes or fails, e.g. "output.enob_bits>=7.5" (repeatable); the yield is
    /// reported.
    #[arg(long = "require", value_name = "METRIC>=X")]
    requires: Vec<String>,
    /// Worker threads (default: one per core). Results do not depend on it.
    #[arg(long)]
    threads: Option<usize>,
    /// Run only the runs with index % N == K-1 (K from 1), to split a study over machines; join the
    /// folders with `convchain merge`. `auto` (or `auto/N`) takes K and N from a batch
    /// scheduler's array-job task variables (Slurm, Grid Engine, LSF, PBS, AWS Batch, Kubernetes indexed jobs).
    #[arg(long, value_name = "K/N")]
    shard: Option<String>,
    /// Only the static tests (DNL, INL, missing codes, monotonicity); no simulated run.
    #[arg(long, conflicts_with = "no_static")]
    static_only: bool,
    /// Skip the static tests (faster for converters of many bits).
    #[arg(long)]
    no_static: bool,
    /// Output folder (default out/<name>-montecarlo/, or out/<name>-montecarlo-shard-K-of-N/ for a shard).
    #[arg(long)]
    out: Option<PathBuf>,
    /// Write into a folder that holds another study (other options, another shard...), replacing the files
    /// convchain wrote there.
    #[arg(long)]
    force: bool,
    /// Print nothing but errors (no progress bar, no table).
    #[arg(long, short)]
    quiet: bool,
    /// Add the audio figures of every run (as `run --audio`: three more runs each), as metrics.
    #[arg(long)]
    audio: bool,
    /// Band of the audio figures, e.g. "20 Hz..20 kHz" (the default; implies --audio).
    #[arg(long, value_name = "LOW..HIGH")]
    audio_band: Option<String>,
}

#[derive(Args, Debug)]
pub struct MergeArgs {
    /// Folders written by `convchain montecarlo --shard K/N` or `convchain sweep --shard K/N`.
    #[arg(required = true)]
    dirs: Vec<PathBuf>,
    /// Folder for the merged study.
    #[arg(long)]
    out: PathBuf,
    /// Print nothing but errors.
    #[arg(long, short)]
    quiet: bool,
    /// Write into a folder that holds another study, replacing the files convchain wrote there.
    #[arg(long)]
    force: bool,
}

/// Power of ten of the last digit a row of the table must show so its percentiles show their spread: a tenth
/// of the spread from 5 % to 95 % (of the whole range when those two are equal), or None when every value is
/// the same.
fn resolution_exponent(m: &Stats) -> Option<i32> {
    let spread = match (m.p5, m.p95, m.min, m.max) {
        (Some(a), Some(b), _, _) if b > a => b - a,
        (_, _, Some(a), Some(b)) if b > a => b - a,
        _ => return None,
    };
    Some((spread / 10.0).log10().floor() as i32)
}

/// A value of the table's row `m`: seconds with an SI prefix and at least 4 significant digits, other values
/// with at least 4 decimals; more when the spread of the row needs them (at most 12 digits).
fn fmt_value(m: &Stats, v: Option<f64>) -> String {
    let res = resolution_exponent(m);
    match v {
        None => "-".into(),
        Some(x) if m.name.ends_with("_s") => {
            let top = [m.p5, m.median, m.p95]
                .iter()
                .flatten()
                .fold(0.0f64, |a, b| a.max(b.abs()));
            let need = match res {
                Some(r) if top > 0.0 => top.log10().floor() as i32 + 1 - r,
                _ => 0,
            };
            format_si(x, "s", need.clamp(4, 12) as usize)
        }
        Some(x) => {
            let need = res.map_or(0, |r| -r);
            format!("{x:.*}", need.clamp(4, 12) as usize)
        }
    }
}

/// The table printed after a study.
pub fn table(s: &Summary, dir: &Path) -> String {
    let mut t = String::new();
    let name = s
        .study
        .get("scenario")
        .and_then(|v| v.as_str())
        .unwrap_or("");
    let seed = s.study.get("seed").and_then(|v| v.as_u64()).unwrap_or(0);
    let _ = writeln!(
        t,
        "{name}: {} runs (shard {}, base seed {seed}), {} failed",
        s.runs_done, s.shard, s.runs_failed
    );
    // Pass/fail metrics (monotonic, missing codes) are summarised as fractions below.
    let pass_fail = |n: &str| n.ends_with(".monotonic") || n.ends_with(".missing_codes");
    let rows: Vec<(&str, [String; 3])> = s
        .metrics
        .iter()
        .chain(&s.drawn)
        .filter(|m| m.runs > 0 && !pass_fail(&m.name))
        .map(|m| {
            (
                m.name.as_str(),
                [m.p5, m.median, m.p95].map(|v| fmt_value(m, v)),
            )
        })
        .collect();
    // Columns as wide as their longest entry (at least 26 and 14), so long names never break them.
    let w = rows
        .iter()
        .map(|(n, _)| n.chars().count() + 1)
        .max()
        .unwrap_or(0)
        .max(26);
    let v = rows
        .iter()
        .flat_map(|(_, c)| c.iter().map(|x| x.chars().count() + 2))
        .max()
        .unwrap_or(0)
        .max(14);
    let _ = writeln!(
        t,
        "  {:<w$}{:>v$}{:>v$}{:>v$}",
        "metric", "5 %", "median", "95 %"
    );
    for (name, [a, b, c]) in &rows {
        let _ = writeln!(t, "  {name:<w$}{a:>v$}{b:>v$}{c:>v$}");
    }
    let f = &s.fractions;
    if let Some(x) = f.dac_monotonic {
        let _ = writeln!(t, "  DAC monotonic: {:.1} % of {}", 100.0 * x, f.dac_tested);
    }
    if let Some(x) = f.adc_without_missing_codes {
        let _ = writeln!(
            t,
            "  ADC without missing codes: {:.1} % of {}",
            100.0 * x,
            f.adc_tested
        );
    }
    for y in &s.yields {
        let _ = writeln!(
            t,
            "  yield {}: {} of {} ({:.1} %)",
            y.require,
            y.passed,
            y.runs,
            100.0 * y.fraction.unwrap_or(0.0)
        );
    }
    for fl in s.failures.iter().take(3) {
        let _ = writeln!(
            t,
            "  run {} (seed {}) failed: {}",
            fl.index, fl.seed, fl.error
        );
    }
    let _ = writeln!(t, "wrote {}", dir.display());
    t
}

pub fn run(a: McArgs) -> anyhow::Result<()> {
    let (text, sc, stem) = super::study_cli::study_scenario(
        ScenarioText::load_or_default(a.scenario.as_deref())?,
        a.path.as_deref(),
        a.quiet,
    )?;
    if !a.quiet {
        for w in &sc.warnings {
            eprintln!("warning: {w}");
        }
    }
    let requires = a
        .requires
        .iter()
        .map(|r| Requirement::parse(r))
        .collect::<Result<Vec<_>, _>>()?;
    let shard = match &a.shard {
        Some(s) => Shard::parse(s)?,
        None => Shard::WHOLE,
    };
    if a.threads == Some(0) {
        return Err(convchain::Error::BadInput("--threads 0: give at least 1".into()).into());
    }
    let opts = McOptions {
        runs: a.runs,
        seed: a.seed,
        requires,
        threads: a.threads,
        shard,
        dynamic: !a.static_only,
        static_tests: !a.no_static,
        progress: !a.quiet,
        force: a.force,
        audio_band_hz: match a.audio_band.as_deref() {
            Some(t) => Some(super::parse_audio_band(t)?),
            None => a.audio.then_some(convchain::engine::audio::DEFAULT_BAND_HZ),
        },
    };
    // A shard's folder sits beside the whole study's, never inside it.
    let dir = a.out.clone().unwrap_or_else(|| {
        Path::new("out").join(if shard == Shard::WHOLE {
            format!("{stem}-montecarlo")
        } else {
            format!("{stem}-montecarlo-shard-{}-of-{}", shard.k, shard.n)
        })
    });
    interrupt::install_handler("runs");
    let started = Instant::now();
    let summary = montecarlo::montecarlo_to_dir(&text, &opts, &dir, &CANCEL)?;
    let elapsed = started.elapsed().as_secs_f64();
    if !a.quiet {
        let mut o = std::io::stdout().lock();
        write!(o, "{}", table(&summary, &dir))?;
        writeln!(o, "{} runs in {elapsed:.1} s", summary.runs_done)?;
    }
    if let Some(note) = &summary.interrupted {
        return Err(Interrupted(format!(
            "{note}; wrote the finished rows to {} (exit code {INTERRUPTED_EXIT})",
            dir.display()
        ))
        .into());
    }
    if summary.runs_done > 0 && summary.runs_failed == summary.runs_done {
        let first = summary
            .failures
            .first()
            .map(|f| format!("; the first: {}", f.error))
            .unwrap_or_default();
        return Err(Error::Run(format!(
            "every run failed ({} of {}){first} (the rows are in {})",
            summary.runs_failed,
            summary.runs_done,
            dir.display()
        ))
        .into());
    }
    Ok(())
}

pub fn merge(a: MergeArgs) -> anyhow::Result<()> {
    let merged = shard::merge_dirs(&a.dirs, &a.out, convchain::study::STUDIES, a.force)?;
    if !a.quiet && merged.kind == montecarlo::KIND {
        let summary = montecarlo::summarize(&merged)?;
        write!(std::io::stdout().lock(), "{}", table(&summary, &a.out))?;
    }
    if !a.quiet && merged.kind == sweep::KIND {
        let result = sweep::SweepResult::from_rows(&merged)?;
        write!(
            std::io::stdout().lock(),
            "{}",
            super::study_cli::sweep_line(&result, &a.out)
        )?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stats(name: &str, p5: f64, median: f64, p95: f64) -> Stats {
        Stats {
            name: name.into(),
            runs: 100,
            p5: Some(p5),
            median: Some(median),
            p95: Some(p95),
            mean: Some(median),
            min: Some(p5),
            max: Some(p95),
        }
    }

    #[test]
    fn the_table_prints_enough_digits_to_show_the_spread() {
        // A latency spread of 30 us around 153.2 ms: at 4 significant digits all three read 153.2 ms.
        let m = stats("latency.measured_s", 0.153_19, 0.153_205, 0.153_22);
        let shown: Vec<String> = [m.p5, m.median, m.p95]
            .iter()
            .map(|v| fmt_value(&m, *v))
            .collect();
        assert_eq!(shown, ["153.190 ms", "153.205 ms", "153.220 ms"]);
        let m = stats("output.enob_bits", 7.912_341, 7.912_355, 7.912_372);
        let shown: Vec<String> = [m.p5, m.median, m.p95]
            .iter()
            .map(|v| fmt_value(&m, *v))
            .collect();
        assert_eq!(shown, ["7.912341", "7.912355", "7.912372"]);
        // A wide spread keeps the usual digits; no spread at all too.
        assert_eq!(
            fmt_value(&stats("output.enob_bits", 7.1, 7.5, 7.9), Some(7.5)),
            "7.5000"
        );
        assert_eq!(
            fmt_value(&stats("x_s", 1e-3, 1e-3, 1e-3), Some(1e-3)),
            "1.000 ms"
        );
    }

    #[test]
    fn a_long_drawn_name_does_not_break_the_table_columns() {
        let summary = Summary {
            study: serde_json::json!({"scenario": "x", "seed": 1}),
            shard: "1/1".into(),
            runs_done: 100,
            runs_failed: 0,
            interrupted: None,
            percentiles: String::new(),
            metrics: vec![stats("output.enob_bits", 7.1, 7.5, 7.9)],
            drawn: vec![stats(
                "stage.3.a_rather_long_stage_key_name.tolerance",
                -0.01,
                0.0,
                0.01,
            )],
            fractions: montecarlo::Fractions {
                dac_tested: 0,
                dac_monotonic: None,
                adc_tested: 0,
                adc_without_missing_codes: None,
            },
            yields: Vec::new(),
            failures: Vec::new(),
        };
        let t = table(&summary, Path::new("out"));
        let rows: Vec<&str> = t.lines().skip(1).take(3).collect();
        assert!(
            rows[0].contains("median") && rows[2].contains("a_rather_long"),
            "{t}"
        );
        // Every row ends in the same column and its values start after the longest name.
        let ends: std::collections::BTreeSet<usize> =
            rows.iter().map(|l| l.chars().count()).collect();
        assert_eq!(ends.len(), 1, "{t}");
        let name_end = rows[2].find("tolerance").unwrap() + "tolerance".len();
        assert!(
            rows[1][..name_end]
                .trim_start()
                .starts_with("output.enob_bits"),
            "{t}"
        );
    }
}
