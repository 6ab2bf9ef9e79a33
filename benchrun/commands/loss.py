"""``benchrun loss RESULTS --fsw 20kHz [--fsw 50kHz] [--line-peak I [--vr V --temperature T
--didt D [--modulation M]]] [--compare OTHER] [--json]``.

What the measured recovery costs in a converter: energy per commutation (Err plus the switch
turn-on energy the recovery causes) and the average power at each switching frequency, per
part/lot and test point; with ``--compare`` the saving of RESULTS' part over OTHER's part at
matching conditions. RESULTS and OTHER are run folders or results database URLs. With
``--line-peak`` alone, a power law in IF per tested temperature and VR averaged over a line
cycle (:mod:`benchrun.loss.line_cycle`); with ``--vr``, ``--temperature`` and ``--didt`` as
well, the energy surface E(IF, VR, T, di/dt) fitted over the whole sweep, evaluated there and
averaged over the line cycle (:mod:`benchrun.loss.surface`).
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
from benchrun.loss.estimate import MODEL_CLAIMS
from benchrun.units import format_si, parse_quantity

MODEL_LINES = (
    " ".join(sentence for _key, sentence in MODEL_CLAIMS),
    "The table: at the tested conditions only (temperature, VR, IF, di/dt), nothing scaled "
    "to other voltages or currents. The line-cycle averages below it scale by the fitted laws "
    "they state.",
)


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "loss",
        help="recovery loss per commutation and average power at switching frequencies",
        description="Energy per commutation (Err + recovery-caused switch energy) and average "
        "power P = fsw·E per part/lot and test point of a stored run; with --compare, the "
        "saving of this run's part over another run's part at matching conditions; with "
        "--line-peak, the average over a sinusoidal line cycle.",
    )
    parser.add_argument("results", metavar="RESULTS", help="run folder or results database URL")
    parser.add_argument("--fsw", metavar="FREQ", action="append", required=True,
                        help="switching frequency, e.g. 20kHz (repeat for several)")
    parser.add_argument("--line-peak", metavar="CURRENT",
                        help="also average over a sinusoidal line cycle of this peak current "
                        "(e.g. 28A): P = fsw·(1/2π)·∫₀^π E(Î·sin θ) dθ per diode, with its "
                        "uncertainty; alone, E from a power law fitted in IF at each tested "
                        "temperature and VR; with --vr, --temperature and --didt, from the "
                        "energy surface fitted over the whole sweep")
    parser.add_argument("--vr", metavar="VOLTAGE",
                        help="with --line-peak, --temperature and --didt: evaluate the energy "
                        "surface E(IF, VR, T, di/dt) fitted over the run's sweep at this "
                        "reverse voltage (e.g. 600V)")
    parser.add_argument("--temperature", metavar="TEMP",
                        help="junction temperature for the energy surface (e.g. 125degC)")
    parser.add_argument("--didt", metavar="RATE",
                        help="commutation di/dt for the energy surface (e.g. 500A/us)")
    parser.add_argument("--modulation", metavar="M", type=float,
                        help="modulation index of the sinusoidal PWM (0 < m <= 1); checked "
                        "and echoed: it does not change the switching-loss average (one "
                        "commutation per carrier period whatever m)")
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


def _rejected(data: Any) -> tuple[str, ...] | None:
    """Serials not graded conforming, when the run folder holds the limits it was graded
    against; None otherwise (nothing is known about rejected devices)."""
    from benchrun.config.limits import load_limits
    from benchrun.grading import grade_lot, run_bench
    from benchrun.store.rundata import LIMITS_FILE

    if data.run_dir is not None and (data.run_dir / LIMITS_FILE).is_file():
        lot = grade_lot(data.shots, load_limits(data.run_dir / LIMITS_FILE),
                        bench=run_bench(data))
        return rejected_devices(lot)
    return None


def _estimate(data: Any, freqs: list[float], rejected: Any = False) -> LossTable:
    """Loss table of a stored run: its declared recovery kind, its rejected devices left out
    when the run folder holds the limits it was graded against (else none are left out, and
    the table says so)."""
    if rejected is False:
        rejected = _rejected(data)
    return estimate_losses(data.shots, freqs, capacitive_parts=capacitive_parts_of(data.manifest),
                           rejected=rejected)


def _surface_request(args: argparse.Namespace) -> dict[str, float] | None:
    """The operating point of the energy surface, or None when none was asked for."""
    given = {"--vr": args.vr, "--temperature": args.temperature, "--didt": args.didt}
    if not any(given.values()):
        if args.modulation is not None and not args.line_peak:
            raise ConfigError("--modulation needs --line-peak", field="--modulation")
        return None
    missing = [name for name, value in given.items() if not value]
    if missing or not args.line_peak:
        raise ConfigError("the energy surface needs --line-peak, --vr, --temperature and "
                          "--didt together (missing: "
                          + ", ".join(missing + ([] if args.line_peak else ["--line-peak"]))
                          + ")", field=(missing or ["--line-peak"])[0])
    out = {
        "vr_V": parse_quantity(args.vr, "voltage", field="--vr"),
        "temperature_K": parse_quantity(args.temperature, "temperature",
                                        field="--temperature"),
        "didt_A_per_s": parse_quantity(args.didt, "current_slope", field="--didt"),
    }
    for name, key in (("--vr", "vr_V"), ("--temperature", "temperature_K"),
                      ("--didt", "didt_A_per_s")):
        if not out[key] > 0:
            raise ConfigError(f"{name} must be positive", field=name)
    return out


def _surface_results(data: Any, freqs: list[float], peak: float, request: dict[str, float],
                     modulation: float | None, rejected: Any) -> tuple[Any, list]:
    from benchrun.loss.surface import energy_surfaces, surface_line_cycle

    surfaces = energy_surfaces(data.shots, capacitive_parts=capacitive_parts_of(data.manifest),
                               rejected=rejected)
    results = [surface_line_cycle(fit, peak_current_A=peak, fsw_hz=freqs,
                                  modulation=modulation, **request)
               for fit in surfaces.fits]
    return surfaces, results


def run(args: argparse.Namespace) -> int:
    from benchrun.store.rundata import load_run

    freqs = parse_frequencies(args.fsw)
    request = _surface_request(args)
    data = load_run(args.results, args.run_id)
    rejected = _rejected(data)
    table = _estimate(data, freqs, rejected)
    comparison = other_id = None
    if args.compare:
        other = load_run(args.compare, args.compare_run_id)
        other_id = other.run_id
        comparison = compare(table, _estimate(other, freqs))
    line = surface = None
    if args.line_peak:
        peak = parse_quantity(args.line_peak, "current", field="--line-peak")
        if not peak > 0:
            raise ConfigError("the line current's peak must be positive", field="--line-peak")
        if request is None:
            from benchrun.loss.line_cycle import line_cycle_losses

            line = line_cycle_losses(table, peak)
        else:
            surface = _surface_results(data, freqs, peak, request, args.modulation, rejected)
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
        if surface is not None:
            payload["surface_line_cycle"] = surface_payload(*surface)
        if comparison is not None:
            payload["compare"] = {"run_id": other_id, **comparison.to_dict()}
        print(json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False))
    else:
        print(render_text(table, run_id=data.run_id))
        if line is not None:
            print()
            print(render_line_cycle(*line))
        if surface is not None:
            print()
            print(render_surface(*surface))
        if comparison is not None:
            print()
            print(render_comparison(comparison, other_run_id=other_id or ""))
    return 0 if table.groups else 1


#: How the surface line-cycle estimate is made (printed with it; benchrun.loss.surface).
SURFACE_LINES = (
    "Line-cycle average from the energy surface fitted over the run's sweep: "
    "E = E_ref·(IF/IF_ref)^b_IF·(VR/VR_ref)^b_VR·(di/dt / di/dt_ref)^b_didt·exp(c·(T − T_ref)), "
    "least squares in ln E over the device means of every test point (valid shots; devices "
    "not graded conforming left out when grades are known).",
    "Per diode over the line period: P = fsw·(1/2π)·∫₀^π E(Î·sin θ) dθ = (fsw/2)·mean of E "
    "over the conducting half-cycle = fsw·E(Î)·W(b_IF)/(2π) (Wallis integral); the leg's two "
    "diodes together lose fsw·mean of E over the half-cycle. VR, T and di/dt are held at the "
    "given values. The modulation index does not enter: linear sinusoidal PWM has one "
    "commutation per carrier period whatever m.",
    "U: fit-parameter covariance propagated to P (GUM first order), k = Student t 95 % at the "
    "fit's degrees of freedom; the scatter of one device about the surface is the residual "
    "standard deviation.",
)


def surface_payload(surfaces: Any, results: list) -> dict[str, Any]:
    """JSON of the surface line-cycle estimate."""
    from benchrun.loss.surface import CONFIDENCE

    out = []
    for r in results:
        f = r.fit
        out.append({
            "part": f.part, "lot": f.lot, "peak_current_A": r.peak_current_A, "vr_V": r.vr_V,
            "temperature_K": r.temperature_K, "didt_A_per_s": r.didt_A_per_s,
            "modulation": r.modulation, "fsw_hz": list(r.fsw_hz),
            "energy_at_peak_J": r.energy_at_peak_J,
            "mean_energy_half_cycle_J": r.mean_energy_half_cycle_J,
            "power_W": list(r.power_W), "leg_power_W": list(r.leg_power_W),
            "u_W": None if r.u_W is None else list(r.u_W),
            "coverage_factor": r.coverage_factor, "confidence": CONFIDENCE,
            "below_range_fraction": r.below_range_fraction,
            "above_range_fraction": r.above_range_fraction, "flags": list(r.flags),
            "fit": {"reference": dict(f.reference), "terms": list(f.terms),
                    "coefficients": list(f.coefficients),
                    "covariance": None if f.covariance is None else [list(c) for c in
                                                                    f.covariance],
                    "n_points": f.n_points, "dof": f.dof, "residual_sd": f.residual_sd,
                    "ranges": {rg.axis: [rg.minimum, rg.maximum] for rg in f.ranges},
                    "law": f.describe()},
        })
    return {"model": list(SURFACE_LINES), "results": out,
            "not_fitted": list(surfaces.not_fitted),
            "rejected_excluded": surfaces.rejected_excluded}


def render_surface(surfaces: Any, results: list) -> str:
    """The surface line-cycle estimate per part/lot, with its fit and flags."""
    lines = list(SURFACE_LINES)
    if not surfaces.rejected_excluded:
        lines.append("No grades given: devices not graded conforming were not left out.")
    for r in results:
        f = r.fit
        ranges = ", ".join(
            f"{AXIS_TEXT[rg.axis][0]} {format_si(rg.minimum, AXIS_TEXT[rg.axis][1], 3)}"
            + ("" if rg.n_distinct < 2
               else f"–{format_si(rg.maximum, AXIS_TEXT[rg.axis][1], 3)}")
            for rg in f.ranges)
        scatter = ("" if f.residual_sd is None
                   else f", residual scatter {100 * f.residual_sd:.1f} %")
        lines.append(f"  {f.part} {f.lot}: {f.describe()} ({f.n_points} points{scatter}; "
                     f"measured {ranges})")
        m = "" if r.modulation is None else f", m = {r.modulation:g} (does not enter)"
        lines.append(
            f"    at Î = {format_si(r.peak_current_A, 'A', 3)}, VR = "
            f"{format_si(r.vr_V, 'V', 3)}, T = {format_si(r.temperature_K, 'K', 4)}, "
            f"di/dt = {format_si(r.didt_A_per_s, 'A/s', 3)}{m}: E(Î) = "
            f"{_j(r.energy_at_peak_J)}, mean over the half-cycle {_j(r.mean_energy_half_cycle_J)}")
        for fsw, p, leg, u in zip(r.fsw_hz, r.power_W, r.leg_power_W,
                                  r.u_W or (None,) * len(r.power_W), strict=True):
            unc = ("(no uncertainty: no residual degrees of freedom)" if u is None
                   else f"± {_w(u)} (k = {r.coverage_factor:.2f}, 95 %)")
            lines.append(f"    P per diode @{format_si(fsw, 'Hz', 3)} = {_w(p)} {unc}; "
                         f"leg (two diodes) {_w(leg)}")
        lines += [f"    flag: {text}" for text in r.flags]
    lines += [f"  not fitted: {text}" for text in surfaces.not_fitted]
    return "\n".join(lines)


AXIS_TEXT = {"forward_current_A": ("IF", "A"), "vr_V": ("VR", "V"),
             "didt_A_per_s": ("di/dt", "A/s"), "temperature_K": ("T", "K")}


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
        header = ["T", "VR", "IF", "di/dt", "devices", "basis", "Err", "Esw,rec", "E mean",
                  "E max"]
        for f in table.fsw_hz:
            fs = format_si(f, "Hz", digits=3)
            header += [f"P mean @{fs}", f"P max @{fs}"]
        rows = [header]
        for g in table.groups:
            if (g.part, g.lot) != (part, lot):
                continue
            row = [format_si(g.temperature_K, "K", 3), format_si(g.vr_nominal_V, "V", 3),
                   format_si(g.if_nominal_A, "A", 3),
                   format_si(g.didt_mean_A_per_s, "A/s", 3), str(g.n_devices), g.basis,
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
