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
