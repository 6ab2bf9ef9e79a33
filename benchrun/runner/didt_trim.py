"""di/dt as a runner-controlled condition: the setting per test point, its trim and its misses.

A test point that asks for a di/dt (``didt:`` in the sequence) gets its gate-drive setting
from the fixture's declared means (``fixture.gate_drive`` of the bench file,
:mod:`benchrun.config.gate_drive`) and the model of :mod:`benchrun.runner.didt`:

1. before the point's first graded shot, :func:`benchrun.runner.didt.control_didt` picks the
   setting the model gives for the target and fires *trim shots* (full double pulses at the
   trimmed first pulse, nothing stored as a result) until the di/dt measured on them by
   :func:`benchrun.runner.didt.commutation_didt` is within the sequence's di/dt tolerance;
   the model learnt there seeds the next point;
2. when the trim cannot get there (discrete resistors bracketing the target, the drive voltage
   at the end of its range, no measurable commutation), the point is *invalid* with the
   reason: none of its graded shots is fired;
3. a graded shot whose measured di/dt still falls outside the tolerance makes the runner
   learn from it and choose again: a different setting is trimmed and verified afresh before
   the retry; when the model's choice is the setting that just missed, the point is invalid
   (the same setting is never fired again for a miss).

A point that gives ``gate_resistance:`` instead is fired at that resistance (and the fixed
drive voltage) without a trim, as before. Pure bookkeeping: the shots are fired by the cycle
(:mod:`benchrun.runner.cycle`).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from benchrun.config.gate_drive import GateDriveSpec
from benchrun.records import TestPoint
from benchrun.runner.didt import DidtModel, DidtSetting, commutation_didt, control_didt
from benchrun.runner.safety import check_shot

if TYPE_CHECKING:
    from benchrun.runner.station import Capture

log = logging.getLogger("benchrun.runner")

#: Trim shots per di/dt trim (each one is a full double pulse).
MAX_DIDT_TRIMS = 4
#: Times a point's setting is chosen again after graded shots missed the tolerance.
MAX_RECHOICES = 1


@dataclass
class PointDrive:
    """The gate-drive state of one test point that asks for a di/dt."""

    target_A_per_s: float
    setting: DidtSetting | None = None
    measured_A_per_s: float | None = None
    valid: bool = False
    reason: str = ""
    trim_shots: int = 0
    rechoices: int = 0
    #: (gate resistance, drive voltage, measured di/dt) of every trim shot
    history: list[tuple[float, float, float | None]] = field(default_factory=list)

    def record(self) -> dict[str, Any]:
        """What ``run.json`` keeps about the point (``didt_control``)."""
        return {
            "target_A_per_s": self.target_A_per_s,
            "gate_resistance_ohm": None if self.setting is None
            else self.setting.gate_resistance_ohm,
            "gate_drive_V": None if self.setting is None else self.setting.drive_V,
            "measured_A_per_s": self.measured_A_per_s, "valid": self.valid,
            "reason": self.reason, "trim_shots": self.trim_shots,
            "trims": [list(h) for h in self.history],
        }


class DidtControl:
    """Gate-drive settings of a run's test points (module docstring)."""

    def __init__(self, gate: GateDriveSpec | None, tolerance: float,
                 max_trims: int = MAX_DIDT_TRIMS) -> None:
        self.gate = gate
        self.tolerance = tolerance
        self.max_trims = max_trims
        self.model = None if gate is None else DidtModel(
            gate.model_k, gate.threshold_voltage, gate.transconductance)
        self.points: dict[int, PointDrive] = {}
        self._trimmed: set[int] = set()

    # --- the setting of a shot ---------------------------------------------------------

    def _choose(self) -> dict[str, Any]:
        gate = self.gate
        assert gate is not None
        if gate.sets_drive_voltage:
            return {"resistors_ohm": gate.resistors, "drive_range_V": gate.drive_voltage_range}
        return {"resistors_ohm": gate.resistors, "drive_V": gate.drive_voltage}

    def setting(self, point: TestPoint) -> DidtSetting | None:
        """The gate setting a graded shot of ``point`` is fired with (None: the pulse
        generator's own, for a point that names neither a di/dt nor a resistance)."""
        if point.didt_A_per_s is None:
            if point.gate_resistance_ohm is None:
                return None
            drive = (self.gate.drive_voltage if self.gate is not None else None)
            return DidtSetting(point.gate_resistance_ohm, drive or 0.0)
        state = self.points.get(point.index)
        if state is not None and state.setting is not None:
            return state.setting
        if self.model is None:
            return None
        # not trimmed yet: the model's first choice (the first pulse is trimmed at it)
        return self.model.choose(point.didt_A_per_s, point.forward_current_A,
                                 **self._choose())

    def needs_trim(self, point: TestPoint) -> bool:
        """Whether ``point`` asks for a di/dt whose setting is not trimmed yet."""
        return point.didt_A_per_s is not None and point.index not in self._trimmed

    def invalid_reason(self, point: TestPoint) -> str | None:
        """Why ``point`` cannot be fired (its di/dt cannot be set within tolerance)."""
        state = self.points.get(point.index)
        if point.didt_A_per_s is None or state is None or state.valid:
            return None
        return state.reason or "di/dt not set"

    # --- trim ----------------------------------------------------------------------------

    def trim(self, point: TestPoint, fire: Callable[[DidtSetting], float | None]) -> PointDrive:
        """Choose and trim the setting of ``point`` with trim shots ``fire(setting) ->
        measured di/dt``; the model learnt from them carries over to the next point."""
        target = float(point.didt_A_per_s or 0.0)
        state = self.points.setdefault(point.index, PointDrive(target))
        self._trimmed.add(point.index)
        if self.model is None:
            state.valid = False
            state.reason = ("the bench file's fixture declares no way to set di/dt "
                            "(fixture.gate_drive)")
            return state
        avoid = state.setting if state.rechoices else None

        def counted(setting: DidtSetting) -> float | None:
            measured = fire(setting)
            state.trim_shots += 1
            state.history.append((setting.gate_resistance_ohm, setting.drive_V, measured))
            return measured

        model = self.model
        if avoid is not None and model.choose(target, point.forward_current_A,
                                              **self._choose()) == avoid:
            state.valid = False
            state.reason = (f"di/dt missed on graded shots at {_text(avoid)} and the model "
                            "gives no other setting for the target")
            return state
        outcome = control_didt(target, point.forward_current_A, counted, model,
                               tolerance=self.tolerance, max_trims=self.max_trims,
                               **self._choose())
        for setting, measured in outcome.shots:
            if measured is not None:
                model = model.learn(setting, point.forward_current_A, measured)
        self.model = model
        state.setting = outcome.setting
        state.measured_A_per_s = outcome.measured_A_per_s
        state.valid = outcome.valid
        state.reason = outcome.reason
        log.info("di/dt trim %s: %s gave %s (target %.4g A/us) after %d trim shot(s)%s",
                 point.label, _text(outcome.setting),
                 "no measurement" if outcome.measured_A_per_s is None
                 else f"{outcome.measured_A_per_s / 1e6:.4g} A/us", target / 1e6,
                 len(outcome.shots), "" if outcome.valid else f": invalid, {outcome.reason}")
        return state

    def missed(self, point: TestPoint, measured: float | None) -> bool:
        """A graded shot of ``point`` measured ``measured`` outside the tolerance: learn
        from it and let the next shot trim a new setting. Returns whether a retry may be
        fired (False: the point is invalid, its reason set)."""
        state = self.points.get(point.index)
        if point.didt_A_per_s is None or state is None or state.setting is None:
            return True
        if state.rechoices >= MAX_RECHOICES:
            state.valid = False
            state.reason = (f"di/dt {_rate(measured)} on a graded shot outside "
                            f"{100 * self.tolerance:g} % of {_rate(state.target_A_per_s)} "
                            "again after the setting was chosen anew")
            return False
        state.rechoices += 1
        if measured is not None and self.model is not None:
            self.model = self.model.learn(state.setting, point.forward_current_A, measured)
        self._trimmed.discard(point.index)
        return True

    def record(self) -> dict[str, Any]:
        """``run.json`` ``didt_control``: how di/dt is set and every point's outcome."""
        return {
            "means": None if self.gate is None else self.gate.describe(),
            "tolerance": self.tolerance,
            "model_k": None if self.model is None else self.model.k,
            "points": {str(i): p.record() for i, p in sorted(self.points.items())},
        }


def _rate(value: float | None) -> str:
    return "not measured" if value is None else f"{value / 1e6:.4g} A/us"


def _text(setting: DidtSetting) -> str:
    return f"Rg {setting.gate_resistance_ohm:g} ohm, drive {setting.drive_V:.3g} V"


class GateDriveShots:
    """The shot cycle's gate-drive part (:class:`benchrun.runner.cycle.ShotCycle` inherits
    it): the setting sent for a point, the setting recorded with a shot, the di/dt trim shot.
    The attributes and helpers it uses (station, writer, plan, ranges ...) are the cycle's."""

    didt: DidtControl
    bench: Any
    station: Any
    writer: Any
    options: Any
    outcome: Any
    progress: Any
    probes: Any
    def _gate(self, point: TestPoint) -> tuple[float | None, float | None]:
        """(gate resistance, drive voltage) to send for ``point``; the drive voltage only
        when the fixture sets di/dt by it."""
        setting = self.didt.setting(point)
        if setting is None:
            return point.gate_resistance_ohm, None
        gate = self.bench.fixture.gate_drive
        drive = setting.drive_V if gate is not None and gate.sets_drive_voltage else None
        return setting.gate_resistance_ohm, drive

    def _gate_record(self, point: TestPoint) -> dict[str, float] | None:
        """The setting recorded with a shot (``ShotResult.acquisition``)."""
        setting = self.didt.setting(point)
        if setting is None:
            return None
        record = {"gate_resistance_ohm": setting.gate_resistance_ohm}
        if setting.drive_V:
            record["gate_drive_V"] = setting.drive_V
        return record

    def _fire_current_capture(self, point: TestPoint, plan: Any, pulse_args: tuple,
                              pulse_kwargs: dict[str, Any], volts: float,
                              ranges: dict[str, Any], what: str,
                              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Fire one trim shot capturing the diode current alone (nothing stored as a result):
        its time axis, amperes, and the mask of the freewheeling window (second half of the
        off time, where the current is the one the second pulse commutates)."""
        def shoot() -> Capture:
            self.station.configure_pulse(plan, *pulse_args, **pulse_kwargs)
            self.station.energise(volts)
            self.station.configure_scope(plan, ranges, volts)

            def before_fire() -> None:
                self.writer.wait_stored()
                self._wait_spacing()  # a trim shot heats the device too

            return self.station.fire(["diode_current"], self.options.trigger_timeout_s,
                                     before_fire=before_fire,
                                     on_fired=lambda: self._fired(point))

        capture = self._with_retry(shoot, what)
        self.outcome.tally("trim_shots")
        trace = capture.traces["diode_current"]
        amps = trace.volts() * self.probes["diode_current"].scale
        t = trace.t_start + trace.dt * np.arange(amps.size)
        window = ((t >= plan.first_pulse_s + 0.5 * plan.off_time_s)
                  & (t <= plan.first_pulse_s + 0.95 * plan.off_time_s))
        return t, amps, window

    def _didt_shot(self, point: TestPoint, setting: DidtSetting) -> float | None:
        """One di/dt trim shot: a full double pulse at ``setting`` (diode current only,
        nothing stored as a result); its commutation di/dt
        (:func:`~benchrun.runner.didt.commutation_didt`)."""
        plan = self._plan(point)
        check_shot(plan, point, self.bench)
        ranges = {"diode_current": self._ranges(point)["diode_current"]}
        gate = self.bench.fixture.gate_drive
        drive = setting.drive_V if gate is not None and gate.sets_drive_voltage else None
        self.progress.status(f"di/dt trim {point.label}")

        t, amps, window = self._fire_current_capture(
            point, plan, (setting.gate_resistance_ohm, drive), {}, point.bus_voltage_V, ranges,
            "di/dt trim shot")
        if window.sum() < 3:
            return None
        if_A = float(np.median(amps[window]))
        if if_A > 0:  # the gate setting moves the current reached: correct t1 for it
            self._correct(point, if_A, plan.first_pulse_s)
        return commutation_didt(t, amps, if_A)

