//! Integration tests of the output folders (what a run leaves behind, which study a folder holds) and of what
//! the reports say, driving the built binary.

mod common;

use std::collections::BTreeSet;
use std::fs;
use std::path::Path;

use common::{json, ok, run_in, stderr, stdout};

/// A short 8-bit chain on a 1 MHz grid (a few ms of simulation): fast enough to run many times.
const SMALL_CHAIN: &str = r#"
name = "small-chain"
description = "short chain for output-folder tests"
[simulation]
analog_rate = "1 MHz"
duration = "12 ms"
settle = "2 ms"
seed = 4
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[[stage]]
kind = "filter"
order = 2
cutoff = "10 kHz"
[analysis]
band = "10 kHz"
"#;

/// The names in a folder.
fn names(dir: &Path) -> BTreeSet<String> {
    fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .collect()
}

fn setup() -> tempfile::TempDir {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("c.toml"), SMALL_CHAIN).unwrap();
    d
}

#[test]
fn a_second_run_with_fewer_outputs_leaves_no_stale_file_and_keeps_the_users_own() {
    let d = setup();
    ok(&run_in(
        d.path(),
        &["run", "c.toml", "--out", "r", "--quiet"],
    ));
    let dir = d.path().join("r");
    let full = names(&dir);
    for f in [
        "report.html",
        "report.md",
        "output.wav",
        "error.wav",
        "report.json",
    ] {
        assert!(full.contains(f), "{f} missing from the first run: {full:?}");
    }
    assert!(full.iter().any(|n| n.ends_with(".png")), "{full:?}");
    // A file of the user's own in the folder, and one the manifest does not list.
    fs::write(dir.join("notes.txt"), "mine").unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            "c.toml",
            "--out",
            "r",
            "--quiet",
            "--no-plots",
            "--no-wav",
        ],
    ));
    let after = names(&dir);
    let expected: BTreeSet<String> = [
        ".convchain-output",
        "notes.txt",
        "report.json",
        "waveforms.csv",
        "waveforms.npy",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    assert_eq!(after, expected);
    assert_eq!(fs::read_to_string(dir.join("notes.txt")).unwrap(), "mine");
    // The manifest lists exactly what convchain wrote, with the command that wrote it.
    let m = json(&dir.join(".convchain-output"));
    assert_eq!(m["format"], "convchain-output/2");
    let listed: BTreeSet<String> = m["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| {
            assert_eq!(f["by"], "run");
            f["name"].as_str().unwrap().to_string()
        })
        .collect();
    let wrote: BTreeSet<String> = ["report.json", "waveforms.csv", "waveforms.npy"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    assert_eq!(listed, wrote);
}

#[test]
fn static_tests_beside_a_run_keep_the_runs_files() {
    let d = setup();
    ok(&run_in(
        d.path(),
        &["run", "c.toml", "--out", "r", "--quiet", "--no-wav"],
    ));
    ok(&run_in(
        d.path(),
        &["static", "c.toml", "--out", "r", "--quiet"],
    ));
    let n = names(&d.path().join("r"));
    assert!(
        n.contains("report.json") && n.contains("report.html"),
        "{n:?}"
    );
    assert!(n.contains("static.json"), "{n:?}");
    // And a run again keeps the static files.
    ok(&run_in(
        d.path(),
        &[
            "run",
            "c.toml",
            "--out",
            "r",
            "--quiet",
            "--no-wav",
            "--no-plots",
        ],
    ));
    let n = names(&d.path().join("r"));
    assert!(
        n.contains("static.json") && !n.contains("report.html"),
        "{n:?}"
    );
}

fn sweep(dir: &Path, vary: &str, extra: &[&str]) -> std::process::Output {
    let mut args = vec![
        "sweep", "c.toml", "--vary", vary, "--points", "2", "--quiet", "--out", "s",
    ];
    args.extend(extra);
    run_in(dir, &args)
}

#[test]
fn a_second_sweep_with_another_vary_exits_2_without_force_and_replaces_with_it() {
    let d = setup();
    ok(&sweep(d.path(), "source.frequency=1 kHz..2 kHz", &[]));
    let dir = d.path().join("s");
    let rows = fs::read(dir.join("rows.json")).unwrap();
    fs::write(dir.join("notes.txt"), "mine").unwrap();
    // The same sweep again is the same study: accepted.
    ok(&sweep(d.path(), "source.frequency=1 kHz..2 kHz", &[]));
    // Another --vary: refused, the folder untouched, the message says what is there and how to proceed.
    let o = sweep(d.path(), "stage.1.bits=6..8", &[]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(
        e.contains("holds a sweep study of \"small-chain\" varying source.frequency (2 points)"),
        "{e}"
    );
    assert!(e.contains("--force") && e.contains("--out"), "{e}");
    assert_eq!(fs::read(dir.join("rows.json")).unwrap(), rows);
    // A run into the sweep's folder is refused too.
    let o = run_in(d.path(), &["run", "c.toml", "--out", "s", "--quiet"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(!dir.join("report.json").exists());
    // With --force the new sweep replaces the old one; the user's file survives.
    ok(&sweep(d.path(), "stage.1.bits=6..8", &["--force"]));
    let j = json(&dir.join("sweep.json"));
    assert_eq!(j["vary"][0]["key"], "stage.1.bits", "{j}");
    assert_eq!(fs::read_to_string(dir.join("notes.txt")).unwrap(), "mine");
    let m = json(&dir.join(".convchain-output"));
    assert!(
        m["study"]["describe"]
            .as_str()
            .unwrap()
            .contains("varying stage.1.bits"),
        "{m}"
    );
}

#[test]
fn a_shard_is_another_study_and_its_default_folder_sits_beside_the_whole_ones() {
    let d = setup();
    let vary = "source.frequency=1 kHz..2 kHz";
    ok(&run_in(
        d.path(),
        &[
            "sweep", "c.toml", "--vary", vary, "--points", "2", "--quiet",
        ],
    ));
    ok(&run_in(
        d.path(),
        &[
            "sweep", "c.toml", "--vary", vary, "--points", "2", "--quiet", "--shard", "1/2",
        ],
    ));
    let whole = d.path().join("out/small-chain-sweep");
    assert!(
        names(&whole).iter().all(|n| !n.starts_with("shard")),
        "{:?}",
        names(&whole)
    );
    assert!(
        d.path()
            .join("out/small-chain-sweep-shard-1-of-2/rows.json")
            .exists()
    );
    // A shard written into the whole sweep's folder is refused.
    let o = run_in(
        d.path(),
        &[
            "sweep",
            "c.toml",
            "--vary",
            vary,
            "--points",
            "2",
            "--quiet",
            "--shard",
            "2/2",
            "--out",
            "out/small-chain-sweep",
        ],
    );
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("shard 2/2"), "{}", stderr(&o));
    // Merging the shards into the whole sweep's folder: the same study, accepted.
    ok(&run_in(
        d.path(),
        &[
            "sweep", "c.toml", "--vary", vary, "--points", "2", "--quiet", "--shard", "2/2",
        ],
    ));
    let o = run_in(
        d.path(),
        &[
            "merge",
            "out/small-chain-sweep-shard-1-of-2",
            "out/small-chain-sweep-shard-2-of-2",
            "--out",
            "out/small-chain-sweep",
        ],
    );
    ok(&o);
    assert!(stdout(&o).contains("2 points"), "{}", stdout(&o));
}

/// [`SMALL_CHAIN`] overdriven (2.7 V amplitude around 2.5 V into a 0..5 V converter) and sampled coherently (so
/// the 1 kHz source moves), its converter named at length and converting in "10 us" (10 x 1e-6 is
/// 9.999999999999999e-06 in doubles).
const CLIP_CHAIN: &str = r#"
name = "clip-chain"
[simulation]
analog_rate = "1 MHz"
duration = "12 ms"
settle = "2 ms"
seed = 4
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2.7 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
name = "successive-approximation-converter-with-a-name-longer-than-the-column"
bits = 8
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "10 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[[stage]]
kind = "filter"
order = 2
cutoff = "10 kHz"
[analysis]
band = "10 kHz"
coherent = true
"#;

fn clip_run(extra: &[&str]) -> (tempfile::TempDir, std::process::Output) {
    let d = tempfile::tempdir().unwrap();
    fs::write(d.path().join("clip.toml"), CLIP_CHAIN).unwrap();
    let mut args = vec!["run", "clip.toml", "--out", "c"];
    args.extend(extra);
    let o = run_in(d.path(), &args);
    (d, o)
}

#[test]
fn the_reports_say_the_clipped_codes_and_the_moved_source_as_the_terminal_does() {
    let (d, o) = clip_run(&["--no-wav"]);
    ok(&o);
    let dir = d.path().join("c");
    let r = json(&dir.join("report.json"));
    let clipped = r["adc"]["codes_clipped"].as_u64().unwrap();
    assert!(
        clipped > 0,
        "a 2.7 V amplitude around 2.5 V overdrives 0..5 V"
    );
    // The source moves for coherent sampling unless 1 kHz happens to fit the record exactly; when it moves,
    // every report says so.
    let moved = r["run"]["frequency_hz"].as_f64() != Some(1000.0);
    let terminal = stdout(&o);
    let md = fs::read_to_string(dir.join("report.md")).unwrap();
    let html = fs::read_to_string(dir.join("report.html")).unwrap();
    for (what, text) in [
        ("terminal", &terminal),
        ("report.md", &md),
        ("report.html", &html),
    ] {
        assert!(
            text.contains(&format!(
                "{clipped} codes clipped: the input overdrives the ADC's range"
            )),
            "{what}: {text}"
        );
        assert_eq!(
            text.contains("(asked 1 kHz, ")
                && text.contains("whole cycles in the record, for coherent sampling"),
            moved,
            "{what}: {text}"
        );
    }
}

#[test]
fn report_json_echoes_the_configuration_without_arithmetic_noise() {
    let (d, o) = clip_run(&["--no-wav", "--no-plots", "--quiet"]);
    ok(&o);
    let r = json(&d.path().join("c/report.json"));
    // "10 us" as written, not 10 x 1e-6 = 9.999999999999999e-06.
    let sar = r["chain"]["stages"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["kind"] == "sar_adc")
        .unwrap_or_else(|| panic!("{}", r["chain"]));
    assert_eq!(sar["conversion_time_s"].as_f64(), Some(1e-5), "{sar}");
    assert_eq!(r["adc"]["conversion_time_s"].as_f64(), Some(1e-5));
    assert_eq!(r["latency"]["budget"][0]["seconds"].as_f64(), Some(1e-5));
}

#[test]
fn a_long_stage_name_does_not_break_the_latency_columns() {
    let (_d, o) = clip_run(&["--no-wav", "--no-plots"]);
    ok(&o);
    let t = stdout(&o);
    let lines: Vec<&str> = t
        .lines()
        .skip_while(|l| !l.contains("latency budget"))
        .skip(1)
        .take_while(|l| l.starts_with("    "))
        .map(|l| l.trim_end_matches("  <- large: check the model"))
        .collect();
    assert!(lines.len() >= 5, "{t}");
    assert!(
        lines[0].contains("successive-approximation-converter-with"),
        "{t}"
    );
    let widths: BTreeSet<usize> = lines.iter().map(|l| l.chars().count()).collect();
    assert_eq!(widths.len(), 1, "values end in one column:\n{t}");
}

#[test]
fn a_lowered_listen_gain_is_said_on_the_terminal() {
    let (_d, o) = clip_run(&["--no-plots", "--listen-gain", "10000"]);
    ok(&o);
    let e = stderr(&o);
    assert!(e.contains("--listen-gain 10000 lowered to "), "{e}");
    // Not said when the gain was kept.
    let (_d, o) = clip_run(&["--no-plots", "--listen-gain", "1"]);
    ok(&o);
    assert!(!stderr(&o).contains("lowered"), "{}", stderr(&o));
}

#[test]
fn an_os_error_is_printed_once() {
    let d = setup();
    fs::write(d.path().join("afile"), "").unwrap();
    let o = run_in(
        d.path(),
        &["run", "c.toml", "--out", "afile/sub", "--quiet"],
    );
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    let e = stderr(&o);
    assert_eq!(e.matches("(os error").count(), 1, "{e}");
    assert!(e.contains("afile/sub"), "{e}");
}

#[test]
fn init_names_the_scenario_after_its_file() {
    let d = tempfile::tempdir().unwrap();
    ok(&run_in(d.path(), &["init", "my-chain.toml"]));
    let text = fs::read_to_string(d.path().join("my-chain.toml")).unwrap();
    assert!(text.contains("name = \"my-chain\""), "{text}");
    ok(&run_in(d.path(), &["check", "my-chain.toml"]));
}

#[test]
fn every_file_of_a_run_is_the_same_bytes_at_any_thread_count() {
    // The plots (PNG and SVG side by side) and the listening files are made alongside each other on the
    // thread pool and a thread of their own: one, two and three pool threads must write the same bytes.
    let d = tempfile::tempdir().unwrap();
    let sc = common::repo("scenarios/four-bit-listen.toml");
    let folder = |threads: &str| {
        let out = d.path().join(format!("t{threads}"));
        let o = common::bin()
            .env("RAYON_NUM_THREADS", threads)
            .args([
                "run",
                sc.to_str().unwrap(),
                "--out",
                out.to_str().unwrap(),
                "-q",
            ])
            .output()
            .unwrap();
        ok(&o);
        let mut files: Vec<(String, Vec<u8>)> = fs::read_dir(&out)
            .unwrap()
            .map(|e| {
                let p = e.unwrap().path();
                let name = p.file_name().unwrap().to_string_lossy().to_string();
                (name, fs::read(&p).unwrap())
            })
            .collect();
        files.sort();
        files
    };
    let one = folder("1");
    assert!(
        one.iter().any(|(n, _)| n == "waveform.png"),
        "plots written"
    );
    assert!(
        one.iter().any(|(n, _)| n == "output.wav"),
        "WAV files written"
    );
    for threads in ["2", "3"] {
        let other = folder(threads);
        assert_eq!(
            one.iter().map(|f| &f.0).collect::<Vec<_>>(),
            other.iter().map(|f| &f.0).collect::<Vec<_>>()
        );
        for ((name, a), (_, b)) in one.iter().zip(&other) {
            assert!(a == b, "{name} differs at {threads} threads");
        }
    }
}
