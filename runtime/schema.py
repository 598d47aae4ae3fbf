"""Every config key corral reads, declared once: type, unit, range, default, meaning.

What lives here: the declarations (`KEYS`, `OPEN_TABLES`), the default markers
(`REQUIRED`, `Required(when)`, `OPTIONAL`, `Derived(how)`) and the look-ups the
loader and the readers use (`spec_for`, `is_open_table`, `section_names`). What
does not: the checking itself (`runtime.config`, which runs each declared key
through the typed reader of its kind) and any key's meaning to the method.

Adding a key is one line in `KEYS`:

    key("adaptation.gamma", VECTOR, REQUIRED, "1/s", "adaptation gain ...", positive=True)

A key that is read but not declared is a programming error (`Config.get` refuses it),
so a new reader cannot quietly bring back a scattered default.

Tables whose key set depends on the rig or the watchdog (``[plant.truth]``,
``[watchdog.rules.<id>]``, ``[commands]`` axes) are `OpenTable`s: the entries'
names come from a function of the raw config (None: any name, checked later by the
module that knows the rig), and ``*`` stands for an entry in the declared key paths.

This module imports nothing of ours at its top: option lists owned by other modules
(the barrier families, the watchdog rules) are named as ``"module:NAME"`` and
resolved when a key is checked, because those modules import `runtime.config`,
which imports this one.
"""

from __future__ import annotations

import importlib
import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

# ----------------------------------------------------------------- kinds
NUMBER = "number"
"""A finite float (an integer is accepted)."""
INTEGER = "integer"
"""A whole number."""
FLAG = "flag"
"""true or false."""
CHOICE = "choice"
"""One of `options`."""
TEXT = "text"
"""A string."""
NAMES = "names"
"""A list of strings."""
VECTOR = "vector"
"""A list of numbers, or one number meaning the same value for every entry."""
MATRIX = "matrix"
"""A list of rows of numbers."""
WEIGHT = "weight"
"""A symmetric positive definite weight: a scalar, the diagonal, or the full matrix."""
EPS = "eps"
"""``"from_limits"`` or a positive number."""
PAIR = "pair"
"""``[lo, hi]`` with lo <= hi."""
SEGMENTS = "segments"
"""A list of command segments ``{at, kind, ...}`` (checked by `runtime.method.commands`)."""
TABLES = "tables"
"""An array of tables (``[[faults]]``, checked by `sim_rigs.faults`)."""
CHECKED = "checked"
"""A value its one reader checks (a rig parameter or sensor channel by the rig loader,
the input regressor scale by the design, the socket group by the runtime): opaque here."""
TABLE = "table"
"""A table of keys: declared keys below it, or an `OpenTable`."""


# ----------------------------------------------------------------- defaults
@dataclass(frozen=True)
class Required:
    """No default: reading the key without it is an error (`when`: only in that case)."""

    when: str = ""


@dataclass(frozen=True)
class Derived:
    """The default is computed by the reader from other settings (`how` says from what)."""

    how: str


class _Optional:
    """No default and none needed: absent means the feature is off (reads as None)."""

    def __repr__(self) -> str:
        return "OPTIONAL"


REQUIRED = Required()
OPTIONAL = _Optional()


@dataclass(frozen=True)
class Key:
    """One declared key (``path`` may hold ``*`` for an entry of an open table)."""

    path: str
    kind: str
    default: Any
    unit: str = ""
    doc: str = ""
    options: tuple[str, ...] | str = ()
    """Allowed values of a CHOICE, or ``"module:NAME"`` of a tuple owned elsewhere."""
    positive: bool = False
    minimum: float | None = None
    maximum: float | None = None

    @property
    def has_value_default(self) -> bool:
        """True when the default is a plain value (not required, optional or derived)."""
        return not isinstance(self.default, Required | Derived | _Optional)

    def allowed(self) -> tuple[str, ...]:
        """The allowed values of a CHOICE (resolving ``"module:NAME"``)."""
        if isinstance(self.options, str):
            return _named(self.options)
        return self.options

    def default_text(self) -> str:
        """The default as a person reads it."""
        d = self.default
        if isinstance(d, Required):
            return f"required ({d.when})" if d.when else "required"
        if isinstance(d, Derived):
            return f"derived: {d.how}"
        if d is OPTIONAL:
            return "not set (off)"
        return json.dumps(d)


@dataclass(frozen=True)
class OpenTable:
    """A table whose entry names are data (rig parameters, rule ids, tracked outputs)."""

    path: str
    doc: str
    names: Callable[[dict[str, Any]], tuple[str, ...] | None] | None = None
    """Allowed entry names for a raw config; None (or returning None): any name."""
    what: str = "entry"


def key(path: str, kind: str, default: Any, unit: str = "", doc: str = "",
        **limits: Any) -> Key:
    """One declaration (`limits`: options, positive, minimum, maximum)."""
    return Key(path, kind, default, unit, doc, **limits)


# ----------------------------------------------------------------- open-table names
def rig_spec(raw: dict[str, Any]) -> Any:
    """The `sim_rigs.RigSpec` that ``rig.sim`` names (a built-in rig or a rig file), or None
    (no rig.sim, or one that does not resolve: the rig's own loader reports that)."""
    rig = raw.get("rig")
    sim = rig.get("sim") if isinstance(rig, dict) else None
    if not isinstance(sim, str):
        return None
    rigfile = importlib.import_module("sim_rigs.rigfile")
    try:
        return rigfile.resolve_rig(sim)
    except rigfile.RigFileError:
        return None


def _truth_names(raw: dict[str, Any]) -> tuple[str, ...] | None:
    """The truth parameters of the simulated rig `rig.sim` names (None: not resolvable here;
    the rig's own checks run when the plant is built)."""
    spec = rig_spec(raw)
    return tuple(spec.truth_defaults) if spec is not None else None


def _sensor_names(raw: dict[str, Any]) -> tuple[str, ...] | None:
    """The named sensor settings of the simulated rig (plus delay_ticks and channels)."""
    spec = rig_spec(raw)
    if spec is None:
        return None
    return (*spec.sensor_settings, "delay_ticks", "channels")


def _named(ref: str) -> tuple[str, ...]:
    """A list of names another module owns, as ``"module:NAME"`` (late-bound like CHOICE
    options: the owner imports this module for its defaults, so no import edge back)."""
    module, _, name = ref.partition(":")
    return tuple(getattr(importlib.import_module(module), name))


def _rule_ids(raw: dict[str, Any]) -> tuple[str, ...]:
    return _named("runtime.guard.watchdog:RULE_IDS")


# ----------------------------------------------------------------- the declarations
_STATE = "state units"
_PROJ = "when adaptation.projection = true"

KEYS: tuple[Key, ...] = (
    # [rig] -- the plant's nominal model and how to reach it
    key("rig", TABLE, REQUIRED, doc="the rig: a simulated one by name, or A, B, C"),
    key("rig.name", TEXT, Derived("rig.sim, else \"rig\""), doc="rig name (log files, topics)"),
    key("rig.sim", TEXT, OPTIONAL,
        doc="a built-in simulated rig (sim_rigs/rigs) or a rig file, relative to the config"),
    key("rig.link", TEXT, "sim", doc="sim, serial:PATH[@BAUD] or mqtt://HOST:PORT/RIG"),
    key("rig.A", MATRIX, Required("without rig.sim"), doc="nominal state matrix (n x n)"),
    key("rig.B", MATRIX, Required("without rig.sim"), doc="nominal input matrix (n x m)"),
    key("rig.C", MATRIX, Required("without rig.sim"), doc="tracked outputs (m x n)"),
    key("rig.states", NAMES, Derived("rig.sim, else x0, x1, ..."), doc="state names"),
    key("rig.state_units", NAMES, Derived("rig.sim, else \"1\""), doc="state units"),
    key("rig.inputs", NAMES, Derived("rig.sim, else u0, u1, ..."), doc="input names"),
    key("rig.input_units", NAMES, Derived("rig.sim, else \"1\""), doc="input units"),
    key("rig.input_limits", VECTOR, Required("without rig.sim"), "input units",
        "input saturation |u_i| <= limit", positive=True),
    key("rig.command_timeout_s", NUMBER, OPTIONAL, "s",
        "older name of link.command_timeout (both at once must agree)", positive=True),
    # [basis] -- the regressor
    key("basis", TABLE, REQUIRED, doc="the regressor sigma(x)"),
    key("basis.kind", CHOICE, "terms", doc="named terms, or terms then a radial-basis block",
        options=("terms", "rbf")),
    key("basis.terms", NAMES, Required("with kind = \"terms\"; [\"bias\"] with \"rbf\""),
        doc="named regressor terms (bias, a state, cos:x, tanh:x, x*y)"),
    key("basis.tanh_width", NUMBER, 0.05, _STATE, "width of the smooth sign in tanh: terms",
        positive=True),
    key("basis.rbf_states", NAMES, Derived("every state"), doc="states the radial grid spans"),
    key("basis.rbf_centres", MATRIX, OPTIONAL, _STATE, "explicit centres (else a grid)"),
    key("basis.rbf_per_axis", VECTOR, 5, "centres", "grid points per axis", positive=True),
    key("basis.rbf_span", VECTOR, Required("for a grid without rbf_centres"), _STATE,
        "half-width of the grid around rbf_centre", positive=True),
    key("basis.rbf_centre", VECTOR, 0.0, _STATE, "centre of the grid"),
    key("basis.rbf_width", VECTOR, Derived("the grid spacing"), _STATE, "Gaussian widths",
        positive=True),
    key("basis.rbf_min_activation", NUMBER, 0.3, "1",
        "coverage check: least peak activation over the envelope", positive=True, maximum=1.0),
    # [design] -- gains and the bound
    key("design", TABLE, REQUIRED, doc="LQR, Lyapunov and limit settings"),
    key("design.Q", WEIGHT, REQUIRED, doc="LQR state weight (scalar, diagonal or matrix)"),
    key("design.R_u", WEIGHT, 1.0, doc="LQR input weight"),
    key("design.R", WEIGHT, 1.0, doc="Lyapunov weight: A_r' P + P A_r + R = 0"),
    key("design.limits", VECTOR, REQUIRED, _STATE, "per-state deviation limits |e_i|",
        positive=True),
    key("design.state_range", VECTOR, Derived("the rig's state limits; required without a rig"),
        _STATE,
        "operating range |x_i| for the regressor bound", positive=True),
    # [adaptation] -- the law
    key("adaptation", TABLE, REQUIRED, doc="the adaptive law"),
    key("adaptation.law", CHOICE, "barrier", doc="barrier-modified or standard MRAC",
        options=("barrier", "standard")),
    key("adaptation.barrier", CHOICE, "rational", doc="barrier family",
        options="runtime.method.barrier:BARRIERS"),
    key("adaptation.gamma", VECTOR, REQUIRED, "1/s", "adaptation gain, one or per regressor",
        positive=True),
    key("adaptation.eps", EPS, "from_limits", "||e||_P",
        "error bound; from_limits: the largest that fits design.limits"),
    key("adaptation.clamp_margin", NUMBER, 0.02, "1",
        "phi_d is never evaluated beyond (1 - margin) eps", minimum=1e-6, maximum=0.5),
    key("adaptation.unknown_effectiveness", FLAG, False,
        doc="augment the regressor with the nominal input"),
    key("adaptation.step_gain_cap", NUMBER, 1.0, "1", "cap on the per-step adaptation gain",
        positive=True),
    key("adaptation.input_regressor_scale", CHECKED, "u_max", "input units",
        "divides the nominal input in the augmented regressor: u_max, none or numbers"),
    key("adaptation.leakage", CHOICE, "none", doc="leakage modification",
        options="runtime.method.modifiers:LEAKAGES"),
    key("adaptation.sigma0", NUMBER, Required("with leakage = \"sigma\""), "1/s",
        "sigma-modification rate", positive=True),
    key("adaptation.mu", NUMBER, Required("with leakage = \"e\""), "1",
        "e-modification gain", positive=True),
    key("adaptation.dead_zone", NUMBER, 0.0, "||e||_P", "no adaptation below this error",
        minimum=0.0),
    key("adaptation.projection", FLAG, False, doc="keep each weight column inside theta_max"),
    key("adaptation.theta_max", VECTOR, Required(_PROJ), "input units",
        "projection radius per input column", positive=True),
    key("adaptation.projection_eps", NUMBER, 0.1, "1", "projection boundary-layer width",
        positive=True),
    key("adaptation.d_max", NUMBER, 0.0, "input units",
        "assumed bound on what the basis leaves unexplained", minimum=0.0),
    key("adaptation.bound", TABLE, OPTIONAL, doc="a time-varying bound eps(t) (else constant)"),
    key("adaptation.bound.kind", CHOICE, "constant", doc="shape of eps(t)",
        options="runtime.method.bound:KINDS"),
    key("adaptation.bound.on_violation", CHOICE, "refuse",
        doc="a schedule narrowing faster than c_bar/2: refuse or slow it",
        options="runtime.method.bound:ON_VIOLATION"),
    key("adaptation.bound.eps0", NUMBER, Derived("adaptation.eps"), "||e||_P",
        "bound at t = 0", positive=True),
    key("adaptation.bound.eps_inf", NUMBER, Required("exponential, widen_on_command"),
        "||e||_P", "bound it narrows to", positive=True),
    key("adaptation.bound.alpha", NUMBER, Required("exponential, widen_on_command"), "1/s",
        "narrowing rate", positive=True),
    key("adaptation.bound.times", VECTOR, Required("piecewise"), "s", "breakpoints from 0"),
    key("adaptation.bound.values", VECTOR, Required("piecewise"), "||e||_P",
        "bound at each breakpoint", positive=True),
    key("adaptation.bound.change", NUMBER, Required("widen_on_command"), "command units",
        "command change that widens the bound", positive=True),
    key("adaptation.bound.widen_time", NUMBER, 0.1, "s", "how long a widening lasts",
        positive=True),
    # [loop]
    key("loop", TABLE, REQUIRED, doc="the sampled loop"),
    key("loop.period", NUMBER, REQUIRED, "s", "tick period Ts", positive=True, maximum=1.0),
    key("loop.law", CHOICE, "fast", doc="compiled law or the numpy reference",
        options=("fast", "reference")),
    key("loop.spin_us", NUMBER, 200.0, "us", "host clock: most busy-wait before a deadline",
        minimum=0.0),
    key("loop.realtime", FLAG, True, doc="ask for SCHED_FIFO when allowed"),
    key("loop.miss_after_periods", NUMBER, 1.0, "periods",
        "rig-clocked: a sample this late is a deadline miss", positive=True),
    key("loop.switch_interval_us", NUMBER, 100.0, "us", "interpreter thread switch interval",
        positive=True),
    key("loop.cpu", VECTOR, OPTIONAL, "CPU number", "pin the runtime's threads to these CPUs"),
    key("loop.lock_memory", FLAG, True, doc="mlockall the runtime's memory when allowed"),
    key("loop.hostcheck_s", NUMBER, 3.0, "s",
        "host timing check before arming a real rig (0 skips it)", minimum=0.0),
    # [commands]
    key("commands", TABLE, OPTIONAL, doc="command profiles, one list per tracked output"),
    key("commands.duration", NUMBER, 30.0, "s", "run length", positive=True),
    key("commands.initial", VECTOR, 0.0, "output units", "command before the first segment"),
    key("commands.*", SEGMENTS, OPTIONAL, "output units",
        "segments {at, kind = step|slew|sine|hold, ...} for this tracked output"),
    # [plant] -- the simulated plant
    key("plant", TABLE, OPTIONAL, doc="the simulated plant's truth, spreads and sensors"),
    key("plant.truth", TABLE, OPTIONAL, doc="true parameters (the rig's defaults otherwise)"),
    key("plant.truth.*", NUMBER, Derived("the rig's default"), "see the rig",
        "true value of this parameter"),
    key("plant.ranges", TABLE, OPTIONAL, doc="sweep spreads; unlisted parameters stay at truth"),
    key("plant.ranges.*", PAIR, OPTIONAL, "see the rig", "[lo, hi] drawn uniformly"),
    key("plant.sensors", TABLE, OPTIONAL, doc="overrides of the rig's named sensor settings"),
    key("plant.sensors.*", NUMBER, Derived("the rig's sensor setting"), "see the rig",
        "a sensor setting of the rig (resolution, noise; delay_ticks in ticks)", minimum=0.0),
    key("plant.sensors.channels", CHECKED, OPTIONAL, "see the rig",
        "per measured state: resolution and noise (a number or a sensor setting's name)"),
    key("plant.params", TABLE, OPTIONAL,
        doc="inline rig: named parameters (as a rig file's [params])"),
    key("plant.params.*", CHECKED, OPTIONAL, "see the entry",
        "a parameter: value, unit, optional range [lo, hi]"),
    key("plant.terms", TABLES, OPTIONAL,
        doc="inline rig: matched terms (as a rig file's [[term]])"),
    key("plant.effectiveness", NAMES, OPTIONAL,
        doc="inline rig: the effectiveness parameter of each input"),
    key("plant.x0", VECTOR, 0.0, _STATE, "initial state"),
    key("plant.seed", INTEGER, 0, doc="noise seed", minimum=0),
    key("plant.substeps", INTEGER, 4, doc="RK4 substeps per tick", minimum=1, maximum=100),
    # [log]
    key("log", TABLE, OPTIONAL, doc="where records go"),
    key("log.dir", TEXT, "runs", doc="folder for run logs, trip logs and sockets"),
    key("log.pre_capture_s", NUMBER, 1.0, "s", "trip capture before the trip", minimum=0.0),
    key("log.post_capture_s", NUMBER, 1.0, "s", "trip capture after the trip", minimum=0.0),
    key("log.events_per_s", NUMBER, 20.0, "1/s",
        "operator events written per second at most; the excess is counted", minimum=1.0),
    # [operator] -- who may use the operator socket, and how fast
    key("operator", TABLE, OPTIONAL, doc="the operator socket's access and rate limit"),
    key("operator.socket_group", CHECKED, OPTIONAL,
        doc="a group (name or gid) given read/write on the socket (0660); else 0600"),
    key("operator.allowed_uids", CHECKED, OPTIONAL,
        doc="peer uids accepted (SO_PEERCRED); default this process's uid and root"),
    key("operator.request_rate_hz", NUMBER, 20.0, "Hz", "requests per second per runtime",
        positive=True),
    key("operator.request_burst", NUMBER, 20.0, "requests", "burst allowance", minimum=1.0),
    # [watchdog]
    key("watchdog", TABLE, OPTIONAL, doc="rule thresholds (runtime/guard/watchdog.py)"),
    key("watchdog.margin_warning", NUMBER, 0.8, "||e||_P/eps", "warning level", positive=True),
    key("watchdog.margin_trip", NUMBER, 0.9, "||e||_P/eps", "margin trip level",
        positive=True, maximum=1.0),
    key("watchdog.predicted_horizon_s", NUMBER, 0.01, "s", "look-ahead of predicted_crossing",
        minimum=0.0),
    key("watchdog.stale_periods", NUMBER, 3, "periods", "sample age that trips stale",
        positive=True),
    key("watchdog.seq_gap_max", NUMBER, 0, "samples", "missed samples tolerated", minimum=0.0),
    key("watchdog.link_timeout_s", NUMBER, 0.1, "s", "silence that trips link_loss",
        positive=True),
    key("watchdog.saturation_s", NUMBER, 0.5, "s", "time at the input limit that trips",
        positive=True),
    key("watchdog.overrun_misses", NUMBER, 25, "misses", "deadline misses in the window",
        minimum=1.0),
    key("watchdog.overrun_window", INTEGER, 1000, "ticks", "overrun counting window",
        minimum=1),
    key("watchdog.weight_norm_max", NUMBER, 100.0, "1", "||W||_F that trips", positive=True),
    key("watchdog.weight_rate_max", NUMBER, 1000.0, "1/s", "||dW/dt||_F that trips",
        positive=True),
    key("watchdog.jump_limit", VECTOR, Derived("half of design.limits"), _STATE,
        "innovation per state that trips jump", positive=True),
    key("watchdog.rules", TABLE, OPTIONAL, doc="per-rule settings [watchdog.rules.<id>]"),
    key("watchdog.rules.*", TABLE, OPTIONAL, doc="settings of one rule"),
    key("watchdog.rules.*.reaction", CHOICE, Derived("the rule's DEFAULT_REACTIONS"),
        doc="what a trip does", options="runtime.guard.watchdog:REACTIONS"),
    key("watchdog.rules.*.on_delay_s", NUMBER, Derived("the rule's own (0)"), "s",
        "time over the threshold before it trips", minimum=0.0),
    key("watchdog.rules.*.deadband", NUMBER, Derived("the rule's own"), "signal units",
        "how far below the threshold it clears", minimum=0.0),
    key("watchdog.rules.*.enabled", FLAG, True, doc="false: the rule never trips"),
    # [supervisor]
    key("supervisor", TABLE, OPTIONAL, doc="modes and operator requests"),
    key("supervisor.settle_time", NUMBER, 0.5, "s", "rates settled this long before engaging",
        minimum=0.0),
    key("supervisor.settle_rate_tol", NUMBER, 0.05, "rate units", "settled: rates below",
        positive=True),
    key("supervisor.disarm_action", CHOICE, "controlled_stop", doc="what disarm does",
        options=("baseline", "controlled_stop", "outputs_off")),
    key("supervisor.stop_action", CHOICE, "outputs_off", doc="what stop does",
        options=("controlled_stop", "outputs_off")),
    key("supervisor.engage_slew", NUMBER, 0.1, "output units/s",
        "how fast the command offset fades after engaging", positive=True),
    # [fallback]
    key("fallback", TABLE, OPTIONAL, doc="baseline and controlled stop"),
    key("fallback.rate_limit", NUMBER, 200.0, "input units/s", "baseline input slew",
        positive=True),
    key("fallback.park_rate", NUMBER, 0.5, "output units/s", "controlled stop: park slew",
        positive=True),
    key("fallback.park_tolerance", NUMBER, 0.01, "output units", "parked when within",
        positive=True),
    key("fallback.stop_timeout_s", NUMBER, 10.0, "s", "controlled stop gives up after",
        positive=True),
    key("fallback.park", VECTOR, 0.0, "output units", "park pose of the tracked outputs"),
    # [telemetry]
    key("telemetry", TABLE, OPTIONAL, doc="the operator socket and MQTT telemetry"),
    key("telemetry.rate_hz", NUMBER, 25.0, "Hz", "telemetry rate", positive=True),
    key("telemetry.client_buffer", INTEGER, 256 * 1024, "bytes",
        "per-client socket buffer before a slow client is dropped", positive=True),
    key("telemetry.mqtt_rate_hz", NUMBER, 10.0, "Hz", "MQTT telemetry rate", positive=True),
    key("telemetry.mqtt", TEXT, OPTIONAL, doc="HOST:PORT of a broker for telemetry"),
    # [link]
    key("link", TABLE, OPTIONAL, doc="link settings"),
    key("link.command_timeout", NUMBER, 0.05, "s",
        "the device holds a command this long before going safe", positive=True),
    key("link.mqtt", TABLE, OPTIONAL, doc="broker login and topics (docs/mqtt.md)"),
    key("link.mqtt.host", TEXT, Derived("the URL, else 127.0.0.1"), doc="broker host"),
    key("link.mqtt.port", INTEGER, Derived("the URL, else 1883 (8883 with tls)"),
        doc="broker port", minimum=1, maximum=65535),
    key("link.mqtt.rig", TEXT, Derived("the URL or rig.name"), doc="topic rig level"),
    key("link.mqtt.prefix", TEXT, "corral", doc="first topic level"),
    key("link.mqtt.tls", FLAG, False, doc="TLS to the broker"),
    key("link.mqtt.ca_file", TEXT, OPTIONAL, doc="CA bundle (PEM); else the system store"),
    key("link.mqtt.cert_file", TEXT, OPTIONAL,
        doc="client certificate (PEM) for brokers that require one"),
    key("link.mqtt.key_file", TEXT, OPTIONAL, doc="the client certificate's private key (PEM)"),
    key("link.mqtt.username", TEXT, OPTIONAL, doc="broker user"),
    key("link.mqtt.password_env", TEXT, OPTIONAL,
        doc="environment variable holding the password (never the password itself)"),
    key("link.mqtt.password", TEXT, OPTIONAL,
        doc="refused: passwords do not go in a config (use password_env)"),
    key("link.mqtt.keepalive_s", INTEGER, 5, "s", "MQTT keep-alive", minimum=1),
    key("link.mqtt.connect_timeout_s", NUMBER, 5.0, "s", "connect timeout", positive=True),
    key("link.mqtt.sample_expiry_s", INTEGER, 1, "s", "MQTT 5 message expiry", minimum=1),
    key("link.mqtt.max_sample_age_s", NUMBER, 0.5, "s", "older samples are dropped",
        positive=True),
    key("link.mqtt.remote_requests", NAMES, [], doc="operator requests accepted from the broker"),
    # [estimator]
    key("estimator", TABLE, OPTIONAL, doc="state from measurements"),
    key("estimator.cutoff_hz", NUMBER, 50.0, "Hz", "differentiator filter cut-off",
        positive=True),
    # [sweep]
    key("sweep", TABLE, OPTIONAL, doc="Monte Carlo over plant.ranges"),
    key("sweep.plants", INTEGER, 1000, "plants", "how many plants", minimum=1),
    key("sweep.seed", INTEGER, Derived("plant.seed"), doc="draw seed", minimum=0),
    key("sweep.workers", INTEGER, Derived("the CPU count"), doc="worker processes", minimum=1),
    key("sweep.chunk", INTEGER, 8000, "plants", "plants per work item", minimum=1),
    key("sweep.engine", CHOICE, "auto", doc="sweep engine",
        options="runtime.offline.sweep:ENGINES"),
    key("sweep.latency_ticks", INTEGER, 0, "ticks", "input delay in the sweep's plants",
        minimum=0, maximum=1000),
    key("sweep.noise", FLAG, True, doc="sensor noise in the sweep's plants"),
    key("sweep.substeps", INTEGER, Derived("enough for RK4 steps <= 1 ms"),
        doc="RK4 substeps per tick", minimum=1, maximum=100),
    key("sweep.weight_norm_limit", NUMBER, Derived("watchdog.weight_norm_max"), "1",
        "||W||_F beyond which a dry run or a sweep calls the weights diverged", positive=True),
    key("sweep.divergence_factor", NUMBER, 10.0, "1",
        "a plant beyond this times design.state_range counts as diverged", minimum=1.0),
    # [preflight]
    key("preflight", TABLE, OPTIONAL, doc="the go / no-go sweep"),
    key("preflight.plants", INTEGER, 200, "plants", "plants `corral preflight` samples",
        minimum=1),
    key("preflight.run_plants", INTEGER, 50, "plants",
        "plants the pre-arm check of `corral run` samples", minimum=1),
    key("preflight.max_trip_rate", NUMBER, 0.05, "1", "NO-GO above this trip fraction",
        minimum=0.0, maximum=1.0),
    key("preflight.duration", NUMBER, Derived("commands.duration"), "s", "per-plant run length",
        positive=True),
    # [[faults]]
    key("faults", TABLES, [], doc="injected faults {kind, at, ...} (simulated rig only)"),
)

OPEN_TABLES: tuple[OpenTable, ...] = (
    OpenTable("plant.truth", "parameters of the simulated rig", _truth_names, "parameter"),
    OpenTable("plant.ranges", "parameters of the simulated rig", _truth_names, "parameter"),
    OpenTable("plant.params", "inline rig parameters (any name)", None, "parameter"),
    OpenTable("plant.sensors", "sensor settings of the simulated rig", _sensor_names, "setting"),
    OpenTable("watchdog.rules", "watchdog rule ids", _rule_ids, "rule"),
    OpenTable("commands", "tracked outputs (checked against the rig by the design)", None,
              "tracked output"),
)

KEY_ALIASES = {"watchdog.saturation_time": "watchdog.saturation_s"}
"""Other names a key is accepted under (old or brief spellings) -> the name every module reads."""

_BY_PATH = {k.path: k for k in KEYS}
_OPEN = {t.path: t for t in OPEN_TABLES}


# ----------------------------------------------------------------- look-ups
def pattern_of(path: str) -> str:
    """The declared path for a concrete dotted key (open-table entries become ``*``)."""
    parts = path.split(".")
    out: list[str] = []
    for part in parts:
        prefix = ".".join(out)
        fixed = f"{prefix}.{part}" if prefix else part
        out.append("*" if prefix in _OPEN and fixed not in _BY_PATH else part)
    return ".".join(out)


def spec_for(path: str) -> Key | None:
    """The declaration of a concrete dotted key, or None when it is not declared."""
    return _BY_PATH.get(pattern_of(path))


def open_table(path: str) -> OpenTable | None:
    """The open table at a declared path (``*`` form or concrete), or None."""
    return _OPEN.get(pattern_of(path))


def children(path: str) -> list[str]:
    """Declared leaf names directly under a declared table (``""``: the sections)."""
    pat = pattern_of(path) if path else ""
    depth = pat.count(".") + 1 if pat else 0
    out = []
    for k in KEYS:
        parts = k.path.split(".")
        if len(parts) == depth + 1 and (not pat or k.path.startswith(pat + ".")):
            if parts[-1] != "*":
                out.append(parts[-1])
    return out


def section_names() -> tuple[str, ...]:
    """The top-level tables corral knows."""
    return tuple(k.path for k in KEYS if "." not in k.path)


def iter_keys() -> Iterator[Key]:
    """Every declaration, in declaration order."""
    return iter(KEYS)


def defaults_of(table: str) -> dict[str, Any]:
    """The plain-value defaults of the keys directly under `table` (leaf name -> default)."""
    depth = table.count(".") + 1
    return {k.path.split(".")[-1]: k.default for k in KEYS
            if k.path.startswith(table + ".") and k.path.count(".") == depth
            and k.has_value_default and k.kind != TABLE}


def default_of(path: str) -> Any:
    """The plain-value default of one declared key (KeyError when it has none)."""
    spec = spec_for(path)
    if spec is None or not spec.has_value_default:
        raise KeyError(path)
    return spec.default
