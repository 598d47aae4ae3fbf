"""Where a run's threads live on the host: CPU affinity (``loop.cpu``) and memory locking.

Two runtimes on one host (a lab computer driving two rigs) each place their tick
with the scheduler's defaults: SCHED_FIFO threads wake on whichever core runs the
lowest-priority work, and a wake-up on the core where the other runtime is
spinning to its own deadline waits for it (the same priority does not preempt).
``loop.cpu`` (a CPU number, or a list of them) pins every thread of the runtime
to those CPUs, so two runtimes given ``loop.cpu = 0`` and ``loop.cpu = 1`` never
meet; threads started later inherit the mask from the thread that starts them.
Absent, nothing is pinned.

Memory locking (``loop.lock_memory``, default on): ``mlockall`` of the pages the
process has and will touch (``MCL_ONFAULT``: locked as they are first touched,
so the interpreter's large reserved mappings are not all made resident), when
the process may lock memory (root, CAP_IPC_LOCK or an unlimited
RLIMIT_MEMLOCK; with a limit, locking future pages could make a later
allocation fail, so it is not tried). A locked page is never paged out, so a
tick never waits for a page to come back from disk.

Both are undone at the end of the run (`Placement.undo`), for the process that
goes on (tests, the dashboard's host). What was asked and what took goes into
the run summary (``host_setup``) and the trip log (an event of kind ``host``).
"""

from __future__ import annotations

import ctypes
import os
import resource
import threading
from typing import Any

from runtime.config import Config, ConfigError

MCL_CURRENT, MCL_FUTURE, MCL_ONFAULT = 1, 2, 4
CAP_IPC_LOCK = 14


def cpus_from_config(cfg: Config) -> frozenset[int] | None:
    """``loop.cpu`` as a set of CPU numbers this process may use; None when absent.

    ConfigError (one line naming the key and the fix) for anything else."""
    raw = cfg.get("loop.cpu")
    if raw is None:
        return None
    items = raw if isinstance(raw, list) else [raw]
    try:
        usable = sorted(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        raise ConfigError("loop.cpu", "this system cannot pin threads to CPUs.",
                          "remove loop.cpu.") from None
    cpus = set()
    for v in items:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or float(v) != int(v):
            raise ConfigError("loop.cpu", f"must be a CPU number or a list of them, got {v!r}.",
                              f"write loop.cpu = {usable[0]} or loop.cpu = [{usable[0]}].")
        cpus.add(int(v))
    bad = sorted(c for c in cpus if c not in usable)
    if bad or not cpus:
        raise ConfigError("loop.cpu", f"CPU {bad or '[]'} is not one this process may use "
                          f"({usable}).", f"pick from {usable}.")
    return frozenset(cpus)


def _may_lock_all() -> tuple[bool, str]:
    """(may lock future pages safely, why not)."""
    if os.geteuid() == 0:
        return True, ""
    try:
        for line in open("/proc/self/status").read().splitlines():  # noqa: SIM115
            if line.startswith("CapEff:") and int(line.split()[1], 16) >> CAP_IPC_LOCK & 1:
                return True, ""
    except (OSError, ValueError, IndexError):
        pass
    soft, _ = resource.getrlimit(resource.RLIMIT_MEMLOCK)
    if soft == resource.RLIM_INFINITY:
        return True, ""
    return False, (f"RLIMIT_MEMLOCK is {soft // 1024} KiB and this process is neither root "
                   "nor CAP_IPC_LOCK")


def _thread_ids() -> list[int]:
    """Native ids of this process's threads (every task, Python-made or not)."""
    try:
        return [int(t) for t in os.listdir("/proc/self/task")]
    except OSError:
        return [tid for t in threading.enumerate() if (tid := t.native_id) is not None]


class Placement:
    """The run's CPU mask and memory lock: `apply` before the clock starts, `undo` after."""

    def __init__(self, cfg: Config) -> None:
        self.cpus = cpus_from_config(cfg)
        self.want_lock = bool(cfg.flag("loop.lock_memory"))
        self.pinned: dict[int, set[int]] = {}
        self.locked = False
        """mlockall took (stays True after `undo`, for the record)."""
        self._held = False
        self.notes: list[str] = []

    def apply(self) -> str:
        """Pin every thread to ``loop.cpu`` and lock memory, as far as allowed; what took."""
        self.notes = []
        if self.cpus is not None:
            for tid in _thread_ids():
                try:
                    old = os.sched_getaffinity(tid)
                    os.sched_setaffinity(tid, self.cpus)
                except OSError:
                    continue
                self.pinned[tid] = old
            self.notes.append(f"pinned to CPU {','.join(map(str, sorted(self.cpus)))} "
                              f"({len(self.pinned)} threads)")
        if self.want_lock:
            ok, why = _may_lock_all()
            if ok:
                libc = ctypes.CDLL(None, use_errno=True)
                if libc.mlockall(MCL_CURRENT | MCL_FUTURE | MCL_ONFAULT) == 0:
                    self.locked = self._held = True
                    self.notes.append("memory locked")
                else:
                    err = ctypes.get_errno()
                    self.notes.append(f"memory not locked (mlockall: {os.strerror(err)})")
            else:
                self.notes.append(f"memory not locked ({why})")
        else:
            self.notes.append("memory not locked (loop.lock_memory = false)")
        return "; ".join(self.notes)

    def undo(self) -> None:
        """Give back the memory lock and the old CPU masks; never raises."""
        if self._held:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.munlockall()
            self._held = False
        for tid, old in self.pinned.items():
            try:
                os.sched_setaffinity(tid, old)
            except OSError:
                continue
        self.pinned = {}

    def record(self) -> dict[str, Any]:
        """What was asked and what took, for the run summary."""
        return {"cpus": sorted(self.cpus) if self.cpus is not None else None,
                "memory_locked": self.locked, "notes": "; ".join(self.notes)}
