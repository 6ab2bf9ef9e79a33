"""The unattended run: configuration → pre-flight → temperatures → devices → shots → store.

:func:`run_sequence` is the whole run. Order of work:

1. load the sequence, bench and limits files (errors at file:line; nothing is energised);
2. calibration dates (warning when due soon, :class:`~benchrun.errors.CalibrationOverdue`
   when overdue unless overridden — the override is written to the manifest);
3. pre-flight safety on every planned point (:func:`benchrun.runner.safety.preflight`);
4. run folder and manifest (or, with ``resume``, the unfinished run folder:
   :mod:`benchrun.runner.runfolder`), results DB;
5. instruments: identities, device list; then per temperature: settle and soak; per device
   and point: trim shots, then the repeats, each stored in the raw record *and* the results DB
   before the next shot; an invalid shot is fired once more;
6. always: the safe state (pulse off, supply off, bus below 60 V), the manifest's status.

Resume after a crash (even ``kill -9``): every test complete in the DB is skipped; a shot
found in the raw record but missing from the DB (crash between the two writes) is analysed
from the raw record and stored, not fired again.
"""

from __future__ import annotations

import datetime as _dt
import gc
import logging
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchrun.config.bench import BenchConfig, load_bench
from benchrun.config.sequence import PartRatings, SequenceConfig, limits_path, load_sequence
from benchrun.errors import BenchrunError, ConfigError, RunError, SafetyError, StoreError
from benchrun.records import ShotResult
from benchrun.runner.cycle import ShotCycle
from benchrun.runner.didt_record import DidtRecord
from benchrun.runner.identity import check_devices
from benchrun.runner.interrupts import SpaceReserve, StopSignals, bounded
from benchrun.runner.journal import (
    BACKOFF_INITIAL_S,
    BACKOFF_MAX_S,
    DEFAULT_OUTAGE_LIMIT_S,
    DatabaseOutage,
)
from benchrun.runner.plan import expand_points, plan_run
from benchrun.runner.progress import RunProgress, close_run_log, open_run_log, start_live
from benchrun.runner.run_counts import RunCounts
from benchrun.runner.runfolder import open_run_folder
from benchrun.runner.safety import (
    CalibrationCheck,
    Clock,
    SafeStateReport,
    WallClock,
    check_calibration,
    preflight,
)
from benchrun.runner.station import Station, resolve_resources
from benchrun.runner.thermal import shot_heat
from benchrun.store.raw import DURABILITY_POWER_LOSS, RawRecord, check_durability
from benchrun.store.results import ResultsStore, utc_now
from benchrun.store.rundata import (
    LOG_FILE,
    RAW_FILE,
    default_store_url,
    hash_run_files,
    store_url_for,
    write_manifest,
)

log = logging.getLogger("benchrun.runner")

#: Margin of the safe-state procedure's wall-clock bound (:func:`safe_state_bound_s`), s.
SAFE_STATE_MARGIN_S = 10.0


@dataclass
class RunOptions:
    """How to run a sequence.

    Attributes
    ----------
    out_dir
        Parent folder of run folders.
    resume
        False: a new run. True: the newest unfinished run of the same part and lot in
        ``out_dir``. A path: that run folder.
    db_url
        Results database URL (default: ``results.db`` in the run folder).
    allow_overdue_calibration
        Run with overdue instruments (recorded in the manifest).
    sim_resources
        Role → resource of a running simulated bench, for ``sim`` bench entries.
    ratings_lookup
        Part number → ratings, when the sequence gives none (the simulator's catalogue).
    clock
        Time source for every wait.
    today
        Date for the calibration check (default: today, UTC).
    show_progress
        Live display on standard error.
    trigger_timeout_s
        Wall-clock time allowed between firing and the scope's trigger.
    on_stored
        Called after each shot is durably stored (for progress hooks and tests).
    on_finish
        Called with the outcome once the run ended, whichever way (commands print it).
    durability
        ``"power-loss"`` (default): every stored shot is synced to disk (raw record
        ``fsync``, SQLite ``synchronous=FULL``) before the next shot, so it survives a power
        cut. ``"process"``: every stored shot is handed to the operating system before the
        next shot (survives ``kill -9`` or a crash of the program, not a power cut or an
        operating-system crash); cheaper per shot. Recorded in ``run.json``.
    db_outage_limit_s, db_backoff_s
        How long the results database may stay unreachable while the bench keeps testing
        (shot rows wait in ``rows-journal.jsonl`` in the run folder, :mod:`benchrun.runner.
        journal`), and the first and longest wait between reconnection attempts.
    """

    out_dir: Path
    resume: bool | Path = False
    db_url: str | None = None
    allow_overdue_calibration: bool = False
    sim_resources: dict[str, str] | None = None
    ratings_lookup: Callable[[str], PartRatings | None] | None = None
    clock: Clock = field(default_factory=WallClock)
    today: _dt.date | None = None
    show_progress: bool = True
    trigger_timeout_s: float = 5.0
    on_stored: Callable[[ShotResult], None] | None = None
    on_finish: Callable[[RunOutcome], None] | None = None
    durability: str = DURABILITY_POWER_LOSS
    #: a signed report is to be written once the run is complete (recorded in the manifest
    #: as ``report_requested``; ``--resume`` of a complete run whose report was never
    #: written then returns the complete outcome so the caller writes it)
    report: bool = False
    #: a device whose part or lot (as the handler reports it) is not the sequence's:
    #: ``"skip"`` it (reason recorded in ``run.json`` ``skipped_devices``) or ``"stop"`` the
    #: run before anything is energised
    wrong_device: str = "skip"
    #: how long the results database may stay unreachable before the run stops (s), and the
    #: first and longest wait between reconnection attempts (runner/journal.py)
    db_outage_limit_s: float = DEFAULT_OUTAGE_LIMIT_S
    db_backoff_s: tuple[float, float] = (BACKOFF_INITIAL_S, BACKOFF_MAX_S)
    #: who runs the bench (recorded in ``run.json`` as ``operator``; None: not recorded)
    operator: str | None = None

    def outage_settings(self) -> dict[str, float]:
        """Keyword arguments of :class:`~benchrun.runner.journal.JournaledStore`."""
        return {"outage_limit_s": self.db_outage_limit_s,
                "backoff_initial_s": self.db_backoff_s[0],
                "backoff_max_s": self.db_backoff_s[1]}


@dataclass
class RunOutcome:
    """What a run achieved."""

    run_id: str
    run_dir: Path
    store_url: str
    status: str = "running"
    shots_stored: int = 0
    shots_valid: int = 0
    shots_recovered: int = 0
    shots_skipped: int = 0
    trim_shots: int = 0
    warnings: list[str] = field(default_factory=list)
    #: test points not fired in this session (point index → reason: their di/dt could not
    #: be set); ``run.json`` ``points_invalid`` holds the run's (runner/didt_record.py)
    points_invalid: dict[int, str] = field(default_factory=dict)
    #: how di/dt was set and each di/dt point's outcome, over every session of the run
    #: (``run.json`` ``didt_control``, runner/didt_record.py)
    didt_control: dict[str, Any] | None = None
    safe_state: SafeStateReport | None = None
    error: str | None = None
    #: the run's shot counts over every session (``run.json`` ``counts``,
    #: runner/run_counts.py); the ``shots_*`` and ``trim_shots`` fields are this session's
    counts: dict[str, Any] | None = None
    #: called with the field's name after :meth:`tally` changes a count
    #: (:meth:`RunCounts.watch`)
    on_count: Callable[[str], None] | None = field(default=None, repr=False, compare=False)

    def tally(self, name: str, n: int = 1) -> None:
        """Add ``n`` to the count field ``name`` (``shots_stored``, ``shots_valid``,
        ``trim_shots``) and tell ``on_count`` (run.json's counts follow)."""
        setattr(self, name, getattr(self, name) + n)
        if self.on_count is not None:
            self.on_count(name)


@dataclass(frozen=True)
class PreparedRun:
    """Everything checked before a run folder exists or anything is energised."""

    sequence_path: Path
    bench_path: Path
    limits_file: Path | None
    sequence: SequenceConfig
    bench: BenchConfig
    ratings: PartRatings | None
    calibration: CalibrationCheck


def prepare(sequence_path: str | Path, bench_path: str | Path, options: RunOptions
            ) -> PreparedRun:
    """Load and check every file, calibration dates and pre-flight safety. No I/O to
    instruments; raises ConfigError, CalibrationOverdue or SafetyError."""
    sequence_path, bench_path = Path(sequence_path), Path(bench_path)
    sequence = load_sequence(sequence_path)
    bench = load_bench(bench_path)
    limits_file = limits_path(sequence, sequence_path)
    if limits_file is not None:
        from benchrun.config.limits import load_limits

        if not limits_file.is_file():
            raise ConfigError(f"limits file {limits_file} not found", file=str(sequence_path),
                              field="limits")
        spec = load_limits(limits_file)
        if getattr(spec, "part", sequence.part) != sequence.part:
            raise ConfigError(f"limits file is for part {spec.part!r}, the sequence tests "
                              f"{sequence.part!r}", file=str(sequence_path), field="limits")
        from benchrun.config.crosscheck import check_run_files

        check_run_files(sequence, sequence_path, spec, limits_file)
    ratings = sequence.ratings
    if ratings is None and options.ratings_lookup is not None:
        ratings = options.ratings_lookup(sequence.part)
    today = options.today or _dt.datetime.now(_dt.UTC).date()
    calibration = check_calibration(bench, today,
                                    allow_overdue=options.allow_overdue_calibration)
    if sequence.devices != "all" and bench.instruments.handler is None \
            and len(sequence.devices) != 1:
        raise SafetyError("without a handler only one device (the one in the fixture) can be "
                          "tested; list exactly one serial")
    if sequence.devices == "all" and bench.instruments.handler is None:
        raise ConfigError("'devices: all' needs a handler in the bench file",
                          file=str(sequence_path), field="devices")
    from benchrun.config.crosscheck import check_didt_means

    check_didt_means(sequence, sequence_path, bench, bench_path)
    preflight(expand_points(sequence), sequence, bench, ratings)
    heat = [shot_heat(p, sequence, bench).problem for p in expand_points(sequence)]
    if any(heat):
        raise SafetyError("refused before energising:\n  "
                          + "\n  ".join(dict.fromkeys(h for h in heat if h)))
    return PreparedRun(sequence_path, bench_path, limits_file, sequence, bench, ratings,
                       calibration)



def run_sequence(sequence_path: str | Path, bench_path: str | Path,
                 options: RunOptions) -> RunOutcome:
    """Run (or resume) a sequence on a bench; see the module docstring.

    Raises
    ------
    ConfigError, CalibrationOverdue, SafetyError
        Before anything is energised.
    RunError, InstrumentError, StoreError
        During the run, after the safe state was reached (or reported as not reached).
    KeyboardInterrupt
        Ctrl-C or SIGTERM, after the safe state.
    """
    durability = check_durability(options.durability)
    prep = prepare(sequence_path, bench_path, options)
    run_id, run_dir, manifest, resumed = open_run_folder(prep, options)
    if resumed and manifest.get("status") == "complete":
        return _report_only(run_id, run_dir, manifest, options)
    url = store_url_for(run_dir, manifest) if resumed else (options.db_url
                                                             or default_store_url(run_dir))
    outcome = RunOutcome(run_id, run_dir, url, warnings=list(prep.calibration.warnings))
    handler = open_run_log(run_dir / LOG_FILE)
    signals = StopSignals().install()
    reserve = SpaceReserve(run_dir)
    unraisable, sys.unraisablehook = sys.unraisablehook, _log_unraisable
    excepthook, sys.excepthook = sys.excepthook, _log_printed_error
    try:
        log.info("%s run %s: %s lot %s, sequence %s, bench %s",
                 "resuming" if resumed else "starting", run_id, prep.sequence.part,
                 prep.sequence.lot, prep.sequence_path, prep.bench_path)
        for warning in prep.calibration.warnings:
            log.warning("calibration: %s", warning)
        for overridden in prep.calibration.overridden:
            log.warning("calibration OVERRIDDEN (--allow-overdue-calibration): %s", overridden)
        with ResultsStore(url, durability=durability,
                          bench_id=manifest.get("bench_id", prep.bench.bench_id)) as store:
            if store.get_run(run_id) is None:
                store.create_run(run_id, prep.sequence.part, prep.sequence.lot, manifest,
                                 started=manifest.get("started"))
            if resumed:
                manifest.setdefault("resumes", []).append(
                    {"at": utc_now(), "calibration": prep.calibration.to_dict(),
                     "allow_overdue_calibration": bool(options.allow_overdue_calibration),
                     "durability": durability})
                manifest["status"] = "running"
                if options.report:
                    manifest["report_requested"] = True
                write_manifest(run_dir, manifest)
                store.update_run(run_id, status="running", manifest=manifest)
            try:
                raw = RawRecord(run_dir / RAW_FILE, "a", compression=None,
                                durability=durability)
                try:
                    _execute(prep, options, outcome, manifest, store, raw, signals)
                finally:
                    _close_raw(raw, outcome)
            finally:
                signals.defer()
                reserve.release()  # the end of the run is recorded even on a full disk
                _record_files(outcome, manifest, store)
    except KeyboardInterrupt as exc:
        # a stop signal before the bench was touched (or while the stores were closing)
        if outcome.status == "running":
            outcome.status = "interrupted"
            outcome.error = "interrupted (Ctrl-C or SIGTERM)"
            _finish(outcome, manifest, None)
            reserve.release()
            _record_files(outcome, manifest, None)
        raise exc
    finally:
        signals.defer()
        reserve.release()
        try:
            if handler.failure is not None:
                outcome.warnings.append(f"the run log could not be written: {handler.failure}")
            if options.on_finish is not None:
                options.on_finish(outcome)
        finally:
            signals.restore()
            gc.collect()  # objects the run released are released while their errors are logged
            sys.unraisablehook = unraisable
            sys.excepthook = excepthook
            close_run_log(handler)
    return outcome


def _close_raw(raw: RawRecord, outcome: RunOutcome) -> None:
    """Close the raw record; a close that fails (a full disk refuses the HDF5 library's last
    writes) is logged and recorded as a warning, never raised over the run's own outcome."""
    try:
        raw.close()
    except (OSError, RuntimeError, BenchrunError) as exc:
        log.error("the raw record could not be closed cleanly: %s", exc)
        outcome.warnings.append(f"the raw record could not be closed cleanly: {exc}")
        raw._file = None  # released now, while the run's unraisable hook logs complaints
        gc.collect()


def _log_unraisable(unraisable: Any) -> None:
    """During a run: an error raised while an object is released (the HDF5 library's, when a
    full disk refuses the write of an object it closes) goes to the run log in one line."""
    log.warning("while releasing %r: %s", unraisable.object, unraisable.exc_value)


def _log_printed_error(kind: type[BaseException], value: BaseException, tb: Any) -> None:
    """During a run: an error a compiled library prints through ``sys.excepthook`` instead
    of raising it (h5py prints the full traceback of an error in releasing an HDF5 object
    this way, before the unraisable hook sees it) goes to the run log in one line. Errors
    the run raises are not affected: they propagate to the caller, not to this hook."""
    log.warning("while releasing an object: %s: %s", kind.__name__, value)


def _report_only(run_id: str, run_dir: Path, manifest: dict[str, Any],
                 options: RunOptions) -> RunOutcome:
    """Resume of a complete run whose signed report was never written: nothing is fired;
    the complete outcome goes back to the caller, who writes the report."""
    if not options.report:
        raise RunError(f"run {run_id} is complete but its signed report was never written: "
                       "resume with a signing identity, or write it with 'benchrun report'")
    outcome = RunOutcome(run_id, run_dir, store_url_for(run_dir, manifest), status="complete",
                         counts=manifest.get("counts"))
    with ResultsStore(outcome.store_url, create=False) as store:
        outcome.shots_skipped = len(store.tested_keys(run_id))
    outcome.warnings.append("the run was complete; its signed report had not been written "
                            "and is written now")
    if options.on_finish is not None:
        options.on_finish(outcome)
    return outcome


def _execute(prep: PreparedRun, options: RunOptions, outcome: RunOutcome,
             manifest: dict[str, Any], store: ResultsStore, raw: RawRecord,
             signals: StopSignals | None = None) -> None:
    resources = resolve_resources(prep.bench, options.sim_resources)
    station: Station | None = None
    cycle: ShotCycle | None = None
    didt: DidtRecord | None = None
    counts: RunCounts | None = None
    error: BaseException | None = None
    live = None
    try:
        station = Station(prep.bench, resources, options.clock)
        identities = station.identify()
        manifest["instruments"] = {role: ident.to_dict() for role, ident in identities.items()}
        raw.set_run_attrs(run_id=outcome.run_id, part=prep.sequence.part,
                          lot=prep.sequence.lot, bench_id=store.bench_id,
                          instruments=manifest["instruments"],
                          analysis_options=manifest.get("analysis_options"))
        write_manifest(outcome.run_dir, manifest)
        devices = check_devices(prep.sequence, station.handler,
                                _serials(prep.sequence, station), action=options.wrong_device)
        serials = devices.accepted
        manifest["devices"] = serials
        manifest["skipped_devices"] = devices.skipped
        manifest["device_identity_checked"] = devices.checked
        for serial, reason in devices.skipped.items():
            outcome.warnings.append(f"device {serial} skipped: {reason}")
        write_manifest(outcome.run_dir, manifest)
        steps = plan_run(prep.sequence, serials)
        cycle = ShotCycle(prep, options, outcome, station, store, raw)
        # di/dt control outcomes go to run.json as they happen, merged with earlier sessions'
        didt = DidtRecord(outcome.run_dir, manifest)
        cycle.didt = didt.watch(cycle.didt)
        cycle.recover_orphans()
        done = cycle.completed()
        total = sum(len(step.shots) for step in steps)
        skipped = sum(1 for step in steps for s in step.shots if s.identity in done)
        outcome.shots_skipped = skipped
        # shot counts: recounted from the store now, written to run.json as they change
        counts = RunCounts(outcome.run_dir, manifest, outcome)
        counts.start(store)
        counts.watch()
        if skipped:
            log.info("resume: %d of %d tests already complete", skipped, total)
        live = start_live(store.url, outcome.run_id, part=prep.sequence.part,
                          lot=prep.sequence.lot, bench=prep.bench.name, total=total,
                          done=skipped)
        with RunProgress(total, skipped, enabled=options.show_progress, live=live) as progress:
            cycle.progress = progress
            for step in steps:
                todo = [s for s in step.shots if s.identity not in done]
                if todo:
                    cycle.run_temperature(step.temperature_K, todo)
        outcome.status = "complete"
    except KeyboardInterrupt as exc:
        outcome.status = "interrupted"
        outcome.error = "interrupted (Ctrl-C or SIGTERM)"
        error = exc
    except BaseException as exc:
        outcome.status = "aborted"
        outcome.error = str(exc)
        error = exc
    finally:
        if signals is not None:
            signals.defer()  # from here on a signal waits until the end is recorded
        if station is not None:
            outcome.safe_state = _safe(station, prep.bench, options.clock)
            station.close()
        if cycle is not None:
            cycle.close()  # shots fired before the end are stored and analysed
            if didt is not None:
                outcome.didt_control = didt.merged()
            if cycle.close_error is not None and error is None:
                outcome.status = "aborted"
                outcome.error = str(cycle.close_error)
                error = cycle.close_error
        outcome.on_count = None
        # recounted from the store unless the store's outage ended the run
        _finish(outcome, manifest, None if isinstance(error, DatabaseOutage) else store, didt,
                counts)
        if live is not None:
            live.close(outcome.status)
    if error is not None:
        log.error("run %s %s: %s", outcome.run_id, outcome.status, outcome.error)
        if isinstance(error, StoreError | OSError):
            # a store that failed (a full disk): the frames of the failed write hold the HDF5
            # library's objects; released now, while the run's unraisable hook logs their
            # complaints, instead of a traceback on the terminal when the error is dropped
            cause: BaseException | None = error
            while cause is not None:
                cause.__traceback__ = None
                cause = cause.__cause__ or cause.__context__
            gc.collect()
        raise error
    if outcome.safe_state is not None and not outcome.safe_state.reached:
        raise SafetyError(outcome.safe_state.describe())


def safe_state_bound_s(bench: BenchConfig, clock: Clock) -> float:
    """Wall-clock bound of the safe-state procedure: the discharge timeout (in the clock's
    time, shortened by an accelerated clock) plus, per instrument, its I/O timeout three
    times over (switch off, read back, one reconnect) and a margin of 10 s."""
    speedup = float(getattr(clock, "speedup", 1.0)) or 1.0
    io = sum(3.0 * entry.timeout for _, entry in bench.instruments.items())
    return bench.safety.discharge_timeout / speedup + io + SAFE_STATE_MARGIN_S


def _safe(station: Station, bench: BenchConfig, clock: Clock) -> SafeStateReport:
    """The safe state, bounded in time (signals are deferred by the caller)."""
    return bounded(station.make_safe, safe_state_bound_s(bench, clock))


def _serials(sequence: SequenceConfig, station: Station) -> list[str]:
    held = station.devices()
    if sequence.devices == "all":
        if not held:
            raise RunError("the handler holds no devices")
        return held
    if station.handler is not None:
        missing = [s for s in sequence.devices if s not in held]
        if missing:
            raise RunError(f"devices not in the handler: {', '.join(missing)}")
    return list(sequence.devices)


def _finish(outcome: RunOutcome, manifest: dict[str, Any], store: ResultsStore | None,
            didt: DidtRecord | None = None, counts: RunCounts | None = None) -> None:
    manifest["status"] = outcome.status
    manifest["finished"] = utc_now()
    manifest["safe_state"] = outcome.safe_state.to_dict() if outcome.safe_state else None
    manifest["error"] = outcome.error
    # the run's counts over every session, recounted from the store (runner/run_counts.py)
    counts = counts if counts is not None else RunCounts(outcome.run_dir, manifest, outcome)
    outcome.counts = manifest["counts"] = counts.merged(store)
    manifest["store_url"] = manifest.get("store_url")
    if outcome.didt_control is not None:
        manifest["didt_control"] = outcome.didt_control
    invalid = (didt.points_invalid(outcome.points_invalid) if didt is not None
               else {**manifest.get("points_invalid", {}),
                     **{str(k): v for k, v in outcome.points_invalid.items()}})
    if invalid:
        manifest["points_invalid"] = invalid
    else:
        manifest.pop("points_invalid", None)


def _record_files(outcome: RunOutcome, manifest: dict[str, Any],
                  store: ResultsStore | None) -> None:
    """Hash the run's files (raw record closed) and record the end of the run: the manifest
    first, then the results database (each attempted even when the other fails)."""
    try:
        manifest["files"] = hash_run_files(outcome.run_dir)
        write_manifest(outcome.run_dir, manifest)
    except (BenchrunError, OSError) as exc:
        log.error("could not record the end of run %s in run.json: %s", outcome.run_id, exc)
        outcome.warnings.append(f"run.json could not be updated: {exc}")
    if store is None:
        return
    try:
        store.update_run(outcome.run_id, status=outcome.status,
                         finished=manifest.get("finished") or utc_now(), manifest=manifest)
    except (BenchrunError, OSError) as exc:
        log.error("could not record the end of run %s in the results database: %s",
                  outcome.run_id, exc)
        outcome.warnings.append(f"the results database could not record the end: {exc}")
