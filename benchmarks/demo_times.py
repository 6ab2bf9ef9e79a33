"""Wall-clock time of the two demos on the simulated bench.

* ``benchrun demo`` — target (issue 16): under 2 minutes;
* ``benchrun demo --characterize`` — the DX-4425 sweep, its curves.csv and signed
  characterization.pdf — target (issue 16): under 5 minutes.

Each runs in a child process into a fresh temporary folder, as a user would run it; the
figure printed is the whole command's wall clock (start-up, simulated bench, run, report).
The machine is shared (2 cores): the load average is printed before and after.
Run: python benchmarks/demo_times.py [--only plain|characterize]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

TARGETS = {"plain": ([], 120.0), "characterize": (["--characterize"], 300.0)}


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--only", choices=sorted(TARGETS))
    args = parser.parse_args()
    print(f"load average before: {os.getloadavg()}")
    failed = False
    for name, (extra, target) in TARGETS.items():
        if args.only and name != args.only:
            continue
        with tempfile.TemporaryDirectory() as out:
            started = time.perf_counter()
            done = subprocess.run([sys.executable, "-m", "benchrun.cli", "demo", "--out", out,
                                   "--no-progress", *extra], capture_output=True, text=True)
            elapsed = time.perf_counter() - started
        status = "ok" if done.returncode == 0 else f"exit {done.returncode}"
        verdict = "meets" if elapsed < target and done.returncode == 0 else "MISSES"
        failed |= verdict == "MISSES"
        print(f"benchrun demo {' '.join(extra)}: {elapsed:.1f} s ({status}; target "
              f"{target:.0f} s: {verdict})")
        if done.returncode:
            print("  " + (done.stderr.strip().splitlines() or ["(no message)"])[-1])
    print(f"load average after: {os.getloadavg()}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
