//! Hardening: output folders shared by two processes or holding links, hostile WAV files, Ctrl-C for every
//! command that writes a folder, and the option checks. Each test builds its failing input itself and runs the
//! built binary like a user would.

mod common;

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Output, Stdio};
use std::time::{Duration, Instant};

use common::{bin, interrupt_after, ok, read, run, stderr};

/// A chain that runs in about a second: long enough for a second process to start while the first writes.
const SLOW_CHAIN: &str = r#"
name = "slow-chain"
[simulation]
analog_rate = "10 MHz"
duration = "200 ms"
settle = "5 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 12
range = ["0 V", "5 V"]
sample_rate = "100 kHz"
conversion_time = "8 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
"#;

/// A chain that runs in a few tens of milliseconds.
const QUICK_CHAIN: &str = r#"
name = "quick-chain"
[simulation]
analog_rate = "1 MHz"
duration = "12 ms"
settle = "2 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
"#;

fn scenario(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    fs::write(&p, text).unwrap();
    p
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Names in `dir`, sorted.
fn names(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .collect();
    v.sort();
    v
}

fn no_temporaries(dir: &Path) {
    for n in names(dir) {
        assert!(!n.ends_with(".tmp"), "{} left {n}", dir.display());
    }
}

fn no_panic(o: &Output) {
    let e = stderr(o);
    assert!(!e.contains("panicked"), "{e}");
    assert_ne!(o.status.code(), Some(101), "{e}");
}

/// Exit code 2 (bad input), no panic, and standard error containing every one of `parts`.
fn refused(o: &Output, parts: &[&str]) {
    no_panic(o);
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(2), "{e}");
    for p in parts {
        assert!(e.contains(p), "stderr lacks {p:?}: {e}");
    }
}

// ---------------------------------------------------------------------------------------------------------
// Item 1: two processes into one folder.

#[test]
fn a_second_run_into_a_busy_folder_is_refused_and_the_first_writes_what_a_lone_run_writes() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "slow.toml", SLOW_CHAIN);
    let lone = d.path().join("lone");
    ok(&run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--out",
        s(&lone),
    ]));

    let shared = d.path().join("shared");
    let mut first = bin()
        .args(["run", s(&sc), "--quiet", "--no-plots", "--out", s(&shared)])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Wait until the first run holds the folder (its waveform temporary exists).
    let t0 = Instant::now();
    while !shared.exists() || !names(&shared).iter().any(|n| n.ends_with(".tmp")) {
        assert!(
            t0.elapsed() < Duration::from_secs(60),
            "first run never started writing"
        );
        assert!(
            first.try_wait().unwrap().is_none(),
            "first run ended before the second started"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    let second = run(&["run", s(&sc), "--quiet", "--no-plots", "--out", s(&shared)]);
    refused(
        &second,
        &["another convchain process is writing into this folder"],
    );
    let first = first.wait_with_output().unwrap();
    ok(&first);
    assert_eq!(names(&shared), names(&lone));
    for f in names(&lone) {
        assert!(
            read(&shared, &f) == read(&lone, &f),
            "{f} differs from a lone run's"
        );
    }
    // The folder is still ours: the next run is accepted.
    ok(&run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--out",
        s(&shared),
    ]));
}

#[test]
fn an_interrupted_run_removes_only_its_own_temporaries() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "q.toml", QUICK_CHAIN);
    let out = d.path().join("o");
    ok(&run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--no-wav",
        "--out",
        s(&out),
    ]));
    let report = read(&out, "report.json");
    // A file named like a temporary of some other process is not ours to delete.
    fs::write(out.join(".report.json.tmp"), "someone else's").unwrap();
    let long = SLOW_CHAIN.replace("200 ms", "20 s");
    let sc = scenario(d.path(), "long.toml", &long);
    let (status, err) = interrupt_after(
        bin()
            .args(["run", s(&sc), "--quiet", "--full", "--out"])
            .arg(&out),
        Duration::from_millis(1500),
    );
    assert_eq!(status.code(), Some(130), "{err}");
    assert_eq!(
        fs::read_to_string(out.join(".report.json.tmp")).unwrap(),
        "someone else's"
    );
    assert!(out.join(".convchain-output").exists());
    assert!(
        read(&out, "report.json") == report,
        "the earlier run's report changed"
    );
    let tmps: Vec<_> = names(&out)
        .into_iter()
        .filter(|n| n.ends_with(".tmp"))
        .collect();
    assert_eq!(tmps, vec![".report.json.tmp".to_string()]);
}

// ---------------------------------------------------------------------------------------------------------
// Item 2: symbolic links in an output folder.

#[test]
fn a_link_planted_in_the_output_folder_is_refused_and_its_target_untouched() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "q.toml", QUICK_CHAIN);
    let out = d.path().join("o");
    ok(&run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--no-wav",
        "--out",
        s(&out),
    ]));
    let victim = d.path().join("victim.txt");
    fs::write(&victim, "keep me").unwrap();
    for planted in [
        ".report.json.tmp",
        "report.json",
        "waveforms.csv",
        "waveforms.npy",
    ] {
        let link = out.join(planted);
        let _ = fs::remove_file(&link);
        std::os::unix::fs::symlink(&victim, &link).unwrap();
        let before = names(d.path());
        let o = run(&[
            "run",
            s(&sc),
            "--quiet",
            "--no-plots",
            "--no-wav",
            "--out",
            s(&out),
        ]);
        refused(&o, &["symbolic link", planted]);
        assert_eq!(fs::read_to_string(&victim).unwrap(), "keep me", "{planted}");
        assert_eq!(
            names(d.path()),
            before,
            "a file appeared outside the folder"
        );
        assert!(
            fs::symlink_metadata(&link)
                .unwrap()
                .file_type()
                .is_symlink()
        );
        fs::remove_file(&link).unwrap();
    }
    ok(&run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--no-wav",
        "--out",
        s(&out),
    ]));
}

// ---------------------------------------------------------------------------------------------------------
// Item 3: hostile WAV files, in `check` as in `run`.

/// A mono WAV: RIFF header, a 16-byte fmt chunk (`tag` 1 = integer PCM, 3 = float), a data chunk declaring
/// `declared` bytes followed by `data`.
fn wav_bytes(tag: u16, bits: u16, rate: u32, declared: u32, data: &[u8]) -> Vec<u8> {
    let mut b = Vec::new();
    b.extend_from_slice(b"RIFF");
    b.extend_from_slice(&(36 + data.len() as u32).to_le_bytes());
    b.extend_from_slice(b"WAVEfmt ");
    b.extend_from_slice(&16u32.to_le_bytes());
    b.extend_from_slice(&tag.to_le_bytes());
    b.extend_from_slice(&1u16.to_le_bytes());
    b.extend_from_slice(&rate.to_le_bytes());
    b.extend_from_slice(&rate.wrapping_mul(u32::from(bits / 8)).to_le_bytes());
    b.extend_from_slice(&(bits / 8).to_le_bytes());
    b.extend_from_slice(&bits.to_le_bytes());
    b.extend_from_slice(b"data");
    b.extend_from_slice(&declared.to_le_bytes());
    b.extend_from_slice(data);
    b
}

fn float_samples(n: usize, bad_at: Option<(usize, f32)>) -> Vec<u8> {
    (0..n)
        .map(|i| match bad_at {
            Some((j, v)) if i == j => v,
            _ => 0.5 * (i as f32 * 0.1).sin(),
        })
        .flat_map(|x| x.to_le_bytes())
        .collect()
}

fn wav_scenario(dir: &Path, wav: &str) -> PathBuf {
    scenario(
        dir,
        "wav.toml",
        &format!(
            r#"name = "wav-source"
[simulation]
analog_rate = "1 MHz"
duration = "5 ms"
settle = "1 ms"
[source]
waveform = "wav"
file = "{wav}"
repeat = true
offset = "2.5 V"
full_scale = "2 V"
[[stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[analysis]
band = "20 kHz"
"#
        ),
    )
}

/// `check` and `run` both refuse the scenario with exit code 2, a location in the scenario and `why`.
fn both_refuse(dir: &Path, sc: &Path, why: &str) {
    let o = run(&["check", s(sc)]);
    refused(&o, &[&format!("{}:8:8", sc.display()), "source.file", why]);
    let out = dir.join("out");
    let o = run(&["run", s(sc), "--quiet", "--out", s(&out)]);
    refused(&o, &[&format!("{}:8:8", sc.display()), why]);
    assert!(!out.exists(), "a refused run made its folder");
}

#[test]
fn a_float_wav_holding_nan_or_infinity_is_refused_with_the_sample_index() {
    let d = tempfile::tempdir().unwrap();
    let sc = wav_scenario(d.path(), "bad.wav");
    let data = float_samples(4800, Some((1234, f32::NAN)));
    fs::write(
        d.path().join("bad.wav"),
        wav_bytes(3, 32, 48_000, 4 * 4800, &data),
    )
    .unwrap();
    both_refuse(d.path(), &sc, "sample 1234 (frame 1234, channel 0) is NaN");
    let data = float_samples(4800, Some((7, f32::NEG_INFINITY)));
    fs::write(
        d.path().join("bad.wav"),
        wav_bytes(3, 32, 48_000, 4 * 4800, &data),
    )
    .unwrap();
    both_refuse(d.path(), &sc, "sample 7 (frame 7, channel 0) is -inf");
}

#[test]
fn a_wav_with_a_zero_rate_or_an_oversized_or_empty_data_chunk_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let sc = wav_scenario(d.path(), "bad.wav");
    let data = float_samples(480, None);
    fs::write(
        d.path().join("bad.wav"),
        wav_bytes(3, 32, 0, 4 * 480, &data),
    )
    .unwrap();
    both_refuse(d.path(), &sc, "sample rate of 0 Hz");
    fs::write(
        d.path().join("bad.wav"),
        wav_bytes(3, 32, 48_000, 0xFFFF_FFF0, &data),
    )
    .unwrap();
    both_refuse(d.path(), &sc, "declares 4294967280 bytes");
    fs::write(d.path().join("bad.wav"), wav_bytes(1, 16, 48_000, 0, &[])).unwrap();
    both_refuse(d.path(), &sc, "no samples");
}

#[test]
fn a_fifo_given_as_the_wav_file_is_refused_without_blocking() {
    let d = tempfile::tempdir().unwrap();
    let sc = wav_scenario(d.path(), "pipe.wav");
    let st = std::process::Command::new("mkfifo")
        .arg(d.path().join("pipe.wav"))
        .status()
        .unwrap();
    assert!(st.success());
    // A blocked reader would never return: run `check` with a deadline.
    let mut child = bin()
        .args(["check", s(&sc)])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t0 = Instant::now();
    while child.try_wait().unwrap().is_none() {
        if t0.elapsed() > Duration::from_secs(20) {
            let _ = child.kill();
            panic!("check blocked on a FIFO");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let o = child.wait_with_output().unwrap();
    refused(&o, &["not a regular file"]);
}

// ---------------------------------------------------------------------------------------------------------
// Item 7: Ctrl-C stops run, static and limit cleanly.

fn interrupted_cleanly(args: &[&str], out: &Path, after: Duration) {
    let (status, err) = interrupt_after(bin().args(args).arg("--out").arg(out), after);
    assert_eq!(status.code(), Some(130), "{err}");
    assert!(err.contains("interrupt"), "{err}");
    assert!(!err.contains("panicked"), "{err}");
    if out.exists() {
        no_temporaries(out);
    }
}

#[test]
fn ctrl_c_stops_a_run_removes_its_temporaries_and_exits_130() {
    let d = tempfile::tempdir().unwrap();
    let long = SLOW_CHAIN.replace("200 ms", "20 s");
    let sc = scenario(d.path(), "long.toml", &long);
    let out = d.path().join("o");
    interrupted_cleanly(
        &["run", s(&sc), "--quiet", "--full"],
        &out,
        Duration::from_millis(1500),
    );
    // The run made the folder and finished nothing in it: it is gone.
    assert!(!out.exists(), "{:?}", names(&out));
}

#[test]
fn ctrl_c_stops_static_and_limit_with_exit_130() {
    let d = tempfile::tempdir().unwrap();
    let sc = common::repo("scenarios/studio-interface.toml");
    interrupted_cleanly(
        &["static", s(&sc), "--quiet"],
        &d.path().join("s"),
        Duration::from_millis(300),
    );
    interrupted_cleanly(
        &["limit", s(&sc), "--quiet", "--threads", "1"],
        &d.path().join("l"),
        Duration::from_millis(300),
    );
}

// ---------------------------------------------------------------------------------------------------------
// Item 6: options.

#[test]
fn sweep_options_with_three_dots_fractional_whole_numbers_or_a_repeated_key_are_refused() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "q.toml", QUICK_CHAIN);
    let out = d.path().join("o");
    let sweep = |vary: &[&str]| {
        let mut args = vec![
            "sweep",
            s(&sc),
            "--quiet",
            "--points",
            "2",
            "--out",
            s(&out),
        ];
        for v in vary {
            args.extend(["--vary", v]);
        }
        run(&args)
    };
    refused(
        &sweep(&["source.frequency=1 kHz...2 kHz"]),
        &["more than two dots"],
    );
    refused(
        &sweep(&["stage.1.bits=4.5..8.5"]),
        &["FROM = 4.5", "`bits` takes whole numbers"],
    );
    refused(
        &sweep(&[
            "source.frequency=1 kHz..2 kHz",
            "source.frequency=3 kHz..4 kHz",
        ]),
        &["source.frequency: this key is given twice"],
    );
    // Echoed input is cut to a sane length.
    let long = format!("source.frequency=1 kHz.{}", "x".repeat(20_000));
    let o = sweep(&[&long]);
    refused(&o, &["(20023 characters)"]);
    assert!(
        stderr(&o).len() < 600,
        "{} bytes of message",
        stderr(&o).len()
    );
    assert!(!out.exists());
}

#[test]
fn run_options_out_of_range_are_refused_one_option_per_message() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "q.toml", QUICK_CHAIN);
    let out = d.path().join("o");
    let run_with = |extra: &[&str]| {
        let mut args = vec!["run", s(&sc), "--quiet", "--out", s(&out)];
        args.extend(extra);
        run(&args)
    };
    // The run lasts 12 ms: a window at 1 s would draw nothing of it.
    refused(
        &run_with(&["--window", "1 s..2 s"]),
        &["--window", "must lie within the run, 0 s..0.012 s"],
    );
    refused(
        &run_with(&["--window", "1 ms...2 ms"]),
        &["more than two dots"],
    );
    let o = run_with(&["--wav-rate", "1000000000"]);
    refused(&o, &["--wav-rate 1000000000", "8000..=384000 Hz"]);
    assert!(!stderr(&o).contains("--listen-gain"), "{}", stderr(&o));
    let o = run_with(&["--listen-gain=-1"]);
    refused(&o, &["--listen-gain -1"]);
    assert!(!stderr(&o).contains("--wav-rate"), "{}", stderr(&o));
    assert!(!out.exists());
}

/// The quick chain with a filter whose cutoff is drawn with a huge spread: about half the draws are negative
/// and fail the scenario's checks.
fn spread_chain(sigma: &str) -> String {
    format!(
        "{QUICK_CHAIN}[[stage]]\nkind = \"filter\"\nfamily = \"bessel\"\norder = 2\ncutoff = \"8 kHz\"\n\
         [spread]\n\"stage.3.cutoff\" = \"{sigma}\"\n"
    )
}

#[test]
fn merge_refuses_rows_that_disagree_with_their_header_or_cells_of_the_wrong_type() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "mc.toml", &spread_chain("5%"));
    let a = d.path().join("a");
    ok(&run(&[
        "montecarlo",
        s(&sc),
        "--runs",
        "4",
        "--no-static",
        "--quiet",
        "--out",
        s(&a),
    ]));
    let rows_path = a.join("rows.json");
    let good: serde_json::Value = common::json(&rows_path);
    let out = d.path().join("merged");
    let try_merge = |v: &serde_json::Value| {
        fs::write(&rows_path, serde_json::to_vec_pretty(v).unwrap()).unwrap();
        run(&["merge", s(&a), "--quiet", "--out", s(&out)])
    };
    ok(&try_merge(&good));
    fs::remove_dir_all(&out).unwrap();
    // A metric cell holding a string.
    let mut v = good.clone();
    let col = v["columns"]
        .as_array()
        .unwrap()
        .iter()
        .position(|c| c == "output.enob_bits")
        .unwrap();
    v["rows"][1][col] = serde_json::json!("eleven");
    refused(
        &try_merge(&v),
        &[
            "row 1, column `output.enob_bits`",
            "is not a number or null",
        ],
    );
    // A complete (not interrupted) shard missing a row.
    let mut v = good.clone();
    v["rows"].as_array_mut().unwrap().remove(2);
    refused(&try_merge(&v), &["holds 3 rows for its 4"]);
    // A row whose index does not belong to the shard the header names.
    let mut v = good.clone();
    v["shard"] = serde_json::json!({"k": 1, "n": 2});
    refused(
        &try_merge(&v),
        &["index 1, which is not a run of shard 1/2"],
    );
    let mut v = good.clone();
    v["shard"] = serde_json::json!({"k": 0, "n": 2});
    refused(&try_merge(&v), &["not K/N with 1 <= K <= N"]);
    assert!(!out.exists());
}

#[test]
fn a_monte_carlo_study_whose_runs_all_failed_exits_1() {
    let d = tempfile::tempdir().unwrap();
    // sigma 150 % of the cutoff: a draw is negative (and fails) with probability P(z < -1/1.5) = 0.25.
    let sc = scenario(d.path(), "mc.toml", &spread_chain("150%"));
    let (mut all_failed, mut some_passed) = (0, 0);
    for seed in 1..=12 {
        let out = d.path().join(format!("s{seed}"));
        let o = run(&[
            "montecarlo",
            s(&sc),
            "--runs",
            "1",
            "--no-static",
            "--quiet",
            "--seed",
            &seed.to_string(),
            "--out",
            s(&out),
        ]);
        no_panic(&o);
        let j = common::json(&out.join("montecarlo.json"));
        if j["runs_failed"] == j["runs_done"] {
            all_failed += 1;
            assert_eq!(o.status.code(), Some(1), "seed {seed}: {}", stderr(&o));
            assert!(
                stderr(&o).contains("every run failed (1 of 1)"),
                "{}",
                stderr(&o)
            );
        } else {
            some_passed += 1;
            ok(&o);
        }
    }
    assert!(
        all_failed > 0 && some_passed > 0,
        "{all_failed} {some_passed}"
    );
}

// ---------------------------------------------------------------------------------------------------------
// Items 4 and 5: what `run` refuses (or takes minutes over), `check` refuses too, located.

/// `check` and `run` both exit 2 with the message located at `at` (file:line:column) and naming `key`.
fn check_and_run_refuse(dir: &Path, name: &str, text: &str, at: (usize, usize), parts: &[&str]) {
    let sc = scenario(dir, name, text);
    let loc = format!("{}:{}:{}", sc.display(), at.0, at.1);
    let mut want = vec![loc.as_str()];
    want.extend(parts);
    refused(&run(&["check", s(&sc)]), &want);
    let out = dir.join(format!("{name}-out"));
    refused(&run(&["run", s(&sc), "--quiet", "--out", s(&out)]), &want);
    assert!(!out.exists());
}

#[test]
fn a_band_below_the_tone_is_refused_by_check_and_run_at_the_band() {
    let d = tempfile::tempdir().unwrap();
    // Line 23 (the chain starts with an empty line), the value after `band = `.
    let text = format!("{QUICK_CHAIN}[analysis]\nband = \"100 Hz\"\n");
    check_and_run_refuse(
        d.path(),
        "band.toml",
        &text,
        (23, 8),
        &[
            "analysis.band",
            "does not contain the source's fundamental (1 kHz)",
        ],
    );
    // A tone at the band's edge (here the ADC's Nyquist frequency, 25 kHz).
    let text = format!(
        "{}[analysis]\nband = \"25 kHz\"\n",
        QUICK_CHAIN.replace("1 kHz", "25 kHz")
    );
    check_and_run_refuse(d.path(), "nyq.toml", &text, (23, 8), &["analysis.band"]);
}

#[test]
fn a_link_delay_that_eats_the_analysis_window_is_named() {
    let d = tempfile::tempdir().unwrap();
    // 10 ms of window at 50 kSPS hold 498 usable conversions; a 9.9 ms link delay and a one-sample frame leave 2 of them.
    let text = QUICK_CHAIN.replace(
        "[[stage]]\nkind = \"dac\"",
        "[[stage]]\nkind = \"link\"\ndelay = \"9.9 ms\"\n[[stage]]\nkind = \"dac\"",
    );
    check_and_run_refuse(
        d.path(),
        "link.toml",
        &text,
        (21, 9),
        &["stage.2.delay", "leave 2 of the 498 conversions"],
    );
    // The same delay in a longer run is fine.
    let sc = scenario(d.path(), "ok.toml", &text.replace("12 ms", "40 ms"));
    ok(&run(&["check", s(&sc)]));
}

#[test]
fn a_chirp_faster_than_the_grid_is_refused_and_a_fast_one_runs_quickly() {
    let d = tempfile::tempdir().unwrap();
    let chirp = |sweep: &str| {
        QUICK_CHAIN.replace(
            "waveform = \"sine\"\nfrequency = \"1 kHz\"",
            &format!(
                "waveform = \"chirp\"\nstart = \"100 Hz\"\nstop = \"10 kHz\"\nsweep_time = \"{sweep}\""
            ),
        )
    };
    check_and_run_refuse(
        d.path(),
        "chirp.toml",
        &chirp("1 ns"),
        (12, 14),
        &["source.sweep_time", "needs at least 16"],
    );
    // 20 grid steps per sweep: 500 sweeps in the run. It must finish in seconds, not minutes.
    let sc = scenario(d.path(), "fast.toml", &chirp("20 us"));
    let t0 = Instant::now();
    let o = run(&[
        "run",
        s(&sc),
        "--quiet",
        "--no-plots",
        "--no-wav",
        "--out",
        s(&d.path().join("f")),
    ]);
    no_panic(&o);
    assert!(t0.elapsed() < Duration::from_secs(60), "{:?}", t0.elapsed());
}

#[test]
fn a_wav_far_slower_than_the_grid_is_refused_at_the_file() {
    let d = tempfile::tempdir().unwrap();
    let sc = wav_scenario(d.path(), "slow.wav");
    // 100 samples at 1 Hz on a 1 MHz grid: a million grid steps per file sample.
    let data = float_samples(100, None);
    fs::write(d.path().join("slow.wav"), wav_bytes(3, 32, 1, 400, &data)).unwrap();
    both_refuse(d.path(), &sc, "1000000 times below the analog rate");
}

// ---------------------------------------------------------------------------------------------------------
// Item 10: progress covers every long phase of `run`.

#[test]
fn run_progress_names_every_phase_on_a_terminal() {
    let d = tempfile::tempdir().unwrap();
    let sc = scenario(d.path(), "slow.toml", SLOW_CHAIN);
    let out = d.path().join("o");
    // `script` gives the run a terminal (progress is drawn only on one) and records what it shows.
    let cmd = format!(
        "{} run {} --out {}",
        env!("CARGO_BIN_EXE_convchain"),
        s(&sc),
        s(&out)
    );
    let o = std::process::Command::new("script")
        .args(["-qec", &cmd, "/dev/null"])
        .output()
        .expect("script runs");
    ok(&o);
    let shown = String::from_utf8_lossy(&o.stdout);
    for phase in [
        "simulating",
        "measuring",
        "drawing the plots",
        "making the listening files",
        "writing the files",
    ] {
        assert!(shown.contains(phase), "no {phase:?} in {shown}");
    }
}

// ---------------------------------------------------------------------------------------------------------
// Item 8: memory does not grow with simulated time.

/// Run the binary and return its peak resident memory (kB), read from /proc while it runs.
fn peak_rss_kb(args: &[&str]) -> u64 {
    let mut child = bin()
        .args(args)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let status = format!("/proc/{}/status", child.id());
    let mut peak = 0;
    loop {
        if let Ok(text) = fs::read_to_string(&status)
            && let Some(line) = text.lines().find(|l| l.starts_with("VmHWM:"))
        {
            let kb: u64 = line.split_whitespace().nth(1).unwrap().parse().unwrap();
            peak = peak.max(kb);
        }
        if let Some(st) = child.try_wait().unwrap() {
            assert!(st.success(), "{args:?}");
            break;
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    peak
}

#[test]
fn peak_memory_does_not_grow_with_simulated_time() {
    let d = tempfile::tempdir().unwrap();
    // A slow chain: 40 kHz grid, 1 kSPS converter, so long simulated times cost little CPU. Its output record
    // is capped at 2^20 samples (about 260 s of signal); 300 s fit in it, 2400 s are eight times longer.
    let chain = |duration: &str| {
        format!(
            r#"name = "long"
[simulation]
analog_rate = "40 kHz"
duration = "{duration}"
settle = "1 s"
[source]
waveform = "sine"
frequency = "10 Hz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 10
range = ["0 V", "5 V"]
sample_rate = "1 kHz"
conversion_time = "100 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
"#
        )
    };
    let mut peaks = Vec::new();
    for dur in ["300 s", "2400 s"] {
        let sc = scenario(d.path(), "long.toml", &chain(dur));
        let out = d.path().join(dur.replace(' ', ""));
        peaks.push(peak_rss_kb(&[
            "run",
            s(&sc),
            "--quiet",
            "--no-plots",
            "--no-wav",
            "--out",
            s(&out),
        ]));
    }
    eprintln!(
        "peak resident memory: {} kB at 300 s, {} kB at 2400 s",
        peaks[0], peaks[1]
    );
    // Growing records would hold (2400 - 300) s x 4 kHz x 2 streams x 8 bytes = 134 MB more.
    assert!(
        peaks[1] < peaks[0] + 40_000,
        "peak {} kB at 300 s, {} kB at 2400 s",
        peaks[0],
        peaks[1]
    );
}

#[test]
fn a_fifo_given_as_the_scenario_or_the_rows_file_is_refused_without_blocking() {
    let d = tempfile::tempdir().unwrap();
    let fifo = d.path().join("pipe.toml");
    assert!(
        std::process::Command::new("mkfifo")
            .arg(&fifo)
            .status()
            .unwrap()
            .success()
    );
    let shard = d.path().join("shard");
    fs::create_dir(&shard).unwrap();
    assert!(
        std::process::Command::new("mkfifo")
            .arg(shard.join("rows.json"))
            .status()
            .unwrap()
            .success()
    );
    let merged = d.path().join("merged");
    for args in [
        vec!["check", s(&fifo)],
        vec!["run", s(&fifo), "--quiet"],
        vec![
            "sweep",
            s(&fifo),
            "--vary",
            "source.frequency=1 kHz..2 kHz",
            "--quiet",
        ],
        vec!["merge", s(&shard), "--quiet", "--out", s(&merged)],
    ] {
        let mut child = bin()
            .current_dir(d.path())
            .args(&args)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let t0 = Instant::now();
        while child.try_wait().unwrap().is_none() {
            if t0.elapsed() > Duration::from_secs(20) {
                let _ = child.kill();
                panic!("{args:?} blocked on a FIFO");
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        refused(&child.wait_with_output().unwrap(), &["not a regular file"]);
    }
}
