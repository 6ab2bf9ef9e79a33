"""A small signed run for the web tests, and a signed-in test client."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
from report_helpers import SignedRun

from benchrun.web import WebConfig, create_app
from benchrun.web.auth import UserFile

PASSWORD = "correct horse battery"


class WebSite:
    """RESULTS folder ``root`` with one signed run, its certificate in ``keys/``, and an
    accounts file with an auditor and an engineer."""

    def __init__(self, base: Path) -> None:
        self.signed = SignedRun(base / "store", 4, (2,))
        self.root = base / "store"
        self.run_id = self.signed.run_dir.name
        self.cert = self.signed.identity.cert_path
        self.users = base / "web-users.json"
        accounts = UserFile(self.users)
        accounts.add("ada", PASSWORD, "auditor")
        accounts.add("eng", PASSWORD, "engineer")

    def app(self, *, auth: bool = True, **kwargs):
        config = WebConfig(results=str(self.root), users=self.users if auth else None,
                           trusted_certs=[self.cert], verify_in_background=False, **kwargs)
        app = create_app(config)
        app.testing = True
        return app

    def copy(self, dest: Path) -> Path:
        """A private copy of RESULTS (for tampering)."""
        target = dest / "store"
        shutil.copytree(self.root, target)
        return target


@pytest.fixture(scope="session")
def web_site(tmp_path_factory) -> WebSite:
    return WebSite(tmp_path_factory.mktemp("web"))


def csrf_of(client, path: str = "/login") -> str:
    page = client.get(path).get_data(as_text=True)
    match = re.search(r'name="csrf" value="([^"]+)"', page)
    assert match, f"no CSRF field on {path}"
    return match.group(1)


def sign_in(client, name: str, password: str = PASSWORD):
    token = csrf_of(client)
    return client.post("/login", data={"name": name, "password": password, "csrf": token})
