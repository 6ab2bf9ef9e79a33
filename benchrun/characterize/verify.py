"""Verification of a signed characterisation report (``kind: characterization``).

At signing, :func:`verification_data` adds to the report's JSON attachment what verification
compares: the run's SHA-256 manifest (:func:`benchrun.report.manifest.build_manifest`, as the
acceptance report: ``raw.h5``, the sequence, bench and limits files, ``run.json``, the result
rows and the run's row of the results store), every shot row the report rests on
(``ShotResult.to_dict()``: raw record key, conditions, metrics, flags), the analysis options
and the digest of the analysis and grading code.

:func:`verify_characterization` answers, each yes or no with a reason: the signature is intact
and the signer trusted (as for every report); the manifest hashes match
(:func:`benchrun.report.verify_data.manifest_check`); every shot re-analysed from ``raw.h5``
reproduces its metrics, flags and measured di/dt condition
(:func:`benchrun.report.verify_reanalysis.reanalyse_shots`) and the qualification graded
again on the re-analysed shots (:func:`benchrun.characterize.qualification
.grade_qualification`, the run folder's limits and bench files) reproduces the attached
verdicts: the graded points, each device's verdict, its outcome at every limits condition (the
nominal one included) with each limit's outcome and value, and its worst-case snappiness step
(outcome and the shot it was graded on).  A characterisation report is not entered in the
results store's reports table, so that check is reported as not applicable, with the reason.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.records import json_safe
from benchrun.report.verify_checks import (
    CHECK_REANALYSIS,
    CHECK_REGISTRATION,
    Check,
    VerificationResult,
)
from benchrun.report.verify_reanalysis import (
    compare_grade,
    reanalyse_shots,
    shots_with_fresh_metrics,
)

__all__ = ["KIND", "compare_qualification", "entry_labels_of", "verification_data",
           "verify_characterization"]

#: ``kind`` of a characterisation report's attachment.
KIND = "characterization"
#: Reason given for the reports-table check, which does not apply to this kind.
NOT_REGISTERED = ("not applicable: a characterisation report is not entered in the results "
                  "store's reports table")


def entry_labels_of(sequence_file: Path | None) -> dict[int, str]:
    """Test point index → the label of its sequence entry (what the qualification's point
    selection names); empty without a readable sequence file."""
    if sequence_file is None or not sequence_file.is_file():
        return {}
    from benchrun.config.sequence import load_sequence
    from benchrun.runner.plan import expand_with_specs

    return {p.index: spec.label or "" for p, spec in expand_with_specs(load_sequence(
        sequence_file))}


def verification_data(run: Any) -> dict[str, Any]:
    """What the attachment carries for verification (module docstring)."""
    from benchrun.report.manifest import build_manifest, code_digest
    from benchrun.report.run_sources import analysis_options_of, load_config

    sequence = load_config("sequence", getattr(run, "sequence_path", None))
    manifest = run.manifest or {}
    return json_safe({
        "run_id": run.run_id,
        "part": manifest.get("part", ""),
        "lot": manifest.get("lot", ""),
        "manifest": [e.to_dict() for e in build_manifest(run)],
        "shots": [s.to_dict() for s in run.shots],
        "analysis_options": analysis_options_of(run, sequence),
        "analysis_code_sha256": code_digest(),
    })


def _grades(condition: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {str(g.get("metric")): g for g in condition.get("grades") or []}


def compare_qualification(reported: dict[str, Any], regraded: dict[str, Any],
                          problems: list[str]) -> None:
    """Append every difference between the attached and the regraded qualification
    (:meth:`Qualification.to_dict` of both) to ``problems``."""
    if reported.get("not_graded") != regraded.get("not_graded"):
        problems.append(f"qualification not graded: reported {reported.get('not_graded')!r}, "
                        f"regrading gives {regraded.get('not_graded')!r}")
    old_sel = [(g.get("condition"), g.get("point_index")) for g in reported.get("selection", [])]
    new_sel = [(g.get("condition"), g.get("point_index")) for g in regraded.get("selection", [])]
    if old_sel != new_sel:
        problems.append(f"graded points reported {old_sel}, regrading gives {new_sel}")
    old_devices = {d["serial"]: d for d in reported.get("devices", [])}
    new_devices = {d["serial"]: d for d in regraded.get("devices", [])}
    for serial in sorted(set(old_devices) | set(new_devices)):
        old, cur = old_devices.get(serial), new_devices.get(serial)
        if old is None or cur is None:
            problems.append(f"device {serial}: present only in the "
                            f"{'regrade' if old is None else 'report'}")
            continue
        if old.get("verdict") != cur.get("verdict"):
            problems.append(f"device {serial}: verdict reported {old.get('verdict')!r}, "
                            f"regrading gives {cur.get('verdict')!r}")
        old_wc, new_wc = old.get("worst_case") or {}, cur.get("worst_case") or {}
        for field in ("outcome", "shot"):
            if old_wc.get(field) != new_wc.get(field):
                problems.append(f"device {serial} worst-case snappiness step: {field} reported "
                                f"{old_wc.get(field)!r}, regrading gives {new_wc.get(field)!r}")
        old_conditions = {c["condition"]: c for c in old.get("conditions", [])}
        for condition in cur.get("conditions", []):
            name = condition["condition"]
            before = old_conditions.pop(name, None)
            where = f"device {serial} at {name}"
            if before is None:
                problems.append(f"{where}: not in the report")
                continue
            if before.get("outcome") != condition.get("outcome"):
                problems.append(f"{where}: verdict reported {before.get('outcome')!r}, "
                                f"regrading gives {condition.get('outcome')!r}")
            old_grades, new_grades = _grades(before), _grades(condition)
            for metric in sorted(set(old_grades) | set(new_grades)):
                a, b = old_grades.get(metric), new_grades.get(metric)
                if a is None or b is None:
                    problems.append(f"{where} {metric}: graded only in the "
                                    f"{'regrade' if a is None else 'report'}")
                    continue
                compare_grade(f"{where} {metric}", a, b, problems)
        for name in old_conditions:
            problems.append(f"device {serial} at {name}: in the report only")


def _regrade(attachment: dict[str, Any], rows: list[dict[str, Any]],
             metrics: dict[str, dict[str, Any]], run: Any, problems: list[str]) -> None:
    """Grade the qualification again on the re-analysed shots, as the report was graded
    (:func:`benchrun.characterize.publish._qualification`), and compare."""
    from benchrun.characterize.publish import grade_run_qualification

    reported = attachment.get("qualification")
    if not isinstance(reported, dict):
        problems.append("the report carries no qualification verdicts to compare")
        return
    shots = sorted(shots_with_fresh_metrics(rows, metrics),
                   key=lambda s: (s.point.index, s.serial, s.repeat, s.attempt))
    regraded = grade_run_qualification(run, shots)
    compare_qualification(reported, regraded.to_dict(), problems)


def reanalysis_check(attachment: dict[str, Any], run: Any, load_error: str | None) -> Check:
    """Every shot re-analysed from ``raw.h5`` and the qualification graded again."""
    if run is None:
        return Check(CHECK_REANALYSIS, False, load_error or "no run data to re-analyse")
    rows = attachment.get("shots") or []
    if not rows:
        return Check(CHECK_REANALYSIS, False, "the report lists no shots (signed before "
                     "characterisation reports carried them: publish it again to verify)")
    problems: list[str] = []
    metrics = reanalyse_shots(rows, run, attachment.get("analysis_options") or None, problems)
    shot_problems = len(problems)
    try:
        _regrade(attachment, rows, metrics, run, problems)
    except BenchrunError as exc:
        problems.append(f"regrading failed: {exc}")
    except (KeyError, TypeError, ValueError) as exc:
        problems.append(f"the embedded data are malformed ({type(exc).__name__}: {exc})")
    if problems:
        what = f"{shot_problems} shot disagreement(s)" if shot_problems else "shots agree"
        summary = f"{what}; {len(problems) - shot_problems} qualification disagreement(s)"
        from benchrun.report.manifest import code_digest

        recorded = attachment.get("analysis_code_sha256")
        if recorded and recorded != code_digest():
            summary += (" (note: the analysis/grading code now installed differs from the code "
                        "that produced the report; re-run verification with that version)")
        return Check(CHECK_REANALYSIS, False, f"{summary}: {problems[0]}",
                     tuple(problems[:200]))
    return Check(CHECK_REANALYSIS, True,
                 f"{len(rows)} shots re-analysed: every metric, flag and measured di/dt "
                 "reproduced; the qualification verdicts (each device's verdict at every "
                 "limits condition and its worst-case snappiness step) reproduced")


def verify_characterization(pdf_path: Path, attachment: dict[str, Any], intact: Check,
                            trust: Check, facts: dict[str, Any], data: Path | None,
                            runs: Any = ()) -> VerificationResult:
    """The checks of a characterisation report (module docstring); never raises."""
    from benchrun.report.verify import data_checks

    _, manifest, reanalysis = data_checks(pdf_path, attachment, data, runs, reanalysis_check)
    registration = Check(CHECK_REGISTRATION, True, NOT_REGISTERED, applicable=False)
    facts.update({k: attachment.get(k) for k in ("run_id", "part", "lot")})
    facts["kind"] = KIND
    return VerificationResult(str(pdf_path), (intact, trust, manifest, reanalysis,
                                              registration), None, facts)
