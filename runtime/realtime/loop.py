"""The real-time loop: one tick, the tasks around it, and link construction.

One tick (`TickCore.step`): operator requests -> estimate x from the sample
-> supervisor (settling hold, engaged adaptive law, fallback law) ->
watchdog (every rule; a trip hands over to its fallback in the SAME tick)
-> command -> record (tick row to the run log through the non-blocking
writer, a preallocated ring of recent rows for the pre-trip capture,
decimated telemetry). Nothing here waits on disk, the screen or the network:
trip records, post captures and operator events go to a writer thread that
appends them to the trip log (each fsynced).

Clocking (`Runner`): a `sim_rigs.link.SimLink` is host-clocked (the
`runtime.realtime.clock.DeadlineClock` thread runs the tick at absolute deadlines and
steps the simulated physics one period after each command); any other link
is rig-clocked (an asyncio task awaits each sample, ticks, sends). The
runner's tasks (tick, telemetry socket, duration timer) live in one asyncio
TaskGroup; stopping is one event, and a crash in the tick turns the outputs
off before the error propagates.

The code lives in parts, one job each; this module re-exports their public names so
``from runtime.realtime.loop import Runner, RunSettings`` keeps working:
`runtime.realtime.tick` (TickCore, the tick order; its parts are listed there),
`runtime.realtime.runner` (Runner, the rig lock), `runtime.realtime.settings` (RunSettings
and the start-up settings), `runtime.realtime.links` (make_link, the link helpers),
`runtime.realtime.law_adapter` (LawAdapter), `runtime.realtime.capture` (the tick row, the
trip capture). What does not live here: the law (`runtime.method.law`), rules
(`runtime.guard.watchdog`), modes (`runtime.guard.supervisor`), fallbacks
(`runtime.guard.fallback`), files (`runtime.records.logs`).
"""

from runtime.realtime.law_adapter import LawAdapter
from runtime.realtime.links import (
    command_timeout,
    is_simulated,
    link_stats_now,
    loss_detail,
    make_link,
)
from runtime.realtime.runner import EXIT_INTERNAL_TRIP, RigBusy, RigLock, Runner
from runtime.realtime.settings import (
    RunSettings,
    TickSettings,
    log_dir_from_config,
    mqtt_telemetry_settings,
    operator_settings,
)
from runtime.realtime.tick import TickCore

__all__ = ["EXIT_INTERNAL_TRIP", "LawAdapter", "RigBusy", "RigLock", "RunSettings", "Runner",
           "TickCore", "TickSettings", "command_timeout", "is_simulated", "link_stats_now",
           "log_dir_from_config", "loss_detail", "make_link", "mqtt_telemetry_settings",
           "operator_settings"]
