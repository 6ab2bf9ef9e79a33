"""Tiny helper to run ngspice (an independent circuit simulator) from tests.

Usage::

    from spice import have_ngspice, run_ngspice

    result = run_ngspice(
        circuit,                       # netlist lines without .control/.end
        tran="tran 0.1n 3u 0 0.1n",    # the analysis command
        vectors=["v(a,k)", "i(vsense)"],
        measures=["meas tran irrm min i(vsense) from=1u to=3u"],
    )
    result.time, result.vectors["i(vsense)"], result.measures["irrm"], result.at["irrm"]

``measures`` are ngspice control-language lines run after the analysis, in order; ``let``
lines may compute levels from earlier results and ``$&name`` substitutes them (ngspice
syntax). Every ``meas`` result is parsed from ngspice's output into ``measures`` (and the
``at=`` instant of ``min``/``max`` results into ``at``). A ``meas`` that fails raises
:class:`SpiceError`.

:func:`charge_control_diode` gives the netlist lines of the simulator's charge-control diode
(Lauritzen-Ma with sweep-out) as ngspice behavioural sources, for tests that put it in their
own circuit.

ngspice always runs in batch mode (``ngspice -b``) under a timeout (DESIGN.md §7: a stiff
netlist can hang), in a temporary directory.
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

NGSPICE = shutil.which("ngspice")

_MEAS = re.compile(
    r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*=\s*([-+]?\d[\d.]*(?:[eE][-+]?\d+)?)"
    r"(?:\s+at=\s*([-+]?\d[\d.]*(?:[eE][-+]?\d+)?))?",
    re.MULTILINE,
)


class SpiceError(RuntimeError):
    """ngspice failed, timed out, or a measurement could not be made."""


@dataclass(frozen=True)
class SpiceResult:
    """Waveforms and measurements of one ngspice run.

    Attributes
    ----------
    time
        Simulator time points [s] (variable step, as computed).
    vectors
        Exported vectors by the name given in ``vectors``.
    measures
        ``meas`` results by name.
    at
        Instant of a ``min``/``max`` measurement, by name.
    output
        ngspice's stdout and stderr, for diagnostics.
    """

    time: np.ndarray
    vectors: dict[str, np.ndarray]
    measures: dict[str, float]
    at: dict[str, float] = field(default_factory=dict)
    output: str = ""


def have_ngspice() -> bool:
    """True when the ngspice binary is on PATH."""
    return NGSPICE is not None


def run_ngspice(
    circuit: str,
    *,
    tran: str,
    vectors: Sequence[str],
    measures: Sequence[str] = (),
    timeout_s: float = 60.0,
) -> SpiceResult:
    """Run a transient analysis in ngspice and return waveforms and measurements.

    Parameters
    ----------
    circuit
        Netlist body (title line optional, no ``.control`` block, no ``.end``).
    tran
        Analysis command for the control block, e.g. ``"tran 0.1n 3u 0 0.05n"``.
    vectors
        Vectors to export with ``wrdata`` (e.g. ``"v(a,k)"``, ``"i(vsense)"``).
    measures
        Control-language lines (``meas``/``let``) executed after the analysis.
    timeout_s
        Wall-clock limit; exceeding it raises :class:`SpiceError`.
    """
    if NGSPICE is None:
        raise SpiceError("ngspice is not installed")
    with tempfile.TemporaryDirectory(prefix="benchrun-spice-") as tmp:
        out_file = Path(tmp) / "waves.txt"
        deck = "\n".join(
            [
                "* benchrun test deck",
                circuit.strip(),
                ".control",
                "set noaskquit",
                "set wr_singlescale",
                "set wr_vecnames",
                "set numdgt=12",
                tran,
                *measures,
                f"wrdata {out_file} " + " ".join(vectors),
                "quit",
                ".endc",
                ".end",
                "",
            ]
        )
        deck_file = Path(tmp) / "deck.cir"
        deck_file.write_text(deck)
        try:
            proc = subprocess.run(
                [NGSPICE, "-b", str(deck_file)],
                capture_output=True,
                text=True,
                timeout=timeout_s,
                cwd=tmp,
            )
        except subprocess.TimeoutExpired as exc:
            raise SpiceError(f"ngspice did not finish within {timeout_s} s") from exc
        output = proc.stdout + proc.stderr
        if not out_file.exists():
            raise SpiceError(f"ngspice wrote no waveforms (exit {proc.returncode}):\n{output}")
        data = np.loadtxt(out_file, skiprows=1, ndmin=2)
    results: dict[str, float] = {}
    at: dict[str, float] = {}
    for match in _MEAS.finditer(proc.stdout):
        name = match.group(1).lower()
        results[name] = float(match.group(2))
        if match.group(3):
            at[name] = float(match.group(3))
    for line in measures:
        words = line.split()
        if len(words) >= 3 and words[0].lower() == "meas" and words[2].lower() not in results:
            raise SpiceError(f"measurement failed: {line}\n{output[-2000:]}")
    return SpiceResult(
        time=data[:, 0],
        vectors={name: data[:, k + 1] for k, name in enumerate(vectors)},
        measures=results,
        at=at,
        output=output,
    )


def resample(time: np.ndarray, values: np.ndarray, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation of a simulator waveform onto a uniform grid of step ``dt``."""
    grid = np.arange(time[0], time[-1], dt)
    return grid, np.interp(grid, time, values)


def charge_control_diode(jp: Any, i_f: float) -> str:
    """Netlist lines of a charge-control diode conducting ``i_f`` at t = 0, anode ``a``,
    cathode ground, as ngspice behavioural sources.

    ``jp`` holds the junction parameters at one temperature (``at_temperature(...)`` of a
    :class:`benchrun.simulator.physics.LauritzenMaDiode`). Lauritzen-Ma charge control (IEEE
    Trans. Power Electronics 6(2), 1991) with the sweep-out extension of
    benchrun.simulator.diode_models, in another formulation than ours: the sources carry the
    plasma density p = qM/(1 − f) (node ``xq``: dp/dt = i/(1 − f) − p/τ), the depleted
    fraction f of the drift region (node ``xf``) and the sweep current −p·df/dt with df/dt
    read from a 1 F capacitor driven by f; the junction capacitance is ngspice's own diode
    model. Includes the ``.ic`` of forward conduction and the solver tolerances this stiff
    circuit needs (``uic`` in the ``tran`` line).
    """
    root_vj = math.sqrt(jp.vj_V)
    span = math.sqrt(jp.vj_V + jp.vpt_V) - root_vj
    f = f"min((sqrt({jp.vj_V}+max(-v(a),0))-{root_vj:.12e})/{span:.12e},1)"
    ijun = (f"({jp.is_A * jp.tau_s:.9e}*(exp(v(a)/{jp.nvt_V:.9e})-1)"
            f"-{jp.tau_s:.9e}*v(xq)*(1-v(xf)))/{jp.tm_s:.9e}")
    return f"""
Bj a 0 I={ijun}+(-{jp.tau_s:.9e}*v(xq)*i(vd))
Dc a 0 dcap
.model dcap D(IS=1e-30 CJO={jp.cj0_F:.9e} VJ={jp.vj_V} M={jp.m} FC={jp.fc})
Cq xq 0 {jp.tau_s:.9e}
Bq 0 xq I=({ijun})/max(1-v(xf),0.01)-v(xq)
Bf xf 0 V={f}
Vd xf xd 0
Cd xd 0 1
.ic v(xq)={i_f} v(a)={jp.junction_voltage_forward(i_f)}
.options reltol=1e-5 abstol=1e-9 vntol=1e-6 chgtol=1e-16
"""
