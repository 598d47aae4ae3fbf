"""What a run is told (`RunSettings`) and the settings read from the config at start-up:
telemetry over MQTT, the log folder, the operator socket."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.design import Design

if TYPE_CHECKING:  # the MQTT driver is imported only when a run publishes over MQTT
    from drivers.mqtt_link import MqttSettings


# ------------------------------------------------------------------ run settings
@dataclass
class RunSettings:
    """Everything a run needs besides the config (command-line choices)."""

    duration: float | None = None
    auto_arm: bool = False
    faults: list[str] = field(default_factory=list)
    link: str | None = None
    echo_trips: bool = True
    """Print one line on stderr when a trip is on disk."""
    telemetry_mqtt: str | None = None
    """``HOST:PORT`` of a broker for telemetry (``--telemetry-mqtt``; else ``telemetry.mqtt``)."""
    preflight: bool = True
    """Run `runtime.offline.preflight.run_preflight` before accepting an arm on a non-simulated
    link (``--no-preflight`` turns it off)."""
    hostcheck: dict[str, Any] | None = None
    """The host check's result (`runtime.realtime.hostcheck.pre_arm_check`) when one ran before the
    run: it goes into the log headers, the telemetry hello and the summary."""
    console: TextIO | None = None
    """Where progress and trip lines go (a text file while a dashboard owns the terminal);
    None = stderr."""

@dataclass(frozen=True)
class TickSettings:
    """The config keys the tick reads, read once (`from_config`) and typed.

    The parts that own a section read it themselves from the config (the command
    schedule, the bound, the watchdog rules, the fallbacks, the law's options)."""

    law: str
    """``loop.law``: which implementation of the adaptive law runs."""
    jump_limit: NDArray[np.float64]
    """``watchdog.jump_limit`` per state (default half the state limits)."""
    estimator_cutoff_hz: float
    settle_time: float
    settle_rate_tol: float
    disarm_action: str
    stop_action: str
    engage_slew: float
    pre_capture_s: float
    post_capture_s: float
    events_per_s: float
    """Most operator events written to the trip log per second (the rest counted)."""
    rig_link: str
    """``rig.link``: the link when the run names none."""

    @classmethod
    def from_config(cls, cfg: Config, design: Design) -> TickSettings:
        """Read every key the tick needs (errors name the key, as the reads always did)."""
        return cls(
            law=str(cfg.choice("loop.law")),
            jump_limit=cfg.vector("watchdog.jump_limit", design.rig.n,
                                  (0.5 * design.limits).tolist(), positive=True),
            estimator_cutoff_hz=cfg.number("estimator.cutoff_hz"),
            settle_time=cfg.number("supervisor.settle_time"),
            settle_rate_tol=cfg.number("supervisor.settle_rate_tol"),
            disarm_action=cfg.choice("supervisor.disarm_action"),
            stop_action=cfg.choice("supervisor.stop_action"),
            engage_slew=cfg.number("supervisor.engage_slew"),
            pre_capture_s=cfg.number("log.pre_capture_s"),
            post_capture_s=cfg.number("log.post_capture_s"),
            events_per_s=cfg.number("log.events_per_s"),
            rig_link=str(cfg.get("rig.link")),
        )


def mqtt_telemetry_settings(cfg: Config, link_spec: str | None, telemetry_mqtt: str | None,
                            rig: str) -> MqttSettings | None:
    """The broker settings telemetry is published with, or None (no MQTT telemetry).

    An MQTT link (``mqtt://HOST:PORT/RIG``) publishes on its own broker under its
    rig name; otherwise ``--telemetry-mqtt HOST:PORT`` or ``telemetry.mqtt``
    names a broker, and the config's rig name is used. Login, TLS, prefix and
    ``remote_requests`` come from ``[link.mqtt]``.
    """
    from dataclasses import replace

    from drivers.mqtt_link import MqttConfigError, MqttSettings, parse_host_port, parse_mqtt_url

    table = cfg.get("link.mqtt") or {}
    spec = link_spec or str(cfg.get("rig.link"))
    try:
        if spec.startswith(("mqtt://", "mqtts://")):
            try:
                host, port, url_rig = parse_mqtt_url(spec)
            except ValueError as exc:
                raise ConfigError("rig.link", str(exc), "write mqtt://HOST:PORT/RIG.") from None
            out = MqttSettings.from_table(table, host=host, port=port, rig=url_rig)
            return replace(out, tls=True) if spec.startswith("mqtts://") else out
        where = "--telemetry-mqtt" if telemetry_mqtt else "telemetry.mqtt"
        text = telemetry_mqtt or cfg.get("telemetry.mqtt")
        if not text:
            return None
        try:
            host, port = parse_host_port(str(text))
        except ValueError as exc:
            raise ConfigError(where, str(exc), "write HOST:PORT, e.g. 127.0.0.1:1883.") \
                from None
        return MqttSettings.from_table(table, host=host, port=port, rig=rig)
    except MqttConfigError as exc:
        raise ConfigError(exc.field, exc.problem, exc.fix) from None


# ------------------------------------------------------------------ start-up checks
_UNIX_PATH_MAX = 107
"""Longest Unix socket path in bytes (Linux ``sun_path`` is 108 with the NUL)."""


def log_dir_from_config(cfg: Config) -> Path:
    """``log.dir`` as a folder path, or a one-line error (a NUL byte, not text)."""
    raw = cfg.get("log.dir")
    if not isinstance(raw, str) or not raw:
        raise ConfigError("log.dir", f"must be a folder path, not {raw!r}.",
                          "write e.g. log.dir = \"runs\".")
    if "\0" in raw:
        raise ConfigError("log.dir", "contains a NUL byte, which no file name can hold.",
                          "write a plain folder path, e.g. log.dir = \"runs\".")
    return Path(raw)


def operator_settings(cfg: Config) -> dict[str, Any]:
    """Who may use the operator socket and how fast, from ``[operator]``.

    ``socket_group`` (a group name or gid; mode 0660 for it, else 0600),
    ``allowed_uids`` (peer uids accepted; default this process's uid and root),
    ``request_rate_hz`` (default 20) and ``request_burst`` (default 20).
    """
    import grp

    gid = None
    group = cfg.get("operator.socket_group")
    if group is not None:
        try:
            gid = (int(group) if isinstance(group, int) and not isinstance(group, bool)
                   else grp.getgrnam(str(group)).gr_gid)
        except KeyError:
            raise ConfigError("operator.socket_group", f"no group called {group!r}.",
                              "name a group of this machine (see /etc/group) or leave it "
                              "out for a socket only you can use.") from None
    uids = cfg.get("operator.allowed_uids")
    if uids is not None:
        if not (isinstance(uids, list) and all(isinstance(u, int) and not isinstance(u, bool)
                                               and u >= 0 for u in uids)):
            raise ConfigError("operator.allowed_uids", f"must be a list of uids, not {uids!r}.",
                              "write e.g. operator.allowed_uids = [1000, 0].")
    return {"socket_gid": gid, "allowed_uids": uids,
            "request_rate_hz": cfg.number("operator.request_rate_hz"),
            "request_burst": cfg.number("operator.request_burst")}
