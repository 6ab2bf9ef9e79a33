"""``benchrun verify REPORT.pdf [--cert CERT] [--data RUN_DIR] [--json]``: audit a report.

Checks, each answered yes or no with a reason: the signature is intact and covers the whole
file; the signer is trusted (chains to the certificate given with --cert); the SHA-256
manifest matches the stored raw record, configuration files and database rows; re-analysis of
the stored raw waveforms reproduces every metric, grade and the disposition in the report;
the results store's row of the report matches the signed file. The signer certificate's
SHA-256 fingerprint is printed in full.
The exit code is 0 only when every check holds, 1 otherwise.

A lot report (``benchrun report RESULTS --lot LOT``) names every run of the lot: each is looked
up in the results store the report names (or --store URL), and its run folder is the one the
store records, else one found under a folder given with --runs DIR (repeatable; the folder
itself, DIR/<run id>, or up to three levels down). The output lists which runs were checked
and which could not be found; a run not found is a failed check.

A characterisation report (``benchrun demo --characterize``) is checked for signature, trust,
manifest hashes, re-analysis of every shot it rests on and its qualification verdicts graded
again; the reports-table check does not apply to it and is printed as n/a with the reason.
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
    parser.add_argument("--runs", action="append", default=[], type=path_arg, metavar="DIR",
                        help="folder holding run folders that are not where the store "
                             "records them (a lot report's runs; repeat for several)")
    parser.add_argument("--store", metavar="URL", default=None,
                        help="lot report: the results store holding its runs (default: the "
                             "one the report names)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    parser.add_argument("--details", action="store_true", help="list every hash and finding")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from benchrun.report.verify import verify_report

    result = verify_report(args.report, cert=args.cert, data=args.data, store=args.store,
                           runs=tuple(args.runs))
    if args.json:
        print(json.dumps(result.to_dict(), indent=2, ensure_ascii=False))
    else:
        print(f"Report {result.report}" + (f" ({result.report_id})" if result.report_id else ""))
        runs = result.facts.get("runs") or []
        if result.facts.get("kind") == "lot":
            print(f"  Runs of lot {result.facts.get('lot')}: {len(runs)}")
            for item in runs:
                state = "checked  " if item["found"] else "NOT FOUND"
                print(f"    {state} {item['line']}")
        for check in result.checks:
            mark = "n/a" if not check.applicable else "yes" if check.ok else "NO "
            print(f"  {mark}  {check.name}: {check.reason}")
            if args.details or not check.ok:
                for line in check.details[: None if args.details else 10]:
                    print(f"         {line}")
        for fingerprint in result.facts.get("signer_certificate_sha256", []):
            print(f"  signer certificate SHA-256: {fingerprint}")
        every = ("every applicable check" if any(not c.applicable for c in result.checks)
                 else "every check")
        print(f"VERIFIED: {every} holds." if result.ok else "NOT VERIFIED.")
    return 0 if result.ok else 1
