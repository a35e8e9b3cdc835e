//! Monte-Carlo studies, shards, merge and Ctrl-C, end to end.

mod common;

use std::path::PathBuf;
use std::sync::atomic::AtomicBool;
use std::time::Duration;

use common::{bin, interrupt_after, ok, read, run, stderr};

use convchain::scenario::overrides::ScenarioText;
use convchain::study::montecarlo::{McOptions, McPlan, Requirement, run_rows, write_rows};
use convchain::study::shard::{RowSet, Shard};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// An 8-bit converter pair whose DAC is a current-mode R-2R ladder of the given tolerance (uniform, the
/// default distribution).
fn r2r_scenario(tolerance: &str) -> String {
    format!(
        r#"name = "r2r-8"
[simulation]
analog_rate = "1 MHz"
duration = "10 ms"
seed = 5
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
offset = "1.25 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "2.5 V"]
clock = "1 MHz"
sample_rate = "50 kHz"
[[stage]]
kind = "dac"
ladder = "r2r"
tolerance = "{tolerance}"
"#
    )
}

/// A small whole chain (about 20 ms of simulation per run) with three spread values.
const SMALL: &str = r#"name = "small"
[simulation]
analog_rate = "400 kHz"
duration = "24 ms"
settle = "4 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
offset = "1.25 V"
[[stage]]
kind = "amplifier"
gain = 1
offset = 0
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "2.5 V"]
clock = "1 MHz"
sample_rate = "40 kHz"
comparator_noise = "1 mV"
[[stage]]
kind = "dac"
ladder = "r2r"
tolerance = "1%"
[[stage]]
kind = "filter"
family = "bessel"
order = 2
cutoff = "8 kHz"
[analysis]
band = "5 kHz"
[spread]
"stage.1.gain" = { uniform = "2%" }
"stage.1.offset" = "5 mV"
"stage.4.cutoff" = "5%"
"#;

fn text(s: &str) -> ScenarioText {
    ScenarioText::new(s.to_string(), "test.toml".into(), PathBuf::from(".")).unwrap()
}

fn col(set: &RowSet, name: &str) -> Vec<Option<f64>> {
    let c = set.columns.iter().position(|n| n == name).unwrap();
    set.rows.iter().map(|r| r[c].as_f64()).collect()
}

// ------------------------------------------------------------------------------------------------------
// Independent R-2R oracle: nodal analysis of the ladder's netlist, written here from the circuit, not from
// the library.
// ------------------------------------------------------------------------------------------------------

/// Solve `a x = b` by Gaussian elimination with partial pivoting (dense).
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let n = b.len();
    for c in 0..n {
        let p = (c..n)
            .max_by(|i, j| a[*i][c].abs().total_cmp(&a[*j][c].abs()))
            .unwrap();
        a.swap(c, p);
        b.swap(c, p);
        for r in c + 1..n {
            let f = a[r][c] / a[c][c];
            let pivot_row = a[c].clone();
            for (x, p) in a[r].iter_mut().zip(&pivot_row).skip(c) {
                *x -= f * p;
            }
            b[r] -= f * b[c];
        }
    }
    let mut x = vec![0.0; n];
    for r in (0..n).rev() {
        let s: f64 = (r + 1..n).map(|k| a[r][k] * x[k]).sum();
        x[r] = (b[r] - s) / a[r][r];
    }
    x
}

/// Bit currents (MSB first) of a current-mode R-2R ladder driven by 1 V at its MSB node: ladder node k has a
/// 2R leg (`shunt[k]`) to a switch that sits at 0 V either way (ground or the virtual-ground summing bus),
/// an R (`series[k]`) to node k+1, and the last node a 2R terminator (`term`) to ground. The netlist is
/// stamped into a conductance matrix over the unknown nodes 1..n-1 and solved densely.
fn r2r_bit_currents(shunt: &[f64], series: &[f64], term: f64) -> Vec<f64> {
    let n = shunt.len();
    // Elements: (node a, node b, resistance); node usize::MAX is ground (0 V); node 0 is held at 1 V.
    const GND: usize = usize::MAX;
    let mut elements = Vec::new();
    for k in 0..n {
        elements.push((k, GND, shunt[k]));
        if k + 1 < n {
            elements.push((k, k + 1, series[k]));
        }
    }
    elements.push((n - 1, GND, term));
    let m = n - 1;
    let mut g = vec![vec![0.0; m]; m];
    let mut rhs = vec![0.0; m];
    let v_known = |node: usize| {
        if node == 0 {
            Some(1.0)
        } else if node == GND {
            Some(0.0)
        } else {
            None
        }
    };
    for &(a, b, r) in &elements {
        let y = 1.0 / r;
        for (p, q) in [(a, b), (b, a)] {
            if v_known(p).is_some() {
                continue;
            }
            let row = p - 1;
            g[row][row] += y;
            match v_known(q) {
                Some(v) => rhs[row] += y * v,
                None => g[row][q - 1] -= y,
            }
        }
    }
    let x = solve(g, rhs);
    let v = |k: usize| if k == 0 { 1.0 } else { x[k - 1] };
    (0..n).map(|k| v(k) / shunt[k]).collect()
}

/// One drawn ladder's (max |DNL| in LSB, monotonic), DNL against the average step as IEEE Std 1658 defines
/// for a DAC (step between adjacent codes over the end-point LSB, minus 1).
fn oracle_draw(bits: usize, tol: f64, rng: &mut ChaCha8Rng) -> (f64, bool) {
    let mut f = || 1.0 + tol * (2.0 * rng.random::<f64>() - 1.0);
    let shunt: Vec<f64> = (0..bits).map(|_| 2.0 * f()).collect();
    let series: Vec<f64> = (0..bits - 1).map(|_| f()).collect();
    let term = 2.0 * f();
    let w = r2r_bit_currents(&shunt, &series, term);
    let m = 1usize << bits;
    let level = |c: usize| -> f64 {
        (0..bits)
            .filter(|k| c >> (bits - 1 - k) & 1 == 1)
            .map(|k| w[k])
            .sum()
    };
    let levels: Vec<f64> = (0..m).map(level).collect();
    let q = (levels[m - 1] - levels[0]) / (m - 1) as f64;
    let mut dnl_max: f64 = 0.0;
    let mut mono = true;
    for c in 1..m {
        let step = levels[c] - levels[c - 1];
        dnl_max = dnl_max.max((step / q - 1.0).abs());
        mono &= step >= 0.0;
    }
    (dnl_max, mono)
}

#[test]
fn oracle_ladder_without_errors_is_binary() {
    // An exact R-2R ladder halves the current at every node: bit k carries 2^-(k+1) of Vref/R (any
    // converter text, e.g. Horowitz and Hill, The Art of Electronics, the R-2R ladder section; from memory).
    let w = r2r_bit_currents(&[2.0; 8], &[1.0; 7], 2.0);
    for (k, wk) in w.iter().enumerate() {
        assert!((wk - 0.5f64.powi(k as i32 + 1)).abs() < 1e-12, "{k}: {wk}");
    }
}

fn sorted(mut v: Vec<f64>) -> Vec<f64> {
    v.sort_by(f64::total_cmp);
    v
}

/// Compare the library's Monte-Carlo of an 8-bit R-2R DAC with the oracle's distribution.
fn check_r2r(tolerance: &str, tol: f64) -> (f64, f64) {
    let n_lib = 400usize;
    let mut opts = McOptions::new(n_lib as u64);
    opts.dynamic = false;
    opts.threads = Some(2);
    let set = run_rows(
        &text(&r2r_scenario(tolerance)),
        &opts,
        &AtomicBool::new(false),
    )
    .unwrap();
    assert_eq!(set.rows.len(), n_lib);
    let lib_dnl = sorted(
        col(&set, "static.dac.dnl_max_lsb")
            .into_iter()
            .map(Option::unwrap)
            .collect(),
    );
    let lib_mono = col(&set, "static.dac.monotonic")
        .iter()
        .filter(|v| **v == Some(1.0))
        .count() as f64
        / n_lib as f64;

    let n_ref = 20_000usize;
    let mut rng = ChaCha8Rng::seed_from_u64(2024);
    let draws: Vec<(f64, bool)> = (0..n_ref).map(|_| oracle_draw(8, tol, &mut rng)).collect();
    let ref_dnl = sorted(draws.iter().map(|d| d.0).collect());
    let ref_mono = draws.iter().filter(|d| d.1).count() as f64 / n_ref as f64;

    // Monotonic fraction: two binomial proportions; normal approximation to the binomial, 4 standard
    // deviations of the difference (false alarm about 6e-5). p is kept off 0 and 1 by one draw of the
    // reference so an all-pass reference still allows a stray failure of probability ~1/n_ref.
    let p = ref_mono.clamp(1.0 / n_ref as f64, 1.0 - 1.0 / n_ref as f64);
    let sd = (p * (1.0 - p) * (1.0 / n_lib as f64 + 1.0 / n_ref as f64)).sqrt();
    assert!(
        (lib_mono - ref_mono).abs() <= 4.0 * sd,
        "{tolerance}: monotonic fraction {lib_mono} against the oracle's {ref_mono} (sd {sd})"
    );

    // Spread of max |DNL|: at the library's sample q-quantile x, the oracle's distribution function F(x)
    // must be near q. F(sample quantile) of n draws is Beta-distributed with sd ~ sqrt(q(1-q)/n) (order
    // statistics of a uniform sample; H. A. David and H. N. Nagaraja, "Order Statistics", 3rd ed., Wiley 2003,
    // ch. 10, asymptotics of central order statistics; from memory); 4 sd, plus the oracle's own 4 sd.
    for q in [0.1, 0.5, 0.9] {
        let x = lib_dnl[((n_lib - 1) as f64 * q).round() as usize];
        let f_ref = ref_dnl.partition_point(|v| *v <= x) as f64 / n_ref as f64;
        let tol_f = 4.0
            * (q * (1.0 - q)).sqrt()
            * (1.0 / (n_lib as f64).sqrt() + 1.0 / (n_ref as f64).sqrt());
        assert!(
            (f_ref - q).abs() <= tol_f,
            "{tolerance}: library's {q} quantile of max|DNL| {x} LSB sits at the oracle's {f_ref} (allowed {tol_f})"
        );
    }
    let median = |v: &[f64]| v[v.len() / 2];
    (median(&lib_dnl), lib_mono)
}

#[test]
fn r2r_ladder_monte_carlo_matches_a_nodal_oracle_at_1_and_0_1_percent() {
    let (dnl_1, mono_1) = check_r2r("1%", 0.01);
    let (dnl_01, mono_01) = check_r2r("0.1%", 0.001);
    // Small resistor errors move the bit weights linearly, so the DNL spread scales with the tolerance
    // (first-order perturbation; common practice, no source): a tenth of the tolerance, about a tenth of the
    // median max |DNL|.
    let ratio = dnl_1 / dnl_01;
    assert!(
        (7.0..13.0).contains(&ratio),
        "median max|DNL| {dnl_1} vs {dnl_01}"
    );
    // At 1 % some 8-bit ladders lose monotonicity at the mid-scale carry; at 0.1 % none do.
    assert!(mono_1 < 0.99, "{mono_1}");
    assert_eq!(mono_01, 1.0);
}

// ------------------------------------------------------------------------------------------------------
// CLI: threads, shards, merge, requirements, Ctrl-C
// ------------------------------------------------------------------------------------------------------

#[test]
fn results_do_not_depend_on_threads_and_merged_shards_equal_one_run() {
    let d = tempfile::tempdir().unwrap();
    let sc = d.path().join("small.toml");
    std::fs::write(&sc, SMALL).unwrap();
    let sc = sc.to_str().unwrap();
    let out = |n: &str| d.path().join(n);
    let s = |p: &PathBuf| p.to_str().unwrap().to_string();
    let base = [
        "montecarlo",
        sc,
        "--runs",
        "10",
        "--seed",
        "77",
        "--quiet",
        "--require",
        "output.enob_bits>=7",
    ];
    let with = |extra: &[&str]| -> Vec<String> {
        base.iter().chain(extra).map(|x| x.to_string()).collect()
    };
    let go = |args: Vec<String>| ok(&run(&args));
    go(with(&["--threads", "1", "--out", &s(&out("one"))]));
    go(with(&["--threads", "2", "--out", &s(&out("two"))]));
    for k in 1..=3 {
        go(with(&[
            "--threads",
            "2",
            "--shard",
            &format!("{k}/3"),
            "--out",
            &s(&out(&format!("s{k}"))),
        ]));
    }
    // Merge in a shuffled order.
    ok(&run(&[
        "merge",
        &s(&out("s2")),
        &s(&out("s3")),
        &s(&out("s1")),
        "--out",
        &s(&out("merged")),
        "--quiet",
    ]));
    for f in ["montecarlo.csv", "montecarlo.json", "rows.json"] {
        let one = read(&out("one"), f);
        assert_eq!(one, read(&out("two"), f), "{f}: 1 thread against 2 threads");
        assert_eq!(
            one,
            read(&out("merged"), f),
            "{f}: merged shards against one run"
        );
    }
    let csv = String::from_utf8(read(&out("one"), "montecarlo.csv")).unwrap();
    assert_eq!(csv.lines().count(), 11);
    assert!(
        csv.lines()
            .next()
            .unwrap()
            .starts_with("index,seed,stage.1.gain,stage.1.offset,stage.4.cutoff,")
    );
    assert!(out("merged").join("hist-output.enob_bits.svg").exists());
    // A shard holds only its own runs.
    let s2 = String::from_utf8(read(&out("s2"), "montecarlo.csv")).unwrap();
    let idx: Vec<&str> = s2
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap())
        .collect();
    assert_eq!(idx, ["1", "4", "7"]);

    // Missing shard, foreign shard: clear errors, exit 2.
    let o = run(&[
        "merge",
        &s(&out("s1")),
        &s(&out("s2")),
        "--out",
        &s(&out("bad1")),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("3 of 10 runs are in no folder (runs 2, 5, 8)"),
        "{e}"
    );
    assert!(!out("bad1").exists());
    go(vec![
        "montecarlo".into(),
        sc.into(),
        "--runs".into(),
        "10".into(),
        "--seed".into(),
        "78".into(),
        "--quiet".into(),
        "--require".into(),
        "output.enob_bits>=7".into(),
        "--shard".into(),
        "3/3".into(),
        "--out".into(),
        s(&out("other")),
    ]);
    let o = run(&[
        "merge",
        &s(&out("s1")),
        &s(&out("s2")),
        &s(&out("other")),
        "--out",
        &s(&out("bad2")),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("not shards of the same study") && e.contains("seed: 77 against 78"),
        "{e}"
    );
}

#[test]
fn yield_counts_the_runs_that_meet_each_requirement() {
    // A tiny study in which a quarter of the runs draw a negative filter cutoff (sigma 150 % of the
    // nominal: P(z < -1/1.5) = 0.25) and fail; failed runs count against every requirement.
    let sc = SMALL.replace(
        "\"stage.4.cutoff\" = \"5%\"",
        "\"stage.4.cutoff\" = \"150%\"",
    );
    let t = text(&sc);
    let mut opts = McOptions::new(12);
    opts.static_tests = false;
    let first = run_rows(&t, &opts, &AtomicBool::new(false)).unwrap();
    let enob = col(&first, "output.enob_bits");
    let failed = first
        .rows
        .iter()
        .filter(|r| r.last().unwrap().is_string())
        .count();
    assert!((1..12).contains(&failed), "{failed} failed runs");
    // Threshold exactly at one run's value: `>=` counts that run, `>` does not.
    let mut ok_values = sorted(enob.iter().flatten().copied().collect());
    let x = ok_values.remove(ok_values.len() / 2);
    opts.requires = vec![
        Requirement::parse(&format!("output.enob_bits>={x}")).unwrap(),
        Requirement::parse(&format!("output.enob_bits>{x}")).unwrap(),
        Requirement::parse("output.enob_bits<1000").unwrap(),
    ];
    let d = tempfile::tempdir().unwrap();
    let summary = convchain::study::montecarlo::montecarlo_to_dir(
        &t,
        &opts,
        &d.path().join("y"),
        &AtomicBool::new(false),
    )
    .unwrap();
    // Recount from montecarlo.csv, read here with the csv crate.
    let mut rdr = csv::Reader::from_path(d.path().join("y/montecarlo.csv")).unwrap();
    let headers = rdr.headers().unwrap().clone();
    let c = headers
        .iter()
        .position(|h| h == "output.enob_bits")
        .unwrap();
    let values: Vec<Option<f64>> = rdr.records().map(|r| r.unwrap()[c].parse().ok()).collect();
    assert_eq!(values.len(), 12);
    let count = |f: &dyn Fn(f64) -> bool| values.iter().flatten().filter(|v| f(**v)).count() as u64;
    let want = [
        count(&|v| v >= x),
        count(&|v| v > x),
        count(&|v| v < 1000.0),
    ];
    assert_eq!(want[0], want[1] + 1);
    assert_eq!(want[2], 12 - failed as u64);
    for (y, w) in summary.yields.iter().zip(want) {
        assert_eq!((y.passed, y.runs), (w, 12), "{}", y.require);
        assert_eq!(y.fraction, Some(w as f64 / 12.0));
    }
    assert_eq!(summary.runs_failed, failed as u64);
}

#[test]
fn bad_requirements_and_options_exit_2_without_writing() {
    let d = tempfile::tempdir().unwrap();
    let sc = d.path().join("small.toml");
    std::fs::write(&sc, SMALL).unwrap();
    let sc = sc.to_str().unwrap();
    let out = d.path().join("o");
    let outs = out.to_str().unwrap();
    for (args, needle) in [
        (
            vec!["--require", "output.enob>=7"],
            "did you mean `output.enob_bits`",
        ),
        (vec!["--require", "output.enob_bits=7"], "no comparison"),
        (vec!["--require", "output.enob_bits>=seven"], "not a number"),
        (vec!["--shard", "4/3"], "K must be between 1 and N"),
        (
            vec!["--static-only", "--require", "output.enob_bits>=7"],
            "--static-only skips",
        ),
    ] {
        let mut a = vec!["montecarlo", sc, "--runs", "3", "--out", outs];
        a.extend(&args);
        let o = run(&a);
        let e = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
        assert!(e.contains(needle), "{args:?}: {e}");
        assert!(!out.exists(), "{args:?} left a folder");
    }
    let o = run(&[
        "montecarlo",
        sc,
        "--runs",
        "3",
        "--out",
        outs,
        "--require",
        "x>=1",
    ]);
    let e = stderr(&o);
    assert!(e.contains("metrics: adc.enob_bits, adc.sinad_db"), "{e}");
}

#[test]
fn ctrl_c_keeps_the_finished_rows_and_says_so() {
    let d = tempfile::tempdir().unwrap();
    let sc = d.path().join("small.toml");
    std::fs::write(&sc, SMALL).unwrap();
    let out = d.path().join("o");
    // A run takes tens of milliseconds: after 1.5 s some are done and most are not.
    let (status, err) = interrupt_after(
        bin()
            .args([
                "montecarlo",
                sc.to_str().unwrap(),
                "--runs",
                "100000",
                "--threads",
                "1",
                "--no-static",
                "--quiet",
            ])
            .arg("--out")
            .arg(&out),
        Duration::from_millis(1500),
    );
    assert_eq!(status.code(), Some(130), "{err}");
    let json: serde_json::Value = serde_json::from_slice(&read(&out, "montecarlo.json")).unwrap();
    let note = json["interrupted"].as_str().unwrap().to_string();
    let m = json["runs_done"].as_u64().unwrap();
    assert!((1..100_000).contains(&m), "{m}");
    assert_eq!(note, format!("interrupted after {m} of 100000 runs"));
    assert!(err.contains(&note), "{err}");
    let csv = String::from_utf8(read(&out, "montecarlo.csv")).unwrap();
    assert_eq!(csv.lines().count() as u64, m + 1);
    // An interrupted folder does not merge as a whole study.
    let o = run(&[
        "merge",
        out.to_str().unwrap(),
        "--out",
        d.path().join("m").to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("interrupted after"));
}

#[test]
fn runs_computed_one_at_a_time_write_the_cli_files() {
    // The path the Python module takes: each run alone (here in a scrambled order, as a distributed executor
    // returns them), assembled and written by the library, against `convchain montecarlo` on one machine.
    let d = tempfile::tempdir().unwrap();
    let file = d.path().join("small.toml");
    std::fs::write(&file, SMALL).unwrap();
    let cli = d.path().join("cli");
    ok(&run(&[
        "montecarlo".as_ref(),
        file.as_os_str(),
        "--runs".as_ref(),
        "6".as_ref(),
        "--seed".as_ref(),
        "11".as_ref(),
        "--require".as_ref(),
        "output.enob_bits>=6".as_ref(),
        "--out".as_ref(),
        cli.as_os_str(),
        "--quiet".as_ref(),
    ]));
    let t = ScenarioText::load(&file).unwrap();
    let mut opts = McOptions::new(6);
    opts.seed = Some(11);
    opts.requires = vec![Requirement::parse("output.enob_bits>=6").unwrap()];
    let plan = McPlan::new(&t, &opts).unwrap();
    assert_eq!(plan.columns().first().map(String::as_str), Some("index"));
    let rows: Vec<_> = [5u64, 2, 0, 3, 1, 4]
        .iter()
        .map(|i| plan.run_one(*i))
        .collect();
    let set = plan.rows(Shard::WHOLE, rows.clone(), None).unwrap();
    let lib = d.path().join("lib");
    write_rows(&set, &lib, false).unwrap();
    for f in ["montecarlo.csv", "montecarlo.json", "rows.json"] {
        assert!(read(&cli, f) == read(&lib, f), "{f} differs");
    }

    // Wrong sets are refused with the run they concern.
    let msg = |rows: Vec<Vec<serde_json::Value>>, shard: Shard| {
        let e = plan.rows(shard, rows, None).unwrap_err();
        assert!(e.is_bad_input(), "{e}");
        e.to_string()
    };
    assert!(msg(rows[..5].to_vec(), Shard::WHOLE).contains("run 4 is missing"));
    let mut twice = rows.clone();
    twice.push(rows[1].clone());
    assert!(msg(twice, Shard::WHOLE).contains("run 2 is given twice"));
    let half = Shard::parse("1/2").unwrap();
    assert!(msg(rows.clone(), half).contains("run 5 is not a run of this shard"));
    let mut other_seed = opts.clone();
    other_seed.seed = Some(12);
    let other = McPlan::new(&t, &other_seed).unwrap();
    assert!(msg(vec![other.run_one(0)], half).contains("run 0 has seed"));
    let mut short = rows.clone();
    short[0].pop();
    assert!(msg(short, Shard::WHOLE).contains("cells"));
    // A shard's rows alone, complete, are accepted and marked as that shard.
    let evens: Vec<_> = rows
        .iter()
        .filter(|r| r[0].as_u64().unwrap() % 2 == 0)
        .cloned()
        .collect();
    assert_eq!(plan.rows(half, evens, None).unwrap().shard, half);
}
