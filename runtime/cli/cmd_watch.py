"""`corral watch`: open the live dashboard on a rig (local socket, MQTT, or a recording).

Also runnable as ``python -m runtime.cli.cmd_watch --socket PATH``, which is how
`corral run` starts the dashboard in its own process.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
import time
from pathlib import Path
from typing import Any

from runtime.cli.common import UserError
from runtime.config import load_config, rig_name
from runtime.dashboard.fleet import FleetState, make_app
from runtime.dashboard.sources import (
    FleetSource,
    MqttSource,
    RecordedSource,
    SocketSource,
    TelemetrySource,
)
from runtime.records.runinfo import link_identity, run_name


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral watch`."""
    parser.add_argument("config", nargs="?", default=None,
                        help="config of the running rig (finds its socket in log.dir)")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="KEY=VALUE", help="override a config key")
    parser.add_argument("--socket", type=Path, help="the runtime's telemetry socket")
    parser.add_argument("--mqtt", metavar="HOST:PORT",
                        help="follow a rig through a broker (with --rig), or without --rig "
                             "every rig on it (the fleet view)")
    parser.add_argument("--rig", help="rig name on the broker (with --mqtt; none: the fleet)")
    parser.add_argument("--username", help="broker user name (with --mqtt)")
    parser.add_argument("--password-env", metavar="VAR",
                        help="environment variable holding the broker password")
    parser.add_argument("--tls", action="store_true", help="use TLS to the broker")
    parser.add_argument("--ca-file", metavar="PEM",
                        help="CA certificate of the broker (with --tls; default: the system "
                        "store)")
    parser.add_argument("--cert", metavar="PEM",
                        help="client certificate, for brokers that require one (with --tls)")
    parser.add_argument("--key", metavar="PEM", help="the client certificate's key (with --cert)")
    parser.add_argument("--prefix", default="corral",
                        help="first topic level on the broker (the rig's [link.mqtt] prefix)")
    parser.add_argument("--replay", type=Path, metavar="FILE",
                        help="show a recorded telemetry file instead of a live rig")
    parser.add_argument("--speed", type=float, default=1.0,
                        help="replay speed (1 = as recorded, 0 = at once)")
    parser.add_argument("--wait", type=float, default=0.0, metavar="S",
                        help="wait up to S seconds for the runtime's socket to appear")
    parser.add_argument("--progress", type=Path, metavar="FILE",
                        help="with --socket: open the dashboard at once and show FILE's last "
                        "lines (the runtime's console: preflight progress) until the socket "
                        "is up")


def mqtt_options(args: argparse.Namespace) -> tuple[str, int, dict[str, Any]]:
    """Broker host, port and login/TLS keywords from --mqtt and its companions."""
    host, _, port = args.mqtt.rpartition(":")
    if not host or not port.isdigit():
        raise UserError(f"--mqtt {args.mqtt!r}: write HOST:PORT, e.g. 127.0.0.1:1883")
    password = os.environ.get(args.password_env) if args.password_env else None
    ca, cert, key = (getattr(args, k, None) for k in ("ca_file", "cert", "key"))
    if (ca or cert or key) and not args.tls:
        raise UserError("--ca-file, --cert and --key go with --tls; add --tls")
    for flag, path in (("--ca-file", ca), ("--cert", cert), ("--key", key)):
        if path is not None and not os.path.isfile(path):
            raise UserError(f"{flag} {path}: no such file; give the PEM file's path")
    if (cert is None) != (key is None):
        raise UserError("--cert needs --key (and --key needs --cert)")
    return host, int(port), dict(username=args.username, password=password, tls=args.tls,
                                 ca_file=ca, cert_file=cert, key_file=key)


def make_source(args: argparse.Namespace) -> TelemetrySource:
    """The telemetry source the arguments name."""

    if args.replay:
        if not args.replay.is_file():
            raise UserError(f"no recording at {args.replay}; give a telemetry file")
        return RecordedSource(args.replay, speed=args.speed)
    if args.mqtt:
        host, port, broker = mqtt_options(args)
        if not args.rig:
            return FleetSource(host, port, prefix=args.prefix, **broker)
        return MqttSource(host, port, args.rig, prefix=args.prefix, **broker)
    path = args.socket
    if path is None and args.config:
        cfg = load_config(args.config, args.overrides)
        rig = rig_name(cfg)

        kind = link_identity(str(cfg.get("rig.link")))["kind"]
        path = Path(str(cfg.get("log.dir"))) / f"{run_name(rig, kind)}.sock"
    if path is None:
        raise UserError("say which rig to watch: CONFIG, --socket PATH, --mqtt HOST:PORT "
                         "--rig NAME (or --mqtt alone for every rig), or --replay FILE")
    if getattr(args, "progress", None) is not None:
        return SocketSource(path)  # the dashboard waits for it, showing the progress
    deadline = time.monotonic() + max(0.0, getattr(args, "wait", 0.0))
    while not Path(path).exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    if not Path(path).exists():
        raise UserError(f"no runtime socket at {path}; is `corral run` running with this "
                        "config (and the same log.dir)?")
    return SocketSource(path)


def main(args: argparse.Namespace) -> int:
    """Run the dashboard until the operator quits."""
    # Deferred on purpose: build_parser imports every command module at each start; textual
    # (about half a second) loads only for `watch`.
    from runtime.dashboard.app import Dashboard

    source = make_source(args)

    async def run() -> None:
        if isinstance(source, FleetSource):
            await run_fleet(source)
            return
        progress = getattr(args, "progress", None)
        if progress is not None and isinstance(source, SocketSource):
            try:
                await Dashboard(source, progress=progress,
                                wait_s=max(1.0, float(args.wait))).run_async()
            finally:
                await source.close()
            return
        async with source:
            await Dashboard(source).run_async()

    from aiomqtt import MqttError  # deferred like the dashboard: only `watch` needs it

    try:
        asyncio.run(run())
    except (ConnectionError, OSError, MqttError) as exc:
        # MqttError: broker down or refusing us (aiomqtt wraps the socket error).
        fix = ("is the broker running there, and is the rig publishing telemetry "
               "(`corral run ... --telemetry-mqtt HOST:PORT`)?" if args.mqtt else
               "is `corral run` still running?")
        raise UserError(f"cannot reach the telemetry source ({exc}); {fix}") from None
    return 0


async def run_fleet(fleet: FleetSource) -> None:
    """The fleet view; Enter opens one rig's dashboard (its own connection, its own
    requests), quitting that comes back to the fleet, `q` on the fleet ends."""
    from runtime.dashboard.app import Dashboard  # deferred: textual, see main

    state = FleetState()  # kept across dashboards: worst margins and last trips stay
    while True:
        async with fleet:
            rig = await make_app(fleet, state).run_async()
        if rig is None:
            return
        one = MqttSource(fleet.host, fleet.port, rig, fleet.username, fleet.password, fleet.tls,
                         prefix=fleet.prefix, ca_file=fleet.ca_file, cert_file=fleet.cert_file,
                         key_file=fleet.key_file)
        async with one:
            await Dashboard(one).run_async()


if __name__ == "__main__":
    from runtime.cli.main import main as cli_main

    sys.exit(cli_main(["watch", *sys.argv[1:]]))
