"""Shots read back from the raw HDF5 record and analysed again through the runner's pipeline.

Used by the report (waveform figures and their marks) and by verification (re-analysis);
it imports neither.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import replace
from typing import Any

import numpy as np

from benchrun.errors import BenchrunError
from benchrun.report.facts import WaveformMarks


def raw_shot_probes(raw_shot: Any) -> dict[str, Any]:
    """The shot's probe calibrations with the chain rise times the runner recorded in its
    attributes (``settings.probe_rise_times_s``; records without them: none)."""
    rises = ((raw_shot.attrs or {}).get("settings") or {}).get("probe_rise_times_s") or {}
    return {name: replace(probe, rise_time_s=float(rises[name])) if name in rises else probe
            for name, probe in raw_shot.probes.items()}


def reanalyze_raw_shot(raw_shot: Any, options: dict[str, Any] | None
                       ) -> tuple[dict[str, Any], tuple[str, ...]]:
    """Metrics and flags of one raw shot through the runner's pipeline."""
    from benchrun.analysis import RecoveryOptions
    from benchrun.analysis.pipeline import analyze_channels

    opts = RecoveryOptions(**options) if options else None
    result = analyze_channels(raw_shot.t_start, raw_shot.dt, raw_shot.channels,
                              raw_shot_probes(raw_shot), opts)
    return dict(result.metrics()), tuple(result.flags)


def analyze_raw_shot(raw_shot: Any, options: dict[str, Any] | None) -> dict[str, Any]:
    """Metrics of one raw shot through the runner's pipeline (``ShotAnalysis.metrics()``)."""
    return reanalyze_raw_shot(raw_shot, options)[0]


def shot_waveform(raw_shot: Any, options: dict[str, Any]) -> tuple[Any, Any, Any,
                                                                    WaveformMarks]:
    """Physical waveforms of one raw shot and the marks from its re-analysis."""
    channels, probes = raw_shot.channels, raw_shot.probes

    def physical(name: str) -> tuple[np.ndarray, np.ndarray]:
        from benchrun.analysis.pipeline import ProbeCalibration, physical_channel

        probe = probes.get(name) or ProbeCalibration(scale=1.0)
        values, _ = physical_channel(name, raw_shot.dt, channels[name], probe)
        t = raw_shot.t_start + np.arange(values.size) * raw_shot.dt
        return t, values

    t_i, i = physical("diode_current")
    t_v, v = physical("diode_voltage")
    v = np.interp(t_i, t_v, v)
    marks = WaveformMarks(None, None, None, None, None)
    with contextlib.suppress(BenchrunError):
        metrics = analyze_raw_shot(raw_shot, options)
        marks = WaveformMarks(metrics.get("t0_s"), metrics.get("t_irrm_s"),
                              metrics.get("irrm_A"), metrics.get("t_trr_s"),
                              metrics.get("t2_s"), metrics.get("if_A"), metrics.get("vrm_V"),
                              float((options or {}).get("fit_high", 0.9)))
    return t_i, v, i, marks


@contextlib.contextmanager
def raw_waveform_loader(run: Any, options: dict[str, Any] | None) -> Iterator[Any]:
    """A loader ``raw_ref → (t, v, i, marks)`` over the run's raw record (None if missing)."""
    raw = None
    with contextlib.suppress(BenchrunError):
        raw = run.open_raw()

    def load(ref: str) -> Any:
        if raw is None:
            return None
        try:
            return shot_waveform(raw.read_shot(ref), options)
        except (BenchrunError, KeyError):
            return None

    try:
        yield load
    finally:
        if raw is not None:
            raw.close()
