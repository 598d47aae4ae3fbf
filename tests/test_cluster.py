"""Sweeps on a Dask cluster of processes: the same plants give the same results as the local
run; a killed worker's chunks run again; an interrupted sweep resumes from its partial file.

Reference for "the same": the local sweep (`runtime.offline.sweep.run_sweep`), itself held to the
single-plant dry run and the numpy reference in tests/test_sweep.py. The re-run of a lost
worker's tasks is the Dask scheduler's documented behaviour (tasks in memory or processing on
a worker that leaves are rescheduled); here it is exercised by killing a worker process.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys

import numpy as np
import pytest

from runtime.config import load_config
from runtime.offline.sweep import run_sweep

distributed = pytest.importorskip("distributed")

from runtime.offline.cluster import (  # noqa: E402
    ClusterError,
    PartialFile,
    open_client,
    parse_cluster,
    run_sweep_chunked,
)

DEMO = "configs/pedestal-sim.toml"
PLANTS, SEED, DURATION = 240, 5, 1.0
# a gain high enough that some plants trip, so outcomes differ between plants
SETTINGS = ["adaptation.gamma=40"]


@pytest.fixture(scope="module")
def cfg():
    return load_config(DEMO, SETTINGS)  # sensor noise on: each plant's own stream


@pytest.fixture(scope="module")
def local(cfg):
    return run_sweep(cfg, plants=PLANTS, seed=SEED, duration=DURATION, workers=1,
                     engine="compiled")


@pytest.fixture(scope="module")
def client():
    with open_client("local:2") as c:
        yield c


def same_plants(a, b):
    for key in a.per_plant:
        np.testing.assert_array_equal(a.per_plant[key], b.per_plant[key], err_msg=key)
    for key, value in a.summary.items():
        if key in ("wall_seconds", "plant_steps_per_second", "workers", "chunk",
                   "compile_seconds", "cluster", "engine"):
            continue
        assert b.summary[key] == value, key


def test_a_cluster_of_processes_gives_the_local_results(cfg, local, client):
    seen = []
    assert len(client.scheduler_info()["workers"]) == 2
    out = run_sweep_chunked(cfg, client, plants=PLANTS, seed=SEED, duration=DURATION,
                            chunk=40, progress=lambda d, n: seen.append(d))
    same_plants(local, out)
    assert out.summary["cluster"]["workers"] == 2 and out.summary["cluster"]["chunks"] == 6
    # progress as chunks finish: from 0, one step per chunk, ending at every plant
    assert seen[0] == 0 and seen[-1] == PLANTS and len(seen) == 7
    assert sorted(seen) == seen


def test_a_worker_killed_mid_sweep_has_its_chunks_run_again(cfg, local, client):
    killed = []

    def kill_one(done, total):
        if killed or done == 0:
            return
        busy = {addr for addr, keys in client.processing().items() if keys}
        pids = client.run(os.getpid)
        addr = sorted(busy)[0] if busy else sorted(pids)[0]
        os.kill(pids[addr], signal.SIGKILL)
        killed.append((addr, bool(busy)))

    out = run_sweep_chunked(cfg, client, plants=PLANTS, seed=SEED, duration=DURATION,
                            chunk=20, progress=kill_one)
    assert killed and killed[0][1], "no worker was killed while it had chunks to run"
    same_plants(local, out)


def test_an_interrupted_sweep_resumes_from_its_partial_file(cfg, local, tmp_path):
    part = tmp_path / "sweep.partial.jsonl"
    first = run_sweep_chunked(cfg, None, plants=PLANTS, seed=SEED, duration=DURATION,
                              chunk=60, partial=part)
    same_plants(local, first)
    lines = part.read_text().splitlines()
    assert len(lines) == 1 + 4  # header + one line per chunk
    # interrupted after two chunks, killed while writing the third
    part.write_text("\n".join(lines[:3]) + "\n" + lines[3][:50])
    seen = []
    again = run_sweep_chunked(cfg, None, plants=PLANTS, seed=SEED, duration=DURATION,
                              resume=part, progress=lambda d, n: seen.append(d))
    same_plants(local, again)
    assert again.summary["cluster"]["resumed_chunks"] == 2
    assert again.summary["cluster"]["plants_run"] == 120
    assert seen[0] == 120  # the resumed plants count as done from the start
    # the file now holds every chunk (the torn line is skipped on reading)
    _size, chunks = PartialFile(part).read(json.loads(lines[0])["fingerprint"], PLANTS)
    assert sorted(chunks) == [0, 60, 120, 180]


def test_a_partial_file_of_another_sweep_is_refused_in_one_line(cfg, tmp_path):
    part = tmp_path / "p.jsonl"
    run_sweep_chunked(cfg, None, plants=20, seed=SEED, duration=0.2, chunk=10, partial=part)
    with pytest.raises(ClusterError, match="different sweep"):
        run_sweep_chunked(cfg, None, plants=20, seed=SEED + 1, duration=0.2, resume=part)


def test_cluster_spec_errors_are_one_line():
    assert parse_cluster("local:3") == 3
    assert parse_cluster("10.0.0.5:8786") == "tcp://10.0.0.5:8786"
    with pytest.raises(ClusterError, match="local:N"):
        parse_cluster("local:zero")


def test_cluster_without_dask_is_one_line(tmp_path):
    # a Python where `distributed` cannot be imported: the CLI says how to install it
    code = ("import sys; sys.modules['distributed'] = None; from runtime.cli import main; "
            f"sys.exit(main(['sweep', '{DEMO}', '--plants', '4', '--duration', '0.1', "
            f"'--cluster', 'local:1', '--no-plot', '--out', '{tmp_path}', '--force']))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=600, env={**os.environ, "PYTHONPATH": os.getcwd()})
    assert proc.returncode != 0
    assert "Traceback" not in proc.stderr
    assert "pip install -e '.[cluster]'" in proc.stderr


def test_the_command_line_gives_the_same_statistics_on_a_cluster(tmp_path):
    # `corral sweep ... --cluster local:2 --json` against the same sweep without --cluster
    def sweep(*extra):
        proc = subprocess.run(
            [sys.executable, "-m", "runtime.cli", "sweep", DEMO, "--plants", "60",
             "--duration", "0.3", "--seed", "3", "--json", "--no-plot", "--out", str(tmp_path),
             *extra], capture_output=True, text=True, timeout=900,
            env={**os.environ, "PYTHONPATH": os.getcwd()})
        assert proc.returncode in (0, 1), proc.stderr
        return json.loads(proc.stdout[proc.stdout.index("{"):])

    here = sweep()
    there = sweep("--cluster", "local:2")
    timing = {"wall_seconds", "plant_steps_per_second", "workers", "chunk", "compile_seconds",
              "cluster", "engine", "report_file"}
    assert {k: v for k, v in here.items() if k not in timing} == \
        {k: v for k, v in there.items() if k not in timing}
    assert there["cluster"]["workers"] == 2 and there["cluster"]["partial_file"] is None
    assert not list(tmp_path.glob("*.partial.jsonl"))  # removed once every chunk was in


def test_resume_from_a_missing_file_is_one_line(cfg, tmp_path):
    with pytest.raises(ClusterError, match="no such file"):
        run_sweep_chunked(cfg, None, plants=10, duration=0.1, resume=tmp_path / "none.jsonl")
