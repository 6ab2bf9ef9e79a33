"""``benchrun report RESULTS (--key KEY --cert CERT | --p12 FILE) [--pdf FILE] [...]``.

Grades a stored run against its limits (by default the limits file the run was made with),
estimates the recovery losses at the sequence's switching frequencies, and writes the signed
acceptance report (PAdES) into the run folder (or to --pdf FILE). The key passphrase is read
from --passphrase-file FILE, else the environment variable BENCHRUN_KEY_PASSPHRASE, else asked
on the terminal; with none of them and no terminal the command stops before grading.
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
    add_signer_arguments(parser)
    parser.add_argument("--run-id", default=None, metavar="ID",
                        help="run to report when the database holds several")
    parser.add_argument("--limits", type=path_arg, default=None, metavar="FILE",
                        help="limits file (default: the run's own limits.yaml)")
    parser.add_argument("--pdf", type=path_arg, default=None, metavar="FILE",
                        help="report file (default: report.pdf in the run folder)")
    parser.add_argument("--out", dest="pdf", type=path_arg, help=argparse.SUPPRESS)
    parser.add_argument("--fsw", action="append", default=None, metavar="FREQ",
                        help="switching frequency for the loss section, e.g. 20kHz (repeat "
                             "for several; default: those the sequence names)")
    parser.add_argument("--lot", default=None, metavar="LOT",
                        help="report every run of this lot in the store as one lot (retest "
                             "rule: the latest complete test of each device counts)")
    parser.add_argument("--runs", action="append", default=[], type=path_arg, metavar="DIR",
                        help="with --lot: a folder holding run folders that are not where "
                             "the store records them (repeat for several)")
    parser.set_defaults(func=run)


def path_arg(text: str) -> Path:
    """argparse type for a path: an empty string is refused (it would silently mean ".")."""
    if not text.strip():
        raise argparse.ArgumentTypeError("empty path; name a file or folder")
    return Path(text)


def add_passphrase_argument(parser: argparse.ArgumentParser) -> None:
    """``--passphrase-file FILE``: the key passphrase on the file's first line."""
    parser.add_argument("--passphrase-file", type=path_arg, default=None, metavar="FILE",
                        help="file holding the key passphrase on its first line (for "
                             "unattended use; else BENCHRUN_KEY_PASSPHRASE, else asked on "
                             "the terminal)")


def add_signer_arguments(parser: argparse.ArgumentParser, *,
                         hidden_prefix: str | None = None) -> None:
    """The signing identity options, one spelling for every command: ``--key/--cert`` or
    ``--p12``, ``--role``, ``--passphrase-file``. ``hidden_prefix`` keeps older spellings
    (``--sign-key`` ...) working without listing them."""
    parser.add_argument("--key", type=path_arg, default=None, metavar="KEY",
                        help="signer's encrypted PEM private key (from 'benchrun keys new')")
    parser.add_argument("--cert", type=path_arg, default=None, metavar="CERT",
                        help="signer's PEM certificate")
    parser.add_argument("--p12", type=path_arg, default=None, metavar="FILE",
                        help="organisation's PKCS#12 signing identity instead of key + cert")
    parser.add_argument("--role", default=None, metavar="ROLE",
                        help="signer's role shown in the signature block")
    add_passphrase_argument(parser)
    if hidden_prefix:
        for name in ("key", "cert", "p12"):
            parser.add_argument(f"--{hidden_prefix}{name}", dest=name, type=path_arg,
                                default=None, help=argparse.SUPPRESS)
        parser.add_argument(f"--{hidden_prefix}role", dest="role", default=None,
                            help=argparse.SUPPRESS)


def wants_signing(args: argparse.Namespace) -> bool:
    """Whether any signing identity option was given."""
    return any(getattr(args, name, None) for name in ("key", "cert", "p12"))


def signer_from_args(args: argparse.Namespace) -> Any:
    """Load the signing identity the options name; the passphrase from ``--passphrase-file``,
    BENCHRUN_KEY_PASSPHRASE or the terminal. Raises ReportError (saying what to do) before
    anything is signed or fired."""
    from benchrun.errors import ReportError
    from benchrun.report.keys import passphrase_from_env_or_prompt
    from benchrun.report.publish import load_signer_from_files

    if args.p12 is not None and (args.key is not None or args.cert is not None):
        raise ReportError("give either --p12 or --key with --cert, not both")
    if args.p12 is None and (args.key is None or args.cert is None):
        raise ReportError("signing needs --key and --cert (or --p12)")
    for path in (args.key, args.cert, args.p12):
        if path is not None and not Path(path).is_file():
            raise ReportError(f"{path}: no such file")
    secret = passphrase_from_env_or_prompt(passphrase_file=args.passphrase_file)
    return load_signer_from_files(key=args.key, cert=args.cert, p12=args.p12, role=args.role,
                                  passphrase=secret)


def positive_frequency(text: str, option: str = "--fsw") -> float:
    """A switching frequency from the command line; ConfigError unless it is positive."""
    from benchrun.errors import ConfigError
    from benchrun.units import parse_quantity

    value = parse_quantity(text, "frequency", field=option)
    if not value > 0:
        raise ConfigError(f"a switching frequency must be positive, got {text!r}", field=option)
    return value


def print_lot(lot: Any) -> None:
    """Disposition, its reasons and every device verdict."""
    lots = ", ".join(getattr(lot, "lots", ()) or ())
    print(f"lot {lots} ({lot.part}): disposition {lot.disposition}")
    for reason in lot.reasons:
        print(f"  - {reason}")
    for device in lot.devices:
        print(f"  {device.serial:16s} {device.verdict}")


def run(args: argparse.Namespace) -> int:
    from benchrun.report.publish import publish_report

    freqs = None
    if args.fsw:
        freqs = [positive_frequency(text) for text in args.fsw]
    if getattr(args, "lot", None):
        return _run_lot(args, freqs)
    if getattr(args, "runs", None):
        from benchrun.errors import ReportError

        raise ReportError("--runs names run folders of a lot: use it with --lot LOT")
    signer = signer_from_args(args)
    published = publish_report(args.results, signer, run_id=args.run_id,
                               limits_path=args.limits, out_pdf=args.pdf,
                               switching_frequencies_Hz=freqs)
    from benchrun.store.rundata import pending_warning

    if (warning := pending_warning(published.run)) is not None:
        print(warning, file=sys.stderr)
    print_lot(published.lot)
    print(f"limits   {published.limits_path}")
    print(f"report   {published.path} (signed)")
    return 0


def _run_lot(args: argparse.Namespace, freqs: list[float] | None) -> int:
    """``report RESULTS --lot LOT``: every run of the lot in the store, one signed report."""
    from benchrun.errors import ReportError
    from benchrun.report.publish import publish_lot_report
    from benchrun.store.lotdata import RETEST_RULE

    if args.run_id is not None:
        raise ReportError("give either --lot (every run of the lot) or --run-id, not both")
    if args.limits is not None:
        raise ReportError("a lot report grades against the limits.yaml of the newest run that "
                          "counts (its hash is in the report); to see the lot against another "
                          "file use 'benchrun grade RESULTS --lot LOT --limits FILE'")
    signer = signer_from_args(args)
    published = publish_lot_report(args.results, args.lot, signer, runs=tuple(args.runs),
                                   out_pdf=args.pdf, switching_frequencies_Hz=freqs)
    lot_data = published.lot_data
    if lot_data.pending:
        print(f"warning: {len(lot_data.pending)} shot(s) of lot {args.lot} were recorded but "
              "not analysed and are left out; 'benchrun run ... --resume' completes them",
              file=sys.stderr)
    print_lot(published.lot)
    for folder in published.folders:
        print(f"  {folder.describe()}")
    print(f"retest rule: {RETEST_RULE}")
    for item in lot_data.superseded:
        print(f"  superseded: {item.serial} in run {item.run_id} (bench "
              f"{item.bench_id or 'not recorded'}), replaced by run {item.replaced_by}")
    limits = published.graded
    print(f"limits   {limits.limits_path}"
          + (f" (run {limits.limits_run_id})" if limits.limits_run_id else ""))
    print(f"report   {published.path} (signed)")
    return 0
