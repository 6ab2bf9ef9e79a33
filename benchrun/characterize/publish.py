"""From a finished sweep run to its signed characterisation report and curve CSV.

:func:`publish_characterization` reads a run folder (:func:`benchrun.store.rundata.load_run`),
writes ``curves.csv`` (:func:`benchrun.characterize.curves.write_curves_csv`: one row per
measured shot), ``fits.csv`` (:func:`benchrun.characterize.fits.write_sweep_fits_csv`: every
trend and surface fit) and ``characterization.pdf`` (:func:`benchrun.characterize.report
.render_characterization`, signed like the acceptance report) into it, with the run's di/dt
control (``run.json`` ``didt_control``: the means, each point's setting and trim) and every
point that was not fired (``points_invalid``) stated on the report, and the qualification
verdicts (:func:`benchrun.characterize.qualification.grade_qualification`: the run folder's
``limits.yaml`` applied, with its ``bench.yaml``, to the test points standing for the limits'
conditions, and the worst-case snappiness step).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.characterize.curves import Trend, write_curves_csv
from benchrun.characterize.report import render_characterization
from benchrun.records import ShotResult
from benchrun.runner.didt import DIDT_DEFINITION

__all__ = ["CSV_NAME", "FITS_NAME", "PDF_NAME", "PublishedCharacterization", "flagged_lines",
           "grade_run_qualification", "point_table", "publish_characterization"]

PDF_NAME = "characterization.pdf"
CSV_NAME = "curves.csv"
FITS_NAME = "fits.csv"
#: Flags of a valid shot worth listing on the report (recovery behaviour, not data quality).
BEHAVIOUR_FLAGS = ("snap", "ringing", "avalanche")


@dataclass(frozen=True)
class PublishedCharacterization:
    pdf: Path
    csv: Path
    trends: list[Trend]
    shots: list[ShotResult]
    #: ``fits.csv``: every trend and surface fit (:mod:`benchrun.characterize.fits`)
    fits: Path | None = None
    #: the qualification verdicts shown on the report
    #: (:class:`benchrun.characterize.qualification.Qualification`)
    qualification: Any = None


def _flag_name(flag: str) -> str:
    return flag.split(":", 1)[0].strip()


def flagged_lines(shots: Sequence[ShotResult], not_fired: dict[str, str] | None = None,
                  labels: dict[str, str] | None = None) -> list[str]:
    """One line per invalid shot (its reasons), per valid shot with a recovery-behaviour
    flag (:data:`BEHAVIOUR_FLAGS`) and per point that was not fired."""
    lines = []
    for s in shots:  # repeats and attempts numbered from 0, as in curves.csv and the grading
        where = f"{s.point.label}, {s.serial} repeat {s.repeat} attempt {s.attempt}"
        if not s.valid:
            lines.append(f"{where}: invalid ({'; '.join(s.flags)})")
            continue
        behaviour = [f for f in s.flags if _flag_name(f).startswith(BEHAVIOUR_FLAGS)]
        if behaviour:
            lines.append(f"{where}: {'; '.join(behaviour)}")
    for index, reason in (not_fired or {}).items():
        label = (labels or {}).get(index, f"point {index}")
        lines.append(f"{label}: not fired — {reason}")
    return lines


def point_table(shots: Sequence[ShotResult], didt: dict[str, Any] | None
                ) -> list[list[str]]:
    """Rows of the conditions table: per test point the requested and the mean measured
    di/dt of its valid shots, the gate setting used, valid shots / shots."""
    points: dict[int, list[ShotResult]] = {}
    for s in shots:
        points.setdefault(s.point.index, []).append(s)
    control = (didt or {}).get("points", {})
    rows = [["point", "di/dt requested", "di/dt measured (mean)", "gate setting",
             "valid / shots"]]
    for index in sorted(points):
        group = points[index]
        point = group[0].point
        measured = [float(s.conditions["didt_A_per_s"]) for s in group
                    if s.valid and s.conditions.get("didt_A_per_s") is not None]
        settings = sorted({s.acquisition.get("gate_resistance_ohm") for s in group
                           if s.acquisition.get("gate_resistance_ohm") is not None})
        setting = ", ".join(f"{r:g} Ω" for r in settings) or "—"
        if control.get(str(index), {}).get("gate_drive_V"):
            setting += f" at {control[str(index)]['gate_drive_V']:.3g} V"
        rows.append([
            point.label,
            "—" if point.didt_A_per_s is None else f"{point.didt_A_per_s / 1e6:.0f} A/µs",
            f"{sum(measured) / len(measured) / 1e6:.0f} A/µs" if measured else "—",
            setting,
            f"{sum(s.valid for s in group)} / {len(group)}",
        ])
    return rows


def publish_characterization(run_dir: str | Path, signer: Any, *, title: str | None = None
                             ) -> PublishedCharacterization:
    """Write ``curves.csv`` and the signed ``characterization.pdf`` into ``run_dir``."""
    from benchrun.store.rundata import load_run

    run = load_run(Path(run_dir))
    manifest = run.manifest
    shots = sorted(run.shots, key=lambda s: (s.point.index, s.serial, s.repeat, s.attempt))
    run_folder = Path(run.run_dir or run_dir)
    csv_path = write_curves_csv(shots, run_folder / CSV_NAME)
    from benchrun.characterize.fits import write_sweep_fits_csv

    fits_path = write_sweep_fits_csv(shots, run_folder / FITS_NAME)
    didt = manifest.get("didt_control")
    not_fired = manifest.get("points_invalid") or {}
    from benchrun.characterize.verify import verification_data
    from benchrun.config.sequence import load_sequence
    from benchrun.runner.plan import expand_points

    labels: dict[str, str] = {}
    sequence_file = run_folder / "sequence.yaml"
    if sequence_file.is_file():
        labels = {str(p.index): p.label for p in expand_points(load_sequence(sequence_file))}
    qualification = grade_run_qualification(run, shots)
    part, lot = manifest.get("part", ""), manifest.get("lot", "")
    serials = sorted({s.serial for s in shots})
    temperatures = sorted({round(s.point.temperature_K - 273.15, 2) for s in shots})
    notes = [
        f"Run {manifest.get('run_id', '')}: part {part}, lot {lot}, devices "
        f"{', '.join(serials)} (a sample of the lot); {len(shots)} shots "
        f"({sum(s.valid for s in shots)} valid) at "
        f"{len({s.point.index for s in shots})} test points; temperatures "
        f"{', '.join(f'{t:g}' for t in temperatures)} °C.",
        f"Measured on every shot: {DIDT_DEFINITION}",
    ]
    if didt:
        notes.append(
            f"di/dt was set by the runner ({didt.get('means')}), trimmed with trim shots to "
            f"within {100 * float(didt.get('tolerance', 0)):g} % of each point's target and "
            "verified on every shot; a shot outside the tolerance is invalid and never "
            "enters a curve.")
    pdf, trends = render_characterization(
        shots, run_folder / PDF_NAME, signer,
        title=title or f"{part} characterisation — lot {lot}",
        flagged=flagged_lines(shots, not_fired, labels), notes=notes,
        conditions=point_table(shots, didt), qualification=qualification,
        verification=verification_data(run))
    return PublishedCharacterization(pdf, csv_path, trends, shots, fits_path, qualification)


def grade_run_qualification(run: Any, shots: Sequence[ShotResult]) -> Any:
    """The run folder's limits and bench files applied to ``shots`` of ``run``
    (:func:`benchrun.characterize.qualification.grade_qualification`; the points selected by
    the labels of the run folder's sequence file).  Verification calls it again with the
    re-analysed shots."""
    from benchrun.characterize.qualification import grade_qualification
    from benchrun.characterize.verify import entry_labels_of
    from benchrun.config.bench import load_bench
    from benchrun.config.limits import load_limits

    limits_path, bench_path = run.limits_path, run.bench_path
    limits = load_limits(limits_path) if limits_path is not None and limits_path.is_file() \
        else None
    bench = load_bench(bench_path) if bench_path is not None and bench_path.is_file() else None
    source = "" if limits is None else (
        f"the run's {limits_path.name} ({limits.part}"
        + (f" rev {limits.revision}" if limits.revision else "") + ")")
    sequence_path = getattr(run, "sequence_path", None)
    return grade_qualification(shots, limits, bench,
                               entry_labels=entry_labels_of(sequence_path),
                               analysis_options=run.manifest.get("analysis_options"),
                               limits_source=source)
