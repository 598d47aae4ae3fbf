"""Timing trips in words: a timing rule's first-out value and threshold with units, and
the likely cause named with the host's figures, for the trip line the runtime prints,
the dashboard and `corral trips --show`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from runtime.guard.watchdog import DEFAULTS
from runtime.realtime.hostkernel import NOT_PREEMPTIBLE
from runtime.realtime.hostverdict import host_cause_tag, ms_text

TIMING_RULES = ("stale", "overrun", "link_loss", "seq_gap")
"""The rules whose trips `explain_trip` puts into words."""


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
        text = f"no fresh sample for {ms_text(v)}; limit {ms_text(thr)}"
        if P:
            text += f" = {thr / P:.3g} periods of {ms_text(P)}"
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
            text = f"link disconnected; limit {ms_text(thr)} without a sample"
        else:
            text = f"no sample for {ms_text(v)}; limit {ms_text(thr)}"
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
                    + host_cause_tag(host)
                    + (", OK." if host.get("ok") else ", NOT OK."))
        budget = (host.get("thresholds") or {}).get("stall_budget_ms")
        host_fine = bool(host.get("ok")) and (budget is None or stall < 0.5 * float(budget))
    figures = "".join(f" {b}" for b in bits)
    model = ((host or {}).get("kernel") or {}).get("preempt")
    if rule == "stale" and host_fine and (model in NOT_PREEMPTIBLE or (host or {}).get("virtual")):
        why = []
        if model in NOT_PREEMPTIBLE:
            why.append(f"this kernel does not preempt kernel code (preempt {model}), so the "
                       "loop can wait for kernel work such as the flush work that carries "
                       "every serial byte")
        if (host or {}).get("virtual"):
            why.append("the hypervisor can stall this virtual machine's CPUs at once")
        return (f"Likely cause: the host below the loop, or the link or the device: "
                f"{'; '.join(why)}; the host check found this computer otherwise quiet "
                f"enough.{figures} `corral hostcheck CONFIG` says what to change.")
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
