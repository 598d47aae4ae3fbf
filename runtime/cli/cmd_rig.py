"""`corral rig serve`: the simulated rig of a config served as a device.

``corral rig serve CONFIG --serial`` creates a pseudo-terminal and prints the
path to open as the FIRST line of its output (a stable symlink, so a host can
reopen it after a ``disconnect`` fault); ``--mqtt HOST:PORT`` serves as rig
``rig.name`` through a broker (TLS and login from ``[link.mqtt]``) and prints
``mqtt://HOST:PORT/RIG``. Serves until interrupted or ``--duration`` s.
``--fault KIND@SECONDS[:k=v,...]`` (repeatable) adds to the config's
``[[faults]]``; ``--set KEY=VALUE`` overrides the config.

What lives here: argument handling and wiring. The device itself is
`sim_rigs.device.RigDevice`; the topics and settings `drivers.mqtt_link`.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import signal
import sys
import tempfile
from typing import Any

from drivers.base import LinkClosed
from runtime.cli.common import UserError, common_config_args
from runtime.config import ConfigError, load_config
from runtime.method.design import design_from_config
from runtime.offline.dryrun import plant_from_config
from runtime.realtime.loop import command_timeout
from sim_rigs.faults import FaultError, FaultSchedule


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """`rig serve` and its options."""
    sub = parser.add_subparsers(dest="rig_command", metavar="ACTION")
    serve = sub.add_parser("serve", help="serve the config's simulated rig as a device",
                           description="Serve the config's simulated rig as a device on its own "
                                       "real-time clock, over a pseudo-terminal or MQTT.")
    common_config_args(serve)
    how = serve.add_mutually_exclusive_group(required=True)
    how.add_argument("--serial", action="store_true",
                     help="serve over a pseudo-terminal; its path is the first output line")
    how.add_argument("--mqtt", metavar="HOST:PORT",
                     help="serve through this MQTT broker as rig rig.name")
    serve.add_argument("--duration", type=float, default=math.inf, metavar="S",
                       help="stop after S seconds (default: until interrupted)")
    serve.add_argument("--fault", action="append", default=[], metavar="KIND@SECONDS",
                       help="inject a fault, e.g. spike@5:axis=az,size=0.2 or "
                            "disconnect@3:duration=1 (repeatable)")
    serve.add_argument("--pty-link", metavar="PATH",
                       help="symlink to the pseudo-terminal (default: a name in the temp folder)")
    serve.add_argument("--json", action="store_true",
                       help="print the device's figures as JSON when it stops")


def _mqtt_settings(cfg: Any, where: str, rig: str) -> Any:
    # Deferred on purpose: build_parser imports every command module at each start; the
    # MQTT transport (aiomqtt, paho) loads only when a command uses it.
    from drivers.mqtt_link import MqttConfigError, MqttSettings, parse_host_port

    try:
        host, port = parse_host_port(where)
    except ValueError as exc:
        raise UserError(f"--mqtt: {exc}") from None
    try:
        return MqttSettings.from_table(cfg.get("link.mqtt") or {}, host=host, port=port, rig=rig)
    except MqttConfigError as exc:
        raise ConfigError(exc.field, exc.problem, exc.fix) from None


def main(args: argparse.Namespace) -> int:
    """Serve until interrupted; returns 0."""
    if getattr(args, "rig_command", None) != "serve":
        raise UserError("say what to do: corral rig serve CONFIG --serial | --mqtt HOST:PORT")
    # Deferred on purpose: build_parser imports every command module at each start; the
    # served device pulls numba and both transports, loaded only for `rig serve`.
    from sim_rigs.device import RigDevice

    if not 0 < args.duration <= math.inf:
        raise UserError("--duration must be a positive number of seconds, e.g. --duration 60 "
                        "(leave it out to serve until interrupted)")
    cfg = load_config(args.config, args.overrides)
    design = design_from_config(cfg)
    plant = plant_from_config(cfg, design)
    rig = design.rig.name
    timeout = command_timeout(cfg)
    try:
        FaultSchedule.from_config(cfg)
    except FaultError as exc:
        raise ConfigError("faults", str(exc), "see sim_rigs/faults.py for the kinds.") from None
    try:
        schedule = FaultSchedule.from_config(cfg, args.fault)
    except FaultError as exc:
        raise UserError(str(exc)) from None
    seed = int(cfg.number("plant.seed"))
    try:
        # Each fault's axis is resolved against the device's channels here.
        # Over a pseudo-terminal the served rig names itself as served, so a run through it
        # is never taken for the in-process simulation (an MQTT rig's name is its topic).
        device = RigDevice(plant, period=design.Ts,
                                rig_id=f"{rig}-served" if args.serial else rig,
                                command_timeout_s=timeout,
                                faults=schedule, output_limits=design.rig.input_limits,
                                seed=seed)
    except FaultError as exc:
        raise UserError(f"--fault / [[faults]]: {exc}") from None
    if args.serial:
        link_path = args.pty_link or os.path.join(
            tempfile.gettempdir(), f"corral-{rig}-{os.getpid()}.tty")
        try:
            where = device.serve_pty(link_path)
        except OSError as exc:
            raise UserError(f"cannot create the pseudo-terminal link {link_path} ({exc}); "
                            "give --pty-link a path in a folder you can write") from None
    else:
        settings = _mqtt_settings(cfg, args.mqtt, rig)
        try:
            where = device.serve_mqtt(settings)
        except LinkClosed as exc:
            raise UserError(str(exc)) from None
    print(where, flush=True)
    faults = ", ".join(f.label() for f in schedule.faults)
    print(f"corral: serving {rig} at {1.0 / design.Ts:g} Hz on {where} (command timeout "
          f"{timeout:g} s{'; faults: ' + faults if faults else ''}); Ctrl-C stops",
          file=sys.stderr, flush=True)

    def on_signal(signum: int, frame: object) -> None:
        device.stop()

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        report = device.run(args.duration)
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    if args.json:
        print(json.dumps(report.as_dict()), flush=True)
    else:
        r = report
        print(f"corral: served {r.ticks} periods, {r.samples_sent} samples, "
              f"{r.commands_applied} commands, {r.timeouts} in command timeout, "
              f"lateness p99 {r.lateness_p99_us:.0f} us", file=sys.stderr)
    return 0
