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
        text = BENCH.read_text()
        for role, resource in self.resources.items():
            family = families.get(role, f"{role}-generic")
            text = re.sub(rf"(\n  {role}:\s*\{{resource: )sim, family: [\w-]+",
                          rf"\g<1>{resource}, family: {family}", text)
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
