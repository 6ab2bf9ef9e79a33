"""``benchrun bench check``: identify-and-configure dry run of a bench, nothing fired."""

from __future__ import annotations

import argparse
import contextlib
import sys
from collections.abc import Iterator

from benchrun.config.bench import BenchConfig, load_bench


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "bench",
        help="check a bench's instruments without firing (bench check)",
        description="Commands about the bench itself.",
    )
    sub = parser.add_subparsers(dest="bench_command", metavar="SUBCOMMAND")
    check = sub.add_parser(
        "check",
        help="identify every instrument, set and read back every setting, outputs left off",
        description="Dry run without firing: asks every instrument of BENCH for its identity "
        "(*IDN?) and compares it with its command table, sends every setting the sequence "
        "would use (scope ranges, offsets, probes, time base and trigger; pulse widths and "
        "gate resistance; supply setpoint and thermal setpoint with their outputs OFF), "
        "reads each back, drains SYSTem:ERRor? and prints one line per mismatch or SCPI "
        "error. Every output is switched off (and read back off) at the end. Exit status 1 "
        "on any mismatch or error. 'sim' resources start an in-process simulated bench.",
    )
    check.add_argument("bench", help="bench file (YAML)")
    check.add_argument("--sequence", help="sequence file whose settings are checked; without "
                       "it: probes and ranges from the bench's safety limits only")
    check.set_defaults(func=run_check)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def run_check(args: argparse.Namespace) -> int:
    from benchrun.config.sequence import limits_path, load_sequence
    from benchrun.instruments.check import check_bench

    bench = load_bench(args.bench)
    sequence = load_sequence(args.sequence) if args.sequence else None
    limits = None
    limits_file = limits_path(sequence, args.sequence) if sequence is not None else None
    if limits_file is not None and limits_file.is_file():
        from benchrun.config.limits import load_limits

        limits = load_limits(limits_file)
    if sequence is None:
        print("no --sequence: checking identities, outputs, the probes and ranges from the "
              "safety limits", flush=True)
    with _resources(bench) as resources:
        report = check_bench(bench, resources, sequence, limits=limits,
                             on_line=lambda line: print(line.render(), flush=True))
    verdict = "passed" if report.passed else "FAILED"
    print(f"bench check {verdict}: {report.settings_read_back} settings read back, "
          f"{report.mismatches} mismatches, {report.errors} SCPI errors; nothing was fired",
          file=sys.stdout if report.passed else sys.stderr, flush=True)
    return 0 if report.passed else 1


@contextlib.contextmanager
def _resources(bench: BenchConfig) -> Iterator[dict[str, str]]:
    """Role → VISA resource; ``sim`` entries served by an in-process simulated bench."""
    items = dict(bench.instruments.items())
    if not any(entry.simulated for entry in items.values()):
        yield {role: entry.resource for role, entry in items.items()}
        return
    from benchrun.runner.simbench import sim_fixture
    from benchrun.simulator.server import SimulatedBench

    families = {role: entry.family for role, entry in items.items()}
    wiring = {probe.channel: name for name, probe in bench.probes.items()}
    with SimulatedBench(fixture=sim_fixture(bench), families=families, wiring=wiring) as sim:
        yield {role: sim.resources[role] if entry.simulated else entry.resource
               for role, entry in items.items()}
