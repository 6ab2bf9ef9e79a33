"""``benchrun verify REPORT.pdf [--cert CERT] [--data RUN_DIR] [--json]``: audit a report.

Checks, each answered yes or no with a reason: the signature is intact and covers the whole
file; the signer is trusted (chains to the certificate given with --cert); the SHA-256
manifest matches the stored raw record, configuration files and database rows; re-analysis of
the stored raw waveforms reproduces every metric, grade and the disposition in the report;
the results store's row of the report matches the signed file. The signer certificate's
SHA-256 fingerprint is printed in full.
The exit code is 0 only when every check holds, 1 otherwise.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

from benchrun.commands.report import path_arg


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "verify", help="verify a signed report against its stored data",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    parser.add_argument("report", metavar="REPORT.pdf", help="the signed report")
    parser.add_argument("--cert", metavar="CERT", type=path_arg,
                        help="the signer's certificate to trust")
    parser.add_argument("--data", metavar="RUN_DIR", type=path_arg,
                        help="run folder with the raw record (default: the report's folder)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    parser.add_argument("--details", action="store_true", help="list every hash and finding")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from benchrun.report.verify import verify_report

    result = verify_report(args.report, cert=args.cert, data=args.data)
    if args.json:
        print(json.dumps(result.to_dict(), indent=2, ensure_ascii=False))
    else:
        print(f"Report {result.report}" + (f" ({result.report_id})" if result.report_id else ""))
        for check in result.checks:
            print(f"  {'yes' if check.ok else 'NO '}  {check.name}: {check.reason}")
            if args.details or not check.ok:
                for line in check.details[: None if args.details else 10]:
                    print(f"         {line}")
        for fingerprint in result.facts.get("signer_certificate_sha256", []):
            print(f"  signer certificate SHA-256: {fingerprint}")
        print("VERIFIED: every check holds." if result.ok else "NOT VERIFIED.")
    return 0 if result.ok else 1
