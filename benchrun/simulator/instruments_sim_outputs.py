"""The simulated pulse generator, bus supply, thermal controller and device handler.

State machines driven by their families' command tables, like the simulated scope
(:mod:`benchrun.simulator.instruments_sim`, which holds the shared message handling, error
queue and :class:`~benchrun.simulator.instruments_sim.BenchLink`).
"""

from __future__ import annotations

import math
from typing import Any

from benchrun.simulator.instruments_sim import Block, SimInstrument, SimScope
from benchrun.simulator.watchdog import OutputWatchdog, WatchdogMixin


class SimPulseSource(WatchdogMixin, SimInstrument):
    """Two-pulse gate driver; firing asks the bench to run the shot."""

    role = "pulse"

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.watchdog = OutputWatchdog()
        super().__init__(*args, **kwargs)

    def handle(self, message: str) -> list[str | Block]:
        with self.bench.lock:
            self.check_watchdog()
        return super().handle(message)

    def reset_state(self) -> None:
        self.count = 2
        self.first = 10e-6
        self.gap = 5e-6
        self.second = 2e-6
        self.gate_resistance = 10.0
        #: turn-on drive voltage; None = the simulated switch's own (15 V)
        self.drive_voltage: float | None = None
        self.output_on = False
        self.shots = 0

    def op_pulse_count(self, count: int) -> None:
        self.count = count

    def op_first_width(self, width: float) -> None:
        self.first = width

    def op_off_time(self, gap: float) -> None:
        self.gap = gap

    def op_second_width(self, width: float) -> None:
        self.second = width

    def op_gate_resistance(self, ohm: float) -> None:
        self.gate_resistance = ohm

    def read_pulse_count(self) -> dict[str, Any]:
        return {"count": self.count}

    def read_first_width(self) -> dict[str, Any]:
        return {"width": self.first}

    def read_off_time(self) -> dict[str, Any]:
        return {"gap": self.gap}

    def read_second_width(self) -> dict[str, Any]:
        return {"width": self.second}

    def read_gate_resistance(self) -> dict[str, Any]:
        return {"ohm": self.gate_resistance}

    def op_drive_voltage(self, volts: float) -> None:
        self.drive_voltage = volts

    def read_drive_voltage(self) -> dict[str, Any]:
        return {"volts": 15.0 if self.drive_voltage is None else self.drive_voltage}

    def op_output(self, state: bool) -> None:
        self.output_on = state

    def op_output_state(self) -> bool:
        return self.output_on

    def op_fire(self) -> None:
        if not self.output_on:
            self.push_error(-221, "output off")
            return
        timing = (self.first, self.gap, self.second) if self.count == 2 else (self.first, 0.0, 0.0)
        problem = self.bench.fire(timing, self.gate_resistance, self.drive_voltage)
        if problem:
            self.push_error(-221, problem)
            return
        self.shots += 1


# --- bus supply --------------------------------------------------------------------------------


class SimBusSupply(WatchdogMixin, SimInstrument):
    """DC supply charging the bus capacitor at its current limit; a bleeder discharges it.

    While the output is on the bus voltage ramps at ``I_limit / C`` towards the setpoint;
    after output off it decays as ``V0·exp(-t/(R_bleed·C))`` (RC discharge), both on the
    bench's accelerated clock.
    """

    role = "supply"

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.watchdog = OutputWatchdog()
        self._v_ref = 0.0
        self._t_ref = 0.0
        self.output_on = False
        self.setpoint = 0.0
        self.current_limit = 1.0
        super().__init__(*args, **kwargs)

    def reset_state(self) -> None:
        self._rebase()
        self.setpoint = 0.0
        self.current_limit = 1.0
        self.output_on = False

    def handle(self, message: str) -> list[str | Block]:
        with self.bench.lock:
            self.check_watchdog()
        return super().handle(message)

    def _watchdog_off(self, wall_instant: float) -> None:
        """Output off as of the instant the watchdog ran out: the bus has been discharging
        through the bleeder since then."""
        t_off = min(self._bench_time(wall_instant), self.bench.now())
        self._v_ref = self.bus_voltage(max(t_off, self._t_ref), check=False)
        self._t_ref = max(t_off, self._t_ref)
        self.output_on = False

    def bus_voltage(self, t: float | None = None, *, check: bool = True) -> float:
        """Bus voltage at simulated time ``t`` (now by default)."""
        if check:
            self.check_watchdog()
        t = self.bench.now() if t is None else t
        elapsed = max(t - self._t_ref, 0.0)
        c = self.bench.bus_capacitance()
        if self.output_on:
            rate = self.current_limit / c
            if self._v_ref <= self.setpoint:
                return min(self.setpoint, self._v_ref + rate * elapsed)
            # above the setpoint: the bleeder pulls the bus down to it
            tau = self.bench.bleeder_ohm() * c
            return max(self.setpoint, self._v_ref * math.exp(-elapsed / tau))
        tau = self.bench.bleeder_ohm() * c
        return self._v_ref * math.exp(-elapsed / tau)

    def _rebase(self) -> None:
        now = self.bench.now()
        self._v_ref = self.bus_voltage(now)
        self._t_ref = now

    def read_voltage(self) -> dict[str, Any]:
        return {"volts": self.setpoint}

    def read_current_limit(self) -> dict[str, Any]:
        return {"amps": self.current_limit}

    def op_voltage(self, volts: float) -> None:
        self._rebase()
        self.setpoint = volts

    def op_current_limit(self, amps: float) -> None:
        self._rebase()
        self.current_limit = amps

    def op_output(self, state: bool) -> None:
        self._rebase()
        self.output_on = state

    def op_output_state(self) -> bool:
        return self.output_on

    def op_measure_voltage(self) -> float:
        return round(self.bus_voltage(), 3)

    def op_measure_current(self) -> float:
        if not self.output_on:
            return 0.0
        charging = self.bus_voltage() < self.setpoint - 1e-6
        bleed = self.bus_voltage() / self.bench.bleeder_ohm()
        return round(self.current_limit if charging else bleed, 6)


# --- thermal controller ------------------------------------------------------------------------


class SimThermalController(SimInstrument):
    """First-order thermal lag towards the setpoint (ambient when the output is off).

    ``T(t) = T_target + (T0 - T_target)·exp(-t/tau)`` on the accelerated clock. With the
    ``thermal_no_settle`` fault the reading oscillates ±``no_settle_amplitude_K`` around it.
    """

    role = "thermal"
    ambient_K = 298.15
    tau_s = 60.0
    no_settle_amplitude_K = 4.0
    no_settle_period_s = 40.0

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self._t_ref = 0.0
        self._temp_ref = self.ambient_K
        self.setpoint = self.ambient_K
        self.output_on = False
        super().__init__(*args, **kwargs)

    def reset_state(self) -> None:
        self._rebase()
        self.setpoint = self.ambient_K
        self.output_on = False

    def _target(self) -> float:
        return self.setpoint if self.output_on else self.ambient_K

    def _lag(self, t: float) -> float:
        elapsed = max(t - self._t_ref, 0.0)
        target = self._target()
        return target + (self._temp_ref - target) * math.exp(-elapsed / self.tau_s)

    def temperature(self, t: float | None = None) -> float:
        """Device temperature at simulated time ``t``, K."""
        t = self.bench.now() if t is None else t
        value = self._lag(t)
        if self.faults.state.thermal_no_settle:
            phase = 2 * math.pi * t / self.no_settle_period_s
            value += self.no_settle_amplitude_K * math.sin(phase)
        return value

    def _rebase(self) -> None:
        now = self.bench.now()
        self._temp_ref = self._lag(now)
        self._t_ref = now

    def op_setpoint(self, kelvin: float) -> None:
        self._rebase()
        self.setpoint = kelvin

    def read_setpoint(self) -> dict[str, Any]:
        return {"kelvin": self.setpoint}

    def op_output_state(self) -> bool:
        return self.output_on

    def op_measure_temperature(self) -> float:
        return round(self.temperature(), 3)

    def op_output(self, state: bool) -> None:
        self._rebase()
        self.output_on = state


# --- handler -----------------------------------------------------------------------------------


class SimHandler(SimInstrument):
    """Device carousel: places one device of the virtual lot in the fixture."""

    role = "handler"

    def reset_state(self) -> None:
        self.selected: str | None = None

    def op_list_devices(self) -> list[str]:
        return self.bench.device_serials()

    def op_select(self, serial: str) -> None:
        if serial.upper() == "NONE":
            self.selected = None
            return
        if serial not in self.bench.device_serials():
            self.push_error(-224, f"no device {serial}")
            return
        self.selected = serial

    def op_selected(self) -> str:
        return self.selected or "NONE"

    def op_device_identity(self, serial: str) -> list[str]:
        if serial not in self.bench.device_serials():
            self.push_error(-224, f"no device {serial}")
            return ["UNKNOWN", "UNKNOWN"]
        found = self.bench.device_identity(serial)
        return list(found) if found is not None else ["UNKNOWN", "UNKNOWN"]


SIM_CLASSES: dict[str, type[SimInstrument]] = {
    "scope": SimScope,
    "pulse": SimPulseSource,
    "supply": SimBusSupply,
    "thermal": SimThermalController,
    "handler": SimHandler,
}
