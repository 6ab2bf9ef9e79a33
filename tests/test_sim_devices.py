"""Virtual parts and lots of the simulated bench (invented demo data)."""

from __future__ import annotations

import numpy as np
import pytest

from benchrun.errors import ConfigError
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.diode_models import LauritzenMaDiode, SchottkyDiode


@pytest.fixture(scope="module")
def catalog():
    return load_virtual_parts()


def test_catalogue_contents(catalog):
    assert catalog.company == "Korvane Power Components"
    si_part = catalog.part("DX-4417")
    assert si_part.ratings.vrrm_V == 1200.0 and si_part.ratings.if_max_A == 30.0
    assert catalog.part("DX-5203").ratings.if_max_A == 20.0
    lot = catalog.lot("LT-0117")
    assert len(lot.serials) == 10
    assert lot.serials[0] == "SN0117-001"
    assert lot.ratings is si_part.ratings
    assert isinstance(lot.device("SN0117-001"), LauritzenMaDiode)
    assert isinstance(catalog.device("SN0131-001"), SchottkyDiode)


def test_device_is_deterministic_per_serial(catalog):
    lot = catalog.lot("LT-0117")
    a = lot.device("SN0117-003")
    assert a == load_virtual_parts().lot("LT-0117").device("SN0117-003")
    assert a != lot.device("SN0117-005")


def test_outliers_have_longer_lifetime(catalog):
    lot = catalog.lot("LT-0117")
    taus = {s: lot.device(s).tau_s for s in lot.serials}
    normal = [v for s, v in taus.items() if s not in lot.outliers]
    assert taus["SN0117-004"] > max(normal)
    assert taus["SN0117-009"] > max(normal)


def test_spread_statistics(catalog):
    # parameters are drawn nominal·(1 + σ·z), z ~ N(0,1): over many serials the relative
    # standard deviation approaches σ (sampling check, common practice: 4 standard errors)
    part = catalog.part("DX-4417")
    n = 2000
    taus = np.array([part.draw(f"X-{k:05d}").tau_s for k in range(n)]) / part.nominal["tau_s"]
    sigma = part.spread["tau_s"]
    assert abs(taus.mean() - 1.0) < 4 * sigma / np.sqrt(n)
    assert taus.std() == pytest.approx(sigma, rel=4 / np.sqrt(2 * n))


def test_unknown_names_raise_config_error(catalog):
    with pytest.raises(ConfigError):
        catalog.lot("L9999-Z")
    with pytest.raises(ConfigError):
        catalog.device("SN0000-001")
    with pytest.raises(ConfigError):
        catalog.lot("LT-0117").device("SN0131-001")


def test_bad_file_reports_the_field(tmp_path):
    bad = tmp_path / "parts.yaml"
    bad.write_text(
        "parts:\n  P1:\n    model: lauritzen-ma\n    ratings: {vrrm_V: 1, if_max_A: 1, "
        "ifrm_A: 1, tj_max_K: 400, tj_min_K: 200}\n    nominal: {tau_s: fast}\nlots: {}\n"
    )
    with pytest.raises(ConfigError, match=r"parts\.P1\.nominal\.tau_s"):
        load_virtual_parts(bad)
