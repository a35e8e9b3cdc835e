"""A sweep's points mapped over a Dask cluster, written as a sweep folder that `convchain merge` and the
sweep's plots work on.

    python examples/dask_sweep.py                      # a LocalCluster on this machine
    python examples/dask_sweep.py tcp://scheduler:8786 # the same code against a running scheduler

Needs `pip install ./python dask distributed`. The workers need the convchain module and the scenario file
at the same path (or pass the scenario's TOML text instead of its path).
"""

import sys
import time

from distributed import Client, LocalCluster

import convchain

SCENARIO = "scenarios/studio-interface.toml"
VARY = ["source.frequency=100 Hz..15 kHz"]
POINTS = 20


def main():
    if len(sys.argv) > 1:
        client = Client(sys.argv[1])
    else:
        client = Client(LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None))
    pts = convchain.sweep_points(VARY, POINTS, log=True)
    t0 = time.time()
    futures = client.map(convchain.point, [SCENARIO] * len(pts), [ov for _, ov in pts])
    results = client.gather(futures)
    print(f"{len(pts)} points on {len(client.scheduler_info()['workers'])} workers in {time.time() - t0:.1f} s")
    convchain.write_sweep(SCENARIO, VARY, POINTS, [(i, r) for (i, _), r in zip(pts, results)],
                          "out/dask-sweep", log=True, force=True)
    for (i, ov), r in zip(pts, results):
        print(f"{ov['source.frequency']:10.1f} Hz  output SINAD {r['output.sinad_db']:6.2f} dB")
    client.close()


if __name__ == "__main__":
    main()
