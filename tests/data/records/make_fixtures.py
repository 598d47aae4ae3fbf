"""How tests/data/records/ was made (run once, with main at 08e2992, before typed records).

    PYTHONPATH=$PWD python tests/data/records/make_fixtures.py

A 1 s unpaced simulated run of configs/pedestal-sim.toml with a spike at 0.5 s (one trip,
its post capture, operator events, the end record), logs kept to a short capture
(log.pre_capture_s=0.05, log.post_capture_s=0.02) so the files stay small; plus the hello
and one telemetry map the operator socket sends, packed the way the socket packs them
(msgpack, use_bin_type) into telemetry.msgpack. File names are fixed (pedestal-fixture.*).
"""

from __future__ import annotations

import asyncio
import shutil
import sys
import tempfile
from pathlib import Path

import msgpack

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from tests.runtime_helpers import runner  # noqa: E402


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        r = runner(Path(tmp), ["spike@0.5"], ["log.pre_capture_s=0.05",
                                               "log.post_capture_s=0.02"])
        asyncio.run(r.run_ticks(int(round(1.0 / r.design.Ts))))
        core = r.core
        # (main at 08e2992 built maps: {"type": "hello", **core.hello()} and
        # core.telemetry_record(); the typed records' `to_wire` gives the same maps.)
        hello = core.hello().to_wire()
        tel = core.telemetry_record().to_wire()
        shutil.copy(core.run_path, HERE / "pedestal-fixture.run")
        shutil.copy(core.trip_path, HERE / "pedestal-fixture.trips")
    with open(HERE / "telemetry.msgpack", "wb") as fh:
        for rec in (hello, tel):
            fh.write(msgpack.packb(rec, use_bin_type=True))


if __name__ == "__main__":
    main()
