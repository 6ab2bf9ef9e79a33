"""What the recovery costs in the user's converter: energy per commutation and average power.

Model (stated on the report and in ``benchrun loss``):

* Energy per commutation, per shot: ``E = Err + Esw,rec`` where ``Err`` is the diode's
  recovery energy (``err_J``) and ``Esw,rec`` the switch turn-on energy caused by the recovery:
  measured (``eon_recovery_J``, switch-voltage channel captured) or, when it was not measured,
  the estimate ``VR·Qrr`` (``eon_recovery_estimate_J``; see
  :mod:`benchrun.analysis.switching`). Each row says which basis it rests on.
* For a part declared capacitive (a Schottky diode: depletion charge only), ``E = Esw,rec``:
  its ``Err = ∫v·i dt`` over the "recovery" is the energy Ec = ∫v·dQ stored in the diode's
  depletion capacitance, not dissipated; it is given back when the diode next conducts (the
  load current discharges the capacitance), and the charge Qc that stored it was drawn from the
  bus through the switch, whose share (about VR·Qc − Ec measured, VR·Qc estimated) is already
  Esw,rec.  Counting Err as well would count Ec twice (energy balance of a capacitor charged
  from a voltage source through a resistive path, elementary circuit theory).  Rows keep Err
  for reference and say whether it is counted (``err_counted``).
* Devices whose grade is not conforming can be left out (``rejected``): a loss figure of a
  part describes the devices that would be shipped.  The table says whether that was done.
* Average power at a switching frequency: ``P = fsw·E`` (one recovery per switching period,
  the usual loss bookkeeping of hard-switched converters).
* Valid only at the tested conditions (temperature, reverse voltage, forward current, di/dt);
  nothing is scaled to other voltages or currents here. :func:`benchrun.loss.compare`
  interpolates between measured points only inside a measured sweep.

Rows are formed per part, lot, device and nominal test point (temperature, VR, IF and the
di/dt setting: requested di/dt or gate resistance) from valid shots; groups aggregate the
devices of one part/lot at one test point (mean and max).
"""

from __future__ import annotations

import math
from collections.abc import Collection, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

from benchrun.records import ShotResult

#: What the loss estimate does, one claim per entry (key, sentence).  ``benchrun loss``, the
#: report's loss page and :meth:`LossTable.to_dict` print these sentences, and
#: ``tests/test_loss_model_text.py`` checks every claim against the code: change a sentence
#: only with the code it describes.
MODEL_CLAIMS: tuple[tuple[str, str], ...] = (
    ("energy", "E = Err + Esw,rec: the diode's recovery energy Err plus the switch turn-on "
     "energy the recovery causes, per commutation."),
    ("switch_measured", "Esw,rec is measured (switch Eon minus the Eon modelled for a "
     "charge-free diode) where the switch voltage was captured, marked 'measured'."),
    ("switch_estimate", "Otherwise Esw,rec is the estimate VR·Qrr, marked 'estimate'."),
    ("capacitive", "For a part declared capacitive (sequence loss.recovery: capacitive), "
     "E = Esw,rec only: its Err is stored in the diode capacitance and returned, not "
     "counted."),
    ("power", "P = fsw·E: one recovery per switching period."),
    ("valid_only", "Only valid shots count; with grades known, devices not graded conforming "
     "are left out."),
)

BASIS_MEASURED = "measured"
BASIS_ESTIMATE = "estimate"
BASIS_MIXED = "mixed"
#: ``loss.recovery`` of a sequence (and ``loss_recovery`` of its run manifest)
RECOVERY_STORED_CHARGE = "stored-charge"
RECOVERY_CAPACITIVE = "capacitive"


@dataclass(frozen=True)
class LossRow:
    """One device at one nominal test point (means over its valid shots).

    ``power_W[k]`` belongs to ``LossTable.fsw_hz[k]``.
    """

    part: str
    lot: str
    serial: str
    temperature_K: float
    vr_nominal_V: float
    if_nominal_A: float
    n_shots: int
    err_J: float
    switch_J: float
    energy_J: float
    basis: str
    power_W: tuple[float, ...]
    vr_V: float | None = None
    if_A: float | None = None
    didt_A_per_s: float | None = None
    err_counted: bool = True
    didt_target_A_per_s: float | None = None
    gate_resistance_ohm: float | None = None


@dataclass(frozen=True)
class LossGroup:
    """One part/lot at one nominal test point: the devices aggregated (mean and max)."""

    part: str
    lot: str
    temperature_K: float
    vr_nominal_V: float
    if_nominal_A: float
    n_devices: int
    n_shots: int
    err_mean_J: float
    switch_mean_J: float
    energy_mean_J: float
    energy_max_J: float
    basis: str
    power_mean_W: tuple[float, ...]
    power_max_W: tuple[float, ...]
    didt_mean_A_per_s: float | None = None
    err_counted: bool = True
    didt_target_A_per_s: float | None = None
    gate_resistance_ohm: float | None = None


@dataclass(frozen=True)
class LossTable:
    """Result of :func:`estimate_losses`.

    Attributes
    ----------
    fsw_hz
        Switching frequencies the powers are given at.
    rows
        Per device and test point.
    groups
        Per part/lot and test point (temperature, nominal VR, nominal IF).
    skipped
        Why shots were left out (invalid, missing metrics, rejected device), one line per
        reason with counts.
    rejected_excluded
        True when device grades were given and devices not graded conforming were left out;
        False when no grades were given (nothing is known about rejected devices).
    """

    fsw_hz: tuple[float, ...]
    rows: tuple[LossRow, ...]
    groups: tuple[LossGroup, ...]
    skipped: tuple[str, ...] = field(default=())
    rejected_excluded: bool = False

    @property
    def parts(self) -> tuple[tuple[str, str], ...]:
        """(part, lot) pairs in the table, in order of first appearance."""
        seen: dict[tuple[str, str], None] = {}
        for g in self.groups:
            seen.setdefault((g.part, g.lot), None)
        return tuple(seen)

    @property
    def bases(self) -> tuple[str, ...]:
        """Distinct switch-energy bases used by the groups."""
        return tuple(sorted({g.basis for g in self.groups}))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dictionary (SI units)."""
        return {
            "fsw_hz": list(self.fsw_hz),
            "rows": [_row_dict(r) for r in self.rows],
            "groups": [_row_dict(g) for g in self.groups],
            "skipped": list(self.skipped),
            "rejected_excluded": self.rejected_excluded,
            "model": {
                **dict(MODEL_CLAIMS),
                "energy_per_commutation": "E = err_J + recovery-caused switch turn-on energy "
                "(measured eon_recovery_J, else the estimate VR·Qrr); for a capacitive part "
                "E = the switch energy only (err_J is stored in the diode capacitance and "
                "returned)",
                "average_power": "P = fsw·E",
                "validity": "at the tested conditions only; no scaling to other voltages or "
                "currents",
            },
        }


def _row_dict(obj: Any) -> dict[str, Any]:
    data = asdict(obj)
    for key, value in data.items():
        if isinstance(value, tuple):
            data[key] = list(value)
    return data


def _finite(value: Any) -> float | None:
    if value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def shot_energy(metrics: dict[str, Any]) -> tuple[float, float, str] | None:
    """(Err, recovery-caused switch energy, basis) of one shot's metrics, or None.

    The measured ``eon_recovery_J`` is preferred; otherwise ``eon_recovery_estimate_J``, or
    for records analysed without switching metrics ``vr_V·qrr_C`` (the same estimate).
    """
    err = _finite(metrics.get("err_J"))
    if err is None:
        return None
    measured = _finite(metrics.get("eon_recovery_J"))
    if measured is not None:
        return err, measured, BASIS_MEASURED
    estimate = _finite(metrics.get("eon_recovery_estimate_J"))
    if estimate is None:
        qrr, vr = _finite(metrics.get("qrr_C")), _finite(metrics.get("vr_V"))
        if qrr is None or vr is None:
            return None
        estimate = abs(vr) * qrr
    return err, estimate, BASIS_ESTIMATE


def _mean(values: Sequence[float]) -> float:
    return float(sum(values) / len(values))


def _mean_or_none(values: Sequence[float | None]) -> float | None:
    kept = [v for v in values if v is not None]
    return _mean(kept) if kept else None


def _basis(bases: Sequence[str]) -> str:
    distinct = set(bases)
    return distinct.pop() if len(distinct) == 1 else BASIS_MIXED


def point_key(shot: ShotResult) -> tuple[float, float, float]:
    """Nominal (temperature K, VR V, IF A) of a shot, rounded to remove float noise."""
    p = shot.point
    return (round(p.temperature_K, 3), round(p.bus_voltage_V, 6), round(p.forward_current_A, 6))


def setting_key(shot: ShotResult) -> tuple[float | None, float | None]:
    """The di/dt setting of a shot's test point: (requested di/dt, gate resistance), each None
    when the point does not name it.  Points of a di/dt sweep at one (T, VR, IF) differ here
    only, and are kept apart (recovery energy grows with di/dt)."""
    p = shot.point
    return (None if p.didt_A_per_s is None else round(float(p.didt_A_per_s), 0),
            None if p.gate_resistance_ohm is None else round(float(p.gate_resistance_ohm), 6))


def capacitive_parts_of(manifest: dict[str, Any]) -> tuple[str, ...]:
    """The run's part when its sequence declares a capacitive recovery (``loss.recovery``)."""
    if manifest.get("loss_recovery") == RECOVERY_CAPACITIVE and manifest.get("part"):
        return (str(manifest["part"]),)
    return ()


def rejected_devices(lot: Any) -> tuple[str, ...]:
    """Serials of a graded lot (:class:`benchrun.grading.results.LotResult`) not conforming."""
    from benchrun.grading.decision import CONFORMING

    return tuple(d.serial for d in lot.devices if d.verdict != CONFORMING)


def estimate_losses(
    shots: Sequence[ShotResult],
    fsw_hz: Sequence[float],
    *,
    capacitive_parts: Collection[str] = (),
    rejected: Collection[str] | None = None,
) -> LossTable:
    """Recovery loss per commutation and average power at each switching frequency.

    Parameters
    ----------
    shots
        Analysed shots (any number of parts, lots, devices and test points). Invalid shots and
        shots without ``err_J`` (or without any switch-energy figure) are left out and counted
        in ``LossTable.skipped``.
    fsw_hz
        Switching frequencies [Hz], each > 0.
    capacitive_parts
        Part numbers whose recovery is capacitive (Schottky): ``E = Esw,rec`` without Err.
    rejected
        Serials of devices not graded conforming, left out; ``None`` when no grades are known
        (then nothing is left out and ``LossTable.rejected_excluded`` is False).

    Returns
    -------
    LossTable
    """
    freqs = tuple(float(f) for f in fsw_hz)
    if not freqs:
        raise ValueError("give at least one switching frequency")
    for f in freqs:
        if not (math.isfinite(f) and f > 0):
            raise ValueError(f"switching frequency must be positive, got {f!r}")

    per_device: dict[tuple, list[tuple[ShotResult, float, float, str]]] = {}
    skipped: dict[str, int] = {}
    capacitive = set(capacitive_parts)
    excluded = set(rejected or ())
    for shot in shots:
        if shot.serial in excluded:
            reason = "shot of a device not graded conforming"
            skipped[reason] = skipped.get(reason, 0) + 1
            continue
        if not shot.valid:
            reason = "invalid shot (test conditions out of tolerance or event not found)"
            skipped[reason] = skipped.get(reason, 0) + 1
            continue
        energy = shot_energy(shot.metrics)
        if energy is None:
            reason = "no Err or no switch-energy figure in the metrics"
            skipped[reason] = skipped.get(reason, 0) + 1
            continue
        key = (shot.part, shot.lot, shot.serial, *point_key(shot), *setting_key(shot))
        per_device.setdefault(key, []).append((shot, *energy))

    rows: list[LossRow] = []
    for key, items in per_device.items():
        part, lot, serial, temp, vr_nom, if_nom, didt_target, rg = key
        errs = [e for _, e, _, _ in items]
        sws = [s for _, _, s, _ in items]
        counted = part not in capacitive
        energies = [(e if counted else 0.0) + s for e, s in zip(errs, sws, strict=True)]
        mean_energy = _mean(energies)
        conds = [shot.conditions for shot, *_ in items]
        rows.append(LossRow(
            part=part, lot=lot, serial=serial, temperature_K=temp, vr_nominal_V=vr_nom,
            if_nominal_A=if_nom, n_shots=len(items), err_J=_mean(errs), switch_J=_mean(sws),
            energy_J=mean_energy, basis=_basis([b for *_, b in items]),
            power_W=tuple(f * mean_energy for f in freqs),
            vr_V=_mean_or_none([_finite(c.get("vr_V")) for c in conds]),
            if_A=_mean_or_none([_finite(c.get("if_A")) for c in conds]),
            didt_A_per_s=_mean_or_none([_finite(c.get("didt_A_per_s")) for c in conds]),
            err_counted=counted, didt_target_A_per_s=didt_target, gate_resistance_ohm=rg,
        ))
    rows.sort(key=lambda r: (r.part, r.lot, r.temperature_K, r.vr_nominal_V, r.if_nominal_A,
                             r.didt_target_A_per_s or 0.0, r.gate_resistance_ohm or 0.0,
                             r.serial))

    grouped: dict[tuple, list[LossRow]] = {}
    for r in rows:
        grouped.setdefault((r.part, r.lot, r.temperature_K, r.vr_nominal_V, r.if_nominal_A,
                            r.didt_target_A_per_s, r.gate_resistance_ohm), []).append(r)
    groups = []
    for (part, lot, temp, vr_nom, if_nom, didt_target, rg), members in grouped.items():
        energies = [m.energy_J for m in members]
        e_mean, e_max = _mean(energies), max(energies)
        groups.append(LossGroup(
            part=part, lot=lot, temperature_K=temp, vr_nominal_V=vr_nom, if_nominal_A=if_nom,
            n_devices=len(members), n_shots=sum(m.n_shots for m in members),
            err_mean_J=_mean([m.err_J for m in members]),
            switch_mean_J=_mean([m.switch_J for m in members]),
            energy_mean_J=e_mean, energy_max_J=e_max,
            basis=_basis([m.basis for m in members]),
            power_mean_W=tuple(f * e_mean for f in freqs),
            power_max_W=tuple(f * e_max for f in freqs),
            didt_mean_A_per_s=_mean_or_none([m.didt_A_per_s for m in members]),
            err_counted=all(m.err_counted for m in members),
            didt_target_A_per_s=didt_target, gate_resistance_ohm=rg,
        ))
    return LossTable(
        fsw_hz=freqs,
        rows=tuple(rows),
        groups=tuple(groups),
        skipped=tuple(f"{n} × {reason}" for reason, n in skipped.items()),
        rejected_excluded=rejected is not None,
    )
