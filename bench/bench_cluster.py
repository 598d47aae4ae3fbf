"""Sweep throughput on a Dask cluster of processes: 1 and 2 workers, and the cost of a chunk.

Usage: python bench/bench_cluster.py [--plants 2000] [--duration 2] [--chunk 250]
       [--config configs/pedestal-sim.toml]

Baseline, measured in the same run: the same plants through `runtime.offline.cluster` with no
cluster (the chunks one after another in this process, one numba thread: what one worker
does). Then `--cluster local:1` and `local:2` (LocalCluster of worker processes, one
numba thread each), each after a warm-up sweep so the workers have loaded the compiled
kernels. Printed: plant-steps/s, the ratio to the baseline, and the per-chunk overhead:
many one-plant, one-tick chunks, wall per chunk on the cluster minus wall per chunk here
(scheduling, pickling the plants and the config, the round trip). On this 2-core shared
machine two workers cannot give more than two cores; what else runs shows in the
figures. Prints figures only.
"""

from __future__ import annotations

import argparse
import time

import numba
import numpy as np

from runtime.config import load_config
from runtime.offline.cluster import open_client, run_sweep_chunked


def rate(cfg, client, plants, duration, chunk):
    t0 = time.perf_counter()
    out = run_sweep_chunked(cfg, client, plants=plants, duration=duration, chunk=chunk)
    wall = time.perf_counter() - t0
    return plants * out.summary["ticks"] / wall, out


def per_chunk(cfg, client, chunks):
    Ts = cfg.number("loop.period")
    t0 = time.perf_counter()
    run_sweep_chunked(cfg, client, plants=chunks, duration=Ts, chunk=1)
    return (time.perf_counter() - t0) / chunks


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--config", default="configs/pedestal-sim.toml")
    p.add_argument("--plants", type=int, default=2000)
    p.add_argument("--duration", type=float, default=2.0)
    p.add_argument("--chunk", type=int, default=250)
    p.add_argument("--overhead-chunks", type=int, default=200)
    a = p.parse_args()
    cfg = load_config(a.config)
    numba.set_num_threads(1)
    rate(cfg, None, 8, 0.05, 4)  # compile / load the kernel here
    base, ref = rate(cfg, None, a.plants, a.duration, a.chunk)
    here_chunk = per_chunk(cfg, None, a.overhead_chunks)
    print(f"{a.plants} plants x {ref.summary['ticks']} ticks, chunks of {a.chunk}")
    print(f"  here, 1 thread      {base / 1e6:7.3f} M plant-steps/s   1.00 x")
    for n in (1, 2):
        with open_client(f"local:{n}") as client:
            rate(cfg, client, 4 * n, 0.05, 2)  # warm-up: every worker loads the kernels
            r, out = rate(cfg, client, a.plants, a.duration, a.chunk)
            same = all(np.array_equal(out.per_plant[k], ref.per_plant[k],
                                      equal_nan=out.per_plant[k].dtype.kind == "f")
                       for k in ref.per_plant)
            c = per_chunk(cfg, client, a.overhead_chunks)
            print(f"  local:{n} workers     {r / 1e6:7.3f} M plant-steps/s   {r / base:4.2f} x"
                  f"   per-chunk overhead {1e3 * (c - here_chunk):6.2f} ms"
                  f"   results identical: {same}")


if __name__ == "__main__":
    main()
