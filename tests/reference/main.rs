//! Reference checks of whole chains against outside results (each names its source beside the check).
//! These run the library end to end: scenario text -> engine -> meters.

use std::path::Path;

use convchain::engine::pipeline::{self, RunOutput};
use convchain::measure::chain::{self as measure_chain, ChainMetrics, measure_run};

fn run(text: &str) -> (RunOutput, ChainMetrics) {
    let sc = convchain::scenario::parse_str(text, "reference.toml", Path::new("."))
        .expect("scenario parses");
    let r = pipeline::run(&sc, None, &mut |_| {}).expect("runs");
    let m = measure_run(&r.records()).expect("measures");
    (r, m)
}

/// sine -> [extra stages] -> ideal SAR -> ideal DAC, on a grid of 100 x the conversion rate.
fn chain(
    bits: u32,
    fs_hz: f64,
    f_hz: f64,
    amplitude_v: f64,
    before_adc: &str,
    duration_s: f64,
) -> String {
    format!(
        r#"
name = "reference"
[simulation]
analog_rate = {rate}
duration = {duration_s}
settle = {settle}
seed = 5
[source]
waveform = "sine"
frequency = {f_hz}
amplitude = {amplitude_v}
{before_adc}
[[stage]]
kind = "sar_adc"
bits = {bits}
range = ["-1 V", "1 V"]
sample_rate = {fs_hz}
conversion_time = {tconv}
[[stage]]
kind = "dac"
[analysis]
harmonics = 9
"#,
        rate = 100.0 * fs_hz,
        settle = duration_s / 10.0,
        tconv = 0.8 / fs_hz,
    )
}

#[test]
fn ideal_converter_snr_follows_bennett_for_4_to_16_bits() {
    // W. R. Bennett, "Spectra of quantized signals", BSTJ 27 (1948): SNR = 6.02 N + 1.76 dB for a full-scale sine.
    // The sine here peaks at 0.999 of full scale, so 20 log10(0.999) = -0.009 dB is allowed for. At 4 and 5 bits a
    // mid-rise quantizer of a full-scale sine sits about 0.25 dB under the formula (the error is not yet white, so
    // Bennett's white-noise model is only approximate; measured here, no source), so those get 0.35 dB; from 6 bits
    // on, 0.2 dB. IEEE Std 1241's ideal transfer centres code k on -1 V + k q, so the codes cover -1 V - q/2 to
    // 1 V - q/2 without clipping: the sine is centred there (offset -q/2).
    for bits in 4..=16u32 {
        let q = 2.0 / f64::powi(2.0, bits as i32);
        let offset = format!("offset = {}", -0.5 * q);
        // A coherent record samples the sine at the n phases m/n whatever the cycle count, with the sine's
        // symmetries folding them to about n/4 distinct values: the measured quantization noise scatters by about
        // sqrt(0.8 / (n/4)) around Bennett's figure (the mean of e^2 for uniform e has relative sigma sqrt(4/5)).
        // 0.4 s gives n = 35840 conversions, a scatter of 0.05 dB (1 sigma); 40 ms scattered by +-0.35 dB.
        let (_, m) = run(&chain(bits, 100e3, 1.37e3, 0.999, &offset, 0.4));
        let a = m.adc.expect("adc metrics");
        let expect = 6.02 * bits as f64 + 1.76 + 20.0 * 0.999f64.log10();
        let tol = if bits <= 5 { 0.35 } else { 0.2 };
        let snr = a.sinad_db.unwrap();
        assert!(
            (snr - expect).abs() < tol,
            "{bits} bits: SINAD {snr:.3} dB vs {expect:.3} dB"
        );
    }
}

#[test]
fn sine_fit_enob_and_fft_enob_agree_on_ideal_8_and_12_bit_converters() {
    // IEEE Std 1241-2010: ENOB from the sine-fit residual (N - log2(rms residual / (q/sqrt 12))) and from SINAD
    // ((SINAD - 1.76)/6.02, full-scale corrected) measure the same thing on an ideal converter: within 0.1 bit.
    for bits in [8u32, 12] {
        let (_, m) = run(&chain(bits, 100e3, 2.71e3, 0.95, "", 40e-3));
        let a = m.adc.unwrap();
        let (fft, fit) = (a.enob_bits.unwrap(), a.enob_sinefit_bits.unwrap());
        assert!(
            (fft - fit).abs() < 0.1,
            "{bits} bits: FFT {fft:.3} vs fit {fit:.3}"
        );
        assert!(
            (fit - bits as f64).abs() < 0.1,
            "{bits} bits: fit ENOB {fit:.3}"
        );
    }
}

#[test]
fn zero_order_hold_droops_as_sinc_and_delays_half_a_period() {
    // A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing, 3rd ed., section 4.8.3: the zero-order
    // hold's response is sinc(f/fs) e^(-j pi f / fs): a droop of 20 log10(sinc) dB and a delay of T/2 at every
    // frequency. The chain adds the conversion time before the hold. 16 bits keep quantization out of the way.
    let fs = 48e3;
    for frac in [0.05, 0.2, 0.4] {
        let (r, m) = run(&chain(16, fs, frac * fs, 0.9, "", 60e-3));
        let f = r.plan.frequency_hz.unwrap();
        let x = std::f64::consts::PI * f / fs;
        let sinc_db = 20.0 * (x.sin() / x).log10();
        let gain = m.output.gain_db.unwrap();
        assert!(
            (gain - sinc_db).abs() < 0.05,
            "f = {f:.1} Hz: gain {gain:.4} dB vs sinc {sinc_db:.4} dB"
        );
        let expect = 0.8 / fs + 0.5 / fs;
        let phase = m.latency.phase_delay_s.unwrap();
        assert!(
            (phase - expect).abs() < 0.01 / fs,
            "f = {f:.1} Hz: phase delay {phase:e} vs {expect:e}"
        );
    }
}

#[test]
fn aperture_jitter_limits_snr_to_minus_20_log_2_pi_f_sigma() {
    // The aperture-jitter limit SNR = -20 log10(2 pi f sigma) for a full-scale sine sampled with Gaussian timing
    // error sigma (common practice, no source; it follows from the sine's rms slope). 16 bits (98 dB) and a jitter
    // limit near 60 dB keep quantization out of it.
    let f = 10e3;
    let sigma = 1.0 / (2.0 * std::f64::consts::PI * f * 1e3); // -> 60 dB
    let hold = format!("[[stage]]\nkind = \"sample_hold\"\naperture_jitter = {sigma}\n");
    let (_, m) = run(&chain(16, 100e3, f, 1.0, &hold, 80e-3));
    let snr = m.adc.unwrap().snr_db.unwrap();
    assert!((snr - 60.0).abs() < 0.5, "SNR {snr:.2} dB vs 60 dB");
}

#[test]
fn group_delay_of_a_bessel_filter_is_measured_from_a_multitone() {
    // The measured group delay of a multitone through an analog-only chain (a 4th-order Bessel lowpass) against
    // the filter's analytic group delay (the prototype's poles; its values are checked against scipy.signal in the
    // filter's unit tests). Group delay between adjacent tones is a finite difference, so it is compared with the
    // analytic value at the pair's mid frequency within 1 %.
    let text = r#"
name = "bessel"
[simulation]
analog_rate = "1 MHz"
duration = "40 ms"
settle = "10 ms"
[source]
waveform = "multitone"
tones = [ { frequency = "500 Hz", amplitude = "0.2 V" }, { frequency = "1500 Hz", amplitude = "0.2 V" },
          { frequency = "2500 Hz", amplitude = "0.2 V" }, { frequency = "3500 Hz", amplitude = "0.2 V" } ]
[[stage]]
kind = "filter"
family = "bessel"
order = 4
cutoff = "5 kHz"
"#;
    let (r, m) = run(text);
    assert_eq!(m.latency.group_delay_s.len(), 3);
    let (_, stage) = &r.chain.pre[0];
    for &(f, d) in &m.latency.group_delay_s {
        let want = stage.group_delay_s(f);
        assert!((d / want - 1.0).abs() < 0.01, "{f} Hz: {d:e} vs {want:e}");
    }
}

#[test]
fn group_delay_of_a_bessel_filter_is_measured_from_a_chirp() {
    // The twin of the multitone check: a slow linear chirp (200 Hz to 12 kHz over the 50 ms window, one whole
    // sweep) through the same 4th-order Bessel lowpass, against the filter's analytic group delay (the
    // prototype's poles; its values are checked against scipy.signal in the filter's unit tests). The points run
    // from 2 kHz to 10 kHz, where the delay falls from 67 us to 38 us. Tolerance 2 %: the chirp method rests on
    // the stationary-phase approximation, whose error grows with the sweep rate (236 kHz/s) times the change of
    // the delay with frequency, and each point is a finite difference over the frequency swept in one window
    // (about 730 Hz) where the analytic value is taken at one frequency; measured errors are within 0.3 %.
    let text = r#"
name = "bessel-chirp"
[simulation]
analog_rate = "1 MHz"
duration = "100 ms"
settle = "50 ms"
[source]
waveform = "chirp"
start = "200 Hz"
stop = "12 kHz"
sweep_time = "50 ms"
amplitude = "0.5 V"
[[stage]]
kind = "filter"
family = "bessel"
order = 4
cutoff = "5 kHz"
"#;
    let (r, m) = run(text);
    let gd = &m.latency.group_delay_s;
    assert_eq!(gd.len(), measure_chain::CHIRP_GROUP_DELAY_POINTS);
    let (_, stage) = &r.chain.pre[0];
    let (lo, hi) = (gd[0].0, gd[gd.len() - 1].0);
    assert!(lo < 2_500.0 && hi > 9_500.0, "covers the sweep: {gd:?}");
    // Above the cutoff the delay falls by over a third: a flat (correlation or phase) delay cannot pass.
    assert!(stage.group_delay_s(hi) < 0.65 * stage.group_delay_s(lo));
    for &(f, d) in gd {
        let want = stage.group_delay_s(f);
        assert!((d / want - 1.0).abs() < 0.02, "{f} Hz: {d:e} vs {want:e}");
    }
}

/// sine -> ideal flash ADC (`latency_cycles` = 3) -> ideal DAC, on a grid of 20 x the conversion rate.
fn flash_chain(bits: u32, extra: &str) -> String {
    let q = 2.0 / f64::powi(2.0, bits as i32);
    format!(
        r#"
name = "flash"
[simulation]
analog_rate = 2e8
duration = 4e-3
settle = 4e-4
seed = 9
[source]
waveform = "sine"
frequency = 1.37e5
amplitude = 0.999
offset = {offset}
[[stage]]
kind = "flash_adc"
bits = {bits}
range = ["-1 V", "1 V"]
sample_rate = "10 MHz"
latency_cycles = 3
{extra}
[[stage]]
kind = "dac"
[analysis]
harmonics = 9
"#,
        offset = -0.5 * q
    )
}

#[test]
fn an_ideal_flash_converter_follows_bennett_and_delivers_after_its_pipeline() {
    // W. R. Bennett, "Spectra of quantized signals", BSTJ 27 (1948): SNR = 6.02 N + 1.76 dB for a full-scale
    // sine (0.999 of full scale here: -0.009 dB). A flash converter's thresholds are IEEE Std 1241's ideal
    // transitions, so it quantizes like the ideal SAR above (same 0.2 dB allowance from 6 bits on, 0.35 dB
    // below; 36k conversions).
    for bits in [4u32, 6, 8, 10] {
        let (_, m) = run(&flash_chain(bits, ""));
        let a = m.adc.expect("adc metrics");
        let expect = 6.02 * bits as f64 + 1.76 + 20.0 * 0.999f64.log10();
        let tol = if bits <= 5 { 0.35 } else { 0.2 };
        let sinad = a.sinad_db.unwrap();
        assert!(
            (sinad - expect).abs() < tol,
            "{bits} bits: SINAD {sinad:.3} dB vs {expect:.3} dB"
        );
        assert_eq!(a.codes_clipped, 0);
        // The budget: 3 sample clocks of pipeline (300 ns) and half an update period of the DAC's zero-order
        // hold (50 ns; the ZOH's delay, common practice, no source); the cross-correlation agrees within 1 %.
        let l = &m.latency;
        assert!((l.budget_s - 350e-9).abs() < 1e-12, "{}", l.budget_s);
        assert!(
            (l.measured_s / l.budget_s - 1.0).abs() < 0.01,
            "measured {} vs budget {}",
            l.measured_s,
            l.budget_s
        );
    }
}

#[test]
fn flash_comparator_offsets_lower_the_sinad_as_their_added_noise_predicts() {
    // Static threshold errors of sigma s add s^2 to the error power q^2/12 for a signal that visits every code
    // evenly. Derived here, to first order (|e| < q/2): a transition moved up by e gives the inputs in
    // [T, T + e] the code below, so their error (T - c_k + x) replaces (x - q/2), adding 2 q x; over x in
    // 0..e, per code width q, that is e^2, whose mean is s^2. The record's 36k samples and the sine's
    // non-uniform visits leave 0.5 dB.
    let bits = 8;
    let q: f64 = 2.0 / 256.0;
    let s = 0.3 * q;
    let (_, m) = run(&flash_chain(bits, &format!("comparator_offset = {s}")));
    let sinad = m.adc.unwrap().sinad_db.unwrap();
    let a: f64 = 0.999;
    let p_sig = a * a / 2.0;
    let expect = 10.0 * (p_sig / (q * q / 12.0 + s * s)).log10();
    assert!(
        (sinad - expect).abs() < 0.5,
        "SINAD {sinad:.2} dB vs {expect:.2} dB"
    );
}

/// The default delta-sigma decimation design (order 4, oversampling 64: a sinc^5 CIC by 16, then an FIR by 4).
fn default_decimation() -> (Vec<f64>, convchain::stages::delta_sigma_adc::Shaping) {
    use convchain::stages::delta_sigma_adc::{FilterPhase, NtfZeros, Shaping};
    let sh = Shaping {
        oversampling: 64,
        order: 4,
        quantizer_bits: 1,
        ntf_gain: 1.5,
        zeros: NtfZeros::Spread,
        phase: FilterPhase::Linear,
        passband_edge: 0.45,
        stopband_edge: 0.55,
        ripple_db: 0.01,
        attenuation_db: 100.0,
        cic_order: 5,
    };
    (sh.design().fir.taps.clone(), sh)
}

#[test]
fn decimation_design_matches_scipy_freqz() {
    // Computed with scipy.signal.freqz (scipy 1.17.1, numpy 2.4.6) by
    // tests/reference/decimation.py from tests/reference/decimation_taps.txt, the taps this design gave.
    let here = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference");
    let (taps, sh) = default_decimation();
    let taps_path = here.join("decimation_taps.txt");
    if std::env::var_os("CONVCHAIN_REFERENCE_WRITE").is_some() {
        let text: String = taps.iter().map(|t| format!("{t:.17e}\n")).collect();
        std::fs::write(&taps_path, text).unwrap();
    }
    // The design still gives the taps the reference was computed from.
    let stored: Vec<f64> = std::fs::read_to_string(&taps_path)
        .unwrap()
        .lines()
        .map(|l| l.trim().parse().unwrap())
        .collect();
    assert_eq!(stored.len(), taps.len());
    for (a, b) in stored.iter().zip(&taps) {
        assert!((a - b).abs() < 1e-12, "{a} vs {b}");
    }
    let csv = std::fs::read_to_string(here.join("decimation_freqz.csv")).unwrap();
    let d = sh.design();
    let (r, k) = (d.cic_factor, 5usize);
    assert_eq!(r, 16);
    let mut seen = 0;
    for line in csv.lines().filter(|l| !l.starts_with('#')).skip(1) {
        let cells: Vec<&str> = line.split(',').collect();
        let value: f64 = cells[2].parse().unwrap();
        match cells[0] {
            "fir" => {
                let f: f64 = cells[1].parse().unwrap();
                let ours = 20.0
                    * convchain::stages::multirate::fir_response(&taps, f)
                        .norm()
                        .log10();
                // Deep in the stop band both are rounding noise far under -100 dB.
                if value > -100.0 {
                    assert!(
                        (ours - value).abs() < 1e-6,
                        "FIR at {f}: {ours} vs scipy {value}"
                    );
                } else {
                    assert!(ours < -100.0, "FIR at {f}: {ours}");
                }
            }
            "cic" => {
                // E. B. Hogenauer, IEEE Trans. ASSP 29(2), 1981: (sin(pi f R)/(R sin(pi f)))^K.
                let f: f64 = cells[1].parse().unwrap();
                let ours = 20.0 * convchain::stages::multirate::cic_magnitude(k, r, f).log10();
                assert!(
                    (ours - value).abs() < 1e-9,
                    "CIC at {f}: {ours} vs scipy {value}"
                );
            }
            "ripple_db" => {
                assert!(value <= 0.01, "scipy's ripple {value} dB");
                assert!(
                    (d.fir.ripple_db - value).abs() < 2e-4,
                    "{} vs scipy {value}",
                    d.fir.ripple_db
                );
            }
            "attenuation_db" => {
                assert!(value >= 100.0, "scipy's attenuation {value} dB");
                assert!(
                    (d.fir.atten_db - value).abs() < 0.1,
                    "{} vs scipy {value}",
                    d.fir.atten_db
                );
            }
            other => panic!("unknown row {other}"),
        }
        seen += 1;
    }
    assert_eq!(seen, 18);
}
