"""A Monte-Carlo study's runs mapped over a Dask LocalCluster (2 workers) give the rows of `convchain montecarlo`
on one machine, and the folders written from Python merge with `convchain merge` like the CLI's shards.

The CLI is the reference here (same engine; these tests check that computing the runs one by one on other
processes, in any order, and writing them from Python adds and loses nothing)."""

import json

import pytest

import convchain

pytest.importorskip("distributed")

RUNS = 20
SEED = 7
REQUIRE = ["output.enob_bits>=8.5"]

# An invented small chain (about 20 ms simulated per run) with three spread values beside the seeded ones
# (comparator noise, ladder tolerance), so every run differs.
SMALL = """name = "small-mc"
[simulation]
analog_rate = "400 kHz"
duration = "24 ms"
settle = "4 ms"
seed = 3
[source]
waveform = "sine"
frequency = "1 kHz"
amplitude = "1 V"
offset = "1.25 V"
[[stage]]
kind = "amplifier"
gain = 1
offset = 0
[[stage]]
kind = "sar_adc"
bits = 8
range = ["0 V", "2.5 V"]
clock = "1 MHz"
sample_rate = "40 kHz"
comparator_noise = "1 mV"
[[stage]]
kind = "dac"
ladder = "r2r"
tolerance = "1%"
[[stage]]
kind = "filter"
family = "bessel"
order = 2
cutoff = "8 kHz"
[analysis]
band = "5 kHz"
[spread]
"stage.1.gain" = { uniform = "2%" }
"stage.1.offset" = "5 mV"
"stage.4.cutoff" = "5%"
"""


@pytest.fixture(scope="module")
def mc_file(tmp_path_factory):
    f = tmp_path_factory.mktemp("scenario") / "small-mc.toml"
    f.write_text(SMALL)
    return f


@pytest.fixture(scope="module")
def cli_mc(cli, mc_file, tmp_path_factory):
    out = tmp_path_factory.mktemp("mc") / "cli"
    args = ["montecarlo", mc_file, "--runs", RUNS, "--seed", SEED, "--out", out, "--quiet"]
    for r in REQUIRE:
        args += ["--require", r]
    cli(*args)
    return out


@pytest.fixture(scope="module")
def dask_rows(client, mc_file):
    runs = convchain.montecarlo_runs(mc_file, runs=RUNS, seed=SEED, require=REQUIRE)
    # The workers get the scenario's TOML text, so they need no shared file system.
    futures = client.map(convchain.montecarlo_run, [SMALL] * len(runs), [i for i, _ in runs], seed=SEED)
    return runs, client.gather(futures)


def test_dask_montecarlo_rows_equal_cli_rows(cli_mc, dask_rows):
    runs, rows = dask_rows
    cli_rows = json.loads((cli_mc / "rows.json").read_text())
    assert [i for i, _ in runs] == list(range(RUNS))
    assert [s for _, s in runs] == [r[1] for r in cli_rows["rows"]]
    for row, expected in zip(rows, cli_rows["rows"]):
        assert list(row) == cli_rows["columns"]
        # Exact equality: rows.json holds serde_json's shortest round-trip form of the same f64 values.
        assert list(row.values()) == expected, row["index"]
    # The study does vary: the drawn gain and the output ENOB take 20 different values.
    assert len({r["stage.1.gain"] for r in rows}) == RUNS
    assert len({r["output.enob_bits"] for r in rows}) == RUNS


def test_write_montecarlo_gives_the_cli_files(cli_mc, dask_rows, mc_file, tmp_path):
    _, rows = dask_rows
    out = tmp_path / "py-mc"
    summary = convchain.write_montecarlo(mc_file, reversed(rows), out, runs=RUNS, seed=SEED, require=REQUIRE)
    # The same rows give the same bytes (src/study/montecarlo/summary.rs write_outputs).
    for f in ("rows.json", "montecarlo.csv", "montecarlo.json"):
        assert (out / f).read_bytes() == (cli_mc / f).read_bytes(), f
    assert summary == json.loads((cli_mc / "montecarlo.json").read_text())
    assert sorted(p.name for p in out.glob("hist-*.png")) == sorted(p.name for p in cli_mc.glob("hist-*.png"))


def test_shards_written_from_python_merge(cli, cli_mc, dask_rows, mc_file, tmp_path):
    _, rows = dask_rows
    shards = []
    for k in (1, 2):
        mine = [i for i, _ in convchain.montecarlo_runs(mc_file, runs=RUNS, seed=SEED, shard=f"{k}/2")]
        d = tmp_path / f"shard-{k}"
        convchain.write_montecarlo(mc_file, [rows[i] for i in mine], d, runs=RUNS, seed=SEED, require=REQUIRE,
                                   shard=f"{k}/2")
        shards.append(d)
    merged = tmp_path / "merged"
    cli("merge", *shards, "--out", merged, "--quiet")
    for f in ("rows.json", "montecarlo.csv", "montecarlo.json"):
        assert (merged / f).read_bytes() == (cli_mc / f).read_bytes(), f


def test_wrong_rows_are_refused(dask_rows, mc_file, tmp_path):
    _, rows = dask_rows
    with pytest.raises(convchain.ScenarioError, match="run 19 is missing"):
        convchain.write_montecarlo(mc_file, rows[:-1], tmp_path / "a", runs=RUNS, seed=SEED)
    # Rows of base seed 7 are not the runs of a study with base seed 8.
    with pytest.raises(convchain.ScenarioError, match="run 0 has seed"):
        convchain.write_montecarlo(mc_file, rows, tmp_path / "b", runs=RUNS, seed=SEED + 1)
    with pytest.raises(convchain.ScenarioError, match="no `output.enob_bits`"):
        convchain.write_montecarlo(mc_file, [{k: v for k, v in r.items() if k != "output.enob_bits"} for r in rows],
                                   tmp_path / "c", runs=RUNS, seed=SEED)
    with pytest.raises(convchain.ScenarioError, match="--runs 0"):
        convchain.montecarlo_runs(mc_file, runs=0)
    with pytest.raises(convchain.ScenarioError, match="unknown metric"):
        convchain.montecarlo_runs(mc_file, runs=RUNS, require=["output.enob>=3"])


def test_audio_and_static_options_reach_the_rows(cli, mc_file, tmp_path):
    # `--audio --no-static` against audio_band_hz=(20 Hz, 20 kHz) (the CLI's default band) and no_static=True.
    out = tmp_path / "cli-audio"
    cli("montecarlo", mc_file, "--runs", 2, "--seed", SEED, "--audio", "--no-static", "--out", out, "--quiet")
    expected = json.loads((out / "rows.json").read_text())
    opts = dict(seed=SEED, no_static=True, audio_band_hz=(20.0, 20000.0))
    rows = [convchain.montecarlo_run(SMALL, i, **opts) for i in (1, 0)]
    assert list(rows[0]) == expected["columns"]
    assert any(c.startswith("audio.") for c in expected["columns"])
    assert [list(r.values()) for r in reversed(rows)] == expected["rows"]
    py = tmp_path / "py-audio"
    convchain.write_montecarlo(mc_file, rows, py, runs=2, **opts)
    assert (py / "rows.json").read_bytes() == (out / "rows.json").read_bytes()
    with pytest.raises(convchain.ScenarioError, match="index 1099511627776"):
        convchain.montecarlo_run(SMALL, 2 ** 40)
