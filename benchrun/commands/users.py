"""``benchrun users add|remove|list RESULTS``: accounts of ``benchrun serve``.

Accounts are kept in ``web-users.json`` in the RESULTS folder (or the file given with
--users; needed when RESULTS is a database URL), mode 0600, passwords as argon2id hashes.
Roles: auditor (lots, part history, reports, verification) and engineer (also live runs).
The password is asked for twice on the terminal, or read from standard input with
--password-stdin.
"""

from __future__ import annotations

import argparse
import getpass
import sys
from pathlib import Path
from typing import Any

from benchrun.errors import ConfigError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "users", help="add, remove or list the accounts of 'benchrun serve'",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
    )
    sub = parser.add_subparsers(dest="users_command", metavar="ACTION")
    for name, helptext in (("add", "add an account (or --replace one)"),
                           ("remove", "remove an account"), ("list", "list the accounts")):
        p = sub.add_parser(name, help=helptext)
        p.add_argument("results", metavar="RESULTS", help="the folder or URL given to serve")
        if name != "list":
            p.add_argument("name", metavar="NAME")
        p.add_argument("--users", metavar="FILE", help="accounts file")
        if name == "add":
            p.add_argument("--role", choices=("auditor", "engineer"), required=True)
            p.add_argument("--replace", action="store_true",
                           help="set a new password and role for an existing account")
            p.add_argument("--password-stdin", action="store_true",
                           help="read the password from the first line of standard input")
        p.set_defaults(func={"add": run_add, "remove": run_remove, "list": run_list}[name])
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def _file(args: argparse.Namespace) -> Any:
    from benchrun.web.auth import UserFile, default_users_path

    path = Path(args.users) if args.users else default_users_path(args.results)
    if path is None:
        raise ConfigError("RESULTS is a database URL: name the accounts file with --users")
    if not path.parent.is_dir():
        raise ConfigError(f"folder {path.parent} does not exist")
    return UserFile(path)


def run_add(args: argparse.Namespace) -> int:
    users = _file(args)
    if args.password_stdin:
        password = sys.stdin.readline().rstrip("\n")
    else:
        password = getpass.getpass(f"password for {args.name}: ")
        if getpass.getpass("again: ") != password:
            raise ConfigError("the two passwords differ")
    user = users.add(args.name, password, args.role, replace=args.replace)
    print(f"{user.name} ({user.role}) saved in {users.path}")
    return 0


def run_remove(args: argparse.Namespace) -> int:
    users = _file(args)
    if not users.remove(args.name):
        raise ConfigError(f"no user {args.name!r} in {users.path}")
    print(f"{args.name} removed from {users.path}")
    return 0


def run_list(args: argparse.Namespace) -> int:
    users = _file(args)
    accounts = users.list()
    if not accounts:
        print(f"no accounts in {users.path}")
    for user in accounts:
        print(f"{user.name:32} {user.role}")
    return 0
