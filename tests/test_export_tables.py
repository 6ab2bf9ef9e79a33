"""The export tables and waveform (benchrun/store/export.py) from constructed inputs, and the
export command's one-line errors."""

from __future__ import annotations

import numpy as np
from store_helpers import make_channels, make_probes, make_shot

from benchrun.analysis.pipeline import physical_channel
from benchrun.cli import main
from benchrun.store.export import (
    shots_frame,
    waveform_frame,
    write_waveform_csv,
)
from benchrun.store.raw import RawRecord


def test_shots_frame_names_metric_columns_by_their_keys():
    a = make_shot(serial="S001", raw_ref="shots/p000-S001-r00-a0")
    b = make_shot(serial="S002", point_index=1, valid=False, raw_ref="shots/p001-S002-r00-a0")
    frame = shots_frame([a, b])
    assert list(frame["key"]) == ["p000-S001-r00-a0", "p001-S002-r00-a0"]
    assert list(frame["serial"]) == ["S001", "S002"] and list(frame["point"]) == [0, 1]
    assert frame.loc[0, "trr_s"] == a.metrics["trr_s"]
    assert frame.loc[0, "qrr_C"] == 1e-300  # exact, not rounded
    assert np.isnan(frame.loc[0, "softness"])  # None metric: empty
    assert frame.loc[1, "flags"] == "ringing; clipped_current" and frame.loc[0, "flags"] == ""
    assert frame.loc[0, "condition_temperature_K"] == 298.15
    assert frame.loc[1, "set_temperature_K"] == 398.15
    assert list(frame["valid"]) == [True, False]
    assert list(frame.columns)[-1] == "flags"


def test_waveform_is_the_pipeline_physical_signal_and_its_csv_reads_back_exactly(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", compression=None) as raw:
        raw.append_shot("k", -1e-6, 2.5e-10, make_channels(3, 600), make_probes(), {})
        shot = raw.read_shot("k")
    frame = waveform_frame(shot)
    for column, name in (("v", "diode_voltage"), ("i", "diode_current")):
        expected, _ = physical_channel(name, shot.dt, shot.channels[name], shot.probes[name])
        np.testing.assert_array_equal(frame[column].to_numpy(), expected)  # deskewed too
    np.testing.assert_array_equal(frame["t"].to_numpy(), -1e-6 + np.arange(600) * 2.5e-10)
    target = tmp_path / "w.csv"
    write_waveform_csv(frame, target)
    assert target.read_text().splitlines()[0] == "t (s),v (V),i (A)"
    back = np.loadtxt(target, delimiter=",", skiprows=1)  # correctly rounded parsing
    np.testing.assert_array_equal(back, frame.to_numpy())


def test_export_errors_are_one_line(tmp_path, capsys):
    assert main(["export", str(tmp_path / "nothing"), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("benchrun export: error:") and len(err.strip().splitlines()) == 1
    (tmp_path / "empty").mkdir()
    assert main(["export", str(tmp_path / "empty"), "--out", str(tmp_path / "o")]) == 2
    assert "holds no run folder" in capsys.readouterr().err
