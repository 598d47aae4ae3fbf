"""What a run is and how it ended, in words a reviewer reads: shared by the loop, the readers,
`corral trips` and `corral report`.

Lives here:
- `link_identity`: the link kind of a run (``sim``: the simulated rig in-process;
  ``served_pty``: a device served over a pseudo-terminal, normally ``corral rig serve
  --serial``; ``serial``: a serial device; ``mqtt``: a rig through a broker) and whether the
  rig behind it is simulated, and `run_name`, the name a run's files and socket carry.
- `end_record` and `END_HOW`: the last record of every run log and trip log, saying how the
  run ended; `how_ended` reads it back ("cut_short" when it is missing: the process was
  killed, SIGKILL or power).
- `iso_time`: wall times in ISO 8601 with the UTC offset.
- `RULE_SIGNALS` and `say_value`: each watchdog rule's signal with its unit and a word for
  what it is ("sample age 9.4 ms (limit 7 ms)", not "0.009406 vs 0.007").

What does not live here: the rules themselves (`runtime.guard.watchdog`), the record files
(`runtime.records.logs`).
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import time
from typing import Any

from runtime.records.kinds import RunEnd

#: How a run ended (the ``how`` of the end record), with the words the reader prints.
END_HOW: dict[str, str] = {
    "completed": "completed (the set duration ran out, no trip)",
    "stopped_by_operator": "stopped by the operator",
    "tripped_and_stopped": "tripped and stopped",
    "interrupted": "interrupted (SIGINT or SIGTERM)",
    "link_lost": "link lost",
    "internal_error": "internal error",
    "cut_short": "cut short (no end record: the process was killed or the machine stopped)",
    "unknown": "not recorded (a log written before runs recorded how they ended)",
}

#: Link kinds, as a reviewer names them.
LINK_KINDS: dict[str, str] = {
    "sim": "simulated rig in-process",
    "served_pty": "served rig over a pseudo-terminal",
    "serial": "serial device",
    "mqtt": "rig through an MQTT broker",
}


def link_identity(spec: str) -> dict[str, Any]:
    """The link a run uses, from its ``--link``/``rig.link`` spec.

    A serial path that resolves to a pseudo-terminal (``/dev/pts/N``) is a served rig
    (``corral rig serve --serial`` is what makes one); a real serial port is a device.
    ``simulated`` is True for the in-process rig and a served rig, False for a serial
    device, None for MQTT (the broker does not say what answers).

    Example
    -------
    >>> link_identity("sim")["kind"]
    'sim'
    >>> link_identity("mqtt://127.0.0.1:1883/pedestal")["simulated"] is None
    True
    """
    kind = spec.split(":", 1)[0]
    if kind == "sim":
        return {"kind": "sim", "label": LINK_KINDS["sim"], "spec": spec, "simulated": True}
    if kind in ("mqtt", "mqtts"):
        return {"kind": "mqtt", "label": LINK_KINDS["mqtt"], "spec": spec, "simulated": None}
    if kind == "serial":
        path = spec.split(":", 1)[1].split("@", 1)[0] if ":" in spec else ""
        real = os.path.realpath(path) if path else ""
        if real.startswith("/dev/pts/") or real == "/dev/ptmx":
            return {"kind": "served_pty", "label": LINK_KINDS["served_pty"], "spec": spec,
                    "simulated": True, "device": real}
        return {"kind": "serial", "label": LINK_KINDS["serial"], "spec": spec,
                "simulated": False, "device": real}
    return {"kind": kind, "label": kind, "spec": spec, "simulated": None}


def run_name(rig: str, kind: str) -> str:
    """The name of a run's files and operator socket: the rig, then the link kind unless the
    rig is the in-process simulation (``pedestal`` + served pty -> ``pedestal-served``)."""
    suffix = {"sim": "", "served_pty": "-served", "serial": "-serial", "mqtt": "-mqtt"}
    return rig + suffix.get(kind, f"-{kind}")


def iso_time(t_wall: float | None) -> str:
    """A wall time (seconds since the epoch) in ISO 8601 with the local UTC offset,
    milliseconds kept ("2026-12-04T21:05:05.123+00:00"); "" when unknown."""
    if t_wall is None or not isinstance(t_wall, (int, float)) or not math.isfinite(t_wall):
        return ""
    tz = _dt.datetime.now().astimezone().tzinfo
    return _dt.datetime.fromtimestamp(float(t_wall), tz=tz).isoformat(timespec="milliseconds")


def parse_when(text: str, now: float | None = None) -> float:
    """A time given on the command line: ISO 8601 (a naive one is local time) or a span back
    from now (``90s``, ``15m``, ``2h``, ``3d``, ``1w``). Raises ValueError with the fix."""
    now = time.time() if now is None else now
    s = text.strip()
    units = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}
    if s and s[-1] in units:
        try:
            return now - float(s[:-1]) * units[s[-1]]
        except ValueError:
            pass
    try:
        when = _dt.datetime.fromisoformat(s)
    except ValueError:
        raise ValueError(f"{text!r} is not a time: write ISO 8601 (2026-12-04T21:00, "
                         "2026-12-04T21:00+01:00) or a span back from now (30m, 2h, 3d)") \
            from None
    if when.tzinfo is None:
        when = when.astimezone()
    return when.timestamp()


def end_record(how: str, *, tick: int, trips: int, mode: str, latched: bool,
               detail: str = "", rig: str = "", device_rig: str | None = None,
               link: dict[str, Any] | None = None, link_stats: dict[str, Any] | None = None,
               loop: dict[str, Any] | None = None) -> RunEnd:
    """The end record (the last record of a run's logs), stamped now."""
    if how not in END_HOW:
        raise ValueError(f"unknown end {how!r}")
    now = time.time()
    return RunEnd(how=how, how_text=END_HOW[how], t_wall=now, time_iso=iso_time(now),
                  tick=tick, trips=trips, mode=mode, latched=latched, detail=detail,
                  rig=rig, device_rig=device_rig, link=link or {},
                  link_stats=link_stats or {}, loop=loop or {}, missing=("found",))


def how_ended(records: list[Any], header: dict[str, Any] | None = None) -> dict[str, Any]:
    """The end record among a log's records; a "cut_short" one when there is none (an
    "unknown" one for a log whose header shows it predates end records: no ``link``)."""
    for rec in reversed(records):
        if isinstance(rec, dict) and rec.get("type") == "end":
            out = dict(rec)
            out.setdefault("how_text", END_HOW.get(str(out.get("how")), str(out.get("how"))))
            return out
    how = "unknown" if header is not None and "link" not in header else "cut_short"
    return {"type": "end", "how": how, "how_text": END_HOW[how],
            "t_wall": None, "time_iso": "", "found": False}


# rule id -> (what the value is, unit shown, factor from the recorded value to that unit)
RULE_SIGNALS: dict[str, tuple[str, str, float]] = {
    "nonfinite": ("non-finite flag", "", 1.0),
    "link_loss": ("time without a sample", "ms", 1e3),
    "stale": ("sample age", "ms", 1e3),
    "seq_gap": ("samples missed", "samples", 1.0),
    "jump": ("innovation over the jump limit", "x limit", 1.0),
    "clamp": ("margin ratio ||e||_P/eps with the clamp engaged", "of eps", 1.0),
    "margin": ("margin ratio ||e||_P/eps", "of eps", 1.0),
    "margin_warning": ("margin ratio ||e||_P/eps", "of eps", 1.0),
    "predicted_crossing": ("predicted margin ratio", "of eps", 1.0),
    "weight_norm": ("weight norm ||W||_F", "", 1.0),
    "weight_rate": ("weight rate ||dW/dt||_F", "1/s", 1.0),
    "saturation": ("time at the input limit", "s", 1.0),
    "overrun": ("deadline misses in the window", "misses", 1.0),
}


def _num(v: Any, unit: str, scale: float) -> str:
    if isinstance(v, (int, float)) and math.isfinite(v):
        text = f"{float(v) * scale:.4g}"
    else:
        text = str(v)
    return f"{text} {unit}".strip()


def say_value(rule: str, value: Any, threshold: Any, on_delay_s: Any = None) -> str:
    """One rule's value against its threshold in words and units.

    Example
    -------
    >>> say_value("stale", 0.009406, 0.007)
    'sample age 9.406 ms (limit 7 ms)'
    """
    word, unit, scale = RULE_SIGNALS.get(rule, (rule, "", 1.0))
    text = f"{word} {_num(value, unit, scale)} (limit {_num(threshold, unit, scale)}"
    if isinstance(on_delay_s, (int, float)) and on_delay_s > 0:
        text += f", held {on_delay_s:g} s"
    return text + ")"


#: Unit of each rule's recorded signal (the capture's ``sig_<rule>`` fields, as recorded).
RULE_SIGNAL_UNITS: dict[str, str] = {
    "nonfinite": "1", "link_loss": "s", "stale": "s", "seq_gap": "samples", "jump": "1",
    "clamp": "1", "margin": "1", "margin_warning": "1", "predicted_crossing": "1",
    "weight_norm": "1", "weight_rate": "1/s", "saturation": "s", "overrun": "misses",
}
