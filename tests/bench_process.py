"""Helpers for tests that use the simulated bench as a separate process (``benchrun sim``)."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "sequences" / "bench-sim.yaml"


def env() -> dict[str, str]:
    """The environment of a child process: this tree first on the path."""
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join([str(ROOT), out.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    return out


class SimProcess:
    """``benchrun sim`` in a child process; ``resources`` once it serves."""

    def __init__(self, *extra: str) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "benchrun.cli", "sim", "--seed", "3", *extra],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env(), cwd=ROOT)
        self.resources: dict[str, str] = {}
        deadline = time.monotonic() + 120
        assert self.proc.stdout is not None
        while time.monotonic() < deadline:
            line = self.proc.stdout.readline()
            if not line:
                raise RuntimeError(f"benchrun sim ended: {self.proc.stderr.read()}")
            m = re.match(r"(\w+)\s+(TCPIP0::\S+::SOCKET)", line)
            if m:
                self.resources[m.group(1)] = m.group(2)
            if "running" in line:
                return
        raise RuntimeError("benchrun sim did not start")

    def bench_file(self, folder: Path, **families: str) -> Path:
        """The simulated bench file with this process's resources (and other families)."""
        out, role = [], None
        for line in BENCH.read_text().splitlines():
            m = re.match(r"  (\w+):\s*\{", line)
            if m:
                role = m.group(1) if m.group(1) in self.resources else None
            elif not line.startswith("    "):
                role = None
            if role is not None:
                line = line.replace("resource: sim", f"resource: {self.resources[role]}")
                line = re.sub(r"family: [\w-]+", f"family: {families.get(role, f'{role}-generic')}",
                              line)
            out.append(line)
        text = "\n".join(out) + "\n"
        assert "resource: sim" not in text
        path = folder / "bench.yaml"
        path.write_text(text)
        return path

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        for stream in (self.proc.stdout, self.proc.stderr):
            if stream is not None:
                stream.close()
