"""The host check's verdict and report, in words: pure functions of the figures.

`verdict` judges the measured figures (`runtime.realtime.hostmeasure`) against the
configured thresholds (`Thresholds`: the period, ``watchdog.stale_periods``,
``overrun_misses``, ``overrun_window``): ok or not, and advice in plain words with
the figures and units. Tests feed it fixed figures. `report_lines` and `summary_line`
put a whole check's result (`runtime.realtime.hostcheck.run_hostcheck`) into words.

How the limits follow from the rules (`runtime.guard.watchdog.build_rules`): the
stale rule trips when the newest sample is older than (stale_periods + 0.5)
periods; a stall of d seconds leaves the tick with a sample about d + one
period old, so the host may stall at most (stale_periods - 0.5) periods. The
overrun rule trips at overrun_misses deadline misses within the last
overrun_window ticks; a stall of d seconds alone costs about d / period
misses at once. A few seconds of measurement see fewer rare stalls than a
long run: the verdict asks for headroom (the worst stall within the budget,
the mean miss rate under half the overrun limit), and an ok is no promise.

Two host causes are named as notes that never decide the verdict by themselves
(`runtime.realtime.hostkernel`): a kernel that does not preempt kernel code
(preemption model none or voluntary) and a virtual machine (its hypervisor stalls
every vCPU at once, the steal share measured during the check).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from runtime.guard.watchdog import DEFAULTS
from runtime.realtime.hostkernel import NOT_PREEMPTIBLE


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
# The verdict (pure)
# ---------------------------------------------------------------------------

def ms_text(seconds: float) -> str:
    """A duration in milliseconds, two decimals below 1 ms."""
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
            rig_clocked: bool = True, link_kind: str | None = None) -> dict[str, Any]:
    """Can this host hold the period with these thresholds? A pure function of the figures.

    `fig` holds the measured ``lateness_p50_us``, ``lateness_p99_us``,
    ``worst_stall_ms``, ``misses``, ``ticks`` and, when known, ``realtime`` (the
    measuring clock ran at SCHED_FIFO), ``realtime_rights``
    (``sched_fifo_possible``, ``rlimit_rtprio``, ``cap_sys_nice``, ``root``),
    ``memlock`` (``mlockall_possible``, ``rlimit_bytes``), ``governor`` (cpu -> name),
    ``load_1min``, ``cpus``, ``kernel`` (``preempt``, ``how``: `host_kernel_notes`),
    ``virtual`` and ``steal_pct``. `loop_realtime` is the config's ``loop.realtime``.
    `rig_clocked` is False for the in-process simulated rig: its samples carry the
    loop's own nominal time, so a host stall does not age them and only the overrun
    rule judges the host (the stale budget is then a note for a real rig). `link_kind` is
    the link spec's scheme (``sim``, ``serial``, ``mqtt``) when known.

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
            f"timer lateness p99 {ms_text(p99_s)} exceeds the stall budget of the stale rule, "
            f"{ms_text(budget)} ({th.stale_periods:g} - 0.5 periods of {ms_text(P)}; the rule "
            f"trips at a sample {ms_text(th.stale_limit_s)} old): the stale rule would trip "
            "within seconds")
    elif stall_s > budget:
        problems.append(
            f"worst stall {ms_text(stall_s)} exceeds the stall budget of the stale rule, "
            f"{ms_text(budget)} ({th.stale_periods:g} - 0.5 periods of {ms_text(P)}; the rule "
            f"trips at a sample {ms_text(th.stale_limit_s)} old)")
    if predicted >= 0.5 * limit:
        problems.append(
            f"{misses} deadline misses in {ticks} ticks predict {predicted:.1f} per "
            f"{th.overrun_window} ticks; the overrun rule trips at {limit:g} (headroom asked: "
            f"under half, {0.5 * limit:g})")
    elif burst >= limit:
        problems.append(
            f"one stall of {ms_text(stall_s)} costs about {burst:.0f} deadline misses at once; the "
            f"overrun rule trips at {limit:g} in {th.overrun_window} ticks")
    if ticks <= 0:
        problems.append("no tick was measured: the clock did not run (give --seconds of at "
                        "least a few periods)")
    link_age_s = _link_floor_problem(fig, th, problems)
    stall_bad = stall_bad or link_age_s > 0
    ok = not problems

    if not rig_clocked and max(p99_s, stall_s) > budget:
        advice.append(
            "on a real rig at this period the stale rule would see the "
            f"{ms_text(max(p99_s, stall_s))} stall (budget {ms_text(budget)}): the simulated rig "
            "does not age its samples, a device does")
    rights = fig.get("realtime_rights") or {}
    realtime = bool(fig.get("realtime"))
    if not ok:
        need_s = max(stall_s, p99_s, link_age_s)
        if stall_bad:
            per = _nice_period(need_s / max(th.stale_periods - 0.5, 0.5))
            sp = math.ceil(need_s / P + 0.5)
            advice.append(
                f"a longer period: loop.period >= {per:g} s holds a {ms_text(need_s)} stall with "
                f"stale_periods = {th.stale_periods:g} (if the rig's dynamics allow it; run "
                "`corral design` and `corral preflight` again)")
            advice.append(
                f"or looser thresholds: watchdog.stale_periods >= {sp} at {ms_text(P)} (the rule "
                f"then trips at a sample {ms_text((sp + 0.5) * P)} old)")
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
    advice.extend(host_kernel_notes(fig, link_kind))
    if ok and not advice:
        advice.append("nothing to change")
    return {"ok": ok, "problems": problems, "advice": advice,
            "predicted_misses_per_window": predicted, "burst_misses": burst,
            "stall_budget_ms": budget * 1e3, "stale_limit_ms": th.stale_limit_s * 1e3}


def _link_floor_problem(fig: Mapping[str, Any], th: Thresholds, problems: list[str]) -> float:
    """The serial path's floor (``link_floor``, `runtime.realtime.linkfloor.pty_summary`)
    against the stale limit: a problem when frames arrived older than it. Returns the
    worst age (s) then, else 0."""
    lf = fig.get("link_floor") or {}
    over = int(lf.get("over_stale_limit") or 0) if lf.get("ok") else 0
    if over <= 0:
        return 0.0
    worst_s = float(lf.get("age_max_ms") or 0.0) * 1e-3
    problems.append(
        f"this host's serial path (a bare pseudo-terminal between two real-time processes at "
        f"the period, no corral code) delivered {over} of {lf.get('frames')} frames later "
        f"than the stale limit {ms_text(th.stale_limit_s)} (worst {ms_text(worst_s)}): the "
        "stale rule would trip on a healthy device")
    return worst_s


def host_kernel_notes(fig: Mapping[str, Any], link_kind: str | None = None) -> list[str]:
    """Notes on the kernel's preemption model and the hypervisor, from ``kernel``
    (``preempt``, ``how``), ``virtual`` and ``steal_pct`` in `fig` (pure; empty when
    neither is a cause). They inform; they never decide the verdict."""
    notes = []
    kernel = fig.get("kernel") or {}
    model = kernel.get("preempt")
    if model in NOT_PREEMPTIBLE:
        notes.append(
            f"kernel preemption model '{model}' ({kernel.get('how') or 'source unknown'}): kernel "
            "code is not preempted, so a real-time loop can wait for kernel work (the tty "
            "layer's flush work that carries every serial byte, page reclaim) for "
            "milliseconds; boot with preempt=full (on a PREEMPT_DYNAMIC kernel) or use a "
            "PREEMPT_RT kernel, as is common practice for real-time Linux")
        if link_kind == "serial":
            notes.append(
                "on a serial link this is where it shows: the device's samples reach the loop "
                "only through that flush work, so a sample can arrive milliseconds late "
                "although the loop's own clock holds, and the stale rule can trip")
    if fig.get("virtual"):
        notes.append(
            "a virtual machine: the hypervisor can stall all its CPUs at once for "
            f"milliseconds and nothing in the guest removes that ({_steal_text(fig)}); for a "
            "real rig use a dedicated (bare-metal) computer, or pinned, dedicated vCPUs")
    return notes


def _steal(res: Mapping[str, Any]) -> float | None:
    steal = res.get("steal_pct")
    if isinstance(steal, bool) or not isinstance(steal, (int, float)):
        return None
    return float(steal) if math.isfinite(steal) else None


def _steal_text(res: Mapping[str, Any]) -> str:
    steal = _steal(res)
    return ("steal not measured" if steal is None
            else f"steal {steal:.1f} % of CPU time during the check")


def host_kernel_text(res: Mapping[str, Any]) -> str:
    """'6.1.0, preemption model none (how); virtual machine: yes, steal 0.4 % ...'."""
    kernel = res.get("kernel") or {}
    text = (f"{kernel.get('release', '?')}, preemption model "
            f"{kernel.get('preempt', 'unknown')} ({kernel.get('how') or 'source unknown'}); ")
    if not res.get("virtual"):
        return text + "virtual machine: no"
    return text + "virtual machine: yes, " + _steal_text(res)


def host_cause_tag(res: Mapping[str, Any]) -> str:
    """', kernel preempt none, virtual machine (steal 0.4 %)': the host causes of a check's
    result in a few words ('' when neither applies)."""
    text = ""
    model = (res.get("kernel") or {}).get("preempt")
    if model in NOT_PREEMPTIBLE:
        text += f", kernel preempt {model}"
    if res.get("virtual"):
        steal = _steal(res)
        text += ", virtual machine" + ("" if steal is None else f" (steal {steal:.1f} %)")
    return text


def _lim(v: Any, unit: str = "") -> str:
    if v is None:
        return "unlimited"
    if unit == "bytes" and isinstance(v, int):
        return f"{v // 1024} KiB"
    return str(v)


def report_lines(res: Mapping[str, Any], name: str = "") -> list[str]:
    """The readable report of a `run_hostcheck` result."""
    P = float(res["period_s"])
    th = res.get("thresholds") or {}
    head = f"corral hostcheck{': ' + name if name else ''}: period {ms_text(P)} ({1 / P:g} Hz): "
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
    lf = res.get("link_floor") or {}
    if lf.get("ok"):
        lines.append(
            f"  serial path (bare pseudo-terminal, no corral code, {lf['frames']} frames): "
            f"sample age p99 {lf['age_p99_us']:.0f} us, worst {lf['age_max_ms']:.2f} ms; "
            f"{lf['over_stale_limit']} older than the stale limit {lf['stale_limit_ms']:.2f} ms")
    lines.append(f"  real-time: {res.get('clock') or 'not asked (loop.realtime = false)'}")
    gov = res.get("governor")
    gov_text = (", ".join(sorted(set(gov.values()))) if gov else "not exposed by this kernel")
    lines.append(f"  host: {res['cpus']} cores, load {res['load_1min']:.2f} (1 min), "
                 f"governor {gov_text}, memory locking "
                 + ("possible" if (res.get("memlock") or {}).get("mlockall_possible")
                    else "limited"))
    if "kernel" in res:
        lines.append(f"  kernel: {host_kernel_text(res)}")
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
            f"{ms_text(float(res.get('period_s') or 0))}, "
            f"{'SCHED_FIFO' if res.get('realtime') else 'normal priority'}")
    text += host_cause_tag(res)
    if not res.get("ok") and res.get("advice"):
        text += f"; {res['advice'][0]}"
    return text
