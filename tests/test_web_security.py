"""Security of ``benchrun serve``: sign-in, roles, CSRF, path traversal, upload size, and
refusing a public address without accounts."""

from __future__ import annotations

import io
import sqlite3

import pytest
from web_helpers import PASSWORD, csrf_of, sign_in, web_site  # noqa: F401 - fixture

from benchrun.cli import main
from benchrun.web import WebConfig, create_app


def _urls(run_id: str) -> list[str]:
    return [
        "/", f"/lots/{run_id}", f"/lots/{run_id}/shots/1", f"/lots/{run_id}/shots/1.png",
        f"/lots/{run_id}/report.pdf", "/parts", "/parts/DX-4417",
        "/parts/DX-4417/irrm_A/25C/mean.png", "/check", "/live", "/live/X",
        "/live/X/state.json", "/live/X/last.png", "/static/ledger.css",
    ]


def test_no_page_without_sign_in(web_site):  # noqa: F811
    client = web_site.app().test_client()
    for url in _urls(web_site.run_id):
        response = client.get(url)
        response.close()
        if url.startswith("/static/"):
            assert response.status_code == 200  # the stylesheet holds no data
            continue
        assert response.status_code == 302, url
        assert "/login" in response.headers["Location"], url
        # nothing from the store (the lot name and the signer appear in no URL)
        assert b"LT-0117" not in response.data and b"Ashdown" not in response.data
    for url in (f"/lots/{web_site.run_id}/verify", "/check"):
        assert client.post(url, data={}).status_code in (302, 400)


def test_sign_in_cookie_is_signed_httponly_samesite(web_site):  # noqa: F811
    client = web_site.app().test_client()
    response = sign_in(client, "ada")
    assert response.status_code == 302
    cookie = response.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Strict" in cookie
    assert client.get("/").status_code == 200
    # a forged cookie (another key) is not a session
    other = web_site.app().test_client()
    other.set_cookie("benchrun_session", cookie.split(";")[0].split("=", 1)[1])
    assert other.get("/").status_code == 302


def test_wrong_password_and_rate_limit(web_site):  # noqa: F811
    client = web_site.app().test_client()
    for _ in range(5):
        assert sign_in(client, "eng", "not the password").status_code == 401
    # the sixth attempt is refused even with the right password
    assert sign_in(client, "eng", PASSWORD).status_code == 429
    assert client.get("/").status_code == 302


def test_wrong_role_refused(web_site):  # noqa: F811
    app = web_site.app()
    auditor = app.test_client()
    sign_in(auditor, "ada")
    assert auditor.get("/live").status_code == 403
    assert auditor.get("/live/X/state.json").status_code == 403
    assert auditor.get(f"/lots/{web_site.run_id}").status_code == 200
    engineer = app.test_client()
    sign_in(engineer, "eng")
    assert engineer.get("/live").status_code == 200


def test_csrf_refused(web_site):  # noqa: F811
    client = web_site.app().test_client()
    # a login form posted without the token of its page
    assert client.post("/login", data={"name": "ada", "password": PASSWORD}).status_code == 400
    sign_in(client, "ada")
    url = f"/lots/{web_site.run_id}/verify"
    assert client.post(url, data={}).status_code == 400
    assert client.post(url, data={"csrf": "forged"}).status_code == 400
    assert client.post("/logout", data={}).status_code == 400
    pdf = {"report": (io.BytesIO(b"%PDF-1.7\n"), "r.pdf")}
    assert client.post("/check", data=pdf, content_type="multipart/form-data").status_code == 400


@pytest.mark.parametrize("url", [
    "/lots/..%2F..%2F..%2Fetc%2Fpasswd", "/lots/../../etc/passwd", "/lots/%2Fetc%2Fpasswd",
    "/lots/{run}/shots/..%2F..%2Fraw.h5", "/lots/{run}/shots/-1.png",
    "/lots/..%2F{run}/report.pdf", "/parts/..%2F..%2Fetc", "/parts/.%2E",
    "/parts/DX-4417/..%2F..%2Fetc/25C/mean.png", "/parts/DX-4417/irrm_A/..%2F/mean.png",
    "/parts/DX-4417/irrm_A/25C/..%2Fmean.png", "/live/..%2F..%2Fetc%2Fpasswd",
    "/live/..%2Fx/state.json", "/live/..%2Fx/last.png", "/static/..%2F..%2Fcli.py",
    "/static/../../../../etc/passwd",
])
def test_path_traversal_refused(web_site, url):  # noqa: F811
    client = web_site.app().test_client()
    sign_in(client, "eng")
    response = client.get(url.format(run=web_site.run_id))
    response.close()
    assert response.status_code in (404, 308), url
    assert b"root:" not in response.data and b"def main" not in response.data


def test_report_path_outside_results_refused(web_site, tmp_path):  # noqa: F811
    root = web_site.copy(tmp_path)
    outside = tmp_path / "secret.pdf"
    outside.write_bytes(b"%PDF-1.7 not yours")
    db = root / web_site.run_id / "results.db"
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE reports SET path = ?", (str(outside),))
    app = create_app(WebConfig(results=str(root), users=web_site.users,
                               verify_in_background=False))
    client = app.test_client()
    sign_in(client, "ada")
    response = client.get(f"/lots/{web_site.run_id}/report.pdf")
    # the run folder's own report.pdf stands in; the file outside is never served
    assert b"not yours" not in response.data
    assert response.data == (root / web_site.run_id / "report.pdf").read_bytes()
    response.close()
    (root / web_site.run_id / "report.pdf").unlink()
    response = client.get(f"/lots/{web_site.run_id}/report.pdf")
    response.close()
    assert response.status_code == 404


def test_oversized_upload_refused(web_site):  # noqa: F811
    client = web_site.app(max_upload_bytes=4096).test_client()
    sign_in(client, "ada")
    token = csrf_of(client, "/check")
    big = {"csrf": token, "report": (io.BytesIO(b"%PDF-" + b"0" * 10000), "big.pdf")}
    response = client.post("/check", data=big, content_type="multipart/form-data")
    assert response.status_code == 413
    assert b"larger than" in response.data


def test_public_address_needs_accounts(web_site, capsys):  # noqa: F811
    with pytest.raises(RuntimeError):
        create_app(WebConfig(results=str(web_site.root), host="0.0.0.0",
                             verify_in_background=False))
    code = main(["serve", str(web_site.root), "--host", "0.0.0.0", "--users",
                 str(web_site.root / "none.json")])
    assert code == 2
    assert "refusing to serve 0.0.0.0 without accounts" in capsys.readouterr().err


def test_local_use_without_accounts(web_site):  # noqa: F811
    client = web_site.app(auth=False).test_client()
    assert client.get("/").status_code == 200
    assert client.get("/live").status_code == 200


def test_store_opened_read_only(web_site):  # noqa: F811
    app = web_site.app()
    store = app.extensions["benchrun"]["catalog"].stores[0]
    from sqlalchemy import text
    from sqlalchemy.exc import OperationalError

    with pytest.raises(OperationalError), store.engine.begin() as conn:
        conn.execute(text("DELETE FROM runs"))
