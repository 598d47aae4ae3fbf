"""The host check: its verdict on fixed figures, the command's JSON, the pre-arm hook, and
timing trips put into words.

The verdict is a pure function of the figures, so it is checked on made-up hosts without
any timing. The limits it judges against are the watchdog's own: the stale rule trips at a
sample (stale_periods + 0.5) periods old and the overrun rule at overrun_misses misses in
the window (`runtime.guard.watchdog.build_rules`); the tests read them from there, not from a
second copy. The arithmetic of each expected limit is written out beside the check. The
measured figures are only checked for type and sign (no timing assertions).
"""

from __future__ import annotations

import asyncio
import json
import math
import os

import pytest

from runtime.config import load_config
from runtime.guard.watchdog import build_rules
from runtime.realtime.hostcheck import (
    Thresholds,
    explain_from_header,
    explain_trip,
    thresholds_from_config,
    verdict,
)
from runtime.realtime.loop import Runner, RunSettings
from runtime.records.logs import read_run_log, read_trip_records
from tests.runtime_helpers import BASE, DEMO, run_unpaced

QUIET = {"lateness_p50_us": 2.0, "lateness_p99_us": 30.0, "worst_stall_ms": 0.8,
         "misses": 1, "ticks": 3000, "realtime": True,
         "realtime_rights": {"sched_fifo_possible": True, "rlimit_rtprio": 95,
                             "cap_sys_nice": False, "root": False},
         "memlock": {"mlockall_possible": True, "rlimit_bytes": None},
         "governor": {"cpu0": "performance", "cpu1": "performance"},
         "load_1min": 0.2, "cpus": 4}
TH_1KHZ = Thresholds(period_s=0.001, stale_periods=3, overrun_misses=25, overrun_window=1000)


# ----------------------------------------------------------------- the limits are the rules'
def test_thresholds_are_the_watchdog_rules_own_limits():
    """Stale and overrun limits as `build_rules` builds them (one definition of each rule)."""
    for period, stale, misses in ((0.001, 3, 25), (0.002, 3, 25), (0.004, 7, 40)):
        cfg = load_config(DEMO, [f"loop.period={period}", f"watchdog.stale_periods={stale}",
                                 f"watchdog.overrun_misses={misses}"])
        th = thresholds_from_config(cfg)
        rules = {r.id: r for r in build_rules(cfg, period, 0.02)}
        assert th.stale_limit_s == pytest.approx(rules["stale"].threshold)
        # The overrun rule trips at value >= overrun_misses - 0.5, i.e. at `misses`.
        assert math.ceil(rules["overrun"].threshold) == th.overrun_misses == misses
        # A stall of d leaves a sample d + one period old: the budget is (stale - 0.5) P.
        assert th.stall_budget_s == pytest.approx((stale - 0.5) * period)


def test_thresholds_read_from_the_config():
    cfg = load_config(DEMO, ["loop.period=0.002", "watchdog.stale_periods=5",
                             "watchdog.overrun_misses=40", "watchdog.overrun_window=2000"])
    th = thresholds_from_config(cfg)
    assert (th.period_s, th.stale_periods, th.overrun_misses, th.overrun_window) == \
        (0.002, 5, 40, 2000)
    # (5 + 0.5) x 2 ms = 11 ms, the stale rule's threshold at these settings.
    assert th.stale_limit_s == pytest.approx(0.011)


# ----------------------------------------------------------------- the verdict (pure)
def test_a_quiet_host_with_realtime_rights_holds_1khz():
    v = verdict(QUIET, TH_1KHZ)
    assert v["ok"] is True and v["problems"] == []
    assert v["advice"] == ["nothing to change"]
    # 1 miss in 3000 ticks = 0.333 per 1000 ticks.
    assert v["predicted_misses_per_window"] == pytest.approx(1000 / 3000)
    assert v["stall_budget_ms"] == pytest.approx(2.5)  # (3 - 0.5) x 1 ms


def test_p99_lateness_beyond_the_stale_limit_is_not_ok_and_says_what_to_change():
    fig = {**QUIET, "lateness_p99_us": 4000.0, "worst_stall_ms": 4.0}
    v = verdict(fig, TH_1KHZ)
    assert v["ok"] is False
    assert any("p99 4.0 ms" in p and "2.5 ms" in p for p in v["problems"]), v["problems"]
    text = " ".join(v["advice"])
    # A 4 ms stall with 3 stale periods needs P >= 4 / 2.5 = 1.6 ms: the next round
    # period is 2 ms. At 1 ms it needs stale_periods >= 4 + 0.5, i.e. 5 (4 gives 3.5 ms).
    assert "loop.period >= 0.002 s" in text
    assert "watchdog.stale_periods >= 5" in text


def test_a_single_long_stall_counts_as_a_burst_of_misses_for_the_overrun_rule():
    # 40 ms held off at 1 ms is ~40 misses at once, over the overrun limit of 25.
    fig = {**QUIET, "worst_stall_ms": 40.0}
    th = Thresholds(period_s=0.001, stale_periods=100, overrun_misses=25)
    v = verdict(fig, th)
    assert v["ok"] is False and v["burst_misses"] == pytest.approx(40.0)
    assert any("overrun rule trips at 25" in p for p in v["problems"])
    assert any("watchdog.overrun_misses >= 41" in a for a in v["advice"])


def test_a_steady_miss_rate_near_the_overrun_limit_is_not_ok():
    # 40 misses in 3000 ticks predicts 13.3 per 1000, above half the limit of 25.
    fig = {**QUIET, "misses": 40}
    v = verdict(fig, TH_1KHZ)
    assert v["ok"] is False
    assert v["predicted_misses_per_window"] == pytest.approx(40 / 3)
    assert any("13.3 per 1000 ticks" in p for p in v["problems"])


def test_no_measured_tick_is_not_ok():
    assert verdict({**QUIET, "ticks": 0, "misses": 0}, TH_1KHZ)["ok"] is False


def test_no_realtime_rights_is_named_in_the_advice():
    fig = {**QUIET, "realtime": False,
           "realtime_rights": {"sched_fifo_possible": False, "rlimit_rtprio": 0,
                               "cap_sys_nice": False, "root": False}}
    v = verdict(fig, TH_1KHZ)
    text = " ".join(v["advice"])
    assert "SCHED_FIFO was refused" in text and "RLIMIT_RTPRIO 0" in text
    assert "rtprio" in text and "CAP_SYS_NICE" in text
    assert v["ok"] is True  # the figures held; the advice still says what would help
    off = verdict(fig, TH_1KHZ, loop_realtime=False)
    assert any("loop.realtime = false" in a for a in off["advice"])


def test_the_simulated_rig_is_judged_on_the_overrun_rule_only():
    # The in-process rig's samples carry the loop's nominal time: a 4 ms stall does not
    # age them (stale cannot trip), and 4 misses at once stay under the overrun limit.
    fig = {**QUIET, "worst_stall_ms": 4.0}
    assert verdict(fig, TH_1KHZ)["ok"] is False
    sim = verdict(fig, TH_1KHZ, rig_clocked=False)
    assert sim["ok"] is True
    assert any("a device does" in a for a in sim["advice"])


def test_a_busy_host_governor_and_memory_locking_are_advice():
    fig = {**QUIET, "load_1min": 5.5, "cpus": 2, "governor": {"cpu0": "powersave"},
           "memlock": {"mlockall_possible": False, "rlimit_bytes": 8 * 1024 * 1024}}
    v = verdict(fig, TH_1KHZ)
    text = " ".join(v["advice"])
    assert "load average 5.5 (1 min) on 2 cores" in text
    assert "governor powersave" in text
    assert "RLIMIT_MEMLOCK 8192 KiB" in text


# ----------------------------------------------------------------- timing trips in words
def test_stale_trip_in_words_with_units_and_periods():
    # The figures of a reported trip: 9.4 ms without a sample against 7 ms at a 2 ms
    # period, i.e. (3 + 0.5) periods.
    text = explain_trip("stale", 0.0094, 0.007, 0.002)
    assert text.startswith("no fresh sample for 9.4 ms; limit 7.0 ms = 3.5 periods of 2.0 ms.")
    assert "this computer held the loop off" in text and "corral hostcheck" in text


def test_overrun_trip_in_words():
    # The overrun rule's recorded threshold is overrun_misses - 0.5 (24.5 for 25).
    text = explain_trip("overrun", 26, 24.5, 0.001, 1000)
    assert text.startswith("26 deadlines missed in the last 1000 ticks; limit 25.")


def test_link_and_sequence_trips_in_words():
    assert explain_trip("link_loss", "inf", 0.1, 0.001).startswith(
        "link disconnected; limit 100.0 ms without a sample")
    assert explain_trip("link_loss", 0.105, 0.1, 0.001).startswith(
        "no sample for 105.0 ms; limit 100.0 ms")
    # seq_gap's threshold is seq_gap_max + 0.5: 0.5 means no sample may be skipped.
    assert explain_trip("seq_gap", 3, 0.5, 0.001).startswith(
        "3 samples missing from the sequence; limit 0")
    assert explain_trip("margin", 0.95, 0.9, 0.001) is None


def test_the_host_check_figures_are_named_in_the_explanation():
    host = {"ok": False, "lateness_p99_us": 310.0, "worst_stall_ms": 9.1, "realtime": False,
            "thresholds": {"stall_budget_ms": 5.0}}
    loop = {"lateness_p99_us": 250.0, "lateness_max_us": 9400.0, "deadline_misses": 39}
    text = explain_trip("stale", 0.0094, 0.007, 0.002, host=host, loop=loop)
    assert ("Host check before arming: lateness p99 310 us, worst stall 9.10 ms, normal "
            "priority, NOT OK.") in text
    assert "This run: lateness p99 250 us, max 9.40 ms, 39 deadline misses." in text
    # A quiet host (stalls far below the budget) points at the link or the device instead.
    quiet = {**host, "ok": True, "worst_stall_ms": 0.5, "realtime": True}
    assert "Likely cause: the link or the device" in explain_trip("stale", 0.0094, 0.007,
                                                                  0.002, host=quiet)


def test_explanation_reads_period_and_window_from_a_log_header():
    header = {"config": {"loop": {"period": 0.002}, "watchdog": {"overrun_window": 500}}}
    assert explain_from_header("overrun", 30, 24.5, header).startswith(
        "30 deadlines missed in the last 500 ticks; limit 25")
    assert "= 3.5 periods of 2.0 ms" in explain_from_header("stale", 0.0094, 0.007, header)


def test_trips_show_explains_an_injected_stale_trip(tmp_path, corral):
    # A frozen sensor ages the sample until the stale rule trips at (3 + 0.5) x 1 ms.
    _, summary = run_unpaced(tmp_path, 2.1, ["sensor_freeze@1.5"])
    assert summary["trips"] and summary["trips"][0]["rule"] == "stale"
    res = corral("trips", tmp_path, "--show", "1")
    assert res.code == 0, res.stderr
    why = [ln for ln in res.stdout.splitlines() if ln.startswith("  why: ")]
    assert why and "limit 3.5 ms = 3.5 periods of 1.0 ms" in why[0], res.stdout
    res = corral("trips", tmp_path, "--show", "1", "--json")
    assert "limit 3.5 ms" in json.loads(res.stdout)["explanation"]


# ----------------------------------------------------------------- the command
def test_hostcheck_json_keys_and_types(corral, tmp_path):
    res = corral("hostcheck", DEMO, "--seconds", "0.5", "--json")
    assert res.code in (0, 1), res.stderr
    assert "measuring" in res.stderr  # progress while it measures
    out = json.loads(res.stdout)
    for key in ("ok", "lateness_p50_us", "lateness_p99_us", "worst_stall_ms", "realtime",
                "advice", "misses", "predicted_misses_per_window", "load_1min", "cpus",
                "governor", "memlock", "period_s", "seconds"):
        assert key in out, key
    assert isinstance(out["ok"], bool) and isinstance(out["realtime"], bool)
    assert res.code == (0 if out["ok"] else 1)
    for key in ("lateness_p50_us", "lateness_p99_us", "worst_stall_ms",
                "predicted_misses_per_window"):
        assert isinstance(out[key], float) and math.isfinite(out[key]) and out[key] >= 0, key
    assert isinstance(out["misses"], int) and out["misses"] >= 0
    assert out["ticks"] > 0 and out["period_s"] == 0.001 and out["seconds"] == 0.5
    assert isinstance(out["advice"], list) and all(isinstance(a, str) for a in out["advice"])
    assert out["cpus"] >= 1
    # The kernel's preemption model and the hypervisor (`runtime.realtime.hostkernel`;
    # values depend on the machine, so only their types are checked here).
    assert set(out["kernel"]) == {"release", "preempt", "how"}
    assert out["kernel"]["preempt"] in ("rt", "full", "voluntary", "none", "lazy", "unknown")
    assert isinstance(out["virtual"], bool)
    assert out["steal_pct"] is None or 0.0 <= out["steal_pct"] <= 100.0


def test_hostcheck_text_report(corral):
    res = corral("hostcheck", DEMO, "--seconds", "0.3", "--set", "loop.period=0.002",
                 "--link", "serial:/dev/ttyUSB0")
    assert res.code in (0, 1), res.stderr
    assert "period 2.0 ms (500 Hz)" in res.stdout
    assert "link: rig-clocked" in res.stdout
    assert "stale rule: trips at a sample 7.00 ms old" in res.stdout  # (3 + 0.5) x 2 ms
    assert "preemption model " in res.stdout and "virtual machine: " in res.stdout
    sim = corral("hostcheck", DEMO, "--seconds", "0.3")
    # No stale-rule line for the simulated rig (its advice may still mention the rule when
    # a stall beyond the budget was seen: what a real rig would meet).
    assert "link: simulated" in sim.stdout and "stale rule: trips at" not in sim.stdout


@pytest.mark.parametrize("args, field", [
    (["--set", "loop.period=-1"], "loop.period"),
    (["--set", "watchdog.stale_periods=0"], "watchdog.stale_periods"),
    (["--seconds", "0"], "--seconds"),
])
def test_bad_input_gives_one_line(corral, args, field):
    res = corral("hostcheck", DEMO, *args)
    assert res.code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and field in lines[0] and "Traceback" not in res.stderr


def test_missing_config_gives_one_line(corral, tmp_path):
    res = corral("hostcheck", tmp_path / "nope.toml")
    assert res.code == 2 and len(res.stderr.strip().splitlines()) == 1


# ----------------------------------------------------------------- before arming a real rig
def test_a_real_link_gets_the_host_check_in_hello_and_log_headers(tmp_path):
    master, slave = os.openpty()  # a real pseudo-terminal; the link is not opened here
    try:
        cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}", "loop.hostcheck_s=0.3"])
        r = Runner(cfg, RunSettings(link=f"serial:{os.ttyname(slave)}", echo_trips=False))
        assert not r.simulated
        hc = r.core.hello().hostcheck
        assert hc is not None
        assert isinstance(hc["ok"], bool) and hc["seconds"] == 0.3
        assert r.telemetry.hello["hostcheck"] == hc
        r.core.close()
        header, _ = read_run_log(r.core.run_path)
        assert header["hostcheck"]["ok"] == hc["ok"]
        trip_header = read_trip_records(r.core.trip_path).header
        assert trip_header["hostcheck"]["lateness_p99_us"] == hc["lateness_p99_us"]
    finally:
        os.close(master)
        os.close(slave)


def test_no_host_check_for_the_simulated_rig_or_without_preflight(tmp_path):
    cfg = load_config(DEMO, [*BASE, f"log.dir={tmp_path}"])
    r = Runner(cfg, RunSettings(duration=0.05, echo_trips=False))
    summary = asyncio.run(r.run_ticks(10))
    assert summary["hostcheck"] is None and r.core.hello().hostcheck is None


# ----------------------------------------------------------------- the serial path's floor
def test_the_serial_path_floor_is_summarised_against_the_stale_limit():
    from runtime.realtime.linkfloor import pty_summary

    # Four frames aged 0.1, 0.2, 4.0 and 3.6 ms against a 3.5 ms limit: two are over it.
    s = pty_summary({"age_us": [100.0, 200.0, 4000.0, 3600.0]}, 3.5e-3)
    assert s["ok"] and s["frames"] == 4 and s["over_stale_limit"] == 2
    assert s["age_max_ms"] == pytest.approx(4.0) and s["stale_limit_ms"] == pytest.approx(3.5)
    assert pty_summary({}, 3.5e-3) == {"ok": False}


def test_a_serial_path_that_delivers_frames_late_is_not_ok_and_says_what_to_change():
    floor = {"ok": True, "frames": 5000, "age_p99_us": 300.0, "age_max_ms": 5.2,
             "over_stale_limit": 3, "stale_limit_ms": 3.5}
    v = verdict({**QUIET, "link_floor": floor}, TH_1KHZ, link_kind="serial")
    assert v["ok"] is False
    assert any("3 of 5000 frames" in p and "3.5 ms" in p for p in v["problems"]), v["problems"]
    # A 5.2 ms old sample at 1 ms needs (sp + 0.5) x 1 ms > 5.2 ms: sp = ceil(5.2 + 0.5) = 6
    # (the rule then trips at 6.5 ms).
    assert "watchdog.stale_periods >= 6" in " ".join(v["advice"])
    held = verdict({**QUIET, "link_floor": {**floor, "over_stale_limit": 0}}, TH_1KHZ,
                   link_kind="serial")
    assert held["ok"] is True


def test_hostcheck_measures_the_serial_path_for_a_serial_link(corral):
    res = corral("hostcheck", DEMO, "--seconds", "0.5", "--json", "--link",
                 "serial:/dev/ttyUSB0")
    assert res.code in (0, 1), res.stderr
    lf = json.loads(res.stdout)["link_floor"]
    # A real pseudo-terminal between two processes at 1 kHz for 0.5 s: about 500 frames
    # (values depend on the machine: only their kinds and signs are checked).
    assert lf["ok"] is True and 0 < lf["frames"] <= 500
    assert lf["age_max_ms"] >= 0 and lf["over_stale_limit"] >= 0
    assert json.loads(corral("hostcheck", DEMO, "--seconds", "0.3", "--json")
                      .stdout)["link_floor"] is None
