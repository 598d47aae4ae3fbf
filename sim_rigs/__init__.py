"""Simulated rigs, in-process and (later) served as devices.

`RIGS` maps a config name (``rig.sim``) to a `RigSpec`: the rig's state and
input names, units, limits, nominal linear model and its true-plant
parameters. The numeric models live in one module per rig (`pedestal`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from sim_rigs import pedestal


@dataclass(frozen=True)
class RigSpec:
    """What corral needs to know about a simulated rig."""

    name: str
    description: str
    states: tuple[str, ...]
    state_units: tuple[str, ...]
    inputs: tuple[str, ...]
    input_units: tuple[str, ...]
    input_limits: tuple[float, ...]
    nominal_model: Callable[[], tuple[NDArray[np.float64], NDArray[np.float64],
                                      NDArray[np.float64]]]
    truth_defaults: dict[str, float]
    param_units: dict[str, str]


RIGS: dict[str, RigSpec] = {
    "pedestal": RigSpec(
        name="pedestal",
        description="two-axis pan-tilt pointing pedestal (azimuth, elevation), 12 V gearmotors",
        states=pedestal.STATES,
        state_units=pedestal.STATE_UNITS,
        inputs=pedestal.INPUTS,
        input_units=pedestal.INPUT_UNITS,
        input_limits=pedestal.INPUT_LIMITS,
        nominal_model=pedestal.nominal_model,
        truth_defaults=pedestal.TRUTH_DEFAULTS,
        param_units=pedestal.PARAM_UNITS,
    ),
}
