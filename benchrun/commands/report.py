"""``benchrun report RESULTS (--key KEY --cert CERT | --p12 FILE) [...]``.

Grades a stored run against its limits (by default the limits file the run was made with),
estimates the recovery losses at the sequence's switching frequencies, and writes the signed
acceptance report (PAdES) into the run folder. The key passphrase is taken from the
environment variable BENCHRUN_KEY_PASSPHRASE or asked on the terminal.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "report", help="grade a stored run and write its signed acceptance report",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    parser.add_argument("results", metavar="RESULTS", help="run folder or results database URL")
    add_signer_arguments(parser, prefix="")
    parser.add_argument("--run-id", default=None, metavar="ID",
                        help="run to report when the database holds several")
    parser.add_argument("--limits", type=Path, default=None, metavar="FILE",
                        help="limits file (default: the run's own limits.yaml)")
    parser.add_argument("--out", type=Path, default=None, metavar="PDF",
                        help="report file (default: report.pdf in the run folder)")
    parser.add_argument("--fsw", action="append", default=None, metavar="FREQ",
                        help="switching frequency for the loss section, e.g. 20kHz (repeat "
                             "for several; default: those the sequence names)")
    parser.set_defaults(func=run)


def add_signer_arguments(parser: argparse.ArgumentParser, *, prefix: str) -> None:
    """The signing identity options (``--key/--cert`` or ``--p12``, ``--role``)."""
    parser.add_argument(f"--{prefix}key", type=Path, default=None, metavar="KEY",
                        help="signer's encrypted PEM private key (from 'benchrun keys new')")
    parser.add_argument(f"--{prefix}cert", type=Path, default=None, metavar="CERT",
                        help="signer's PEM certificate")
    parser.add_argument(f"--{prefix}p12", type=Path, default=None, metavar="FILE",
                        help="organisation's PKCS#12 signing identity instead of key + cert")
    parser.add_argument(f"--{prefix}role", default=None, metavar="ROLE",
                        help="signer's role shown in the signature block")


def print_lot(lot: Any) -> None:
    """Disposition, its reasons and every device verdict."""
    lots = ", ".join(getattr(lot, "lots", ()) or ())
    print(f"lot {lots} ({lot.part}): disposition {lot.disposition}")
    for reason in lot.reasons:
        print(f"  - {reason}")
    for device in lot.devices:
        print(f"  {device.serial:16s} {device.verdict}")


def run(args: argparse.Namespace) -> int:
    from benchrun.report.publish import load_signer_from_files, publish_report
    from benchrun.units import parse_quantity

    freqs = None
    if args.fsw:
        freqs = [parse_quantity(text, "frequency", field="--fsw") for text in args.fsw]
    signer = load_signer_from_files(key=args.key, cert=args.cert, p12=args.p12, role=args.role)
    published = publish_report(args.results, signer, run_id=args.run_id,
                               limits_path=args.limits, out_pdf=args.out,
                               switching_frequencies_Hz=freqs)
    from benchrun.store.rundata import pending_warning

    if (warning := pending_warning(published.run)) is not None:
        print(warning, file=sys.stderr)
    print_lot(published.lot)
    print(f"limits   {published.limits_path}")
    print(f"report   {published.path} (signed)")
    return 0
