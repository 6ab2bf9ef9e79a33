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
    """

    bench: Any = None
    sequence: Any = None
    analysis_options: dict[str, Any] = field(default_factory=dict)
    manifest: tuple[dict[str, Any], ...] = ()
    code_sha256: str = ""


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


def run_sources(run: Any) -> RunSources:
    """Read everything :func:`~benchrun.report.facts_gather.build_content` needs from files."""
    bench = load_config("bench", getattr(run, "bench_path", None))
    sequence = load_config("sequence", getattr(run, "sequence_path", None))
    return RunSources(
        bench=bench,
        sequence=sequence,
        analysis_options=analysis_options_of(run, sequence),
        manifest=tuple(e.to_dict() for e in build_manifest(run)),
        code_sha256=code_digest(),
    )
