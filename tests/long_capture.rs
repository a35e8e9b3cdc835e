//! Long recordings are measured in bounded memory: `delay` reads a head and its windows, `analyze` a stretch of
//! at most 2^23 samples, so a recording eight times longer costs (almost) no more memory. The peak resident
//! memory of each run of the binary is read from the kernel (`wait4`'s rusage for that one child).

mod common;

use std::path::Path;
use std::process::Stdio;

use common::{bin, json};
use rand::{RngExt, SeedableRng};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Run the binary with `args`; its exit code and peak resident memory (KiB).
fn run_measured(args: &[&str]) -> (i32, i64) {
    let child = bin()
        .args(args)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    // SAFETY: an all-zero rusage is a valid value; wait4 fills it for the child `pid`, which this process
    // spawned and has not waited for (the Child handle is forgotten so it does not wait again).
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let got = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    std::mem::forget(child);
    assert_eq!(got, pid);
    (libc::WEXITSTATUS(status), usage.ru_maxrss)
}

/// A 16-bit stereo WAV file of `frames` frames at 48 kHz: white noise on channel 1 and the same noise
/// `delay` samples later on channel 2.
fn noise_pair(path: &Path, frames: usize, delay: usize, seed: u64) {
    let spec = hound::WavSpec {
        channels: 2,
        sample_rate: 48_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let x: Vec<i16> = (0..frames + delay)
        .map(|_| rng.random_range(-8000i16..8000))
        .collect();
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    {
        let mut w16 = w.get_i16_writer((2 * frames) as u32);
        for i in 0..frames {
            w16.write_sample(x[i + delay]);
            w16.write_sample(x[i]);
        }
        w16.flush().unwrap();
    }
    w.finalize().unwrap();
}

/// A 16-bit mono WAV file of `frames` frames at 48 kHz: a 997 Hz sine at half of full scale.
fn sine(path: &Path, frames: usize) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 48_000,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut w = hound::WavWriter::create(path, spec).unwrap();
    {
        let mut w16 = w.get_i16_writer(frames as u32);
        for i in 0..frames {
            let v = 16384.0 * (std::f64::consts::TAU * 997.0 * i as f64 / 48_000.0).sin();
            w16.write_sample(v.round() as i16);
        }
        w16.flush().unwrap();
    }
    w.finalize().unwrap();
}

#[test]
fn a_recording_eight_times_longer_costs_no_more_memory() {
    let d = tempfile::tempdir().unwrap();
    // delay: 2^22 and 2^25 frames (87 s and 11.6 min at 48 kHz), the capture channel 100 samples late (by
    // construction). Both are longer than the head the whole-record estimate reads (2^21 samples), so they
    // read the same amount; the long one reads its 64 windows from further apart.
    let (short, long) = (1usize << 22, 1usize << 25);
    let mut rss = Vec::new();
    for (name, frames) in [("short", short), ("long", long)] {
        let wav = d.path().join(format!("{name}.wav"));
        noise_pair(&wav, frames, 100, 3);
        let out = d.path().join(format!("delay-{name}"));
        let (code, kib) = run_measured(&[
            "delay",
            s(&wav),
            "--reference",
            "1",
            "--capture",
            "2",
            "--no-plots",
            "--out",
            s(&out),
        ]);
        assert_eq!(code, 0, "delay on {frames} frames");
        let r = json(&out.join("delay.json"))["delay"].clone();
        for k in ["start_s", "end_s"] {
            let got = r[k].as_f64().unwrap() * 48_000.0;
            assert!((got - 100.0).abs() < 0.1, "{k}: {got} samples, {r}");
        }
        rss.push(kib);
        std::fs::remove_file(&wav).unwrap();
    }
    // The long file would need 2^25 x 2 x 8 bytes = 512 MiB as numbers if read whole.
    eprintln!("delay peak memory: {} KiB, {} KiB", rss[0], rss[1]);
    assert!(
        (rss[1] as f64) < 1.25 * rss[0] as f64 + 16_384.0,
        "peak memory {} KiB (long) against {} KiB (short)",
        rss[1],
        rss[0]
    );

    // analyze: 1.25 x 2^23 and 8 x 2^23 frames; both measure the first 2^23 samples and say so.
    let mut rss = Vec::new();
    for (name, frames) in [("short", 5usize << 21), ("long", 1usize << 26)] {
        let wav = d.path().join(format!("sine-{name}.wav"));
        sine(&wav, frames);
        let out = d.path().join(format!("analyze-{name}"));
        let (code, kib) = run_measured(&["analyze", s(&wav), "--no-plots", "--out", s(&out)]);
        assert_eq!(code, 0, "analyze on {frames} frames");
        let c = json(&out.join("analysis.json"))["capture"].clone();
        assert_eq!(c["samples"].as_u64().unwrap(), 1 << 23);
        assert_eq!(c["samples_in_file"].as_u64().unwrap(), frames as u64);
        assert!(c["note"].as_str().unwrap().contains("--start"), "{c}");
        // A 16-bit half-scale sine: quantization-limited SINAD near 6.02 x 16 + 1.76 - 6.02 = 92 dB (IEEE Std
        // 1241 ideal quantizer, less 6 dB for half scale); common practice, no source for the margin.
        assert!(c["sinad_db"].as_f64().unwrap() > 85.0, "{c}");
        rss.push(kib);
        std::fs::remove_file(&wav).unwrap();
    }
    eprintln!("analyze peak memory: {} KiB, {} KiB", rss[0], rss[1]);
    assert!(
        (rss[1] as f64) < 1.25 * rss[0] as f64 + 16_384.0,
        "peak memory {} KiB (long) against {} KiB (short)",
        rss[1],
        rss[0]
    );
}

#[test]
fn start_and_length_choose_the_stretch_analysed() {
    let d = tempfile::tempdir().unwrap();
    let wav = d.path().join("sine.wav");
    sine(&wav, 96_000);
    let out = d.path().join("out");
    let o = common::run(&[
        "analyze",
        s(&wav),
        "--start",
        "0.5 s",
        "--length",
        "250 ms",
        "--no-plots",
        "--out",
        s(&out),
    ]);
    common::ok(&o);
    let c = json(&out.join("analysis.json"))["capture"].clone();
    assert_eq!(c["samples"].as_u64().unwrap(), 12_000);
    assert_eq!(c["samples_in_file"].as_u64().unwrap(), 96_000);
    assert_eq!(c["start_s"].as_f64().unwrap(), 0.5);
    assert!(c.get("note").is_none(), "{c}");
    // A start beyond the end is bad input naming the recording's length.
    let o = common::run(&[
        "analyze",
        s(&wav),
        "--start",
        "3 s",
        "--out",
        s(&out),
        "--force",
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        common::stderr(&o).contains("lasts 2.000000 s"),
        "{}",
        common::stderr(&o)
    );
}
