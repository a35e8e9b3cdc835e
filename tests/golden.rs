//! The outputs of every demo scenario, held byte for byte: report.json, waveforms.csv and waveforms.npy of
//! `run`, sweep.csv of a small frequency sweep, and the files of `static`, `limit` and `montecarlo` on one demo
//! each. A change meant to restructure the code must leave these hashes alone; a change meant to alter results
//! updates the table in the same commit and says why. Print the current table with
//! `CONVCHAIN_GOLDEN_PRINT=1 cargo test --release --test golden -- --nocapture`.
//!
//! The hashes are FNV-1a 64 of the files' bytes (the fingerprint the rows files use, `study::shard`).

mod common;

use std::path::Path;

use common::{ok, repo, run_in};

/// (output, FNV-1a 64 of its bytes), re-recorded when a coherent tone's record length came to be chosen with its
/// cycle count (tones move by at most 0.1 %), the output figures' band defaulted to the converter's Nyquist band,
/// the listening level mapping, the built-in chord and the warnings list changed the demos, the configuration
/// echo gained the noise keys, and the latency gained `packets_lost` and `packet_loss_times_s` (report.json) and
/// `latency.packets_lost` (sweep.csv): new fields only, every figure and waveform the same; and a DAC without
/// output dynamics came to hold each grid sample at the average of its hold over the sample's cell (each update at
/// its exact instant, not the next grid instant: the two four-bit demos' measured latency moved by +0.59 us, the
/// 0.29 grid step that sampling the hold put it early); and sweep.csv gained the `latency.slips` column after
/// `latency.packets_lost`, and montecarlo.csv the `latency.packets_lost` and `latency.slips` columns after
/// `latency.measured_s` (new columns only, every other cell the same). waveforms.npy's hashes were added when
/// the file came (the binary form of waveforms.csv's rows; every other hash the same, as the CSV came to be
/// written on the waveform writer's thread). waveforms.csv and waveforms.npy of radio-stl, river-gauge,
/// studio-interface and default were re-recorded when the default rows became 10 per period of the chain's fastest
/// ADC codes (`report::csv::rows_every`; before: every grid sample up to 1e6 rows): fewer rows, each row the same
/// bytes as before; every report.json, sweep and study hash the same.
const GOLDEN: &[(&str, u64)] = &[
    ("four-bit-listen-dithered/report.json", 0x6ecae637e80ea689),
    ("four-bit-listen-dithered/waveforms.csv", 0x5624f9f0fb33a238),
    ("four-bit-listen-dithered/waveforms.npy", 0xea674946bd06c276),
    ("four-bit-listen/report.json", 0x35d72f3727598aaf),
    ("four-bit-listen/waveforms.csv", 0x431f65271b32162f),
    ("four-bit-listen/waveforms.npy", 0xc62b818c64e386bc),
    ("radio-stl/report.json", 0xa214d0800172d35c),
    ("radio-stl/waveforms.csv", 0x75b316b6a66e62fc),
    ("radio-stl/waveforms.npy", 0x01133d8a29a0fe10),
    ("radio-stl/sweep.csv", 0x74ce6e849a54697e),
    ("river-gauge/report.json", 0xcb73c3181767f1b4),
    ("river-gauge/waveforms.csv", 0x011cfc9358aa4ac4),
    ("river-gauge/waveforms.npy", 0x87ae55abe597515e),
    ("river-gauge/sweep.csv", 0x08ca78cd1883af96),
    ("studio-interface/report.json", 0x84ef336c6605082f),
    ("studio-interface/waveforms.csv", 0xc13588f86558a498),
    ("studio-interface/waveforms.npy", 0xe76c44fe3e22ace3),
    ("studio-interface/sweep.csv", 0xfb1d61536760644d),
    ("default/report.json", 0xc9ea2df741f3e17a),
    ("default/waveforms.csv", 0xc13588f86558a498),
    ("default/waveforms.npy", 0xe76c44fe3e22ace3),
    ("static.json", 0x343db39d1aaf533f),
    ("limit.json", 0x9e87549d2071e1e2),
    ("montecarlo.csv", 0x45bbf8db0a8929b6),
];

fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

fn hash_of(path: &Path) -> u64 {
    fnv1a64(&std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display())))
}

#[test]
fn every_demo_output_is_byte_identical_to_the_recorded_one() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path();
    let root = repo("");
    let mut got: Vec<(String, u64)> = Vec::new();
    let quiet = ["-q", "--no-wav", "--no-plots"];

    // The listening demos (a built-in chord) run from a scenarios folder laid out in the temporary folder, so
    // the scenario's path (and so report.json's `origin`) reads as in the checkout.
    std::fs::create_dir(out.join("scenarios")).unwrap();
    for name in ["four-bit-listen-dithered", "four-bit-listen"] {
        let rel = format!("scenarios/{name}.toml");
        std::fs::copy(root.join(&rel), out.join(&rel)).unwrap();
        let dir = out.join(name);
        let mut args = vec!["run", rel.as_str(), "--out", dir.to_str().unwrap()];
        args.extend(quiet);
        ok(&run_in(out, &args));
        for f in ["report.json", "waveforms.csv", "waveforms.npy"] {
            got.push((format!("{name}/{f}"), hash_of(&dir.join(f))));
        }
    }
    // Each sweep stays inside its scenario's analysis band (the river gauge's is 100 Hz).
    for (name, range) in [
        ("radio-stl", "source.frequency=200 Hz..5 kHz"),
        ("river-gauge", "source.frequency=5 Hz..80 Hz"),
        ("studio-interface", "source.frequency=200 Hz..5 kHz"),
    ] {
        let rel = format!("scenarios/{name}.toml");
        let dir = out.join(name);
        let mut args = vec!["run", rel.as_str(), "--out", dir.to_str().unwrap()];
        args.extend(quiet);
        ok(&run_in(&root, &args));
        for f in ["report.json", "waveforms.csv", "waveforms.npy"] {
            got.push((format!("{name}/{f}"), hash_of(&dir.join(f))));
        }
        let sweep = out.join(format!("{name}-sweep"));
        ok(&run_in(
            &root,
            &[
                "sweep",
                rel.as_str(),
                "--vary",
                range,
                "--points",
                "4",
                "--log",
                "-q",
                "--out",
                sweep.to_str().unwrap(),
            ],
        ));
        got.push((
            format!("{name}/sweep.csv"),
            hash_of(&sweep.join("sweep.csv")),
        ));
    }
    let dir = out.join("default");
    let mut args = vec!["run", "--out", dir.to_str().unwrap()];
    args.extend(quiet);
    ok(&run_in(&root, &args));
    for f in ["report.json", "waveforms.csv", "waveforms.npy"] {
        got.push((format!("default/{f}"), hash_of(&dir.join(f))));
    }
    for (cmd, scenario, file, extra) in [
        ("static", "scenarios/radio-stl.toml", "static.json", vec![]),
        ("limit", "scenarios/river-gauge.toml", "limit.json", vec![]),
        (
            "montecarlo",
            "scenarios/river-gauge.toml",
            "montecarlo.csv",
            vec!["--runs", "6"],
        ),
    ] {
        let dir = out.join(cmd);
        let mut args = vec![cmd, scenario, "--out", dir.to_str().unwrap(), "-q"];
        args.extend(extra);
        ok(&run_in(&root, &args));
        got.push((file.to_string(), hash_of(&dir.join(file))));
    }

    if std::env::var_os("CONVCHAIN_GOLDEN_PRINT").is_some() {
        for (k, h) in &got {
            println!("    (\"{k}\", 0x{h:016x}),");
        }
    }
    let differ: Vec<String> = GOLDEN
        .iter()
        .filter_map(|(k, want)| {
            let have = got.iter().find(|(g, _)| g == k).map(|(_, h)| *h);
            (have != Some(*want)).then(|| format!("{k}: recorded 0x{want:016x}, now {have:x?}"))
        })
        .collect();
    assert!(differ.is_empty(), "outputs changed:\n{}", differ.join("\n"));
    assert_eq!(got.len(), GOLDEN.len(), "every output is checked");
}
