//! The waveform CSV, streamed block by block while the run goes (memory does not grow with duration).

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;

use crate::engine::pipeline::WaveformSink;
use crate::error::{Error, Result};
use crate::signal::stream::Timebase;

/// Default cap on rows.
pub const MAX_ROWS: u64 = 1_000_000;

/// Writes `time_s`, one `<label>_v` column per analog stream, and one column per code stream, every `every`-th
/// grid sample.
pub struct CsvSink {
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

impl CsvSink {
    /// `n_total` grid samples will be simulated; with `full` every one is written, else at most [`MAX_ROWS`].
    pub fn create(path: PathBuf, n_total: u64, full: bool) -> Result<CsvSink> {
        let f = File::create(&path).map_err(|e| Error::Write {
            path: path.clone(),
            source: e,
        })?;
        Ok(Self::from_file(f, path, n_total, full))
    }

    /// As [`CsvSink::create`], into a file already open (an output folder's temporary, see
    /// [`crate::report::OutputDir::create_temp`]).
    pub fn from_file(f: File, path: PathBuf, n_total: u64, full: bool) -> CsvSink {
        let every = if full {
            1
        } else {
            n_total.div_ceil(MAX_ROWS).max(1)
        };
        CsvSink {
            path,
            out: BufWriter::with_capacity(1 << 20, f),
            every,
            line: Vec::with_capacity(256),
        }
    }

    /// Flush and close; the caller renames the file into place.
    pub fn finish(mut self) -> Result<()> {
        self.out.flush().map_err(|e| Error::Write {
            path: self.path.clone(),
            source: e,
        })
    }

    fn io(&self, e: std::io::Error) -> Error {
        Error::Write {
            path: self.path.clone(),
            source: e,
        }
    }
}

impl WaveformSink for CsvSink {
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

    fn block(
        &mut self,
        timebase: Timebase,
        n0: u64,
        analog: &[&[f64]],
        codes: &[&[u32]],
    ) -> Result<()> {
        use crate::format::sci::{push_e9, push_u32};
        let len = analog.first().map(|c| c.len()).unwrap_or(0);
        let first = (self.every - n0 % self.every) % self.every;
        let mut j = first as usize;
        while j < len {
            self.line.clear();
            push_e9(&mut self.line, timebase.time_s(n0 + j as u64));
            for col in analog {
                self.line.push(b',');
                push_e9(&mut self.line, col[j]);
            }
            for col in codes {
                self.line.push(b',');
                push_u32(&mut self.line, col[j]);
            }
            self.line.push(b'\n');
            if let Err(e) = self.out.write_all(&self.line) {
                return Err(self.io(e));
            }
            j += self.every as usize;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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
            let mut s = CsvSink::create(p.clone(), 30, false).unwrap();
            s.every = 4;
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
    }
}
