//! Fuzzing without cargo-fuzz: proptest mutates a corpus of valid inputs (byte flips, insertions, deletions,
//! truncation, splices of interesting tokens) and feeds them to the readers that take user files: the
//! scenario reader, the SI-unit parser, the WAV reader, the rows file reader and the CSV capture reader. Each must answer with a value
//! or an error, never a panic, and never allocate beyond what the input holds.
//!
//! Run it longer with `PROPTEST_CASES=20000 cargo test --release --test fuzz`. Inputs that once crashed a
//! reader are kept below as regression tests (`regression_*`).

use std::path::Path;

use proptest::prelude::*;

use convchain::capture::{self, Pick};
use convchain::format::units;
use convchain::scenario;
use convchain::stages::wav_file;
use convchain::study::shard::{ROWS_FILE, RowSet};

/// How one corpus entry is changed.
#[derive(Debug, Clone)]
enum Mutation {
    Flip(usize, u8),
    Insert(usize, Vec<u8>),
    Delete(usize, usize),
    Truncate(usize),
}

fn apply(seed: &[u8], muts: &[Mutation]) -> Vec<u8> {
    let mut b = seed.to_vec();
    for m in muts {
        let n = b.len().max(1);
        match m {
            Mutation::Flip(i, x) => {
                if !b.is_empty() {
                    b[i % n] ^= x;
                }
            }
            Mutation::Insert(i, bytes) => {
                let at = i % (b.len() + 1);
                b.splice(at..at, bytes.iter().copied());
            }
            Mutation::Delete(i, len) => {
                if !b.is_empty() {
                    let at = i % n;
                    let end = (at + len).min(b.len());
                    b.drain(at..end);
                }
            }
            Mutation::Truncate(i) => b.truncate(i % n),
        }
    }
    b
}

/// Tokens that reach the readers' edge cases: numbers at the limits, units, TOML punctuation, WAV chunk ids.
const TOKENS: &[&str] = &[
    "1e308",
    "-1e308",
    "nan",
    "inf",
    "-0",
    "0",
    "1e-320",
    "18446744073709551616",
    "k",
    "M",
    "G",
    "u",
    "n",
    "Hz",
    "V/us",
    "dB",
    "%",
    "ppm",
    "..",
    "=",
    "[[stage]]",
    "[",
    "]",
    "\"",
    "{",
    "}",
    ",",
    "\n",
    " ",
    "#",
    "RIFF",
    "WAVE",
    "fmt ",
    "data",
    "LIST",
    "\u{0}",
    "\u{ff}",
    "\u{1F600}",
    "null",
    "true",
    "[]",
];

fn mutation() -> impl Strategy<Value = Mutation> {
    prop_oneof![
        (any::<usize>(), 1u8..=255).prop_map(|(i, x)| Mutation::Flip(i, x)),
        (any::<usize>(), prop::sample::select(TOKENS))
            .prop_map(|(i, t)| Mutation::Insert(i, t.as_bytes().to_vec())),
        (any::<usize>(), prop::collection::vec(any::<u8>(), 1..8))
            .prop_map(|(i, v)| Mutation::Insert(i, v)),
        (any::<usize>(), 1usize..64).prop_map(|(i, l)| Mutation::Delete(i, l)),
        any::<usize>().prop_map(Mutation::Truncate),
    ]
}

fn mutations() -> impl Strategy<Value = Vec<Mutation>> {
    prop::collection::vec(mutation(), 1..6)
}

fn scenario_corpus() -> Vec<&'static str> {
    vec![
        convchain::DEFAULT_SCENARIO,
        include_str!("../scenarios/river-gauge.toml"),
        include_str!("../scenarios/radio-stl.toml"),
        convchain::scenario::STARTER,
    ]
}

/// A WAV file (`tag` 1 integer PCM, 3 float) with a 16-byte fmt chunk.
fn wav_bytes(tag: u16, channels: u16, bits: u16, rate: u32, data: &[u8]) -> Vec<u8> {
    let mut b = Vec::new();
    b.extend_from_slice(b"RIFF");
    b.extend_from_slice(&(36 + data.len() as u32).to_le_bytes());
    b.extend_from_slice(b"WAVEfmt ");
    b.extend_from_slice(&16u32.to_le_bytes());
    b.extend_from_slice(&tag.to_le_bytes());
    b.extend_from_slice(&channels.to_le_bytes());
    b.extend_from_slice(&rate.to_le_bytes());
    let align = channels * bits / 8;
    b.extend_from_slice(&(rate * u32::from(align)).to_le_bytes());
    b.extend_from_slice(&align.to_le_bytes());
    b.extend_from_slice(&bits.to_le_bytes());
    b.extend_from_slice(b"data");
    b.extend_from_slice(&(data.len() as u32).to_le_bytes());
    b.extend_from_slice(data);
    b
}

fn wav_corpus() -> Vec<Vec<u8>> {
    let pcm16: Vec<u8> = (0..64i16).flat_map(|i| (i * 300).to_le_bytes()).collect();
    let f32s: Vec<u8> = (0..32)
        .flat_map(|i| (i as f32 * 0.01).to_le_bytes())
        .collect();
    let pcm24: Vec<u8> = (0..30)
        .flat_map(|i: i32| (i * 1000).to_le_bytes()[..3].to_vec())
        .collect();
    vec![
        wav_bytes(1, 1, 16, 48_000, &pcm16),
        wav_bytes(1, 2, 16, 44_100, &pcm16),
        wav_bytes(3, 1, 32, 48_000, &f32s),
        wav_bytes(1, 1, 24, 96_000, &pcm24),
        wav_bytes(1, 1, 8, 8_000, &[0, 128, 255, 1, 2, 3, 4, 5]),
    ]
}

fn rows_corpus() -> Vec<String> {
    let study = r#"{"format":"convchain-rows/1","kind":"montecarlo","study":{"runs":3,"scenario":"x"},
"shard":{"k":1,"n":1},"interrupted":null,"columns":["index","seed","output.enob_bits","error"],
"rows":[[0,11,10.5,null],[1,12,null,"draw failed"],[2,13,9.75,null]]}"#;
    let sweep = r#"{"format":"convchain-rows/1","kind":"sweep","study":{"runs":2,"points":2},
"shard":{"k":2,"n":2},"interrupted":"interrupted after 0 of 1 points","columns":["index","a"],"rows":[]}"#;
    vec![study.to_string(), sweep.to_string()]
}

fn csv_corpus() -> Vec<String> {
    let mut scope = String::from("# scope export\nTime (s),CH1,CH2\n");
    for i in 0..40 {
        let t = -1e-3 + f64::from(i) * 1e-6;
        scope.push_str(&format!(
            "{t:.6e},{:.4},{:.3}\n",
            (f64::from(i) * 0.3).sin(),
            0.5
        ));
    }
    vec![
        scope,
        "t;v\n0;1.5\n0.001;-2\n0.002;0\n0.003;1\n".to_string(),
        "time [ms]\tA\n0\t1\n1\t2\n2\t3\n3\t4\n".to_string(),
        "x-axis,1,2\n\"0\",\"1\",2\n1,2,3\n2,3,4\n".to_string(),
    ]
}

fn read_csv(bytes: &[u8]) {
    for pick in [
        Pick::Only,
        Pick::Column("CH1".into()),
        Pick::Column("2".into()),
        Pick::Column("v".into()),
    ] {
        if let Ok(c) = capture::csv::parse(bytes, "fuzz.csv", &pick) {
            assert!(c.samples.len() >= 2);
            assert!(c.samples.iter().all(|v| v.is_finite()));
            assert!(c.sample_rate_hz.is_finite() && c.sample_rate_hz > 0.0);
            assert!(c.t0_s.is_finite());
            // Never more samples than the input has lines.
            assert!(c.samples.len() <= bytes.iter().filter(|&&b| b == b'\n').count() + 1);
        }
    }
}

fn read_wav(dir: &Path, bytes: &[u8]) {
    let p = dir.join("f.wav");
    std::fs::write(&p, bytes).unwrap();
    for ch in 0..3 {
        if let Ok(w) = wav_file::read_channel(&p, ch) {
            assert!(w.rate_hz > 0);
            assert!(!w.data.is_empty());
            assert!(w.data.iter().all(|v| v.is_finite()));
            // Never more samples than the file can hold.
            assert!(w.data.len() <= bytes.len());
        }
    }
    let _ = wav_file::read_header(&p);
}

fn read_rows(dir: &Path, bytes: &[u8]) {
    std::fs::write(dir.join(ROWS_FILE), bytes).unwrap();
    if let Ok(set) = RowSet::read_dir(dir) {
        // An accepted set merges (or is refused) without panicking.
        let _ = convchain::study::shard::merge(
            vec![(dir.to_path_buf(), set)],
            convchain::study::STUDIES,
        );
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(
        std::env::var("PROPTEST_CASES").ok().and_then(|s| s.parse().ok()).unwrap_or(300)
    ))]

    #[test]
    fn the_scenario_reader_never_panics(which in 0usize..4, muts in mutations()) {
        let seed = scenario_corpus()[which];
        let bytes = apply(seed.as_bytes(), &muts);
        let text = String::from_utf8_lossy(&bytes);
        if let Ok(sc) = scenario::parse_str(&text, "fuzz.toml", Path::new(".")) {
            // What `check` does next: plan the run.
            let _ = convchain::engine::plan::Plan::new(&sc);
        }
    }

    #[test]
    fn the_unit_parser_never_panics(
        seed in prop::sample::select(vec!["1 kHz", "4.7k", "13 V/us", "-3 dB", "1%", "8 us", "2.5e-3 V"]),
        muts in mutations(),
    ) {
        let bytes = apply(seed.as_bytes(), &muts);
        let text = String::from_utf8_lossy(&bytes);
        for dim in [
            units::Dimension::Frequency,
            units::Dimension::Time,
            units::Dimension::Voltage,
            units::Dimension::SlewRate,
            units::Dimension::Ratio,
            units::Dimension::Gain,
            units::Dimension::Decibels,
            units::Dimension::Angle,
        ] {
            if let Ok(v) = units::parse_quantity(&text, dim) {
                prop_assert!(!v.is_nan(), "{text:?} gave NaN");
            }
        }
    }

    #[test]
    fn the_wav_reader_never_panics(which in 0usize..5, muts in mutations()) {
        let bytes = apply(&wav_corpus()[which], &muts);
        let d = tempfile::tempdir().unwrap();
        read_wav(d.path(), &bytes);
    }

    #[test]
    fn the_csv_capture_reader_never_panics(which in 0usize..4, muts in mutations()) {
        read_csv(&apply(csv_corpus()[which].as_bytes(), &muts));
    }

    #[test]
    fn the_csv_capture_reader_never_panics_on_arbitrary_bytes(
        bytes in prop::collection::vec(any::<u8>(), 0..512),
    ) {
        read_csv(&bytes);
    }

    #[test]
    fn the_rows_reader_never_panics(which in 0usize..2, muts in mutations()) {
        let bytes = apply(rows_corpus()[which].as_bytes(), &muts);
        let d = tempfile::tempdir().unwrap();
        read_rows(d.path(), &bytes);
    }
}

#[test]
fn the_corpus_itself_reads() {
    for s in scenario_corpus() {
        scenario::parse_str(s, "corpus.toml", Path::new(".")).unwrap();
    }
    let d = tempfile::tempdir().unwrap();
    for w in wav_corpus() {
        std::fs::write(d.path().join("c.wav"), &w).unwrap();
        wav_file::read_channel(&d.path().join("c.wav"), 0).unwrap();
    }
    for r in rows_corpus() {
        std::fs::write(d.path().join(ROWS_FILE), &r).unwrap();
        RowSet::read_dir(d.path()).unwrap();
    }
    for (k, c) in csv_corpus().iter().enumerate() {
        let pick = match k {
            0 => Pick::Column("CH1".into()),
            3 => Pick::Column("2".into()),
            _ => Pick::Only,
        };
        capture::csv::parse(c.as_bytes(), "corpus.csv", &pick).unwrap();
    }
}
