"""The live terminal dashboard (textual): margin, learning rate, tracking, health, keys.

Runs in its own process and reads a `TelemetrySource` (the runtime's local
socket, MQTT, or a recording). Widgets are thin views: each one formats the
output of a pure function in `runtime.dashboard.panels`, and the screen refreshes at a
fixed, modest rate (15 Hz) whatever the telemetry rate, so a busy rig never
makes the terminal the bottleneck, and a slow terminal never slows the loop
(the runtime drops a client that does not keep up).

What does not live here: formatting decisions (`runtime.dashboard.panels`), sockets
and MQTT (`runtime.dashboard.sources`).
"""

from __future__ import annotations

import asyncio
from collections import deque
from collections.abc import Sequence
from typing import Any

from rich.text import Text
from textual import on, work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Grid, Horizontal, Vertical
from textual.reactive import reactive
from textual.screen import ModalScreen, Screen
from textual.widgets import Button, DataTable, Footer, Header, Label, Static

from runtime.dashboard import panels
from runtime.dashboard.sources import TelemetrySource

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

REFRESH_HZ = 15.0
TRACE_LENGTH = 240


class MarginPanel(Static):
    """||e||_P / eps now, its recent trace against the levels, the bound, time to bound."""

    DEFAULT_CSS = """
    MarginPanel { border: round $accent; padding: 0 1; height: 100%; }
    """

    def show(self, view: panels.MarginView, trace: list[float], paused: bool) -> None:
        """Redraw from a margin view and the recent ratios."""
        text = Text()
        text.append("margin ratio ||e||_P / eps  ", style="bold")
        text.append(f" {view.ratio_text} ", style=LEVEL_STYLE[view.level])
        text.append(f"  {view.level.upper()}\n", style=LEVEL_STYLE[view.level])
        text.append(f"bound eps = {view.eps_text}   ||e||_P = {view.s_text}   "
                    f"time to bound: {view.time_to_bound_text}\n")
        text.append(f"levels: warning {view.warning:g}, trip {view.trip:g}, bound 1"
                    + ("   [traces paused]" if paused else "") + "\n")
        width = max(10, self.size.width - 8)
        height = 8
        rows = panels.trace_lines(trace, width, height, 1.0, marks=(view.warning, view.trip))
        for i, row in enumerate(rows):
            hi = 1.0 - i / height
            style = "red" if hi > view.trip else "yellow" if hi > view.warning else "green"
            text.append(f"{hi:4.2f} ", style="dim")
            text.append(row + "\n", style=style)
        self.update(text)


class LearningPanel(Static):
    """Effective learning rate gamma*phi_d, phi_d, per-step gain against its cap, weights."""

    DEFAULT_CSS = """
    LearningPanel { border: round $accent; padding: 0 1; height: 100%; }
    """

    def show(self, view: panels.LearningView, weights: tuple[str, str],
             trace: list[float]) -> None:
        """Redraw from a learning view, the weight figures and the recent rates."""
        text = Text()
        text.append("effective learning rate gamma*phi_d  ", style="bold")
        text.append(view.eff_rate_text + "\n", style="bold cyan")
        text.append(f"phi_d = {view.phi_d_text}\n")
        frac = view.cap_fraction
        bar_w = 24
        filled = 0 if frac != frac else max(0, min(bar_w, int(round(frac * bar_w))))
        style = "green" if frac == frac and frac < 0.5 else "yellow" if frac < 1 else "red"
        text.append(f"step gain g (before the cap) = {view.step_gain_text} of cap "
                    f"{view.cap_text} ")
        text.append("[" + "#" * filled + "." * (bar_w - filled) + "]\n", style=style)
        text.append(f"weights ||W_hat|| = {weights[0]}, rate {weights[1]}\n")
        top = max(trace) if trace else 1.0
        top = top if top > 0 else 1.0
        width = max(10, self.size.width - 4)
        for row in panels.trace_lines(trace, width, 3, top):
            text.append(row + "\n", style="cyan")
        self.update(text)


class SupervisorPanel(Static):
    """Mode, the latched trip with its first-out rule, the fallback in charge, this run's trips."""

    DEFAULT_CSS = """
    SupervisorPanel { border: round $accent; padding: 0 1; height: 100%; }
    """

    def show(self, view: panels.SupervisorView) -> None:
        """Redraw from a supervisor view."""
        text = Text()
        text.append("mode ", style="bold")
        mode_style = {"engaged": "bold green", "fallback": "bold white on dark_orange",
                      "stopped": "bold white on red", "settling": "bold yellow"}.get(
            view.mode, "bold")
        text.append(f" {view.mode.upper()} ", style=mode_style)
        if view.latched:
            text.append("  LATCHED", style="bold white on red")
        text.append("\n")
        text.append(view.trip_text + "\n", style="bold red" if view.latched else "")
        text.append(view.fallback_text + "\n",
                    style="bold dark_orange" if "FALLBACK" in view.fallback_text else "")
        text.append(f"trips this run: {len(view.trips)}\n", style="bold")
        for line in view.trips[-6:]:
            text.append(f"  {line}\n")
        self.update(text)


class ConfirmArm(ModalScreen[bool]):
    """Asks before arming; shows the hardware cautions for a real rig."""

    DEFAULT_CSS = """
    ConfirmArm { align: center middle; }
    ConfirmArm > Vertical { width: 90; height: auto; border: thick $error; padding: 1 2;
                            background: $surface; }
    ConfirmArm Horizontal { height: auto; margin-top: 1; }
    ConfirmArm Button { margin-right: 2; }
    """
    BINDINGS = [Binding("y", "confirm", "arm"), Binding("n,escape", "cancel", "cancel")]

    def __init__(self, simulated: bool) -> None:
        super().__init__()
        self.simulated = simulated

    def compose(self) -> ComposeResult:
        """The question and the cautions."""
        text = ("Arm the adaptive controller on the simulated rig?" if self.simulated
                else HARDWARE_CAUTIONS + "\n\nArm the adaptive controller on this rig?")
        with Vertical():
            yield Label(text, id="cautions")
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
    """The operator's view of one rig."""

    TITLE = "corral"
    CSS = """
    Screen { layout: vertical; }
    #top { height: 15; }
    #middle { height: 9; }
    #bottom { height: 1fr; min-height: 12; }
    #status { height: 1; background: $boost; padding: 0 1; }
    Grid { grid-size: 2; grid-columns: 3fr 2fr; }
    DataTable { height: 100%; border: round $accent; }
    """
    BINDINGS = [
        Binding("a", "arm", "arm"),
        Binding("d", "disarm", "disarm"),
        Binding("s", "stop", "STOP", priority=True),
        Binding("r", "reset", "reset"),
        Binding("p", "pause", "pause traces"),
        Binding("q", "quit", "quit"),
    ]

    paused: reactive[bool] = reactive(False)
    """True while traces are frozen (values keep updating)."""
    status: reactive[str] = reactive("waiting for telemetry")
    """The last reply or connection message."""

    def __init__(self, source: TelemetrySource) -> None:
        super().__init__()
        self.source = source
        self.hello: dict[str, Any] = {}
        self.latest: dict[str, Any] = {}
        self.records_seen = 0
        self.replies: list[dict[str, Any]] = []
        self.ratio_trace: deque[float] = deque(maxlen=TRACE_LENGTH)
        self.rate_trace: deque[float] = deque(maxlen=TRACE_LENGTH)
        self._dirty = False

    # -- layout ------------------------------------------------------------
    def compose(self) -> ComposeResult:
        """Panels, tables, status line, footer with every key."""
        yield Header(show_clock=True)
        with Grid(id="top"):
            yield MarginPanel(id="margin")
            yield SupervisorPanel(id="supervisor")
        with Grid(id="middle"):
            yield DataTable(id="tracking", cursor_type="none", zebra_stripes=True)
            yield LearningPanel(id="learning")
        with Grid(id="bottom"):
            yield DataTable(id="inputs", cursor_type="none")
            yield DataTable(id="health", cursor_type="none")
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
        self.read_telemetry()
        # The refresh timer belongs to the main screen, not to the app: textual stops a
        # screen's timers when the screen is pruned, before its widgets are removed, while
        # the app's own timers outlive the screens at shutdown (a redraw then ran against
        # a half-removed screen: NoMatches for MarginPanel, about one exit in three).
        self.redraw_timer = self.screen.set_interval(1.0 / REFRESH_HZ, self.redraw)
        self.watch_status(self.status)

    # -- data --------------------------------------------------------------
    @work(exclusive=True, group="telemetry")
    async def read_telemetry(self) -> None:
        """Consume the source; keep only the latest record for the next redraw."""
        try:
            async for rec in self.source.records():
                self.ingest(rec)
        except (ConnectionError, OSError) as exc:
            self.status = f"telemetry lost: {exc}"
            return
        self.status = ("end of recording" if not self.source.live
                       else "the runtime closed the connection")

    def ingest(self, rec: dict[str, Any]) -> None:
        """Take one record from the source."""
        kind = rec.get("type")
        if kind == "hello":
            self.hello = rec
            self.title = f"corral: {rec.get('rig', '?')}" + (
                " (simulated)" if rec.get("simulated") else " (HARDWARE)")
        elif kind == "telemetry":
            self.latest = rec
            self.records_seen += 1
            if self.records_seen == 1 and self.status == "waiting for telemetry":
                self.status = f"live: {self.source.description}"
            if not self.paused:
                self.ratio_trace.append(float(rec.get("ratio", float("nan"))))
                self.rate_trace.append(float(rec.get("eff_rate", 0.0) or 0.0))
            self._dirty = True
        elif kind == "reply":
            self.replies.append(rec)
            ok = "ok" if rec.get("ok") else "REFUSED"
            self.status = f"{rec.get('op', '?')}: {ok}. {rec.get('message', '')}".strip()
        elif kind == "trip":
            self.status = "TRIP: " + panels.trip_line(rec)

    def redraw(self) -> None:
        """Refresh every panel from the latest telemetry (at most REFRESH_HZ)."""
        if not self._dirty:
            return
        self._dirty = False
        tel, hello = self.latest, self.hello
        # Query the main screen, not the active one: a confirmation may be on top,
        # and the values behind it keep updating.
        main = self.screen_stack[0]
        main.query_one(MarginPanel).show(panels.margin_view(hello, tel),
                                         list(self.ratio_trace), self.paused)
        main.query_one(LearningPanel).show(panels.learning_view(tel), panels.weight_view(tel),
                                           list(self.rate_trace))
        main.query_one(SupervisorPanel).show(panels.supervisor_view(tel))
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
            self.query_one("#status", Static).update(value)
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
        simulated = bool(self.hello.get("simulated", False))

        def decided(yes: bool | None) -> None:
            if yes:
                asyncio.get_running_loop().create_task(self._request("arm"))
            else:
                self.status = "arm: cancelled"

        self.push_screen(ConfirmArm(simulated), decided)

    async def action_disarm(self) -> None:
        """Disarm: hand over to the baseline and stop adapting."""
        await self._request("disarm")

    async def action_stop(self) -> None:
        """Stop: always available, one key."""
        await self._request("stop")

    async def action_reset(self) -> None:
        """Reset a latched trip (never restarts: arm again afterwards)."""
        await self._request("reset")

    def action_pause(self) -> None:
        """Freeze or resume the traces."""
        self.paused = not self.paused
        self.status = "traces paused" if self.paused else "traces running"
        self._dirty = True
