"""Sign-in and sign-out."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, abort, redirect, render_template, request, session, url_for

from benchrun.web.app import ext
from benchrun.web.auth import new_csrf_token

bp = Blueprint("auth", __name__)


def _safe_next(target: str | None) -> str:
    """Only a path on this site (no scheme, no host, no backslash) is followed after login."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return url_for("lots.lots")
    return target


@bp.route("/login", methods=["GET", "POST"])
def login() -> Any:
    accounts = ext("accounts")
    if accounts is None:
        return redirect(url_for("lots.lots"))
    error = None
    if request.method == "POST":
        name = request.form.get("name", "")[:64]
        password = request.form.get("password", "")[:1024]
        address = request.remote_addr or "?"
        limiter = ext("limiter")
        if limiter.blocked(address, name):
            abort(429, "too many failed sign-ins: wait five minutes and try again")
        user = accounts.check(name, password)
        if user is None:
            limiter.failed(address, name)
            error = "wrong name or password"
        else:
            session.clear()
            session.permanent = True
            session["user"], session["role"] = user.name, user.role
            session["csrf"] = new_csrf_token()
            return redirect(_safe_next(request.args.get("next")))
    return render_template("login.html", error=error), (401 if error else 200)


@bp.route("/logout", methods=["POST"])
def logout() -> Any:
    session.clear()
    return redirect(url_for("auth.login"))
