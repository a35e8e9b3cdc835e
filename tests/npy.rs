//! waveforms.npy against waveforms.csv: the same rows, the same columns, the same values within the CSV's
//! printed precision; and `--npy-full-rate` writes every grid step.

mod common;

use std::path::Path;

use common::{ok, run_in};

/// A hop with its ADC and DAC code columns on a 1 MHz grid, 12 ms: about 12 000 grid steps.
const CHAIN: &str = r#"
name = "npy-chain"
description = "short chain for the binary waveform file"
[simulation]
analog_rate = "1 MHz"
duration = "12 ms"
settle = "2 ms"
seed = 4
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "2 V"
offset = "2.5 V"
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "5 V"]
sample_rate = "50 kHz"
conversion_time = "12 us"
[[stage]]
kind = "dac"
range = ["0 V", "5 V"]
[[stage]]
kind = "filter"
order = 2
cutoff = "10 kHz"
[analysis]
band = "10 kHz"
"#;

/// A field of the structured array: name, type string, offset in the row.
struct Field {
    name: String,
    dtype: String,
    offset: usize,
}

/// Reads a version 1.0 .npy file holding a one-dimensional structured array of `<f8` and `<u4` fields, as
/// the NumPy format description (NEP 1, the numpy.lib.format documentation) lays it out: the fields, the row
/// count and the data.
fn read_npy(path: &Path) -> (Vec<Field>, usize, Vec<u8>) {
    let b = std::fs::read(path).unwrap();
    assert_eq!(&b[..8], b"\x93NUMPY\x01\x00");
    let hl = u16::from_le_bytes([b[8], b[9]]) as usize;
    assert_eq!((10 + hl) % 64, 0);
    let head = std::str::from_utf8(&b[10..10 + hl]).unwrap();
    assert!(head.ends_with('\n'));
    assert!(head.contains("'fortran_order': False"), "{head}");
    let descr = &head[head.find("'descr': [").unwrap() + 10..head.find("]").unwrap()];
    let mut fields = Vec::new();
    let mut offset = 0;
    for item in descr.split("), ") {
        let parts: Vec<&str> = item
            .trim_matches(|c| c == '(' || c == ')')
            .split(", ")
            .map(|p| p.trim_matches('\''))
            .collect();
        let size = match parts[1] {
            "<f8" => 8,
            "<u4" => 4,
            other => panic!("unexpected type {other}"),
        };
        fields.push(Field {
            name: parts[0].to_string(),
            dtype: parts[1].to_string(),
            offset,
        });
        offset += size;
    }
    let shape = &head[head.find("'shape': (").unwrap() + 10..];
    let rows: usize = shape[..shape.find(",)").unwrap()].parse().unwrap();
    let data = b[10 + hl..].to_vec();
    assert_eq!(data.len(), rows * offset, "data length against shape");
    (fields, rows, data)
}

fn value(f: &Field, row: &[u8]) -> f64 {
    match f.dtype.as_str() {
        "<f8" => f64::from_le_bytes(row[f.offset..f.offset + 8].try_into().unwrap()),
        _ => f64::from(u32::from_le_bytes(
            row[f.offset..f.offset + 4].try_into().unwrap(),
        )),
    }
}

#[test]
fn the_npy_holds_the_csv_rows_within_their_printed_precision() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("c.toml"), CHAIN).unwrap();
    ok(&run_in(
        d.path(),
        &[
            "run",
            "c.toml",
            "--out",
            "r",
            "-q",
            "--no-wav",
            "--no-plots",
        ],
    ));
    let (header, rows) = common::csv_rows(&d.path().join("r/waveforms.csv"));
    let (fields, n, data) = read_npy(&d.path().join("r/waveforms.npy"));
    let names: Vec<&str> = fields.iter().map(|f| f.name.as_str()).collect();
    assert_eq!(names, header, "the fields are the CSV's columns in order");
    assert!(fields.iter().any(|f| f.dtype == "<u4"), "code columns");
    assert_eq!(n, rows.len());
    // The default rows: 10 per period of the 50 kHz ADC on the 1 MHz grid, every 2nd grid step (the run
    // lengthened to place the tone coherently: 26.32 ms, 26 320 steps).
    assert_eq!(n, 13_160, "{n} rows");
    let t_last: f64 = rows[n - 1][0].parse().unwrap();
    assert!(
        (t_last - 2.0 * (n - 1) as f64 * 1e-6).abs() < 1e-12,
        "{t_last}"
    );
    let width = data.len() / n;
    for (r, cells) in rows.iter().enumerate() {
        let row = &data[r * width..(r + 1) * width];
        for (f, cell) in fields.iter().zip(cells) {
            let want: f64 = cell.parse().unwrap();
            let got = value(f, row);
            // The CSV prints 10 significant digits (format::sci::push_e9): half a unit of the last one.
            let tol = 0.5e-9 * want.abs().max(f64::MIN_POSITIVE) * 10.0;
            assert!(
                (got - want).abs() <= tol,
                "row {r}, {}: npy {got} against csv {cell}",
                f.name
            );
        }
    }
}

#[test]
fn full_rate_writes_every_grid_step_and_keeps_the_csv() {
    // 1.1 s on a 1 MHz grid: 1.1e6 steps; the ADC at 30 kHz (33 1/3 steps a period) so that its codes change
    // at steps between the default rows too. The default rows: 10 per ADC period, floor(1e6 / 300e3) = every
    // 3rd step (366 667 rows, under the 1e6-row cap that alone would keep every 2nd).
    let d = tempfile::tempdir().unwrap();
    std::fs::write(
        d.path().join("c.toml"),
        CHAIN
            .replace("duration = \"12 ms\"", "duration = \"1.1 s\"")
            .replace("sample_rate = \"50 kHz\"", "sample_rate = \"30 kHz\""),
    )
    .unwrap();
    let quiet = ["-q", "--no-wav", "--no-plots"];
    ok(&run_in(
        d.path(),
        &[&["run", "c.toml", "--out", "a"][..], &quiet].concat(),
    ));
    ok(&run_in(
        d.path(),
        &[
            &["run", "c.toml", "--out", "b", "--npy-full-rate"][..],
            &quiet,
        ]
        .concat(),
    ));
    let csv_a = std::fs::read(d.path().join("a/waveforms.csv")).unwrap();
    let csv_b = std::fs::read(d.path().join("b/waveforms.csv")).unwrap();
    assert!(csv_a == csv_b, "--npy-full-rate leaves the CSV alone");
    let (fields, n_full, full) = read_npy(&d.path().join("b/waveforms.npy"));
    let (_, n, thin) = read_npy(&d.path().join("a/waveforms.npy"));
    assert_eq!(n_full, 1_100_000);
    assert_eq!(n, 366_667);
    let width = full.len() / n_full;
    for r in (0..n).step_by(997) {
        assert_eq!(
            thin[r * width..(r + 1) * width],
            full[3 * r * width..(3 * r + 1) * width],
            "row {r}"
        );
    }
    let t = |r: usize| value(&fields[0], &full[r * width..]);
    assert_eq!(t(0), 0.0);
    assert_eq!(t(1_099_999), 1_099_999.0 / 1e6);
    // Code columns between the thinned rows are filled too (the engine fills every row at full rate).
    let adc = fields.iter().find(|f| f.dtype == "<u4").unwrap();
    let between = (1..n_full)
        .filter(|&r| r % 3 != 0)
        .filter(|&r| value(adc, &full[r * width..]) != value(adc, &full[(r - 1) * width..]))
        .count();
    assert!(
        between > 100,
        "{between} code changes between the default rows"
    );
}
