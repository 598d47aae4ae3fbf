"""Two host causes the loop cannot remove: the kernel's preemption model and the hypervisor.

- **Preemption model.** On a kernel built or booted without full preemption ("none" or
  "voluntary") kernel code runs until it yields: a SCHED_FIFO thread woken while a
  normal-priority kernel worker runs (the tty layer's flush work that carries every
  serial byte, page reclaim) waits for it, for milliseconds at times. `preempt_model`
  decides the model from texts the kernel publishes, in this order:

  1. ``uname -v`` naming ``PREEMPT_RT`` (a build property; no boot option undoes it);
  2. ``/sys/kernel/debug/sched/preempt``, the entry in parentheses or brackets (the model
     in force; readable only with debugfs access);
  3. the kernel command line's ``preempt=`` (Linux documentation,
     admin-guide/kernel-parameters.txt: ``none``, ``voluntary``, ``full``, ``lazy``;
     honoured only by a PREEMPT_DYNAMIC kernel, so ignored when ``uname -v`` or the
     config says the kernel is not one);
  4. the kernel config (``/proc/config.gz``, else ``/boot/config-RELEASE``):
     ``CONFIG_PREEMPT_RT``, ``CONFIG_PREEMPT``, ``CONFIG_PREEMPT_LAZY``,
     ``CONFIG_PREEMPT_VOLUNTARY``, ``CONFIG_PREEMPT_NONE``; on a PREEMPT_DYNAMIC kernel
     that choice is the boot default;

  else ``unknown``.
- **Virtual machine and steal.** The ``hypervisor`` flag in ``/proc/cpuinfo`` says the
  host is a guest (the hypervisor can stall all its CPUs at once; nothing inside the
  guest removes that). The share of CPU time the hypervisor took while the check ran is
  the steal column of ``/proc/stat``'s aggregate ``cpu`` line over the total, as a
  difference between two readings (proc(5): user, nice, system, idle, iowait, irq,
  softirq, steal, guest, guest_nice in USER_HZ ticks; guest and guest_nice are already
  counted in user and nice, so the total is the first eight).

The parsers take the texts (tests feed fixed ones); `read_kernel`, `read_virtual` and
`read_cpu_times` read this machine.

What does not live here: the clock measurement and the other host facts
(`runtime.realtime.hostmeasure`), the verdict in words (`runtime.realtime.hostverdict`).
"""

from __future__ import annotations

import gzip
import os
import re
from pathlib import Path
from typing import Any

MODELS = ("rt", "full", "voluntary", "none", "lazy", "unknown")
"""The preemption models `preempt_model` reports."""

NOT_PREEMPTIBLE = ("none", "voluntary")
"""Models under which kernel code is not preempted (a real-time thread waits for it)."""

_DEBUGFS = Path("/sys/kernel/debug/sched/preempt")
_CMDLINE = Path("/proc/cmdline")
_CONFIG_GZ = Path("/proc/config.gz")
_CPUINFO = Path("/proc/cpuinfo")
_STAT = Path("/proc/stat")

_BOOT_MODELS = ("none", "voluntary", "full", "lazy")

# The config symbols, strongest first: a recent PREEMPT_RT kernel also sets CONFIG_PREEMPT
# or CONFIG_PREEMPT_LAZY (RT became an option beside the model choice; from memory of the
# kernel's Kconfig.preempt), so RT is looked for before them.
_CONFIG_MODELS = (("CONFIG_PREEMPT_RT", "rt"), ("CONFIG_PREEMPT", "full"),
                  ("CONFIG_PREEMPT_LAZY", "lazy"), ("CONFIG_PREEMPT_VOLUNTARY", "voluntary"),
                  ("CONFIG_PREEMPT_NONE", "none"))


# ---------------------------------------------------------------------------
# Preemption model: parsers (pure)
# ---------------------------------------------------------------------------

def uname_flags(uname_v: str | None) -> set[str]:
    """The build flags in a ``uname -v`` text (``SMP``, ``PREEMPT``, ``PREEMPT_DYNAMIC``,
    ``PREEMPT_RT``), as words."""
    return set(re.findall(r"\b(SMP|PREEMPT(?:_DYNAMIC|_RT)?)\b", uname_v or ""))


def parse_debugfs_preempt(text: str | None) -> str | None:
    """The model in force from ``/sys/kernel/debug/sched/preempt``, e.g. ``none voluntary
    (full) lazy`` -> ``full``; None when no entry is marked."""
    m = re.search(r"[(\[]\s*([a-z_]+)\s*[)\]]", text or "")
    if m is None:
        return None
    word = m.group(1)
    return word if word in _BOOT_MODELS else None


def parse_cmdline_preempt(cmdline: str | None) -> str | None:
    """The ``preempt=`` of a kernel command line (``/proc/cmdline``); None when absent or
    not one of none, voluntary, full, lazy. Words after a lone ``--`` go to init, not to
    the kernel, and are not read; the last ``preempt=`` wins, as for the kernel."""
    found = None
    for word in (cmdline or "").split():
        if word == "--":
            break
        if word.startswith("preempt="):
            found = word.split("=", 1)[1].strip().lower()
    return found if found in _BOOT_MODELS else None


def config_symbols(config: str | None) -> set[str]:
    """The ``CONFIG_...=y`` symbols of a kernel config text."""
    return set(re.findall(r"^(CONFIG_[A-Z0-9_]+)=y\s*$", config or "", re.MULTILINE))


def parse_config_preempt(config: str | None) -> str | None:
    """The preemption model a kernel config selects (on a PREEMPT_DYNAMIC kernel: the boot
    default); None when it names none of them."""
    on = config_symbols(config)
    for symbol, model in _CONFIG_MODELS:
        if symbol in on:
            return model
    return None


def preempt_model(debugfs: str | None = None, uname_v: str | None = None,
                  cmdline: str | None = None, config: str | None = None,
                  config_source: str = "kernel config") -> tuple[str, str]:
    """(model, how it was read) from the texts a kernel publishes; None for a text not read.

    `model` is one of `MODELS`; `how` names the source in words.
    """
    flags = uname_flags(uname_v)
    if "PREEMPT_RT" in flags:
        return "rt", "uname -v (PREEMPT_RT)"
    from_debugfs = parse_debugfs_preempt(debugfs)
    if from_debugfs is not None:
        return from_debugfs, str(_DEBUGFS)
    on = config_symbols(config)
    dynamic = "PREEMPT_DYNAMIC" in flags or "CONFIG_PREEMPT_DYNAMIC" in on
    known_static = (uname_v is not None and not dynamic) or (config is not None and not dynamic)
    from_cmdline = parse_cmdline_preempt(cmdline)
    if from_cmdline is not None and not known_static:
        return from_cmdline, "kernel command line (preempt=)"
    from_config = parse_config_preempt(config)
    if from_config is not None:
        symbol = dict((m, s) for s, m in _CONFIG_MODELS)[from_config]
        how = f"{config_source}: {symbol}=y" + (
            ", the boot default of this PREEMPT_DYNAMIC kernel"
            if dynamic and from_config != "rt" else "")
        return from_config, how
    return "unknown", "not found (no debugfs, preempt= or kernel config readable)"


# ---------------------------------------------------------------------------
# Preemption model: this machine
# ---------------------------------------------------------------------------

def _read(path: Path) -> str | None:
    try:
        return path.read_text(errors="replace")
    except (OSError, ValueError):
        return None


def _read_config(release: str) -> tuple[str | None, str]:
    try:
        with gzip.open(_CONFIG_GZ, "rt", errors="replace") as fh:
            return fh.read(), str(_CONFIG_GZ)
    except (OSError, EOFError, ValueError):
        pass
    boot = Path("/boot") / f"config-{release}"
    return _read(boot), str(boot)


def read_kernel() -> dict[str, Any]:
    """This machine's kernel: ``release`` (uname -r), ``preempt`` (one of `MODELS`) and
    ``how`` (where it was read)."""
    u = os.uname()
    config, source = _read_config(u.release)
    model, how = preempt_model(debugfs=_read(_DEBUGFS), uname_v=u.version,
                               cmdline=_read(_CMDLINE), config=config, config_source=source)
    return {"release": u.release, "preempt": model, "how": how}


# ---------------------------------------------------------------------------
# Virtual machine and steal
# ---------------------------------------------------------------------------

def parse_virtual(cpuinfo: str | None) -> bool:
    """True when a ``/proc/cpuinfo`` text's ``flags`` carry ``hypervisor`` (a guest)."""
    for line in (cpuinfo or "").splitlines():
        key, _, value = line.partition(":")
        if key.strip() in ("flags", "Features") and "hypervisor" in value.split():
            return True
    return False


def read_virtual() -> bool:
    """True when this machine is a virtual machine (the ``hypervisor`` CPU flag)."""
    return parse_virtual(_read(_CPUINFO))


def parse_cpu_times(stat: str | None) -> tuple[int, int] | None:
    """(total, steal) of the aggregate ``cpu`` line of a ``/proc/stat`` text, in USER_HZ
    ticks; total is user + nice + system + idle + iowait + irq + softirq + steal (guest
    time is already inside user and nice). None when the line is missing or too short
    to carry steal (kernels before 2.6.11)."""
    for line in (stat or "").splitlines():
        parts = line.split()
        if parts and parts[0] == "cpu":
            try:
                cols = [int(x) for x in parts[1:9]]
            except ValueError:
                return None
            if len(cols) < 8:
                return None
            return sum(cols), cols[7]
    return None


def steal_pct(before: tuple[int, int] | None, after: tuple[int, int] | None) -> float | None:
    """The hypervisor's share of all CPU time between two `parse_cpu_times` readings (%);
    None when either is missing or no time passed between them."""
    if before is None or after is None:
        return None
    total = after[0] - before[0]
    if total <= 0:
        return None
    return 100.0 * max(0, after[1] - before[1]) / total


def read_cpu_times() -> tuple[int, int] | None:
    """(total, steal) of this machine now (`parse_cpu_times` of ``/proc/stat``)."""
    return parse_cpu_times(_read(_STAT))
