"""A complete stored run folder for the report and verification tests (invented demo data).

The captures are synthetic recoveries (linear commutation at a set di/dt, exponential tail,
8-bit quantised): not a device model, only realistic enough for the real analysis pipeline to
find every metric. Everything else goes through the real store, grading and signing code.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from benchrun.analysis.pipeline import ChannelData, ProbeCalibration, analyze_channels
from benchrun.config.bench import load_bench
from benchrun.records import ShotResult, TestPoint
from benchrun.runner.shots import measured_didt
from benchrun.store.raw import RawRecord
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import default_store_url, write_manifest

ROOT = Path(__file__).resolve().parents[1]
PASSPHRASE = "correct horse battery"

#: Limits of the invented DX-4417 for these synthetic captures (own copy, so changes to the
#: demo limits file do not change what these tests expect).
LIMITS_YAML = """\
part: DX-4417
conditions:
  - {name: 25C, temperature: 25 degC, forward_current: 30 A, reverse_voltage: 600 V}
  - {name: 125C, temperature: 125 degC, forward_current: 30 A, reverse_voltage: 600 V}
tolerances: {forward_current: 5 %, didt: 25 %, reverse_voltage: 5 %, temperature: 3 K}
limits:
  - {metric: vrm_V, max: 960 V}
  - {metric: softness, min: 0.35}
  - {metric: trr_s, condition: 25C, max: 250 ns}
  - {metric: irrm_A, condition: 25C, max: 25 A}
  - {metric: qrr_C, condition: 25C, max: 3.0 uC}
  - {metric: err_J, condition: 25C, max: 1.0 mJ}
  - {metric: trr_s, condition: 125C, max: 400 ns}
  - {metric: irrm_A, condition: 125C, max: 35 A}
  - {metric: qrr_C, condition: 125C, max: 6.5 uC}
  - {metric: err_J, condition: 125C, max: 2.0 mJ}
decision_rule: {rule: guarded, guard_factor: 1}
uncertainty:
  coverage_factor: 2
bins:
  metric: qrr_C
  condition: 125C
  classes: [{name: Q1, max: 4.5 uC}, {name: Q2, max: 5.5 uC}, {name: Q3, max: 6.5 uC}]
lot: {lot_size: 1000, sample_size: 4, plan: zero-acceptance, aql: 1 %, acceptance_number: 0,
      indeterminate: nonconforming, invalid: nonconforming}
"""

POINTS = (
    TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=30.0,
              gate_resistance_ohm=10.0, label="nominal"),
    TestPoint(index=1, temperature_K=398.15, bus_voltage_V=600.0, forward_current_A=30.0,
              gate_resistance_ohm=10.0, label="nominal"),
)


def capture(irrm: float, tau: float, *, seed: int, didt: float = 500e6, if_a: float = 30.0,
            vr: float = 600.0, dt: float = 1e-9, n: int = 1500, t_start: float = -0.5e-6
            ) -> tuple[float, float, dict[str, ChannelData], dict[str, ProbeCalibration]]:
    """One synthetic 8-bit capture of a recovery."""
    t = t_start + np.arange(n) * dt
    t_peak = (if_a + irrm) / didt
    i = np.where(t < 0, if_a, if_a - didt * t)
    tail = -irrm * np.exp(-(t - t_peak) / tau)
    i = np.where(t >= t_peak, tail, i)
    overshoot = 0.15 * vr * np.exp(-(t - t_peak) / (0.7 * tau))
    v = np.where(t < t_peak, 1.2, -vr - overshoot)
    rng = np.random.default_rng(seed)
    v_range, i_range = 1000.0, 80.0  # full scale ± of each channel, physical units
    probes = {"diode_voltage": ProbeCalibration(scale=100.0),
              "diode_current": ProbeCalibration(scale=100.0)}  # 10 mΩ shunt: 100 A/V
    channels = {}
    for name, x, full in (("diode_voltage", v, v_range), ("diode_current", i, i_range)):
        gain = full / probes[name].scale / 127.0
        codes = np.clip(np.round(x / probes[name].scale / gain + rng.normal(0, 0.3, n)),
                        -128, 127).astype(np.int16)
        channels[name] = ChannelData(codes=codes, gain=gain, offset=0.0, code_min=-128,
                                     code_max=127)
    return t_start, dt, channels, probes


def _thermal(run_dir: Path) -> dict:
    """The run manifest's ``thermal`` entry as the runner writes it for these files."""
    from benchrun.config.bench import load_bench
    from benchrun.config.sequence import load_sequence
    from benchrun.runner.plan import expand_points
    from benchrun.runner.thermal import thermal_record

    sequence = load_sequence(run_dir / "sequence.yaml")
    return thermal_record(expand_points(sequence), sequence, load_bench(run_dir / "bench.yaml"))


def build_run(tmp_path: Path, n_devices: int = 4, *, failing: tuple[int, ...] = (2,),
              run_id: str = "R-DEMO-0001") -> Path:
    """A run folder with raw record, results DB, configuration files and run.json."""
    run_dir = tmp_path / run_id
    run_dir.mkdir(parents=True)
    shutil.copy(ROOT / "sequences" / "dx4417-demo.yaml", run_dir / "sequence.yaml")
    shutil.copy(ROOT / "sequences" / "bench-sim.yaml", run_dir / "bench.yaml")
    (run_dir / "limits.yaml").write_text(LIMITS_YAML, encoding="utf-8")
    url = default_store_url(run_dir)
    rng = np.random.default_rng(7)
    with RawRecord(run_dir / "raw.h5", "w") as raw, ResultsStore(url) as store:
        store.create_run(run_id, "DX-4417", "LT-0117", manifest={"run_id": run_id})
        shot_no = 0
        for point in POINTS:
            hot = point.temperature_K > 350
            for d in range(n_devices):
                serial = f"LT-0117-{d + 1:03d}"
                irrm = (21.0 if hot else 14.0) * (1 + 0.04 * rng.standard_normal())
                tau = (55e-9 if hot else 38e-9) * (1 + 0.05 * rng.standard_normal())
                if d in failing and not hot:
                    irrm = 31.0  # above the 25 A limit at 25 °C: non-conforming
                t0, dt, channels, probes = capture(irrm, tau, seed=shot_no)
                analysis = analyze_channels(t0, dt, channels, probes)
                metrics = analysis.metrics()
                key = f"{shot_no:06d}"
                ref = raw.append_shot(key, t0, dt, channels, probes,
                                      {"serial": serial, "point": point.index})
                shot = ShotResult(
                    run_id=run_id, part="DX-4417", lot="LT-0117", serial=serial,
                    point=point, repeat=0, attempt=0,
                    timestamp=f"2026-11-30T09:{shot_no // 60:02d}:{shot_no % 60:02d}+00:00",
                    conditions={"if_A": metrics["if_A"],  # di/dt as the runner measures it
                                "didt_A_per_s": measured_didt(t0, dt, channels, probes,
                                                              metrics["if_A"]),
                                "vr_V": metrics["vr_V"],
                                "temperature_K": point.temperature_K + 0.2},
                    metrics=metrics, flags=analysis.flags, valid=True, raw_ref=ref,
                    acquisition={"sample_interval_s": dt, "voltage_range_V": 1000.0,
                                 "current_range_A": 80.0, "adc_bits": 8},
                )
                store.add_shot(shot)
                shot_no += 1
    write_manifest(run_dir, {
        "run_id": run_id, "part": "DX-4417", "lot": "LT-0117", "status": "finished",
        "thermal": _thermal(run_dir),
        "started": "2026-11-30T09:00:00+00:00", "finished": "2026-11-30T09:20:00+00:00",
        "software_version": "0.1.0",
        # as the runner records them: --operator and the bench file's site block
        "operator": "Q. Ashdown",
        "ambient": load_bench(ROOT / "sequences" / "bench-sim.yaml").site.record(),
        "instruments": {
            "scope": {"idn": "BENCHRUN-SIM,SCOPE-8B,SN0001,1.0", "calibration_due": "2027-06-30"},
            "pulse": {"idn": "BENCHRUN-SIM,PULSE-2CH,SN0002,1.0"},
            "supply": {"idn": "BENCHRUN-SIM,HV-SUPPLY,SN0003,1.0"},
        },
    })
    return run_dir


def make_signer(tmp_path: Path):
    """A fresh ECDSA P-256 identity and the loaded signer."""
    from benchrun.report.keys import load_signer, new_identity

    files = new_identity("Q. Ashdown", tmp_path / "keys", PASSPHRASE, role="Quality Engineer",
                         organisation="Korvane Power Components")
    return files, load_signer(files.key_path, files.cert_path, PASSPHRASE)


class SignedRun:
    """A rendered, signed report over a stored run (built once per test session)."""

    def __init__(self, base: Path, n_devices: int, failing: tuple[int, ...]) -> None:
        from benchrun.grading import grade_lot, load_limits, run_bench
        from benchrun.report.render import render_report
        from benchrun.store.rundata import load_run

        self.base = base
        self.run_dir = build_run(base, n_devices, failing=failing)
        self.identity, self.signer = make_signer(base)
        self.run = load_run(self.run_dir)
        self.lot = grade_lot(self.run.shots, load_limits(self.run.limits_path),
                             bench=run_bench(self.run))
        self.pdf = render_report(self.run, self.lot, self.run_dir / "report.pdf",
                                 signer=self.signer)

    def copy(self, dest: Path) -> Path:
        """A private copy of the run folder (with its report) for tampering."""
        target = dest / self.run_dir.name
        shutil.copytree(self.run_dir, target)
        return target


@pytest.fixture(scope="session")
def signed_run(tmp_path_factory) -> SignedRun:
    """30 devices at 25 °C and 125 °C, two of them non-conforming, report signed."""
    return SignedRun(tmp_path_factory.mktemp("signed-run"), 30, (4, 17))
