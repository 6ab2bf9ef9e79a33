"""``benchrun loss RESULTS --fsw 20kHz [--fsw 50kHz] [--compare OTHER] [--json]``.

What the measured recovery costs in a converter: energy per commutation (Err plus the switch
turn-on energy the recovery causes) and the average power at each switching frequency, per
part/lot and test point; with ``--compare`` the saving of RESULTS' part over OTHER's part at
matching conditions. RESULTS and OTHER are run folders or results database URLs.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Sequence
from typing import Any

from benchrun.errors import ConfigError
from benchrun.loss import (
    Comparison,
    LossTable,
    capacitive_parts_of,
    compare,
    estimate_losses,
    rejected_devices,
)
from benchrun.units import format_si, parse_quantity

MODEL_LINES = (
    "E = Err + switch turn-on energy caused by the recovery (measured: Eon minus the "
    "ideal-diode Eon; else the estimate VR·Qrr, marked 'estimate'); P = fsw·E. For a part "
    "declared capacitive (sequence loss.recovery), E = the switch share only: its Err is "
    "stored in the diode capacitance and returned.",
    "Valid at the tested conditions only (temperature, VR, IF, di/dt); nothing is scaled to "
    "other voltages or currents.",
)


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "loss",
        help="recovery loss per commutation and average power at switching frequencies",
        description="Energy per commutation (Err + recovery-caused switch energy) and average "
        "power P = fsw·E per part/lot and test point of a stored run; with --compare, the "
        "saving of this run's part over another run's part at matching conditions.",
    )
    parser.add_argument("results", metavar="RESULTS", help="run folder or results database URL")
    parser.add_argument("--fsw", metavar="FREQ", action="append", required=True,
                        help="switching frequency, e.g. 20kHz (repeat for several)")
    parser.add_argument("--line-peak", metavar="CURRENT",
                        help="also average over a sinusoidal line cycle of this peak current "
                        "(e.g. 28A), from a power law fitted in IF: P = fsw·(1/2π)·∫₀^π "
                        "E(Î·sin θ) dθ, with its uncertainty")
    parser.add_argument("--compare", metavar="OTHER_RESULTS",
                        help="reference run (folder or database URL) to compare against")
    parser.add_argument("--run-id", metavar="ID", help="run in RESULTS when the database holds "
                        "several")
    parser.add_argument("--compare-run-id", metavar="ID", help="run in OTHER_RESULTS when the "
                        "database holds several")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    parser.set_defaults(func=run)


def parse_frequencies(texts: Sequence[str]) -> list[float]:
    """``["20kHz", "50 kHz"]`` → Hz, each > 0 (``ConfigError`` otherwise)."""
    out = []
    for text in texts:
        value = parse_quantity(text, "frequency", field="--fsw")
        if not value > 0:
            raise ConfigError(f"switching frequency must be positive, got {text!r}",
                              field="--fsw")
        out.append(value)
    return out


def _estimate(data: Any, freqs: list[float]) -> LossTable:
    """Loss table of a stored run: its declared recovery kind, its rejected devices left out
    when the run folder holds the limits it was graded against (else none are left out, and
    the table says so)."""
    from benchrun.config.limits import load_limits
    from benchrun.grading import grade_lot, run_bench
    from benchrun.store.rundata import LIMITS_FILE

    rejected = None
    if data.run_dir is not None and (data.run_dir / LIMITS_FILE).is_file():
        lot = grade_lot(data.shots, load_limits(data.run_dir / LIMITS_FILE),
                        bench=run_bench(data))
        rejected = rejected_devices(lot)
    return estimate_losses(data.shots, freqs, capacitive_parts=capacitive_parts_of(data.manifest),
                           rejected=rejected)


def run(args: argparse.Namespace) -> int:
    from benchrun.store.rundata import load_run

    freqs = parse_frequencies(args.fsw)
    data = load_run(args.results, args.run_id)
    table = _estimate(data, freqs)
    comparison = other_id = None
    if args.compare:
        other = load_run(args.compare, args.compare_run_id)
        other_id = other.run_id
        comparison = compare(table, _estimate(other, freqs))
    line = None
    if args.line_peak:
        from benchrun.loss.line_cycle import line_cycle_losses

        peak = parse_quantity(args.line_peak, "current", field="--line-peak")
        if not peak > 0:
            raise ConfigError("the line current's peak must be positive", field="--line-peak")
        line = line_cycle_losses(table, peak)
    if args.json:
        payload: dict[str, Any] = {"run_id": data.run_id, "loss": table.to_dict()}
        if line is not None:
            payload["line_cycle"] = {
                "model": "P = fsw/(2π)·∫₀^π E(Î·sin θ) dθ with E = E_ref·(IF/I_ref)^b fitted "
                "by least squares in log-log; u = k·u_c from the fit covariance (GUM)",
                "results": [{"part": r.part, "lot": r.lot, "temperature_K": r.temperature_K,
                             "vr_V": r.vr_nominal_V, "peak_current_A": r.peak_current_A,
                             "b": r.fit.b, "e_ref_J": r.fit.e_ref_J, "i_ref_A": r.fit.i_ref_A,
                             "power_W": list(r.power_W),
                             "u_W": None if r.u_W is None else list(r.u_W),
                             "coverage_factor": r.coverage_factor,
                             "above_range_fraction": r.above_range_fraction}
                            for r in line[0]],
                "not_fitted": list(line[1]),
            }
        if comparison is not None:
            payload["compare"] = {"run_id": other_id, **comparison.to_dict()}
        print(json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False))
    else:
        print(render_text(table, run_id=data.run_id))
        if line is not None:
            print()
            print(render_line_cycle(*line))
        if comparison is not None:
            print()
            print(render_comparison(comparison, other_run_id=other_id or ""))
    return 0 if table.groups else 1


def _grid(rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(c.rjust(w) if i > 0 else c.ljust(w)
                      for i, (c, w) in enumerate(zip(r, widths, strict=True))).rstrip()
            for r in rows]


def _j(value: float | None) -> str:
    return format_si(value, "J", digits=3)


def _w(value: float | None) -> str:
    return format_si(value, "W", digits=3)


def render_text(table: LossTable, *, run_id: str = "") -> str:
    """One table per part/lot: a row per test point with mean and max over the devices."""
    lines = [f"Recovery loss estimate   run {run_id or '—'}", *MODEL_LINES, ""]
    if not table.groups:
        lines.append("No usable shots (valid, with Err and a switch-energy figure).")
    for part, lot in table.parts:
        lines.append(f"{part}   lot {lot}")
        header = ["T", "VR", "IF", "devices", "basis", "Err", "Esw,rec", "E mean", "E max"]
        for f in table.fsw_hz:
            fs = format_si(f, "Hz", digits=3)
            header += [f"P mean @{fs}", f"P max @{fs}"]
        rows = [header]
        for g in table.groups:
            if (g.part, g.lot) != (part, lot):
                continue
            row = [format_si(g.temperature_K, "K", 3), format_si(g.vr_nominal_V, "V", 3),
                   format_si(g.if_nominal_A, "A", 3), str(g.n_devices), g.basis,
                   _j(g.err_mean_J), _j(g.switch_mean_J), _j(g.energy_mean_J),
                   _j(g.energy_max_J)]
            for mean, worst in zip(g.power_mean_W, g.power_max_W, strict=True):
                row += [_w(mean), _w(worst)]
            rows.append(row)
        lines += ["  " + line for line in _grid(rows)]
        lines.append("")
    for reason in table.skipped:
        lines.append(f"left out: {reason}")
    if any(not g.err_counted for g in table.groups):
        lines.append("capacitive part: E = switch share only (Err is stored in the diode "
                     "capacitance and returned, not counted)")
    return "\n".join(lines).rstrip()


def render_line_cycle(results: Any, reasons: Any) -> str:
    """Line-cycle averages: fit, power at each frequency with its expanded uncertainty."""
    lines = ["Line-cycle average: P = fsw·(1/2π)·∫₀^π E(Î·sin θ) dθ, E = E_ref·(IF/I_ref)^b "
             "fitted in log-log over the measured IF (least squares); U from the fit "
             "covariance (GUM), k = 2."]
    for r in results:
        powers = ", ".join(
            f"{_w(p)}" + ("" if r.u_W is None else f" ± {_w(u)}")
            for p, u in zip(r.power_W, r.u_W or r.power_W, strict=True))
        lines.append(
            f"  {r.part} {r.lot} at {format_si(r.temperature_K, 'K', 5)}, "
            f"{format_si(r.vr_nominal_V, 'V', 3)}, Î = {format_si(r.peak_current_A, 'A', 3)}: "
            f"b = {r.fit.b:.2f} over {format_si(r.fit.i_min_A, 'A', 3)}–"
            f"{format_si(r.fit.i_max_A, 'A', 3)} ({r.fit.n_points} points): {powers}"
            + ("" if r.u_W is not None else " (two IF points: no uncertainty)")
            + (f"; {100 * r.above_range_fraction:.0f} % of the energy extrapolated above the "
               "highest measured IF" if r.above_range_fraction > 0 else ""))
    lines += [f"  not fitted: {text}" for text in reasons]
    return "\n".join(lines)


def render_comparison(comparison: Comparison, *, other_run_id: str = "") -> str:
    """Saving per matching condition and frequency; unmatched conditions with their reason."""
    lines = [f"Comparison with run {other_run_id or '—'}: saving = P(reference) − P(part); "
             "positive when the part loses less.",
             f"Match: temperature within {comparison.temperature_tol_K:g} K, VR and IF within "
             f"{100 * comparison.relative_tol:g} %, di/dt within "
             f"{100 * comparison.didt_tol:g} %; linear interpolation only inside a measured "
             "sweep of the reference, never extrapolated.", *comparison.notes, ""]
    if comparison.rows:
        header = ["part", "reference", "T", "VR", "IF", "E part", "E ref"]
        for f in comparison.fsw_hz:
            fs = format_si(f, "Hz", digits=3)
            header += [f"saving @{fs}", "%"]
        header.append("reference value")
        rows = [header]
        for r in comparison.rows:
            row = [f"{r.part_a} {r.lot_a}", f"{r.part_b} {r.lot_b}",
                   format_si(r.temperature_K, "K", 3), format_si(r.vr_V, "V", 3),
                   format_si(r.if_A, "A", 3), _j(r.energy_a_J), _j(r.energy_b_J)]
            for saving, pct in zip(r.saving_W, r.saving_pct, strict=True):
                row += [_w(saving), "—" if pct is None else f"{pct:.1f}"]
            row.append(r.match)
            rows.append(row)
        lines += _grid(rows)
    else:
        lines.append("No matching conditions.")
    for text in comparison.unmatched:
        lines.append(f"not compared: {text}")
    return "\n".join(lines)
