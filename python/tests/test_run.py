"""convchain.run against `convchain run` on the same scenario (the CLI is the reference: same engine, same
report builder; these tests check that the module adds and loses nothing)."""

import csv
import json

import numpy as np
import pytest

import convchain


@pytest.fixture(scope="module")
def cli_run(cli, scenario, tmp_path_factory):
    out = tmp_path_factory.mktemp("run")
    cli("run", scenario, "--out", out, "--full", "--no-plots", "--quiet")
    return out


@pytest.fixture(scope="module")
def py_run(scenario):
    return convchain.run(scenario)


def test_report_equals_cli_report_json(cli_run, py_run):
    with open(cli_run / "report.json") as f:
        expected = json.load(f)
    # Exact equality: both sides are serde_json's shortest round-trip form of the same f64 values.
    assert py_run.report == expected


def test_waveforms_equal_csv_within_printed_precision(cli_run, py_run):
    with open(cli_run / "waveforms.csv") as f:
        reader = csv.reader(f)
        header = next(reader)
        rows = np.array([[float(x) for x in r] for r in reader])
    assert header == list(py_run.waveforms)
    for j, name in enumerate(header):
        got = np.asarray(py_run.waveforms[name], dtype=float)
        assert got.shape == rows[:, j].shape, name
        # waveforms.csv prints ten significant digits ({:.9e}, src/format/sci.rs): the printed value is within
        # half a unit of the 10th digit, at most 5e-10 of the value.
        np.testing.assert_allclose(got, rows[:, j], rtol=5.0001e-10, atol=0, err_msg=name)


def test_npy_is_the_waveforms_bit_for_bit(cli_run, py_run):
    # waveforms.npy (NumPy format 1.0, one structured array) loads without pickles and holds the same f64 and
    # u32 values as the module's waveforms (both every grid sample here: --full).
    a = np.load(cli_run / "waveforms.npy", allow_pickle=False)
    assert a.ndim == 1
    assert list(a.dtype.names) == list(py_run.waveforms)
    for name in a.dtype.names:
        want = np.asarray(py_run.waveforms[name])
        assert a[name].dtype == (np.uint32 if want.dtype == np.uint32 else np.float64), name
        np.testing.assert_array_equal(a[name], want, err_msg=name)


def test_codes_are_the_adc_record(py_run):
    adc = py_run.report["adc"]
    assert py_run.codes.dtype == np.uint32
    assert len(py_run.codes) == adc["record_length"]
    assert int(py_run.codes.max()) < 2 ** adc["bits"]


def test_overrides_and_seed_change_the_run(scenario):
    r = convchain.run(scenario, overrides={"source.amplitude": 0.1}, seed=7, wav=False)
    assert "listening" not in r.report or r.report["listening"] is None
    assert abs(r.report["adc"]["amplitude_v"] - 0.1) < 0.01


def test_bad_scenario_raises_the_located_message(cli, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "bad"\n[source]\nwaveform = "sine"\nfrequency = "one kilohertz"\n')
    with pytest.raises(convchain.ScenarioError) as e:
        convchain.run(bad)
    assert e.value.exit_code == 2
    msg = str(e.value)
    cli_out = cli("run", bad, "--out", tmp_path / "o", check=False)
    assert cli_out.returncode == 2
    # The CLI prints the same located message (file and line) that the exception carries.
    assert msg.splitlines()[0] in cli_out.stderr
    assert str(bad) in msg


def test_point_is_a_sweep_row(cli, scenario, tmp_path):
    out = tmp_path / "sw"
    cli("sweep", scenario, "--vary", "source.amplitude=0.2..0.2", "--points", "1", "--out", out, "--quiet")
    with open(out / "sweep.csv") as f:
        row = next(csv.DictReader(f))
    p = convchain.point(scenario, {"source.amplitude": 0.2})
    assert p["error"] is None
    for name in convchain.METRIC_COLUMNS:
        if row.get(name, "") != "":
            assert p[name] == pytest.approx(float(row[name]), rel=1e-8), name
