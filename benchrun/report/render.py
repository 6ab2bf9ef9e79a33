"""Issue the lot acceptance report: gather the facts, lay out the pages, sign, register.

``render_report(run, lot, out_pdf, *, signer, loss=None)`` is the public entry point
(DEVELOPERS.md, report contract). The steps, one module each:

1. :mod:`benchrun.report.facts_gather` — the facts of the run as plain data (pure); the
   files they rest on are read here (bench and sequence as used, manifest hashes);
2. :mod:`benchrun.report.pages_pdf` — the facts laid out as pages (unsigned PDF);
3. :mod:`benchrun.report.sign` — the numbers embedded as JSON and the PAdES signature;
4. :mod:`benchrun.report.registry` — the issued report recorded in the results store.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
from pathlib import Path
from typing import Any

from reportlab.platypus import Flowable

from benchrun import __version__
from benchrun.report.facts import ReportContent, attachment_dict
from benchrun.report.keys import ReportSigner
from benchrun.report.pages_pdf import WaveformLoader, render_pdf_bytes
from benchrun.report.sign import sign_pdf_bytes, write_signed_pdf


def render_signed(
    content: ReportContent,
    out_pdf: str | Path,
    signer: ReportSigner,
    *,
    waveform_loader: WaveformLoader | None = None,
    loss_flowables: list[Flowable] | None = None,
) -> Path:
    """Render, embed the JSON numbers, sign and write ``out_pdf`` atomically."""
    pdf, box = render_pdf_bytes(content, waveform_loader=waveform_loader,
                                loss_flowables=loss_flowables)
    signed = sign_pdf_bytes(pdf, signer, box, attachment=attachment_dict(content))
    out = write_signed_pdf(out_pdf, signed)
    return out


def render_report(run: Any, lot: Any, out_pdf: str | Path, *, signer: ReportSigner,
                  loss: Any = None, limits: Any = None) -> Path:
    """Render and sign the acceptance report of one run.

    Parameters
    ----------
    run
        ``RunData`` from :func:`benchrun.store.rundata.load_run`.
    lot
        ``LotGrade`` from :func:`benchrun.grading.grade_lot` on ``run.shots``.
    out_pdf
        Where the signed PDF goes (conventionally ``<run_dir>/report.pdf``).
    signer
        Loaded signing identity (:func:`benchrun.report.keys.load_signer`).
    loss
        Optional ``LossTable`` (:func:`benchrun.loss.estimate_losses`) for the loss section.
    limits
        The ``LimitsSpec`` the lot was graded with (bins and decision rule are printed from
        it); by default the run folder's ``limits.yaml``.

    Returns
    -------
    Path
        The signed report. It is also registered in the run's results store when the store
        offers ``add_report``.
    """
    from benchrun.report.facts_gather import build_content
    from benchrun.report.run_sources import run_sources

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0)
    content = build_content(run, lot, signer, run_sources(run, limits), now=now)
    return _sign_and_register(run, content, out_pdf, signer, loss)


def render_lot_report(view: Any, lot: Any, out_pdf: str | Path, *, signer: ReportSigner,
                      sources: Any, lot_sources: Any, loss: Any = None) -> Path:
    """Render and sign the acceptance report of a lot tested in several runs.

    The same facts, pages, signature and registration as :func:`render_report`, over the
    lot's counted shots (``view``, :class:`benchrun.report.lot_sources.LotRunView`) with the
    runs, benches, instruments, retest rule and superseded tests added
    (:func:`benchrun.report.facts_lot.lot_content`). The report is registered in the store
    under the newest run that counts.

    Parameters
    ----------
    view, sources, lot_sources
        From :func:`benchrun.report.lot_sources.lot_view`.
    lot
        ``LotGrade`` of ``view.shots`` (:func:`benchrun.grading.across.grade_across`).
    """
    from benchrun.report.facts_gather import build_content
    from benchrun.report.facts_lot import lot_content

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0)
    content = lot_content(build_content(view, lot, signer, sources, now=now), lot_sources,
                          now=now)
    return _sign_and_register(view, content, out_pdf, signer, loss)


def _sign_and_register(run: Any, content: Any, out_pdf: str | Path, signer: ReportSigner,
                       loss: Any) -> Path:
    """Render ``content`` (with the loss section when ``loss`` is given), sign it, and
    register the report in the run's store."""
    from benchrun.report.raw_waveforms import raw_waveform_loader

    loss_parts: list[Flowable] = []
    if loss is not None:
        loss_parts = _loss_flowables(loss, _invalid_shots(run))
    with raw_waveform_loader(run, content.analysis_options) as loader:
        path = render_signed(content, out_pdf, signer, waveform_loader=loader,
                             loss_flowables=loss_parts)
    _register(run, content, path)
    return path


def _invalid_shots(run: Any) -> list[str]:
    """Every shot not valid, named with its reason (the loss estimate leaves them out)."""
    lines = []
    for s in sorted(run.shots, key=lambda s: (s.serial, s.point.index, s.repeat, s.attempt)):
        if s.valid:
            continue
        where = s.point.label or f"test point {s.point.index}"
        why = "; ".join(s.flags) or "not valid"
        lines.append(f"{s.serial}, {where}, repeat {s.repeat}, attempt {s.attempt} "
                     f"({s.raw_ref or 'no raw record'}): {why}")
    return lines


def _loss_flowables(loss: Any, left_out: list[str]) -> list[Flowable]:
    try:
        from benchrun.report.pages_loss import loss_flowables
    except ImportError:  # the loss section module is optional: no section without it
        return []
    from benchrun.report.pages_style import paragraph_styles

    return list(loss_flowables(loss, paragraph_styles(), left_out))


def _register(run: Any, content: ReportContent, path: Path) -> None:
    url = getattr(run, "store_url", None)
    if not url:
        return
    from benchrun.report.registry import register_report

    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    register_report(url, content, path, digest)


__all__ = ["__version__", "render_lot_report", "render_pdf_bytes", "render_report",
           "render_signed"]
