"""The fault matrix: every fault kind on a link, the first-out rule, time to trip, action.

    python bench/fault_matrix.py            # print the table
    python bench/fault_matrix.py --write    # also write it into docs/faults.md

Each kind runs on the demo config (simulated pedestal, armed, settled) with the fault at
``AT`` seconds, through the runtime's real tick, watchdog and trip log; the first trip's
rule, its time after the fault starts and its action are read back from the trip log.
Every kind runs unpaced (`Runner.run_ticks`: the same ticks as fast as the machine
allows) except ``overrun``, which needs the host clock and runs in real time.

Links: ``sim`` (the in-process rig) today. The served device over a pseudo-terminal and
MQTT (and the link-loss kinds there: device killed, broker restart) are listed as waiting
in docs/faults.md until their injectors land.
"""

from __future__ import annotations

import argparse
import asyncio
import re
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runtime.config import load_config  # noqa: E402
from runtime.realtime.loop import Runner, RunSettings  # noqa: E402
from runtime.records.logs import load_trips  # noqa: E402

DEMO = ROOT / "configs" / "pedestal-sim.toml"
AT = 1.5
RUN_S = 4.0
SETS = ["supervisor.settle_time=0.2", "watchdog.overrun_misses=100000",
        "log.pre_capture_s=0.2", "log.post_capture_s=0.1"]

# kind -> (fault text, the first-out rules that are right for it, why).
MATRIX: dict[str, tuple[str, tuple[str, ...], str]] = {
    "sensor_freeze": ("sensor_freeze", ("stale",), "readings held: frozen age"),
    "spike": ("spike:size=0.5", ("jump",), "one reading off by 0.5 rad"),
    "dropout": ("dropout", ("stale", "link_loss"), "no samples"),
    "nan": ("nan", ("nonfinite",), "readings NaN"),
    "delay": ("delay:ticks=5", ("stale",), "readings 5 periods old"),
    "malformed": ("malformed", ("internal",), "a sample one reading short (until samples "
                  "are checked against the hello, the last line of defence catches it)"),
    "effectiveness_loss": ("effectiveness_loss:scale=0.3", ("margin", "predicted_crossing"),
                           "the drives keep 30 % of their effectiveness"),
    "disturbance_step": ("disturbance_step:size=3", (),
                         "the law absorbs a 3 rad/s^2 step within the bound"),
    "saturation": ("saturation:scale=0.02", ("saturation", "margin", "predicted_crossing"),
                   "the elevation drive keeps 2 % of its effectiveness"),
    "corrupt": ("corrupt:every=1", ("stale", "link_loss"), "every frame fails its CRC"),
    "drop": ("drop:count=1", ("seq_gap",), "one sample lost"),
    "link_delay": ("link_delay:seconds=0.01", ("stale",), "every sample 10 ms late"),
    "disconnect": ("disconnect", ("link_loss",), "the link goes away"),
    "duplicate": ("duplicate:every=2", ("stale", "seq_gap"),
                  "every second frame is the previous one again"),
    "burst": ("burst:ticks=20", ("stale", "seq_gap"),
              "samples held 20 periods, then only the newest"),
    "insertion": ("insertion:ahead=100000", ("seq_gap",),
                  "one forged sample 100 000 sequence numbers ahead"),
    "overrun": ("overrun:seconds=0.003", ("overrun",),
                "the tick stalls 3 ms every period (real time)"),
    "tick_error": ("tick_error", ("internal",), "an exception inside the tick"),
}


SERVED = ROOT / "configs" / "pedestal-served.toml"
# Kinds the served device injects itself (sim_rigs.device); the rest wait (docs/faults.md).
SERIAL_KINDS = ("sensor_freeze", "spike", "dropout", "nan", "delay", "malformed",
                "effectiveness_loss", "disturbance_step", "saturation", "corrupt", "drop",
                "link_delay", "disconnect")


def run_serial(kind: str, text: str, base: Path) -> dict:
    """The kind injected by the served device (its own clock, a real pseudo-terminal), the
    runtime rig-clocked over `serial:` in real time."""
    import threading

    from sim_rigs.device import PedestalDevice
    from sim_rigs.faults import FaultSchedule, parse_fault
    from sim_rigs.pedestal import Pedestal

    head, _, tail = text.partition(":")
    fault = f"{head}@{AT}" + (f":{tail}" if tail else "")
    d = base / f"serial-{kind}"
    d.mkdir(parents=True, exist_ok=True)
    cfg = load_config(SERVED, [f"log.dir={d}", "supervisor.settle_time=0.2",
                               "log.pre_capture_s=0.2", "log.post_capture_s=0.1"])
    device = PedestalDevice(Pedestal.create(), period=float(cfg.get("loop.period", 0.002)),
                            faults=FaultSchedule([parse_fault(fault)]))
    path = device.serve_pty(str(d / "rig.tty"))
    thread = threading.Thread(target=device.run, daemon=True)
    thread.start()
    try:
        r = Runner(cfg, RunSettings(duration=AT + 1.5, auto_arm=True, link=f"serial:{path}",
                                    preflight=False, echo_trips=False))
        summary = asyncio.run(r.run())
    finally:
        device.stop()
        thread.join(10)
    return _first(summary)


def _first(summary: dict) -> dict:
    trips = load_trips([summary["trip_log"]])
    if not trips:
        return {"rule": None, "after_ms": None, "action": None,
                "error": summary.get("internal_error")}
    rec = trips[0].record
    return {"rule": rec["first_out"]["rule"], "after_ms": (rec["t"] - AT) * 1e3,
            "action": rec["action"], "error": summary.get("internal_error")}


def run_one(kind: str, text: str, base: Path) -> dict:
    head, _, tail = text.partition(":")
    fault = f"{head}@{AT}" + (f":{tail}" if tail else "")
    sets = [*SETS, f"log.dir={base / kind}"]
    if kind == "overrun":
        sets = [s for s in sets if not s.startswith("watchdog.overrun_misses")]
    r = Runner(load_config(DEMO, sets), RunSettings(auto_arm=True, faults=[fault],
                                                   echo_trips=False, preflight=False,
                                                   duration=RUN_S))
    if kind == "overrun":
        summary = asyncio.run(r.run())
    else:
        summary = asyncio.run(r.run_ticks(int(round(RUN_S / r.design.Ts))))
    return _first(summary)


def table(rows: list[tuple[str, str, dict, tuple[str, ...], str]]) -> str:
    lines = ["| kind | link | first-out | time to trip | action | verdict | fault |",
             "|---|---|---|---|---|---|---|"]
    for kind, link, res, right, why in rows:
        rule = res["rule"] or "none"
        after = "" if res["after_ms"] is None else f"{res['after_ms']:.0f} ms"
        if res["rule"] is None:
            verdict = "no trip (below threshold by design)" if not right else "MISSED"
        elif res["rule"] in right:
            verdict = "right"
        else:
            verdict = f"WRONG (expected {' or '.join(right) or 'none'})"
        lines.append(f"| {kind} | {link} | {rule} | {after} | {res['action'] or ''} | "
                     f"{verdict} | {why} |")
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--write", action="store_true", help="write the table into docs/faults.md")
    ap.add_argument("--only", nargs="*", help="kinds to run (default: all)")
    ap.add_argument("--link", nargs="*", default=["sim"], choices=("sim", "serial"),
                    help="links to run (default: sim; serial serves the rig over a pty)")
    args = ap.parse_args()
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for kind, (text, right, why) in MATRIX.items():
            if args.only and kind not in args.only:
                continue
            for link in args.link:
                if link == "serial" and kind not in SERIAL_KINDS:
                    continue
                res = (run_one if link == "sim" else run_serial)(kind, text, Path(tmp))
                rows.append((kind, link, res, right, why))
                print(f"{kind:20s} {link:6s} {res['rule']!s:20s} {res['after_ms']!s:>10.10s} "
                      f"ms {res['action']!s}", flush=True)
    out = table(rows)
    print(out)
    if args.write:
        doc = ROOT / "docs" / "faults.md"
        text = doc.read_text()
        new = re.sub(r"(<!-- matrix:begin -->\n).*?(<!-- matrix:end -->)",
                     lambda m: m.group(1) + out + "\n" + m.group(2), text, flags=re.S)
        if new == text and out not in text:
            print(f"no <!-- matrix:begin/end --> markers in {doc}", file=sys.stderr)
            return 2
        doc.write_text(new)
        print(f"written to {doc}")
    bad = [r for r in rows if (r[2]["rule"] is None and r[3]) or
           (r[2]["rule"] is not None and r[2]["rule"] not in r[3])]
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
