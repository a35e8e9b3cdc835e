//! The waveform files of a run (waveforms.csv, waveforms.npy), written on a thread of their own: the engine
//! copies the rows the files keep into batches and hands them over a bounded channel, and the thread formats
//! and writes them while the engine goes on (and, after the run, while the meters work).

use std::fs::File;
use std::io::{BufWriter, Seek, SeekFrom, Write};
use std::path::PathBuf;
use std::sync::mpsc::{Receiver, SyncSender, TryRecvError, sync_channel};
use std::thread::JoinHandle;

use crate::engine::pipeline::WaveformSink;
use crate::error::{Error, Result};
use crate::report::csv::column_name;
use crate::report::npy::{self, Field};
use crate::signal::stream::Timebase;

/// Rows in one batch handed to the writer thread.
const BATCH_ROWS: usize = 16_384;
/// Batches waiting in the channel at most (the engine waits when the writer is that far behind).
const CHANNEL_DEPTH: usize = 2;

/// Rows of the waveforms, row-major: `grid[r]` is row r's grid index, its analog values are
/// `analog[r * n_analog..][..n_analog]`, its codes `codes[r * n_codes..][..n_codes]`.
#[derive(Debug, Default)]
pub struct RowBatch {
    pub grid: Vec<u64>,
    pub analog: Vec<f64>,
    pub codes: Vec<u32>,
    pub n_analog: usize,
    pub n_codes: usize,
}

impl RowBatch {
    pub fn analog_row(&self, r: usize) -> &[f64] {
        &self.analog[r * self.n_analog..(r + 1) * self.n_analog]
    }
    pub fn code_row(&self, r: usize) -> &[u32] {
        &self.codes[r * self.n_codes..(r + 1) * self.n_codes]
    }
    fn clear(&mut self) {
        self.grid.clear();
        self.analog.clear();
        self.codes.clear();
    }
}

/// One waveform file: the rows it keeps (grid indices that are multiples of `every`), written as they come.
pub trait RowWriter: Send {
    fn every(&self) -> u64;
    /// The analog stream labels and the code stream labels, before any row.
    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()>;
    /// A batch of rows; the writer keeps those whose grid index is a multiple of [`RowWriter::every`].
    fn rows(&mut self, timebase: Timebase, batch: &RowBatch) -> Result<()>;
    /// Flush and close; the caller renames the file into place.
    fn finish(self: Box<Self>) -> Result<()>;
}

enum Msg {
    Begin(Vec<String>, Vec<String>),
    Rows(Timebase, RowBatch),
}

/// The engine's side of the writer thread: a [`WaveformSink`] that copies the rows some file keeps into
/// batches (and asks the engine for the code columns of those rows only, [`WaveformSink::stride`]).
pub struct WaveformWriter {
    stride: u64,
    batch: RowBatch,
    timebase: Option<Timebase>,
    tx: Option<SyncSender<Msg>>,
    back: Receiver<RowBatch>,
    thread: Option<JoinHandle<Result<()>>>,
}

fn gcd(a: u64, b: u64) -> u64 {
    if b == 0 { a } else { gcd(b, a % b) }
}

impl WaveformWriter {
    /// Start the thread that feeds `writers`.
    pub fn start(writers: Vec<Box<dyn RowWriter>>) -> WaveformWriter {
        let stride = writers.iter().fold(0, |g, w| gcd(g, w.every())).max(1);
        let (tx, rx) = sync_channel::<Msg>(CHANNEL_DEPTH);
        let (back_tx, back) = sync_channel::<RowBatch>(CHANNEL_DEPTH + 2);
        let thread = std::thread::Builder::new()
            .name("waveform writer".into())
            .spawn(move || {
                let mut writers = writers;
                for msg in rx {
                    match msg {
                        Msg::Begin(a, c) => {
                            for w in writers.iter_mut() {
                                w.begin(&a, &c)?;
                            }
                        }
                        Msg::Rows(tb, batch) => {
                            for w in writers.iter_mut() {
                                w.rows(tb, &batch)?;
                            }
                            let _ = back_tx.try_send(batch);
                        }
                    }
                }
                for w in writers {
                    w.finish()?;
                }
                Ok(())
            })
            .ok();
        WaveformWriter {
            stride,
            batch: RowBatch::default(),
            timebase: None,
            tx: Some(tx),
            back,
            thread,
        }
    }

    fn send(&mut self, msg: Msg) -> Result<()> {
        let sent = match &self.tx {
            Some(tx) => tx.send(msg).is_ok(),
            None => false,
        };
        if sent {
            Ok(())
        } else {
            // The thread stopped early: its error says why.
            self.tx = None;
            self.join()?;
            Err(Error::Run("the waveform writer stopped early".into()))
        }
    }

    fn join(&mut self) -> Result<()> {
        match self.thread.take() {
            Some(t) => t
                .join()
                .map_err(|_| Error::Run("internal: the waveform writer panicked".into()))?,
            None => Err(Error::Run(
                "could not start the thread that writes the waveforms".into(),
            )),
        }
    }

    fn flush_batch(&mut self) -> Result<()> {
        let Some(tb) = self.timebase else {
            return Ok(());
        };
        if self.batch.grid.is_empty() {
            return Ok(());
        }
        let mut next = match self.back.try_recv() {
            Ok(b) => b,
            Err(TryRecvError::Empty | TryRecvError::Disconnected) => RowBatch {
                grid: Vec::with_capacity(BATCH_ROWS),
                analog: Vec::with_capacity(BATCH_ROWS * self.batch.n_analog),
                codes: Vec::with_capacity(BATCH_ROWS * self.batch.n_codes),
                ..RowBatch::default()
            },
        };
        next.clear();
        next.n_analog = self.batch.n_analog;
        next.n_codes = self.batch.n_codes;
        let full = std::mem::replace(&mut self.batch, next);
        self.send(Msg::Rows(tb, full))
    }

    /// Write the last rows, wait for the thread and report its first error.
    pub fn finish(mut self) -> Result<()> {
        self.flush_batch()?;
        self.tx = None;
        self.join()
    }
}

impl Drop for WaveformWriter {
    fn drop(&mut self) {
        // After a failed run: close the channel and let the thread end before its files are removed.
        self.tx = None;
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl WaveformSink for WaveformWriter {
    fn stride(&self) -> u64 {
        self.stride
    }

    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()> {
        self.batch.n_analog = analog.len();
        self.batch.n_codes = codes.len();
        self.send(Msg::Begin(analog.to_vec(), codes.to_vec()))
    }

    fn block(
        &mut self,
        timebase: Timebase,
        n0: u64,
        analog: &[&[f64]],
        codes: &[&[u32]],
    ) -> Result<()> {
        self.timebase = Some(timebase);
        let len = analog.first().map(|c| c.len()).unwrap_or(0);
        let s = self.stride;
        let mut j = ((s - n0 % s) % s) as usize;
        while j < len {
            self.batch.grid.push(n0 + j as u64);
            for col in analog {
                self.batch.analog.push(col[j]);
            }
            for col in codes {
                self.batch.codes.push(col[j]);
            }
            if self.batch.grid.len() >= BATCH_ROWS {
                self.flush_batch()?;
            }
            j += s as usize;
        }
        Ok(())
    }
}

/// waveforms.npy: one structured array, a row per kept grid sample, fields `time_s` (`<f8`), one `<label>_v`
/// per analog stream (`<f8`, volts) and one per code stream (`<u4`), named as waveforms.csv's columns.
pub struct NpyRows {
    path: PathBuf,
    out: BufWriter<File>,
    every: u64,
    expected_rows: u64,
    rows: u64,
    fields: Vec<Field>,
    row: Vec<u8>,
}

impl NpyRows {
    /// Into a file already open (an output folder's temporary); `n_total` grid samples will be simulated and
    /// every `every`-th is kept.
    pub fn from_file(f: File, path: PathBuf, n_total: u64, every: u64) -> NpyRows {
        let every = every.max(1);
        NpyRows {
            path,
            out: BufWriter::with_capacity(1 << 20, f),
            every,
            expected_rows: n_total.div_ceil(every),
            rows: 0,
            fields: Vec::new(),
            row: Vec::with_capacity(256),
        }
    }

    fn io(&self, e: std::io::Error) -> Error {
        Error::Write {
            path: self.path.clone(),
            source: e,
        }
    }
}

impl RowWriter for NpyRows {
    fn every(&self) -> u64 {
        self.every
    }

    fn begin(&mut self, analog: &[String], codes: &[String]) -> Result<()> {
        let mut names = vec!["time_s".to_string()];
        names.extend(analog.iter().map(|a| format!("{}_v", column_name(a))));
        names.extend(codes.iter().map(|c| column_name(c)));
        let names = npy::distinct_names(&names);
        let n_float = 1 + analog.len();
        self.fields = names
            .iter()
            .enumerate()
            .map(|(i, n)| {
                if i < n_float {
                    Field::f64(n)
                } else {
                    Field::u32(n)
                }
            })
            .collect();
        let head = npy::preamble(&self.fields, self.expected_rows);
        self.out.write_all(&head).map_err(|e| self.io(e))
    }

    fn rows(&mut self, timebase: Timebase, batch: &RowBatch) -> Result<()> {
        for (r, &n) in batch.grid.iter().enumerate() {
            if !n.is_multiple_of(self.every) {
                continue;
            }
            self.row.clear();
            self.row
                .extend_from_slice(&timebase.time_s(n).to_le_bytes());
            for &v in batch.analog_row(r) {
                self.row.extend_from_slice(&v.to_le_bytes());
            }
            for &c in batch.code_row(r) {
                self.row.extend_from_slice(&c.to_le_bytes());
            }
            if let Err(e) = self.out.write_all(&self.row) {
                return Err(self.io(e));
            }
            self.rows += 1;
        }
        Ok(())
    }

    fn finish(mut self: Box<Self>) -> Result<()> {
        self.out.flush().map_err(|e| self.io(e))?;
        if self.rows != self.expected_rows {
            // The preamble's size does not depend on the count (npy::preamble): rewrite it in place.
            let head = npy::preamble(&self.fields, self.rows);
            let f = self.out.get_mut();
            f.seek(SeekFrom::Start(0))
                .and_then(|_| f.write_all(&head))
                .map_err(|e| Error::Write {
                    path: self.path.clone(),
                    source: e,
                })?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write_npy(every: u64, n_total: usize, claimed_total: u64) -> Vec<u8> {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("w.npy");
        let f = File::create(&p).unwrap();
        let rows = NpyRows::from_file(f, p.clone(), claimed_total, every);
        let mut s = WaveformWriter::start(vec![Box::new(rows)]);
        s.begin(
            &["source".into(), "stage.2 dac".into()],
            &["adc code".into()],
        )
        .unwrap();
        let a: Vec<f64> = (0..n_total).map(|i| i as f64 * 0.5).collect();
        let b: Vec<f64> = (0..n_total).map(|i| -(i as f64)).collect();
        let c: Vec<u32> = (0..n_total as u32).collect();
        let tb = Timebase::new(100.0);
        let mut n0 = 0;
        while n0 < n_total {
            let e = (n0 + 13).min(n_total);
            s.block(tb, n0 as u64, &[&a[n0..e], &b[n0..e]], &[&c[n0..e]])
                .unwrap();
            n0 = e;
        }
        s.finish().unwrap();
        std::fs::read(p).unwrap()
    }

    #[test]
    fn rows_follow_the_preamble_packed_little_endian() {
        let bytes = write_npy(3, 40, 40);
        let hl = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
        let head = std::str::from_utf8(&bytes[10..10 + hl]).unwrap();
        assert!(head.contains(
            "[('time_s', '<f8'), ('source_v', '<f8'), ('stage2_dac_v', '<f8'), ('adc_code', '<u4')]"
        ));
        assert!(head.contains("'shape': (14,)"), "{head}"); // rows 0, 3, ..., 39
        let data = &bytes[10 + hl..];
        assert_eq!(data.len(), 14 * 28);
        let row = &data[5 * 28..6 * 28]; // grid index 15
        let f = |o: usize| f64::from_le_bytes(row[o..o + 8].try_into().unwrap());
        assert_eq!(f(0), 15.0 / 100.0);
        assert_eq!(f(8), 7.5);
        assert_eq!(f(16), -15.0);
        assert_eq!(u32::from_le_bytes(row[24..28].try_into().unwrap()), 15);
    }

    #[test]
    fn a_count_that_differs_from_the_plan_is_rewritten() {
        let planned = write_npy(1, 20, 20);
        let fewer = write_npy(1, 20, 25);
        assert_eq!(planned, fewer);
    }

    #[test]
    fn a_file_keeps_its_own_rows_beside_another_files() {
        // Two writers with strides 1 and 4 share batches of every row; each keeps its own.
        let d = tempfile::tempdir().unwrap();
        let p1 = d.path().join("a.npy");
        let p4 = d.path().join("b.npy");
        let w1 = NpyRows::from_file(File::create(&p1).unwrap(), p1.clone(), 9, 1);
        let w4 = NpyRows::from_file(File::create(&p4).unwrap(), p4.clone(), 9, 4);
        let mut s = WaveformWriter::start(vec![Box::new(w1), Box::new(w4)]);
        assert_eq!(s.stride(), 1);
        s.begin(&["x".into()], &[]).unwrap();
        let v: Vec<f64> = (0..9).map(f64::from).collect();
        s.block(Timebase::new(1.0), 0, &[&v], &[]).unwrap();
        s.finish().unwrap();
        let data_len = |p: &PathBuf| {
            let b = std::fs::read(p).unwrap();
            b.len() - 10 - u16::from_le_bytes([b[8], b[9]]) as usize
        };
        assert_eq!(data_len(&p1), 9 * 16);
        assert_eq!(data_len(&p4), 3 * 16); // rows 0, 4, 8
    }

    #[test]
    fn a_writer_error_reaches_the_engine() {
        struct Failing;
        impl RowWriter for Failing {
            fn every(&self) -> u64 {
                1
            }
            fn begin(&mut self, _: &[String], _: &[String]) -> Result<()> {
                Ok(())
            }
            fn rows(&mut self, _: Timebase, _: &RowBatch) -> Result<()> {
                Err(Error::Run("disk full".into()))
            }
            fn finish(self: Box<Self>) -> Result<()> {
                Ok(())
            }
        }
        let mut s = WaveformWriter::start(vec![Box::new(Failing)]);
        s.begin(&["x".into()], &[]).unwrap();
        let v = vec![0.0; 4 * BATCH_ROWS];
        let mut err = None;
        for k in 0..4 {
            if let Err(e) = s.block(Timebase::new(1.0), (k * v.len()) as u64, &[&v], &[]) {
                err = Some(e);
                break;
            }
        }
        let e = match err {
            Some(e) => e,
            None => s.finish().unwrap_err(),
        };
        assert!(e.to_string().contains("disk full"), "{e}");
    }
}
