"""Tables for the tools engineers already use: stored results and raw waveforms as pandas
frames, written as CSV and Parquet by ``benchrun export`` (:mod:`benchrun.commands.export`).

``shots``
    one row per analysed shot: ``key`` (the shot's raw-record key, its group
    ``/shots/<key>`` in ``raw.h5``), ``run_id``, ``part``, ``lot``, ``serial``, the test point
    (``point``, ``point_label`` and the set values as ``set_<field>``), ``repeat``,
    ``attempt``, ``timestamp``, ``valid``, the measured conditions as ``condition_<key>``,
    each metric in the column named by its metric key (``irrm_A``, ``qrr_C``, ``trr_s`` ...,
    SI units as the key says), ``flags`` (joined by ``"; "``).
``devices``
    one row per device of a graded run: ``run_id``, ``serial``, ``verdict``, ``bin``,
    ``reasons``, and per graded metric and condition ``<metric>@<condition>`` (the value
    graded), ``...@..._U`` (expanded uncertainty) and ``...@..._outcome``.
``lot``
    one row per graded run: ``run_id``, ``part``, ``lots``, ``disposition``, the device
    counts, ``yield``, ``decision_rule``, ``lot_rule``, ``reasons``, and per metric and
    condition ``..._n``, ``..._mean``, ``..._std``, ``..._min``, ``..._max``, ``..._cpk``.
``waveform``
    one shot: ``t`` [s], ``v`` (diode voltage) [V], ``i`` (diode current) [A], the physical
    quantities after probe scaling and deskew, exactly as the analysis sees them
    (:func:`benchrun.analysis.pipeline.physical_channel`), on the current channel's time base.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from benchrun.errors import StoreError
from benchrun.records import ShotResult

#: Columns of the waveform export, in order, and their units.
WAVEFORM_COLUMNS = (("t", "s"), ("v", "V"), ("i", "A"))


def shot_key(raw_ref: str) -> str:
    """The raw-record key in a ``ShotResult.raw_ref`` (``"shots/<key>"`` → ``"<key>"``)."""
    return raw_ref.removeprefix("/").split("/", 1)[-1] if raw_ref else ""


def shots_frame(shots: Iterable[ShotResult]) -> pd.DataFrame:
    """One row per shot (module docstring). Metric columns follow the first appearance of
    each key; a metric a shot lacks is empty (NaN)."""
    rows: list[dict[str, Any]] = []
    metric_keys: dict[str, None] = {}
    condition_keys: dict[str, None] = {}
    for shot in shots:
        metric_keys.update(dict.fromkeys(shot.metrics))
        condition_keys.update(dict.fromkeys(shot.conditions))
        point = shot.point.to_dict()
        row: dict[str, Any] = {
            "key": shot_key(shot.raw_ref), "run_id": shot.run_id, "part": shot.part,
            "lot": shot.lot, "serial": shot.serial, "point": point.pop("index"),
            "point_label": point.pop("label", ""),
            **{f"set_{name}": value for name, value in point.items()},
            "repeat": shot.repeat, "attempt": shot.attempt, "timestamp": shot.timestamp,
            "valid": bool(shot.valid),
        }
        row.update({f"condition_{k}": v for k, v in shot.conditions.items()})
        row.update(shot.metrics)
        row["flags"] = "; ".join(shot.flags)
        rows.append(row)
    frame = pd.DataFrame(rows)
    if frame.empty:
        return pd.DataFrame(columns=["key", "run_id", "serial", "flags"])
    fixed = [c for c in frame.columns if c not in metric_keys and c != "flags"
             and not c.startswith("condition_")]
    ordered = fixed + [f"condition_{k}" for k in condition_keys] + list(metric_keys) + ["flags"]
    frame = frame[ordered]
    for column in [f"condition_{k}" for k in condition_keys] + list(metric_keys):
        frame[column] = pd.to_numeric(frame[column], errors="coerce").astype("float64")
    return frame


def _grade_columns(grades: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for grade in grades:
        name = f"{grade['metric']}@{grade['condition']}"
        out[name] = grade.get("value")
        out[f"{name}_U"] = grade.get("U")
        out[f"{name}_outcome"] = grade.get("outcome")
    return out


def devices_frame(graded: Iterable[tuple[str, Mapping[str, Any]]]) -> pd.DataFrame:
    """One row per device from ``(run_id, LotGrade.to_dict())`` pairs."""
    rows = []
    for run_id, lot in graded:
        for device in lot.get("devices", []):
            rows.append({"run_id": run_id, "serial": device.get("serial"),
                         "verdict": device.get("verdict"), "bin": device.get("bin"),
                         "reasons": "; ".join(device.get("reasons", [])),
                         **_grade_columns(device.get("grades", []))})
    return pd.DataFrame(rows)


def lot_frame(graded: Iterable[tuple[str, Mapping[str, Any]]]) -> pd.DataFrame:
    """One row per graded run from ``(run_id, LotGrade.to_dict())`` pairs."""
    rows = []
    for run_id, lot in graded:
        stats = lot.get("statistics", {})
        row: dict[str, Any] = {
            "run_id": run_id, "part": lot.get("part"), "lots": ", ".join(lot.get("lots", [])),
            "disposition": lot.get("disposition"),
            **{name: stats.get(name) for name in ("count", "conforming", "nonconforming",
                                                  "indeterminate", "invalid", "yield")},
            "decision_rule": lot.get("decision_rule"), "lot_rule": lot.get("lot_rule"),
            "reasons": "; ".join(lot.get("reasons", [])),
        }
        for metric in stats.get("metrics", []):
            name = f"{metric['metric']}@{metric['condition']}"
            for field in ("n", "mean", "std", "min", "max", "cpk"):
                row[f"{name}_{field}"] = metric.get(field)
        rows.append(row)
    return pd.DataFrame(rows)


def waveform_frame(shot: Any) -> pd.DataFrame:
    """``t``, ``v``, ``i`` of one raw shot (a :class:`~benchrun.store.raw_read.RawShot`) in
    s, V, A: probe-scaled and deskewed as the analysis does.

    Raises
    ------
    StoreError
        The shot has no ``diode_voltage`` or ``diode_current`` channel.
    """
    from benchrun.analysis.pipeline import ProbeCalibration, physical_channel

    missing = [n for n in ("diode_voltage", "diode_current") if n not in shot.channels]
    if missing:
        raise StoreError(f"shot {shot.key} has no {' or '.join(missing)} channel")
    values = {}
    for name in ("diode_voltage", "diode_current"):
        probe = shot.probes.get(name) or ProbeCalibration(scale=1.0)
        values[name], _ = physical_channel(name, shot.dt, shot.channels[name], probe)
    n = min(v.size for v in values.values())
    t = shot.t_start + np.arange(n) * shot.dt
    return pd.DataFrame({"t": t, "v": values["diode_voltage"][:n],
                         "i": values["diode_current"][:n]})


def write_waveform_csv(frame: pd.DataFrame, path: Any) -> None:
    """The waveform as CSV, header ``t (s),v (V),i (A)``, every value with the digits that
    read back as the same double (``repr``), so a re-analysis sees the same numbers.

    Raises
    ------
    StoreError
        The file cannot be written.
    """
    header = ",".join(f"{name} ({unit})" for name, unit in WAVEFORM_COLUMNS)
    try:
        with open(path, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(header + "\n")
            columns = [frame[name].to_numpy(dtype=np.float64) for name, _ in WAVEFORM_COLUMNS]
            for row in zip(*columns, strict=True):
                handle.write(",".join(repr(float(x)) for x in row) + "\n")
    except OSError as exc:
        raise StoreError(f"cannot write {path}: {exc.strerror or exc}") from exc
