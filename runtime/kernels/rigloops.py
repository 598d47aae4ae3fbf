"""The dry-run loop and the sweep kernel compiled against one rig's generated plant step.

`runtime.kernels.fast` holds the loops as plain Python templates (`dry_run_loop`,
`sweep_kernel`) that call `plant_step` / `plant_step_lanes` by name; `compiled(spec)` puts
their text after the rig's generated step (`sim_rigs.kernel.module_source`) in one module, so
numba inlines the rig's straight-line code into the loops. The module file is named by a hash
of its text and of every file its compiled code depends on (`SOURCES`), so an edit to any of
them compiles afresh instead of loading a stale kernel from numba's cache. A jitted helper
in another file that the loops call must join `SOURCES`.
"""

from __future__ import annotations

import inspect
from pathlib import Path
from typing import Any

from runtime.kernels import fast
from sim_rigs import kernel
from sim_rigs.rigfile import RigSpec

TEMPLATES = {"law_tick_rig": "@numba.njit(cache=True)",
             "dry_run_loop": "@numba.njit(cache=True)",
             "sweep_kernel": "@numba.njit(parallel=True, cache=True)"}
"""The loops of `runtime.kernels.fast` (and the law tick they call, with the rig's sizes as
constants) compiled per rig, with their numba decorators."""

_ROOT = Path(__file__).resolve().parents[2]
SOURCES = ("runtime/kernels/fast.py", "runtime/kernels/lawtick.py", "runtime/guard/watchdog.py",
           "sim_rigs/kernel.py", "runtime/kernels/rigloops.py")


PRELUDE = ("import runtime.kernels.fast as _fast\n"
           "globals().update({k: v for k, v in vars(_fast).items() if not k.startswith('__')})")
"""The names of `runtime.kernels.fast` the loops use (its placeholders of the plant step
are then replaced by the rig's generated ones, which follow). `fast` imports every name the
templates call from `runtime.kernels.lawtick`, so its namespace is the whole prelude."""


def loops_source() -> str:
    """The loop templates with their numba decorators."""
    parts = []
    for name, deco in TEMPLATES.items():
        parts += ["", "", deco, inspect.getsource(getattr(fast, name))]
    return "\n".join(parts)


_LOADED: dict[int, tuple[RigSpec, Any]] = {}
"""The module of each rig spec object seen (kept alive, so its id stays its own)."""


def compiled(spec: RigSpec) -> Any:
    """The rig's generated module with its plant step and the runtime's loops
    (`plant_step`, `law_tick_rig`, `dry_run_loop`, `sweep_kernel`, ...), once a process per
    rig. The same spec object again is a dictionary lookup: generating and hashing the module's
    text takes milliseconds, and the sweep asks once a slice of plants."""
    hit = _LOADED.get(id(spec))
    if hit is not None and hit[0] is spec:
        return hit[1]
    mod = kernel.load_generated(kernel.module_source(spec, PRELUDE, loops_source()),
                                tuple(_ROOT / rel for rel in SOURCES))
    _LOADED[id(spec)] = (spec, mod)
    return mod
