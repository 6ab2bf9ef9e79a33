"""Output watchdog of the simulated pulse source and supply (``WDOG:TIMeout``/``WDOG:REFResh``,
our own headers: SCPI-1999 defines none)."""

from __future__ import annotations

import time
from typing import Any


class OutputWatchdog:
    """An instrument's output watchdog, on the wall clock (a hardware timer: it does not run
    on the bench's accelerated clock).

    ``WDOG:TIMeout <s>`` (``watchdog_timeout``) arms it (0 disarms), ``WDOG:REFResh``
    (``watchdog_refresh``) restarts it. When ``timeout`` passes without a refresh, the output
    is switched off *as of that instant* (:meth:`expired_at`): the instrument checks before
    every message it handles and whenever the bench asks for its state, so a bench nobody
    talks to any more is found with its output off from the moment the timeout ran out.
    """

    def __init__(self) -> None:
        self.timeout_s = 0.0
        self.last_refresh = time.monotonic()

    def arm(self, seconds: float) -> None:
        self.timeout_s = seconds
        self.last_refresh = time.monotonic()

    def refresh(self) -> None:
        self.last_refresh = time.monotonic()

    def expired_at(self) -> float | None:
        """Wall-clock instant the timeout ran out, or None (disarmed or refreshed in time)."""
        if self.timeout_s <= 0:
            return None
        deadline = self.last_refresh + self.timeout_s
        return deadline if time.monotonic() >= deadline else None


class WatchdogMixin:
    """``op_watchdog_*`` for an instrument with ``output_on``; subclasses implement
    :meth:`_watchdog_off` (switch the output off as of a past wall-clock instant)."""

    watchdog: OutputWatchdog
    output_on: bool
    bench: Any

    def check_watchdog(self) -> None:
        expired = self.watchdog.expired_at()
        if expired is not None:
            self.watchdog.timeout_s = 0.0  # tripped: disarmed until armed again
            if self.output_on:
                self._watchdog_off(expired)

    def _watchdog_off(self, wall_instant: float) -> None:
        self.output_on = False

    def _bench_time(self, wall_instant: float) -> float:
        """Bench time of a past wall-clock instant (the bench clock may be accelerated)."""
        speedup = float(getattr(self.bench, "clock_speedup", 1.0))
        return self.bench.now() - (time.monotonic() - wall_instant) * speedup

    def op_watchdog_timeout(self, seconds: float) -> None:
        self.watchdog.arm(seconds)

    def read_watchdog_timeout(self) -> dict[str, Any]:
        return {"seconds": self.watchdog.timeout_s}

    def op_watchdog_refresh(self) -> None:
        self.watchdog.refresh()
