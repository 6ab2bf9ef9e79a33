"""Faults the simulated instruments can be told to show, switchable at run time.

Every simulated instrument owns one :class:`FaultSwitches`; tests reach it through
``SimulatedBench.faults[role]``::

    bench.faults["scope"].set(delay_s=1.0)          # answers arrive 1 s late
    bench.faults["supply"].set(drop_connections=1)  # next command: the connection drops once
    bench.faults["scope"].set(garble_block_header=True)
    bench.faults["pulse"].inject_errors([(-222, "width")])
    bench.faults["scope"].clear()

Switches
--------
delay_s
    Wait this long before sending each answer (a delayed answer past the driver's timeout).
drop_connections
    Close the connection on receipt of the next N commands (-1: every command, i.e. the
    instrument keeps dropping; the driver's single reconnect then fails the operation).
garble_block_header
    Binary block answers start with a corrupt header (``#X`` instead of ``#<n>``).
truncate_block
    Binary block answers carry only half the announced payload, then stall.
no_trigger
    The scope ignores triggers: an armed acquisition never completes.
thermal_no_settle
    The thermal controller's temperature keeps oscillating around the setpoint.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field, fields, replace


@dataclass(frozen=True)
class FaultState:
    """A snapshot of one instrument's fault switches (see module docstring)."""

    delay_s: float = 0.0
    drop_connections: int = 0
    garble_block_header: bool = False
    truncate_block: bool = False
    no_trigger: bool = False
    thermal_no_settle: bool = False
    pending_errors: tuple[tuple[int, str], ...] = field(default=())


class FaultSwitches:
    """Thread-safe fault switches of one simulated instrument."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._state = FaultState()

    @property
    def state(self) -> FaultState:
        with self._lock:
            return self._state

    def set(self, **switches: object) -> None:
        """Set one or more switches (names as :class:`FaultState` fields)."""
        known = {f.name for f in fields(FaultState)} - {"pending_errors"}
        unknown = set(switches) - known
        if unknown:
            raise ValueError(f"unknown fault switches {sorted(unknown)}; known: {sorted(known)}")
        with self._lock:
            self._state = replace(self._state, **switches)  # type: ignore[arg-type]

    def clear(self) -> None:
        """Switch every fault off and forget pending error entries."""
        with self._lock:
            self._state = FaultState()

    def inject_errors(self, entries: list[tuple[int, str]]) -> None:
        """Queue SCPI error entries; they appear in the instrument's error queue with the
        next command it receives."""
        with self._lock:
            self._state = replace(self._state,
                                  pending_errors=self._state.pending_errors + tuple(entries))

    def take_pending_errors(self) -> tuple[tuple[int, str], ...]:
        with self._lock:
            pending = self._state.pending_errors
            if pending:
                self._state = replace(self._state, pending_errors=())
            return pending

    def take_drop(self) -> bool:
        """True when this command should drop the connection (counts down a finite number)."""
        with self._lock:
            n = self._state.drop_connections
            if n == 0:
                return False
            if n > 0:
                self._state = replace(self._state, drop_connections=n - 1)
            return True
