"""Virtual parts and lots for the simulated bench (invented demo data).

The catalogue lives in ``benchrun/simulator/data/virtual_parts.yaml``: per part the ratings,
nominal diode-model parameters and relative spreads; per lot the part, serial numbers and
outliers.  A device's parameters are drawn deterministically from its serial number
(generator seeded by SHA-256 of the serial), so the same serial is always the same device.
"""

from __future__ import annotations

import dataclasses
import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from benchrun.errors import ConfigError
from benchrun.simulator.diode_models import DiodeModel, LauritzenMaDiode, SchottkyDiode

__all__ = [
    "PartRatings",
    "VirtualCatalog",
    "VirtualLot",
    "VirtualPart",
    "default_parts_path",
    "load_virtual_parts",
]

_MODELS: dict[str, type[LauritzenMaDiode] | type[SchottkyDiode]] = {
    "lauritzen-ma": LauritzenMaDiode,
    "schottky": SchottkyDiode,
}
# parameters never drawn or scaled (they are definitions, not device properties)
_FIXED = {
    "t_ref_K", "n", "tau_temp_exponent", "rs_temp_exponent", "fc", "eg_eV", "xti",
    "tm_temp_exponent",
}


def default_parts_path() -> Path:
    """Path of the packaged virtual-parts file."""
    return Path(__file__).with_name("data") / "virtual_parts.yaml"


@dataclass(frozen=True)
class PartRatings:
    """Absolute maximum ratings of a virtual part (SI, kelvin)."""

    vrrm_V: float
    if_max_A: float
    ifrm_A: float
    tj_max_K: float
    tj_min_K: float


@dataclass(frozen=True)
class VirtualPart:
    """One part number: ratings, nominal model parameters and relative spreads."""

    name: str
    description: str
    model: str
    ratings: PartRatings
    nominal: dict[str, float]
    spread: dict[str, float]

    def nominal_model(self) -> DiodeModel:
        """The diode model with nominal parameters."""
        return _MODELS[self.model](**self.nominal)

    def draw(self, serial: str, factors: dict[str, float] | None = None) -> DiodeModel:
        """The model of device ``serial``: nominal·(1 + spread·z), z from a serial-seeded draw."""
        seed = int.from_bytes(hashlib.sha256(serial.encode("utf-8")).digest()[:8], "big")
        rng = np.random.default_rng(seed)
        params = dict(self.nominal)
        for key in sorted(self.spread):
            z = float(rng.standard_normal())
            params[key] = params[key] * max(1.0 + self.spread[key] * z, 0.2)
        for key, factor in (factors or {}).items():
            params[key] = params[key] * factor
        return _MODELS[self.model](**params)


@dataclass(frozen=True)
class VirtualLot:
    """A lot of one part: its serial numbers and outliers."""

    lot_id: str
    part: VirtualPart
    date_code: str
    serials: tuple[str, ...]
    outliers: dict[str, dict[str, float]]

    @property
    def ratings(self) -> PartRatings:
        return self.part.ratings

    def device(self, serial: str) -> DiodeModel:
        """Diode model of ``serial`` (deterministic per serial)."""
        if serial not in self.serials:
            raise ConfigError(f"serial {serial!r} is not in lot {self.lot_id}")
        return self.part.draw(serial, self.outliers.get(serial))


@dataclass(frozen=True)
class VirtualCatalog:
    """All virtual parts and lots."""

    company: str
    parts: dict[str, VirtualPart]
    lots: dict[str, VirtualLot]

    def lot(self, lot_id: str) -> VirtualLot:
        try:
            return self.lots[lot_id]
        except KeyError:
            raise ConfigError(
                f"unknown lot {lot_id!r}; known: {', '.join(sorted(self.lots))}"
            ) from None

    def part(self, name: str) -> VirtualPart:
        try:
            return self.parts[name]
        except KeyError:
            raise ConfigError(
                f"unknown part {name!r}; known: {', '.join(sorted(self.parts))}"
            ) from None

    def lot_of(self, serial: str) -> VirtualLot:
        """The lot that holds ``serial``."""
        for lot in self.lots.values():
            if serial in lot.serials:
                return lot
        raise ConfigError(f"unknown serial {serial!r}")

    def device(self, serial: str) -> DiodeModel:
        """Diode model of ``serial`` in whichever lot holds it."""
        return self.lot_of(serial).device(serial)


def _float_map(raw: Any, where: str, path: Path) -> dict[str, float]:
    if not isinstance(raw, dict):
        raise ConfigError("expected a mapping", file=str(path), field=where)
    out = {}
    for key, value in raw.items():
        try:
            out[str(key)] = float(value)
        except (TypeError, ValueError):
            raise ConfigError(
                f"{value!r} is not a number", file=str(path), field=f"{where}.{key}"
            ) from None
    return out


def load_virtual_parts(path: str | Path | None = None) -> VirtualCatalog:
    """Load the virtual-parts catalogue (default: the packaged file)."""
    path = Path(path) if path is not None else default_parts_path()
    try:
        doc = yaml.safe_load(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"cannot read virtual parts: {exc}", file=str(path)) from exc
    except yaml.YAMLError as exc:
        raise ConfigError(f"invalid YAML: {exc}", file=str(path)) from exc
    if not isinstance(doc, dict) or "parts" not in doc or "lots" not in doc:
        raise ConfigError("needs 'parts' and 'lots'", file=str(path))
    parts: dict[str, VirtualPart] = {}
    for name, raw in doc["parts"].items():
        where = f"parts.{name}"
        model = raw.get("model")
        if model not in _MODELS:
            raise ConfigError(
                f"model must be one of {sorted(_MODELS)}", file=str(path), field=f"{where}.model"
            )
        nominal = _float_map(raw.get("nominal"), f"{where}.nominal", path)
        spread = _float_map(raw.get("spread", {}), f"{where}.spread", path)
        fields = {f.name for f in dataclasses.fields(_MODELS[model])}
        unknown = (set(nominal) | set(spread)) - fields
        if unknown:
            raise ConfigError(
                f"unknown model parameters {sorted(unknown)}", file=str(path), field=where
            )
        if set(spread) & _FIXED:
            raise ConfigError(
                f"parameters {sorted(set(spread) & _FIXED)} cannot have a spread",
                file=str(path),
                field=f"{where}.spread",
            )
        ratings_raw = _float_map(raw.get("ratings"), f"{where}.ratings", path)
        try:
            ratings = PartRatings(**ratings_raw)
        except TypeError as exc:
            raise ConfigError(str(exc), file=str(path), field=f"{where}.ratings") from None
        part = VirtualPart(
            name=str(name),
            description=str(raw.get("description", "")),
            model=model,
            ratings=ratings,
            nominal=nominal,
            spread=spread,
        )
        part.nominal_model()  # all required parameters present
        parts[str(name)] = part
    lots: dict[str, VirtualLot] = {}
    for lot_id, raw in doc["lots"].items():
        where = f"lots.{lot_id}"
        part_name = raw.get("part")
        if part_name not in parts:
            raise ConfigError(f"unknown part {part_name!r}", file=str(path), field=where)
        count = int(raw.get("count", 0))
        prefix = str(raw.get("serial_prefix", f"{lot_id}-"))
        serials = tuple(f"{prefix}{k:03d}" for k in range(1, count + 1))
        outliers = {
            str(s): _float_map(f, f"{where}.outliers.{s}", path)
            for s, f in (raw.get("outliers") or {}).items()
        }
        stray = set(outliers) - set(serials)
        if stray:
            raise ConfigError(
                f"outliers name serials not in the lot: {sorted(stray)}",
                file=str(path),
                field=f"{where}.outliers",
            )
        lots[str(lot_id)] = VirtualLot(
            lot_id=str(lot_id),
            part=parts[part_name],
            date_code=str(raw.get("date_code", "")),
            serials=serials,
            outliers=outliers,
        )
    return VirtualCatalog(company=str(doc.get("company", "")), parts=parts, lots=lots)
