//! Scenarios with several `[[path]]` tables fed by one source, and the latency tracked over a run, driven like
//! a user would: the scenarios are written here, run by the built binary, and report.json is read back.

mod common;

use std::path::Path;

use common::{json, ok, run, stderr};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

const HEAD: &str = r#"name = "two-paths"
[simulation]
analog_rate = "960 kHz"
duration = "DURATION"
settle = "20 ms"
seed = 3

[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
"#;

/// An analog path of microseconds (a 20 kHz amplifier) and a digital path (48 kHz SAR, a link of 100 ms,
/// a DAC and its reconstruction filter).
const PATHS: &str = r#"
[[path]]
name = "analog"
[[path.stage]]
kind = "amplifier"
gain = "0 dB"
bandwidth = "20 kHz"

[[path]]
name = "digital"
[[path.stage]]
kind = "sar_adc"
bits = 16
range = ["-2 V", "2 V"]
clock = "960 kHz"
sample_rate = "48 kHz"
[[path.stage]]
kind = "link"
delay = "100 ms"
[[path.stage]]
kind = "dac"
[[path.stage]]
kind = "filter"
family = "butterworth"
order = 4
cutoff = "20 kHz"

[analysis]
band = "15 kHz"
latency_blocks = 12
"#;

/// Write `text` as a scenario in `dir`, run it with `extra` options and return (success, report or stderr).
fn run_scenario(dir: &Path, text: &str, extra: &[&str]) -> std::process::Output {
    let path = dir.join("s.toml");
    std::fs::write(&path, text).unwrap();
    let out = dir.join("out");
    let mut args = vec!["run", s(&path), "--out", s(&out), "-q", "--no-wav"];
    args.extend_from_slice(extra);
    run(&args)
}

#[test]
fn the_delay_between_two_paths_equals_the_difference_of_their_measured_latencies() {
    // The delay between two paths fed by one source is what each adds to the source's time, so measured
    // directly (one output cross-correlated against the other) it must equal the difference of the two
    // measured latencies, within one output sample (by construction). The digital path's latency is its
    // budget (the link's 100 ms, the conversion, the DAC's half update period and the filter's delay) within
    // one output sample, as each stage states its own delay (common practice, no source).
    let d = tempfile::tempdir().unwrap();
    let text = HEAD.replace("DURATION", "400 ms") + PATHS;
    let o = run_scenario(d.path(), &text, &["--no-plots"]);
    ok(&o);
    let r = json(&d.path().join("out/report.json"));
    let paths = r["paths"].as_object().expect("paths object");
    let names: Vec<&String> = paths.keys().collect();
    assert_eq!(names, ["analog", "digital"], "in the scenario's order");
    let lat = |n: &str| paths[n]["latency"]["measured_s"].as_f64().unwrap();
    let budget = |n: &str| paths[n]["latency"]["budget_s"].as_f64().unwrap();
    let rate = |n: &str| paths[n]["output_analysis_rate_hz"].as_f64().unwrap();
    let sample_s = 1.0 / rate("analog").min(rate("digital"));
    assert!(
        lat("analog") > 0.0 && lat("analog") < 50e-6,
        "{}",
        lat("analog")
    );
    assert!(
        lat("digital") > 0.1 && lat("digital") < 0.101,
        "{}",
        lat("digital")
    );
    assert!(
        (lat("digital") - budget("digital")).abs() < 1.0 / rate("digital"),
        "{} vs budget {}",
        lat("digital"),
        budget("digital")
    );
    // The first path's figures are the report's headline ones.
    assert_eq!(r["latency"]["measured_s"].as_f64().unwrap(), lat("analog"));

    let delays = r["path_delays"].as_array().expect("path_delays");
    assert_eq!(delays.len(), 1);
    let p = &delays[0];
    assert_eq!(
        (p["from"].as_str(), p["to"].as_str()),
        (Some("analog"), Some("digital"))
    );
    let diff = p["latency_difference_s"].as_f64().unwrap();
    let xcorr = p["cross_correlated_s"].as_f64().unwrap();
    assert!((diff - (lat("digital") - lat("analog"))).abs() < 1e-15);
    assert!(
        (xcorr - diff).abs() < sample_s,
        "cross-correlated {xcorr} s against the latencies' difference {diff} s (one sample {sample_s} s)"
    );
    assert!((p["agreement_s"].as_f64().unwrap() - (xcorr - diff)).abs() < 1e-15);
    assert!(
        !r["scenario"]["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().contains("disagree"))
    );
}

#[test]
fn a_path_whose_latency_cannot_be_measured_is_caught_by_the_direct_measurement() {
    // The meters measure a latency up to half the output record; with a 180 ms run the digital path's record
    // (what is left after the link's 100 ms) is shorter than twice its delay, so its measured latency falls
    // short by whole periods. The direct cross-correlation of the two outputs does not, and the report says
    // that the two disagree (so the agreement above is a check that can fail).
    let d = tempfile::tempdir().unwrap();
    let text = HEAD.replace("DURATION", "180 ms") + PATHS;
    let o = run_scenario(d.path(), &text, &["--no-plots"]);
    ok(&o);
    let r = json(&d.path().join("out/report.json"));
    let p = &r["path_delays"][0];
    let diff = p["latency_difference_s"].as_f64().unwrap();
    let xcorr = p["cross_correlated_s"].as_f64().unwrap();
    let budget = p["budget_difference_s"].as_f64().unwrap();
    assert!((xcorr - budget).abs() < 1e-4, "{xcorr} vs budget {budget}");
    assert!((xcorr - diff).abs() > 1e-3, "{xcorr} vs {diff}");
    let warned = r["scenario"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|w| w.as_str().unwrap().contains("disagree"));
    assert!(warned, "{:?}", r["scenario"]["warnings"]);
}

#[test]
fn the_latency_over_time_of_a_fixed_chain_is_flat_within_a_hundredth_of_a_sample() {
    // A fixed chain (filter, ADC, link, DAC, filter: nothing drifts) delays every block alike, so the delay
    // tracked block by block must be flat; a hundredth of an output sample allows for the correlation's
    // refinement on a block of a sine with quantization noise (common practice, no source).
    let d = tempfile::tempdir().unwrap();
    let chain = PATHS
        .replace("[[path]]\nname = \"analog\"\n[[path.stage]]\nkind = \"amplifier\"\ngain = \"0 dB\"\nbandwidth = \"20 kHz\"\n\n[[path]]\nname = \"digital\"\n", "")
        .replace("[[path.stage]]", "[[stage]]");
    let text = HEAD.replace("DURATION", "400 ms") + &chain;
    assert!(!text.contains("[[path"), "{text}");
    let o = run_scenario(d.path(), &text, &[]);
    ok(&o);
    let r = json(&d.path().join("out/report.json"));
    let l = &r["latency"];
    let t = &l["over_time"];
    let blocks = t["blocks"].as_array().expect("blocks");
    assert_eq!(blocks.len(), 12);
    let sample_s = 1.0 / r["run"]["output_analysis_rate_hz"].as_f64().unwrap();
    let (min, max, fin) = (
        t["min_s"].as_f64().unwrap(),
        t["max_s"].as_f64().unwrap(),
        t["final_s"].as_f64().unwrap(),
    );
    assert!(
        max - min < 0.01 * sample_s,
        "spread {} s, sample {sample_s} s",
        max - min
    );
    assert!(min <= fin && fin <= max);
    let measured = l["measured_s"].as_f64().unwrap();
    assert!(
        (fin - measured).abs() < 0.01 * sample_s,
        "{fin} vs {measured}"
    );
    let times: Vec<f64> = blocks
        .iter()
        .map(|b| b["time_s"].as_f64().unwrap())
        .collect();
    assert!(times.windows(2).all(|w| w[1] > w[0]), "{times:?}");
    assert!(d.path().join("out/latency_over_time.png").is_file());
    // No paths: none of their keys.
    assert!(r.get("paths").is_none() && r.get("path_delays").is_none());
}

#[test]
fn a_paths_run_writes_its_tables_and_figures() {
    let d = tempfile::tempdir().unwrap();
    let text = HEAD.replace("DURATION", "400 ms") + PATHS;
    let path = d.path().join("s.toml");
    std::fs::write(&path, text).unwrap();
    let out = d.path().join("out");
    let o = run(&["run", s(&path), "--out", s(&out), "--no-wav"]);
    ok(&o);
    let table = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(table.contains("delay between paths"), "{table}");
    assert!(table.contains("analog -> digital"), "{table}");
    for f in [
        "path_budgets.png",
        "path_waveforms.svg",
        "path_latency_over_time.png",
    ] {
        assert!(out.join(f).is_file(), "{f}");
    }
    let md = std::fs::read_to_string(out.join("report.md")).unwrap();
    assert!(
        md.contains("## Paths") && md.contains("| analog -> digital |"),
        "{md}"
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("<h2>Paths</h2>"));
}

#[test]
fn path_mistakes_are_located_errors() {
    let d = tempfile::tempdir().unwrap();
    let head = HEAD.replace("DURATION", "400 ms");
    let cases: [(String, &str, &str); 4] = [
        (
            format!("{head}[[stage]]\nkind = \"amplifier\"\n{PATHS}"),
            "path",
            "not both",
        ),
        (
            format!(
                "{head}{}",
                PATHS.replace("name = \"digital\"", "name = \"analog\"")
            ),
            "path.2.name",
            "already named",
        ),
        (
            format!("{head}{}", PATHS.replace("name = \"digital\"\n", "")),
            "path.2",
            "name",
        ),
        (
            format!(
                "{head}{}",
                PATHS.replace("kind = \"dac\"", "kind = \"amplifier\"")
            ),
            "path.2.stage.3.kind",
            "between an ADC and its DAC",
        ),
    ];
    for (text, key, msg) in cases {
        let o = run_scenario(d.path(), &text, &["--no-plots"]);
        assert_eq!(o.status.code(), Some(2), "{key}: {}", stderr(&o));
        let e = stderr(&o);
        assert!(e.contains(key) && e.contains(msg), "{key} / {msg}: {e}");
        assert!(e.contains("s.toml:"), "located: {e}");
    }
}

#[test]
fn check_names_every_path_and_a_path_that_cannot_run() {
    let d = tempfile::tempdir().unwrap();
    let path = d.path().join("s.toml");
    std::fs::write(&path, HEAD.replace("DURATION", "400 ms") + PATHS).unwrap();
    let o = run(&["check", s(&path)]);
    ok(&o);
    let said = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(
        said.contains("2 paths: analog 1 stages, digital 4 stages"),
        "{said}"
    );
    // The link's 100 ms leave the second path no record in a 100 ms run: the error names that path.
    std::fs::write(&path, HEAD.replace("DURATION", "100 ms") + PATHS).unwrap();
    let o = run(&["check", s(&path)]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("path \"digital\""), "{}", stderr(&o));
}

#[test]
fn paths_run_in_parallel_give_the_same_report_every_time() {
    // The paths run side by side on the thread pool; each stage draws from its own seeded stream, so the
    // report must not depend on which path finishes first.
    let d = tempfile::tempdir().unwrap();
    let path = d.path().join("s.toml");
    std::fs::write(&path, HEAD.replace("DURATION", "400 ms") + PATHS).unwrap();
    let mut reports = Vec::new();
    for k in 0..2 {
        let out = d.path().join(format!("out{k}"));
        ok(&run(&[
            "run",
            s(&path),
            "--out",
            s(&out),
            "-q",
            "--no-wav",
            "--no-plots",
        ]));
        reports.push(std::fs::read(out.join("report.json")).unwrap());
    }
    assert!(reports[0] == reports[1], "the two runs' report.json differ");
}

/// A direct analog path and a digital path with a block buffer, on a 1 MHz grid: fast enough for studies.
const STUDY_PATHS: &str = r#"name = "study-paths"
[simulation]
analog_rate = "1 MHz"
duration = "20 ms"
settle = "2 ms"
seed = 4
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[path]]
name = "direct"
[[path.stage]]
kind = "filter"
order = 2
cutoff = "20 kHz"
[[path]]
name = "digital"
[[path.stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
[[path.stage]]
kind = "buffer"
block = 16
blocks = 2
[[path.stage]]
kind = "dac"
range = ["0 V", "5 V"]
[analysis]
band = "10 kHz"
"#;

/// The values of a column of sweep.csv, by name.
fn csv_column(csv: &str, name: &str) -> Vec<f64> {
    let mut lines = csv.lines();
    let head: Vec<&str> = lines.next().unwrap().split(',').collect();
    let c = head
        .iter()
        .position(|h| *h == name)
        .unwrap_or_else(|| panic!("no {name} in {head:?}"));
    lines
        .map(|l| l.split(',').nth(c).unwrap().parse().unwrap())
        .collect()
}

#[test]
fn studies_read_the_path_given_with_path_and_its_stage_keys() {
    let dir = tempfile::tempdir().unwrap();
    let sc = dir.path().join("study-paths.toml");
    std::fs::write(&sc, STUDY_PATHS).unwrap();
    // --path digital: stage.2 is that path's buffer. Each block of 16 samples at 50 kHz adds 320 us (a
    // buffer of B blocks of N samples adds B N / fs: common practice, no source), measured within one
    // output sample of the budget.
    let sw = dir.path().join("sw");
    let o = run(&[
        "sweep",
        s(&sc),
        "--path",
        "digital",
        "--vary",
        "stage.2.blocks=1..3",
        "--points",
        "3",
        "-q",
        "--out",
        s(&sw),
    ]);
    ok(&o);
    let csv = std::fs::read_to_string(dir.path().join("sw/sweep.csv")).unwrap();
    let measured = csv_column(&csv, "latency.measured_s");
    let budget = csv_column(&csv, "latency.budget_s");
    assert_eq!(measured.len(), 3);
    for (m, b) in measured.iter().zip(&budget) {
        assert!(
            (m - b).abs() < 1.0 / 50e3,
            "measured {m} against budget {b}"
        );
    }
    for w in budget.windows(2) {
        assert!((w[1] - w[0] - 16.0 / 50e3).abs() < 1e-12, "{budget:?}");
    }
    // The path's name is part of the study's: a default folder apart from other paths' studies.
    let o = common::run_in(dir.path(), &["limit", s(&sc), "--path", "digital", "-q"]);
    ok(&o);
    assert!(
        dir.path()
            .join("out/study-paths-digital-limit/limit.json")
            .is_file()
    );

    // Without --path: the first path, its stage keys, and a note saying so.
    let o = run(&[
        "sweep",
        s(&sc),
        "--vary",
        "stage.1.cutoff=10 kHz..30 kHz",
        "--points",
        "2",
        "--out",
        s(&dir.path().join("first")),
    ]);
    ok(&o);
    assert!(
        stderr(&o).contains("reads its first path, \"direct\""),
        "{}",
        stderr(&o)
    );
    let csv = std::fs::read_to_string(dir.path().join("first/sweep.csv")).unwrap();
    // A second-order Butterworth's group delay at low frequency is sqrt(2) / (2 pi fc) (common practice, no
    // source): 22.5 us at 10 kHz, 7.5 us at 30 kHz; the digital path would read over 600 us.
    let measured = csv_column(&csv, "latency.measured_s");
    let expect = [10e3, 30e3].map(|fc| 2f64.sqrt() / (2.0 * std::f64::consts::PI * fc));
    for (m, e) in measured.iter().zip(expect) {
        assert!((m / e - 1.0).abs() < 0.05, "measured {m} against {e}");
    }

    // A name no path has, and --path on a one-chain scenario: bad input, exit 2, saying what to give.
    let o = run(&["montecarlo", s(&sc), "--runs", "2", "--path", "nope"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("the paths are \"direct\", \"digital\""),
        "{}",
        stderr(&o)
    );
    let one = dir.path().join("one.toml");
    std::fs::write(
        &one,
        STUDY_PATHS.split("[[path]]").next().unwrap().to_string()
            + "[[stage]]\nkind = \"filter\"\norder = 2\ncutoff = \"20 kHz\"\n",
    )
    .unwrap();
    let o = run(&[
        "need",
        s(&one),
        "--path",
        "x",
        "--require",
        "output.snr_db>=10",
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("leave --path out"), "{}", stderr(&o));
}
