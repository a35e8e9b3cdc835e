//! The waveform CSV: its rows formatted on the waveform writer's thread ([`super::waveforms`]), streamed to
//! disk as the run goes (memory does not grow with duration).

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;

use crate::error::{Error, Result};
use crate::report::waveforms::{RowBatch, RowWriter};
use crate::signal::stream::Timebase;

/// Upper bound on the default rows.
pub const MAX_ROWS: u64 = 1_000_000;

/// Default rows per period of the chain's fastest code stream (see [`fastest_code_rate_hz`]).
pub const ROWS_PER_CODE_PERIOD: u64 = 10;

/// The nominal rate (Hz) of the fastest code stream in a chain's stages: every ADC's output sample rate (a
/// delta-sigma ADC's output word rate, not its modulator clock), and a `resample` stage's output rate, which
/// is the rate the codes reach the DAC at. `clock_ppm` offsets are left out, so a clock written a few ppm off
/// keeps the stride of its nominal rate. `None` for a chain without an ADC.
pub fn fastest_code_rate_hz(stages: &[crate::scenario::Stage]) -> Option<f64> {
    let mut up = crate::stages::kind::Upstream::default();
    let mut fastest: Option<f64> = None;
    for s in stages {
        s.kind.pass_on(&mut up);
        if let Some(f) = up.sample_rate_hz.filter(|f| f.is_finite() && *f > 0.0) {
            fastest = Some(fastest.map_or(f, |g| g.max(f)));
        }
    }
    fastest
}

/// The grid stride of the default rows of waveforms.csv (and of waveforms.npy without `--npy-full-rate`):
/// every grid sample when `full`; else [`ROWS_PER_CODE_PERIOD`] rows per period of the fastest code stream
/// `code_rate_hz` (grid steps per row `floor(grid_rate_hz / (10 code_rate_hz))`, at least 1), thinned further
/// when that would pass [`MAX_ROWS`] rows for `n_total` grid samples; a chain without an ADC (`None`) gets
/// the least thinning that stays within [`MAX_ROWS`].
pub fn rows_every(n_total: u64, full: bool, grid_rate_hz: f64, code_rate_hz: Option<f64>) -> u64 {
    if full {
        return 1;
    }
    let cap = n_total.div_ceil(MAX_ROWS).max(1);
    match code_rate_hz {
        Some(f) => {
            let per_row = (grid_rate_hz / (ROWS_PER_CODE_PERIOD as f64 * f)).floor();
            // `as` saturates: a rate far below the grid's gives a stride longer than the run (one row).
            let stride = if per_row >= 1.0 { per_row as u64 } else { 1 };
            stride.max(cap)
        }
        None => cap,
    }
}

/// Writes `time_s`, one `<label>_v` column per analog stream, and one column per code stream, every `every`-th
/// grid sample.
pub struct CsvRows {
    path: PathBuf,
    out: BufWriter<File>,
    every: u64,
    line: Vec<u8>,
}

/// Header-safe name for a stream label: `stage.4 dac` -> `stage4_dac`.
pub fn column_name(label: &str) -> String {
    let mut s = String::with_capacity(label.len());
    for c in label.chars() {
        if c.is_ascii_alphanumeric() {
            s.push(c.to_ascii_lowercase());
        } else if (c == ' ' || c == '-' || c == '_') && !s.ends_with('_') {
            s.push('_');
        }
    }
    s.trim_matches('_').to_string()
}

impl CsvRows {
    /// Into a file already open (an output folder's temporary, see
    /// [`crate::report::OutputDir::create_temp`]), writing every `every`-th grid sample (see [`rows_every`]).
    pub fn from_file(f: File, path: PathBuf, every: u64) -> CsvRows {
        CsvRows {
            path,
            out: BufWriter::with_capacity(1 << 20, f),
            every: every.max(1),
            line: Vec::with_capacity(256),
        }
    }

    fn io(&self, e: std::io::Error) -> Error {
        Error::Write {
            path: self.path.clone(),
            source: e,
        }
    }
}

impl RowWriter for CsvRows {
    fn every(&self) -> u64 {
        self.every
    }

    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()> {
        let mut h = String::from("time_s");
        for a in analog {
            h.push(',');
            h.push_str(&column_name(a));
            h.push_str("_v");
        }
        for c in codes {
            h.push(',');
            h.push_str(&column_name(c));
        }
        h.push('\n');
        self.out.write_all(h.as_bytes()).map_err(|e| self.io(e))
    }

    fn rows(&mut self, timebase: Timebase, batch: &RowBatch) -> Result<()> {
        use crate::format::sci::{push_e9, push_u32};
        for (r, &n) in batch.grid.iter().enumerate() {
            if !n.is_multiple_of(self.every) {
                continue;
            }
            self.line.clear();
            push_e9(&mut self.line, timebase.time_s(n));
            for &v in batch.analog_row(r) {
                self.line.push(b',');
                push_e9(&mut self.line, v);
            }
            for &c in batch.code_row(r) {
                self.line.push(b',');
                push_u32(&mut self.line, c);
            }
            self.line.push(b'\n');
            if let Err(e) = self.out.write_all(&self.line) {
                return Err(self.io(e));
            }
        }
        Ok(())
    }

    fn finish(mut self: Box<Self>) -> Result<()> {
        self.out.flush().map_err(|e| self.io(e))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::pipeline::WaveformSink;
    use crate::report::waveforms::WaveformWriter;

    #[test]
    fn labels_become_plain_column_names() {
        assert_eq!(column_name("stage.4 dac"), "stage4_dac");
        assert_eq!(column_name("Output buffer"), "output_buffer");
    }

    #[test]
    fn rows_are_thinned_to_the_cap_and_split_blocks_do_not_matter() {
        let d = tempfile::tempdir().unwrap();
        let write = |name: &str, split: usize| {
            let p = d.path().join(name);
            let f = File::create(&p).unwrap();
            let rows = CsvRows::from_file(f, p.clone(), 4);
            let mut s = WaveformWriter::start(vec![Box::new(rows)]);
            s.begin(&["source".into()], &["adc".into()]).unwrap();
            let v: Vec<f64> = (0..30).map(|i| i as f64).collect();
            let c: Vec<u32> = (0..30).collect();
            let tb = Timebase::new(10.0);
            let mut n0 = 0;
            while n0 < 30 {
                let e = (n0 + split).min(30);
                s.block(tb, n0 as u64, &[&v[n0..e]], &[&c[n0..e]]).unwrap();
                n0 = e;
            }
            s.finish().unwrap();
            std::fs::read_to_string(p).unwrap()
        };
        let a = write("a.csv", 7);
        let b = write("b.csv", 30);
        assert_eq!(a, b);
        assert_eq!(a.lines().count(), 1 + 8); // rows 0,4,...,28
        assert!(a.starts_with("time_s,source_v,adc\n"));
        assert!(a.contains("\n4.000000000e-1,4.000000000e0,4\n"), "{a}");
    }

    #[test]
    fn default_rows_stay_under_the_cap_without_an_adc() {
        assert_eq!(rows_every(10_000_000, false, 10e6, None), 10);
        assert_eq!(rows_every(10_000_001, false, 10e6, None), 11);
        assert_eq!(rows_every(999, false, 10e6, None), 1);
        assert_eq!(rows_every(10_000_000, true, 10e6, None), 1);
    }

    #[test]
    fn default_rows_are_ten_per_period_of_the_fastest_codes() {
        // The reference chain (benches/reference-chain.toml): 10 MHz grid, 100 kHz ADC: every 10th step, at
        // 0.1 s (1e6 steps, 1e5 rows) as at 1 s (1e7 steps, 1e6 rows).
        assert_eq!(rows_every(1_000_000, false, 10e6, Some(100e3)), 10);
        assert_eq!(rows_every(10_000_000, false, 10e6, Some(100e3)), 10);
        // The cap still bounds a long run: 10 s would be 1e7 rows at 10 a period.
        assert_eq!(rows_every(100_000_000, false, 10e6, Some(100e3)), 100);
        // Floor: 30 kHz on 1 MHz is 3.33 steps a row -> 3.
        assert_eq!(rows_every(1_000, false, 1e6, Some(30e3)), 3);
        // An ADC faster than a tenth of the grid: every step.
        assert_eq!(rows_every(1_000, false, 1e6, Some(400e3)), 1);
        assert_eq!(rows_every(1_000, false, 1e6, Some(f64::INFINITY)), 1);
        // --full wins.
        assert_eq!(rows_every(10_000_000, true, 10e6, Some(100e3)), 1);
    }

    fn stages(toml_stages: &str) -> Vec<crate::scenario::Stage> {
        let text = format!(
            "name = \"t\"\n[simulation]\nanalog_rate = \"10 MHz\"\nduration = \"10 ms\"\n\
             [source]\nwaveform = \"sine\"\nfrequency = \"1 kHz\"\namplitude = \"1 V\"\n{toml_stages}"
        );
        crate::scenario::parse_str(&text, "t.toml", std::path::Path::new("."))
            .unwrap()
            .stages
    }

    #[test]
    fn the_fastest_code_stream_sets_the_rate() {
        let sar = |fs: &str, ppm: &str| {
            format!(
                "[[stage]]\nkind = \"sar_adc\"\nbits = 8\nrange = [\"-1 V\", \"1 V\"]\nsample_rate = \"{fs}\"\n\
                 conversion_time = \"2 us\"\n{ppm}[[stage]]\nkind = \"dac\"\n"
            )
        };
        assert_eq!(fastest_code_rate_hz(&stages("")), None);
        assert_eq!(
            fastest_code_rate_hz(&stages(&sar("100 kHz", ""))),
            Some(100e3)
        );
        // Hops in series: the fastest ADC of the chain.
        let two = format!("{}{}", sar("48 kHz", ""), sar("200 kHz", ""));
        assert_eq!(fastest_code_rate_hz(&stages(&two)), Some(200e3));
        // A clock written off by some ppm keeps its nominal rate.
        let off = sar("100 kHz", "clock_ppm = 30\n");
        assert_eq!(fastest_code_rate_hz(&stages(&off)), Some(100e3));
        // A delta-sigma ADC: its output word rate, not its modulator clock.
        let ds = "[[stage]]\nkind = \"delta_sigma_adc\"\nbits = 16\nrange = [\"-1 V\", \"1 V\"]\n\
                  sample_rate = \"48 kHz\"\noversampling = 64\n[[stage]]\nkind = \"dac\"\n";
        assert_eq!(fastest_code_rate_hz(&stages(ds)), Some(48e3));
    }
}
