"""The declared config schema (runtime/schema.py): unknown keys refused with a did-you-mean,
every shipped config loads, every key the code reads is declared, `corral config` shows
the resolved config, and an explicit eps whose envelope passes the limits is refused.

Outside references: the suggestions are what Python's difflib.get_close_matches (the
standard library's ratio matcher) ranks closest; the shipped configs' values are compared
with what tomllib (TOML v1.0.0, the standard library's parser) reads from the same files;
the eps envelope is recomputed with python-control's LQR and scipy's Lyapunov solver.
Refusing unknown keys rather than ignoring them is common practice for configuration
loaders.
"""

from __future__ import annotations

import ast
import difflib
import fnmatch
import json
import tomllib
from pathlib import Path

import control
import numpy as np
import pytest
import scipy.linalg as sla

from runtime import schema
from runtime.config import Config, ConfigError, UndeclaredKey, load_config, resolved

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "pedestal-sim.toml"
SHIPPED = sorted((ROOT / "configs").glob("*.toml"))


def _refused(tmp_path: Path, text: str, overrides: tuple[str, ...] = ()) -> ConfigError:
    path = tmp_path / "c.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as err:
        load_config(path, overrides)
    return err.value


# ---------------------------------------------------------------- typos in the file
FILE_TYPOS = [
    # (replace this, with this, field named, suggestion)
    ("[adaptation]", "[adaptaton]", "adaptaton", "[adaptation]"),
    ("gamma = 8.0", "gama = 8.0", "adaptation.gama", "adaptation.gamma"),
    ("tanh_width = 0.02", "tanh_widht = 0.02", "basis.tanh_widht", "basis.tanh_width"),
    ("clamp_margin = 0.02", "clamp_margn = 0.02", "adaptation.clamp_margn",
     "adaptation.clamp_margin"),
    ("angle_noise = 2e-5", "angle_nosie = 2e-5", "plant.sensors.angle_nosie",
     "plant.sensors.angle_noise"),
    ("visc_az = [0.4, 1.2]", "visc_ax = [0.4, 1.2]", "plant.ranges.visc_ax",
     "plant.ranges.visc_az"),
    ("truth = { gravity_el", "truth = { gravty_el", "plant.truth.gravty_el",
     "plant.truth.gravity_el"),
]


@pytest.mark.parametrize(("old", "new", "field", "right"), FILE_TYPOS,
                         ids=[t[2] for t in FILE_TYPOS])
def test_a_typo_in_the_file_is_refused_with_the_right_suggestion(tmp_path, old, new, field,
                                                                 right):
    text = DEMO.read_text()
    assert old in text
    err = _refused(tmp_path, text.replace(old, new, 1))
    assert err.field == field
    assert f"did you mean {right}?" in str(err)
    # The suggestion is the one difflib ranks closest among the names allowed there.
    leaf, right_leaf = field.rpartition(".")[2], right.strip("[]").rpartition(".")[2]
    assert difflib.get_close_matches(leaf, [right_leaf, "zzzz"], n=1) == [right_leaf]


@pytest.mark.parametrize(("table", "body", "field", "right"), [
    ("[watchdog]", "margin_trp = 0.85", "watchdog.margin_trp", "watchdog.margin_trip"),
    ("[watchdog.rules.margn]", 'reaction = "baseline"', "watchdog.rules.margn",
     "watchdog.rules.margin"),
    ("[watchdog.rules.margin]", 'reacton = "baseline"', "watchdog.rules.margin.reacton",
     "watchdog.rules.margin.reaction"),
    ("[link.mqtt]", 'hots = "127.0.0.1"', "link.mqtt.hots", "link.mqtt.host"),
    ("[adaptation.bound]", 'kind = "exponential"\neps_inff = 0.04', "adaptation.bound.eps_inff",
     "adaptation.bound.eps_inf"),
])
def test_typos_in_added_tables_at_every_depth(tmp_path, table, body, field, right):
    err = _refused(tmp_path, DEMO.read_text() + f"\n{table}\n{body}\n")
    assert err.field == field
    assert f"did you mean {right}?" in str(err)


def test_a_misspelt_required_key_names_the_typo_not_only_the_missing_key(tmp_path):
    text = DEMO.read_text().replace("gamma = 8.0", "gama = 8.0")
    err = _refused(tmp_path, text)
    assert err.field == "adaptation.gama" and "adaptation.gamma" in err.fix
    # A table built by hand (no load-time check) still names the typo when read.
    raw = tomllib.loads(text)
    with pytest.raises(ConfigError) as missing:
        Config(raw=raw).vector("adaptation.gamma")
    assert missing.value.field == "adaptation.gamma"
    assert "adaptation.gama" in str(missing.value)


def test_an_unknown_name_with_nothing_close_lists_what_is_known(tmp_path):
    err = _refused(tmp_path, DEMO.read_text() + "\n[estimator]\nqqqqqq = 1\n")
    assert err.field == "estimator.qqqqqq" and "cutoff_hz" in err.fix


def test_a_wrong_kind_is_refused_at_load_even_if_no_command_reads_it_yet(tmp_path):
    # telemetry.rate_hz is read only by `corral run`; a design must not accept it.
    err = _refused(tmp_path, DEMO.read_text() + '\n[telemetry]\nrate_hz = "fast"\n')
    assert err.field == "telemetry.rate_hz" and "number" in err.problem
    err = _refused(tmp_path, DEMO.read_text() + "\n[sweep]\nplants = 2.5\n")
    assert err.field == "sweep.plants" and "whole number" in err.problem


# ---------------------------------------------------------------- typos in --set
@pytest.mark.parametrize(("item", "field", "right"), [
    ("adaptation.gama=4", "adaptation.gama", "adaptation.gamma"),
    ("adaptaton.gamma=4", "adaptaton.gamma", "[adaptation]"),
    ("plant.sensors.rate_nosie=0.01", "plant.sensors.rate_nosie", "plant.sensors.rate_noise"),
    ("watchdog.rules.stale.on_delay=0.1", "watchdog.rules.stale.on_delay",
     "watchdog.rules.stale.on_delay_s"),
    ("plant.truth.coulomb_ax=0.5", "plant.truth.coulomb_ax", "plant.truth.coulomb_az"),
])
def test_a_typo_in_set_is_refused_with_the_right_suggestion(item, field, right):
    with pytest.raises(ConfigError) as err:
        load_config(DEMO, [item])
    assert err.value.field == field
    assert f"did you mean {right}?" in str(err.value)


def test_set_typo_through_the_cli_exits_2_with_one_line(corral):
    res = corral("design", DEMO, "--set", "adaptation.gama=4")
    assert res.code == 2 and "Traceback" not in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1
    assert "'adaptation.gama'" in res.stderr and "did you mean adaptation.gamma?" in res.stderr
    assert res.stdout == ""  # nothing ran with the default gamma


def test_a_declared_key_the_file_leaves_out_may_be_set():
    cfg = load_config(DEMO, ["watchdog.margin_trip=0.85", "adaptation.leakage=sigma",
                             "adaptation.sigma0=0.1"])
    assert cfg.number("watchdog.margin_trip") == 0.85
    assert cfg.source("watchdog.margin_trip") == "--set"


# ---------------------------------------------------------------- shipped configs
@pytest.mark.parametrize("path", SHIPPED, ids=[p.name for p in SHIPPED])
def test_every_shipped_config_loads_and_resolves_as_toml_reads_it(path):
    cfg = load_config(path)
    rows = {r["key"]: r for r in resolved(cfg)}
    ref = tomllib.loads(path.read_text())

    def leaves(node, prefix=""):
        for k, v in node.items():
            key = f"{prefix}.{k}" if prefix else k
            spec = schema.spec_for(key)
            if isinstance(v, dict) and spec is not None and spec.kind == schema.TABLE:
                yield from leaves(v, key)
            else:
                yield key, v

    given = dict(leaves(ref))
    assert given, path
    for key, value in given.items():
        assert rows[key]["source"] == "file", key
        assert rows[key]["value"] == value, key
    for key, row in rows.items():
        if key not in given:
            assert row["source"] in ("default", "derived", "unset"), key


# ---------------------------------------------------------------- the code reads only declared keys
READERS = {"get": 1, "number": 1, "flag": 1, "choice": 2, "vector": 2, "matrix": 2,
           "weight_matrix": 2, "strings": 2, "has": None}
"""Reader -> position of its `default` argument (None: takes none)."""


def _reader_calls():
    """(file, line, key pattern, has a default, the default node) of every config read."""
    for path in [*sorted((ROOT / "runtime").rglob("*.py")), *sorted((ROOT / "sim_rigs").rglob(
            "*.py"))]:
        if path.name in ("config.py", "schema.py"):
            continue
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                    and node.func.attr in READERS and node.args):
                continue
            recv = ast.unparse(node.func.value)
            if recv not in ("cfg", "self.cfg", "config"):
                continue
            first = node.args[0]
            if isinstance(first, ast.Constant) and isinstance(first.value, str):
                pattern = first.value
            elif isinstance(first, ast.JoinedStr):
                pattern = "".join(v.value if isinstance(v, ast.Constant) else "*"
                                  for v in first.values)
            else:
                continue
            pos = READERS[node.func.attr]
            default = None
            if pos is not None and len(node.args) > pos:
                default = node.args[pos]
            for kw in node.keywords:
                if kw.arg == "default":
                    default = kw.value
            yield path.relative_to(ROOT), node.lineno, pattern, default


def test_the_scan_finds_the_readers():
    calls = list(_reader_calls())
    keys = {c[2] for c in calls}
    assert len(calls) > 80
    assert {"adaptation.gamma", "watchdog.*", "plant.seed", "loop.period"} <= keys


def test_every_key_the_code_reads_is_declared():
    declared = [k.path for k in schema.KEYS]
    missing = []
    for path, line, pattern, _default in _reader_calls():
        if "*" in pattern:
            ok = any(fnmatch.fnmatchcase(d, pattern) or fnmatch.fnmatchcase(pattern, d)
                     for d in declared)
        else:
            ok = schema.spec_for(pattern) is not None
        if not ok:
            missing.append(f"{path}:{line} {pattern}")
    assert not missing, missing


def test_call_sites_carry_no_default_the_schema_holds():
    # A default at a call site is only for a key whose default is derived from other
    # settings (or a table / an optional key read as "absent"); a plain default lives in
    # the schema alone, so two call sites can no longer disagree (preflight.plants had 50
    # in the run and 200 in `corral preflight`).
    offenders = []
    for path, line, pattern, default in _reader_calls():
        if default is None or "*" in pattern:
            continue
        if isinstance(default, ast.Constant) and default.value is None:
            continue
        spec = schema.spec_for(pattern)
        if spec is not None and spec.has_value_default and spec.kind != schema.TABLE:
            offenders.append(f"{path}:{line} {pattern} = {ast.unparse(default)}")
    assert not offenders, offenders


def test_a_recording_reader_sees_only_declared_keys_on_the_design_and_plant_paths():
    from runtime.guard.fallback import settings_from_config
    from runtime.guard.watchdog import Watchdog
    from runtime.method.design import design_from_config
    from runtime.method.modifiers import modifiers_from_config
    from runtime.offline.dryrun import plant_from_config
    from runtime.offline.sweep import SweepSettings

    seen: list[str] = []

    class Recording(Config):
        def get(self, key, default=Config.get.__defaults__[0]):  # type: ignore[index]
            seen.append(key)
            return super().get(key, default)

    for path in SHIPPED:
        base = load_config(path)
        cfg = Recording(raw=base.raw, path=base.path)
        d = design_from_config(cfg)
        modifiers_from_config(cfg, d)
        plant_from_config(cfg, d)
        SweepSettings.from_config(cfg)
        Watchdog.from_config(cfg, d.Ts, d.clamp_margin)
        settings_from_config(cfg, d.rig.m)
    assert len(set(seen)) > 40
    assert [k for k in set(seen) if schema.spec_for(k) is None] == []


def test_an_undeclared_key_read_is_a_programming_error():
    with pytest.raises(UndeclaredKey):
        load_config(DEMO).number("adaptation.not_declared_anywhere")


def test_the_mqtt_table_keys_match_the_driver():
    from drivers.mqtt_link import TABLE_KEYS

    assert set(schema.children("link.mqtt")) == set(TABLE_KEYS)


def test_defaults_satisfy_their_own_ranges():
    cfg = Config(raw={})
    for spec in schema.KEYS:
        if spec.has_value_default and spec.kind in (schema.NUMBER, schema.INTEGER):
            cfg.number(spec.path)  # raises if the declared default breaks the declared range
        if spec.kind == schema.CHOICE and spec.has_value_default:
            assert spec.default in spec.allowed(), spec.path


# ---------------------------------------------------------------- corral config
def test_corral_config_marks_defaults_units_and_overrides(corral):
    res = corral("config", DEMO, "--set", "adaptation.gamma=4", "--json")
    assert res.code == 0, res.stderr
    out = json.loads(res.stdout)
    rows = {r["key"]: r for r in out["keys"]}
    assert rows["basis.kind"] == {**rows["basis.kind"], "value": "terms", "source": "default"}
    assert rows["basis.tanh_width"]["source"] == "file"
    assert rows["basis.tanh_width"]["unit"] == "state units"
    assert rows["basis.tanh_width"]["value"] == 0.02
    assert rows["adaptation.gamma"]["source"] == "--set" and rows["adaptation.gamma"]["value"] == 4
    assert rows["watchdog.saturation_s"] == {**rows["watchdog.saturation_s"], "value": 0.5,
                                             "unit": "s", "source": "default"}
    assert rows["watchdog.jump_limit"]["source"] == "derived"
    # Truth parameters the file leaves out show the rig's default with the rig's unit.
    assert rows["plant.truth.stribeck_speed"]["source"] == "default"
    assert rows["plant.truth.stribeck_speed"]["unit"] == "rad/s"
    text = corral("config", DEMO, "--set", "adaptation.gamma=4")
    assert text.code == 0
    lines = {ln.split("=")[0].strip(): ln for ln in text.stdout.splitlines() if "=" in ln}
    assert lines["kind"].endswith("(default)") and '"terms"' in lines["kind"]
    assert "(--set)" in lines["gamma"] and "1/s" in lines["gamma"]
    assert "state units" in lines["tanh_width"] and "(default)" not in lines["tanh_width"]


def test_corral_config_refuses_a_typo_like_every_command(corral):
    res = corral("config", DEMO, "--set", "watchdog.margin_trp=0.8")
    assert res.code == 2 and "did you mean watchdog.margin_trip?" in res.stderr


# ---------------------------------------------------------------- the eps refusal
def test_an_explicit_eps_beyond_the_limits_is_refused_with_the_binding_state(corral):
    from sim_rigs import RIGS

    raw = tomllib.loads(DEMO.read_text())
    A, B, _C = RIGS["pedestal"].nominal_model()
    K, _S, _E = control.lqr(A, B, np.diag(raw["design"]["Q"]), np.diag(raw["design"]["R_u"]))
    A_r = A - B @ np.asarray(K)
    P = sla.solve_continuous_lyapunov(A_r.T, -np.diag(raw["design"]["R"]))
    limits = np.asarray(raw["design"]["limits"])
    env = 5.0 * np.sqrt(np.diag(np.linalg.inv(P)))
    worst = int(np.argmax(env / limits))
    res = corral("design", DEMO, "--set", "adaptation.eps=5")
    assert res.code == 2 and "Traceback" not in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1
    msg = res.stderr
    assert "'adaptation.eps'" in msg
    assert RIGS["pedestal"].states[worst] in msg
    assert f"+-{env[worst]:.3g}" in msg and f"{limits[worst]:.3g}" in msg
    assert "lower adaptation.eps" in msg and "design.limits" in msg
    # Within the limits an explicit eps is accepted (the from-limits value itself).
    eps_lim = float(np.min(limits / np.sqrt(np.diag(np.linalg.inv(P)))))
    ok = corral("design", DEMO, "--set", f"adaptation.eps={0.9 * eps_lim:.6g}", "--json")
    assert ok.code == 0, ok.stderr
    assert json.loads(ok.stdout)["eps"] == pytest.approx(0.9 * eps_lim, rel=1e-5)
