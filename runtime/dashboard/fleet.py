"""The fleet: every rig publishing on one broker, one line each, the most urgent first.

`corral watch --mqtt HOST:PORT` with no ``--rig`` opens `FleetApp`: one row per rig
(mode, margin ratio now and the worst seen, last trip, link health, age of the last
record), ordered by `order_rigs`; Enter opens that rig's full dashboard (the caller
runs it and comes back here when the operator quits it). The fleet view sends no
requests: arm, disarm, reset and stop stay on one rig's dashboard, and what a runtime
accepts from the broker is its own ``[link.mqtt] remote_requests`` (remote arm off
unless listed).

A rig that goes silent is shown as such: no telemetry for `silent_after_s` (the
runtime publishes at 10 Hz), or its retained mode says it is offline (its last will,
``disconnected``, published by the broker when the runtime's connection drops; or
``ended`` after a clean end). What is known is the last state, shown with its age;
the retained mode and hello expire (docs/telemetry.md), so a rig gone long before
the watcher starts does not appear at all.

`FleetState` and `order_rigs` are pure (tested without a screen); `FleetApp` only lays
out the rows (`fleet_rows`).
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from runtime.dashboard import panels

SILENT_AFTER_S = 3.0
"""No telemetry for this long (30 periods of the default 10 Hz) and the rig is silent."""

# urgency ranks, most urgent first
RANK_TRIPPED = 0
"""A trip latched, or the margin at or beyond the trip level."""
RANK_SILENT = 1
"""Contact lost while not cleanly ended: the rig may still be moving."""
RANK_WARNING = 2
"""Margin at or beyond the warning level, or a fallback law in charge."""
RANK_LINK = 3
"""Link trouble: disconnected, or lost / refused / corrupt frames counted."""
RANK_RUNNING = 4
RANK_QUIET = 5
"""Idle, stopped or ended cleanly."""
RANK_NAMES = ("TRIPPED", "SILENT", "WARNING", "LINK", "running", "idle")


@dataclass
class RigState:
    """What the watcher knows of one rig (updated by `FleetState.ingest`)."""

    rig: str
    hello: dict[str, Any] = field(default_factory=dict)
    telemetry: dict[str, Any] = field(default_factory=dict)
    mode_msg: dict[str, Any] = field(default_factory=dict)
    """The last retained mode map (``online`` False: the runtime's will or its end)."""
    worst_ratio: float = math.nan
    """The highest margin ratio seen since the watcher started."""
    last_trip: dict[str, Any] | None = None
    last_seen: float | None = None
    """Monotonic time of the last record of any kind from this rig."""
    last_telemetry: float | None = None


class FleetState:
    """Rigs by name, fed with (rig, record) pairs as they arrive."""

    def __init__(self, silent_after_s: float = SILENT_AFTER_S) -> None:
        self.silent_after_s = float(silent_after_s)
        self.rigs: dict[str, RigState] = {}

    def ingest(self, rig: str, rec: Mapping[str, Any], now: float | None = None) -> None:
        """One record (``type`` hello, telemetry, mode or trip) of `rig`."""
        now = time.monotonic() if now is None else now
        st = self.rigs.setdefault(rig, RigState(rig))
        kind = rec.get("type")
        st.last_seen = now
        if kind == "hello":
            st.hello = dict(rec)
        elif kind == "telemetry":
            st.telemetry = dict(rec)
            st.last_telemetry = now
            ratio = panels._num(rec.get("ratio"))
            if ratio > 0 and not ratio <= st.worst_ratio:  # NaN-safe max
                st.worst_ratio = ratio
            trip = rec.get("trip")
            if isinstance(trip, dict):
                st.last_trip = trip
            # the runtime is talking: an old will on the mode topic is history
            if st.mode_msg.get("online") is False:
                st.mode_msg = {}
        elif kind == "mode":
            st.mode_msg = dict(rec)
        elif kind == "trip":
            st.last_trip = dict(rec)
            value = panels._num(rec.get("value"))
            if rec.get("rule") in ("margin", "clamp") and value > 0 \
                    and not value <= st.worst_ratio:
                st.worst_ratio = value

    def ordered(self, now: float | None = None) -> list[RigState]:
        """The rigs, most urgent first (`order_rigs`)."""
        return order_rigs(self.rigs.values(), time.monotonic() if now is None else now,
                          self.silent_after_s)


def link_problems(link: Mapping[str, Any]) -> list[str]:
    """Counted link faults, worst first ('disconnected', 'gaps 3', ...); [] when healthy."""
    out = []
    if link.get("connected") is False:
        out.append("disconnected")
    for key, label in (("crc_errors", "crc"), ("cobs_errors", "framing"),
                       ("decode_errors", "decode"), ("rejected", "rejected"), ("gaps", "gaps"),
                       ("late_frames", "late"), ("reconnects", "reconnects"),
                       ("send_drops", "send drops")):
        n = link.get(key)
        if isinstance(n, int | float) and n > 0:
            out.append(f"{label} {int(n)}")
    return out


def is_silent(st: RigState, now: float, silent_after_s: float = SILENT_AFTER_S) -> bool:
    """No telemetry for `silent_after_s`, or the runtime's will says it went away."""
    if st.mode_msg.get("online") is False and st.mode_msg.get("mode") != "ended":
        return True
    if st.mode_msg.get("mode") == "ended":
        return False
    return st.last_telemetry is None or now - st.last_telemetry > silent_after_s


def urgency(st: RigState, now: float, silent_after_s: float = SILENT_AFTER_S) -> int:
    """The rig's rank: `RANK_TRIPPED` .. `RANK_QUIET` (smaller is more urgent)."""
    tel = st.telemetry
    warning, trip = panels.levels(st.hello)
    mode = str(st.mode_msg.get("mode") or tel.get("mode") or "?")
    ended = st.mode_msg.get("mode") == "ended"
    latched = bool(tel.get("latched") or st.mode_msg.get("latched"))
    ratio = panels._num(tel.get("ratio"), 0.0)
    if (latched and not ended) or ratio >= trip:
        return RANK_TRIPPED
    if is_silent(st, now, silent_after_s):
        return RANK_SILENT
    if ratio >= warning or tel.get("fallback") or st.mode_msg.get("fallback"):
        return RANK_WARNING
    if link_problems(tel.get("link") or {}) and not ended:
        return RANK_LINK
    if mode in ("engaged", "settling"):
        return RANK_RUNNING
    return RANK_QUIET


def order_rigs(rigs: Iterable[RigState], now: float,
               silent_after_s: float = SILENT_AFTER_S) -> list[RigState]:
    """Most urgent first: by rank, then the higher margin ratio now, then the name."""
    def key(st: RigState) -> tuple[int, float, str]:
        ratio = panels._num(st.telemetry.get("ratio"), 0.0)
        return urgency(st, now, silent_after_s), -(ratio if ratio == ratio else math.inf), \
            st.rig
    return sorted(rigs, key=key)


def _age(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    if seconds < 60:
        return f"{seconds:.1f} s"
    if seconds < 3600:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


COLUMNS = ("rig", "state", "mode", "margin", "worst", "last trip", "link", "age")


def fleet_row(st: RigState, now: float, silent_after_s: float = SILENT_AFTER_S,
              ) -> tuple[str, ...]:
    """One rig's row: rig, state (rank name), mode, margin now, worst, last trip, link, age."""
    tel = st.telemetry
    rank = urgency(st, now, silent_after_s)
    mode = str(tel.get("mode", "?"))
    if st.mode_msg.get("online") is False:
        mode = str(st.mode_msg.get("mode") or "offline")
    if tel.get("latched"):
        mode += " (latched)"
    state = RANK_NAMES[rank]
    if rank == RANK_SILENT:
        why = ("will: " + str(st.mode_msg.get("mode")) if st.mode_msg.get("online") is False
               else "no telemetry")
        state = f"SILENT ({why})"
    ratio = panels._num(tel.get("ratio"))
    margin = "-" if not ratio > 0 else f"{ratio:.3f}"
    worst = "-" if not st.worst_ratio > 0 else f"{st.worst_ratio:.3f}"
    trip = panels.trip_line(st.last_trip) if st.last_trip else "-"
    link = tel.get("link") or {}
    problems = link_problems(link)
    age_ms = panels._num(link.get("sample_age_ms"))
    link_text = ", ".join(problems) if problems else ("ok" if link else "-")
    if age_ms == age_ms:
        link_text += f" ({age_ms:.0f} ms)"
    age = _age(None if st.last_seen is None else max(0.0, now - st.last_seen))
    return (st.rig, state, mode, margin, worst, trip, link_text, age)


def fleet_rows(state: FleetState, now: float | None = None) -> list[tuple[str, ...]]:
    """Every rig's row, most urgent first."""
    now = time.monotonic() if now is None else now
    return [fleet_row(st, now, state.silent_after_s) for st in state.ordered(now)]


# ------------------------------------------------------------------ the screen
def make_app(source: Any, state: FleetState | None = None) -> Any:
    """The textual fleet app on a `runtime.dashboard.sources.FleetSource` (its return value: the rig
    whose dashboard to open, or None to quit)."""
    from textual.app import App, ComposeResult
    from textual.binding import Binding
    from textual.widgets import DataTable, Footer, Header, Static

    class FleetApp(App[str | None]):
        """The operator's view of every rig on the broker."""

        TITLE = "corral fleet"
        CSS = """
        DataTable { height: 1fr; border: round $accent; }
        #status { height: 1; background: $boost; padding: 0 1; }
        """
        BINDINGS = [
            Binding("enter", "open", "open dashboard"),
            Binding("q", "quit_fleet", "quit"),
        ]

        def __init__(self) -> None:
            super().__init__()
            self.source = source
            self.fleet = state or FleetState()
            self.records_seen = 0

        def compose(self) -> ComposeResult:
            yield Header()
            yield DataTable(id="fleet", cursor_type="row", zebra_stripes=True)
            yield Static(f"waiting for rigs on {source.description}", id="status")
            yield Footer()

        def on_mount(self) -> None:
            table = self.query_one("#fleet", DataTable)
            table.add_columns(*COLUMNS)
            self.run_worker(self.read(), exclusive=True, group="fleet")
            self.set_interval(0.5, self.redraw)

        async def read(self) -> None:
            async for rig, rec in self.source.fleet_records():
                self.fleet.ingest(rig, rec)
                self.records_seen += 1

        def rows(self) -> list[tuple[str, ...]]:
            """What the table shows now (the tests read this too)."""
            return fleet_rows(self.fleet)

        def redraw(self) -> None:
            table = self.query_one("#fleet", DataTable)
            rows = self.rows()
            selected = self.selected()
            table.clear()
            for row in rows:
                table.add_row(*row, key=row[0])
            if selected is not None:
                names = [r[0] for r in rows]
                if selected in names:
                    table.move_cursor(row=names.index(selected))
            n = len(rows)
            urgent = sum(1 for st in self.fleet.rigs.values()
                         if urgency(st, time.monotonic(), self.fleet.silent_after_s)
                         <= RANK_SILENT)
            self.query_one("#status", Static).update(
                f"{n} rig{'s' if n != 1 else ''} on {source.description}; {urgent} need "
                "attention; Enter opens a rig's dashboard")

        def selected(self) -> str | None:
            table = self.query_one("#fleet", DataTable)
            if table.row_count == 0:
                return None
            try:
                key = table.coordinate_to_cell_key(table.cursor_coordinate).row_key
            except Exception:  # noqa: BLE001 - no row under the cursor
                return None
            return None if key.value is None else str(key.value)

        def action_open(self) -> None:
            rig = self.selected()
            if rig is not None:
                self.exit(rig)

        def on_data_table_row_selected(self, event: DataTable.RowSelected) -> None:
            if event.row_key.value is not None:
                self.exit(str(event.row_key.value))

        def action_quit_fleet(self) -> None:
            self.exit(None)

    return FleetApp()
