//! A value column of a CSV export (a scope's, a logger's, a spreadsheet's): a header row naming the columns,
//! the first column the time (in seconds, or in the time unit its header names in brackets: `time (ms)`,
//! `t [us]`), then rows of numbers. The sample rate is the inverse of the time column's mean step, and every
//! step must lie within [`STEP_TOLERANCE`] of the median step (a capture with missing samples or a varying rate is
//! refused, naming the line).
//!
//! Read as a stream, one row at a time into a reused buffer; only the time and the chosen column are kept.
//! Lines starting with `#` and blank lines are skipped. The delimiter is the header line's: a comma, else a
//! semicolon, else a tab. Every problem is an error naming the file, the line and the column, never a panic.

use std::io::{BufRead, BufReader, Cursor, Read};
use std::path::{Path, PathBuf};

use super::{Capture, Origin, Pick};
use crate::Error;
use crate::format::units::{Dimension, parse_quantity};
use crate::text::clip;

/// Largest difference between one step of the time column and its median step, as a fraction of that step
/// (1 %): far above the rounding of times exported with six or more significant digits, far below a missing
/// sample (a step of two periods) or a change of sample rate.
pub const STEP_TOLERANCE: f64 = 0.01;

/// Most rows of numbers read (2^24): a CSV capture is held in memory (its time column must be checked whole), so
/// a longer one is refused with the way out (a shorter export, or WAV, which is read a stretch at a time).
pub const MAX_ROWS: usize = 1 << 24;

/// Longest line read before the header is found (bytes); a longer one is not a CSV header.
const MAX_HEADER_LINE: u64 = 1 << 20;

/// Read the value column `pick` of the CSV file at `path` (only a regular file is opened).
pub fn read(path: &Path, pick: &Pick) -> Result<Capture, Error> {
    let (f, _) = crate::stages::wav_file::open_regular(path, "a CSV file")?;
    let mut c =
        parse(BufReader::new(f), &path.display().to_string(), pick).map_err(|e| match e {
            Error::Read { source, .. } => Error::Read {
                path: path.to_path_buf(),
                source,
            },
            other => other,
        })?;
    c.file = path.to_path_buf();
    Ok(c)
}

/// Read a CSV capture from `input`; `origin` names it in messages (the file's path).
pub fn parse<R: Read>(input: R, origin: &str, pick: &Pick) -> Result<Capture, Error> {
    let mut input = BufReader::new(input);
    let io = |source: std::io::Error| Error::Read {
        path: PathBuf::from(origin),
        source,
    };
    let bad = |line: u64, why: String| Error::BadInput(format!("{origin}:{line}: {why}"));

    // The lines before the header (comments, blank lines) and the header line itself, kept to be read again.
    let mut prelude = Vec::new();
    let mut header_line = Vec::new();
    let mut line_no = 0u64;
    loop {
        header_line.clear();
        let n = (&mut input)
            .take(MAX_HEADER_LINE)
            .read_until(b'\n', &mut header_line)
            .map_err(io)?;
        if n == 0 {
            return Err(Error::BadInput(format!(
                "{origin}: the file is empty; a CSV capture needs a header row naming its columns (time \
                 first, e.g. `time,CH1`) and rows of numbers under it"
            )));
        }
        line_no += 1;
        if n as u64 >= MAX_HEADER_LINE && !header_line.ends_with(b"\n") {
            return Err(bad(
                line_no,
                format!(
                    "the line is longer than {MAX_HEADER_LINE} bytes; this is not a CSV header row"
                ),
            ));
        }
        prelude.extend_from_slice(&header_line);
        let t = header_line.trim_ascii();
        if !(t.is_empty() || t.starts_with(b"#")) {
            break;
        }
    }
    let header_line_no = line_no;
    let delimiter = [b',', b';', b'\t']
        .into_iter()
        .find(|d| header_line.contains(d))
        .unwrap_or(b',');

    let mut rdr = csv::ReaderBuilder::new()
        .delimiter(delimiter)
        .has_headers(true)
        .flexible(true)
        .comment(Some(b'#'))
        .trim(csv::Trim::All)
        .from_reader(Cursor::new(prelude).chain(input));
    let csv_err = |e: csv::Error, line: u64| match e.into_kind() {
        csv::ErrorKind::Io(source) => io(source),
        other => bad(line, format!("not readable as CSV ({other:?})")),
    };
    let names: Vec<String> = rdr
        .byte_headers()
        .map_err(|e| csv_err(e, header_line_no))?
        .iter()
        .map(|h| String::from_utf8_lossy(h).trim().to_string())
        .collect();
    if names.len() < 2 {
        return Err(bad(
            header_line_no,
            format!(
                "the header row has {} column(s) (delimiter `{}`); a CSV capture needs a time column and at \
                 least one value column, e.g. `time,CH1`",
                names.len(),
                char::from(delimiter).escape_default()
            ),
        ));
    }
    if names[0].parse::<f64>().is_ok() {
        return Err(bad(
            header_line_no,
            format!(
                "the first row holds numbers (\"{}\"); a CSV capture needs a header row naming its columns \
                 first (time first, e.g. `time,CH1`): add one",
                clip(&names[0])
            ),
        ));
    }
    let time_scale_s = time_unit_scale(&names[0]).map_err(|why| bad(header_line_no, why))?;
    let col = choose_column(&names, pick).map_err(|why| bad(header_line_no, why))?;

    // Rows: the time and the chosen value, line numbers kept only where they jump (comments, quoted newlines).
    let mut times = Vec::new();
    let mut values = Vec::new();
    let mut jumps: Vec<(usize, u64)> = Vec::new(); // (row index, its line) where line != previous + 1
    let mut rec = csv::ByteRecord::new();
    let mut prev_line = header_line_no;
    loop {
        let more = rdr
            .read_byte_record(&mut rec)
            .map_err(|e| csv_err(e, prev_line + 1))?;
        if !more {
            break;
        }
        let line = rec.position().map_or(prev_line + 1, |p| p.line());
        if times.len() == MAX_ROWS {
            return Err(bad(
                line,
                format!(
                    "the file has more than {MAX_ROWS} rows of numbers; CSV captures are read whole into memory \
                     up to that many: export a shorter stretch, or convert the recording to WAV (read a stretch \
                     at a time, whatever its length)"
                ),
            ));
        }
        if line != prev_line + 1 || times.is_empty() {
            jumps.push((times.len(), line));
        }
        prev_line = line;
        if rec.len() <= col {
            return Err(bad(
                line,
                format!(
                    "the row has {} cell(s) but column {} (\"{}\") is read; every row must reach it",
                    rec.len(),
                    col + 1,
                    clip(&names[col])
                ),
            ));
        }
        let cell = |k: usize| -> Result<f64, Error> {
            let raw = String::from_utf8_lossy(&rec[k]);
            let text = raw.trim();
            match text.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(v),
                Ok(_) => Err(bad(
                    line,
                    format!(
                        "column {} (\"{}\"): \"{}\" is not a finite number; every cell read must be one",
                        k + 1,
                        clip(&names[k]),
                        clip(text)
                    ),
                )),
                Err(_) => {
                    let hint = if delimiter == b';' && text.contains(',') {
                        " (decimal commas are not read: export with decimal points)"
                    } else {
                        " (remove text, unit rows or empty cells below the header)"
                    };
                    Err(bad(
                        line,
                        format!(
                            "column {} (\"{}\"): \"{}\" is not a number{hint}",
                            k + 1,
                            clip(&names[k]),
                            clip(text)
                        ),
                    ))
                }
            }
        };
        times.push(cell(0)? * time_scale_s);
        values.push(cell(col)?);
    }
    let line_of = |i: usize| -> u64 {
        let k = jumps.partition_point(|&(r, _)| r <= i).saturating_sub(1);
        jumps.get(k).map_or(0, |&(r, l)| l + (i - r) as u64)
    };
    let n = times.len();
    if n < 2 {
        return Err(Error::BadInput(format!(
            "{origin}: the file has {n} row(s) of numbers under its header; a capture needs many samples"
        )));
    }
    // Uniform time: every step positive, then within STEP_TOLERANCE of the median step.
    for i in 1..n {
        if times[i] <= times[i - 1] {
            return Err(bad(
                line_of(i),
                format!(
                    "the time ({} s) does not increase from the row before ({} s); the time column must \
                     increase at every row",
                    times[i],
                    times[i - 1]
                ),
            ));
        }
    }
    let mean_step_s = (times[n - 1] - times[0]) / (n - 1) as f64;
    if !(mean_step_s.is_finite() && mean_step_s > 0.0) {
        return Err(Error::BadInput(format!(
            "{origin}: the time column spans {} s to {} s, which gives no usable sample period",
            times[0],
            times[n - 1]
        )));
    }
    // The reference step is the median one, so a single gap in a short record is the step named, not the
    // first of the good ones (which a gap pulls away from the mean).
    let mut steps: Vec<f64> = times.windows(2).map(|w| w[1] - w[0]).collect();
    let mid = steps.len() / 2;
    let median_step_s = *steps.select_nth_unstable_by(mid, f64::total_cmp).1;
    drop(steps);
    for i in 1..n {
        let step = times[i] - times[i - 1];
        if (step - median_step_s).abs() > STEP_TOLERANCE * median_step_s {
            return Err(bad(
                line_of(i),
                format!(
                    "the time steps by {step:.6e} s from the row before, but the typical (median) step is \
                     {median_step_s:.6e} s; the time column must be uniform within {:.0} % of its step (the \
                     sample rate is taken from it). Missing or repeated samples, or a change of rate, cannot be \
                     analysed as one record; times rounded on export need more digits",
                    STEP_TOLERANCE * 100.0
                ),
            ));
        }
    }
    Ok(Capture {
        file: PathBuf::from(origin),
        origin: Origin::Csv {
            column: names[col].clone(),
            column_number: col + 1,
            time_column: names[0].clone(),
        },
        sample_rate_hz: 1.0 / mean_step_s,
        t0_s: times[0],
        samples: values,
    })
}

/// Seconds per unit of the time column: 1 unless its header ends with a time unit in brackets, `(ms)` or
/// `[us]`. A unit there that is not a time is an error (the first column must be the time).
fn time_unit_scale(header: &str) -> Result<f64, String> {
    let h = header.trim_end();
    let unit = [('(', ')'), ('[', ']')]
        .into_iter()
        .find_map(|(open, close)| {
            h.strip_suffix(close)
                .and_then(|rest| rest.rfind(open).map(|i| rest[i + 1..].trim()))
        });
    match unit {
        None => Ok(1.0),
        Some(u) => parse_quantity(&format!("1 {u}"), Dimension::Time)
            .ok()
            .filter(|s| s.is_finite() && *s > 0.0)
            .ok_or_else(|| {
                format!(
                    "the first column is read as time, but its header \"{}\" names the unit \"{}\"; put the \
                     time column first (in seconds, or with its time unit in brackets, e.g. `time (ms)`)",
                    clip(header),
                    clip(u)
                )
            }),
    }
}

/// The index (from 0) of the value column `pick` names among `names` (column 0 is the time).
fn choose_column(names: &[String], pick: &Pick) -> Result<usize, String> {
    let values: Vec<usize> = (1..names.len()).filter(|&k| !names[k].is_empty()).collect();
    let listed = || {
        values
            .iter()
            .map(|&k| format!("{} \"{}\"", k + 1, clip(&names[k])))
            .collect::<Vec<_>>()
            .join(", ")
    };
    match pick {
        Pick::Only => match values.as_slice() {
            [k] => Ok(*k),
            [] => Err("the header names no value column after the time column".into()),
            _ => Err(format!(
                "the file has {} value columns ({}); choose one with --column NAME or --column N",
                values.len(),
                listed()
            )),
        },
        Pick::Channel(c) => Err(format!(
            "--channel {c} is for WAV files; choose a CSV column with --column NAME or --column N"
        )),
        Pick::Column(want) => {
            let w = want.trim();
            if let Some(k) = (1..names.len()).find(|&k| names[k] == w) {
                return Ok(k);
            }
            if let Some(k) = (1..names.len()).find(|&k| names[k].eq_ignore_ascii_case(w)) {
                return Ok(k);
            }
            if names[0] == w || names[0].eq_ignore_ascii_case(w) {
                return Err(format!(
                    "--column {}: that is the time column (column 1); choose a value column: {}",
                    clip(w),
                    listed()
                ));
            }
            match w.parse::<usize>() {
                Ok(1) => Err(format!(
                    "--column 1 is the time column; columns count from 1 with the time first, so the first \
                     value column is 2. Value columns: {}",
                    listed()
                )),
                Ok(k) if k >= 2 && k <= names.len() => Ok(k - 1),
                Ok(k) => Err(format!(
                    "--column {k}: the file has {} columns; value columns: {}",
                    names.len(),
                    listed()
                )),
                Err(_) => Err(format!(
                    "--column {}: no column has that name; value columns: {}",
                    clip(w),
                    listed()
                )),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse_str(text: &str, pick: &Pick) -> Result<Capture, Error> {
        parse(text.as_bytes(), "cap.csv", pick)
    }

    fn col(s: &str) -> Pick {
        Pick::Column(s.into())
    }

    #[test]
    fn a_scope_export_reads_with_its_rate_and_start() {
        let c = parse_str(
            "# scope\n\ntime,CH1\n-1e-3,0.5\n-0.999e-3,0.25\n-0.998e-3,-1\n",
            &Pick::Only,
        )
        .unwrap();
        assert_eq!(c.samples, vec![0.5, 0.25, -1.0]);
        assert!(
            (c.sample_rate_hz - 1e6).abs() < 1e-3,
            "{}",
            c.sample_rate_hz
        );
        assert_eq!(c.t0_s, -1e-3);
        assert_eq!(
            c.origin,
            Origin::Csv {
                column: "CH1".into(),
                column_number: 2,
                time_column: "time".into()
            }
        );
    }

    #[test]
    fn columns_are_chosen_by_name_or_by_number() {
        let text = "Time (ms);A;B\n0;1;10\n1;2;20\n2;3;30\n";
        let by_name = parse_str(text, &col("b")).unwrap();
        assert_eq!(by_name.samples, vec![10.0, 20.0, 30.0]);
        // The time column in milliseconds: 1 kHz.
        assert!((by_name.sample_rate_hz - 1000.0).abs() < 1e-9);
        let by_number = parse_str(text, &col("2")).unwrap();
        assert_eq!(by_number.samples, vec![1.0, 2.0, 3.0]);
        let e = parse_str(text, &col("1")).unwrap_err().to_string();
        assert!(e.contains("time column"), "{e}");
        let e = parse_str(text, &col("4")).unwrap_err().to_string();
        assert!(e.contains("has 3 columns"), "{e}");
        let e = parse_str(text, &Pick::Only).unwrap_err().to_string();
        assert!(
            e.contains("2 value columns") && e.contains("3 \"B\""),
            "{e}"
        );
        // A header that reads as a number is a name first.
        let c = parse_str("x-axis,1,2\n0,5,6\n1,7,8\n", &col("2")).unwrap();
        assert_eq!(c.samples, vec![6.0, 8.0]);
    }

    #[test]
    fn a_missing_sample_is_refused_naming_its_line() {
        let mut text = String::from("t,v\n");
        for i in 0..20 {
            if i != 11 {
                text.push_str(&format!("{},{}\n", i as f64 * 1e-3, i));
            }
        }
        // Row i = 12 is on line 13 of the file (header on line 1, rows from line 2, row 11 missing).
        let e = parse_str(&text, &Pick::Only).unwrap_err().to_string();
        assert!(e.starts_with("cap.csv:13: the time steps by 2.0"), "{e}");
    }

    #[test]
    fn bad_cells_name_their_line_and_column() {
        let e = parse_str("t,v\n0,1\n1,abc\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("cap.csv:3: column 2 (\"v\"): \"abc\" is not a number"),
            "{e}"
        );
        let e = parse_str("t,v\n0,1\n1,NaN\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(e.contains("not a finite number"), "{e}");
        let e = parse_str("t,v\n0,1\n1\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("cap.csv:3: the row has 1 cell"), "{e}");
        let e = parse_str("t,v\n0,1\n0,2\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("cap.csv:3: the time") && e.contains("does not increase"),
            "{e}"
        );
        let e = parse_str("0,1\n1,2\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(e.contains("header row"), "{e}");
        let e = parse_str("", &Pick::Only).unwrap_err().to_string();
        assert!(e.contains("empty"), "{e}");
        let e = parse_str("t;v\n0;1,5\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(e.contains("decimal commas"), "{e}");
        let e = parse_str("volts (V),x\n0,1\n1,2\n", &Pick::Only)
            .unwrap_err()
            .to_string();
        assert!(e.contains("names the unit \"V\""), "{e}");
    }
}
