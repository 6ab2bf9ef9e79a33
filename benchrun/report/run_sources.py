"""What the report's facts rest on besides the run's rows: the run folder's configuration files
as used (bench, sequence), the analysis options, the manifest hashes and the code digest.

This is the one place the gathering step reads files; :func:`benchrun.report.facts_gather.
build_content` then works on the :class:`RunSources` alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.report.manifest import build_manifest, code_digest


@dataclass(frozen=True)
class RunSources:
    """Files of a run folder, as loaded.

    Attributes
    ----------
    bench, sequence
        ``BenchConfig`` / ``SequenceConfig`` of the run folder, ``None`` when absent or
        unreadable (the report then says "not available").
    analysis_options
        The ``RecoveryOptions`` keyword arguments the run used.
    manifest
        Manifest entries as dicts (:class:`benchrun.report.manifest.ManifestEntry`).
    code_sha256
        Digest of the analysis and grading code (:func:`benchrun.report.manifest.code_digest`).
    limits
        The ``LimitsSpec`` the lot was graded with (bins, decision rule, revision).
    shot_settings
        Test point index → the settings one valid shot of that point was fired with (pulse
        timing, ranges, record length, sample interval), from the raw record.
    """

    bench: Any = None
    sequence: Any = None
    analysis_options: dict[str, Any] = field(default_factory=dict)
    manifest: tuple[dict[str, Any], ...] = ()
    code_sha256: str = ""
    limits: Any = None
    shot_settings: dict[int, dict[str, Any]] = field(default_factory=dict)


def load_config(kind: str, path: Path | None) -> Any:
    """Load the bench or sequence file of a run folder; None when absent or unreadable."""
    if path is None or not Path(path).is_file():
        return None
    try:
        if kind == "bench":
            from benchrun.config.bench import load_bench

            return load_bench(path)
        from benchrun.config.sequence import load_sequence

        return load_sequence(path)
    except BenchrunError:
        return None


def analysis_options_of(run: Any, sequence: Any) -> dict[str, Any]:
    """The analysis options the run used (its sequence file, else ``run.json``)."""
    if sequence is not None:
        return dict(sequence.analysis.option_values())
    stored = (getattr(run, "manifest", None) or {}).get("analysis_options")
    return dict(stored) if isinstance(stored, dict) else {}


def load_limits_of(run: Any) -> Any:
    """The run folder's limits file, or ``None`` when absent or unreadable."""
    path = getattr(run, "limits_path", None)
    if path is None or not Path(path).is_file():
        return None
    try:
        from benchrun.config.limits import load_limits

        return load_limits(path)
    except BenchrunError:
        return None


def shot_settings(run: Any) -> dict[int, dict[str, Any]]:
    """The fired settings of the first valid shot of every test point (from the raw record)."""
    first: dict[int, str] = {}
    for shot in sorted(run.shots, key=lambda s: (s.point.index, s.serial, s.repeat, s.attempt)):
        if shot.valid and shot.raw_ref and shot.point.index not in first:
            first[shot.point.index] = shot.raw_ref
    out: dict[int, dict[str, Any]] = {}
    if not first:
        return out
    try:
        raw = run.open_raw()
    except Exception:  # no or damaged raw record: the report says "not recorded"
        return out
    try:
        for index, ref in first.items():
            try:
                settings = raw.read_shot(ref, verify=False).attrs.get("settings")
            except Exception:  # one damaged shot leaves its settings "not recorded"
                continue
            if isinstance(settings, dict):
                out[index] = dict(settings)
    finally:
        raw.close()
    return out


def run_sources(run: Any, limits: Any = None) -> RunSources:
    """Read everything :func:`~benchrun.report.facts_gather.build_content` needs from files.

    ``limits`` is the ``LimitsSpec`` the lot was graded with; by default the run folder's.
    """
    bench = load_config("bench", getattr(run, "bench_path", None))
    sequence = load_config("sequence", getattr(run, "sequence_path", None))
    return RunSources(
        limits=limits if limits is not None else load_limits_of(run),
        shot_settings=shot_settings(run),
        bench=bench,
        sequence=sequence,
        analysis_options=analysis_options_of(run, sequence),
        manifest=tuple(e.to_dict() for e in build_manifest(run)),
        code_sha256=code_digest(),
    )
