"""``benchrun reports list RESULTS`` / ``benchrun reports show RESULTS ID``: issued reports.

RESULTS is a run folder or a results database URL. Lists the signed reports registered in the
results store (identifier, run, disposition, signer, file and its SHA-256), for the auditor.
Every row is checked against the signed file it names (its SHA-256 and the disposition,
reasons, counts and signer embedded in it); a row that differs is marked ALTERED and the exit
code is 1.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from benchrun.errors import StoreError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "reports", help="list or show the signed reports in a results store",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    sub = parser.add_subparsers(dest="reports_command", metavar="ACTION")
    listing = sub.add_parser("list", help="every registered report")
    listing.add_argument("results", metavar="RESULTS", help="run folder or database URL")
    listing.add_argument("--run-id", metavar="ID", help="only reports of this run")
    listing.add_argument("--json", action="store_true")
    listing.set_defaults(func=run_list)
    show = sub.add_parser("show", help="one report in full")
    show.add_argument("results", metavar="RESULTS", help="run folder or database URL")
    show.add_argument("report_id", metavar="ID")
    show.add_argument("--json", action="store_true")
    show.set_defaults(func=run_show)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def _url(source: str) -> str:
    if "://" in source:
        return source
    path = Path(source)
    if path.is_dir():
        from benchrun.store.rundata import read_manifest, store_url_for

        return store_url_for(path, read_manifest(path))
    if path.is_file():
        return f"sqlite:///{path.resolve()}"
    raise StoreError(f"{source} is neither a run folder nor a results database")


def _as_dict(record: Any) -> dict[str, Any]:
    from dataclasses import asdict

    return asdict(record)


def _folders(source: str) -> tuple[Path, ...]:
    """Where a moved run folder's report may be: the folder given on the command line."""
    path = Path(source)
    return (path,) if "://" not in source and path.is_dir() else ()


def _checked(record: Any, source: str) -> list[str]:
    """Disagreements between a reports-table row and the signed file it names."""
    from benchrun.report.registry import read_registered_file, registration_problems

    return registration_problems(record, read_registered_file(record, *_folders(source)))


def run_list(args: argparse.Namespace) -> int:
    from benchrun.report.registry import list_reports

    records = list_reports(_url(args.results), args.run_id)
    checked = [(r, _checked(r, args.results)) for r in records]
    if args.json:
        print(json.dumps([{**_as_dict(r), "row_matches_signed_report": not problems,
                           "row_problems": problems} for r, problems in checked],
                         indent=2, ensure_ascii=False))
        return 0 if all(not p for _, p in checked) else 1
    if not records:
        print("no reports registered")
        return 0
    print(f"{'report':44} {'run':22} {'disposition':11} {'issued':24} {'row':8} signer")
    for r, problems in checked:
        state = "matches" if not problems else "ALTERED"
        print(f"{r.report_id:44} {r.run_id:22} {r.disposition:11} {r.created:24} {state:8} "
              f"{r.signer}")
        for problem in problems:
            print(f"    row differs from the signed report: {problem}")
    if any(problems for _, problems in checked):
        print("Some rows do not match the signed reports they name; trust the signed files "
              "('benchrun verify REPORT.pdf').")
        return 1
    return 0


def run_show(args: argparse.Namespace) -> int:
    from benchrun.report.registry import get_report

    record = get_report(_url(args.results), args.report_id)
    if record is None:
        raise StoreError(f"no report {args.report_id!r} in {args.results}")
    data = _as_dict(record)
    problems = _checked(record, args.results)
    if args.json:
        print(json.dumps({**data, "row_matches_signed_report": not problems,
                          "row_problems": problems}, indent=2, ensure_ascii=False))
        return 0 if not problems else 1
    for key in ("report_id", "run_id", "disposition", "created", "signer", "path", "sha256"):
        print(f"{key:12} {data[key]}")
    details = data.get("details") or {}
    for reason in details.get("reasons", []):
        print(f"{'reason':12} {reason}")
    for item in details.get("manifest", []):
        print(f"{'manifest':12} {item.get('name')}: {item.get('sha256')}")
    if details.get("signer_certificate_sha256"):
        print(f"{'certificate':12} SHA-256 {details['signer_certificate_sha256']}")
    if problems:
        for problem in problems:
            print(f"{'ALTERED':12} row differs from the signed report: {problem}")
        return 1
    print(f"{'row':12} matches the signed report (file SHA-256 and embedded data)")
    return 0
