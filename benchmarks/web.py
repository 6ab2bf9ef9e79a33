"""Response times of ``benchrun serve`` over a large generated store.

Generates a results store of ``--lots`` lots (default 1,000) of ``--shots-per-lot`` shots
(default 400: 10 devices x 2 conditions x 20 repeats, 400,000 shots in all) of one part, with
metrics that scatter from shot to shot and device to device and drift slowly across lots,
in SQLite and, with ``--postgres`` (a throwaway cluster, as tests/pg_fixture.py starts one),
in PostgreSQL. Then times, through Flask's test client (no network), the lots page, a lot page
and the part-history page: the first request (cold: nothing cached) and the median of
``--repeat`` further requests. The goal is a median under 300 ms for each page. The chart
images of the part history are separate requests; their time is printed too.

Run: ``python benchmarks/web.py [--lots N] [--shots-per-lot N] [--repeat N] [--postgres]``
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlalchemy import create_engine, insert

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchrun.records import ShotResult, TestPoint  # noqa: E402
from benchrun.store.rows import shot_row  # noqa: E402
from benchrun.store.rundata import write_manifest  # noqa: E402
from benchrun.store.schema import metadata, runs_table, shots_table  # noqa: E402
from benchrun.web import WebConfig, create_app  # noqa: E402

GOAL_MS = 300.0
POINTS = (TestPoint(0, 298.15, 600.0, 30.0, label="nominal @ 25 degC"),
          TestPoint(1, 398.15, 600.0, 30.0, label="nominal @ 125 degC"))
# lot-level typical values (25 °C, 125 °C) of the demo part (DX-4417 limits)
TYPICAL = {"irrm_A": (40.0, 58.0), "trr_s": (118e-9, 160e-9), "qrr_C": (2.5e-6, 5.2e-6),
           "err_J": (0.61e-3, 1.07e-3), "softness": (1.3, 0.85), "vrm_V": (644.0, 662.0)}


def _load() -> float:
    return os.getloadavg()[0]


def generate(url: str, folder: Path, lots: int, per_lot: int, seed: int = 3) -> int:
    """Write the runs and shots; returns the number of shots written."""
    rng = np.random.default_rng(seed)
    engine = create_engine(url)
    metadata.create_all(engine)
    run_dir = folder / "shared-run"
    run_dir.mkdir(exist_ok=True)
    shutil.copy(ROOT / "limits" / "DX-4417.yaml", run_dir / "limits.yaml")
    shutil.copy(ROOT / "sequences" / "bench-sim.yaml", run_dir / "bench.yaml")
    write_manifest(run_dir, {"run_id": "shared-run", "part": "DX-4417", "lot": "-"})
    devices = 10  # the lot size the DX-4417 limits file states
    repeats = max(1, per_lot // (2 * devices))
    written = 0
    with engine.begin() as conn:
        for n in range(lots):
            run_id = f"LT-{n:05d}-BENCH"
            lot = f"LT-{n:05d}"
            day = 1 + n // 40
            started = f"2026-{1 + (day // 28) % 12:02d}-{1 + day % 28:02d}T08:{n % 60:02d}:00+00:00"
            manifest = {"run_id": run_id, "part": "DX-4417", "lot": lot,
                        "bench_name": f"bench {1 + n % 3}", "run_dir": str(run_dir)}
            conn.execute(insert(runs_table), {
                "run_id": run_id, "part": "DX-4417", "lot": lot, "started": started,
                "finished": started.replace("T08", "T09"), "status": "complete",
                "manifest": json.dumps(manifest)})
            drift = 1.0 + 0.03 * max(0, n - 0.8 * lots) / max(1, 0.2 * lots)
            lot_factor = 1.0 + 0.02 * rng.standard_normal()
            rows = []
            for d in range(devices):
                device = lot_factor * drift * (1.0 + 0.04 * rng.standard_normal())
                for point in POINTS:
                    hot = int(point.temperature_K > 350)
                    for r in range(repeats):
                        metrics = {k: v[hot] * device * (1 + 0.01 * rng.standard_normal())
                                   for k, v in TYPICAL.items()}
                        metrics.update(if_A=30.0 * (1 + 0.005 * rng.standard_normal()),
                                       vr_V=600.0, didt_A_per_s=1.0e9)
                        shot = ShotResult(
                            run_id=run_id, part="DX-4417", lot=lot,
                            serial=f"SN{n:05d}-{d + 1:03d}", point=point, repeat=r, attempt=0,
                            timestamp=started, conditions={
                                "if_A": metrics["if_A"], "vr_V": 600.0 * (1 + 0.002 * r),
                                "didt_A_per_s": 1.0e9, "temperature_K": point.temperature_K},
                            metrics=metrics, flags=(), valid=True,
                            raw_ref=f"shots/p{point.index:03d}-{d:03d}-r{r:02d}-a0",
                            acquisition={"sample_interval_s": 4e-10, "voltage_range_V": 1000.0,
                                         "current_range_A": 80.0, "adc_bits": 8})
                        rows.append(shot_row(shot))
            conn.execute(insert(shots_table), rows)
            written += len(rows)
    engine.dispose()
    return written


def time_requests(client, url: str, repeat: int) -> tuple[float, float]:
    """(first request ms, median of ``repeat`` further requests ms)."""
    def once() -> float:
        t0 = time.perf_counter()
        response = client.get(url)
        elapsed = (time.perf_counter() - t0) * 1e3
        if response.status_code != 200:
            raise SystemExit(f"{url}: HTTP {response.status_code}")
        response.close()
        return elapsed

    first = once()
    return first, statistics.median(once() for _ in range(repeat))


def measure(label: str, source: str, repeat: int, lots: int) -> bool:
    app = create_app(WebConfig(results=source, verify_in_background=False))
    client = app.test_client()
    met = True
    print(f"\n{label}")
    print(f"  {'page':42} {'first (cold) ms':>16} {'median ms':>10}  goal < {GOAL_MS:.0f} ms")
    pages = [(f"lots page (50 of {lots} lots, newest first)", "/"),
             ("lots page, filtered and sorted by lot", "/?part=DX-4417&sort=lot&order=asc"),
             ("lot page (400 shots, graded)", f"/lots/LT-{lots // 2:05d}-BENCH"),
             ("another lot page (400 shots, graded)", f"/lots/LT-{lots - 1:05d}-BENCH"),
             ("part history (every lot, 12 charts)", "/parts/DX-4417"),
             ("  one control-chart image", "/parts/DX-4417/irrm_A/125C/mean.png")]
    for name, url in pages:
        first, median = time_requests(client, url, repeat)
        goal = not name.startswith("  ")
        ok = median < GOAL_MS
        met &= ok or not goal
        verdict = ("met" if ok else "NOT met") if goal else "(image, no goal)"
        print(f"  {name:42} {first:16.1f} {median:10.1f}  {verdict}")
    app.extensions["benchrun"]["catalog"].close()
    return met


def _start_postgres(base: Path) -> tuple[str, list[str], Path]:
    sys.path.insert(0, str(ROOT / "tests"))
    import pwd

    from pg_fixture import _find_bin_dir, _free_port

    bin_dir = _find_bin_dir()
    if bin_dir is None:
        raise SystemExit("PostgreSQL server binaries are not installed")
    prefix = ["runuser", "-u", "postgres", "--"] if os.geteuid() == 0 else []
    if prefix:
        entry = pwd.getpwnam("postgres")
        os.chown(base, entry.pw_uid, entry.pw_gid)
    os.chmod(base, 0o700)
    data = base / "data"
    subprocess.run([*prefix, str(bin_dir / "initdb"), "-D", str(data), "-A", "trust", "-U",
                    "postgres", "-E", "UTF8", "--no-sync"], check=True, capture_output=True)
    port = _free_port()
    subprocess.run([*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-l",
                    str(base / "server.log"), "-o",
                    f"-p {port} -k {base} -c listen_addresses=127.0.0.1 -c fsync=off",
                    "-w", "start"], check=True, capture_output=True)
    return (f"postgresql+psycopg://postgres@127.0.0.1:{port}/postgres",
            [*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
            data)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--lots", type=int, default=1000)
    parser.add_argument("--shots-per-lot", type=int, default=400)
    parser.add_argument("--repeat", type=int, default=9)
    parser.add_argument("--postgres", action="store_true",
                        help="also in a throwaway PostgreSQL cluster")
    args = parser.parse_args()
    print(f"load average {_load():.2f} (2-core machine; run on a quiet one)")
    met = True
    with tempfile.TemporaryDirectory(prefix="benchrun-web-") as tmp:
        folder = Path(tmp)
        url = f"sqlite:///{folder / 'results.db'}"
        t0 = time.perf_counter()
        shots = generate(url, folder, args.lots, args.shots_per_lot)
        print(f"generated {args.lots} lots, {shots} shots in SQLite in "
              f"{time.perf_counter() - t0:.0f} s")
        met &= measure(f"SQLite ({args.lots} lots, {shots} shots)", url, args.repeat, args.lots)
        if args.postgres:
            pg_base = Path(tempfile.mkdtemp(prefix="benchrun-pg-", dir="/tmp"))
            stop: list[str] = []
            try:
                pg_url, stop, _data = _start_postgres(pg_base)
                t0 = time.perf_counter()
                shots = generate(pg_url, folder, args.lots, args.shots_per_lot)
                print(f"\ngenerated {args.lots} lots, {shots} shots in PostgreSQL in "
                      f"{time.perf_counter() - t0:.0f} s")
                met &= measure(f"PostgreSQL ({args.lots} lots, {shots} shots)", pg_url,
                               args.repeat, args.lots)
            finally:
                if stop:
                    subprocess.run(stop, capture_output=True, check=False)
                shutil.rmtree(pg_base, ignore_errors=True)
    print(f"\nload average {_load():.2f}")
    print("goal (median < 300 ms for the lots page, a lot page and the part history): "
          + ("met" if met else "NOT met"))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
