"""Grade a stored run, estimate its recovery losses and issue the signed report: one call.

Used by ``benchrun demo``, ``benchrun run --sign-key`` and ``benchrun report``; the commands
only parse arguments and print what :func:`publish_report` returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.errors import ReportError


@dataclass(frozen=True)
class PublishedReport:
    """What :func:`publish_report` made.

    Attributes
    ----------
    run
        The loaded :class:`~benchrun.store.rundata.RunData`.
    lot
        The :class:`~benchrun.grading.LotGrade` printed in the report.
    loss
        The :class:`~benchrun.loss.LossTable` at the run's switching frequencies, or ``None``
        when the sequence names none.
    path
        The signed PDF.
    limits_path
        The limits file the lot was graded against.
    """

    run: Any
    lot: Any
    loss: Any
    path: Path
    limits_path: Path


def publish_report(
    source: str | Path,
    signer: Any,
    *,
    run_id: str | None = None,
    limits_path: str | Path | None = None,
    out_pdf: str | Path | None = None,
    switching_frequencies_Hz: list[float] | None = None,
) -> PublishedReport:
    """Grade a stored run against its limits and render the signed acceptance report.

    Parameters
    ----------
    source
        Run folder or results database URL (see :func:`benchrun.store.rundata.load_run`).
    signer
        A :class:`benchrun.report.keys.ReportSigner`.
    run_id
        The run, when ``source`` is a database holding several.
    limits_path
        Limits file; default the run folder's ``limits.yaml`` (the limits the run was made
        with). The report's manifest hashes the run folder's file, so a report graded
        against another file will not verify: copy the new limits into a new run folder
        for a formal re-grade.
    out_pdf
        Where to write the report; default ``report.pdf`` in the run folder.
    switching_frequencies_Hz
        Frequencies for the loss section; default those the sequence names.

    Raises
    ------
    ReportError
        The run has no folder to take the limits or the report path from and none was given.
    """
    from benchrun.config.limits import load_limits
    from benchrun.grading import grade_lot, run_bench
    from benchrun.loss import capacitive_parts_of, estimate_losses, rejected_devices
    from benchrun.report.render import render_report
    from benchrun.store.rundata import LIMITS_FILE, load_run

    run = load_run(source, run_id)
    if limits_path is None:
        if run.run_dir is None:
            raise ReportError("the run has no run folder: name the limits file to grade against")
        limits_path = run.run_dir / LIMITS_FILE
    if out_pdf is None:
        if run.run_dir is None:
            raise ReportError("the run has no run folder: name the report file to write")
        out_pdf = run.run_dir / "report.pdf"
    spec = load_limits(limits_path)
    lot = grade_lot(run.shots, spec, bench=run_bench(run),
                    analysis_options=run.manifest.get("analysis_options"))
    freqs = switching_frequencies_Hz
    if freqs is None:
        freqs = list(run.manifest.get("switching_frequencies_Hz") or [])
    loss = estimate_losses(run.shots, freqs, capacitive_parts=capacitive_parts_of(run.manifest),
                           rejected=rejected_devices(lot)) if freqs else None
    path = render_report(run, lot, Path(out_pdf), signer=signer, loss=loss, limits=spec)
    return PublishedReport(run=run, lot=lot, loss=loss, path=Path(path),
                           limits_path=Path(limits_path))


@dataclass(frozen=True)
class PublishedLotReport:
    """What :func:`publish_lot_report` made.

    Attributes
    ----------
    lot_data
        The :class:`~benchrun.store.lotdata.LotData` with each run's folder as found.
    folders
        Where each run's folder was found (:class:`~benchrun.store.lotdata.RunFolder`).
    graded
        The :class:`~benchrun.grading.across.LotAcross` (``.grade`` is the ``LotGrade``).
    loss
        The loss table, or ``None``.
    path
        The signed PDF.
    """

    lot_data: Any
    folders: list[Any]
    graded: Any
    loss: Any
    path: Path

    @property
    def lot(self) -> Any:
        return self.graded.grade


def publish_lot_report(
    source: str | Path,
    lot: str,
    signer: Any,
    *,
    runs: tuple[str | Path, ...] | list[str | Path] = (),
    out_pdf: str | Path | None = None,
    switching_frequencies_Hz: list[float] | None = None,
) -> PublishedLotReport:
    """Grade every run of ``lot`` in the store behind ``source`` as one lot and render its
    signed acceptance report.

    Each device's shots come from the run the retest rule picks
    (:data:`benchrun.store.lotdata.RETEST_RULE`); the limits are those of the newest run
    that counts and the budgets take the largest accuracy bound of the benches involved
    (:func:`benchrun.grading.across.grade_across`). Every run folder of the lot must be found
    (where the store records it, else under one of ``runs``): the report's manifest hashes
    each run's raw record, configuration files and rows.

    Parameters
    ----------
    source
        Results database URL, SQLite file, or a run folder whose store is meant.
    runs
        Folders to search for run folders that are not where the store records them.
    out_pdf
        Where to write the report; default ``report-<lot>.pdf`` in the current folder.

    Raises
    ------
    ReportError
        A run folder of the lot was not found (each one is named with where it was made).
    StoreError, GradingError
        No run of that lot, or it cannot be graded.
    """
    from benchrun.grading.across import grade_across
    from benchrun.loss import capacitive_parts_of, estimate_losses, rejected_devices
    from benchrun.report.lot_sources import lot_view
    from benchrun.report.render import render_lot_report
    from benchrun.store.lotdata import counted_runs, load_lot, locate_lot_folders

    lot_data, folders = locate_lot_folders(load_lot(source, lot), runs)
    missing = [f for f in folders if not f.found]
    if missing:
        raise ReportError(f"lot {lot}: " + "; ".join(f.describe() for f in missing))
    counted = counted_runs(lot_data)
    graded = grade_across(counted, lot_data.shots, lot=lot)
    view, sources, facts = lot_view(lot_data, limits=graded.limits,
                                    limits_run_id=graded.limits_run_id)
    freqs = switching_frequencies_Hz
    if freqs is None:
        freqs = list(view.manifest.get("switching_frequencies_Hz") or [])
    loss = estimate_losses(view.shots, freqs,
                           capacitive_parts=capacitive_parts_of(view.manifest),
                           rejected=rejected_devices(graded.grade)) if freqs else None
    out = Path(out_pdf) if out_pdf is not None else Path(f"report-{lot}.pdf")
    path = render_lot_report(view, graded.grade, out, signer=signer, sources=sources,
                             lot_sources=facts, loss=loss)
    return PublishedLotReport(lot_data=lot_data, folders=folders, graded=graded, loss=loss,
                              path=Path(path))


def load_signer_from_files(
    *, key: str | Path | None, cert: str | Path | None, p12: str | Path | None,
    role: str | None = None, passphrase: str | None = None,
) -> Any:
    """Load a signing identity given as PEM key + certificate or as a PKCS#12 file.

    The passphrase comes from the argument, else the environment variable
    ``BENCHRUN_KEY_PASSPHRASE``, else a prompt on the terminal (not echoed).
    """
    from benchrun.report.keys import load_pkcs12_signer, load_signer, passphrase_from_env_or_prompt

    if p12 is not None and (key is not None or cert is not None):
        raise ReportError("give either --p12 or --key with --cert, not both")
    if p12 is None and (key is None or cert is None):
        raise ReportError("signing needs --key and --cert (or --p12)")
    secret = passphrase if passphrase is not None else passphrase_from_env_or_prompt()
    if p12 is not None:
        return load_pkcs12_signer(p12, secret, role=role)
    return load_signer(key, cert, secret, role=role)  # type: ignore[arg-type]
