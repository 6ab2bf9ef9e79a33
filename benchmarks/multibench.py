"""Many benches, one PostgreSQL store: throughput, commit latency, nothing lost or doubled.

Starts a throwaway PostgreSQL cluster (initdb + pg_ctl on 127.0.0.1 in a temporary folder;
as root the server runs as the ``postgres`` user), then for each scenario runs N simulated
benches in **separate processes** (each its own simulated bench and runner, one device of
lot LT-0117 each, ``--shots`` repeats at one condition: the simulator's cached circuit
solution keeps a shot cheap) writing to one database:

* ``calm``    — undisturbed;
* ``restart`` — the server is restarted (``pg_ctl restart -m fast``) once half the shots are
  stored;
* ``stop``    — the server is stopped once half the shots are stored and started again
  ``--outage`` seconds later (the benches keep testing: rows wait in each run's journal).

Printed per scenario: aggregate shots per second (analysed rows stored / wall time from the
first bench starting to the last one ending), commit latency p50 and p99 (wall time of each
successful row write to the database: the pending row at the fire and the analysed row),
rows that waited in a journal, and shots lost or duplicated, which must be 0:

* lost       = raw-record shots without an analysed row, plus rows still pending;
* duplicated = rows beyond one per shot identity, plus rows without a raw-record shot.

Usage::

    python benchmarks/multibench.py [--benches 8] [--shots 500] [--outage 30]
                                    [--scenarios calm,restart,stop]
"""

from __future__ import annotations

import argparse
import contextlib
import glob
import json
import os
import pwd
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from sim_setup import BENCH_PATH, ROOT, repeated_point, sequence_text


# -- the throwaway cluster ------------------------------------------------------------------
class Cluster:
    def __init__(self) -> None:
        candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
        found = Path(candidates[-1]).parent if candidates else None
        if found is None and shutil.which("initdb"):
            found = Path(shutil.which("initdb")).parent  # type: ignore[arg-type]
        if found is None:
            sys.exit("PostgreSQL server binaries (initdb, pg_ctl) are not installed: "
                     "bash scripts/install-test-deps.sh installs them")
        self.bin = found
        self.prefix: list[str] = []
        self.base = Path(tempfile.mkdtemp(prefix="benchrun-mb-pg-", dir="/tmp"))
        if os.geteuid() == 0:
            entry = pwd.getpwnam("postgres")
            os.chown(self.base, entry.pw_uid, entry.pw_gid)
            self.prefix = ["runuser", "-u", "postgres", "--"]
        os.chmod(self.base, 0o700)
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.data = self.base / "data"
        self._pg("initdb", "-D", str(self.data), "-A", "trust", "-U", "postgres", "-E", "UTF8",
                 "--no-sync")
        self.start()

    def _pg(self, tool: str, *args: str) -> None:
        subprocess.run([*self.prefix, str(self.bin / tool), *args], check=True,
                       capture_output=True, timeout=120)

    def _ctl(self, *args: str) -> None:
        self._pg("pg_ctl", "-D", str(self.data), "-w", "-t", "60", *args)

    def start(self) -> None:
        self._ctl("-l", str(self.base / "server.log"), "-o",
                  f"-p {self.port} -k {self.base} -c listen_addresses=127.0.0.1 "
                  "-c max_connections=200", "start")

    def stop(self) -> None:
        self._ctl("-m", "fast", "stop")

    def restart(self) -> None:
        # -l: the restarted server must not write into (and hold open) pg_ctl's pipes
        self._ctl("-l", str(self.base / "server.log"), "-m", "fast", "restart")

    def url(self, db: str) -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{db}"

    def create_db(self, db: str) -> None:
        import psycopg

        with psycopg.connect(host="127.0.0.1", port=self.port, user="postgres",
                             dbname="postgres", autocommit=True) as conn:
            conn.execute(f"CREATE DATABASE {db}")

    def close(self) -> None:
        with contextlib.suppress(subprocess.CalledProcessError):
            self._ctl("-m", "immediate", "stop")
        shutil.rmtree(self.base, ignore_errors=True)


# -- one bench (a worker process) -----------------------------------------------------------
def worker(args: argparse.Namespace) -> int:
    from benchrun.config import load_bench, load_sequence
    from benchrun.runner.execute import RunOptions, run_sequence
    from benchrun.runner.simbench import simulated_bench
    from benchrun.store.results import ResultsStore

    folder = Path(args.out)
    folder.mkdir(parents=True, exist_ok=True)
    seq = folder / "sequence.yaml"
    seq.write_text(sequence_text([repeated_point(args.shots)], serial=args.serial))
    bench = folder / "bench.yaml"
    bench.write_text(f"bench: {{id: {args.bench_id}}}\n" + BENCH_PATH.read_text())
    latencies: list[float] = []

    def timed(method):
        def call(self, *a, **k):
            t0 = time.perf_counter()
            out = method(self, *a, **k)  # a failure (outage) is not a commit: not counted
            latencies.append(time.perf_counter() - t0)
            return out
        return call

    ResultsStore.record_pending = timed(ResultsStore.record_pending)  # type: ignore[method-assign]
    ResultsStore.complete_shot = timed(ResultsStore.complete_shot)  # type: ignore[method-assign]
    ResultsStore.add_shot = timed(ResultsStore.add_shot)  # type: ignore[method-assign]
    journaled = []
    from benchrun.runner import journal

    original_append = journal.RowJournal.append

    def append(self, op, shot):
        journaled.append(op)
        return original_append(self, op, shot)

    journal.RowJournal.append = append  # type: ignore[method-assign]
    with simulated_bench(load_bench(bench), load_sequence(seq), seed=args.seed) as sim:
        options = RunOptions(out_dir=folder / "runs", db_url=args.url,
                             sim_resources=sim.resources, clock=sim.clock,
                             ratings_lookup=sim.ratings, show_progress=False,
                             durability=args.durability, db_outage_limit_s=args.outage_limit)
        t0 = time.perf_counter()
        outcome = run_sequence(seq, bench, options)
        wall = time.perf_counter() - t0
    Path(args.stats).write_text(json.dumps({
        "run_id": outcome.run_id, "run_dir": str(outcome.run_dir), "status": outcome.status,
        "latencies": latencies, "journaled": len(journaled), "wall": wall}))
    return 0 if outcome.status == "complete" else 1


# -- a scenario -----------------------------------------------------------------------------
def _count_rows(url: str) -> int | None:
    from sqlalchemy import create_engine, text

    engine = create_engine(url, connect_args={"connect_timeout": 2})
    try:
        with engine.connect() as conn:
            return int(conn.execute(text("SELECT count(*) FROM shots")).scalar() or 0)
    except Exception:  # the server may be down or the table not made yet
        return None
    finally:
        engine.dispose()


def _audit(url: str, stats: list[dict]) -> tuple[int, int, int]:
    """(analysed rows, lost, duplicated) over every run."""
    from sqlalchemy import create_engine, text

    from benchrun.store.raw import RawRecord

    engine = create_engine(url)
    analysed = lost = duplicated = 0
    with engine.connect() as conn:
        for item in stats:
            rows = conn.execute(text(
                "SELECT serial, point_index, repeat, attempt, raw_ref, flags FROM shots "
                "WHERE run_id = :r"), {"r": item["run_id"]}).all()
            identities = {(r[0], r[1], r[2], r[3]) for r in rows}
            duplicated += len(rows) - len(identities)
            pending = [r for r in rows if "analysis_pending" in r[5]]
            done_refs = {r[4].split("/", 1)[1] for r in rows if r not in pending}
            with RawRecord(Path(item["run_dir"]) / "raw.h5", "r") as raw:
                raw_keys = set(raw.keys())
            lost += len(raw_keys - done_refs) + len(pending)
            duplicated += len(done_refs - raw_keys)
            analysed += len(rows) - len(pending)
    engine.dispose()
    return analysed, lost, duplicated


def scenario(name: str, cluster: Cluster, args: argparse.Namespace, work: Path) -> dict:
    db = f"mb_{name}_{int(time.time())}"
    cluster.create_db(db)
    url = cluster.url(db)
    from benchrun.store.results import ResultsStore

    ResultsStore(url).close()  # the tables, before the benches start
    procs = []
    t0 = time.perf_counter()
    for k in range(args.benches):
        stats = work / name / f"bench-{k + 1}.json"
        stats.parent.mkdir(parents=True, exist_ok=True)
        procs.append((stats, subprocess.Popen(
            [sys.executable, __file__, "--worker", "--url", url, "--bench-id", f"bench-{k + 1}",
             "--serial", f"SN0117-{(k % 10) + 1:03d}", "--seed", str(k + 1), "--out",
             str(work / name / f"bench-{k + 1}"), "--stats", str(stats), "--shots",
             str(args.shots), "--durability", args.durability, "--outage-limit",
             str(max(120.0, 4 * args.outage))],
            env={**os.environ, "PYTHONPATH": str(ROOT)},
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)))
    half = args.benches * args.shots // 2
    disturbed = None
    while any(p.poll() is None for _, p in procs):
        if name != "calm" and disturbed is None:
            count = _count_rows(url)
            if count is not None and count >= half:
                disturbed = time.perf_counter() - t0
                if name == "restart":
                    cluster.restart()
                else:
                    cluster.stop()
                    time.sleep(args.outage)
                    cluster.start()
        time.sleep(0.2)
    wall = time.perf_counter() - t0
    results = []
    for stats, p in procs:
        _out, err = p.communicate()
        if p.returncode != 0:
            print(f"  bench failed ({stats.stem}): {err.strip().splitlines()[-1:]}")
        if stats.is_file():
            results.append(json.loads(stats.read_text()))
    analysed, lost, duplicated = _audit(url, results)
    latencies = sorted(x for r in results for x in r["latencies"])
    p50 = statistics.median(latencies) if latencies else float("nan")
    p99 = latencies[min(len(latencies) - 1, int(0.99 * len(latencies)))] if latencies else \
        float("nan")
    return {"name": name, "wall": wall, "analysed": analysed, "rate": analysed / wall,
            "p50": p50, "p99": p99, "lost": lost, "duplicated": duplicated,
            "journaled": sum(r["journaled"] for r in results), "disturbed": disturbed,
            "complete": sum(r["status"] == "complete" for r in results),
            "benches": args.benches}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--benches", type=int, default=8)
    parser.add_argument("--shots", type=int, default=500)
    parser.add_argument("--outage", type=float, default=30.0, help="stop scenario: seconds")
    parser.add_argument("--scenarios", default="calm,restart,stop")
    parser.add_argument("--durability", default="power-loss")
    parser.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    for hidden in ("--url", "--bench-id", "--serial", "--out", "--stats"):
        parser.add_argument(hidden, help=argparse.SUPPRESS)
    parser.add_argument("--seed", type=int, default=1, help=argparse.SUPPRESS)
    parser.add_argument("--outage-limit", type=float, default=600.0, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.worker:
        return worker(args)
    print(f"load average before: {os.getloadavg()[0]:.2f} (cores: {os.cpu_count()})")
    print(f"{args.benches} benches (separate processes) x {args.shots} shots, one PostgreSQL "
          f"store, durability {args.durability}")
    cluster = Cluster()
    work = Path(tempfile.mkdtemp(prefix="benchrun-mb-"))
    failures = 0
    try:
        for name in args.scenarios.split(","):
            r = scenario(name, cluster, args, work)
            when = "" if r["disturbed"] is None else f" (at {r['disturbed']:.1f} s)"
            print(f"{name:8s}{when}: {r['complete']}/{r['benches']} runs complete, "
                  f"{r['analysed']} shots in {r['wall']:.1f} s = {r['rate']:.1f} shots/s; "
                  f"commit latency p50 {1e3 * r['p50']:.1f} ms, p99 {1e3 * r['p99']:.1f} ms; "
                  f"rows journaled {r['journaled']}; lost {r['lost']}, duplicated "
                  f"{r['duplicated']}")
            failures += int(r["lost"] != 0 or r["duplicated"] != 0
                            or r["complete"] != r["benches"])
    finally:
        cluster.close()
        shutil.rmtree(work, ignore_errors=True)
    print(f"load average after: {os.getloadavg()[0]:.2f}")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
