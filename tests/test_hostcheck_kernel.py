"""The host check's two host causes: the kernel's preemption model and the hypervisor.

The parsers (`runtime.realtime.hostkernel`) are fed fixed texts in the formats the kernel
publishes, as the Linux documentation describes them (from memory):
admin-guide/kernel-parameters.txt for ``preempt=`` (none, voluntary, full, lazy; only a
PREEMPT_DYNAMIC kernel honours it), the kernel's Kconfig.preempt for the
``CONFIG_PREEMPT_*`` choice, debugfs ``sched/preempt`` (the model in force in
parentheses), and proc(5) for ``/proc/stat`` (user nice system idle iowait irq softirq
steal guest guest_nice, in USER_HZ ticks; guest time is also counted in user). The
verdict's notes are checked on fixed figures; one test reads this machine and checks
only keys and types.
"""

from __future__ import annotations

import io
import math

import pytest

from runtime.config import load_config
from runtime.dashboard import panels
from runtime.realtime.hostcheck import (
    Thresholds,
    explain_trip,
    host_facts,
    measure,
    pre_arm_check,
    verdict,
)
from runtime.realtime.hostkernel import (
    MODELS,
    parse_cmdline_preempt,
    parse_config_preempt,
    parse_cpu_times,
    parse_debugfs_preempt,
    parse_virtual,
    preempt_model,
    read_cpu_times,
    read_kernel,
    steal_pct,
)
from runtime.realtime.hostverdict import (
    host_cause_tag,
    host_kernel_notes,
    report_lines,
    summary_line,
)
from tests.runtime_helpers import DEMO
from tests.test_dashboard import HELLO

# The kernel config fragment of a PREEMPT_DYNAMIC kernel whose boot default is "none"
# (the shape of `zcat /proc/config.gz | grep PREEMPT` on such a kernel).
CONFIG_NONE_DYNAMIC = """\
CONFIG_PREEMPT_BUILD=y
CONFIG_PREEMPT_NONE=y
# CONFIG_PREEMPT_VOLUNTARY is not set
# CONFIG_PREEMPT is not set
# CONFIG_PREEMPT_LAZY is not set
CONFIG_PREEMPT_COUNT=y
CONFIG_PREEMPTION=y
CONFIG_PREEMPT_DYNAMIC=y
CONFIG_PREEMPT_RCU=y
"""
CONFIG_RT = """\
CONFIG_PREEMPT_BUILD=y
# CONFIG_PREEMPT_NONE is not set
CONFIG_PREEMPT=y
CONFIG_PREEMPT_RT=y
"""
CONFIG_VOLUNTARY_STATIC = """\
# CONFIG_PREEMPT_NONE is not set
CONFIG_PREEMPT_VOLUNTARY=y
# CONFIG_PREEMPT is not set
"""

QUIET = {"lateness_p50_us": 2.0, "lateness_p99_us": 30.0, "worst_stall_ms": 0.8,
         "misses": 1, "ticks": 3000, "realtime": True,
         "realtime_rights": {"sched_fifo_possible": True, "rlimit_rtprio": 95,
                             "cap_sys_nice": False, "root": False},
         "memlock": {"mlockall_possible": True, "rlimit_bytes": None},
         "governor": {"cpu0": "performance"}, "load_1min": 0.2, "cpus": 4}
TH_1KHZ = Thresholds(period_s=0.001, stale_periods=3, overrun_misses=25, overrun_window=1000)
NONE_KERNEL = {"release": "6.1.0-test", "preempt": "none",
               "how": "/proc/config.gz: CONFIG_PREEMPT_NONE=y"}


# ----------------------------------------------------------------- the preemption model
def test_debugfs_names_the_model_in_parentheses():
    assert parse_debugfs_preempt("none voluntary (full) lazy\n") == "full"
    assert parse_debugfs_preempt("(none) voluntary full\n") == "none"
    assert parse_debugfs_preempt("none [voluntary] full") == "voluntary"
    assert parse_debugfs_preempt("none voluntary full") is None  # nothing marked
    assert parse_debugfs_preempt(None) is None


def test_a_preempt_rt_uname_is_rt_whatever_else_says():
    # `uname -v` of a real-time kernel carries PREEMPT_RT (the build flag); no boot
    # option makes such a kernel non-preemptible.
    model, how = preempt_model(uname_v="#1 SMP PREEMPT_RT Thu Jan 1 00:00:00 UTC 2026",
                               cmdline="preempt=none", config=CONFIG_NONE_DYNAMIC)
    assert model == "rt" and "uname" in how
    assert preempt_model(config=CONFIG_RT)[0] == "rt"  # recent RT also sets CONFIG_PREEMPT


def test_debugfs_wins_over_the_command_line_and_the_config():
    model, how = preempt_model(debugfs="none voluntary (full) lazy",
                               uname_v="#1 SMP PREEMPT_DYNAMIC", cmdline="preempt=none",
                               config=CONFIG_NONE_DYNAMIC)
    assert (model, how) == ("full", "/sys/kernel/debug/sched/preempt")


def test_the_command_line_preempt_of_a_dynamic_kernel():
    assert parse_cmdline_preempt("ro quiet preempt=full") == "full"
    assert parse_cmdline_preempt("preempt=voluntary preempt=lazy") == "lazy"  # last wins
    assert parse_cmdline_preempt("ro preempt=bogus") is None
    # Words after a lone `--` are init's arguments, not the kernel's.
    assert parse_cmdline_preempt("console=ttyS0 -- --init preempt=full") is None
    model, how = preempt_model(uname_v="#1 SMP PREEMPT_DYNAMIC", cmdline="ro preempt=full",
                               config=CONFIG_NONE_DYNAMIC)
    assert model == "full" and "preempt=" in how
    assert preempt_model(cmdline="quiet preempt=full")[0] == "full"  # nothing says static


def test_a_static_kernel_ignores_preempt_on_the_command_line():
    # Without PREEMPT_DYNAMIC the kernel does not read preempt=; its config decides.
    model, how = preempt_model(uname_v="#1 SMP", cmdline="preempt=full",
                               config=CONFIG_VOLUNTARY_STATIC, config_source="/boot/config-x")
    assert model == "voluntary" and how == "/boot/config-x: CONFIG_PREEMPT_VOLUNTARY=y"


def test_the_config_choice_is_the_boot_default_of_a_dynamic_kernel():
    assert parse_config_preempt(CONFIG_NONE_DYNAMIC) == "none"
    assert parse_config_preempt("CONFIG_PREEMPT=y\n") == "full"
    assert parse_config_preempt("CONFIG_PREEMPT_LAZY=y\n") == "lazy"
    assert parse_config_preempt("# CONFIG_PREEMPT is not set\nCONFIG_PREEMPT_BUILD=y\n") is None
    model, how = preempt_model(uname_v="#1 SMP PREEMPT_DYNAMIC @0", cmdline="quiet",
                               config=CONFIG_NONE_DYNAMIC, config_source="/proc/config.gz")
    assert model == "none"
    assert how == ("/proc/config.gz: CONFIG_PREEMPT_NONE=y, the boot default of this "
                   "PREEMPT_DYNAMIC kernel")


def test_nothing_found_is_unknown():
    model, how = preempt_model(uname_v="#1 SMP", cmdline="ro quiet", config=None)
    assert model == "unknown" and "not found" in how
    assert preempt_model()[0] == "unknown"


# ----------------------------------------------------------------- virtual machine, steal
def test_the_hypervisor_flag_marks_a_guest():
    assert parse_virtual("processor\t: 0\nflags\t\t: fpu vme sse2 hypervisor lahf_lm\n")
    assert not parse_virtual("processor\t: 0\nflags\t\t: fpu vme sse2 lahf_lm\n")
    assert not parse_virtual("flags : fpu hypervisorx\n")  # a word, not a substring
    assert not parse_virtual(None)


STAT_BEFORE = """\
cpu  1000 200 300 5000 50 10 20 40 0 0
cpu0 500 100 150 2500 25 5 10 20 0 0
intr 12345
"""
STAT_AFTER = """\
cpu  1100 200 330 5400 50 12 28 80 30 0
cpu0 550 100 165 2700 25 6 14 40 15 0
intr 12400
"""


def test_steal_share_between_two_proc_stat_readings():
    before, after = parse_cpu_times(STAT_BEFORE), parse_cpu_times(STAT_AFTER)
    # Worked by hand: totals of the first eight columns 1000+200+300+5000+50+10+20+40 =
    # 6620 and 1100+200+330+5400+50+12+28+80 = 7200 (guest 30 is inside user already, not
    # added again), so 580 ticks passed; steal 80 - 40 = 40; 40 / 580 = 6.8966 %.
    assert before == (6620, 40) and after == (7200, 80)
    assert steal_pct(before, after) == pytest.approx(100 * 40 / 580)
    assert steal_pct(before, after) == pytest.approx(6.8966, abs=1e-4)
    assert steal_pct(before, before) is None  # no time passed
    assert steal_pct(None, after) is None
    assert parse_cpu_times("cpu  1 2 3 4\n") is None  # too old a kernel to count steal


# ----------------------------------------------------------------- the verdict's notes
def test_a_non_preemptible_kernel_on_a_vm_is_named_without_deciding_the_verdict():
    fig = {**QUIET, "kernel": NONE_KERNEL, "virtual": True, "steal_pct": 1.24}
    v = verdict(fig, TH_1KHZ, link_kind="serial")
    assert v["ok"] is True and v["problems"] == []  # the figures held: notes only
    text = " ".join(v["advice"])
    assert "kernel preemption model 'none'" in text and "CONFIG_PREEMPT_NONE=y" in text
    assert "flush work that carries every serial byte" in text
    assert "preempt=full" in text and "PREEMPT_RT" in text
    assert "on a serial link this is where it shows" in text and "stale rule" in text
    assert "a virtual machine" in text and "steal 1.2 % of CPU time during the check" in text
    assert "bare-metal" in text and "nothing to change" not in text
    # Over MQTT the serial path is not named; voluntary is as non-preemptible as none.
    mqtt = verdict({**fig, "kernel": {**NONE_KERNEL, "preempt": "voluntary"}}, TH_1KHZ,
                   link_kind="mqtt")
    assert any("'voluntary'" in a for a in mqtt["advice"])
    assert not any("serial link" in a for a in mqtt["advice"])


def test_a_preemptible_bare_metal_host_gets_no_note():
    for model in ("full", "rt", "lazy", "unknown"):
        fig = {**QUIET, "kernel": {**NONE_KERNEL, "preempt": model}, "virtual": False,
               "steal_pct": 0.0}
        assert verdict(fig, TH_1KHZ, link_kind="serial")["advice"] == ["nothing to change"]


def test_figures_that_fail_keep_their_advice_first():
    fig = {**QUIET, "lateness_p99_us": 4000.0, "worst_stall_ms": 4.0, "kernel": NONE_KERNEL,
           "virtual": True, "steal_pct": None}
    v = verdict(fig, TH_1KHZ, link_kind="serial")
    assert v["ok"] is False
    assert v["advice"][0].startswith("a longer period")
    assert any("steal not measured" in a for a in v["advice"])
    assert host_kernel_notes({}) == []


def test_report_and_summary_show_the_model_and_the_steal():
    res = {**QUIET, "ok": True, "period_s": 0.001, "seconds": 3.0, "link": "rig-clocked",
           "lateness_max_us": 500.0, "predicted_misses_per_window": 0.3,
           "kernel": NONE_KERNEL, "virtual": True, "steal_pct": 0.5,
           "thresholds": {"stale_periods": 3, "stale_limit_ms": 3.5, "stall_budget_ms": 2.5,
                          "overrun_misses": 25, "overrun_window": 1000},
           "problems": [], "advice": [], "clock": "SCHED_FIFO priority 50"}
    lines = report_lines(res)
    kernel = [ln for ln in lines if ln.startswith("  kernel: ")]
    assert kernel == ["  kernel: 6.1.0-test, preemption model none (/proc/config.gz: "
                      "CONFIG_PREEMPT_NONE=y); virtual machine: yes, steal 0.5 % of CPU time "
                      "during the check"]
    short = summary_line(res)
    assert short.endswith("SCHED_FIFO, kernel preempt none, virtual machine (steal 0.5 %)")
    bare = {**res, "kernel": {**NONE_KERNEL, "preempt": "full"}, "virtual": False}
    assert "virtual machine: no" in " ".join(report_lines(bare))
    assert summary_line(bare).endswith("SCHED_FIFO")


def test_a_stale_trip_on_a_quiet_host_names_the_kernel_and_the_hypervisor():
    # The figures of a stale trip over a pty: 9.4 ms without a sample against 3.5 ms at
    # 1 kHz, after a host check that found the host quiet (stall 0.5 ms of a 2.5 ms budget).
    host = {"ok": True, "lateness_p99_us": 20.0, "worst_stall_ms": 0.5, "realtime": True,
            "thresholds": {"stall_budget_ms": 2.5}, "kernel": NONE_KERNEL, "virtual": True,
            "steal_pct": 0.8}
    text = explain_trip("stale", 0.0094, 0.0035, 0.001, host=host)
    assert "does not preempt kernel code (preempt none)" in text
    assert "flush work that carries every serial byte" in text
    assert "hypervisor can stall" in text
    assert "SCHED_FIFO, kernel preempt none, virtual machine (steal 0.8 %), OK." in text
    plain = {**host, "kernel": {**NONE_KERNEL, "preempt": "full"}, "virtual": False}
    assert "Likely cause: the link or the device;" in explain_trip("stale", 0.0094, 0.0035,
                                                                   0.001, host=plain)


# ----------------------------------------------------------------- this machine
def test_this_machine_is_read_keys_and_types():
    kernel = read_kernel()
    assert set(kernel) == {"release", "preempt", "how"}
    assert kernel["preempt"] in MODELS and kernel["release"] and kernel["how"]
    facts = host_facts()
    assert facts["kernel"]["preempt"] in MODELS and isinstance(facts["virtual"], bool)
    times = read_cpu_times()
    assert times is None or (times[0] >= times[1] >= 0)
    fig = measure(0.001, 0.2)
    steal = fig["steal_pct"]
    assert steal is None or (isinstance(steal, float) and math.isfinite(steal)
                             and 0.0 <= steal <= 100.0)


def test_the_pre_arm_check_prints_the_host_causes_it_found():
    cfg = load_config(DEMO, ["loop.hostcheck_s=0.2"])
    out = io.StringIO()
    res = pre_arm_check(cfg, out, link="serial:/dev/null")
    assert res is not None and isinstance(res["virtual"], bool)
    text = out.getvalue()
    assert f"corral: {summary_line(res)}" in text
    tag = host_cause_tag(res)  # depends on this machine: printed exactly when there is one
    assert ("corral:   host: " in text) == bool(tag)
    if tag:
        assert tag[2:] in text and "`corral hostcheck CONFIG`" in text


def test_the_arm_dialog_line_carries_the_host_causes():
    hc = {"ok": True, "lateness_p99_us": 20.0, "worst_stall_ms": 0.5, "realtime": True,
          "kernel": NONE_KERNEL, "virtual": True, "steal_pct": 0.3}
    line = panels.hostcheck_line(dict(HELLO, hostcheck=hc))
    assert line.endswith("SCHED_FIFO, kernel preempt none, virtual machine (steal 0.3 %)")
    bare = {**hc, "kernel": {**NONE_KERNEL, "preempt": "rt"}, "virtual": False}
    assert panels.hostcheck_line(dict(HELLO, hostcheck=bare)).endswith("SCHED_FIFO")
