"""The Flask application of ``benchrun serve``: configuration, sign-in, roles and CSRF.

Every page needs a signed-in user when accounts exist (:class:`WebConfig.users`); without
accounts the application serves only the loopback address and acts as one local user with
every right. Sessions are Flask's signed cookies (HttpOnly, SameSite=Strict, a key drawn
at start-up, so a restart signs everybody out); every POST must carry the session's CSRF
token. Nothing here writes to the store.
"""

from __future__ import annotations

import ipaddress
import secrets
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path
from typing import Any

from flask import Flask, abort, g, redirect, render_template, request, session, url_for
from markupsafe import Markup

from benchrun.analysis.metrics_meta import METRICS
from benchrun.units import format_si
from benchrun.web.auth import (
    LoginLimiter,
    User,
    UserFile,
    new_csrf_token,
    same_token,
)
from benchrun.web.catalog import Catalog
from benchrun.web.data import LotData
from benchrun.web.verifying import Verifier

#: Largest upload accepted on the check page (a signed report and a certificate).
DEFAULT_MAX_UPLOAD = 25 * 1024 * 1024
LOCAL_USER = User("local", "engineer")


@dataclass
class WebConfig:
    """What ``benchrun serve`` was started with."""

    results: str
    users: Path | None = None
    trusted_certs: list[Path] = field(default_factory=list)
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD
    host: str = "127.0.0.1"
    #: A background thread that first computes every part's history (so the first visit
    #: is quick), then verifies every stored report nobody has checked yet.
    verify_in_background: bool = True

    def accounts(self) -> UserFile | None:
        if self.users is None:
            return None
        users = UserFile(self.users)
        return users if users.list() else None


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and ``localhost``."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def create_app(config: WebConfig, catalog: Catalog | None = None) -> Flask:
    """The application over ``config.results`` (opened read-only)."""
    app = Flask(__name__)
    app.config.update(
        SECRET_KEY=secrets.token_bytes(32),
        SESSION_COOKIE_HTTPONLY=True,
        SESSION_COOKIE_SAMESITE="Strict",
        SESSION_COOKIE_NAME="benchrun_session",
        PERMANENT_SESSION_LIFETIME=timedelta(hours=8),
        MAX_CONTENT_LENGTH=config.max_upload_bytes,
        MAX_FORM_MEMORY_SIZE=config.max_upload_bytes,
    )
    catalog = catalog or Catalog(config.results)
    accounts = config.accounts()
    app.extensions["benchrun"] = {
        "config": config, "catalog": catalog, "data": LotData(catalog),
        "accounts": accounts, "limiter": LoginLimiter(),
        "verifier": Verifier(catalog, config.trusted_certs),
    }
    if accounts is None and not is_loopback(config.host):
        raise RuntimeError("refusing to serve a non-loopback address without accounts")

    @app.before_request
    def _guard() -> Any:
        g.user = None
        if accounts is None:
            g.user = LOCAL_USER
        elif "user" in session:
            role = accounts.role_of(session["user"])
            if role is not None and role == session.get("role"):
                g.user = User(session["user"], role)
            else:
                session.clear()
        if request.method == "POST" and not same_token(
                session.get("csrf"), request.form.get("csrf")
                or request.headers.get("X-CSRF-Token")):
            abort(400, "the form's security token is missing or stale: reload the page")
        if g.user is None and request.endpoint not in ("auth.login", "static"):
            return redirect(url_for("auth.login", next=request.full_path
                                    if request.full_path.startswith("/") else "/"))
        return None

    @app.after_request
    def _headers(response: Any) -> Any:
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        response.headers.setdefault("X-Frame-Options", "DENY")
        response.headers.setdefault("Referrer-Policy", "same-origin")
        response.headers.setdefault(
            "Content-Security-Policy",
            "default-src 'self'; img-src 'self' data:; style-src 'self' 'unsafe-inline'; "
            "script-src 'self'; frame-ancestors 'none'; form-action 'self'")
        if request.endpoint != "static":
            response.headers.setdefault("Cache-Control", "no-store")
        return response

    @app.context_processor
    def _context() -> dict[str, Any]:
        if "csrf" not in session:
            session["csrf"] = new_csrf_token()
        token = session["csrf"]
        return {
            "user": g.get("user"),
            "auth_on": accounts is not None,
            "csrf_field": lambda: Markup(
                f'<input type="hidden" name="csrf" value="{token}">'),
            "csrf_token": token,
            "si": lambda value, unit, digits=4: format_si(value, unit, digits),
            "unit_of": lambda key: METRICS[key].unit if key in METRICS else "",
            "short_time": lambda text: (text or "—")[:19].replace("T", " "),
        }

    @app.errorhandler(400)
    @app.errorhandler(403)
    @app.errorhandler(404)
    @app.errorhandler(413)
    @app.errorhandler(429)
    def _error(exc: Any) -> Any:
        code = getattr(exc, "code", 500)
        text = {413: f"the upload is larger than {config.max_upload_bytes // (1024 * 1024)} "
                     "MiB and was refused"}.get(code, getattr(exc, "description", ""))
        return render_template("error.html", code=code, text=text), code

    from benchrun.web.views_auth import bp as auth_bp
    from benchrun.web.views_live import bp as live_bp
    from benchrun.web.views_lots import bp as lots_bp
    from benchrun.web.views_parts import bp as parts_bp

    for bp in (auth_bp, lots_bp, parts_bp, live_bp):
        app.register_blueprint(bp)
    if config.verify_in_background:
        data = app.extensions["benchrun"]["data"]
        verifier = app.extensions["benchrun"]["verifier"]
        verifier.warm = lambda: [data.history(part) for part in data.parts()]
        verifier.start_background()
    return app


def ext(name: str) -> Any:
    """One of the application's shared objects (catalog, data, accounts, limiter...)."""
    from flask import current_app

    return current_app.extensions["benchrun"][name]


def require(permission: str) -> None:
    """Abort with 403 unless the signed-in user has ``permission``."""
    user = g.get("user")
    if user is None or not user.may(permission):
        abort(403, "your role does not allow this page")
