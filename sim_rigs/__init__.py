"""Simulated rigs: rig descriptions as data, one plant, in-process and served as devices.

A simulated rig is a rig file (`sim_rigs.rigfile`: states, inputs, units, limits,
nominal model, truth as a table of named terms, sensors, uncertainty ranges). The
built-in rigs are files in ``sim_rigs/rigs/``; `RIGS` maps their names to their
`RigSpec`. `sim_rigs.plant` is the batched numpy reference of plant and sensors,
`sim_rigs.kernel` the one compiled kernel interpreting the same term table.
"""

from __future__ import annotations

from sim_rigs.rigfile import RigFileError, RigSpec, builtin_names, resolve_rig

RIGS: dict[str, RigSpec] = {name: resolve_rig(name) for name in builtin_names()}

__all__ = ["RIGS", "RigFileError", "RigSpec", "builtin_names", "resolve_rig"]
