"""The host check: can this computer hold the loop's period, and why a timing rule tripped.

Three plain parts:

- `measure` paces an empty tick with the runtime's own clock
  (`runtime.realtime.clock.DeadlineClock`: absolute deadlines, short spin, SCHED_FIFO
  when allowed) for a few seconds and returns the timer lateness (p50, p99,
  max), the worst stall (the longest time the pacing thread was held off:
  the larger of the worst lateness and the longest gap between two ticks
  beyond one period) and the deadline misses.
- `host_facts` reads what the host allows and how busy it is: real-time
  priority rights (a probe thread asks for SCHED_FIFO; RLIMIT_RTPRIO,
  CAP_SYS_NICE, root), memory locking (RLIMIT_MEMLOCK, CAP_IPC_LOCK), the CPU
  frequency governor, the load average and the cores this process may use.
- `verdict` is a pure function of those figures and the configured
  thresholds (`Thresholds`: the period, ``watchdog.stale_periods``,
  ``overrun_misses``, ``overrun_window``): ok or not, and advice in plain
  words with the figures and units. Tests feed it fixed figures.

`explain_trip` turns a timing rule's first-out value and threshold into words
with units and names the likely cause with the host's figures, for the trip
line the runtime prints and for `corral trips --show`.

How the limits follow from the rules (`runtime.guard.watchdog.build_rules`): the
stale rule trips when the newest sample is older than (stale_periods + 0.5)
periods; a stall of d seconds leaves the tick with a sample about d + one
period old, so the host may stall at most (stale_periods - 0.5) periods. The
overrun rule trips at overrun_misses deadline misses within the last
overrun_window ticks; a stall of d seconds alone costs about d / period
misses at once. A few seconds of measurement see fewer rare stalls than a
long run: the verdict asks for headroom (the worst stall within the budget,
the mean miss rate under half the overrun limit), and an ok is no promise.

What does not live here: the clock (`runtime.realtime.clock`), the rules
(`runtime.guard.watchdog`), the command line (`runtime.cli.cmd_hostcheck`).
"""

from __future__ import annotations

import math
import os
import resource
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from runtime import schema
from runtime.guard.watchdog import DEFAULTS
from runtime.realtime.clock import DeadlineClock

DEFAULT_SECONDS = float(schema.default_of("loop.hostcheck_s"))
"""How long `corral hostcheck` measures when ``--seconds`` is not given (the same as the
pre-arm check's default, ``loop.hostcheck_s``)."""

CAP_IPC_LOCK = 14
CAP_SYS_NICE = 23
TIMING_RULES = ("stale", "overrun", "link_loss", "seq_gap")
"""The rules whose trips `explain_trip` puts into words."""


@dataclass(frozen=True)
class Thresholds:
    """What the loop must hold: the period and the timing rules' settings."""

    period_s: float
    stale_periods: float = float(DEFAULTS["stale_periods"])
    overrun_misses: float = float(DEFAULTS["overrun_misses"])
    overrun_window: int = int(DEFAULTS["overrun_window"])

    @property
    def stale_limit_s(self) -> float:
        """Sample age at which the stale rule trips (s)."""
        return (self.stale_periods + 0.5) * self.period_s

    @property
    def stall_budget_s(self) -> float:
        """Longest stall of the host that stays under the stale limit (s)."""
        return max(0.0, (self.stale_periods - 0.5) * self.period_s)


def thresholds_from_config(cfg: Any) -> Thresholds:
    """`Thresholds` from ``loop.period`` and ``[watchdog]`` (defaults as the watchdog's)."""
    period = float(cfg.number("loop.period"))
    return Thresholds(
        period_s=period,
        stale_periods=float(cfg.number("watchdog.stale_periods")),
        overrun_misses=float(cfg.number("watchdog.overrun_misses")),
        overrun_window=int(cfg.number("watchdog.overrun_window")),
    )


# ---------------------------------------------------------------------------
# Measuring
# ---------------------------------------------------------------------------

def measure(period: float, seconds: float, spin_us: float = 200.0, realtime: bool = True,
            progress: Callable[[float, float], None] | None = None) -> dict[str, Any]:
    """Pace an empty tick with `DeadlineClock` for `seconds`; the lateness and stall figures.

    Returns ``ticks``, ``lateness_p50_us``, ``lateness_p99_us``, ``lateness_max_us``,
    ``worst_stall_ms``, ``misses``, ``clock`` (what the clock thread was granted) and
    ``realtime`` (it ran at SCHED_FIFO). `progress(elapsed_s, seconds)` is called from
    this thread about four times a second while the clock runs.
    """
    clock = DeadlineClock(period, spin_us=spin_us, realtime=realtime)
    mono = time.monotonic
    state = {"last": math.nan, "gap": 0.0, "end": math.inf}
    done = threading.Event()

    def tick(k: int, deadline: float) -> None:
        now = mono()
        if k == 0:
            state["end"] = deadline + seconds
        else:
            gap = now - state["last"]
            if gap > state["gap"]:
                state["gap"] = gap
        state["last"] = now
        if now >= state["end"]:
            clock.stop()

    t0 = mono()
    clock.start(tick, done.set)
    try:
        while not done.wait(0.25):
            if progress is not None:
                progress(min(mono() - t0, seconds), seconds)
    finally:
        clock.stop()
        clock.join(5.0)
    if clock.error is not None:
        raise clock.error
    if progress is not None:
        progress(seconds, seconds)
    p50, p99, mx = clock.stats.percentiles_us()
    stall = max(mx * 1e-6 if math.isfinite(mx) else 0.0, state["gap"] - period, 0.0)
    return {"ticks": int(clock.stats.count), "seconds": float(seconds),
            "lateness_p50_us": _clean(p50), "lateness_p99_us": _clean(p99),
            "lateness_max_us": _clean(mx), "worst_stall_ms": stall * 1e3,
            "misses": int(clock.stats.misses), "clock": clock.granted,
            "realtime": "SCHED_FIFO" in clock.granted}


def _clean(v: float) -> float:
    return float(v) if math.isfinite(v) else 0.0


# ---------------------------------------------------------------------------
# What the host allows and how busy it is
# ---------------------------------------------------------------------------

def _capabilities() -> int:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("CapEff:"):
                return int(line.split()[1], 16)
    except (OSError, ValueError, IndexError):
        pass
    return 0


def _limit(which: int) -> int | None:
    """Soft limit (None = unlimited)."""
    try:
        soft, _ = resource.getrlimit(which)
    except (OSError, ValueError):
        return 0
    return None if soft == resource.RLIM_INFINITY else int(soft)


def probe_realtime() -> bool:
    """True when a thread of this process may switch itself to SCHED_FIFO (tried in a
    throw-away thread, so the caller keeps its policy)."""
    ok: list[bool] = []

    def attempt() -> None:
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(1))
            ok.append(True)
        except (PermissionError, OSError, AttributeError):
            ok.append(False)

    t = threading.Thread(target=attempt, name="corral-rt-probe", daemon=True)
    t.start()
    t.join(5.0)
    return bool(ok and ok[0])


def _governors() -> dict[str, str]:
    """scaling_governor per CPU, when the kernel exposes it (empty on most VMs)."""
    out = {}
    for path in sorted(Path("/sys/devices/system/cpu").glob("cpu[0-9]*/cpufreq/"
                                                            "scaling_governor")):
        try:
            out[path.parent.parent.name] = path.read_text().strip()
        except OSError:
            continue
    return out


def _rss_bytes() -> int:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def host_facts() -> dict[str, Any]:
    """Real-time rights, memory locking, governor, load and cores of this host."""
    caps = _capabilities()
    root = os.geteuid() == 0
    rtprio = _limit(resource.RLIMIT_RTPRIO)
    memlock = _limit(resource.RLIMIT_MEMLOCK)
    ipc_lock = root or bool(caps >> CAP_IPC_LOCK & 1)
    rss = _rss_bytes()
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan, math.nan, math.nan)
    try:
        cpus = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cpus = os.cpu_count() or 1
    return {
        "realtime_rights": {"sched_fifo_possible": probe_realtime(), "root": root,
                            "cap_sys_nice": bool(caps >> CAP_SYS_NICE & 1),
                            "rlimit_rtprio": rtprio},
        "memlock": {"rlimit_bytes": memlock, "cap_ipc_lock": ipc_lock,
                    "mlockall_possible": ipc_lock or memlock is None or memlock >= 2 * rss},
        "governor": _governors() or None,
        "load_1min": float(load[0]), "cpus": int(cpus), "cpus_online": os.cpu_count() or cpus,
    }


# ---------------------------------------------------------------------------
# The verdict (pure)
# ---------------------------------------------------------------------------

def _ms(seconds: float) -> str:
    ms = seconds * 1e3
    return f"{ms:.1f} ms" if abs(ms) >= 1.0 else f"{ms:.2f} ms"


def _nice_period(seconds: float) -> float:
    """The smallest 1, 2, 2.5 or 5 x 10^k seconds at or above `seconds`."""
    if not seconds > 0:
        return seconds
    exp = math.floor(math.log10(seconds))
    for step in (1.0, 2.0, 2.5, 5.0, 10.0):
        cand = step * 10.0 ** exp
        if cand >= seconds * (1 - 1e-9):
            return cand
    return 10.0 ** (exp + 1)


def verdict(fig: Mapping[str, Any], th: Thresholds, loop_realtime: bool = True,
            rig_clocked: bool = True) -> dict[str, Any]:
    """Can this host hold the period with these thresholds? A pure function of the figures.

    `fig` holds the measured ``lateness_p50_us``, ``lateness_p99_us``,
    ``worst_stall_ms``, ``misses``, ``ticks`` and, when known, ``realtime`` (the
    measuring clock ran at SCHED_FIFO), ``realtime_rights``
    (``sched_fifo_possible``, ``rlimit_rtprio``, ``cap_sys_nice``, ``root``),
    ``memlock`` (``mlockall_possible``, ``rlimit_bytes``), ``governor`` (cpu -> name),
    ``load_1min`` and ``cpus``. `loop_realtime` is the config's ``loop.realtime``.
    `rig_clocked` is False for the in-process simulated rig: its samples carry the
    loop's own nominal time, so a host stall does not age them and only the overrun
    rule judges the host (the stale budget is then a note for a real rig).

    Returns ``ok``, ``problems`` (why not, empty when ok), ``advice`` (what to change,
    and notes that do not decide the verdict), ``predicted_misses_per_window``,
    ``stall_budget_ms`` and ``stale_limit_ms``.
    """
    P = th.period_s
    p99_s = float(fig.get("lateness_p99_us") or 0.0) * 1e-6
    stall_s = float(fig.get("worst_stall_ms") or 0.0) * 1e-3
    ticks = int(fig.get("ticks") or 0)
    misses = int(fig.get("misses") or 0)
    rate = misses / ticks if ticks > 0 else 0.0
    predicted = rate * th.overrun_window
    burst = stall_s / P
    budget = th.stall_budget_s
    limit = th.overrun_misses
    problems: list[str] = []
    advice: list[str] = []
    stall_bad = rig_clocked and (p99_s > budget or stall_s > budget)
    if not rig_clocked:
        pass
    elif p99_s > budget:
        problems.append(
            f"timer lateness p99 {_ms(p99_s)} exceeds the stall budget of the stale rule, "
            f"{_ms(budget)} ({th.stale_periods:g} - 0.5 periods of {_ms(P)}; the rule trips "
            f"at a sample {_ms(th.stale_limit_s)} old): the stale rule would trip within "
            "seconds")
    elif stall_s > budget:
        problems.append(
            f"worst stall {_ms(stall_s)} exceeds the stall budget of the stale rule, "
            f"{_ms(budget)} ({th.stale_periods:g} - 0.5 periods of {_ms(P)}; the rule trips "
            f"at a sample {_ms(th.stale_limit_s)} old)")
    if predicted >= 0.5 * limit:
        problems.append(
            f"{misses} deadline misses in {ticks} ticks predict {predicted:.1f} per "
            f"{th.overrun_window} ticks; the overrun rule trips at {limit:g} (headroom asked: "
            f"under half, {0.5 * limit:g})")
    elif burst >= limit:
        problems.append(
            f"one stall of {_ms(stall_s)} costs about {burst:.0f} deadline misses at once; the "
            f"overrun rule trips at {limit:g} in {th.overrun_window} ticks")
    if ticks <= 0:
        problems.append("no tick was measured: the clock did not run (give --seconds of at "
                        "least a few periods)")
    ok = not problems

    if not rig_clocked and max(p99_s, stall_s) > budget:
        advice.append(
            f"on a real rig at this period the stale rule would see the {_ms(max(p99_s, stall_s))}"
            f" stall (budget {_ms(budget)}): the simulated rig does not age its samples, a "
            "device does")
    rights = fig.get("realtime_rights") or {}
    realtime = bool(fig.get("realtime"))
    if not ok:
        need_s = max(stall_s, p99_s)
        if stall_bad:
            per = _nice_period(need_s / max(th.stale_periods - 0.5, 0.5))
            sp = math.ceil(need_s / P + 0.5)
            advice.append(
                f"a longer period: loop.period >= {per:g} s holds a {_ms(need_s)} stall with "
                f"stale_periods = {th.stale_periods:g} (if the rig's dynamics allow it; run "
                "`corral design` and `corral preflight` again)")
            advice.append(
                f"or looser thresholds: watchdog.stale_periods >= {sp} at {_ms(P)} (the rule "
                f"then trips at a sample {_ms((sp + 0.5) * P)} old)")
        if predicted >= 0.5 * limit or burst >= limit:
            need = math.ceil(max(2 * predicted, burst) + 1)
            advice.append(
                f"looser overrun rule: watchdog.overrun_misses >= {need} in "
                f"{th.overrun_window} ticks, or a longer period")
    if not realtime:
        if not loop_realtime:
            advice.append("loop.realtime = false in the config: the loop runs at normal "
                          "priority and every busy process can hold it off; set it to true")
        elif not rights.get("sched_fifo_possible", False):
            advice.append(
                "no real-time priority: SCHED_FIFO was refused (RLIMIT_RTPRIO "
                f"{_lim(rights.get('rlimit_rtprio'))}, CAP_SYS_NICE "
                f"{'yes' if rights.get('cap_sys_nice') else 'no'}, root "
                f"{'yes' if rights.get('root') else 'no'}); grant it: an rtprio limit for the "
                "operator's group in /etc/security/limits.conf (e.g. '@realtime - rtprio 90'), "
                "CAP_SYS_NICE on the Python interpreter, or run as root")
        else:
            advice.append("the measuring clock did not get SCHED_FIFO although a probe may: "
                          "check loop.realtime and the container's real-time runtime limit")
    load = fig.get("load_1min")
    cpus = int(fig.get("cpus") or 0)
    if isinstance(load, (int, float)) and math.isfinite(load) and cpus > 0 and load > 0.7 * cpus:
        advice.append(f"a quieter host: load average {load:.1f} (1 min) on {cpus} core"
                      f"{'s' if cpus != 1 else ''}; stop other heavy work or move the loop "
                      "to a computer of its own")
    gov = fig.get("governor") or {}
    slow = sorted({g for g in gov.values() if g != "performance"})
    if slow:
        advice.append(f"CPU frequency governor {', '.join(slow)}: wake-ups are slower while "
                      "the clock ramps up; 'performance' avoids it (cpupower frequency-set -g "
                      "performance)")
    mem = fig.get("memlock") or {}
    if mem and not mem.get("mlockall_possible", True):
        advice.append(f"memory locking is limited (RLIMIT_MEMLOCK "
                      f"{_lim(mem.get('rlimit_bytes'), 'bytes')}): a page fault can stall the "
                      "tick; raise it (e.g. '@realtime - memlock unlimited' in "
                      "/etc/security/limits.conf)")
    if ok and not advice:
        advice.append("nothing to change")
    return {"ok": ok, "problems": problems, "advice": advice,
            "predicted_misses_per_window": predicted, "burst_misses": burst,
            "stall_budget_ms": budget * 1e3, "stale_limit_ms": th.stale_limit_s * 1e3}


def _lim(v: Any, unit: str = "") -> str:
    if v is None:
        return "unlimited"
    if unit == "bytes" and isinstance(v, int):
        return f"{v // 1024} KiB"
    return str(v)


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
    rig_clocked = str(link or cfg.get("rig.link")).split(":", 1)[0] != "sim"
    facts = host_facts()
    fig = measure(th.period_s, secs, spin_us=float(cfg.number("loop.spin_us")),
                  realtime=loop_rt, progress=progress)
    fig.update(facts)
    v = verdict(fig, th, loop_realtime=loop_rt, rig_clocked=rig_clocked)
    return {"ok": v["ok"], "period_s": th.period_s, "seconds": secs,
            "link": "rig-clocked" if rig_clocked else "simulated (in-process)",
            "lateness_p50_us": fig["lateness_p50_us"], "lateness_p99_us": fig["lateness_p99_us"],
            "lateness_max_us": fig["lateness_max_us"], "worst_stall_ms": fig["worst_stall_ms"],
            "misses": fig["misses"], "ticks": fig["ticks"],
            "predicted_misses_per_window": v["predicted_misses_per_window"],
            "realtime": fig["realtime"], "clock": fig["clock"],
            "realtime_rights": facts["realtime_rights"], "memlock": facts["memlock"],
            "governor": facts["governor"], "load_1min": facts["load_1min"],
            "cpus": facts["cpus"],
            "thresholds": {"stale_periods": th.stale_periods,
                           "stale_limit_ms": v["stale_limit_ms"],
                           "stall_budget_ms": v["stall_budget_ms"],
                           "overrun_misses": th.overrun_misses,
                           "overrun_window": th.overrun_window},
            "problems": v["problems"], "advice": v["advice"], "t_wall": time.time()}


def report_lines(res: Mapping[str, Any], name: str = "") -> list[str]:
    """The readable report of a `run_hostcheck` result."""
    P = float(res["period_s"])
    th = res.get("thresholds") or {}
    head = f"corral hostcheck{': ' + name if name else ''}: period {_ms(P)} ({1 / P:g} Hz): "
    lines = [head + ("OK, this host can hold it" if res["ok"]
                     else "NOT OK, this host cannot hold it as configured")]
    lines.append(
        f"  measured {res['seconds']:g} s, {res['ticks']} ticks: timer lateness p50 "
        f"{res['lateness_p50_us']:.0f} us, p99 {res['lateness_p99_us']:.0f} us; worst stall "
        f"{res['worst_stall_ms']:.2f} ms; {res['misses']} deadline "
        + ("miss" if res["misses"] == 1 else "misses"))
    if th and not str(res.get("link", "")).startswith("simulated"):
        lines.append(
            f"  stale rule: trips at a sample {th['stale_limit_ms']:.2f} ms old "
            f"({th['stale_periods']:g} + 0.5 periods), so stalls up to "
            f"{th['stall_budget_ms']:.2f} ms pass")
    if th:
        lines.append(
            f"  overrun rule: trips at {th['overrun_misses']:g} misses in "
            f"{th['overrun_window']} ticks; predicted {res['predicted_misses_per_window']:.1f}")
    lines.append(f"  link: {res.get('link', '?')}")
    lines.append(f"  real-time: {res.get('clock') or 'not asked (loop.realtime = false)'}")
    gov = res.get("governor")
    gov_text = (", ".join(sorted(set(gov.values()))) if gov else "not exposed by this kernel")
    lines.append(f"  host: {res['cpus']} cores, load {res['load_1min']:.2f} (1 min), "
                 f"governor {gov_text}, memory locking "
                 + ("possible" if (res.get("memlock") or {}).get("mlockall_possible")
                    else "limited"))
    for p in res.get("problems") or []:
        lines.append(f"  problem: {p}")
    for a in res.get("advice") or []:
        lines.append(f"  advice: {a}")
    lines.append("  A few seconds see fewer rare stalls than a long run: an OK is headroom, "
                 "not a promise.")
    return lines


def summary_line(res: Mapping[str, Any]) -> str:
    """One line for the run's console and the arm dialog."""
    word = "OK" if res.get("ok") else "NOT OK"
    text = (f"host check {word}: lateness p99 {float(res.get('lateness_p99_us') or 0):.0f} us, "
            f"worst stall {float(res.get('worst_stall_ms') or 0):.2f} ms at period "
            f"{_ms(float(res.get('period_s') or 0))}, "
            f"{'SCHED_FIFO' if res.get('realtime') else 'normal priority'}")
    if not res.get("ok") and res.get("advice"):
        text += f"; {res['advice'][0]}"
    return text


def pre_arm_check(cfg: Any, out: Any, link: str | None = None) -> dict[str, Any] | None:
    """The host check `corral run` does before a real rig may be armed (``loop.hostcheck_s``
    seconds, default `DEFAULT_SECONDS`; 0 skips it). Progress and the verdict go to `out`.
    The verdict informs; it does not refuse the arm."""
    secs = float(cfg.number("loop.hostcheck_s"))
    if secs <= 0:
        return None
    print(f"corral: host check: measuring this computer's timing for {secs:g} s "
          "(loop.hostcheck_s; 0 skips it)", file=out, flush=True)
    res = run_hostcheck(cfg, secs, link=link)
    print(f"corral: {summary_line(res)}", file=out, flush=True)
    for a in res["problems"]:
        print(f"corral:   problem: {a}", file=out, flush=True)
    return res


# ---------------------------------------------------------------------------
# Timing trips in words
# ---------------------------------------------------------------------------

def _num(v: Any) -> float | None:
    if isinstance(v, bool) or v is None:
        return None
    if isinstance(v, (int, float)):
        return float(v)
    if isinstance(v, str):
        try:
            return float(v)
        except ValueError:
            return None
    return None


def explain_trip(rule: str, value: Any, threshold: Any, period: float | None,
                 window: int | None = None, host: Mapping[str, Any] | None = None,
                 loop: Mapping[str, Any] | None = None) -> str | None:
    """A timing rule's first-out in words with units, and the likely cause; None otherwise.

    `value` and `threshold` are the trip record's (the rule's units: seconds for
    stale and link_loss, counts for overrun and seq_gap). `period` is the loop
    period (s); `window` the overrun window (ticks); `host` the host check's result
    (`run_hostcheck`) when one ran; `loop` the run's own loop figures at the trip
    (``lateness_p99_us``, ``lateness_max_us``, ``deadline_misses``).
    """
    if rule not in TIMING_RULES:
        return None
    v, thr = _num(value), _num(threshold)
    P = period if period and period > 0 else None
    if rule == "stale":
        if v is None or thr is None:
            return None
        text = f"no fresh sample for {_ms(v)}; limit {_ms(thr)}"
        if P:
            text += f" = {thr / P:.3g} periods of {_ms(P)}"
    elif rule == "overrun":
        if v is None or thr is None:
            return None
        text = (f"{v:.0f} deadline{'' if v == 1 else 's'} missed in the last {window or '?'} "
                f"ticks; limit "
                f"{math.ceil(thr - 1e-9):d}")
    elif rule == "link_loss":
        if thr is None:
            return None
        if v is None or math.isinf(v):
            text = f"link disconnected; limit {_ms(thr)} without a sample"
        else:
            text = f"no sample for {_ms(v)}; limit {_ms(thr)}"
    else:  # seq_gap
        if v is None or thr is None:
            return None
        text = (f"{v:.0f} sample{'s' if v != 1 else ''} missing from the sequence; limit "
                f"{math.floor(thr):d}")
    return f"{text}. {_cause(rule, host, loop, P, thr)}"


def _cause(rule: str, host: Mapping[str, Any] | None, loop: Mapping[str, Any] | None,
           P: float | None, thr: float | None) -> str:
    """'Likely cause: ... . This run: ... . Host check: ... . <what to do>.'"""
    bits = []
    if loop:
        p99, mx = _num(loop.get("lateness_p99_us")), _num(loop.get("lateness_max_us"))
        miss = loop.get("deadline_misses")
        if p99 is not None and math.isfinite(p99):
            bits.append(f"This run: lateness p99 {p99:.0f} us"
                        + (f", max {mx / 1e3:.2f} ms" if mx is not None and math.isfinite(mx)
                           else "")
                        + (f", {miss} deadline miss{'' if miss == 1 else 'es'}"
                           if miss is not None else "") + ".")
    host_fine = False
    if host:
        stall = _num(host.get("worst_stall_ms")) or 0.0
        p99h = _num(host.get("lateness_p99_us")) or 0.0
        bits.append(f"Host check before arming: lateness p99 {p99h:.0f} us, worst stall "
                    f"{stall:.2f} ms, "
                    + ("SCHED_FIFO" if host.get("realtime") else "normal priority")
                    + (", OK." if host.get("ok") else ", NOT OK."))
        budget = (host.get("thresholds") or {}).get("stall_budget_ms")
        host_fine = bool(host.get("ok")) and (budget is None or stall < 0.5 * float(budget))
    figures = "".join(f" {b}" for b in bits)
    if rule == "stale" and host_fine:
        return (f"Likely cause: the link or the device; the host check found this computer "
                f"quiet enough.{figures} If it has got busier since, `corral hostcheck CONFIG` "
                "tells.")
    if rule in ("stale", "overrun"):
        return (f"Likely cause: this computer held the loop off (other busy or real-time "
                f"processes).{figures} Measure it with `corral hostcheck CONFIG`.")
    return (f"Likely cause: the link or the device, or this computer holding the reader off."
            f"{figures} `corral hostcheck CONFIG` measures the computer.")


def explain_from_header(rule: str, value: Any, threshold: Any, header: Mapping[str, Any],
                        loop: Mapping[str, Any] | None = None) -> str | None:
    """`explain_trip` with the period, overrun window and host check read from a log header."""
    cfg = header.get("config") or {}
    period = _num(header.get("period"))
    if period is None:
        period = _num((cfg.get("loop") or {}).get("period"))
    wd = cfg.get("watchdog") or {}
    window = _num(wd.get("overrun_window")) if isinstance(wd, dict) else None
    return explain_trip(rule, value, threshold, period,
                        int(window) if window else int(DEFAULTS["overrun_window"]),
                        header.get("hostcheck") or None, loop)

