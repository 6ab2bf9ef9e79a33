"""Re-analysis for verification: raw waveforms → metrics → grades, compared with the report.

Each shot listed in the report's embedded data is read back from the raw HDF5 record (its
stored content hash is checked on reading), analysed again through
``benchrun.analysis.pipeline.analyze_channels`` with the analysis options of the run's sequence
file, and every metric is compared with the report's number and the flags the analysis set
with the report's (the chain's rise times, which ``rise_time_limited`` needs, are stored with
each shot). The shots, with the re-analysed
metrics, are then graded again with the run folder's limits file (``grade_lot``) and every
grade, device verdict, bin and the lot disposition are compared with the report.

Numbers must agree to a relative 1e-9: the pipeline is deterministic, so on the same software
they are identical; the margin only absorbs floating-point differences between machines.
"""

from __future__ import annotations

import math
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.report.raw_waveforms import reanalyze_raw_shot
from benchrun.report.verify_checks import CHECK_REANALYSIS, Check

#: Relative agreement required between a reported and a re-computed number.
REL_TOL = 1e-9
#: Keys of ``ShotResult.conditions`` that the analysis itself measures (taken from it again).
ANALYSED_CONDITIONS = ("if_A", "vr_V")
#: Key of a re-analysed shot's di/dt as a test condition (the runner's commutation definition,
#: :func:`benchrun.runner.shots.measured_didt`, not the analysis' ``didt_A_per_s`` metric).
CONDITION_DIDT = "condition:didt_A_per_s"


def same_number(a: Any, b: Any) -> bool:
    """Equal within :data:`REL_TOL` (None equals None; NaN is treated as None)."""
    def norm(x: Any) -> float | None:
        if x is None:
            return None
        x = float(x)
        return x if math.isfinite(x) else None

    a, b = norm(a), norm(b)
    if a is None or b is None:
        return a is None and b is None
    return math.isclose(a, b, rel_tol=REL_TOL, abs_tol=0.0)


def analysis_flags(flags: Any) -> tuple[str, ...]:
    """A shot row's flags the analysis set (those the runner adds after it left out: the
    measured conditions' ``condition:`` flags and ``metrics_missing``)."""
    return tuple(f for f in flags if not str(f).startswith(("condition:", "metrics_missing")))


def _check(ok: bool, reason: str, details: list[str] | tuple[str, ...] = ()) -> Check:
    return Check(CHECK_REANALYSIS, ok, reason, tuple(details))


def _reanalyse_shots(rows: list[dict[str, Any]], run: Any, options: dict[str, Any] | None,
                     problems: list[str]) -> dict[str, dict[str, Any]]:
    """raw_ref → re-analysed metrics; problems collects every disagreement."""
    from benchrun.runner.shots import measured_didt

    out: dict[str, dict[str, Any]] = {}
    try:
        raw = run.open_raw()
    except BenchrunError as exc:
        problems.append(f"raw record cannot be opened: {exc}")
        return out
    with raw:
        for row in rows:
            ref = row.get("raw_ref") or ""
            label = f"{row.get('serial')} {ref}"
            reported = row.get("metrics") or {}
            try:
                shot = raw.read_shot(ref, verify=True)
            except BenchrunError as exc:
                problems.append(f"{label}: {exc}")
                continue
            try:
                metrics, flags = reanalyze_raw_shot(shot, options)
            except BenchrunError as exc:
                if all(v is None for v in reported.values()):
                    out[ref] = {k: None for k in reported}
                else:
                    problems.append(f"{label}: analysis now fails ({exc}) but the report has "
                                    "metrics")
                continue
            didt = measured_didt(shot.t_start, shot.dt, shot.channels, shot.probes,
                                 metrics.get("if_A"))
            out[ref] = {**metrics, CONDITION_DIDT: didt}
            for key, value in reported.items():
                if not same_number(value, metrics.get(key)):
                    problems.append(f"{label}: {key} reported {value!r}, re-analysis gives "
                                    f"{metrics.get(key)!r}")
            stored = analysis_flags(row.get("flags") or ())
            if stored != tuple(flags):
                lost = [f for f in stored if f not in flags]
                new = [f for f in flags if f not in stored]
                problems.append(f"{label}: flags differ on re-analysis"
                                + (f"; reported only: {'; '.join(lost)}" if lost else "")
                                + (f"; re-analysis only: {'; '.join(new)}" if new else ""))
            conditions = row.get("conditions") or {}
            if "didt_A_per_s" in conditions and not same_number(conditions["didt_A_per_s"],
                                                                 didt):
                problems.append(f"{label}: measured di/dt reported "
                                f"{conditions['didt_A_per_s']!r}, re-measurement gives {didt!r}")
    return out


def compare_grade(where: str, before: dict[str, Any], after: dict[str, Any],
                  problems: list[str]) -> None:
    """One metric's grade as reported (``before``) and regraded (``after``): outcome, value,
    U and limits; each disagreement a line in ``problems``."""
    if before.get("outcome") != after.get("outcome"):
        problems.append(f"{where}: grade reported {before.get('outcome')!r}, regrading gives "
                        f"{after.get('outcome')!r}")
    for field in ("value", "U", "lower", "upper"):
        if not same_number(before.get(field), after.get(field)):
            problems.append(f"{where}: {field} reported {before.get(field)!r}, regrading "
                            f"gives {after.get(field)!r}")


def _compare_grades(reported: dict[str, Any], lot: Any, problems: list[str]) -> None:
    new = lot.to_dict()
    if reported.get("disposition") != new["disposition"]:
        problems.append(f"lot disposition reported {reported.get('disposition')!r}, regrading "
                        f"gives {new['disposition']!r}")
    old_devices = {d["serial"]: d for d in reported.get("devices", [])}
    new_devices = {d["serial"]: d for d in new["devices"]}
    for serial in sorted(set(old_devices) | set(new_devices)):
        old, cur = old_devices.get(serial), new_devices.get(serial)
        if old is None or cur is None:
            problems.append(f"device {serial}: present only in the "
                            f"{'regrade' if old is None else 'report'}")
            continue
        for field in ("verdict", "bin"):
            if old.get(field) != cur.get(field):
                problems.append(f"device {serial}: {field} reported {old.get(field)!r}, "
                                f"regrading gives {cur.get(field)!r}")
        old_grades = {(g["metric"], g["condition"]): g for g in old.get("grades", [])}
        for g in cur.get("grades", []):
            key = (g["metric"], g["condition"])
            before = old_grades.pop(key, None)
            where = f"device {serial} {g['metric']} at {g['condition']}"
            if before is None:
                problems.append(f"{where}: not in the report")
                continue
            compare_grade(where, before, g, problems)
        for key in old_grades:
            problems.append(f"device {serial} {key[0]} at {key[1]}: graded in the report only")


def shots_with_fresh_metrics(rows: list[dict[str, Any]],
                             metrics: dict[str, dict[str, Any]]) -> list[Any]:
    """The report's shot rows as ``ShotResult`` objects, each re-analysed shot carrying the
    re-analysis' metrics and measured conditions (what the regrade uses)."""
    from benchrun.records import ShotResult

    shots = []
    for row in rows:
        data = {k: v for k, v in row.items() if k != "condition"}
        shot = ShotResult.from_dict(data)
        fresh = metrics.get(shot.raw_ref)
        if fresh is not None:
            merged = {k: fresh.get(k) for k in shot.metrics}
            conditions = dict(shot.conditions)
            for key in ANALYSED_CONDITIONS:
                if key in conditions and key in fresh:
                    conditions[key] = fresh[key]
            if "didt_A_per_s" in conditions and CONDITION_DIDT in fresh:
                conditions["didt_A_per_s"] = fresh[CONDITION_DIDT]
            shot = ShotResult.from_dict({**shot.to_dict(), "metrics": merged,
                                         "conditions": conditions})
        shots.append(shot)
    return shots


def reanalysis_check(attachment: dict[str, Any] | None, run: Any,
                     load_error: str | None) -> Any:
    """The re-analysis check of :func:`benchrun.report.verify.verify_report`."""
    if attachment is None:
        return _check(False, "the report carries no readable embedded data to compare")
    if run is None:
        return _check(False, load_error or "no run data to re-analyse")
    rows = attachment.get("shots") or []
    if not rows:
        return _check(False, "the report lists no shots")
    options = attachment.get("analysis_options") or None
    problems: list[str] = []
    metrics = _reanalyse_shots(rows, run, options, problems)
    shot_problems = len(problems)
    try:
        from benchrun.grading import grade_lot, load_limits, run_bench

        if run.limits_path is None or not run.limits_path.is_file():
            problems.append("the run folder has no limits.yaml to regrade with")
        else:
            limits = load_limits(run.limits_path)
            shots = shots_with_fresh_metrics(rows, metrics)
            _compare_grades(attachment.get("lot_grade") or {},
                            grade_lot(shots, limits, bench=run_bench(run)), problems)
    except BenchrunError as exc:
        problems.append(f"regrading failed: {exc}")
    except (KeyError, TypeError, ValueError) as exc:
        problems.append(f"the embedded shot data are malformed ({type(exc).__name__}: {exc})")
    if problems:
        what = (f"{shot_problems} shot disagreement(s)" if shot_problems else "shots agree")
        grade_issues = len(problems) - shot_problems
        summary = f"{what}; {grade_issues} grade disagreement(s)"
        from benchrun.report.manifest import code_digest

        recorded = attachment.get("analysis_code_sha256")
        if recorded and recorded != code_digest():
            summary += (" (note: the analysis/grading code now installed differs from the code "
                        "that produced the report; re-run verification with that version)")
        return _check(False, f"{summary}: {problems[0]}", problems[:200])
    return _check(True, f"{len(rows)} shots re-analysed: every metric, grade, bin, device "
                        "verdict and the lot disposition reproduced")


#: Public names for the lot verification (:mod:`benchrun.report.verify_lot`).
reanalyse_shots = _reanalyse_shots
compare_grades = _compare_grades
