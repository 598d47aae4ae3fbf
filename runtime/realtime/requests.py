"""Operator requests (`OperatorRequests`): arm, disarm, stop, clear, reset from the socket,
MQTT or the runner, queued from any thread and decided at the start of the next tick."""

from __future__ import annotations

import threading
from collections.abc import Callable

from runtime.guard.supervisor import Supervisor
from runtime.guard.watchdog import Watchdog
from runtime.realtime.events import EventLog
from runtime.realtime.handover import Handover

Reply = Callable[[bool, str], None]


class OperatorRequests:
    """The queue of operator requests and the mode changes they make.

    The supervisor decides (`runtime.guard.supervisor.Supervisor.request`, with the
    watchdog's present conditions); this part carries out the handover it asks for and
    records the events.
    """

    def __init__(self, sup: Supervisor, watchdog: Watchdog, handover: Handover,
                 events: EventLog) -> None:
        self.sup = sup
        self.watchdog = watchdog
        self.handover = handover
        self.events = events
        self.pending: list[tuple[str, Reply]] = []
        self._lock = threading.Lock()
        self.arm_refusal: str | None = None
        """When set, every arm request is refused with this reason (preflight NO-GO)."""

    def submit(self, op: str, reply: Reply) -> None:
        """Queue an operator request (thread-safe); it is handled at the next tick."""
        with self._lock:
            self.pending.append((op, reply))

    def handle_pending(self) -> None:
        """Decide every request queued since the last tick, in order."""
        if self.pending:
            with self._lock:
                reqs, self.pending = self.pending, []
            for op, reply in reqs:
                self._handle(op, reply)

    def _handle(self, op: str, reply: Reply) -> None:
        sup = self.sup
        if op == "arm" and self.arm_refusal is not None:
            decision = sup.refuse(op, self.arm_refusal)
            self.events.drain(sup)
            reply(decision.ok, decision.message)
            return
        decision = sup.request(op, self.watchdog.conditions_present())
        if decision.action is not None:
            if decision.action == "outputs_off" or sup.mode == "stopped":
                self.handover.outputs_off()
            else:
                self.handover.start(decision.action)
        if decision.enter_settling:
            self.handover.clear()  # a fresh bumpless hold starts this tick
        self.events.drain(sup)
        reply(decision.ok, decision.message)
