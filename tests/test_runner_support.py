"""Shared helpers for the runner tests: small sequences on the simulated bench."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "sequences" / "bench-sim.yaml"
LIMITS = ROOT / "limits" / "DX-4417.yaml"


def limits_for(folder: Path, temperatures: str) -> Path:
    """The DX-4417 limits, keeping only the conditions at the given temperatures (a sequence
    must test every condition of its limits file: ``benchrun.config.crosscheck``)."""
    import yaml

    tested = {item.strip() for item in temperatures.strip("[]").split(",")}
    data = yaml.safe_load(LIMITS.read_text(encoding="utf-8"))
    kept = [c for c in data["conditions"] if c["temperature"] in tested]
    if len(kept) == len(data["conditions"]):
        return LIMITS
    names = {c["name"] for c in kept}
    data["conditions"] = kept
    data["limits"] = [item for item in data["limits"]
                      if item.get("condition") is None or item["condition"] in names]
    if data.get("bins", {}).get("condition") not in names:
        data.pop("bins", None)
    path = folder / f"limits-{'-'.join(sorted(names))}.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    return path


def write_sequence(folder: Path, *, devices: str = "[SN0117-001, SN0117-004]",
                   temperatures: str = "[25 degC, 125 degC]", repeats: int = 1,
                   extra: str = "", name: str = "seq.yaml") -> Path:
    """A short DX-4417 sequence (demo conditions) with thermal waits kept small."""
    text = f"""\
part: DX-4417
lot: LT-0117
devices: {devices}
limits: {limits_for(folder, temperatures)}
test_points:
  - label: nominal
    bus_voltage: 600 V
    forward_current: 30 A
    temperatures: {temperatures}
    gate_resistance: 10 ohm
    repeats: {repeats}
    shot_spacing: 0.02 s
thermal: {{band: 1 K, dwell: 10 s, soak: 10 s, timeout: 1800 s, poll_interval: 2 s}}
expected: {{irrm_fraction: 2.0, didt: 1000 A/us}}
switch_voltage: true
{extra}"""
    path = folder / name
    path.write_text(text)
    return path


def write_bench(folder: Path, *, timeout: str = "10 s", scope_timeout: str | None = None
                ) -> Path:
    """The simulated bench file with the I/O timeout ``timeout`` for every instrument, the
    scope's ``scope_timeout`` when given (fault tests that wait out a timeout keep it short)."""
    text = BENCH.read_text().replace(", timeout: 10 s", "")
    text = text.replace("2030-12-31}", f"2030-12-31, timeout: {timeout}}}")
    text = text.replace("handler-generic}", f"handler-generic, timeout: {timeout}}}")
    if scope_timeout is not None:
        text = text.replace(f"scope-generic,  calibration_due: 2030-12-31, timeout: {timeout}}}",
                            f"scope-generic,  calibration_due: 2030-12-31, "
                            f"timeout: {scope_timeout}}}")
        assert f"timeout: {scope_timeout}}}" in text
    path = folder / "bench.yaml"
    path.write_text(text)
    return path


def crashing_on_call(original, n: int, crash: type[BaseException]):
    """A stand-in for method ``original`` that raises ``crash()`` on its ``n``-th call (the
    process dying at that point) and calls through otherwise."""
    calls = {"n": 0}

    def stand_in(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == n:
            raise crash()
        return original(self, *args, **kwargs)

    return stand_in


def run_until_crash(seq: Path, out: Path, sim, monkeypatch, owner, name: str, n: int,
                    crash: type[BaseException]):
    """Run ``seq`` on the running simulated bench ``sim`` with ``owner.name`` raising
    ``crash()`` on its ``n``-th call (the process dying there); check that the run ends in
    it with the bus supply off, put the method back and return the options that resume the
    run on the same bench."""
    import pytest

    from benchrun.runner.execute import RunOptions, run_sequence

    original = getattr(owner, name)
    options = RunOptions(out_dir=out, sim_resources=sim.resources, clock=sim.clock,
                         ratings_lookup=sim.ratings, show_progress=False)
    monkeypatch.setattr(owner, name, crashing_on_call(original, n, crash))
    with pytest.raises(crash):
        run_sequence(seq, BENCH, options)
    assert not sim.bench.supply.output_on  # safe state even on a crash
    monkeypatch.setattr(owner, name, original)
    return RunOptions(out_dir=out, resume=True, sim_resources=sim.resources, clock=sim.clock,
                      ratings_lookup=sim.ratings, show_progress=False)


class Crash(BaseException):
    """Stands for the process dying while a shot is being stored."""


def write_didt_sweep(folder: Path) -> Path:
    """One device, a 2 × 2 sweep of IF and di/dt at 25 °C, two repeats (di/dt control)."""
    path = folder / "seq.yaml"
    path.write_text(
        "part: DX-4417\nlot: LT-0117\ndevices: [SN0117-001]\n"
        "ratings: {vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC}\n"
        "sweeps:\n"
        "  - {label: sweep, bus_voltage: 600 V, forward_current: [10 A, 20 A],"
        " didt: [300 A/us, 600 A/us], temperatures: [25 degC], repeats: 2,"
        " shot_spacing: 0.05 s}\n"
        "tolerances: {forward_current: 5 %, didt: 20 %, reverse_voltage: 5 %, "
        "temperature: 3 K}\n"
        "thermal: {band: 1 K, dwell: 30 s, soak: 60 s, timeout: 1800 s, poll_interval: 2 s}\n"
        "timing: {off_time: 3 us, second_pulse: 1 us, sample_interval: 1 ns}\n"
        "expected: {irrm_fraction: 2.0}\n")
    return path
