"""A Monte-Carlo study's runs mapped over a Dask cluster, written as the folder `convchain montecarlo` writes
(rows.json, montecarlo.csv, montecarlo.json, histograms), which `convchain merge` and the study's plots work on.

    python examples/dask_montecarlo.py                      # a LocalCluster on this machine
    python examples/dask_montecarlo.py tcp://scheduler:8786 # the same code against a running scheduler

Needs `pip install ./python dask distributed`. The workers need the convchain module; they get the scenario's
TOML text, so they need no copy of the file. The folder equals the one of
`convchain montecarlo scenarios/river-gauge.toml --runs 100 --require "output.enob_bits>=7.5"`.
"""

import sys
import time
from pathlib import Path

from distributed import Client, LocalCluster

import convchain

SCENARIO = "scenarios/river-gauge.toml"
RUNS = 100
REQUIRE = ["output.enob_bits>=7.5"]


def main():
    if len(sys.argv) > 1:
        client = Client(sys.argv[1])
    else:
        client = Client(LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None))
    text = Path(SCENARIO).read_text()
    # Checks the study (runs, requirements, the nominal scenario) here, before anything is sent out.
    runs = convchain.montecarlo_runs(SCENARIO, runs=RUNS, require=REQUIRE)
    t0 = time.time()
    futures = client.map(convchain.montecarlo_run, [text] * len(runs), [i for i, _ in runs])
    rows = client.gather(futures)
    print(f"{len(rows)} runs on {len(client.scheduler_info()['workers'])} workers in {time.time() - t0:.1f} s")
    summary = convchain.write_montecarlo(SCENARIO, rows, "out/dask-montecarlo", runs=RUNS, require=REQUIRE,
                                         force=True)
    for m in summary["metrics"]:
        if m["name"] in ("output.enob_bits", "static.dac.dnl_max_lsb"):
            print(f"{m['name']:24s} 5 % {m['p5']:.4f}  median {m['median']:.4f}  95 % {m['p95']:.4f}")
    for y in summary["yield"]:
        print(f"yield {y['require']}: {y['passed']} of {y['runs']}")
    client.close()


if __name__ == "__main__":
    main()
