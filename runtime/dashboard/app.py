"""The live terminal dashboard (textual): margin, learning rate, tracking, health, keys.

Runs in its own process and reads a `TelemetrySource` (the runtime's local
socket, MQTT, or a recording). Widgets are thin views: each one formats the
output of a pure function in `runtime.dashboard.panels`, and the screen refreshes at a
fixed, modest rate (10 Hz) whatever the telemetry rate, so a busy rig never
makes the terminal the bottleneck, and a slow terminal never slows the loop
(the runtime drops a client that does not keep up).

What does not live here: formatting decisions (`runtime.dashboard.panels`), sockets
and MQTT (`runtime.dashboard.sources`).
"""

from __future__ import annotations

import asyncio
import time
from collections import deque
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from rich.text import Text
from textual import events, on, work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.reactive import reactive
from textual.screen import ModalScreen, Screen
from textual.widgets import Button, DataTable, Footer, Header, Static

from runtime.dashboard import panels
from runtime.dashboard.sources import TelemetrySource
from runtime.dashboard.typed import as_live
from runtime.records.kinds import Hello, Reply, Telemetry, TripSummary, WireRecord

HARDWARE_CAUTIONS = (
    "This rig is REAL HARDWARE. Before arming:\n"
    "  - a physical emergency stop is within reach and was tested this session;\n"
    "  - the rig is guarded and nobody is within reach of moving parts;\n"
    "  - the device switches its outputs off on its own when commands stop (command timeout).\n"
    "corral's watchdog is a software function, not a safety-rated function.\n"
    "Local codes, your lab's rules and licensed practice take precedence."
)

LEVEL_STYLE = {
    panels.LEVEL_OK: "bold green",
    panels.LEVEL_WARNING: "bold yellow",
    panels.LEVEL_TRIP: "bold red",
    panels.LEVEL_BREACH: "bold white on red",
    panels.LEVEL_OFF: "dim",
}

REFRESH_HZ = 10.0
"""Redraws per second at most (traces are the costly part; kept at <= 10 Hz, docs/telemetry.md)."""
WINDOW_S = 30.0
"""The margin chart's time axis: the last WINDOW_S seconds."""
HISTORY = 4096
"""Margin samples kept (25 Hz telemetry: about 160 s)."""
AXIS_HISTORY = 400
"""Telemetry records kept for the per-axis traces."""
COMPACT_WIDTH, COMPACT_HEIGHT = 120, 40
"""Below either, the dashboard shows only the glance strip, the margin chart and events."""



def _finite_or(value: float | None, default: float) -> float:
    """`value` as a float; `default` when it is missing (None, or NaN in a partial record)."""
    if value is None or value != value:
        return default
    return float(value)

class _Panel(Static):
    """A panel whose drawing depends on its size: a new size asks for a redraw."""

    def on_resize(self, event: events.Resize) -> None:
        """Draw again at the new size (the glance strip above may have grown)."""
        dash = self.app
        if isinstance(dash, Dashboard):
            dash._dirty = True


class MarginPanel(_Panel):
    """||e||_P / eps now and over the last WINDOW_S seconds against its levels."""

    DEFAULT_CSS = """
    MarginPanel { border: round $accent; padding: 0 1; height: 1fr; }
    """

    def show(self, view: panels.MarginView, times: list[float], ratios: list[float],
             t_end: float, paused: bool) -> None:
        """Redraw from a margin view and the recent (t, ratio) pairs."""
        text = Text(no_wrap=True, overflow="crop")
        text.append("margin ||e||_P/eps ", style="bold")
        text.append(f" {view.ratio_text} ", style=LEVEL_STYLE[view.level])
        text.append(f" {view.level.upper()}", style=LEVEL_STYLE[view.level])
        text.append(f"  eps {view.eps_text}  ttb {view.time_to_bound_text}"
                    + ("  [paused]" if paused else "") + "\n")
        width = max(20, self.content_size.width)
        height = max(3, self.content_size.height - 3)
        rows = panels.margin_chart(times, ratios, t_end, WINDOW_S, width, height,
                                   view.warning, view.trip)
        for i, row in enumerate(rows):
            label, body = row[:panels.CHART_LABEL], row[panels.CHART_LABEL:]
            style = "dim"
            if "bound" in label:
                style = "bold red"
            elif "trip" in label:
                style = "red"
            elif "warn" in label:
                style = "yellow"
            text.append(label, style=style)
            text.append(body + ("\n" if i < len(rows) - 1 else ""),
                        style="cyan" if i < len(rows) - 2 else "dim")
        self.update(text)


class AxisPanel(_Panel):
    """Per tracked axis: command (c), reference model (r) and measured (y) over time."""

    DEFAULT_CSS = """
    AxisPanel { border: round $accent; padding: 0 1; height: 1fr; }
    """

    def show(self, hello: Hello, history: list[Telemetry]) -> None:
        """Redraw from the hello and the recent telemetry records."""
        tracked = len(hello.tracked) or 1
        height = max(2, self.content_size.height // tracked - 1)
        text = Text(no_wrap=True, overflow="crop")
        for title, rows in panels.axis_traces(hello, history, max(10, self.content_size.width),
                                              height):
            text.append(title + "   (c command, r reference, y measured)\n", style="bold")
            for row in rows:
                text.append(row + "\n")
        self.update(text)


class EventPanel(_Panel):
    """Mode changes, requests and trips, time-stamped, marked until acknowledged."""

    DEFAULT_CSS = """
    EventPanel { border: round $accent; padding: 0 1; height: 1fr; }
    """

    def show(self, lines: list[str], acknowledged: int) -> None:
        """Redraw from the event lines and how many of them are acknowledged."""
        rows = panels.event_rows(lines, acknowledged, max(1, self.content_size.height))
        text = Text(no_wrap=True, overflow="ellipsis")
        for i, row in enumerate(rows):
            style = "bold" if i == 0 else ("bold yellow" if row.startswith("!") else "")
            if "TRIP" in row and row.startswith("!"):
                style = "bold red"
            text.append(row + ("\n" if i < len(rows) - 1 else ""), style=style)
        self.update(text)


class LearningPanel(_Panel):
    """Effective learning rate gamma*phi_d, phi_d, per-step gain against its cap, weights."""

    DEFAULT_CSS = """
    LearningPanel { border: round $accent; padding: 0 1; height: 8; }
    """

    def show(self, view: panels.LearningView, weights: tuple[str, str],
             trace: list[float]) -> None:
        """Redraw from a learning view, the weight figures and the recent rates."""
        text = Text(no_wrap=True, overflow="crop")
        text.append("learning rate gamma*phi_d ", style="bold")
        text.append(view.eff_rate_text, style="bold cyan")
        text.append(f"  phi_d {view.phi_d_text}\n")
        frac = view.cap_fraction
        bar_w = 20
        filled = 0 if frac != frac else max(0, min(bar_w, int(round(frac * bar_w))))
        style = "green" if frac == frac and frac < 0.5 else "yellow" if frac < 1 else "red"
        text.append(f"step gain g (before the cap) {view.step_gain_text} of cap "
                    f"{view.cap_text} ")
        text.append("[" + "#" * filled + "." * (bar_w - filled) + "]\n", style=style)
        text.append(f"||W_hat|| {weights[0]}, rate {weights[1]}\n")
        width = max(10, self.content_size.width)
        rows, scale = panels.strip_lines(trace[-width:], width, 2)
        text.append(f"rate over the last {len(trace[-width:])} records, range {scale}\n",
                    style="dim")
        for row in rows:
            text.append(row + "\n", style="cyan")
        self.update(text)


class SupervisorPanel(Static):
    """The glance strip: mode, latch, margin, the first-out trip in words, the fallback,
    the device's own status flags, and start-up progress until telemetry flows."""

    DEFAULT_CSS = """
    SupervisorPanel { height: auto; max-height: 7; background: $boost; padding: 0 1; }
    """

    def show(self, view: panels.SupervisorView, margin: panels.MarginView,
             explanation: str, flags: list[tuple[str, bool]], facts: list[str]) -> None:
        """Redraw from the supervisor and margin views and the lines around them."""
        text = Text(overflow="fold")
        mode_style = {"engaged": "bold green", "fallback": "bold white on dark_orange",
                      "stopped": "bold white on red", "settling": "bold yellow"}.get(
            view.mode, "bold")
        text.append("mode ", style="bold")
        text.append(f" {view.mode.upper()} ", style=mode_style)
        text.append("  LATCHED" if view.latched else "  not latched",
                    style="bold white on red" if view.latched else "dim")
        text.append("   margin ", style="bold")
        text.append(f" {margin.ratio_text} {margin.level.upper()} ",
                    style=LEVEL_STYLE[margin.level])
        text.append(f"  trips {len(view.trips)}\n")
        text.append(view.trip_text + "\n", style="bold red" if view.latched else "")
        if explanation:
            text.append(explanation + "\n", style="red" if view.latched else "")
        tail = [view.fallback_text] if view.fallback_text != "-" else []
        if flags:
            tail.append("device: " + ", ".join(
                f"{name.upper()} SET" if on else f"{name} clear" for name, on in flags))
        tail += facts
        text.append(" | ".join(tail), style="bold dark_orange"
                    if "FALLBACK" in view.fallback_text or any(on for _, on in flags) else "")
        self.update(text)


class ConfirmArm(ModalScreen[bool]):
    """Asks before arming; shows the hardware cautions (wrapped to the screen), the host
    check and the preflight verdicts for a real rig."""

    DEFAULT_CSS = """
    ConfirmArm { align: center middle; }
    ConfirmArm > Vertical { width: 90; max-width: 100%; height: auto; max-height: 100%;
                            border: thick $error; padding: 0 1; background: $surface; }
    ConfirmArm #cautions { width: 100%; height: auto; }
    ConfirmArm Horizontal { height: auto; margin-top: 1; }
    ConfirmArm Button { margin-right: 2; }
    """
    BINDINGS = [Binding("y", "confirm", "arm"), Binding("n,escape", "cancel", "cancel")]

    def __init__(self, simulated: bool, facts: Sequence[str] = ()) -> None:
        super().__init__()
        self.simulated = simulated
        self.facts = [f for f in facts if f]

    def compose(self) -> ComposeResult:
        """The question and the cautions."""
        if self.simulated:
            text = "Arm the adaptive controller on the simulated rig?"
        else:
            text = "\n".join([HARDWARE_CAUTIONS, *self.facts,
                              "Arm the adaptive controller on this rig?"])
        with Vertical():
            yield Static(Text(text), id="cautions")
            with Horizontal():
                yield Button("Arm (y)", variant="error", id="arm")
                yield Button("Cancel (n)", variant="primary", id="cancel")

    def action_confirm(self) -> None:
        """Confirmed."""
        self.dismiss(True)

    def action_cancel(self) -> None:
        """Not confirmed."""
        self.dismiss(False)

    @on(Button.Pressed)
    def _pressed(self, event: Button.Pressed) -> None:
        self.dismiss(event.button.id == "arm")


class Dashboard(App[None]):
    """The operator's view of one rig.

    Always on screen, whatever the terminal's size: the glance strip (mode, latch,
    margin, first-out trip in words, device flags), the margin chart and the events.
    From COMPACT_WIDTH x COMPACT_HEIGHT up, also the per-axis traces, the learning
    rate, the tracking, inputs and health tables.
    """

    TITLE = "corral"
    CSS = """
    Screen { layout: vertical; }
    #body { height: 1fr; }
    #left { width: 3fr; }
    #right { width: 2fr; }
    #margin { min-height: 8; }
    #tracking { height: 8; }
    #inputs { height: 5; }
    #health { height: 12; }
    #status { height: 1; background: $boost; padding: 0 1; }
    DataTable { border: round $accent; }
    Screen.compact #body { layout: vertical; }
    Screen.compact #left { width: 100%; height: 1fr; }
    Screen.compact #right { width: 100%; height: 6; }
    Screen.compact .wide { display: none; }
    """
    BINDINGS = [
        Binding("a", "arm", "arm"),
        Binding("d", "disarm", "disarm"),
        Binding("s", "stop", "STOP", priority=True),
        Binding("r", "reset", "reset"),
        Binding("k", "acknowledge", "ack events"),
        Binding("p", "pause", "pause"),
        Binding("q", "quit", "quit"),
    ]

    paused: reactive[bool] = reactive(False)
    """True while traces are frozen (values keep updating)."""
    status: reactive[str] = reactive("waiting for telemetry")
    """The last reply or connection message."""

    def __init__(self, source: TelemetrySource, progress: str | Path | None = None,
                 wait_s: float = 0.0) -> None:
        """`progress`: a file whose last lines show while no telemetry has come yet (the
        runtime's console file, where the preflight reports). With `wait_s` > 0 the
        dashboard opens `source` itself, waiting up to that long for it."""
        super().__init__()
        self.source = source
        self.progress = Path(progress) if progress else None
        self.wait_s = wait_s
        self.hello: Hello = Hello.from_partial({})
        """The rig's hello (`runtime.records.kinds.Hello`; empty until it comes)."""
        self.latest: Telemetry = Telemetry.from_partial({})
        """The newest telemetry record (empty until the first comes)."""
        self.records_seen = 0
        self.replies: list[Reply] = []
        self.ratio_times: deque[float] = deque(maxlen=HISTORY)
        self.ratio_trace: deque[float] = deque(maxlen=HISTORY)
        self.rate_trace: deque[float] = deque(maxlen=HISTORY)
        self.history: deque[Telemetry] = deque(maxlen=AXIS_HISTORY)
        self.events: list[str] = []
        """Event lines (oldest first), at most 500."""
        self.acknowledged = 0
        """How many of `events` the operator has acknowledged."""
        self.startup: list[str] = []
        """The last progress lines, shown until telemetry flows."""
        self._dirty = True

    # -- layout ------------------------------------------------------------
    def compose(self) -> ComposeResult:
        """Glance strip, chart and events, the wide panels, status line, footer."""
        yield Header(show_clock=True)
        yield SupervisorPanel(id="supervisor")
        with Horizontal(id="body"):
            with Vertical(id="left"):
                yield MarginPanel(id="margin")
                yield AxisPanel(id="axes", classes="wide")
            with Vertical(id="right"):
                yield EventPanel(id="events")
                yield LearningPanel(id="learning", classes="wide")
                yield DataTable(id="tracking", cursor_type="none", zebra_stripes=True,
                                classes="wide")
                yield DataTable(id="inputs", cursor_type="none", classes="wide")
                yield DataTable(id="health", cursor_type="none", classes="wide")
        yield Static(id="status")
        yield Footer()

    def on_mount(self) -> None:
        """Set up tables, start reading, refresh at a fixed rate."""
        self.sub_title = self.source.description
        # Text, not str: DataTable reads plain strings as markup, and "[rad]" is a tag.
        self.query_one("#tracking", DataTable).add_columns(
            *(Text(h) for h in ("state [unit]", "command", "reference", "measured", "error",
                                "envelope")))
        self.query_one("#inputs", DataTable).add_columns(
            "input", "applied", "limit", "saturated for", "")
        self.query_one("#health", DataTable).add_columns("loop and link", "value")
        self._fit(self.size.width, self.size.height)
        self.read_telemetry()
        # The refresh timer belongs to the main screen, not to the app: textual stops a
        # screen's timers when the screen is pruned, before its widgets are removed, while
        # the app's own timers outlive the screens at shutdown (a redraw then ran against
        # a half-removed screen: NoMatches for MarginPanel, about one exit in three).
        self.redraw_timer = self.screen.set_interval(1.0 / REFRESH_HZ, self.redraw)
        self.watch_status(self.status)

    def on_resize(self, event: events.Resize) -> None:
        """Compact or wide layout for the new size."""
        self._fit(event.size.width, event.size.height)

    def _fit(self, width: int, height: int) -> None:
        self.screen_stack[0].set_class(width < COMPACT_WIDTH or height < COMPACT_HEIGHT,
                                       "compact")
        self._dirty = True

    # -- data --------------------------------------------------------------
    @work(exclusive=True, group="telemetry")
    async def read_telemetry(self) -> None:
        """Consume the source; keep only the latest record for the next redraw."""
        try:
            if self.wait_s > 0:
                await self._open_when_ready()
            async for rec in self.source.records():
                self.ingest(rec)
        except (ConnectionError, OSError) as exc:
            self.status = f"telemetry lost: {exc}"
            return
        self.status = ("end of recording" if not self.source.live
                       else "the runtime closed the connection")

    async def _open_when_ready(self) -> None:
        """Open the source, retrying until `wait_s` runs out (the runtime may still be in
        its preflight); the progress file's last lines show meanwhile."""
        loop = asyncio.get_running_loop()
        end = loop.time() + self.wait_s
        self.status = "waiting for the runtime (preflight, host check)"
        while True:
            self._read_progress()
            try:
                await self.source.open()
                return
            except (ConnectionError, FileNotFoundError):
                if loop.time() > end:
                    raise
            await asyncio.sleep(0.2)

    def _read_progress(self) -> None:
        if self.progress is None or self.records_seen:
            return
        try:
            with open(self.progress, "rb") as fh:
                fh.seek(0, 2)
                fh.seek(max(0, fh.tell() - 4096))
                tail = fh.read().decode("utf-8", "replace").splitlines()
        except OSError:
            return
        lines = [ln for ln in tail if ln.strip()][-4:]
        if lines != self.startup:
            self.startup = lines
            self._dirty = True

    def ingest(self, rec: WireRecord | dict[str, Any]) -> None:
        """Take one record from the source (a map is read as its typed record; one of
        a type the dashboard does not show, or malformed, is ignored)."""
        typed = as_live(rec)
        if isinstance(typed, Hello):
            self.hello = typed
            self.title = f"corral: {typed.rig or '?'}" + (
                " (simulated)" if typed.simulated else " (HARDWARE)")
            self._dirty = True
        elif isinstance(typed, Telemetry):
            self.latest = typed
            self.records_seen += 1
            if self.records_seen == 1 and self.status.startswith("waiting"):
                self.status = f"live: {self.source.description}"
            if not self.paused:
                ratio = float(typed.ratio)  # NaN when the record has none
                engaged = typed.mode == "engaged" or ratio > 0
                self.ratio_times.append(_finite_or(typed.t, 0.0))
                self.ratio_trace.append(ratio if engaged else float("nan"))
                self.rate_trace.append(_finite_or(typed.eff_rate, 0.0))
                self.history.append(typed)
            self._dirty = True
        elif isinstance(typed, Reply):
            self.replies.append(typed)
            ok = "ok" if typed.ok else "REFUSED"
            self.status = f"{typed.op or '?'}: {ok}. {typed.message}".strip()
        elif isinstance(typed, TripSummary):
            self.status = "TRIP: " + panels.trip_line(typed)
        if typed is None:
            return
        line = panels.event_line(typed, time.time())
        if line is not None:
            self.events.append(line)
            if len(self.events) > 500:
                drop = len(self.events) - 500
                del self.events[:drop]
                self.acknowledged = max(0, self.acknowledged - drop)
            self._dirty = True

    def facts(self) -> list[str]:
        """The host check and preflight verdicts, or the start-up progress."""
        out = [panels.hostcheck_line(self.hello), panels.preflight_line(self.hello)]
        if not self.records_seen:
            out += self.startup
        return [f for f in out if f]

    def redraw(self) -> None:
        """Refresh every shown panel from the latest telemetry (at most REFRESH_HZ)."""
        self._read_progress()
        if not self._dirty:
            return
        self._dirty = False
        tel, hello = self.latest, self.hello
        # Query the main screen, not the active one: a confirmation may be on top,
        # and the values behind it keep updating.
        main = self.screen_stack[0]
        margin = panels.margin_view(hello, tel)
        sup = panels.supervisor_view(tel)
        why = panels.trip_explanation(tel.trip, hello, tel) if tel.trip is not None else ""
        main.query_one(SupervisorPanel).show(sup, margin, why,
                                             panels.device_flags(hello, tel), self.facts())
        t_end = self.ratio_times[-1] if self.ratio_times else 0.0
        main.query_one(MarginPanel).show(margin, list(self.ratio_times),
                                         list(self.ratio_trace), t_end, self.paused)
        main.query_one(EventPanel).show(self.events, self.acknowledged)
        if main.has_class("compact"):
            return
        main.query_one(AxisPanel).show(hello, list(self.history))
        main.query_one(LearningPanel).show(panels.learning_view(tel), panels.weight_view(tel),
                                           list(self.rate_trace))
        self._fill(main, "#tracking", panels.tracking_rows(hello, tel))
        self._fill(main, "#inputs", panels.input_rows(hello, tel))
        self._fill(main, "#health", panels.health_rows(tel))

    @staticmethod
    def _fill(main: Screen, selector: str, rows: Sequence[tuple[str, ...]]) -> None:
        table = main.query_one(selector, DataTable)
        table.clear()
        for row in rows:
            table.add_row(*(Text(cell) for cell in row))

    def watch_status(self, value: str) -> None:
        """Show the status line."""
        try:
            self.query_one("#status", Static).update(Text(value))
        except Exception:  # noqa: BLE001 - before mount there is no status line yet
            pass

    # -- keys --------------------------------------------------------------
    async def _request(self, op: str) -> None:
        try:
            await self.source.request(op)
            self.status = f"{op}: sent"
        except (ConnectionError, OSError) as exc:
            self.status = f"{op}: could not reach the runtime ({exc})"

    def action_arm(self) -> None:
        """Arm, after a confirmation (with the hardware cautions for a real rig)."""
        simulated = bool(self.hello.simulated)

        def decided(yes: bool | None) -> None:
            if yes:
                asyncio.get_running_loop().create_task(self._request("arm"))
            else:
                self.status = "arm: cancelled"

        self.push_screen(ConfirmArm(simulated, [panels.hostcheck_line(self.hello),
                                                panels.preflight_line(self.hello)]), decided)

    async def action_disarm(self) -> None:
        """Disarm: hand over to the baseline and stop adapting."""
        await self._request("disarm")

    async def action_stop(self) -> None:
        """Stop: always available, one key."""
        await self._request("stop")

    async def action_reset(self) -> None:
        """Reset a latched trip (never restarts: arm again afterwards)."""
        await self._request("reset")

    def action_acknowledge(self) -> None:
        """Acknowledge every event shown so far (ISA-18.2 practice: the operator saw it)."""
        self.acknowledged = len(self.events)
        self.status = f"{self.acknowledged} events acknowledged"
        self._dirty = True

    def action_pause(self) -> None:
        """Freeze or resume the traces."""
        self.paused = not self.paused
        self.status = "traces paused" if self.paused else "traces running"
        self._dirty = True
