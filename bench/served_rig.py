"""A served rig and a runtime beside it: the helpers the fault matrix and the link tests share.

`serve` starts `corral rig serve` (the served recipe by default) in a subprocess and
returns it with the first line it printed (the pty path or the broker URL); `end` stops
it (SIGTERM, or the signal given; SIGKILL after a bound). `Background` runs a `Runner`
in a thread of this process, takes operator requests and stops it within a bound.
`wait_for` waits for an event with a generous bound (never a timing assertion).
`realtime_broker` gives a test broker the real-time priority the device and the tick get.

Used by bench/fault_matrix.py and tests/test_link_loss.py, tests/test_fault_matrix.py.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import select
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from runtime.realtime.loop import Runner

ROOT = Path(__file__).resolve().parents[1]
SERVED = ROOT / "configs" / "pedestal-served.toml"
CORRAL = [sys.executable, "-c", "import sys; from runtime.cli.main import main; sys.exit(main())"]


def wait_for(what: str, cond: Callable[[], bool], timeout: float = 180.0) -> None:
    """Wait for an event, with a generous bound (not a timing assertion)."""
    deadline = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.02)


def serve(*args: str, config: Path = SERVED,
          timeout: float = 180.0) -> tuple[subprocess.Popen[str], str]:
    """`corral rig serve CONFIG ARGS...` in a subprocess, once it is serving: the process
    and the first line it printed (where a host connects). RuntimeError if it printed
    nothing within `timeout` seconds (it is killed first)."""
    # One BLAS thread: the device's numbers are small, and a BLAS worker pool spin-waits
    # (see `_normal_priority`).
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    proc = subprocess.Popen([*CORRAL, "rig", "serve", str(config), *args],
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                            cwd=ROOT, env=env, preexec_fn=_normal_priority)
    assert proc.stdout is not None
    # Bounded: a rig that never comes up is an error, not a hang.
    ready, _, _ = select.select([proc.stdout], [], [], timeout)
    first = proc.stdout.readline().strip() if ready else ""
    if not first:
        end(proc, signal.SIGKILL)
        raise RuntimeError(f"rig serve printed nothing in {timeout:g} s")
    return proc, first


def _normal_priority() -> None:
    """In the served rig's process before it starts: normal scheduling, whatever the
    spawning thread runs at. A runtime running in this process raises its other threads to
    SCHED_FIFO (`runtime.realtime.clock.raise_helper_threads`, the caller's main thread
    too), and a child inherits the policy: a device respawned that way computed its design
    at SCHED_FIFO, where OpenBLAS's main thread spin-waited for worker threads that never
    got a core (two such devices, one per core, held a 2-core machine at load 40-50 for 15
    minutes until killed; seen in tests/test_link_loss.py). The device raises itself to
    real time when its clock starts."""
    with contextlib.suppress(OSError, AttributeError):
        os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))


def end(proc: subprocess.Popen[str], sig: int = signal.SIGTERM) -> None:
    """Stop a served rig (`sig`, then SIGKILL after 10 s) and close its pipe."""
    if proc.poll() is None:
        proc.send_signal(sig)
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)
    if proc.stdout is not None:
        proc.stdout.close()


class Background:
    """A Runner in a thread of this process; `.summary` or `.error` when it ends."""

    def __init__(self, runner: Runner) -> None:
        self.runner = runner
        self.summary: dict[str, Any] | None = None
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._go, daemon=True)
        self.thread.start()

    def _go(self) -> None:
        try:
            self.summary = asyncio.run(self.runner.run())
        except BaseException as exc:  # noqa: BLE001 - reported by the caller
            self.error = exc

    def request(self, op: str) -> tuple[bool, str]:
        """An operator request (``arm``, ``reset``, ...) and its reply."""
        got: list[tuple[bool, str]] = []
        self.runner.core.submit(op, lambda ok, msg: got.append((ok, msg)))
        wait_for(f"a reply to {op}", lambda: bool(got), 30)
        return got[0]

    def stop(self, bound: float = 60.0) -> dict[str, Any]:
        """Ask the run to end; its summary (AssertionError when it does not end in `bound`
        seconds or ended with an error)."""
        self.runner.request_stop()
        self.thread.join(bound)
        assert not self.thread.is_alive(), "the run did not end after its stop request"
        assert self.error is None, repr(self.error)
        assert self.summary is not None
        return self.summary

    def abandon(self, bound: float = 30.0) -> None:
        """Make sure the run is over (cleanup after a failure)."""
        if self.thread.is_alive():
            self.runner.request_stop()
            self.thread.join(bound)


def realtime_broker(broker: Any) -> None:
    """Give a test mosquitto the real-time priority the device and the tick get
    (SCHED_FIFO 30, below both; when permitted): at normal priority, on a loaded 2-core
    machine, the broker path held samples past the 20 ms stale threshold within seconds of
    most MQTT rows (docs/faults.md, "Load")."""
    if broker.proc is not None:
        with contextlib.suppress(OSError, AttributeError):
            os.sched_setscheduler(broker.proc.pid, os.SCHED_FIFO, os.sched_param(30))
