//! The waveform CSV: its rows formatted on the waveform writer's thread ([`super::waveforms`]), streamed to
//! disk as the run goes (memory does not grow with duration).

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;

use crate::error::{Error, Result};
use crate::report::waveforms::{RowBatch, RowWriter};
use crate::signal::stream::Timebase;

/// Default cap on rows.
pub const MAX_ROWS: u64 = 1_000_000;

/// The grid stride of the default rows: every grid sample when `full`, else every `every`-th so that at most
/// [`MAX_ROWS`] rows are written for `n_total` grid samples.
pub fn rows_every(n_total: u64, full: bool) -> u64 {
    if full {
        1
    } else {
        n_total.div_ceil(MAX_ROWS).max(1)
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
    fn default_rows_stay_under_the_cap() {
        assert_eq!(rows_every(10_000_000, false), 10);
        assert_eq!(rows_every(10_000_001, false), 11);
        assert_eq!(rows_every(999, false), 1);
        assert_eq!(rows_every(10_000_000, true), 1);
    }
}
