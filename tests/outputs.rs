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
    let wrote: BTreeSet<String> = ["report.json", "waveforms.csv"]
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
