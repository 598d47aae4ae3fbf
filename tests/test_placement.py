"""CPU affinity (``loop.cpu``) and memory locking of a run (`runtime.realtime.placement`).

Checked against the kernel's own account, not the module's: the affinity masks read back
with sched_getaffinity(2) for every task in /proc/self/task (pthread_create(3): "The new
thread inherits a copy of the creating thread's CPU affinity mask"), and the locked
memory as VmLck in /proc/self/status (proc(5)).
"""

from __future__ import annotations

import asyncio
import os
import threading
from pathlib import Path

import pytest

from runtime.config import ConfigError, load_config
from runtime.realtime.placement import Placement, _may_lock_all, cpus_from_config
from runtime.records.logs import read_trip_records
from tests.runtime_helpers import DEMO, runner

HAVE_AFFINITY = hasattr(os, "sched_setaffinity")
USABLE = sorted(os.sched_getaffinity(0)) if HAVE_AFFINITY else [0]


def _cfg(tmp_path: Path, *sets: str):  # noqa: ANN202 - a Config
    return load_config(DEMO, [f"log.dir={tmp_path}", *sets])


def _vmlck_kib() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmLck:"):
            return int(line.split()[1])
    return 0


def test_loop_cpu_absent_means_nothing_pinned(tmp_path: Path) -> None:
    assert cpus_from_config(_cfg(tmp_path)) is None
    p = Placement(_cfg(tmp_path, "loop.lock_memory=false"))
    before = {int(t): os.sched_getaffinity(int(t)) for t in os.listdir("/proc/self/task")}
    assert "memory not locked (loop.lock_memory = false)" in p.apply()
    p.undo()
    assert p.record() == {"cpus": None, "memory_locked": False,
                          "notes": "memory not locked (loop.lock_memory = false)"}
    for tid, mask in before.items():
        assert os.sched_getaffinity(tid) == mask


@pytest.mark.skipif(not HAVE_AFFINITY, reason="no sched_setaffinity on this system")
def test_loop_cpu_a_number_or_a_list(tmp_path: Path) -> None:
    assert cpus_from_config(_cfg(tmp_path, f"loop.cpu={USABLE[-1]}")) == {USABLE[-1]}
    every = ",".join(map(str, USABLE))
    assert cpus_from_config(_cfg(tmp_path, f"loop.cpu=[{every}]")) == set(USABLE)


@pytest.mark.parametrize("value", ["4096", "true", "0.5", "[]"])
def test_bad_loop_cpu_is_one_line_naming_the_key(tmp_path: Path, value: str) -> None:
    with pytest.raises(ConfigError) as err:
        Placement(_cfg(tmp_path, f"loop.cpu={value}"))
    assert "loop.cpu" in str(err.value)


@pytest.mark.skipif(not HAVE_AFFINITY, reason="no sched_setaffinity on this system")
def test_apply_pins_every_thread_and_undo_gives_the_masks_back(tmp_path: Path) -> None:
    cpu = USABLE[-1]
    stop = threading.Event()
    early = threading.Thread(target=stop.wait, daemon=True)
    early.start()
    before = {int(t): os.sched_getaffinity(int(t)) for t in os.listdir("/proc/self/task")}
    p = Placement(_cfg(tmp_path, f"loop.cpu={cpu}", "loop.lock_memory=false"))
    try:
        note = p.apply()
        assert f"pinned to CPU {cpu}" in note
        for t in os.listdir("/proc/self/task"):
            assert os.sched_getaffinity(int(t)) == {cpu}
        seen: list[set[int]] = []
        late = threading.Thread(target=lambda: seen.append(os.sched_getaffinity(0)))
        late.start()
        late.join()
        assert seen == [{cpu}]  # inherited from the thread that started it
    finally:
        p.undo()
        stop.set()
        early.join(5.0)
    for tid, mask in before.items():
        if Path(f"/proc/self/task/{tid}").exists():
            assert os.sched_getaffinity(tid) == mask


@pytest.mark.skipif(not _may_lock_all()[0], reason="this process may not lock its memory "
                    "(not root, no CAP_IPC_LOCK, RLIMIT_MEMLOCK limited)")
def test_memory_lock_takes_and_is_given_back(tmp_path: Path) -> None:
    assert _vmlck_kib() == 0
    p = Placement(_cfg(tmp_path))
    try:
        assert "memory locked" in p.apply()
        assert _vmlck_kib() > 0
    finally:
        p.undo()
    assert _vmlck_kib() == 0
    assert p.record()["memory_locked"] is True


@pytest.mark.skipif(not HAVE_AFFINITY, reason="no sched_setaffinity on this system")
def test_a_run_records_its_placement(tmp_path: Path) -> None:
    cpu = USABLE[-1]
    r = runner(tmp_path, overrides=[f"loop.cpu=[{cpu}]"], duration=0.3)
    before = os.sched_getaffinity(0)
    s = asyncio.run(r.run())
    assert os.sched_getaffinity(0) == before
    assert s["host_setup"]["cpus"] == [cpu]
    events = read_trip_records(s["trip_log"]).events
    host = [e for e in events if e.kind == "host"]
    assert len(host) == 1 and f"pinned to CPU {cpu}" in host[0].detail, host
