"""Shared fixtures: the CLI binary built from the same sources (CONVCHAIN_BIN, else ../target/release)."""

import os
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SCENARIO = ROOT / "scenarios" / "studio-interface.toml"


@pytest.fixture(scope="session")
def cli():
    exe = Path(os.environ.get("CONVCHAIN_BIN", ROOT / "target" / "release" / "convchain"))
    if not exe.is_file():
        pytest.fail(f"{exe} not found: build it with `cargo build --release` or set CONVCHAIN_BIN")

    def call(*args, check=True):
        return subprocess.run([str(exe), *map(str, args)], capture_output=True, text=True, check=check)

    return call


@pytest.fixture(scope="session")
def scenario():
    return SCENARIO


@pytest.fixture(scope="session")
def client():
    """A Dask LocalCluster of 2 worker processes (one thread each), shared by the tests that map over it."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as c:
            yield c
