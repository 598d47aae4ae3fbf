"""The fault matrix: every fault kind on a link, the first-out rule, time to trip, action.

    python bench/fault_matrix.py            # print the table
    python bench/fault_matrix.py --write    # also write it into docs/faults.md
    python bench/fault_matrix.py --link mqtt --only corrupt --write   # one row again

Each kind runs on the demo config (simulated pedestal, armed, settled) with the fault at
``AT`` seconds, through the runtime's real tick, watchdog and trip log; the first trip's
rule, its time after the fault starts and its action are read back from the trip log.
Every kind runs unpaced (`Runner.run_ticks`: the same ticks as fast as the machine
allows) except ``overrun``, which needs the host clock and runs in real time.

Links: ``sim`` (the in-process rig), ``serial`` (`corral rig serve --serial`, a real
pseudo-terminal) and ``mqtt`` (`corral rig serve --mqtt` through a mosquitto this script
starts); the served links run in real time with tolerant timing (`TOLERANT`), the
device's fault at device time `SERVED_AT`, plus the rows the script performs itself:
``device_kill`` (SIGKILL) and ``broker_restart``. ``--link`` and ``--only`` rerun a part;
``--write`` merges those rows into the table. Each row's time carries the machine's
1-minute load average when it ran (``[load N]``): served timings are provisional on a
loaded machine.
"""

from __future__ import annotations

import argparse
import asyncio
import math
import os
import re
import signal
import sys
import tempfile
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.served_rig import (  # noqa: E402
    SERVED,
    Background,
    end,
    realtime_broker,
    serve,
)
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
    "malformed": ("malformed", ("stale",), "a sample one reading short: refused against "
                  "the rig's channels, as lost"),
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


TOLERANT = ["watchdog.stale_periods=10", "watchdog.rules.overrun.enabled=false"]
"""The served links run with tolerant timing, as the link tests do on this loaded machine
(tests/test_link_loss.py): the host overrun rule off and the stale rule widened so the
2-core machine's own stalls do not trip first. Widened to 10 periods (20 ms at 500 Hz),
not the link tests' 50 (100 ms): with 100 ms, every lost-data kind (corrupt, malformed,
link_delay, a frozen reading) tripped `predicted_crossing` on the held estimate 18-75 ms
into the fault, before `stale` could (measured with this script; docs/faults.md). The
``none`` row checks that no fault trips nothing at this setting. The served fault sizes
are scaled to it."""
SERVED_AT = 6.0
"""Device time of the fault on the served links (the host connects, settles and arms first)."""
SERVED_AFTER = 2.0
"""Seconds the host runs after the fault starts."""

# Served-link overrides: kind -> (fault text, right first-outs, why). A kind missing here
# runs as in MATRIX. ``None`` text: a matrix row the script performs itself.
SERVED_SPECS: dict[str, tuple[str | None, tuple[str, ...], str]] = {
    "none": ("", (), "no fault: the served recipe with the tolerant timing"),
    "delay": ("delay:ticks=25", ("stale",), "readings 25 periods (50 ms) old"),
    "link_delay": ("link_delay:seconds=0.05", ("stale",), "every sample 50 ms late"),
    "burst": ("burst:ticks=25", ("stale", "seq_gap"),
              "samples held 25 periods, then only the newest"),
    "overrun": ("overrun:seconds=0.05", ("stale", "link_loss"),
                "the device's clock stalls 50 ms every period (a host overrun is the "
                "tick's own rule: the sim row)"),
    "malformed": ("malformed", ("link_loss", "stale"),
                  "a sample one reading short: refused against the hello"),
    "tick_error": (None, (), "not applicable: a hook inside the in-process rig's read"),
    # The host hears of a killed device only when the OS has closed the device's end (the
    # pty, or its TCP connection and then the broker's last will): 12-95 ms after the
    # SIGKILL on this loaded machine (docs/faults.md), so the silence may trip first.
    "device_kill": (None, ("link_loss", "stale"),
                    "the served device SIGKILLed (silent until the OS closes its end)"),
    "broker_restart": (None, ("link_loss",), "mosquitto stopped and started again"),
}
SERVED_ROWS = ["none", *[k for k in MATRIX if k != "tick_error"], "device_kill",
               "broker_restart"]


def served_spec(kind: str, link: str = "serial") -> tuple[str | None, tuple[str, ...], str]:
    """(fault text, right first-outs, why) of a kind on a served link."""
    if f"{kind}@{link}" in SERVED_SPECS:
        return SERVED_SPECS[f"{kind}@{link}"]
    if kind in SERVED_SPECS:
        return SERVED_SPECS[kind]
    return MATRIX[kind]


HOST_LEAD_S = 1.0
"""Device seconds the host must be watching (engaged, the device's clock mapped) before the
fault starts; a host that came later is "late" and the row runs again (below)."""


def run_served(kind: str, link: str, base: Path, broker: Any = None) -> dict:
    """One row on a served link: `corral rig serve` (a subprocess, its own clock, the fault
    at device time SERVED_AT) and the runtime rig-clocked over ``serial:`` (a real
    pseudo-terminal) or ``mqtt://`` (a real mosquitto), in real time.

    Time to trip: the trip's host-monotonic time minus the fault's start on the same
    clock: the device's clock mapped to the host's by the smallest host-minus-device offset
    the estimator saw before the fault (the time base the stale rule uses), or the moment
    the script killed the device / restarted the broker.

    The runtime is built before the device starts its clock, and the row counts only when
    the host was engaged and mapping the device's clock `HOST_LEAD_S` before the fault:
    built after (the design and the compiled law take seconds on a loaded machine), a
    one-shot fault could pass before the host watched and the row ended with no trip
    (the served ``drop`` row over the pty did; docs/faults.md). Such a row comes back
    ``late`` (not a verdict on the fault) and `run_served_row` runs it again."""
    import time

    text, right, why = served_spec(kind, link)
    d = base / f"{link}-{kind}"
    d.mkdir(parents=True, exist_ok=True)
    fault_args: list[str] = []
    if text:
        head, _, tail = text.partition(":")
        fault_args = ["--fault", f"{head}@{SERVED_AT}" + (f":{tail}" if tail else "")]
    tty = d / "rig.tty"
    where = ["--serial", "--pty-link", str(tty)] if link == "serial" else ["--mqtt", broker.url]

    def make_runner(url: str) -> Runner:
        cfg = load_config(SERVED, [f"log.dir={d}", *TOLERANT, "supervisor.settle_time=0.2",
                                   "log.pre_capture_s=0.2", "log.post_capture_s=0.1"])
        return Runner(cfg, RunSettings(duration=None, auto_arm=True, link=url,
                                       preflight=False, echo_trips=False))

    runner = make_runner(f"serial:{tty}" if link == "serial"
                         else f"mqtt://{broker.url}/pedestal-sim")
    try:
        dev, first = serve(*where, *fault_args,
                           *[a for kv in TOLERANT for a in ("--set", kv)])
    except RuntimeError as exc:
        return {"rule": None, "after_ms": None, "action": None, "error": str(exc)}
    bg: Background | None = None
    try:
        if link == "serial" and Path(first).resolve() != tty.resolve():
            runner = make_runner(f"serial:{first}")
        bg = Background(runner)
        if not runner.ready.wait(60):
            return {"rule": None, "after_ms": None, "action": None, "error": "not ready"}
        core = runner.core
        # Wait until the host watches (engaged, or latched by a trip before the fault,
        # which `_first` reports), then for the device clock to approach the fault.
        t_fault = math.inf
        deadline = time.monotonic() + 60
        watching = False
        while time.monotonic() < deadline and bg.thread.is_alive():
            off = core.est.offset
            if math.isfinite(off):
                if not watching and (core.sup.mode == "engaged" or core.sup.latched):
                    watching = True
                    if time.monotonic() - off > SERVED_AT - HOST_LEAD_S:
                        return {"rule": None, "after_ms": None, "action": None,
                                "late": True, "error": None}
                if watching and time.monotonic() > off + SERVED_AT - 0.3:
                    t_fault = off + SERVED_AT
                    break
            time.sleep(0.02)
        if not math.isfinite(t_fault):
            return {"rule": None, "after_ms": None, "action": None,
                    "error": "the host never watched the device's clock"}
        if text is None:
            while time.monotonic() < t_fault:
                time.sleep(0.001)
            t_fault = time.monotonic()
            if kind == "device_kill":
                dev.send_signal(signal.SIGKILL)
            elif kind == "broker_restart":
                broker.restart()
                realtime_broker(broker)
        end_t = t_fault + SERVED_AFTER
        while time.monotonic() < end_t and bg.thread.is_alive():
            time.sleep(0.05)
        runner.request_stop()
        bg.thread.join(60)
        if bg.error is not None or bg.summary is None:
            return {"rule": None, "after_ms": None, "action": None,
                    "error": repr(bg.error) if bg.error else "no summary (hung)"}
        return _first(bg.summary, t_fault=t_fault)
    finally:
        if bg is not None:
            bg.abandon()
        end(dev)


def run_served_row(kind: str, link: str, base: Path, broker: Any = None,
                   attempts: int = 3) -> dict:
    """`run_served`, again (at most `attempts` runs in all) while the loaded machine
    tripped before the fault or the host came late: neither is the fault's doing. The
    result says how many runs were needed (``retries``)."""
    res: dict = {}
    for attempt in range(attempts):
        res = run_served(kind, link, base / f"try{attempt}", broker)
        res["retries"] = attempt
        if not (res.get("before") or res.get("late")):
            break
    return res


def _first(summary: dict, t_fault: float | None = None) -> dict:
    """The first trip of a run: rule, time after the fault (rig time on the in-process rig,
    host-monotonic `t_fault` on a served link), action; ``before`` when it came first."""
    trips = load_trips([summary["trip_log"]])
    if not trips:
        return {"rule": None, "after_ms": None, "action": None,
                "error": summary.get("internal_error")}
    rec = trips[0].rec
    after = ((rec.t or 0.0) - AT if t_fault is None else (rec.t_mono or 0.0) - t_fault) * 1e3
    out = {"rule": rec.first_out.rule, "after_ms": after,
           "action": rec.action, "error": summary.get("internal_error")}
    if after < -1.0:
        out["before"] = True
    return out


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


Row = tuple[str, str, dict, tuple[str, ...], str, "str | None"]
"""kind, link, result, right first-outs, why, fault text (None: run by the script)."""


def verdict(res: dict, right: tuple[str, ...], text: str | None) -> str:
    """right / MISSED / WRONG / below threshold / not applicable, for one row."""
    if text is None and not right:
        return "not applicable"
    if res.get("error") and res["rule"] is None:
        return f"ERROR ({res['error']})"
    if res.get("before"):
        return "tripped before the fault (load)"
    if res.get("late"):
        return "host late (load): not measured"
    if res["rule"] is None:
        return "no trip (below threshold by design)" if not right else "MISSED"
    if res["rule"] in right:
        return "right"
    return f"WRONG (expected {' or '.join(right) or 'none'})"


def table(rows: list[Row]) -> str:
    lines = ["| kind | link | first-out | time to trip | action | verdict | fault |",
             "|---|---|---|---|---|---|---|"]
    for kind, link, res, right, why, text in rows:
        rule = res["rule"] or ("" if text is None and not right else "none")
        after = "" if res["after_ms"] is None else f"{res['after_ms']:.0f} ms"
        if res.get("retries"):
            after += f" (run {res['retries'] + 1}: load tripped or came late before)"
        if res.get("load") is not None:
            after += f" [load {res['load']:.1f}]"
        lines.append(f"| {kind} | {link} | {rule} | {after} | {res['action'] or ''} | "
                     f"{verdict(res, right, text)} | {why} |")
    return "\n".join(lines)


def bad_rows(rows: list[Row]) -> list[Row]:
    """Rows whose verdict is not right / below threshold / not applicable."""
    return [r for r in rows if verdict(r[2], r[3], r[5]) not in
            ("right", "no trip (below threshold by design)", "not applicable")]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--write", action="store_true", help="write the table into docs/faults.md")
    ap.add_argument("--only", nargs="*", help="kinds to run (default: all)")
    ap.add_argument("--link", nargs="*", default=["sim", "serial", "mqtt"],
                    choices=("sim", "serial", "mqtt"),
                    help="links to run (default: all three; serial serves the rig over a "
                         "pty, mqtt through a mosquitto this script starts)")
    args = ap.parse_args()
    rows: list[Row] = []
    with tempfile.TemporaryDirectory() as tmp:
        broker = None
        try:
            for link in args.link:
                kinds = list(MATRIX) if link == "sim" else [
                    k for k in SERVED_ROWS if not (k == "broker_restart" and link != "mqtt")]
                if link == "mqtt" and broker is None:
                    from tests.mqtt_broker import Broker

                    (Path(tmp) / "broker").mkdir()
                    broker = Broker(Path(tmp) / "broker")
                    broker.start()
                    realtime_broker(broker)
                for kind in kinds:
                    if args.only and kind not in args.only:
                        continue
                    text: str | None
                    if link == "sim":
                        text, right, why = MATRIX[kind]
                        res = run_one(kind, text, Path(tmp))
                    else:
                        text, right, why = served_spec(kind, link)
                        if text is None and not right:
                            res = {"rule": None, "after_ms": None, "action": None}
                        else:
                            # A trip before the fault is this loaded machine's, not the
                            # fault's: run the row again (at most twice; the table says so).
                            res = run_served_row(kind, link, Path(tmp), broker)
                    res["load"] = os.getloadavg()[0]
                    rows.append((kind, link, res, right, why, text))
                    print(f"{kind:20s} {link:6s} {res['rule']!s:20s} "
                          f"{res['after_ms']!s:>10.10s} ms {res['action']!s} "
                          f"{verdict(res, right, text)}", flush=True)
        finally:
            if broker is not None:
                broker.stop()
    out = table(rows)
    print(out)
    if args.write:
        doc = ROOT / "docs" / "faults.md"
        text = doc.read_text()
        m0 = re.search(r"<!-- matrix:begin -->\n(.*?)<!-- matrix:end -->", text, flags=re.S)
        # Rows not run this time stay (so a link or a kind can be run again alone).
        ran = {(r[0], r[1]) for r in rows}
        kept = [ln for ln in (m0.group(1).splitlines()[2:] if m0 else [])
                if ln.startswith("| ")
                and (ln.split("|")[1].strip(), ln.split("|")[2].strip()) not in ran]
        order = {"sim": 0, "serial": 1, "mqtt": 2}
        kinds = {k: i for i, k in enumerate(["none", *MATRIX, "device_kill",
                                                 "broker_restart"])}
        body = sorted(kept + out.splitlines()[2:],
                      key=lambda ln: (order.get(ln.split("|")[2].strip(), 3),
                                      kinds.get(ln.split("|")[1].strip(), 99)))
        merged = "\n".join(out.splitlines()[:2] + body)
        new = re.sub(r"(<!-- matrix:begin -->\n).*?(<!-- matrix:end -->)",
                     lambda m: m.group(1) + merged + "\n" + m.group(2), text, flags=re.S)
        if new == text and out not in text:
            print(f"no <!-- matrix:begin/end --> markers in {doc}", file=sys.stderr)
            return 2
        doc.write_text(new)
        print(f"written to {doc}")
    return 1 if bad_rows(rows) else 0


if __name__ == "__main__":
    sys.exit(main())
