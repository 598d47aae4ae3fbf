"""`corral run CONFIG`: drive a rig in real time under the watchdog.

Prints the socket path, then (without ``--json``) one line per trip and a
summary at the end; with ``--headless --duration S --json`` it prints one JSON
object when the run ends. ``--arm`` arms automatically, and only for the
simulated rig. Without ``--headless`` the dashboard is started in its own
process (``python -m runtime.cli.cmd_watch --socket PATH --wait 10``, or the command
in ``CORRAL_DASHBOARD_CMD``); while it owns the terminal the runtime's own lines
go to ``<log.dir>/<rig>-<stamp>.console``, and when it exits (the operator
quit) the run stops and the summary is printed.

What does not live here: the loop (`runtime.realtime.loop`), the dashboard
(`runtime.cli.cmd_watch`).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import importlib.util
import json
import math
import os
import shlex
import signal
import subprocess
import sys
from pathlib import Path

from drivers.base import LinkClosed
from runtime.cli.common import UserError, common_config_args
from runtime.config import load_config
from runtime.realtime.hostcheck import explain_from_header
from runtime.realtime.loop import EXIT_INTERNAL_TRIP, Runner, RunSettings
from runtime.records.runinfo import END_HOW

HARDWARE_CAUTIONS = """\
corral: HARDWARE CAUTIONS before you arm a real rig:
  - keep a physical emergency stop within reach and test it first;
  - guard the rig: nobody inside its reach while it is armed;
  - corral's software trips are NOT a safety-rated function and not an emergency stop;
  - the device must fail safe on its own when commands stop arriving (command timeout);
  - follow your local codes and licensed practice for machine safety.
  The continuous-time bound is not a hardware guarantee: watch the measured margin."""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral run`."""
    common_config_args(parser)
    parser.add_argument("--arm", action="store_true",
                        help="arm at start (simulated rig only; a real rig is armed by the "
                             "operator through the dashboard or socket)")
    parser.add_argument("--headless", action="store_true", help="no dashboard")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="end after S seconds (default: run until stopped)")
    parser.add_argument("--json", action="store_true",
                        help="print one JSON summary object at the end")
    parser.add_argument("--fault", action="append", default=[], metavar="KIND@SECONDS",
                        help="inject a fault into the simulated rig, e.g. spike@5:axis=az,"
                             "size=0.2 (repeatable)")
    parser.add_argument("--link", default=None, metavar="SPEC",
                        help="link to the rig (default: rig.link of the config; 'sim' = the "
                             "simulated rig in-process)")
    parser.add_argument("--no-preflight", action="store_true",
                        help="arm a non-simulated rig without the preflight sweep first")
    parser.add_argument("--telemetry-mqtt", default=None, metavar="HOST:PORT",
                        help="also publish telemetry, mode and trips on this MQTT broker "
                             "(default: telemetry.mqtt of the config; an mqtt:// link "
                             "publishes on its own broker)")


def dashboard_available() -> bool:
    """True when the dashboard module is installed (hook for `corral watch`)."""
    return importlib.util.find_spec("runtime.dashboard.app") is not None


DASHBOARD_ENV = "CORRAL_DASHBOARD_CMD"
"""Environment variable replacing the dashboard command (tests, other viewers): a command
line; ``{socket}`` in it is replaced by the socket path, else ``--socket PATH --wait 10``
is appended."""


def dashboard_command(socket_path: str, progress: str | None = None) -> list[str] | None:
    """The dashboard process's command line, or None when no dashboard is installed.

    With `progress` (the runtime's console file) the dashboard starts at once and shows
    that file's last lines (preflight progress) until the runtime's socket is up."""
    custom = os.environ.get(DASHBOARD_ENV)
    if custom:
        if "{socket}" in custom:
            return shlex.split(custom.replace("{socket}", shlex.quote(socket_path)))
        return [*shlex.split(custom), "--socket", socket_path, "--wait", "10"]
    if not dashboard_available():
        return None
    if progress is not None:
        # The preflight runs before the socket exists and may take minutes.
        return [sys.executable, "-m", "runtime.cli.cmd_watch", "--socket", socket_path,
                "--wait", "3600", "--progress", progress]
    return [sys.executable, "-m", "runtime.cli.cmd_watch", "--socket", socket_path, "--wait", "10"]


def _check_serial_port_exists(spec: str) -> None:
    """Fail fast on a serial port that is not there (before a preflight sweep runs)."""
    if not spec.startswith("serial:"):
        return
    # Deferred on purpose: build_parser imports every command module at each start; the
    # serial transport (pyserial) loads only when a serial link is named.
    from drivers.serial_link import parse_serial_url

    try:
        path, _ = parse_serial_url(spec)
    except ValueError:
        return  # the link builder reports a malformed spec with its own message
    if not os.path.exists(path):
        raise UserError(f"no serial port at {path}: plug in or start the device, check the path "
                        "(ls /dev/serial/by-id/), or serve the simulated rig with "
                        "`corral rig serve CONFIG --serial`")


ANONYMOUS_BROKER_WARNING = """\
corral: WARNING ********************************************************************
corral: WARNING  the MQTT broker {where} admits ANONYMOUS clients.
corral: WARNING  Anyone who can reach it can publish commands to this rig, forged
corral: WARNING  samples, or a status that ends the run. Lock it before arming hardware:
corral: WARNING  a password file, a per-rig ACL and TLS (docs/mqtt.md, "Locking the broker").
corral: WARNING ********************************************************************"""


def _warn_if_broker_is_open(link: object) -> None:
    """A loud warning when a real rig's broker lets anonymous clients in."""
    # Deferred on purpose: build_parser imports every command module at each start; the
    # MQTT transport (aiomqtt, paho) loads only when an MQTT link is named.
    from drivers.mqtt_link import MqttLink, admits_anonymous

    if not isinstance(link, MqttLink):
        return
    s = link.settings
    try:
        open_ = asyncio.run(admits_anonymous(s))
    except Exception:  # noqa: BLE001 - a probe that fails says nothing either way
        return
    if open_:
        print(ANONYMOUS_BROKER_WARNING.format(where=f"{s.host}:{s.port}"), file=sys.stderr,
              flush=True)


EXIT_LINK_LOST = 3
"""`corral run` exit status when the link was lost during the run (a `link_loss` trip)."""


def main(args: argparse.Namespace) -> int:
    """Run; exit 0 when the run ended normally (trips included), 2 on a user error,
    3 (`EXIT_LINK_LOST`) when the link was lost during the run, 71
    (`runtime.realtime.loop.EXIT_INTERNAL_TRIP`) when an exception inside the tick ended it through
    the ``internal`` trip."""
    if args.duration is not None and not 0 < args.duration < math.inf:
        raise UserError("--duration must be a positive number of seconds, e.g. --duration 10 "
                        "(leave it out to run until stopped)")
    cfg = load_config(args.config, args.overrides)
    _check_serial_port_exists(args.link or str(cfg.get("rig.link")))
    settings = RunSettings(duration=args.duration, auto_arm=False, faults=list(args.fault),
                           link=args.link, telemetry_mqtt=args.telemetry_mqtt,
                           preflight=not args.no_preflight)
    runner = Runner(cfg, settings)
    # With a dashboard the cautions are in its arm dialog, where the operator arms;
    # printed here they would scroll away under it.
    will_draw = not args.headless and (os.environ.get(DASHBOARD_ENV) or dashboard_available())
    if not runner.simulated:
        if will_draw:
            print("corral: REAL HARDWARE: the cautions are in the dashboard's arm dialog",
                  file=sys.stderr)
        else:
            print(HARDWARE_CAUTIONS, file=sys.stderr)
        _warn_if_broker_is_open(runner.link)
        if args.arm:
            raise UserError("--arm arms only the simulated rig; arm a real rig yourself "
                            "from the dashboard or the operator socket once it is safe")
    settings.auto_arm = bool(args.arm)
    print(f"corral: {runner.design.rig.name} running; operator socket {runner.socket_path}; "
          f"trip log {runner.core.trip_path}", file=sys.stderr, flush=True)

    dash = None
    console_path: Path | None = None
    console = None
    if not args.headless:
        cmd = dashboard_command(str(runner.socket_path),
                                str(runner.core.trip_path.with_suffix(".console")))
        if cmd is None:
            print("corral: no dashboard installed; running headless", file=sys.stderr)
        else:
            # The dashboard owns the terminal from here on: the runtime's own lines go to
            # a file beside the logs, whose path is printed at the end.
            console_path = runner.core.trip_path.with_suffix(".console")
            console = open(console_path, "a", buffering=1, encoding="utf-8")  # noqa: SIM115
            settings.console = console
            # Its own process: in the same process its redraws delay ticks by tens of ms.
            dash = subprocess.Popen(cmd)

    dash_exit: list[int] = []

    async def watch_dashboard() -> None:
        assert dash is not None
        while dash.poll() is None:
            await asyncio.sleep(0.1)
        dash_exit.append(int(dash.returncode))
        print(f"corral: dashboard exited ({dash.returncode}); stopping the run",
              file=console or sys.stderr, flush=True)
        runner.request_stop()

    async def go() -> dict:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            with contextlib.suppress(NotImplementedError, RuntimeError):
                loop.add_signal_handler(sig, runner.request_stop, "interrupted")
        watcher = asyncio.create_task(watch_dashboard()) if dash is not None else None
        try:
            return await runner.run()
        finally:
            if watcher is not None:
                watcher.cancel()

    try:
        summary = asyncio.run(go())
    except LinkClosed as exc:
        # The link never opened (no such port, broker down): the run did not start.
        raise UserError(f"{exc}; start the device or broker first (or `corral rig serve "
                        f"CONFIG --serial | --mqtt HOST:PORT` to rehearse) and check "
                        f"--link / rig.link") from None
    finally:
        if dash is not None and dash.poll() is None:
            dash.terminate()
            with contextlib.suppress(subprocess.TimeoutExpired):
                dash.wait(3)
        if console is not None:
            settings.console = None
            console.close()
    # Link figures (frames, CRC errors, gaps, duplicates, late frames, latency p50/p99).
    summary.setdefault("link", dict(runner.link.stats.as_dict()))
    if console_path is not None:
        summary["console"] = str(console_path)
        summary["dashboard_exit"] = dash_exit[0] if dash_exit else None
    if args.json:
        print(json.dumps(summary, indent=2, default=str))
    else:
        print(f"corral run: {summary['ticks']} ticks, lateness p50 "
              f"{_us(summary['lateness_p50_us'])}, p99 {_us(summary['lateness_p99_us'])}, "
              f"{summary['deadline_misses']} deadline misses; max margin ratio "
              f"{summary['max_margin_ratio']:.3f}; {len(summary['trips'])} trip(s)")
        header = {"period": runner.design.Ts, "config": cfg.raw,
                  "hostcheck": summary.get("hostcheck")}
        run_loop = {"lateness_p99_us": summary["lateness_p99_us"],
                    "lateness_max_us": summary["lateness_max_us"],
                    "deadline_misses": summary["deadline_misses"]}
        for t in summary["trips"]:
            print(f"  trip {t['id']}: {t['rule']} at tick {t['tick']} -> {t['action']} "
                  f"({t['detect_to_action_us']:.0f} us detect to action)")
            why = explain_from_header(t["rule"], t["value"], t["threshold"], header, run_loop)
            if why:
                print(f"    {why}")

        print(f"  ended: {END_HOW.get(str(summary.get('ended')), summary.get('ended'))}; link "
              f"{summary.get('link_kind')}")
        print(f"  trip log: {summary['trip_log']}\n  run log:  {summary['run_log']}")
        if console_path is not None:
            print(f"  console:  {console_path}")
    if summary.get("internal_error"):
        # The tick raised: outputs went off and the trip is on disk (rule `internal`).
        return EXIT_INTERNAL_TRIP
    losses = summary.get("link_losses") or []
    if losses:
        # A run whose link ended under it did not end normally, whatever came after.
        print(f"corral run: the link was lost {len(losses)} time(s) (first: "
              f"{losses[0]['detail']}); exit {EXIT_LINK_LOST}", file=sys.stderr)
        return EXIT_LINK_LOST
    return 0


def _us(v: float | None) -> str:
    return "n/a" if v is None else f"{v:.0f} us"
