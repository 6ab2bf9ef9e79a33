"""``benchrun keys new --name NAME --out DIR [--role ROLE] [--org ORG]``: a signing identity.

Makes an ECDSA P-256 private key, encrypted with a passphrase (read from --passphrase-file,
else the environment variable BENCHRUN_KEY_PASSPHRASE, else asked on the terminal), and a
self-signed certificate naming the signer. Give the certificate to whoever verifies reports
(``benchrun verify --cert``); keep the key file private. An organisation's PKCS#12 file can
be used for signing instead.
"""

from __future__ import annotations

import argparse
from typing import Any

from benchrun.commands.report import add_passphrase_argument, path_arg
from benchrun.report.keys import PASSPHRASE_ENV, new_identity, passphrase_from_env_or_prompt


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "keys", help="make a signing key and certificate for reports",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    sub = parser.add_subparsers(dest="keys_command", metavar="ACTION")
    new = sub.add_parser("new", help="make an encrypted ECDSA P-256 key and a certificate")
    new.add_argument("--name", required=True, help="signer's name, e.g. 'Q. Ashdown'")
    new.add_argument("--role", default="", help="signer's role, e.g. 'Quality Engineer'")
    new.add_argument("--org", default="", help="organisation named in the certificate")
    new.add_argument("--out", required=True, type=path_arg, metavar="DIR",
                     help="folder for key and cert")
    add_passphrase_argument(new)
    new.add_argument("--days", type=int, default=3 * 365, help="certificate validity in days")
    new.add_argument("--force", action="store_true", help="replace existing files")
    new.set_defaults(func=run_new)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def run_new(args: argparse.Namespace) -> int:
    passphrase = passphrase_from_env_or_prompt("New key passphrase: ", confirm=True,
                                               passphrase_file=args.passphrase_file)
    files = new_identity(args.name, args.out, passphrase, role=args.role,
                         organisation=args.org, valid_days=args.days, overwrite=args.force)
    print(f"private key (encrypted): {files.key_path}")
    print(f"certificate:             {files.cert_path}")
    print(f"certificate SHA-256:     {files.fingerprint_sha256}")
    print(f"Keep the key private. Give the certificate to verifiers; the passphrase can be "
          f"supplied unattended through {PASSPHRASE_ENV} or --passphrase-file.")
    return 0
