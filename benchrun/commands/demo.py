"""``benchrun demo [--out DIR]``: the whole workflow on the simulated bench, in about a minute.

Starts the simulated bench in-process, runs the example sequence on an invented lot of
DX-4417 fast-recovery diodes (Korvane Power Components, invented) at 25 °C and 125 °C —
two of the ten devices are outliers — grades the lot against the example limits, stores
everything, and writes a signed acceptance report. It then tests a small lot of DX-5203 SiC
Schottky diodes at the same conditions and compares the recovery losses of the two parts
(``--no-sic`` skips this).

``--characterize`` runs the characterisation sweep of the invented snappy diode DX-4425
instead (``sequences/dx4425-characterize.yaml``: forward current, di/dt, bus voltage and
temperature swept on a sample of three devices, di/dt set and verified by the runner) and
writes the signed ``characterization.pdf``, ``curves.csv`` and ``fits.csv`` into its run
folder; it prints one line per device with its verdict at the limits' nominal condition and
its worst-case snappiness step.

The signing key is a throwaway demo key made in DIR/keys on first use; its passphrase is
taken from BENCHRUN_KEY_PASSPHRASE or is the demo default printed below — demo only, never
for real reports.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchrun.commands.report import path_arg, print_lot
from benchrun.errors import ConfigError

if TYPE_CHECKING:
    from benchrun.runner.execute import RunOutcome

#: Passphrase of the throwaway demo signing key when BENCHRUN_KEY_PASSPHRASE is not set.
#: DEMO ONLY: it is printed on the terminal and is not a secret.
DEMO_PASSPHRASE = "demo-only-not-a-secret"
DEMO_SIGNER = ("Q. Ashdown", "Quality Engineer (demo signature)",
               "Korvane Power Components (invented, demo)")
SEQUENCE_SI = "dx4417-demo.yaml"
SEQUENCE_SIC = "dx5203-demo.yaml"
SEQUENCE_CHARACTERIZE = "dx4425-characterize.yaml"
BENCH = "bench-sim.yaml"


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "demo", help="run, grade and report an invented lot on the simulated bench",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    parser.add_argument("--out", type=path_arg, default=Path("benchrun-demo"), metavar="DIR",
                        help="output folder (default: ./benchrun-demo)")
    parser.add_argument("--no-sic", action="store_true",
                        help="skip the DX-5203 SiC lot and the loss comparison")
    parser.add_argument("--no-progress", action="store_true", help="no live progress display")
    parser.add_argument("--characterize", action="store_true",
                        help="run the DX-4425 characterisation sweep instead and write its "
                             "signed characterization.pdf and curves.csv")
    parser.set_defaults(func=run)


def sequences_dir() -> Path:
    """The example files shipped beside the package (``sequences/`` of the source tree)."""
    import benchrun

    folder = Path(benchrun.__file__).resolve().parents[1] / "sequences"
    if not (folder / SEQUENCE_SI).is_file():
        raise ConfigError(f"example sequences not found in {folder}; run the demo from a "
                          "source checkout of benchrun")
    return folder


def demo_signer(keys_dir: Path) -> tuple[Any, Path, str]:
    """Load the demo signing identity, making it on first use. Returns (signer, cert, how)."""
    from benchrun.report.keys import PASSPHRASE_ENV, load_signer, new_identity

    passphrase = os.environ.get(PASSPHRASE_ENV) or DEMO_PASSPHRASE
    how = (f"from {PASSPHRASE_ENV}" if os.environ.get(PASSPHRASE_ENV)
           else f"demo default '{DEMO_PASSPHRASE}' (DEMO ONLY)")
    name, role, org = DEMO_SIGNER
    key = keys_dir / "q-ashdown.key.pem"
    cert = keys_dir / "q-ashdown.cert.pem"
    if not key.is_file() or not cert.is_file():
        files = new_identity(name, keys_dir, passphrase, role=role, organisation=org,
                             valid_days=365, overwrite=True)
        key, cert = files.key_path, files.cert_path
    return load_signer(key, cert, passphrase, role=role), cert, how


#: The invented operator the demo records (invented scenario, no real person).
DEMO_OPERATOR = "A. Demo-Operator (invented)"


def _run(sequence: Path, bench: Path, out: Path, progress: bool) -> RunOutcome:
    from benchrun.runner.execute import RunOptions
    from benchrun.runner.launch import run_on_bench

    options = RunOptions(out_dir=out, show_progress=progress, operator=DEMO_OPERATOR)
    return run_on_bench(sequence, bench, options)


def run(args: argparse.Namespace) -> int:
    from benchrun.report.publish import publish_report

    started = time.perf_counter()
    out: Path = args.out.resolve()
    out.mkdir(parents=True, exist_ok=True)
    folder = sequences_dir()
    progress = not args.no_progress and sys.stderr.isatty()
    print("benchrun demo: simulated bench, invented parts and lots (Korvane Power Components)")
    first = SEQUENCE_CHARACTERIZE if args.characterize else SEQUENCE_SI
    print(f"  sequence {folder / first}\n  bench    {folder / BENCH}")

    signer, cert, how = demo_signer(out / "keys")
    if args.characterize:
        return _characterize(folder, out, signer, cert, how, progress, started)
    outcome = _run(folder / SEQUENCE_SI, folder / BENCH, out / "runs", progress)
    published = publish_report(outcome.run_dir, signer)
    lot, loss, report = published.lot, published.loss, published.path

    comparison = None
    sic = None
    if not args.no_sic:
        sic = _run(folder / SEQUENCE_SIC, folder / BENCH, out / "runs", progress)
        sic_loss = publish_report(sic.run_dir, signer).loss
        if loss is not None and sic_loss is not None:
            from benchrun.loss import compare

            comparison = compare(sic_loss, loss)

    elapsed = time.perf_counter() - started
    print()
    print_lot(lot)
    print()
    print(f"run folder      {outcome.run_dir}")
    print(f"  raw record    {outcome.run_dir / 'raw.h5'}")
    print(f"  results DB    {outcome.store_url}")
    print(f"  run log       {outcome.run_dir / 'run.log'}")
    print(f"  manifest      {outcome.run_dir / 'run.json'}")
    print(f"  report (signed PDF) {report}")
    print(f"signing certificate {cert}  (key passphrase: {how})")
    if outcome.safe_state is not None:
        print(outcome.safe_state.describe())
    if sic is not None:
        print(f"SiC run folder  {sic.run_dir}  (report {sic.run_dir / 'report.pdf'})")
    if comparison is not None:
        _print_comparison(comparison)
    print(f"verify with:    benchrun verify {report} --cert {cert} --data {outcome.run_dir}")
    print(f"demo finished in {elapsed:.1f} s")
    return 0


def _characterize(folder: Path, out: Path, signer: Any, cert: Path, how: str,
                  progress: bool, started: float) -> int:
    """``--characterize``: the sweep run, its curves and its signed report."""
    from benchrun.characterize.publish import publish_characterization

    outcome = _run(folder / SEQUENCE_CHARACTERIZE, folder / BENCH, out / "runs", progress)
    published = publish_characterization(outcome.run_dir, signer)
    shots = published.shots
    print()
    print(f"characterisation run {outcome.run_dir}: {len(shots)} shots "
          f"({sum(s.valid for s in shots)} valid), {len({s.point.index for s in shots})} "
          f"test points, {len(published.trends)} fitted trends")
    for index, reason in sorted(outcome.points_invalid.items()):
        print(f"  point {index} not fired: {reason}")
    print(f"  curves (CSV)  {published.csv}")
    print(f"  fits (CSV)    {published.fits}")
    print(f"  report (signed PDF) {published.pdf}")
    if published.qualification is not None:
        from benchrun.characterize.qualification_tables import summary_lines

        print("qualification verdicts (the run's limits file; details in the report):")
        for line in summary_lines(published.qualification):
            print(f"  {line}")
    print(f"signing certificate {cert}  (key passphrase: {how})")
    if outcome.safe_state is not None:
        print(outcome.safe_state.describe())
    print(f"demo finished in {time.perf_counter() - started:.1f} s")
    return 0


def _print_comparison(comparison: Any) -> None:
    rows = getattr(comparison, "rows", ())
    if not rows:
        print("loss comparison: no matching test conditions")
        return
    print("recovery loss per commutation (Err + switch energy caused by the recovery; for the "
          "capacitive SiC part the switch share only, its Err being stored and returned) and "
          "average power P = fsw*E:")
    for row in rows:
        powers = ", ".join(
            f"{f / 1e3:g} kHz: {pa:.2f} W vs {pb:.2f} W"
            for f, pa, pb in zip(comparison.fsw_hz, row.power_a_W, row.power_b_W, strict=True))
        print(f"  {row.part_a} vs {row.part_b} at {row.temperature_K - 273.15:g} degC, "
              f"{row.vr_V:g} V, {row.if_A:g} A: {row.energy_a_J * 1e6:.1f} uJ vs "
              f"{row.energy_b_J * 1e6:.1f} uJ ({powers}; {row.match})")
    for note in getattr(comparison, "notes", ()):
        print(f"  {note}")
    for text in getattr(comparison, "unmatched", ()):
        if "di/dt differs" in text:
            print(f"  not compared: {text}")
