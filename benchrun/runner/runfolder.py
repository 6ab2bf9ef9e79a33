"""The run folder: a new one with its copied files and manifest, or the unfinished one a
``--resume`` continues.

A new run gets ``<out>/<run id>/`` holding copies of the sequence, bench and limits files and
``run.json`` (:func:`benchrun.store.rundata.write_manifest`) before anything is energised. A
resume finds the newest unfinished run of the part and lot (or one that completed without the
signed report it was started to write), and refuses when the sequence or bench file differs
from the copy the run started with.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import secrets
import shutil
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchrun import __version__
from benchrun.config.sequence import SequenceConfig
from benchrun.errors import BenchrunError, RunError
from benchrun.runner.plan import expand_points
from benchrun.runner.thermal import thermal_record
from benchrun.store.results import ResultsStore, utc_now
from benchrun.store.rundata import (
    BENCH_FILE,
    LIMITS_FILE,
    REPORT_FILE,
    SEQUENCE_FILE,
    read_manifest,
    store_url_for,
    write_manifest,
)

if TYPE_CHECKING:
    from benchrun.runner.execute import PreparedRun, RunOptions


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def new_run_id(sequence: SequenceConfig, bench_id: str, out_dir: Path) -> str:
    """``<lot>-<UTC time>-<bench id>-<6 random hex digits>``: unique across benches sharing
    one store even when they start the same lot in the same second (the random part makes
    a clash between two starts on one bench in one second a 1 in 16 million event; a folder
    already there draws again)."""
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    while True:
        run_id = f"{sequence.lot}-{stamp}-{bench_id}-{secrets.token_hex(3)}"
        if not (out_dir / run_id).exists():
            return run_id


def report_missing(run_dir: Path, manifest: dict[str, Any]) -> bool:
    """Whether a signed report was asked for this run and never written: no ``report.pdf``
    in the run folder, or none registered in its results store (the process died while
    signing, or between writing the report and registering it)."""
    if not manifest.get("report_requested"):
        return False
    if not (run_dir / REPORT_FILE).is_file():
        return True
    try:
        with ResultsStore(store_url_for(run_dir, manifest), create=False) as store:
            return not store.reports(str(manifest.get("run_id")))
    except BenchrunError:
        return True


def find_resumable(out_dir: Path, part: str, lot: str) -> Path:
    """Newest run folder in ``out_dir`` of this part and lot that did not complete, or
    that completed without the signed report it was started to write."""
    candidates = []
    for manifest_path in out_dir.glob("*/run.json"):
        try:
            manifest = read_manifest(manifest_path.parent)
        except BenchrunError:
            continue
        if manifest.get("part") == part and manifest.get("lot") == lot and (
                manifest.get("status") != "complete"
                or report_missing(manifest_path.parent, manifest)):
            candidates.append((manifest.get("started", ""), manifest_path.parent))
    if not candidates:
        raise RunError(f"nothing to resume: no unfinished run of {part} lot {lot} in {out_dir}")
    return sorted(candidates)[-1][1]


def open_run_folder(prep: PreparedRun, options: RunOptions
                    ) -> tuple[str, Path, dict[str, Any], bool]:
    """The run's folder: ``(run id, folder, manifest, resumed)``. A new run's folder is made
    with its file copies and ``run.json``; with ``options.resume`` the unfinished one is
    found and checked (RunError when there is none, when its sequence or bench file changed,
    or when it is already complete with its report)."""
    out_dir = Path(options.out_dir)
    if options.resume:
        run_dir = (Path(options.resume) if isinstance(options.resume, Path)
                   else find_resumable(out_dir, prep.sequence.part, prep.sequence.lot))
        manifest = read_manifest(run_dir)
        for name, source in ((SEQUENCE_FILE, prep.sequence_path), (BENCH_FILE, prep.bench_path)):
            kept = run_dir / name
            if kept.is_file() and _sha256(kept) != _sha256(source):
                raise RunError(f"cannot resume {run_dir.name}: {source} differs from the "
                               f"{name} the run started with")
        if manifest.get("status") == "complete" and not report_missing(run_dir, manifest):
            raise RunError(f"run {run_dir.name} is already complete")
        return str(manifest["run_id"]), run_dir, manifest, True
    out_dir.mkdir(parents=True, exist_ok=True)
    run_id = new_run_id(prep.sequence, prep.bench.bench_id, out_dir)
    run_dir = out_dir / run_id
    run_dir.mkdir()
    shutil.copyfile(prep.sequence_path, run_dir / SEQUENCE_FILE)
    shutil.copyfile(prep.bench_path, run_dir / BENCH_FILE)
    if prep.limits_file is not None:
        shutil.copyfile(prep.limits_file, run_dir / LIMITS_FILE)
    manifest: dict[str, Any] = {
        "run_id": run_id,
        "part": prep.sequence.part,
        "lot": prep.sequence.lot,
        "status": "running",
        "started": utc_now(),
        "finished": None,
        "software_version": __version__,
        "sequence_source": str(prep.sequence_path.resolve()),
        "bench_source": str(prep.bench_path.resolve()),
        "run_dir": str(run_dir.resolve()),
        "analysis_options": prep.sequence.analysis.option_values(),
        "calibration": prep.calibration.to_dict(),
        "allow_overdue_calibration": bool(options.allow_overdue_calibration),
        "tolerances": prep.sequence.tolerances.model_dump(),
        "switching_frequencies_Hz": list(prep.sequence.loss.switching_frequencies),
        "loss_recovery": prep.sequence.loss.recovery,
        "fixture": prep.bench.fixture.model_dump(),
        "probes": {k: v.model_dump() for k, v in prep.bench.probes.items()},
        "bench_name": prep.bench.name,
        "bench_id": prep.bench.bench_id,
        "durability": options.durability,
        "resumes": [],
        "report_requested": bool(options.report),
        "thermal": thermal_record(expand_points(prep.sequence), prep.sequence, prep.bench),
    }
    if options.db_url:
        manifest["store_url"] = options.db_url
    if options.operator and options.operator.strip():
        manifest["operator"] = options.operator.strip()
    if prep.bench.site is not None:
        manifest["ambient"] = prep.bench.site.record()
    write_manifest(run_dir, manifest)
    return run_id, run_dir, manifest, False
