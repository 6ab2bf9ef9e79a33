"""The connected bench: role drivers plus the few procedures the runner builds from them.

:class:`Station` opens every instrument of a bench file (resolving the ``sim`` placeholder to
an in-process simulated bench's resources), records their IEEE 488.2 identities, and offers
the steps of a run: bring the bus to a voltage, discharge it, change the device, settle a
temperature, fire one pulse train and read the capture. The safe state is
:meth:`Station.make_safe` (:func:`benchrun.runner.safety.make_safe` on these drivers).
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, TypeVar

from benchrun.config.bench import BenchConfig
from benchrun.errors import InstrumentTimeout, RunError
from benchrun.instruments.roles import ChannelTrace, InstrumentIdentity, connect
from benchrun.runner.conditions import StabilityTracker
from benchrun.runner.plan import PulsePlan, SignalRange
from benchrun.runner.safety import Clock, SafeStateReport, make_safe

T = TypeVar("T")

log = logging.getLogger("benchrun.runner")

#: Poll interval while waiting for the bus voltage (simulated or real seconds).
BUS_POLL_S = 0.05

#: Output watchdogs are refreshed this many times per watchdog timeout (wall clock).
WATCHDOG_REFRESHES_PER_TIMEOUT = 4


def resolve_resources(bench: BenchConfig, sim_resources: dict[str, str] | None
                      ) -> dict[str, str]:
    """VISA resource per role, with ``sim`` placeholders replaced by the simulated bench's."""
    resolved = {}
    for role, entry in bench.instruments.items():
        if entry.simulated:
            if not sim_resources or role not in sim_resources:
                raise RunError(f"bench instrument {role!r} is 'sim' but no simulated bench "
                               "is running")
            resolved[role] = sim_resources[role]
        else:
            resolved[role] = entry.resource
    return resolved


@dataclass
class Capture:
    """One acquisition as read from the scope."""

    t_start: float
    dt: float
    traces: dict[str, ChannelTrace]


class Station:
    """Open sessions to every instrument of a bench.

    Parameters
    ----------
    bench
        The bench file.
    resources
        Role → VISA resource string (see :func:`resolve_resources`).
    clock
        Time source for every wait (the simulated bench may run an accelerated clock).
    """

    def __init__(self, bench: BenchConfig, resources: dict[str, str], clock: Clock) -> None:
        self.bench = bench
        self.clock = clock
        self.drivers: dict[str, Any] = {}
        # set before any session opens: close() (called when opening fails) needs them
        self._helpers: ThreadPoolExecutor | None = None
        self._watchdog: _WatchdogRefresher | None = None
        self._watchdog_armed = False
        channel_map = {name: probe.channel for name, probe in bench.probes.items()}
        try:
            for role, entry in bench.instruments.items():
                options = {"channel_map": channel_map} if role == "scope" else {}
                self.drivers[role] = connect(role, resources[role], entry.family,
                                             visa_library=bench.visa_library,
                                             timeout_s=entry.timeout, **options)
        except Exception:
            self.close()
            raise
        self.identities: dict[str, InstrumentIdentity] = {}
        # What was last sent to (or read from) the instruments, so that an unchanged setting
        # costs no round trip. Forgotten after an instrument fault (forget_settings) and
        # whenever any session had to reconnect (the instrument may have restarted).
        self._scope_setup: tuple | None = None
        self._pulse_setup: tuple | None = None
        self._gate: float | None = None
        self._drive: float | None = None
        self._voltage: float | None = None
        self._supply_on = False
        self._pulse_on = False
        self._epoch = self._reconnects()
        #: the serial this station put in the fixture (confirmed with the handler every shot)
        self._selected: str | None = None
        #: wall-clock durations of the last acquisitions (fire to record), for the trigger wait
        self._acquisitions: deque[float] = deque(maxlen=3)

    # --- lifecycle -----------------------------------------------------------------------

    def identify(self) -> dict[str, InstrumentIdentity]:
        """Ask every instrument ``*IDN?``; drain their error queues."""
        for role, driver in self.drivers.items():
            self.identities[role] = driver.identity()
            driver.drain_errors()
            ident = self.identities[role]
            log.info("%s: %s %s s/n %s fw %s at %s (%s)", role, ident.manufacturer,
                     ident.model, ident.serial, ident.firmware, ident.resource, ident.family)
        return dict(self.identities)

    def in_parallel(self, call: Callable[[], T]) -> Future[T]:
        """Run ``call`` on a helper thread (a query to an instrument the caller's thread does
        not talk to meanwhile: every instrument has its own connection, so queries to
        different instruments overlap instead of queueing)."""
        if self._helpers is None:
            self._helpers = ThreadPoolExecutor(max_workers=2, thread_name_prefix="station")
        return self._helpers.submit(call)

    def close(self) -> None:
        if self._watchdog is not None:
            self._watchdog.stop()
            self._watchdog = None
        if self._helpers is not None:
            self._helpers.shutdown(wait=True)
            self._helpers = None
        for driver in self.drivers.values():
            close = getattr(driver.session, "close", None)
            if close is not None:
                close()

    @property
    def scope(self) -> Any:
        return self.drivers["scope"]

    @property
    def pulse(self) -> Any:
        return self.drivers["pulse"]

    @property
    def supply(self) -> Any:
        return self.drivers["supply"]

    @property
    def thermal(self) -> Any | None:
        return self.drivers.get("thermal")

    @property
    def handler(self) -> Any | None:
        return self.drivers.get("handler")

    def _reconnects(self) -> tuple[int, ...]:
        return tuple(int(getattr(d.session, "reconnects", 0)) for d in self.drivers.values())

    def _check_sessions(self) -> None:
        """Forget the remembered settings when any session reconnected since they were
        sent: the instrument may have restarted and lost them."""
        epoch = self._reconnects()
        if epoch != self._epoch:
            log.info("an instrument connection was re-opened: sending every setting again")
            self.forget_settings()
            self._epoch = epoch

    # --- bus -------------------------------------------------------------------------------

    def energise(self, volts: float, *, tolerance: float = 0.01) -> float:
        """Supply on at ``volts``; wait until the measured bus is within tolerance.

        Returns the measured bus voltage. Raises RunError when it is not reached within the
        bench's discharge timeout (the same allowance for charging). The supply's output
        state is asked when the station has not switched it on itself, and again whenever
        the bus is still out of tolerance after one poll (a supply that switched itself off
        is switched on again, as before every shot).
        """
        self._check_sessions()
        self._arm_watchdogs()
        if self._voltage != volts:
            self.supply.set_voltage(volts)
            self._voltage = volts
        if not self._supply_on:
            self._ensure_supply_on()
        band = max(tolerance * volts, 1.0)
        deadline = self.clock.monotonic() + self.bench.safety.discharge_timeout
        polls = 0
        while True:
            measured = self.supply.measure_voltage()
            if abs(measured - volts) <= band:
                return measured
            if self.clock.monotonic() > deadline:
                raise RunError(f"bus voltage {measured:.1f} V did not reach {volts:g} V")
            if polls == 1:
                self._ensure_supply_on()
            polls += 1
            self.clock.sleep(BUS_POLL_S)

    def _arm_watchdogs(self) -> None:
        """Arm the output watchdog of the pulse source and the supply where their command
        tables declare one, before the bus is energised (again after any instrument fault,
        which may have tripped it); a thread refreshes them from then on. If this process
        dies (kill -9, crash) the refreshes stop and the instruments switch their outputs off
        by themselves after the timeout."""
        if self._watchdog_armed:
            return
        drivers = [d for role in ("pulse", "supply")
                   if (d := self.drivers.get(role)) is not None and d.has_watchdog]
        if not drivers:
            return
        for driver in drivers:
            driver.arm_watchdog()
            log.info("%s output watchdog armed: output off after %g s without a refresh",
                     driver.role, driver.table.watchdog_timeout_s)
        self._watchdog_armed = True
        if self._watchdog is None:
            shortest = min(float(d.table.watchdog_timeout_s) for d in drivers)
            self._watchdog = _WatchdogRefresher(drivers,
                                                shortest / WATCHDOG_REFRESHES_PER_TIMEOUT)

    def _ensure_supply_on(self) -> None:
        if not self.supply.is_output_on():
            self.supply.output(True)
        self._supply_on = True

    def discharge(self) -> float:
        """Supply off; wait until the measured bus is touch-safe. Returns the voltage."""
        self._supply_on = False
        self.supply.output(False)
        limit = self.bench.safety.touch_safe_voltage
        deadline = self.clock.monotonic() + self.bench.safety.discharge_timeout
        while True:
            measured = self.supply.measure_voltage()
            if abs(measured) < limit:
                return measured
            if self.clock.monotonic() > deadline:
                raise RunError(f"bus still at {measured:.1f} V after "
                               f"{self.bench.safety.discharge_timeout:g} s with the supply off")
            self.clock.sleep(BUS_POLL_S)

    # --- devices and temperature -------------------------------------------------------------

    def devices(self) -> list[str]:
        """Serials the handler holds."""
        if self.handler is None:
            return []
        return list(self.handler.list_devices())

    def select(self, serial: str) -> None:
        """Put ``serial`` in the fixture; the bus is discharged first (no handling live).

        When this station put ``serial`` in the fixture itself, nothing is asked here: every
        shot confirms the device with the handler (:meth:`is_selected`, asked while the bus is
        set up) and selects it again when the handler reports another one.
        """
        if self.handler is None or self._selected == serial:
            return
        self._selected = None
        if self.handler.selected() == serial:
            self._selected = serial
            return
        self._pulse_on = False
        self.pulse.output(False)
        volts = self.discharge()
        log.info("bus at %.1f V; handler selects %s", volts, serial)
        self.handler.select(serial)
        self._voltage = None
        self._selected = serial

    def is_selected(self, serial: str) -> bool:
        """Whether the handler reports ``serial`` in the fixture (True without a handler).
        A False forgets the remembered selection, so the next :meth:`select` moves it."""
        if self.handler is None:
            return True
        if self.handler.selected() == serial:
            return True
        self._selected = None
        return False

    def settle(self, kelvin: float, *, band: float, dwell: float, soak: float,
               timeout: float, poll: float,
               on_reading: Callable[[float], None] | None = None) -> float:
        """Set the temperature, wait until stable within ``band`` for ``dwell``, then soak.

        The stability logic is never skipped; on the simulated bench it simply runs on the
        accelerated clock. Raises RunError when the temperature does not settle in time.
        """
        thermal = self.thermal
        if thermal is None:
            return kelvin
        thermal.set_temperature(kelvin)
        thermal.output(True)
        tracker = StabilityTracker(kelvin, band, dwell)
        start = self.clock.monotonic()
        reading = thermal.measure_temperature()
        while True:
            now = self.clock.monotonic()
            reading = thermal.measure_temperature()
            if on_reading is not None:
                on_reading(reading)
            if tracker.update(now, reading):
                break
            if now - start > timeout:
                raise RunError(
                    f"temperature did not settle at {kelvin - 273.15:g} degC within "
                    f"{timeout:g} s (last reading {reading - 273.15:.2f} degC, band "
                    f"{band:g} K)")
            self.clock.sleep(poll)
        log.info("stable at %.2f degC after %.0f s; soaking %.0f s", reading - 273.15,
                 self.clock.monotonic() - start, soak)
        end = self.clock.monotonic() + soak
        while self.clock.monotonic() < end:
            self.clock.sleep(min(poll, end - self.clock.monotonic()))
        return thermal.measure_temperature()

    def temperature(self) -> float | None:
        """Measured device temperature, K (None without a thermal controller)."""
        return None if self.thermal is None else self.thermal.measure_temperature()

    # --- one shot ------------------------------------------------------------------------------

    def configure_scope(self, plan: PulsePlan, ranges: dict[str, SignalRange],
                        bus_voltage_V: float) -> None:
        """Ranges, sampling and trigger; only sent when they changed."""
        self._check_sessions()
        probes = self.bench.probes
        channels = {name: (r.span, r.center, probes[name].scale) for name, r in ranges.items()}
        # trigger on the first turn-on: the diode voltage falls to -VR when the switch closes
        setup = (tuple(sorted(channels.items())), plan.sample_interval_s, plan.points,
                 plan.record_start_s, -0.5 * bus_voltage_V)
        if setup == self._scope_setup:
            return
        self.scope.configure(channels, plan.sample_interval_s, plan.points,
                             plan.record_start_s, "diode_voltage", -0.5 * bus_voltage_V,
                             "falling")
        self._scope_setup = setup

    def configure_pulse(self, plan: PulsePlan, gate_resistance_ohm: float | None,
                        drive_V: float | None = None, *, single: bool = False) -> None:
        """Pulse timing, gate resistance and (when given) the turn-on drive voltage; only
        sent when they changed."""
        self._check_sessions()
        if gate_resistance_ohm is not None and gate_resistance_ohm != self._gate:
            self.pulse.set_gate_resistance(gate_resistance_ohm)
            self._gate = gate_resistance_ohm
        if drive_V is not None and drive_V != self._drive:
            self.pulse.set_drive_voltage(drive_V)
            self._drive = drive_V
        setup = (plan.first_pulse_s, 0.0, 0.0) if single else (
            plan.first_pulse_s, plan.off_time_s, plan.second_pulse_s)
        if setup != self._pulse_setup:
            self.pulse.configure(*setup)
            self._pulse_setup = setup

    def fire(self, channels: list[str], trigger_timeout_s: float, *,
             before_fire: Callable[[], None] | None = None,
             on_fired: Callable[[], None] | None = None) -> Capture:
        """Arm, fire, wait for the trigger and read every channel.

        ``before_fire`` is called once the scope is armed, just before the fire command (the
        last chance to hold the shot back); ``on_fired`` the moment the fire command has been
        sent. The pulse output is asked for (and switched on) unless the station switched it
        on itself since the last fault or reconnect.
        """
        self._check_sessions()
        self.scope.arm_single()
        self._check_sessions()  # arming may have re-opened a connection
        if not self._pulse_on:
            if not self.pulse.is_output_on():
                self.pulse.output(True)
            self._pulse_on = True
        if before_fire is not None:
            before_fire()
        self.pulse.fire()
        fired = time.monotonic()
        if on_fired is not None:
            on_fired()
        expected = min(self._acquisitions) if self._acquisitions else None
        if not self.scope.wait_triggered(trigger_timeout_s, expected_s=expected, since=fired):
            raise InstrumentTimeout(f"the scope did not trigger within {trigger_timeout_s:g} s "
                                    "of firing")
        self._acquisitions.append(time.monotonic() - fired)
        traces = self.scope.read_channels(channels)
        first = next(iter(traces.values()))
        return Capture(first.t_start, first.dt, traces)

    def forget_settings(self) -> None:
        """After an instrument fault: send (or ask) every setting again before the next
        shot."""
        self._scope_setup = None
        self._pulse_setup = None
        self._gate = None
        self._drive = None
        self._voltage = None
        self._supply_on = False
        self._pulse_on = False
        self._selected = None
        self._acquisitions.clear()
        self._watchdog_armed = False  # a fault may have tripped it: armed again when energising

    # --- safe state -----------------------------------------------------------------------------

    def make_safe(self) -> SafeStateReport:
        """Pulse output off, supply off, wait for a touch-safe bus (never raises)."""
        self.forget_settings()
        extra = ()
        if self.thermal is not None:
            thermal = self.thermal
            extra = (lambda: thermal.output(False),)
        return make_safe(
            # switched off and read back: a command lost on the way must not pass for done
            self.pulse.switch_off if "pulse" in self.drivers else None,
            self.supply.switch_off if "supply" in self.drivers else None,
            (lambda: self.supply.measure_voltage()) if "supply" in self.drivers else None,
            touch_safe_V=self.bench.safety.touch_safe_voltage,
            timeout_s=self.bench.safety.discharge_timeout,
            clock=self.clock,
            poll_s=BUS_POLL_S * 4,
            extra_off=extra,
        )


class _WatchdogRefresher:
    """Refreshes output watchdogs every ``interval_s`` wall-clock seconds on its own thread
    (the sessions serialise it with the run's own commands). A failed refresh is logged and
    tried again at the next interval: the instrument's timeout is the safety net."""

    def __init__(self, drivers: list[Any], interval_s: float) -> None:
        self._drivers = drivers
        self._interval = interval_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="watchdog-refresh",
                                        daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        while not self._stop.wait(self._interval):
            for driver in self._drivers:
                try:
                    driver.refresh_watchdog()
                except Exception as exc:  # logged; the next refresh tries again
                    log.debug("watchdog refresh of %s failed: %s", driver.role, exc)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=5.0)
