"""Make ``samples/dx4417-25C.csv``: one capture of the invented DX-4417 diode on the
simulated bench, in the plain CSV that ``benchrun analyze`` reads (``t (s),v (V),i (A)``).

Runs one shot (device SN0117-001, 600 V, 30 A, 25 °C) on benchrun's simulated bench, exports
its waveform as ``benchrun export --shot`` does (probe-scaled, deskewed), keeps 2 µs before
and 3 µs after the current zero crossing, writes 6 significant digits, and prints the
metrics the run stored for that shot (``samples/README.md`` lists them).

Run: ``python samples/make_sample.py [OUT.csv]``
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SEQUENCE = f"""\
part: DX-4417
lot: LT-0117
devices: [SN0117-001]
limits: {ROOT / "limits" / "DX-4417.yaml"}
test_points:
  - label: nominal
    bus_voltage: 600 V
    forward_current: 30 A
    temperatures: [25 degC, 125 degC]   # both conditions of the limits file; the 25 degC shot is kept
    gate_resistance: 10 ohm
    repeats: 1
    shot_spacing: 0.02 s
thermal: {{band: 1 K, dwell: 10 s, soak: 10 s, timeout: 1800 s, poll_interval: 2 s}}
expected: {{irrm_fraction: 2.0, didt: 1000 A/us}}
"""
#: Kept before and after the current zero crossing t0, seconds.
BEFORE_S, AFTER_S = 2e-6, 3e-6


def main(out: Path) -> None:
    from benchrun.config import load_bench, load_sequence
    from benchrun.runner.execute import RunOptions, run_sequence
    from benchrun.runner.simbench import simulated_bench
    from benchrun.store.export import waveform_frame
    from benchrun.store.rundata import load_run

    bench_path = ROOT / "sequences" / "bench-sim.yaml"
    with tempfile.TemporaryDirectory() as tmp:
        seq_path = Path(tmp) / "sample.yaml"
        seq_path.write_text(SEQUENCE)
        with simulated_bench(load_bench(bench_path), load_sequence(seq_path)) as sim:
            options = RunOptions(out_dir=Path(tmp) / "out", sim_resources=sim.resources,
                                 clock=sim.clock, ratings_lookup=sim.ratings,
                                 show_progress=False)
            outcome = run_sequence(seq_path, bench_path, options)
        run = load_run(outcome.run_dir)
        shot = next(s for s in run.shots
                    if s.valid and abs(s.point.temperature_K - 298.15) < 1.0)
        with run.open_raw() as raw:
            frame = waveform_frame(raw.read_shot(shot.raw_ref))
    t0 = shot.metrics["t0_s"]
    frame = frame[(frame["t"] >= t0 - BEFORE_S) & (frame["t"] <= t0 + AFTER_S)]
    with open(out, "w", encoding="utf-8", newline="\n") as handle:
        handle.write("t (s),v (V),i (A)\n")
        for t, v, i in frame.itertuples(index=False):
            handle.write(f"{t:.7g},{v:.6g},{i:.6g}\n")
    print(f"{out}: {len(frame)} samples of shot {shot.raw_ref}")
    for name in ("irrm_A", "qrr_C", "trr_s", "if_A", "vr_V"):
        print(f"  {name} = {shot.metrics[name]:.6g}")
    print(f"  flags = {list(shot.flags)}")


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else ROOT / "samples" / "dx4417-25C.csv")
