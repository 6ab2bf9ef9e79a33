"""``benchrun export RESULTS --out DIR`` and ``benchrun export RESULTS --shot KEY --out FILE``.

RESULTS is a run folder, a folder of run folders, a results database file or URL. The first
form writes ``shots``, ``devices`` and ``lot`` tables as CSV and Parquet into DIR (columns:
:mod:`benchrun.store.export`); the second writes one shot's waveform (``t``, ``v``, ``i`` in
s, V, A) as CSV that ``benchrun analyze`` reads.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from benchrun.errors import StoreError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "export",
        help="write stored results (CSV, Parquet) or one shot's waveform (CSV)",
        description="RESULTS is a run folder, a folder of run folders, or a results database "
        "file or URL. Without --shot: writes shots, devices and lot tables as .csv and "
        ".parquet into the folder --out. With --shot KEY: writes that shot's waveform "
        "(t, v, i in s, V, A, probe-scaled and deskewed) as the CSV file --out, which "
        "'benchrun analyze' reads.",
    )
    parser.add_argument("results", metavar="RESULTS",
                        help="run folder, folder of runs, or results database URL")
    parser.add_argument("--out", required=True, type=Path, metavar="DIR|FILE.csv",
                        help="output folder (tables) or CSV file (--shot)")
    parser.add_argument("--shot", metavar="KEY",
                        help="raw-record key of one shot (the 'key' column of shots.csv)")
    parser.add_argument("--run-id", metavar="ID",
                        help="only this run (a database or folder holding several)")
    parser.add_argument("--limits", metavar="FILE",
                        help="limits file to grade with (default: each run's limits.yaml)")
    parser.add_argument("--bench", metavar="FILE",
                        help="bench file with the instrument and probe accuracies (default: "
                        "each run's bench.yaml)")
    parser.set_defaults(func=run)


def _load_runs(source: str, run_id: str | None) -> list[Any]:
    """Every run RESULTS holds (one, with ``run_id``)."""
    from benchrun.store.results import ResultsStore, normalize_url
    from benchrun.store.rundata import RUN_MANIFEST, load_run

    path = Path(source)
    if "://" not in source and path.is_dir() and not (path / RUN_MANIFEST).is_file():
        folders = sorted(p for p in path.iterdir() if (p / RUN_MANIFEST).is_file())
        if not folders:
            raise StoreError(f"{path} holds no run folder (no {RUN_MANIFEST} in it or below)")
        runs = [load_run(folder) for folder in folders]
        if run_id is not None:
            runs = [r for r in runs if r.run_id == run_id]
            if not runs:
                raise StoreError(f"no run {run_id!r} in {path}")
        return runs
    if run_id is not None or ("://" not in source and not path.is_file()):
        return [load_run(source, run_id)]  # one run, or the error that says why not
    with ResultsStore(normalize_url(source), create=False) as store:
        ids = [r.run_id for r in store.runs()]
    if len(ids) <= 1:
        return [load_run(source, run_id)]
    return [load_run(source, rid) for rid in ids]


def _graded(runs: list[Any], limits: str | None,
            bench: str | None) -> list[tuple[str, dict[str, Any]]]:
    from benchrun.config import load_bench
    from benchrun.config.limits import load_limits
    from benchrun.errors import GradingError
    from benchrun.grading import run_bench
    from benchrun.grading.grade import grade_lot

    out = []
    for data in runs:
        path = Path(limits) if limits else data.limits_path
        if path is None or not Path(path).is_file():
            print(f"benchrun export: run {data.run_id} has no limits.yaml: its devices and "
                  "lot are left out (name one with --limits FILE)", file=sys.stderr)
            continue
        if not data.shots:
            continue
        try:
            bench_config = load_bench(bench) if bench else run_bench(data)
        except GradingError as exc:
            print(f"benchrun export: run {data.run_id}: {exc}: its devices and lot are left "
                  "out (name the bench file with --bench FILE)", file=sys.stderr)
            continue
        out.append((data.run_id, grade_lot(data.shots, load_limits(path),
                                           bench=bench_config).to_dict()))
    return out


def _write_tables(runs: list[Any], out: Path, limits: str | None,
                  bench: str | None) -> list[Path]:
    from benchrun.store.export import devices_frame, lot_frame, shots_frame

    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot create {out}: {exc.strerror or exc}") from exc
    graded = _graded(runs, limits, bench)
    frames = {"shots": shots_frame(s for data in runs for s in data.shots),
              "devices": devices_frame(graded), "lot": lot_frame(graded)}
    written = []
    for name, frame in frames.items():
        for suffix in (".csv", ".parquet"):
            target = out / f"{name}{suffix}"
            try:
                if suffix == ".csv":
                    frame.to_csv(target, index=False)
                else:
                    frame.to_parquet(target, engine="pyarrow", index=False)
            except (OSError, ValueError, ImportError) as exc:
                raise StoreError(f"cannot write {target}: {exc}") from exc
            written.append(target)
    return written


def _write_shot(runs: list[Any], key: str, out: Path) -> int:
    from benchrun.store.export import shot_key, waveform_frame, write_waveform_csv

    key = shot_key(key)
    for data in runs:
        if not any(shot_key(s.raw_ref) == key for s in (*data.shots, *data.pending)):
            continue
        with data.open_raw() as raw:
            frame = waveform_frame(raw.read_shot(key))  # content digest checked
        write_waveform_csv(frame, out)
        return len(frame)
    raise StoreError(f"no shot {key!r} in the runs given (see the key column of shots.csv)")


def run(args: argparse.Namespace) -> int:
    runs = _load_runs(str(args.results), args.run_id)
    if args.shot:
        rows = _write_shot(runs, args.shot, args.out)
        print(f"{args.out}: {rows} samples of shot {args.shot} (t s, v V, i A)")
        return 0
    for path in _write_tables(runs, args.out, args.limits, args.bench):
        print(path)
    return 0
