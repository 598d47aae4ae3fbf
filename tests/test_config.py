"""Config loading and the errors a user can hit (runtime.config), checked through the CLI.

Every user error must come out as one line on stderr that names the field,
with exit status 2 and no traceback (house rules). The in-process checks
pin the override syntax to TOML's value grammar (TOML v1.0.0).
"""

from __future__ import annotations

import numpy as np
import pytest

from runtime.config import Config, ConfigError, load_config, parse_value

UNCONTROLLABLE = [
    # A = diag(1, 2), B = [1; 0]: the second (unstable) mode is unreachable from the input
    # (Kalman rank test: [B, AB] = [[1, 1], [0, 0]] has rank 1).
    "--set", "rig.A=[[1.0, 0.0], [0.0, 2.0]]",
    "--set", "rig.B=[[1.0], [0.0]]",
]

# (overrides, field the message must name, words the message must contain)
CASES = {
    "wrong diagonal length": (["--set", "design.Q=[1.0, 2.0, 3.0]"], "design.Q",
                              ["expected 2"]),
    "wrong matrix shape": (["--set", "rig.B=[[0.0], [1.0], [2.0]]"], "rig.B",
                           ["3 rows", "expected 2", "shape"]),
    "uncontrollable pair": (UNCONTROLLABLE, "rig.B", ["not controllable"]),
    "eps not positive": (["--set", "adaptation.eps=-1"], "adaptation.eps", ["positive"]),
    "unknown basis term": (["--set", 'basis.terms=["bias", "spin"]'], "basis.terms",
                           ["spin"]),
    "unknown law": (["--set", "adaptation.law=fancy"], "adaptation.law",
                    ["fancy", "barrier", "standard"]),
    "unknown barrier": (["--set", "adaptation.barrier=cubic"], "adaptation.barrier",
                        ["cubic", "rational"]),
    "gamma not a number": (["--set", "adaptation.gamma=fast"], "adaptation.gamma",
                           ["fast"]),
    "override without '='": (["--set", "adaptation.gamma"], "adaptation.gamma",
                             ["key=value"]),
    "period not positive": (["--set", "loop.period=0"], "loop.period", ["positive"]),
}


def assert_one_line_error(res, field: str, words: list[str]) -> None:
    assert res.code == 2, (res.code, res.stdout, res.stderr)
    assert "Traceback" not in res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert f"'{field}'" in lines[0] or field in lines[0]
    for word in words:
        assert word in lines[0], (word, lines[0])


@pytest.mark.parametrize("case", sorted(CASES))
def test_config_error_is_one_line_naming_the_field(corral, small_rig_toml, case):
    overrides, field, words = CASES[case]
    res = corral("design", small_rig_toml, *overrides)
    assert_one_line_error(res, field, words)
    assert res.stdout == ""


@pytest.mark.parametrize(
    ("override", "field", "words"),
    [("adaptation..gamma=3", "adaptation..gamma", ["empty"]),
     ("adaptaton.gamma=3", "adaptaton", ["did you mean [adaptation]"])],
)
def test_refused_override_key_is_one_line(corral, small_rig_toml, override, field, words):
    res = corral("design", small_rig_toml, "--set", override)
    assert_one_line_error(res, field, words)


def test_misspelt_section_in_the_file_is_named(corral, small_rig_toml, tmp_path):
    bad = tmp_path / "misspelt.toml"
    bad.write_text(small_rig_toml.read_text().replace("[loop]", "[lop]"))
    res = corral("design", bad)
    assert_one_line_error(res, "lop", ["did you mean [loop]"])


def test_missing_config_file_is_named(corral, tmp_path):
    missing = tmp_path / "nowhere" / "rig.toml"
    res = corral("design", missing)
    assert_one_line_error(res, str(missing), ["no such config file"])


def test_invalid_toml_is_named_with_the_line(corral, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[rig]\nname = "x"\nA = [[0.0, 1.0], [0.0, 0.0]\n')  # unclosed array
    res = corral("design", bad)
    assert_one_line_error(res, str(bad), ["not valid TOML", "line"])


def test_dry_run_reports_config_errors_the_same_way(corral, small_rig_toml, tmp_path):
    res = corral("dry-run", small_rig_toml, "--set", "adaptation.eps=-1", "--no-plot",
                 "--out", tmp_path)
    assert_one_line_error(res, "adaptation.eps", ["positive"])


# ----------------------------------------------------------- in process
@pytest.mark.parametrize(
    ("text", "value"),
    [
        # TOML v1.0.0 value grammar: integers, floats (incl. exponent), booleans, arrays,
        # basic strings, inline tables; a bare word is kept as a string.
        ("8", 8), ("-1", -1), ("2.5e-3", 2.5e-3), ("true", True), ("[1, 2.0]", [1, 2.0]),
        ('"rational"', "rational"), ("rational", "rational"),
        ("{ at = 1.0, kind = 'step' }", {"at": 1.0, "kind": "step"}),
    ],
)
def test_override_values_follow_toml(text, value):
    got = parse_value(text)
    assert got == value and type(got) is type(value)


def test_overrides_create_nested_keys_and_leave_the_original_alone(small_rig_toml):
    cfg = load_config(small_rig_toml)
    h0 = cfg.hash()
    cfg2 = cfg.with_overrides(["adaptation.gamma=8", "watchdog.margin_trip=0.85"])
    assert cfg2.get("adaptation.gamma") == 8
    assert cfg2.get("watchdog.margin_trip") == 0.85
    assert cfg.get("adaptation.gamma") == 5.0
    assert cfg.get("watchdog.margin_trip", None) is None
    assert cfg2.hash() != h0
    assert load_config(small_rig_toml).hash() == h0  # stable across loads
    assert cfg2.overrides == ["adaptation.gamma=8", "watchdog.margin_trip=0.85"]


def test_override_into_a_value_is_refused(small_rig_toml):
    with pytest.raises(ConfigError) as info:
        load_config(small_rig_toml, ["loop.period.x=1"])
    assert info.value.field == "loop.period.x"
    assert "not a table" in str(info.value)


def test_typed_readers_name_the_field():
    cfg = Config(raw={"a": {"v": [1.0, 2.0], "s": 3.0, "w": [[1.0, 2.0], [0.0, 1.0]],
                            "q": [[1.0, 0.0], [0.0, -1.0]], "flag": "yes"}})
    assert cfg.vector("a.s", 3).tolist() == [3.0, 3.0, 3.0]  # scalar broadcast
    with pytest.raises(ConfigError, match=r"'a\.v'.*expected 3"):
        cfg.vector("a.v", 3)
    with pytest.raises(ConfigError, match=r"'a\.w'.*symmetric"):
        cfg.weight_matrix("a.w", 2)
    with pytest.raises(ConfigError, match=r"'a\.q'.*positive definite"):
        cfg.weight_matrix("a.q", 2)
    with pytest.raises(ConfigError, match=r"'a\.flag'.*true or false"):
        cfg.flag("a.flag")
    with pytest.raises(ConfigError, match=r"'loop\.period'.*missing"):
        cfg.number("loop.period")  # declared, required, absent
    assert np.array_equal(cfg.weight_matrix("a.s", 2), 3.0 * np.eye(2))
