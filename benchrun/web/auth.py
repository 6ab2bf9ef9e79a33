"""Accounts of the web application: a users file, argon2 password hashes, roles, the login
rate limit and CSRF tokens.

The accounts live in a JSON file beside the store (``web-users.json`` in the RESULTS folder
by default, or the file given with ``--users``), written with mode 0600. Passwords are kept
only as argon2id hashes (argon2-cffi's defaults, RFC 9106). Roles: ``auditor`` reads lots,
part histories and reports and runs verifications; ``engineer`` also sees live runs.
"""

from __future__ import annotations

import hmac
import json
import os
import re
import secrets
import threading
import time
from collections import defaultdict, deque
from dataclasses import dataclass
from pathlib import Path

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError

from benchrun.errors import ConfigError

USERS_FILE = "web-users.json"
ROLES = ("auditor", "engineer")
#: What each role may do.
PERMISSIONS = {"auditor": {"read", "verify"}, "engineer": {"read", "verify", "live"}}
USER_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._@-]{0,63}$")
MIN_PASSWORD = 10

_hasher = PasswordHasher()
# a hash to verify against for unknown names, so they take as long as known ones
_DUMMY = _hasher.hash(secrets.token_hex(16))


@dataclass(frozen=True)
class User:
    name: str
    role: str

    def may(self, permission: str) -> bool:
        return permission in PERMISSIONS.get(self.role, set())


def default_users_path(results: str) -> Path | None:
    """``web-users.json`` in the RESULTS folder (its parent for a SQLite file); ``None``
    for a database URL (then ``--users`` names the file)."""
    if "://" in results:
        return None
    path = Path(results)
    folder = path if path.is_dir() else path.parent
    return folder / USERS_FILE


class UserFile:
    """The accounts file."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)

    def _read(self) -> dict[str, dict[str, str]]:
        if not self.path.is_file():
            return {}
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ConfigError(f"cannot read the users file {self.path}: {exc}") from exc
        users = data.get("users") if isinstance(data, dict) else None
        if not isinstance(users, dict):
            raise ConfigError(f"{self.path} is not a benchrun users file")
        return users

    def _write(self, users: dict[str, dict[str, str]]) -> None:
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")
        text = json.dumps({"users": users}, indent=2, sort_keys=True) + "\n"
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.path)

    def list(self) -> list[User]:
        return [User(name, entry.get("role", "")) for name, entry in sorted(self._read().items())]

    def add(self, name: str, password: str, role: str, *, replace: bool = False) -> User:
        if not USER_NAME.match(name):
            raise ConfigError(f"user name {name!r}: letters, digits and . _ @ - only "
                              "(at most 64)")
        if role not in ROLES:
            raise ConfigError(f"role {role!r}: choose one of {', '.join(ROLES)}")
        if len(password) < MIN_PASSWORD:
            raise ConfigError(f"the password needs at least {MIN_PASSWORD} characters")
        users = self._read()
        if name in users and not replace:
            raise ConfigError(f"user {name!r} exists (--replace sets a new password and role)")
        users[name] = {"role": role, "hash": _hasher.hash(password)}
        self._write(users)
        return User(name, role)

    def remove(self, name: str) -> bool:
        users = self._read()
        if name not in users:
            return False
        del users[name]
        self._write(users)
        return True

    def check(self, name: str, password: str) -> User | None:
        """The user when ``password`` is theirs, else ``None`` (same work either way)."""
        entry = self._read().get(name)
        try:
            _hasher.verify(entry["hash"] if entry else _DUMMY, password)
        except (VerifyMismatchError, VerificationError, InvalidHashError):
            return None
        if entry is None or entry.get("role") not in ROLES:
            return None
        return User(name, entry["role"])

    def role_of(self, name: str) -> str | None:
        """The current role of ``name`` (a removed user has none: their session ends)."""
        entry = self._read().get(name)
        return None if entry is None else entry.get("role")


class LoginLimiter:
    """At most ``attempts`` failed logins per client address and per user name in
    ``window_s`` seconds; further attempts are refused until the window has passed."""

    def __init__(self, attempts: int = 5, window_s: float = 300.0) -> None:
        self.attempts = attempts
        self.window_s = window_s
        self._failures: dict[str, deque[float]] = defaultdict(deque)
        self._lock = threading.Lock()

    def _recent(self, key: str, now: float) -> deque[float]:
        times = self._failures[key]
        while times and now - times[0] > self.window_s:
            times.popleft()
        return times

    def blocked(self, address: str, name: str) -> bool:
        now = time.monotonic()
        with self._lock:
            return any(len(self._recent(k, now)) >= self.attempts
                       for k in (f"a:{address}", f"u:{name}"))

    def failed(self, address: str, name: str) -> None:
        now = time.monotonic()
        with self._lock:
            for key in (f"a:{address}", f"u:{name}"):
                self._recent(key, now).append(now)


def new_csrf_token() -> str:
    return secrets.token_urlsafe(32)


def same_token(a: str | None, b: str | None) -> bool:
    return bool(a) and bool(b) and hmac.compare_digest(str(a), str(b))
