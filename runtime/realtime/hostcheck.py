"""The host check: can this computer hold the loop's period, and why a timing rule tripped.

Three parts, one module each, all re-exported here:

- `runtime.realtime.hostmeasure`: `measure` (an empty tick paced by the runtime's own
  clock: timer lateness, worst stall, deadline misses) and `host_facts` (real-time
  rights, memory locking, governor, load, cores, the kernel's preemption model and
  whether it is a virtual machine, read by `runtime.realtime.hostkernel`);
- `runtime.realtime.hostverdict`: `verdict`, a pure function of those figures and the
  configured thresholds (`Thresholds`), ok or not with advice in plain words, and the
  report (`report_lines`, `summary_line`);
- `runtime.realtime.timingtrips`: `explain_trip` turns a timing rule's first-out value
  and threshold into words with units and names the likely cause with the host's
  figures, for the trip line the runtime prints and for `corral trips --show`.

This module runs the whole check (`run_hostcheck`) and the one before arming a real rig
(`pre_arm_check`).

What does not live here: the clock (`runtime.realtime.clock`), the rules
(`runtime.guard.watchdog`), the command line (`runtime.cli.cmd_hostcheck`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

from runtime import schema
from runtime.realtime import linkfloor
from runtime.realtime.hostmeasure import (
    CAP_IPC_LOCK,
    CAP_SYS_NICE,
    host_facts,
    measure,
    probe_realtime,
)
from runtime.realtime.hostverdict import (
    Thresholds,
    host_cause_tag,
    report_lines,
    summary_line,
    thresholds_from_config,
    verdict,
)
from runtime.realtime.links import link_kind
from runtime.realtime.timingtrips import TIMING_RULES, explain_from_header, explain_trip

__all__ = [
    "CAP_IPC_LOCK", "CAP_SYS_NICE", "DEFAULT_SECONDS", "TIMING_RULES", "Thresholds",
    "explain_from_header", "explain_trip", "host_facts", "measure", "pre_arm_check",
    "probe_realtime", "report_lines", "run_hostcheck", "summary_line",
    "thresholds_from_config", "verdict",
]

DEFAULT_SECONDS = float(schema.default_of("loop.hostcheck_s"))
"""How long `corral hostcheck` measures when ``--seconds`` is not given (the same as the
pre-arm check's default, ``loop.hostcheck_s``)."""


# ---------------------------------------------------------------------------
# The whole check
# ---------------------------------------------------------------------------

def run_hostcheck(cfg: Any, seconds: float | None = None,
                  progress: Callable[[float, float], None] | None = None,
                  link: str | None = None) -> dict[str, Any]:
    """Measure at the config's period, read the host's facts, judge: one result map.

    `link` is the run's link spec when it differs from ``rig.link`` (``--link``)."""
    th = thresholds_from_config(cfg)
    secs = float(seconds if seconds is not None else DEFAULT_SECONDS)
    loop_rt = bool(cfg.flag("loop.realtime"))
    kind = link_kind(cfg, link)
    rig_clocked = kind != "sim"
    facts = host_facts()
    fig = measure(th.period_s, secs, spin_us=float(cfg.number("loop.spin_us")),
                  realtime=loop_rt, progress=progress)
    fig.update(facts)
    if kind == "serial":
        # The kernel's tty path the samples take, without corral: as long again.
        fig["link_floor"] = linkfloor.pty_summary(linkfloor.run("pty", th.period_s, secs),
                                                  th.stale_limit_s)
    v = verdict(fig, th, loop_realtime=loop_rt, rig_clocked=rig_clocked, link_kind=kind)
    return {"ok": v["ok"], "period_s": th.period_s, "seconds": secs,
            "link": "rig-clocked" if rig_clocked else "simulated (in-process)",
            "lateness_p50_us": fig["lateness_p50_us"], "lateness_p99_us": fig["lateness_p99_us"],
            "lateness_max_us": fig["lateness_max_us"], "worst_stall_ms": fig["worst_stall_ms"],
            "misses": fig["misses"], "ticks": fig["ticks"],
            "predicted_misses_per_window": v["predicted_misses_per_window"],
            "realtime": fig["realtime"], "clock": fig["clock"],
            "realtime_rights": facts["realtime_rights"], "memlock": facts["memlock"],
            "governor": facts["governor"], "load_1min": facts["load_1min"],
            "cpus": facts["cpus"], "kernel": facts["kernel"], "virtual": facts["virtual"],
            "steal_pct": fig["steal_pct"], "link_floor": fig.get("link_floor"),
            "thresholds": {"stale_periods": th.stale_periods,
                           "stale_limit_ms": v["stale_limit_ms"],
                           "stall_budget_ms": v["stall_budget_ms"],
                           "overrun_misses": th.overrun_misses,
                           "overrun_window": th.overrun_window},
            "problems": v["problems"], "advice": v["advice"], "t_wall": time.time()}


def pre_arm_check(cfg: Any, out: Any, link: str | None = None) -> dict[str, Any] | None:
    """The host check `corral run` does before a real rig may be armed (``loop.hostcheck_s``
    seconds, default `DEFAULT_SECONDS`; 0 skips it). Progress and the verdict go to `out`.
    The verdict informs; it does not refuse the arm."""
    secs = float(cfg.number("loop.hostcheck_s"))
    if secs <= 0:
        return None
    serial = link_kind(cfg, link) == "serial"
    print(f"corral: host check: measuring this computer's timing for {secs:g} s "
          + ("and its serial path as long again " if serial else "")
          + "(loop.hostcheck_s; 0 skips it)", file=out, flush=True)
    res = run_hostcheck(cfg, secs, link=link)
    print(f"corral: {summary_line(res)}", file=out, flush=True)
    for a in res["problems"]:
        print(f"corral:   problem: {a}", file=out, flush=True)
    tag = host_cause_tag(res)
    if tag:
        print(f"corral:   host: {tag[2:]}: it can stall the loop for milliseconds whatever "
              "corral does; `corral hostcheck CONFIG` says what to change", file=out, flush=True)
    return res
