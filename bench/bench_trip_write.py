"""What writing a trip record does to the tick: the GIL hold of packing its capture.

A stand-in tick thread sleeps to absolute 1 ms deadlines (SCHED_FIFO when allowed, as the
runtime's) and records how late it wakes, while this thread packs trip records with a
pre-trip capture of ROWS x 46 float64 values (``log.pre_capture_s`` = 1 s at 1 kHz is
1000 rows), alternating two ways, R rounds each:

- one call (the baseline: how the trip log wrote it before, kept here for this figure
  only): ``ndarray.tolist()``, then ``Packer.pack`` of the whole record;
- in pieces (`runtime.records.packrows.pack_record`, what the trip log does now).

Both give the same bytes (checked here, and by tests/test_packrows.py). Prints, per way,
the tick's worst lateness while a record was being packed and the packing time, with the
ratio in the same run and the load average beside them. Figures only.

    python bench/bench_trip_write.py
    python bench/bench_trip_write.py --rows 2000 --rounds 20
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.realtime.clock import try_realtime  # noqa: E402
from runtime.records.logwriter import _packer  # noqa: E402
from runtime.records.packrows import pack_record  # noqa: E402


class Ticker:
    """A 1 ms absolute-deadline sleeper; `worst(t0, t1)` its worst lateness in a window."""

    def __init__(self) -> None:
        self.wakes: list[tuple[float, float]] = []
        self.stop = threading.Event()
        self.granted = ""
        self.thread = threading.Thread(target=self.run, daemon=True)

    def run(self) -> None:
        self.granted = try_realtime(50)
        t0 = time.monotonic()
        k = 0
        while not self.stop.is_set():
            k += 1
            d = t0 + k * 1e-3
            while (left := d - time.monotonic()) > 0:
                time.sleep(left)
            now = time.monotonic()
            self.wakes.append((now, now - d))
            if now - d > 1e-3:  # resynchronise after a stall, as the runtime's clock
                k += int((now - d) // 1e-3)

    def worst(self, t0: float, t1: float) -> float:
        w = [late for t, late in self.wakes if t0 <= t <= t1 + 0.05]
        return max(w) if w else 0.0


def one_call(rec: dict) -> bytes:
    plain = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in rec.items()}
    return bytes(_packer().pack(plain))


def in_pieces(rec: dict) -> bytes:
    return b"".join(pack_record(_packer(), rec))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1000)
    ap.add_argument("--rounds", type=int, default=10)
    a = ap.parse_args()
    rng = np.random.default_rng(1)
    rec = {"type": "trip", "id": 1, "first_out": {"rule": "margin"},
           "pre": rng.normal(size=(a.rows, 46))}
    assert one_call(rec) == in_pieces(rec)
    tk = Ticker()
    tk.thread.start()
    time.sleep(0.5)
    figs: dict[str, list[tuple[float, float]]] = {"one call": [], "in pieces": []}
    for _ in range(a.rounds):
        for name, fn in (("one call", one_call), ("in pieces", in_pieces)):
            time.sleep(0.1)
            t0 = time.monotonic()
            fn(rec)
            t1 = time.monotonic()
            time.sleep(0.05)
            figs[name].append((tk.worst(t0, t1), t1 - t0))
    tk.stop.set()
    tk.thread.join(2.0)
    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    print(f"trip record with a {a.rows} x 46 capture, {a.rounds} rounds each, alternating; "
          f"tick thread: {tk.granted}; load {load}")
    med = {}
    for name, v in figs.items():
        late = np.array([x[0] for x in v]) * 1e3
        took = np.array([x[1] for x in v]) * 1e3
        med[name] = np.median(late)
        print(f"  {name:9s}: tick's worst lateness while packing median {np.median(late):.2f} ms,"
              f" max {late.max():.2f} ms; packing took median {np.median(took):.2f} ms")
    if med["in pieces"] > 0:
        ratio = med["one call"] / med["in pieces"]
        print(f"  ratio of medians (one call / in pieces): {ratio:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
