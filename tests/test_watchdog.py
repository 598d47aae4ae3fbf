"""Watchdog rules: thresholds, on-delay, clearing deadband, first-out order, config."""

from __future__ import annotations

import math

from runtime.config import load_config
from runtime.guard.watchdog import DEFAULT_REACTIONS, RULE_IDS, Signals, Watchdog, build_rules
from tests.runtime_helpers import DEMO


def dog(overrides=()):
    cfg = load_config(DEMO, list(overrides))
    return Watchdog.from_config(cfg, 0.001, 0.02)


def test_every_contract_rule_exists_with_its_default_reaction():
    rules = build_rules(None, 0.001, 0.02)
    assert sorted(r.id for r in rules) == sorted(RULE_IDS)
    for r in rules:
        assert r.reaction == DEFAULT_REACTIONS[r.id]
    # Margin levels default to 0.8 and 0.9 of eps (our choice: docs/operating.md; a warning
    # level below the trip level is alarm-management practice, docs/method.md §9).
    by = {r.id: r for r in rules}
    assert by["margin_warning"].threshold == 0.8 and by["margin"].threshold == 0.9


def test_margin_warning_never_trips_and_margin_trips_at_its_level():
    w = dog()
    s = Signals(engaged=True, ratio=0.85)
    assert w.check(s) == [] and w.warning
    s.ratio = 0.9
    assert [r.id for r in w.check(s)] == ["margin"]
    # Latched as active until below threshold - deadband (0.05).
    s.ratio = 0.87
    assert w.check(s) == [] and "margin" in w.conditions_present()
    s.ratio = 0.84
    w.check(s)
    assert "margin" not in w.conditions_present()


def test_on_delay_holds_the_trip_back():
    w = dog(["watchdog.rules.margin.on_delay_s=0.005"])
    s = Signals(engaged=True, ratio=0.95)
    tripped = []
    for k in range(10):
        s.t = k * 0.001
        tripped += [(k, r.id) for r in w.check(s)]
    assert tripped == [(5, "margin")]


def test_first_out_orders_data_faults_before_the_margin():
    w = dog()
    s = Signals(engaged=True, ratio=0.95, nonfinite=True, jump=2.0)
    ids = [r.id for r in w.check(s)]
    assert ids[0] == "nonfinite" and ids.index("jump") < ids.index("margin")


def test_stale_counts_periods_and_nan_counts_as_over():
    w = dog(["watchdog.stale_periods=3"])
    s = Signals()
    s.sample_age = 0.003
    assert w.check(s) == []
    s.sample_age = 0.004
    assert [r.id for r in w.check(s)] == ["stale"]
    w2 = dog()
    assert [r.id for r in w2.check(Signals(engaged=True, ratio=math.nan))][:1] == ["margin"]


def test_overrun_m_in_k():
    w = dog(["watchdog.overrun_misses=3", "watchdog.overrun_window=10"])
    s = Signals()
    hits = []
    for k in range(40):
        s.tick, s.t = k, k * 1e-3
        s.misses_window = w.note_miss(k, 1 if k % 4 == 0 else 0)
        hits += [k for r in w.check(s) if r.id == "overrun"]
    # 3 misses within 10 ticks happens first at tick 8 (misses at 0, 4, 8).
    assert hits[:1] == [8]


def test_margin_rules_ignored_when_not_engaged_and_reaction_from_config():
    w = dog(["watchdog.rules.jump.reaction=controlled_stop"])
    assert w.check(Signals(engaged=False, ratio=5.0)) == []
    assert w.by_id["jump"].reaction == "controlled_stop"


def test_bad_reaction_is_a_config_error():
    import pytest

    from runtime.config import ConfigError

    with pytest.raises(ConfigError) as err:
        dog(["watchdog.rules.jump.reaction=explode"])
    assert "watchdog.rules.jump.reaction" in str(err.value)
