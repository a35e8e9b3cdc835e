//! The outputs of every demo scenario, held byte for byte: report.json and waveforms.csv of `run`, sweep.csv of a
//! small frequency sweep, and the files of `static`, `limit` and `montecarlo` on one demo each. A change meant
//! to restructure the code must leave these hashes alone; a change meant to alter results updates the table in
//! the same commit and says why. Print the current table with
//! `CONVCHAIN_GOLDEN_PRINT=1 cargo test --release --test golden -- --nocapture`.
//!
//! The hashes are FNV-1a 64 of the files' bytes (the fingerprint the rows files use, `study::shard`).

mod common;

use std::path::Path;

use common::{ok, repo, run_in};

/// (output, FNV-1a 64 of its bytes), recorded when the SAR's ideal transfer became IEEE Std 1241's centred one
/// and the static headline took the bench sine's known amplitude and offset.
const GOLDEN: &[(&str, u64)] = &[
    ("four-bit-listen-dithered/report.json", 0xf92caa640d30c50d),
    ("four-bit-listen-dithered/waveforms.csv", 0x4b151367da46b8d7),
    ("four-bit-listen/report.json", 0xc5a155fc720f501b),
    ("four-bit-listen/waveforms.csv", 0x06e5a0b6c2740873),
    ("radio-stl/report.json", 0xf7b5858cf7386800),
    ("radio-stl/waveforms.csv", 0x698310e33f1c0029),
    ("radio-stl/sweep.csv", 0x9296b4a36fc403ee),
    ("river-gauge/report.json", 0x185328c3e1cc9f02),
    ("river-gauge/waveforms.csv", 0x5196d3e0256cb7b5),
    ("river-gauge/sweep.csv", 0xcf9acc990fdfb333),
    ("studio-interface/report.json", 0x313c455a8494a20a),
    ("studio-interface/waveforms.csv", 0x1c1ac66f4f6967e5),
    ("studio-interface/sweep.csv", 0xdcda7a5aa8945800),
    ("default/report.json", 0xdff337f7fc8c0d43),
    ("default/waveforms.csv", 0x1c1ac66f4f6967e5),
    ("static.json", 0x7a01d9a97d69c6a8),
    ("limit.json", 0x3a37b5bed31a64db),
    ("montecarlo.csv", 0x2e54f4c969a73ea4),
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

    // The listening demos read generated audio beside their scenario folder: lay both out in the temporary
    // folder, so the scenario's path (and so report.json's `origin`) reads as in the checkout.
    std::fs::create_dir(out.join("scenarios")).unwrap();
    ok(&run_in(out, &["audio", "chord", "--out", "listen"]));
    for name in ["four-bit-listen-dithered", "four-bit-listen"] {
        let rel = format!("scenarios/{name}.toml");
        std::fs::copy(root.join(&rel), out.join(&rel)).unwrap();
        let dir = out.join(name);
        let mut args = vec!["run", rel.as_str(), "--out", dir.to_str().unwrap()];
        args.extend(quiet);
        ok(&run_in(out, &args));
        for f in ["report.json", "waveforms.csv"] {
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
        for f in ["report.json", "waveforms.csv"] {
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
    for f in ["report.json", "waveforms.csv"] {
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
