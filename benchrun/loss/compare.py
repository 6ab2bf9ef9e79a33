"""Compare the recovery loss of two parts at matching test conditions.

Rules (stated with every comparison):

* Conditions match when the temperatures agree within ``temperature_tol_K`` and the nominal
  reverse voltage and forward current agree within ``relative_tol``.
* Where the reference part was not measured at exactly that VR (or IF) but a measured sweep at
  the same temperature and the same IF (or VR) brackets it, its energy is interpolated
  linearly between the two nearest measured points. Never extrapolated; temperature is never
  interpolated.
* The commutation di/dt must match too (recovery charge and energy grow with di/dt): the
  reference groups whose mean measured di/dt differs from the part's by more than ``didt_tol``
  are set aside before matching or interpolating (a di/dt sweep at one VR and IF is several
  groups, see :func:`benchrun.loss.estimate.setting_key`); the mean measured di/dt of the
  two groups must agree within ``didt_tol`` (relative, default
  25 %, the di/dt tolerance of the shipped sequences' test conditions), else the condition is
  reported as not matched with both values.  The measured di/dt includes part of the
  device's own recovery (its window reaches −0.5·Irrm), so two parts commutated by the same
  switch and gate resistor read apart by some 10-15 % (SiC against silicon on the simulated
  bench).  Where either side has no measured
  di/dt, the row says "di/dt not compared".
* Anything else is reported as not matched, with the reason.
* Whether devices not graded conforming were left out is stated for each side
  (``Comparison.notes``): a table made without grades says so.

The saving of part A over reference part B at a frequency is ``P_B − P_A`` (positive when A
loses less) and ``100·(P_B − P_A)/P_B`` percent.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

from benchrun.loss.estimate import LossGroup, LossTable
from benchrun.units import format_si

MATCH_MEASURED = "measured at this condition"


@dataclass(frozen=True)
class ComparisonRow:
    """Part A against reference part B at one condition (A's nominal test point)."""

    part_a: str
    lot_a: str
    part_b: str
    lot_b: str
    temperature_K: float
    vr_V: float
    if_A: float
    energy_a_J: float
    energy_b_J: float
    basis_a: str
    basis_b: str
    match: str
    power_a_W: tuple[float, ...]
    power_b_W: tuple[float, ...]
    saving_W: tuple[float, ...]
    saving_pct: tuple[float | None, ...]


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare`: ``rows`` where conditions match, ``unmatched`` reasons."""

    fsw_hz: tuple[float, ...]
    rows: tuple[ComparisonRow, ...]
    unmatched: tuple[str, ...] = field(default=())
    temperature_tol_K: float = 2.0
    relative_tol: float = 0.02
    didt_tol: float = 0.25
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dictionary (SI units)."""
        rows = []
        for r in self.rows:
            data = asdict(r)
            for key, value in data.items():
                if isinstance(value, tuple):
                    data[key] = list(value)
            rows.append(data)
        return {
            "fsw_hz": list(self.fsw_hz),
            "rows": rows,
            "unmatched": list(self.unmatched),
            "notes": list(self.notes),
            "rules": {
                "didt_tol": self.didt_tol,
                "temperature_tol_K": self.temperature_tol_K,
                "relative_tol": self.relative_tol,
                "saving": "P_b - P_a (positive when part a loses less); percent of P_b",
                "interpolation": "linear in VR or IF between measured points of part b at the "
                "same temperature; never extrapolated",
            },
        }


def _close(a: float, b: float, rel: float) -> bool:
    return abs(a - b) <= rel * max(abs(a), abs(b))


def _cond(g: LossGroup) -> str:
    return (f"{format_si(g.temperature_K, 'K')}, {format_si(g.vr_nominal_V, 'V')}, "
            f"{format_si(g.if_nominal_A, 'A')}")


def _interpolate(
    target: float, points: list[tuple[float, float]], axis: str, unit: str
) -> tuple[float, str] | None:
    """Linear interpolation of energy over (x, energy) points strictly bracketing target."""
    below = [p for p in points if p[0] < target]
    above = [p for p in points if p[0] > target]
    if not below or not above:
        return None
    x0, e0 = max(below)
    x1, e1 = min(above)
    energy = e0 + (e1 - e0) * (target - x0) / (x1 - x0)
    how = (f"interpolated in {axis} between {format_si(x0, unit)} and {format_si(x1, unit)}")
    return energy, how


def _didt_check(g: LossGroup, used: list[LossGroup], tol: float) -> str | None:
    """None when di/dt matches (or cannot be compared), else the reason it does not."""
    values = [r.didt_mean_A_per_s for r in used if r.didt_mean_A_per_s is not None]
    if g.didt_mean_A_per_s is None or not values:
        return None
    ref = sum(values) / len(values)
    if _close(g.didt_mean_A_per_s, ref, tol):
        return None
    return (f"di/dt differs: {format_si(g.didt_mean_A_per_s, 'A/s')} against "
            f"{format_si(ref, 'A/s')} (tolerance {100 * tol:.0f} %)")


def _didt_note(g: LossGroup, used: list[LossGroup]) -> str:
    if g.didt_mean_A_per_s is None or all(r.didt_mean_A_per_s is None for r in used):
        return "; di/dt not compared (not recorded)"
    return "; di/dt matched"


def _reference_energy(
    g: LossGroup, ref: list[LossGroup], t_tol: float, rel: float, didt_tol: float = 0.25
) -> tuple[float, str, str] | str:
    """(energy, match description, basis) of the reference at g's condition, or a reason."""
    same_t = [r for r in ref if abs(r.temperature_K - g.temperature_K) <= t_tol]
    if not same_t:
        return f"not measured at {format_si(g.temperature_K, 'K')}"
    # a di/dt sweep holds several groups at one (T, VR, IF): keep those whose di/dt matches
    # (or is not recorded), so neither the exact match nor an interpolation mixes di/dt
    near = [r for r in same_t if _close(r.vr_nominal_V, g.vr_nominal_V, rel)
            and _close(r.if_nominal_A, g.if_nominal_A, rel)]
    same_didt = [r for r in same_t if _didt_check(g, [r], didt_tol) is None]
    if near and not any(r in same_didt for r in near):
        return _didt_check(g, near, didt_tol) or "di/dt differs"
    if not same_didt:
        return _didt_check(g, same_t, didt_tol) or "di/dt differs"
    same_t = same_didt
    exact = [r for r in same_t if _close(r.vr_nominal_V, g.vr_nominal_V, rel)
             and _close(r.if_nominal_A, g.if_nominal_A, rel)]
    if exact:
        energy = sum(r.energy_mean_J for r in exact) / len(exact)
        bases = {r.basis for r in exact}
        return (energy, MATCH_MEASURED + _didt_note(g, exact),
                bases.pop() if len(bases) == 1 else "mixed")
    same_if = [r for r in same_t if _close(r.if_nominal_A, g.if_nominal_A, rel)]
    found = _interpolate(g.vr_nominal_V, [(r.vr_nominal_V, r.energy_mean_J) for r in same_if],
                         "VR", "V")
    used = same_if
    if found is None:
        same_vr = [r for r in same_t if _close(r.vr_nominal_V, g.vr_nominal_V, rel)]
        found = _interpolate(g.if_nominal_A,
                             [(r.if_nominal_A, r.energy_mean_J) for r in same_vr], "IF", "A")
        used = same_vr
    if found is not None:
        differs = _didt_check(g, used, didt_tol)
        if differs:
            return differs
        bases = {r.basis for r in used}
        return (found[0], found[1] + _didt_note(g, used),
                bases.pop() if len(bases) == 1 else "mixed")
    measured = "; ".join(sorted({f"{format_si(r.vr_nominal_V, 'V')}/"
                                 f"{format_si(r.if_nominal_A, 'A')}" for r in same_t}))
    return (f"{format_si(g.vr_nominal_V, 'V')}/{format_si(g.if_nominal_A, 'A')} lies outside "
            f"the measured points at {format_si(g.temperature_K, 'K')} ({measured}); "
            "not extrapolated")


def compare(
    a: LossTable,
    b: LossTable,
    *,
    temperature_tol_K: float = 2.0,
    relative_tol: float = 0.02,
    didt_tol: float = 0.25,
) -> Comparison:
    """Saving of the part(s) in ``a`` over the reference part(s) in ``b`` at matching conditions.

    Powers are computed at ``a.fsw_hz`` from the mean energy per commutation of each
    part/lot group (``P = fsw·E``).
    """
    freqs = a.fsw_hz
    rows: list[ComparisonRow] = []
    unmatched: list[str] = []
    for part_b, lot_b in b.parts:
        ref = [g for g in b.groups if (g.part, g.lot) == (part_b, lot_b)]
        for g in a.groups:
            found = _reference_energy(g, ref, temperature_tol_K, relative_tol, didt_tol)
            if isinstance(found, str):
                unmatched.append(f"{g.part} {g.lot} at {_cond(g)}: {part_b} {lot_b} {found}")
                continue
            energy_b, how, basis_b = found
            p_a = tuple(f * g.energy_mean_J for f in freqs)
            p_b = tuple(f * energy_b for f in freqs)
            saving = tuple(pb - pa for pa, pb in zip(p_a, p_b, strict=True))
            pct = tuple(100.0 * s / pb if pb > 0 else None
                        for s, pb in zip(saving, p_b, strict=True))
            rows.append(ComparisonRow(
                part_a=g.part, lot_a=g.lot, part_b=part_b, lot_b=lot_b,
                temperature_K=g.temperature_K, vr_V=g.vr_nominal_V, if_A=g.if_nominal_A,
                energy_a_J=g.energy_mean_J, energy_b_J=energy_b, basis_a=g.basis,
                basis_b=basis_b, match=how, power_a_W=p_a, power_b_W=p_b, saving_W=saving,
                saving_pct=pct,
            ))
        for r in ref:
            covered = any(
                abs(r.temperature_K - g.temperature_K) <= temperature_tol_K
                and _close(r.vr_nominal_V, g.vr_nominal_V, relative_tol)
                and _close(r.if_nominal_A, g.if_nominal_A, relative_tol)
                for g in a.groups
            )
            if not covered:
                unmatched.append(f"{part_b} {lot_b} at {_cond(r)}: not measured for "
                                 + ", ".join(f"{p} {lot}" for p, lot in a.parts))
    notes = tuple(
        f"{', '.join(f'{p} {lot}' for p, lot in table.parts) or side}: "
        + ("devices not graded conforming were left out" if table.rejected_excluded
           else "no grades given: rejected devices were not left out")
        for side, table in (("part", a), ("reference", b))
    )
    return Comparison(fsw_hz=freqs, rows=tuple(rows), unmatched=tuple(unmatched),
                      temperature_tol_K=temperature_tol_K, relative_tol=relative_tol,
                      didt_tol=didt_tol, notes=notes)
