//! Cost of analysing a 1M-point record (windowed power spectrum + tone metrics) against a bare real FFT of the
//! same length (input copy + FFT with a prepared plan and scratch).
//! Run briefly: `cargo bench --bench measure -- --warm-up-time 1 --measurement-time 3 --sample-size 10`.

use std::f64::consts::TAU;
use std::hint::black_box;

use convchain::measure::metrics::{MetricsConfig, tone_metrics};
use convchain::measure::spectrum::{Spectrum, SpectrumAnalyzer};
use convchain::scenario::WindowKind;
use criterion::{Criterion, criterion_group, criterion_main};
use realfft::RealFftPlanner;

const N: usize = 1 << 20;

fn record() -> Vec<f64> {
    (0..N)
        .map(|i| {
            let t = i as f64;
            (TAU * 0.0123457 * t).sin()
                + 1e-3 * (TAU * 0.0246914 * t).sin()
                + 1e-6 * ((i * 7919 % 1013) as f64 - 506.0)
        })
        .collect()
}

fn bench(c: &mut Criterion) {
    let x = record();
    let mut g = c.benchmark_group("record_1M");

    let fft = RealFftPlanner::<f64>::new().plan_fft_forward(N);
    let mut input = fft.make_input_vec();
    let mut output = fft.make_output_vec();
    let mut scratch = fft.make_scratch_vec();
    g.bench_function("bare_real_fft", |b| {
        b.iter(|| {
            input.copy_from_slice(&x);
            fft.process_with_scratch(&mut input, &mut output, &mut scratch)
                .unwrap();
            black_box(&output);
        })
    });

    let mut an = SpectrumAnalyzer::new(N, WindowKind::BlackmanHarris).unwrap();
    let mut spec = Spectrum::empty();
    let cfg = MetricsConfig {
        harmonics: 9,
        band_hz: None,
        full_scale_peak_v: 1.0,
        fundamental_hz: None,
    };
    g.bench_function("spectrum_and_metrics", |b| {
        b.iter(|| {
            an.power_spectrum_into(&x, 1.0, &mut spec).unwrap();
            black_box(tone_metrics(&spec, &cfg).unwrap());
        })
    });
    g.bench_function("spectrum_only", |b| {
        b.iter(|| {
            an.power_spectrum_into(&x, 1.0, &mut spec).unwrap();
            black_box(&spec);
        })
    });
    an.power_spectrum_into(&x, 1.0, &mut spec).unwrap();
    g.bench_function("metrics_only", |b| {
        b.iter(|| black_box(tone_metrics(&spec, &cfg).unwrap()))
    });
    g.finish();
}

// No plots: the plotting backend needs fonts the build machines may lack.
criterion_group! {
    name = benches;
    config = Criterion::default().without_plots();
    targets = bench
}
criterion_main!(benches);
