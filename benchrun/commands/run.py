"""``benchrun run SEQUENCE --bench BENCH [--out DIR] [--resume [RUN_DIR]] [--db URL]``.

Runs a test sequence unattended: checks every file and every planned setting before anything
is energised, then fires, stores and analyses every shot. Resources written ``sim`` in the
bench file are served by an in-process simulated bench. After a crash or Ctrl-C,
``--resume`` continues the newest unfinished run of the same part and lot in DIR (or the run
folder given) at the first untested point. With a signing identity (``--key`` and ``--cert``,
or ``--p12``; passphrase from --passphrase-file, BENCHRUN_KEY_PASSPHRASE or the terminal) a
complete run is graded and its signed report written; the identity is loaded before anything
is energised, so a wrong or missing passphrase costs no shots.
``--durability process`` writes each shot only as far as the operating system before the next
shot fires (faster; survives the program being killed, not a power cut).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchrun.commands.report import (
    add_signer_arguments,
    path_arg,
    print_lot,
    signer_from_args,
    wants_signing,
)
from benchrun.runner.simbench import DEFAULT_SPEEDUP

#: ``benchrun.store.raw.DURABILITY_MODES`` (the store is not imported to build the parser).
DURABILITY_CHOICES = ("power-loss", "process")

if TYPE_CHECKING:
    from benchrun.runner.execute import RunOutcome


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "run", help="run a test sequence on a bench (unattended, resumable)",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    parser.add_argument("sequence", type=path_arg, help="sequence file (YAML)")
    parser.add_argument("--bench", type=path_arg, required=True, help="bench file (YAML)")
    parser.add_argument("--out", type=path_arg, default=Path("runs"), metavar="DIR",
                        help="folder for run folders (default: ./runs)")
    parser.add_argument("--resume", nargs="?", const=True, default=False, metavar="RUN_DIR",
                        help="continue an unfinished run (newest of this lot in DIR, or RUN_DIR)")
    parser.add_argument("--db", metavar="URL", default=None,
                        help="results database URL (default: results.db in the run folder)")
    parser.add_argument("--allow-overdue-calibration", action="store_true",
                        help="run with instruments past their calibration date "
                             "(recorded in the run manifest)")
    parser.add_argument("--durability", choices=DURABILITY_CHOICES, default=DURABILITY_CHOICES[0],
                        help="how far every shot is written before the next one fires: "
                             "'power-loss' (default: synced to disk, survives a power cut) "
                             "or 'process' (handed to the operating system: survives the "
                             "program being killed, not a power cut or system crash)")
    parser.add_argument("--operator", metavar="NAME", default=None,
                        help="who runs the bench; recorded in run.json and printed in the "
                             "report (default: not recorded)")
    parser.add_argument("--wrong-device", choices=("skip", "stop"), default="skip",
                        help="a device the handler reports as another part or lot: skip it "
                             "(default; recorded in run.json) or stop the run before "
                             "anything is energised")
    parser.add_argument("--db-outage-limit", metavar="TIME", default="10 min",
                        help="how long the results database may stay unreachable while the "
                             "bench keeps testing (rows wait in the run folder's "
                             "rows-journal.jsonl); default 10 min")
    parser.add_argument("--no-progress", action="store_true", help="no live progress display")
    parser.add_argument("--sim-speedup", type=float, default=DEFAULT_SPEEDUP,
                        help="clock speed-up of the simulated bench (sim resources only; "
                             "'benchrun sim --speedup' is the same setting)")
    parser.add_argument("--sim-seed", type=int, default=1,
                        help="noise seed of the simulator ('benchrun sim --seed')")
    add_signer_arguments(parser, hidden_prefix="sign-")
    parser.set_defaults(func=run)


def print_outcome(outcome: RunOutcome) -> None:
    """Summary of a run for the terminal."""
    print(f"run {outcome.run_id}: {outcome.status}")
    print(f"  run folder:  {outcome.run_dir}")
    print(f"  results DB:  {outcome.store_url}")
    print(f"  shots:       {outcome.shots_stored} stored this session "
          f"({outcome.shots_valid} valid), {outcome.shots_recovered} recovered from the raw "
          f"record, {outcome.shots_skipped} tests already done, {outcome.trim_shots} trim shots")
    counts = outcome.counts  # the run's totals, after a resume (runner/run_counts.py)
    if counts and len(counts.get("sessions", ())) > 1:
        print(f"  run totals:  {counts['stored']} shots stored ({counts['valid']} valid) over "
              f"{len(counts['sessions'])} sessions, {counts['trim']} trim shots")
    for warning in outcome.warnings:
        print(f"  warning:     {warning}")
    if outcome.error:
        print(f"  stopped by:  {outcome.error}")
    if outcome.safe_state is not None:
        text = outcome.safe_state.describe()
        if outcome.safe_state.reached:
            print(f"  {text}")
        else:
            print("!" * 78, file=sys.stderr)
            print(f"!! {text}", file=sys.stderr)
            print("!" * 78, file=sys.stderr)


def _outage_limit(text: str) -> float:
    from benchrun.errors import ConfigError
    from benchrun.units import parse_quantity

    value = parse_quantity(text, "time", field="--db-outage-limit")
    if value < 0:
        raise ConfigError("--db-outage-limit must not be negative")
    return value


def run(args: argparse.Namespace) -> int:
    from benchrun.runner.execute import RunOptions
    from benchrun.runner.launch import run_on_bench

    resume: bool | Path = args.resume if args.resume is True else (
        Path(args.resume) if args.resume else False)
    options = RunOptions(
        out_dir=args.out,
        resume=resume,
        db_url=args.db,
        allow_overdue_calibration=args.allow_overdue_calibration,
        durability=args.durability,
        wrong_device=args.wrong_device,
        show_progress=not args.no_progress and sys.stderr.isatty(),
        on_finish=print_outcome,
        db_outage_limit_s=_outage_limit(args.db_outage_limit),
        operator=args.operator,
    )
    signer = signer_from_args(args) if wants_signing(args) else None
    if signer is not None:
        options.report = True  # recorded: --resume writes a report a crash kept from being
    outcome = run_on_bench(args.sequence, args.bench, options, sim_speedup=args.sim_speedup,
                           sim_seed=args.sim_seed)
    if outcome.status != "complete":
        return 1
    if signer is not None:
        from benchrun.report.publish import publish_report

        published = publish_report(outcome.run_dir, signer)
        print_lot(published.lot)
        print(f"  report:      {published.path} (signed)")
    return 0
