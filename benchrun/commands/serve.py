"""``benchrun serve RESULTS [--host H] [--port P]``: the lot ledger in a web browser.

RESULTS is a run folder, a folder of run folders (``benchrun demo --out DIR`` makes one), a
SQLite results file or a database URL. The pages read the store and never change it. The
server answers on 127.0.0.1 unless --host says otherwise; on any other address it refuses to
start without accounts (``benchrun users add``). Certificates to trust when verifying reports
are given with --trust (default: every ``*.cert.pem`` in the ``keys`` folder of RESULTS).
"""

from __future__ import annotations

import argparse
import logging
from pathlib import Path
from typing import Any

from benchrun.errors import ConfigError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "serve", help="browse lots, waveforms, part history and live runs in a web browser",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    parser.add_argument("results", metavar="RESULTS",
                        help="run folder, folder of runs, SQLite file or database URL")
    parser.add_argument("--host", default="127.0.0.1",
                        help="address to listen on (default 127.0.0.1: this machine only)")
    parser.add_argument("--port", type=int, default=8600, help="port (default 8600)")
    parser.add_argument("--users", metavar="FILE",
                        help="accounts file (default: web-users.json in the RESULTS folder)")
    parser.add_argument("--trust", metavar="CERT", action="append", default=[],
                        help="certificate trusted when verifying reports (repeatable)")
    parser.add_argument("--max-upload-mib", type=int, default=25,
                        help="largest upload on the check page, MiB (default 25)")
    parser.set_defaults(func=run)


def trusted_certificates(results: str, given: list[str]) -> list[Path]:
    """The --trust files, or every ``*.cert.pem`` in ``<RESULTS>/keys``."""
    if given:
        paths = [Path(p) for p in given]
        for path in paths:
            if not path.is_file():
                raise ConfigError(f"certificate {path} does not exist")
        return paths
    if "://" in results:
        return []
    keys = Path(results) / "keys"
    return sorted(keys.glob("*.cert.pem")) if keys.is_dir() else []


def run(args: argparse.Namespace) -> int:
    from benchrun.web.app import WebConfig, create_app, is_loopback
    from benchrun.web.auth import UserFile, default_users_path
    from benchrun.web.catalog import Catalog

    users = Path(args.users) if args.users else default_users_path(args.results)
    has_accounts = users is not None and bool(UserFile(users).list())
    if not has_accounts and not is_loopback(args.host):
        raise ConfigError(
            f"refusing to serve {args.host} without accounts: add one with 'benchrun users add "
            f"{args.results} NAME --role auditor' (or serve 127.0.0.1 only)")
    if not 0 < args.port < 65536:
        raise ConfigError(f"--port {args.port}: choose 1 to 65535")
    certs = trusted_certificates(args.results, args.trust)
    catalog = Catalog(args.results)
    config = WebConfig(results=args.results, users=users if has_accounts else None,
                       trusted_certs=certs, max_upload_bytes=args.max_upload_mib * 1024 * 1024,
                       host=args.host)
    app = create_app(config, catalog)
    print(f"benchrun lot ledger on http://{args.host}:{args.port}/  (Ctrl-C stops it)")
    print(f"  store(s): {', '.join(s.public_url for s in catalog.stores)}  (read-only)")
    print(f"  accounts: {users} " if has_accounts else
          "  accounts: none (no sign-in; this machine only)")
    print("  trusted certificates: " + (", ".join(str(c) for c in certs) or
                                        "none (the trust check of a verification fails)"))
    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    from werkzeug.serving import run_simple

    run_simple(args.host, args.port, app, threaded=True, use_reloader=False,
               use_debugger=False)
    return 0
