"""A sweep's points mapped over a Dask LocalCluster (2 workers) give `convchain sweep`'s numbers, and the rows
written from Python merge with `convchain merge` like the CLI's shards."""

import json

import pytest

import convchain

pytest.importorskip("distributed")

VARY_20 = "source.amplitude=0.05..0.9"


@pytest.fixture(scope="module")
def cli_sweep(cli, scenario, tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep")
    cli("sweep", scenario, "--vary", VARY_20, "--points", 20, "--out", out, "--quiet")
    return out


def test_dask_sweep_equals_cli_sweep_csv(client, scenario, cli_sweep, tmp_path):
    pts = convchain.sweep_points(VARY_20, 20)
    assert len(pts) == 20
    futures = client.map(convchain.point, [str(scenario)] * len(pts), [ov for _, ov in pts])
    results = client.gather(futures)
    out = tmp_path / "py-sweep"
    convchain.write_sweep(scenario, VARY_20, 20, [(i, r) for (i, _), r in zip(pts, results)], out)
    # The same rows give the same bytes (src/study/sweep/output.rs write_outputs).
    assert (out / "sweep.csv").read_bytes() == (cli_sweep / "sweep.csv").read_bytes()
    assert json.loads((out / "rows.json").read_text()) == json.loads((cli_sweep / "rows.json").read_text())


def test_rows_written_from_python_merge(client, cli, scenario, cli_sweep, tmp_path):
    pts = convchain.sweep_points(VARY_20, 20)
    shards = []
    for k in (1, 2):
        mine = [(i, ov) for i, ov in pts if i % 2 == k - 1]
        res = client.gather(client.map(convchain.point, [str(scenario)] * len(mine), [ov for _, ov in mine]))
        d = tmp_path / f"shard-{k}"
        convchain.write_sweep(scenario, VARY_20, 20, [(i, r) for (i, _), r in zip(mine, res)], d, shard=f"{k}/2")
        shards.append(d)
    merged = tmp_path / "merged"
    cli("merge", *shards, "--out", merged, "--quiet")
    assert (merged / "sweep.csv").read_bytes() == (cli_sweep / "sweep.csv").read_bytes()
