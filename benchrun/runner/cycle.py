"""The shot cycle: settle a temperature, trim the first pulse, fire, store, verify, retry.

Every shot goes to the raw record (flushed, and fsync-ed unless the run's durability is
``"process"``) and then to the results DB (a committed *pending* row) before the next shot
is fired, so a crash loses at most the shot in flight; the writer thread
(:mod:`benchrun.runner.writer`) does both, then analyses the shot while the next one is
acquired and completes its row. The results rows are not synced to disk on their own: the
synced raw record holds everything a row is made of, and ``--resume`` rebuilds a row a power
cut rolled back. An instrument fault during a shot is retried once with every setting sent
again; a second fault ends the run (the caller brings the bench to the safe state). An
*invalid* shot (measured conditions out of tolerance, no event, clipped diode channel) is
stored and fired again up to ``retry_invalid`` times, with the first pulse corrected from the
measured current or the scope ranges widened after clipping."""

from __future__ import annotations

import logging
from collections import deque
from concurrent import futures
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from benchrun.errors import CalibrationOverdue, InstrumentError, RunError, StoreError
from benchrun.records import ShotResult, TestPoint
from benchrun.runner.didt_trim import DidtControl, GateDriveShots
from benchrun.runner.journal import JOURNAL_FILE, JournaledStore
from benchrun.runner.plan import (
    RETAKE_WIDEN,
    PlannedShot,
    PulsePlan,
    SignalRange,
    corrected_first_pulse,
    droop,
    effective_inductance,
    expand_with_specs,
    first_pulse_width,
    plan_pulses,
    plan_ranges,
)
from benchrun.runner.progress import RunProgress
from benchrun.runner.safety import check_shot
from benchrun.runner.shots import ShotContext, build_result, narrowest, probes_for, shot_key
from benchrun.runner.thermal import shot_heat, swap_dwell
from benchrun.runner.writer import CapturedShot, ShotTicket, ShotWriter
from benchrun.store.raw import DURABILITY_PROCESS
from benchrun.store.results import ResultsStore, utc_now

if TYPE_CHECKING:
    from benchrun.runner.execute import PreparedRun, RunOptions, RunOutcome
    from benchrun.runner.station import Capture, Station
    from benchrun.store.raw import RawRecord

log = logging.getLogger("benchrun.runner")

#: Range widening applied to a clipped diode channel before the retake of that shot.
WIDEN_FACTOR = RETAKE_WIDEN


@dataclass(frozen=True)
class _InFlight:
    """A fired shot whose analysed result has not been read yet."""

    planned: PlannedShot
    attempt: int
    ticket: ShotTicket
    #: the first pulse it was fired with, s
    first_pulse_s: float
    #: range widening factors of its diode channels when it was fired
    widen: dict[str, float]


class ShotCycle(GateDriveShots):
    """Runs the shots of one run on a connected station."""

    def __init__(self, prep: PreparedRun, options: RunOptions, outcome: RunOutcome,
                 station: Station, store: ResultsStore, raw: RawRecord) -> None:
        self.sequence = prep.sequence
        self.bench = prep.bench
        self.options = options
        self.outcome = outcome
        self.station = station
        self.store = store
        self.raw = raw
        self.probes = probes_for(prep.bench)
        names = ["diode_voltage", "diode_current"]
        if self.sequence.switch_voltage and "switch_voltage" in self.bench.probes:
            names.append("switch_voltage")
        if "gate" in self.bench.probes:
            names.append("gate")
        self.channel_names = names
        self.first_pulse: dict[int, float] = {}
        #: per point index: (inductance, t1, plan) of the last plan made
        self._plans: dict[int, tuple[float | None, float | None, PulsePlan]] = {}
        #: widening of a clipped channel per (point index, serial, repeat, channel): only the
        #: retake of that shot uses it, so no device's windows depend on the test order
        self.widen: dict[tuple[int, str, int, str], float] = {}
        #: the part's limits (their Irrm limit sets the current window, plan_ranges)
        self.limits = None
        if prep.limits_file is not None:
            from benchrun.config.limits import load_limits

            self.limits = load_limits(prep.limits_file)
        self.inductance: float | None = None
        self.progress = RunProgress(0, enabled=False)
        self.max_attempts = 1 + self.sequence.retry_invalid
        #: the sequence's test-point spec behind each point index (shot spacing ...)
        expanded = expand_with_specs(self.sequence)
        self._specs = {p.index: spec for p, spec in expanded}
        self._specs_points = [p for p, _ in expanded]
        #: next attempt number per (serial, point index, repeat); loaded from the DB once
        self._attempts: dict[tuple[str, int, int], int] | None = None
        #: stores and analyses every fired shot on its own thread (runner/writer.py). Its
        #: results rows are committed without a disk sync of their own whatever the run's
        #: durability: the raw record (synced per shot in "power-loss" mode) holds everything
        #: a row is made of, and a row a power cut rolled back is rebuilt from it on --resume
        #: (recover_orphans), so one sync per shot keeps every shot.
        self._rows = ResultsStore(store.url, create=False, durability=DURABILITY_PROCESS,
                                  bench_id=store.bench_id)
        #: rows wait in a journal while the database cannot be reached (runner/journal.py)
        self.rows = JournaledStore(self._rows, outcome.run_dir / JOURNAL_FILE,
                                   **options.outage_settings())
        self.close_error: BaseException | None = None
        self.writer = ShotWriter(raw, self.rows, self.sequence)  # type: ignore[arg-type]
        #: (clock time, shot spacing) of the last shot fired
        self._last_fire: tuple[float, float] | None = None
        #: the last shot fired, until its result is read
        self._flight: _InFlight | None = None
        #: junction temperature (runner/thermal.py): minimum shot interval per point index,
        #: the dwell after a device swap, the device the handler last put in the fixture
        self._min_interval = {p.index: shot_heat(p, self.sequence, self.bench).min_interval_s
                              or 0.0 for p in self._specs_points}
        self._swap_dwell = swap_dwell(self.bench)
        self._in_fixture: str | None = None
        #: gate-drive settings: trimmed per point that asks for a di/dt (runner/didt_trim.py)
        self.didt = DidtControl(self.bench.fixture.gate_drive, self.sequence.tolerances.didt)

    def close(self) -> None:
        """Finish storing and analysing every fired shot (called on every exit path, after
        the safe state) and count a shot the run ended before reading."""
        self.writer.close()
        try:
            self.rows.finish()  # journaled rows to the database (bounded wait)
        except BaseException as exc:  # raised by the runner once the run is recorded
            log.error("%s", exc)
            self.close_error = exc
        self._rows.close()
        flight, self._flight = self._flight, None
        if flight is None or flight.ticket.stored.exception() is not None:
            return
        self.outcome.tally("shots_stored")
        analysed = flight.ticket.analysed
        if analysed.exception() is None:
            self.outcome.tally("shots_valid", int(analysed.result().valid))

    # --- resume ----------------------------------------------------------------------------

    def completed(self) -> set[tuple[int, str, int]]:
        """Identities ``(point index, serial, repeat)`` that need no further shot."""
        keys = self.store.tested_keys(self.outcome.run_id, max_attempts=self.max_attempts)
        return {(index, serial, repeat) for serial, index, repeat in keys}

    def recover_orphans(self) -> int:
        """Complete shots a crash left unfinished: in the raw record but not in the DB, or
        recorded in the DB as pending (not yet analysed); discard a pending row whose raw
        entry never became visible (its test is fired again). Returns how many were
        completed."""
        stored = {(s.serial, s.point.index, s.repeat, s.attempt): s
                  for s in self.store.shots(self.outcome.run_id)}
        keys = set(self.raw.keys())
        for shot in stored.values():
            if shot.pending and shot.raw_ref.split("/", 1)[-1] not in keys:
                # recorded beside a raw entry the crash kept from becoming visible: the shot
                # was in flight; its test is fired again
                self.store.discard_pending_shot(shot)
                log.info("resume: shot %s never reached the raw record; it is fired again",
                         shot.raw_ref)
        recovered = 0
        for key in list(self.raw):
            shot = self.raw.read_shot(key)
            context = ShotContext.from_attrs(shot.attrs)
            identity = (context.serial, context.point.index, context.repeat, context.attempt)
            row = stored.get(identity)
            if context.run_id != self.outcome.run_id or (row is not None and not row.pending):
                continue
            result = build_result(context, shot.t_start, shot.dt, shot.channels, shot.probes,
                                  self.sequence, shot.raw_ref)
            if row is None:
                self.store.add_shot(result)
                log.info("resume: shot %s was in the raw record only; analysed and stored",
                         key)
            else:
                self.store.complete_shot(result)
                log.info("resume: shot %s was stored before its analysis; analysed", key)
            recovered += 1
        self.outcome.shots_recovered += recovered
        return recovered

    # --- temperature step -------------------------------------------------------------------

    def run_temperature(self, kelvin: float, shots: list[PlannedShot]) -> None:
        """Settle at ``kelvin`` (stable, then soak), then fire ``shots`` in order."""
        thermal = self.sequence.thermal
        label = f"{kelvin - 273.15:g} °C"
        self.progress.status(f"settling at {label}")
        log.info("setting %s", label)

        def show(reading: float) -> None:
            self.progress.status(f"settling at {label}: {reading - 273.15:6.2f} °C")

        self.station.settle(kelvin, band=thermal.band, dwell=thermal.dwell, soak=thermal.soak,
                            timeout=thermal.timeout, poll=thermal.poll_interval,
                            on_reading=show)
        self.run_tests(shots)

    # --- tests: fire, store, conclude ----------------------------------------------------------

    def run_tests(self, shots: list[PlannedShot]) -> None:
        """Fire every test of ``shots`` (with its retries), one shot's analysis overlapping
        the next acquisition.

        A shot is concluded (its analysed result read, a retry queued when it is invalid)
        once the next shot of the same device and trimmed point is fired, or before anything
        else happens: a device change, a trim, the end of the list. A retry is fired next,
        on the same device.
        """
        todo = deque(shots)
        while todo or self._flight is not None:
            flight = self._flight
            if flight is not None and not (todo and self._may_overlap(flight.planned, todo[0])):
                self._flight = None
                self._conclude(flight, todo)
                continue
            planned = todo.popleft()
            point = planned.point
            attempt = self._next_attempt(planned.serial, point.index, planned.repeat)
            if attempt >= self.max_attempts:  # (resumed) every attempt already stored
                self._done(planned)
                continue
            self.progress.shooting(planned.serial, point.temperature_K,
                                   f"{point.label.split(' @ ')[0]} #{planned.repeat + 1}")
            self._select(planned.serial)
            self._trim(point)
            if self.didt.needs_trim(point):
                self.didt.trim(point, lambda setting, p=point: self._didt_shot(p, setting))
            reason = self.didt.invalid_reason(point)
            if reason is not None:  # never fired outside its di/dt tolerance
                log.warning("%s %s not fired: %s", planned.serial, point.label, reason)
                self.outcome.points_invalid[point.index] = reason
                self._done(planned)
                if flight is not None:
                    self._flight = None
                    self._conclude(flight, todo)
                continue
            self._flight = self._fire(planned, attempt)
            if flight is not None:
                self._conclude(flight, todo)

    def _select(self, serial: str) -> None:
        """Put ``serial`` in the fixture; after a swap, wait the fixture's dwell so the new
        device reaches the plate temperature before its first shot."""
        self.station.select(serial)
        if serial == self._in_fixture:
            return
        self._in_fixture = serial
        if self._swap_dwell > 0:
            self.progress.status(f"{serial}: dwell {self._swap_dwell:g} s after the swap")
            log.info("%s in the fixture: dwell %.3g s to reach the plate temperature", serial,
                     self._swap_dwell)
            self.station.clock.sleep(self._swap_dwell)

    def _may_overlap(self, previous: PlannedShot, upcoming: PlannedShot) -> bool:
        """Whether ``upcoming`` may fire before ``previous`` is concluded: same device (a
        retry of ``previous`` needs no device change) and no trim needed."""
        return (upcoming.serial == previous.serial
                and upcoming.point.index in self.first_pulse
                and not self.didt.needs_trim(upcoming.point))

    def _conclude(self, flight: _InFlight, todo: deque[PlannedShot]) -> None:
        """Read a fired shot's analysed result; learn from it; queue its retry when it is
        invalid and attempts remain, else count its test as done."""
        planned, point = flight.planned, flight.planned.point
        result = flight.ticket.result()
        self.outcome.tally("shots_stored")
        self.outcome.tally("shots_valid", int(result.valid))
        if result.valid and result.conditions.get("if_A"):
            deviation = result.conditions["if_A"] / point.forward_current_A - 1.0
            if abs(deviation) > 0.5 * self.sequence.tolerances.forward_current:
                self._correct(point, float(result.conditions["if_A"]), flight.first_pulse_s)
        if self.options.on_stored is not None:
            self.options.on_stored(result)
        self.progress.stored(result, self.raw)
        if not result.valid:
            log.warning("%s %s repeat %d attempt %d invalid: %s", planned.serial, point.label,
                        planned.repeat, flight.attempt, "; ".join(result.flags))
            self._adjust_after(flight, result)
            retry = True
            if any(f.startswith("condition:didt_A_per_s") for f in result.flags):
                # learn from the miss: the retry is fired at a newly trimmed setting, or not
                retry = self.didt.missed(point, result.conditions.get("didt_A_per_s"))
            if retry and self._next_attempt(planned.serial, point.index,
                                            planned.repeat) < self.max_attempts:
                todo.appendleft(planned)
                return
        self._done(planned)

    def _done(self, planned: PlannedShot) -> None:
        """A test needs no further shot: count it; forget its attempt number (the plan
        holds each test once; a long run keeps no per-test state)."""
        self.progress.advance()
        if self._attempts is not None:
            self._attempts.pop((planned.serial, planned.point.index, planned.repeat), None)

    def _next_attempt(self, serial: str, point_index: int, repeat: int) -> int:
        """Attempt number of the next shot of a test: read from the DB once (shots stored by
        an interrupted run count), then counted here (this process is the run's only
        writer)."""
        if self._attempts is None:
            self._attempts = self.store.next_attempts(self.outcome.run_id)
        return self._attempts.get((serial, point_index, repeat), 0)

    def _spec(self, point: TestPoint) -> Any:
        return self._specs[point.index]

    def _plan(self, point: TestPoint) -> PulsePlan:
        t1 = self.first_pulse.get(point.index)
        made = self._plans.get(point.index)
        if made is not None and made[:2] == (self.inductance, t1):
            return made[2]
        # a pure function of the point and the corrections so far: made again only when a
        # correction changed
        plan = plan_pulses(point, self.sequence, self.bench.fixture, self.inductance)
        plan = plan if t1 is None else plan.with_first_pulse(t1)
        self._plans[point.index] = (self.inductance, t1, plan)
        return plan

    def _ranges(self, point: TestPoint, scale_V: float = 1.0,
                planned: PlannedShot | None = None) -> dict[str, SignalRange]:
        """Scope windows: planned from the part's limits and the point
        (:func:`~benchrun.runner.plan.plan_ranges`, the same for every device), widened only
        for the retake of a shot (``planned``) that clipped."""
        ranges = plan_ranges(point, self.sequence, self.bench, self.limits)
        out = {}
        for name in self.channel_names:
            r = ranges[name]
            k = 1.0 if planned is None else self.widen.get(self._widen_key(planned, name), 1.0)
            if name != "diode_current":
                k *= scale_V
            out[name] = SignalRange(name, r.low * k, r.high * k)
        return out

    @staticmethod
    def _widen_key(planned: PlannedShot, name: str) -> tuple[int, str, int, str]:
        return (planned.point.index, planned.serial, planned.repeat, name)

    def _adjust_after(self, flight: _InFlight, result: ShotResult) -> None:
        """Widen a clipped channel's range and correct t1 from the measured current, both
        from the settings *that shot* was fired with (a shot fired before the adjustment of
        an earlier one must not adjust twice)."""
        point = flight.planned.point
        for name in ("diode_current", "diode_voltage"):
            if f"clipped_{name}" in result.flags:
                key = self._widen_key(flight.planned, name)
                factor = flight.widen.get(name, 1.0) * WIDEN_FACTOR
                self.widen[key] = max(self.widen.get(key, 1.0), factor)
                log.info("%s clipped: retaking %s at %s with its range widened by %g", name,
                         flight.planned.serial, point.label, WIDEN_FACTOR)
        measured = result.conditions.get("if_A")
        if measured:
            self._correct(point, float(measured), flight.first_pulse_s)

    def _correct(self, point: TestPoint, measured_A: float, fired_t1: float) -> None:
        """New t1 for ``point`` from the current a shot fired with ``fired_t1`` reached."""
        plan = self._plan(point).with_first_pulse(fired_t1)
        t1, L_eff = corrected_first_pulse(plan, point, measured_A, point.bus_voltage_V,
                                          self.bench.fixture)
        self.first_pulse[point.index] = t1
        self.inductance = L_eff

    # --- trim ----------------------------------------------------------------------------

    def _trim(self, point: TestPoint) -> None:
        """Correct t1 with single-pulse (or low-voltage) shots until IF is within tolerance."""
        if point.index in self.first_pulse:
            return
        trim = self.sequence.trim
        plan = self._plan(point)
        if trim.mode == "off":
            self.first_pulse[point.index] = plan.first_pulse_s
            return
        fx = self.bench.fixture
        volts = point.bus_voltage_V if trim.mode == "single_pulse" else float(trim.bus_voltage)
        target = point.forward_current_A
        for shot in range(trim.max_shots):
            check_shot(plan, point, self.bench)
            self.progress.status(f"trim {point.label}: shot {shot + 1}")
            measured = self._trim_shot(point, plan, volts)
            loss = droop(target, plan.off_time_s, fx)
            L_eff = effective_inductance(plan.first_pulse_s, measured + loss, volts,
                                         fx.load_resistance, fx.switch_on_voltage)
            t1 = first_pulse_width(target + loss, point.bus_voltage_V, L_eff,
                                   fx.load_resistance, fx.switch_on_voltage)
            if trim.mode == "single_pulse":
                deviation = measured / target - 1.0
            else:
                deviation = t1 / plan.first_pulse_s - 1.0
            log.info("trim %s shot %d at %g V: t1 %.4g us gave %.4g A (%+.2f %%); next t1 "
                     "%.4g us", point.label, shot + 1, volts, plan.first_pulse_s * 1e6,
                     measured, deviation * 100, t1 * 1e6)
            self.inductance = L_eff
            plan = plan.with_first_pulse(t1)
            if abs(deviation) <= trim.tolerance:
                check_shot(plan, point, self.bench)
                self.first_pulse[point.index] = t1
                return
        raise RunError(f"trim of {point.label} did not reach {target:g} A within "
                       f"{trim.tolerance * 100:g} % in {trim.max_shots} shots; check the load "
                       "inductor and the current sensor")

    def _trim_shot(self, point: TestPoint, plan: PulsePlan, volts: float) -> float:
        """Fire the first pulse alone; return the freewheeling current at the commutation
        instant (median of the diode current over the second half of the off time)."""
        scale = volts / point.bus_voltage_V
        ranges = self._ranges(point, scale)
        current = ranges["diode_current"]
        ranges["diode_current"] = SignalRange("diode_current", current.low * scale,
                                              current.high * scale)

        _t, amps, window = self._fire_current_capture(
            point, plan, self._gate(point), {"single": True}, volts, ranges, "trim shot")
        if window.sum() < 3:
            raise RunError("trim shot: the record does not cover the off time")
        return float(np.median(amps[window]))

    # --- fire, store ---------------------------------------------------------------------------

    def _with_retry(self, action: Any, what: str) -> Any:
        try:
            return action()
        except CalibrationOverdue:
            raise
        except InstrumentError as exc:
            log.warning("instrument fault during %s: %s; sending every setting again and "
                        "retrying once", what, exc)
            self.station.forget_settings()
        return action()

    def _fired(self, point: TestPoint) -> None:
        """A shot at ``point`` has just been fired: the next waits from now for the
        sequence's spacing, or the fixture's thermal minimum interval when longer."""
        self._last_fire = (self.station.clock.monotonic(),
                           max(self._spec(point).shot_spacing,
                               self._min_interval.get(point.index, 0.0)))

    def _wait_spacing(self) -> None:
        """Keep the previous shot's spacing (its test point's ``shot_spacing``) between two
        shots."""
        if self._last_fire is None:
            return
        fired_at, spacing = self._last_fire
        left = fired_at + spacing - self.station.clock.monotonic()
        if left > 0:
            self.station.clock.sleep(left)

    def _fire(self, planned: PlannedShot, attempt: int) -> _InFlight:
        """Configure, fire and capture one shot; hand it to the writer. Returns once the
        capture is read (the previous shot is stored before this one fires)."""
        point = planned.point
        plan = self._plan(point)
        check_shot(plan, point, self.bench)
        ranges = self._ranges(point, planned=planned)
        measured: dict[str, Any] = {}
        fired: dict[str, Any] = {}  # the pending row of the shot as fired

        def context_with(temperature_K: float | None) -> ShotContext:
            return ShotContext(
                run_id=self.outcome.run_id, part=self.sequence.part, lot=self.sequence.lot,
                serial=planned.serial, point=point, repeat=planned.repeat, attempt=attempt,
                timestamp=measured["timestamp"], temperature_K=temperature_K,
                bus_voltage_V=measured["bus_V"],
                temperature_sensor=self.bench.fixture.temperature_sensor,
                gate=self._gate_record(point),
            )  # fmt: skip

        def shoot() -> Capture:
            while True:
                capture = shoot_once()
                if capture is not None:
                    return capture

        def shoot_once() -> Capture | None:
            """One shot; None when the handler did not report the device in the fixture
            during it (the capture is dropped and the device selected again)."""
            # the previous shot's fsync ("power-loss" mode) runs meanwhile
            self.station.configure_pulse(plan, *self._gate(point))
            measured["bus_V"] = self.station.energise(point.bus_voltage_V)
            self.station.configure_scope(plan, ranges, point.bus_voltage_V)
            during: list[futures.Future[Any]] = []

            def before_fire() -> None:
                self.writer.wait_stored()  # the previous shot is durable in both stores
                self._wait_spacing()
                measured["timestamp"] = utc_now()

            def on_fired() -> None:
                # while the scope acquires: this shot's pending results row, the previous
                # shot's analysis, the temperature read-back (the device's temperature cannot
                # move within an acquisition) and the handler's word on the device in the
                # fixture during the shot (the station put it there and has not moved it
                # since; select() checked it before the first shot on it)
                self._fired(point)
                fired["row"] = self.writer.record_fired(context_with(None))
                self.writer.release()
                during.append(self.station.in_parallel(self.station.temperature))
                during.append(self.station.in_parallel(
                    lambda: self.station.is_selected(planned.serial)))

            try:
                capture = self.station.fire(self.channel_names, self.options.trigger_timeout_s,
                                            before_fire=before_fire, on_fired=on_fired)
            finally:  # never leave a query running on a connection a retry will use
                futures.wait(during)
            measured["temperature_K"] = during[0].result()
            if during[1].result():
                return capture
            log.warning("the handler did not report %s in the fixture during the shot: the "
                        "capture is dropped, the device selected again and the shot fired "
                        "again", planned.serial)
            self.station.select(planned.serial)
            return None

        capture = self._with_retry(shoot, f"shot {planned.serial} {point.label}")
        context = context_with(measured["temperature_K"])
        channels = {name: narrowest(trace.to_channel_data())
                    for name, trace in capture.traces.items()}
        settings = {
            "first_pulse_s": plan.first_pulse_s, "off_time_s": plan.off_time_s,
            "second_pulse_s": plan.second_pulse_s, "record_start_s": plan.record_start_s,
            "sample_interval_s": plan.sample_interval_s, "record_length": plan.points,
            "gate_resistance_ohm": self._gate(point)[0], "gate_drive_V": self._gate(point)[1],
            "ranges": {name: [r.low, r.high] for name, r in ranges.items()},
        }  # fmt: skip
        probes = {name: self.probes[name] for name in channels}
        # the chain's rise times (from the bench file's bandwidths) go with the shot, so a
        # re-analysis from the raw record sets the same rise_time_limited flag
        settings["probe_rise_times_s"] = {name: p.rise_time_s for name, p in probes.items()
                                          if p.rise_time_s is not None}
        # handed to the operating system now (safe against kill -9); the fsync of
        # "power-loss" mode runs on the record's thread until the next fire waits for it
        key = shot_key(point.index, planned.serial, planned.repeat, attempt)
        failed: str | None = None
        try:
            ref = self.raw.append_shot(key, capture.t_start, capture.dt, channels, probes,
                                       context.attrs(settings), wait=False)
        except (OSError, RuntimeError) as exc:  # the HDF5 library's word for a full disk
            failed = f"cannot write shot {key} to the raw record {self.raw.path}: {exc}"
            exc.__traceback__ = None  # the library's objects in the failed write go now
        if failed is not None:
            raise StoreError(failed)
        ticket = self.writer.submit(CapturedShot(ref, context, capture.t_start, capture.dt,
                                                 channels, probes, fired["row"]))
        if self._attempts is not None:
            identity = (planned.serial, point.index, planned.repeat)
            self._attempts[identity] = max(self._attempts.get(identity, 0), attempt + 1)
        widen = {name: self.widen.get(self._widen_key(planned, name), 1.0)
                 for name in ("diode_current", "diode_voltage")}
        return _InFlight(planned, attempt, ticket, plan.first_pulse_s, widen)
