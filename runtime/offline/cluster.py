"""Sweeps (and, later, the tuner) on a Dask distributed cluster, with a resumable results file.

`corral sweep CONFIG --cluster ADDRESS` sends chunks of plants to the workers of a
running Dask scheduler (``tcp://host:8786``); ``--cluster local:N`` starts a local
cluster of N worker processes for the run. Each chunk goes through the same batch
kernel as the local sweep (`runtime.offline.sweep.run_chunk`) with the plants' indices in the
whole sweep, so a plant gets the same parameters and the same noise stream wherever
it runs: per-plant results, and so the statistics, equal the local run's (compiled
engine; the reference engine's noise follows the chunk layout, see `runtime.offline.sweep`).

- `open_client(spec)`: a Dask client on ``local:N`` or an address; a one-line
  `ClusterError` when Dask is not installed or the scheduler does not answer.
- `cluster_map(client, fn, jobs, on_result)`: run ``fn(*args)`` for every job on the
  workers, calling `on_result(key, value)` as each finishes (any order). Dask re-runs the
  tasks of a worker lost mid-run on the others (``retries`` covers a task that raised).
  With ``client=None`` the jobs run here, one after another. The tuner can call this
  with its own function.
- `PartialFile`: one JSON line per finished chunk, appended and flushed as it arrives;
  `--resume FILE` reads it back (a torn last line is ignored), checks it belongs to the
  same sweep, and runs only the chunks it lacks.
- `run_sweep_chunked(cfg, client, ...)`: the sweep through the two above.

Dask is an optional extra (``pip install -e .[cluster]``); nothing here imports it
until a cluster is asked for.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import os
import time
from collections.abc import Callable, Hashable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from runtime.config import Config, ConfigError
from runtime.method.design import design_from_config
from runtime.offline.sweep import (
    Columns,
    Progress,
    SweepResult,
    SweepSettings,
    _setup,
    draw_plants,
    run_chunk,
    summarise,
)

INSTALL_HINT = "pip install -e '.[cluster]' (Dask distributed)"
PARTIAL_FORMAT = "corral-sweep-partial/1"


class ClusterError(RuntimeError):
    """A cluster problem said in one line (what failed and the fix)."""


# ------------------------------------------------------------------ the client
def parse_cluster(spec: str) -> int | str:
    """``local:N`` -> N worker processes; anything else is a scheduler address."""
    text = spec.strip()
    if text.startswith("local:") or text == "local":
        n = text.partition(":")[2] or "2"
        if not n.isdigit() or int(n) < 1:
            raise ClusterError(f"--cluster {spec!r}: write local:N with N worker processes "
                               "(N >= 1), e.g. local:2")
        return int(n)
    if not text:
        raise ClusterError("--cluster: give a scheduler address (tcp://HOST:8786) or local:N")
    return text if "://" in text else f"tcp://{text}"


@contextlib.contextmanager
def open_client(spec: str, timeout_s: float = 20.0) -> Iterator[Any]:
    """A Dask client on `spec` (``local:N`` starts and ends a local cluster of processes)."""
    target = parse_cluster(spec)
    try:
        import logging

        from distributed import Client, LocalCluster
    except ImportError:
        raise ClusterError(f"--cluster needs Dask distributed, which is not installed: "
                           f"{INSTALL_HINT}") from None
    if isinstance(target, int):
        cluster = LocalCluster(n_workers=target, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.ERROR)
        try:
            with Client(cluster) as client:
                yield client
        finally:
            cluster.close()
        return
    try:
        client = Client(target, timeout=timeout_s)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"cannot reach the Dask scheduler at {target} ({exc}); is "
                           "`dask scheduler` running there and the port open?") from None
    try:
        yield client
    finally:
        client.close()


def worker_count(client: Any) -> int:
    """Workers the scheduler has now (1 when running here)."""
    if client is None:
        return 1
    return max(1, len(client.scheduler_info().get("workers", {})))


def cluster_map(client: Any, fn: Callable[..., Any],
                jobs: Sequence[tuple[Hashable, tuple[Any, ...]]],
                on_result: Callable[[Hashable, Any], None], retries: int = 2,
                tag: str = "corral") -> None:
    """``fn(*args)`` for every (key, args) job, `on_result(key, value)` as each finishes.

    On a cluster: one task per job, results in the order they finish; a worker lost
    mid-run has its tasks re-run elsewhere by the scheduler, a task that raised is
    retried `retries` times and then its error raised here. `client` None: here, in order.
    """
    if client is None:
        for key, args in jobs:
            on_result(key, fn(*args))
        return
    from distributed import as_completed

    stamp = f"{tag}-{time.time_ns()}"
    futures = {client.submit(fn, *args, key=f"{stamp}-{i}", pure=False, retries=retries): key
               for i, (key, args) in enumerate(jobs)}
    try:
        for fut in as_completed(futures):
            on_result(futures[fut], fut.result())
    finally:
        for fut in futures:
            fut.release()


def _chunk_task(raw: dict[str, Any], settings: SweepSettings, prm: Columns, index: int,
                ids: np.ndarray, threads: int) -> Columns:
    """One chunk on a worker: the compiled kernel on `threads` numba threads."""
    import numba

    numba.set_num_threads(max(1, min(int(threads), int(numba.config.NUMBA_NUM_THREADS))))
    return run_chunk(raw, settings, prm, index, plant_ids=ids)


# ------------------------------------------------------------------ the partial results file
def fingerprint(raw: dict[str, Any], settings: SweepSettings, chunk: int) -> str:
    """What makes two runs the same sweep: the config, the settings that change results,
    and the chunk layout (worker and thread counts do not)."""
    fields = {k: v for k, v in dataclasses.asdict(settings).items()
              if k not in ("workers", "chunk")}
    text = json.dumps([raw, fields, int(chunk)], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


class PartialFile:
    """Per-chunk results, one JSON line each (floats written exactly, inf/NaN included)."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)

    def read(self, print_: str, plants: int) -> tuple[int | None, dict[int, Columns]]:
        """(chunk size, results by chunk start) of a file written for this sweep."""
        if not self.path.is_file():
            raise ClusterError(f"--resume {self.path}: no such file; give the partial results "
                               "file an interrupted sweep printed")
        chunks: dict[int, Columns] = {}
        size: int | None = None
        with self.path.open() as fh:
            lines = fh.read().split("\n")
        for n, line in enumerate(lines):
            try:
                item = json.loads(line)
            except ValueError:
                continue  # a torn last line (the run was killed while writing)
            if n == 0:
                if (not isinstance(item, dict) or item.get("format") != PARTIAL_FORMAT
                        or item.get("fingerprint") != print_ or item.get("plants") != plants):
                    raise ClusterError(
                        f"--resume {self.path}: written by a different sweep (config, plants, "
                        "seed, duration or chunk differ); give the same settings, or drop "
                        "--resume to start afresh")
                size = int(item["chunk"])
                continue
            cols = {k: np.asarray(v["values"], dtype=v["dtype"])
                    for k, v in item["columns"].items()}
            chunks[int(item["start"])] = cols
        return size, chunks

    def start(self, print_: str, plants: int, chunk: int) -> None:
        """A new file with its header."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        header = {"format": PARTIAL_FORMAT, "fingerprint": print_, "plants": plants,
                  "chunk": chunk}
        with self.path.open("w") as fh:
            fh.write(json.dumps(header) + "\n")

    def append(self, start: int, cols: Columns) -> None:
        """One finished chunk, flushed to the disk before the next."""
        item = {"start": int(start),
                "columns": {k: {"dtype": str(v.dtype), "values": v.tolist()}
                            for k, v in cols.items()}}
        with self.path.open("rb+") as fh:
            fh.seek(0, 2)
            if fh.tell():
                fh.seek(-1, 2)
                if fh.read(1) != b"\n":  # after a torn line: start on a line of its own
                    fh.write(b"\n")
            fh.write((json.dumps(item) + "\n").encode())
            fh.flush()
            os.fsync(fh.fileno())


# ------------------------------------------------------------------ the sweep
def run_sweep_chunked(cfg: Config, client: Any, plants: int | None = None,
                      seed: int | None = None, duration: float | None = None,
                      chunk: int | None = None, engine: str | None = None,
                      threads: int = 1, progress: Progress | None = None,
                      partial: Path | None = None, resume: Path | None = None,
                      describe: str = "here") -> SweepResult:
    """The sweep in chunks on `client`'s workers (None: here), each chunk's results
    appended to `partial` as it finishes; `resume` continues from such a file."""
    settings = SweepSettings.from_config(cfg, plants, seed, duration, 1, chunk, engine)
    design = design_from_config(cfg)
    if not design.feasible:
        raise ConfigError("adaptation.gamma", "the design is refused: "
                          + "; ".join(design.reasons), "fix the design first (corral design).")
    setup = _setup(cfg.raw, settings)  # errors here are one line, not a worker traceback
    N = settings.plants
    truth = draw_plants(cfg, N, settings.seed)
    workers = worker_count(client)
    done_chunks: dict[int, Columns] = {}
    cs = min(settings.chunk, max(1, -(-N // (4 * workers)))) if chunk is None else settings.chunk
    where = resume or partial
    out_file = PartialFile(where) if where is not None else None
    if resume is not None:
        assert out_file is not None
        if not Path(resume).is_file():
            raise ClusterError(f"--resume {resume}: no such file; give the partial results "
                               "file an interrupted sweep printed")
        # the chunk size is part of the fingerprint: try the file's own
        with Path(resume).open() as fh:
            try:
                head = json.loads(fh.readline())
                cs = int(head.get("chunk", cs)) if isinstance(head, dict) else cs
            except ValueError:
                pass
        _size, done_chunks = out_file.read(fingerprint(cfg.raw, settings, cs), N)
    print_ = fingerprint(cfg.raw, settings, cs)
    if out_file is not None and resume is None:
        out_file.start(print_, N, cs)
    resumed = len(done_chunks)
    starts = list(range(0, N, cs))
    jobs = []
    for index, s in enumerate(starts):
        if s in done_chunks:
            continue
        ids = np.arange(s, min(N, s + cs), dtype=np.int64)
        prm = {k: v[ids] for k, v in truth.items()}
        jobs.append((s, (cfg.raw, settings, prm, index, ids, threads)))
    done = sum(len(c["max_ratio"]) for c in done_chunks.values())
    if progress:
        progress(done, N)

    def finished(key: Hashable, cols: Columns) -> None:
        nonlocal done
        s = int(key)  # type: ignore[call-overload]
        done_chunks[s] = cols
        if out_file is not None:
            out_file.append(s, cols)
        done += len(cols["max_ratio"])
        if progress:
            progress(done, N)

    wall0 = time.perf_counter()
    cluster_map(client, _chunk_task, jobs, finished, tag="corral-sweep")
    wall = time.perf_counter() - wall0
    per_plant = {k: np.concatenate([done_chunks[s][k] for s in starts])
                 for k in done_chunks[starts[0]]}
    fresh = sum(min(N, s + cs) - s for s, _ in jobs)
    summary = summarise(design, dataclasses.replace(settings, workers=workers), truth,
                        per_plant, wall)
    if resumed:  # the speed of the chunks run now, not of the whole sweep
        ticks = int(summary["ticks"])
        summary["plant_steps_per_second"] = fresh * ticks / wall if wall > 0 and fresh else None
    summary["engine"] = setup.engine
    summary["chunk"] = cs
    summary["compile_seconds"] = None
    summary["cluster"] = {"where": describe, "workers": workers, "chunks": len(starts),
                          "resumed_chunks": resumed, "plants_run": fresh,
                          "threads_per_chunk": threads,
                          "partial_file": str(out_file.path) if out_file else None}
    return SweepResult(design, settings, truth, per_plant, summary)

