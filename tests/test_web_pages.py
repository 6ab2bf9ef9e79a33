"""Pages of ``benchrun serve`` over a signed run: lots, lot, waveform, verification (passes,
and fails on one flipped byte), checking an upload, part history, live runs, accounts."""

from __future__ import annotations

import io
import json
import logging

import numpy as np
import pytest
from sqlalchemy import create_engine
from web_helpers import PASSWORD, csrf_of, sign_in, web_site  # noqa: F401 - fixture

from benchrun.cli import main
from benchrun.store.live import LiveLogHandler, LivePublisher, thin_waveform
from benchrun.store.schema import metadata
from benchrun.web import WebConfig, create_app
from benchrun.web.auth import UserFile


def _client(app, name="eng"):
    client = app.test_client()
    sign_in(client, name)
    return client


def test_lots_and_lot_pages(web_site):  # noqa: F811
    client = _client(web_site.app())
    page = client.get("/").get_data(as_text=True)
    assert "LT-0117" in page and "DX-4417" in page and "reject" in page
    assert "Q. Ashdown" in page
    assert client.get("/?part=DX-9999").get_data(as_text=True).count("lotlink") == 0
    assert client.get("/?disposition=reject").get_data(as_text=True).count("lotlink") == 1
    assert client.get("/?from=2030-01-01").get_data(as_text=True).count("lotlink") == 0
    lot = client.get(f"/lots/{web_site.run_id}").get_data(as_text=True)
    # four devices, device 3 made non-conforming by report_helpers.build_run
    assert lot.count("LT-0117-00") >= 4
    assert "non-conforming" in lot and "conforming" in lot
    assert "Distributions" in lot and "Conditions" in lot


def test_waveform_png_from_raw_record(web_site):  # noqa: F811
    client = _client(web_site.app())
    lot = client.get(f"/lots/{web_site.run_id}").get_data(as_text=True)
    assert f"/lots/{web_site.run_id}/shots/1" in lot
    page = client.get(f"/lots/{web_site.run_id}/shots/1").get_data(as_text=True)
    assert "irrm_A" in page
    png = client.get(f"/lots/{web_site.run_id}/shots/1.png")
    assert png.status_code == 200 and png.data.startswith(b"\x89PNG")


def test_report_download_and_verify_passes(web_site):  # noqa: F811
    client = _client(web_site.app(), "ada")
    pdf = client.get(f"/lots/{web_site.run_id}/report.pdf")
    assert pdf.data == web_site.signed.pdf.read_bytes()
    pdf.close()
    token = csrf_of(client, f"/lots/{web_site.run_id}")
    page = client.post(f"/lots/{web_site.run_id}/verify", data={"csrf": token})
    text = page.get_data(as_text=True)
    assert "VERIFIED: every check holds." in text, text
    for name in ("signature intact", "signer trusted", "manifest hashes match",
                 "re-analysis reproduces the report"):
        assert name in text
    # the lots page now knows the report verifies
    assert "verifies" in client.get("/").get_data(as_text=True)


def test_flipped_byte_in_stored_report_fails(web_site, tmp_path):  # noqa: F811
    root = web_site.copy(tmp_path)
    pdf = root / web_site.run_id / "report.pdf"
    data = bytearray(pdf.read_bytes())
    data[len(data) // 3] ^= 0x01
    pdf.write_bytes(bytes(data))
    app = create_app(WebConfig(results=str(root), users=web_site.users,
                               trusted_certs=[web_site.cert], verify_in_background=False))
    client = _client(app, "ada")
    token = csrf_of(client, f"/lots/{web_site.run_id}")
    text = client.post(f"/lots/{web_site.run_id}/verify",
                       data={"csrf": token}).get_data(as_text=True)
    assert "NOT VERIFIED." in text
    assert '<li class="bad"><span class="mark">no</span> <strong>signature intact' in text
    assert "fails" in client.get("/").get_data(as_text=True)


def test_check_upload_good_and_tampered(web_site):  # noqa: F811
    client = _client(web_site.app(), "ada")
    good = web_site.signed.pdf.read_bytes()
    cert = web_site.cert.read_bytes()

    def check(pdf: bytes) -> str:
        token = csrf_of(client, "/check")
        return client.post("/check", data={
            "csrf": token, "report": (io.BytesIO(pdf), "supplier.pdf"),
            "certificate": (io.BytesIO(cert), "signer.pem")},
            content_type="multipart/form-data").get_data(as_text=True)

    assert "VERIFIED: every check holds." in check(good)
    bad = bytearray(good)
    bad[len(bad) // 2] ^= 0x20
    text = check(bytes(bad))
    assert "NOT VERIFIED." in text
    assert '<li class="bad"><span class="mark">no</span> <strong>signature intact' in text
    token = csrf_of(client, "/check")
    refused = client.post("/check", data={"csrf": token,
                                          "report": (io.BytesIO(b"hello"), "x.pdf")},
                          content_type="multipart/form-data")
    assert refused.status_code == 400 and b"not a PDF" in refused.data


def test_part_history(web_site):  # noqa: F811
    client = _client(web_site.app(), "ada")
    page = client.get("/parts/DX-4417").get_data(as_text=True)
    assert "Nelson" in page and "ISO 7870-2" in page and "provisional" in page
    assert "irrm_A" in page or "Irrm" in page
    png = client.get("/parts/DX-4417/irrm_A/25C/mean.png")
    assert png.status_code == 200 and png.data.startswith(b"\x89PNG")


def test_live_run_published_through_the_store(web_site, tmp_path):  # noqa: F811
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    engine = create_engine(url)
    metadata.create_all(engine)
    live = LivePublisher(engine, "RUN-LIVE-1", part="DX-4417", lot="LT-0124",
                         bench="bench A", total=10, done=0, min_interval_s=0.0)
    live.shooting("SN0124-003", 398.15, "nominal #1")
    live.advance(4)
    t = np.linspace(0, 1e-6, 5000)
    live.shot("SN0124-003", "nominal @ 125 degC", False, ["clipped_diode_current"], t,
              600 * np.ones_like(t), np.sin(t * 1e7), {"t0_s": 2e-7, "irrm_A": 1.0})
    handler = LiveLogHandler(live)
    log = logging.getLogger("benchrun.test-live")
    log.addHandler(handler)
    log.setLevel(logging.INFO)  # as open_run_log sets it for a run
    try:
        log.warning("SN0124-003 nominal repeat 0 attempt 0 invalid: clipped_diode_current")
        log.info("safe state: pulse output off, supply off, bus at 12 V after 2 s")
    finally:
        log.removeHandler(handler)
    engine.dispose()
    app = create_app(WebConfig(results=url, users=web_site.users, verify_in_background=False))
    client = _client(app, "eng")
    assert "RUN-LIVE-1" in client.get("/live").get_data(as_text=True)
    state = json.loads(client.get("/live/RUN-LIVE-1/state.json").data)
    assert state["done"] == 4 and state["total"] == 10 and state["serial"] == "SN0124-003"
    assert abs(state["temperature_C"] - 125.0) < 1e-9
    assert state["eta_s"] is not None and state["last"]["valid"] is False
    kinds = [e["kind"] for e in state["events"]]
    assert kinds == ["invalid shot", "safe state"]
    later = json.loads(client.get(
        f"/live/RUN-LIVE-1/state.json?after={state['events'][-1]['id']}").data)
    assert later["events"] == []
    assert client.get("/live/RUN-LIVE-1/last.png").data.startswith(b"\x89PNG")


def test_thin_waveform_keeps_the_peak():
    t = np.arange(100000) * 1e-10
    i = np.zeros_like(t)
    i[54321] = -42.0
    tt, ii = thin_waveform(t, i, points=1000)
    assert len(tt) <= 1000 and min(ii) == -42.0
    assert list(tt) == sorted(tt)


def test_users_command(tmp_path, monkeypatch, capsys):
    folder = tmp_path / "results"
    folder.mkdir()
    monkeypatch.setattr("sys.stdin", io.StringIO(PASSWORD + "\n"))
    assert main(["users", "add", str(folder), "kim", "--role", "auditor",
                 "--password-stdin"]) == 0
    users_file = folder / "web-users.json"
    assert oct(users_file.stat().st_mode & 0o777) == "0o600"
    assert PASSWORD not in users_file.read_text()
    assert "$argon2id$" in users_file.read_text()
    assert UserFile(users_file).check("kim", PASSWORD).role == "auditor"
    assert UserFile(users_file).check("kim", "wrong password!") is None
    main(["users", "list", str(folder)])
    assert "kim" in capsys.readouterr().out
    monkeypatch.setattr("sys.stdin", io.StringIO("short\n"))
    assert main(["users", "add", str(folder), "lee", "--role", "engineer",
                 "--password-stdin"]) == 2
    assert main(["users", "remove", str(folder), "kim"]) == 0
    assert UserFile(users_file).list() == []


def test_history_agrees_with_grading(web_site):  # noqa: F811
    from benchrun.config.limits import load_limits
    from benchrun.grading import grade_lot, run_bench
    from benchrun.web.catalog import Catalog
    from benchrun.web.data import LotData

    catalog = Catalog(str(web_site.root))
    charts, limits, rows = LotData(catalog).history("DX-4417")
    assert limits is not None and len(rows) == 1
    run = web_site.signed.run
    grade = grade_lot(run.shots, load_limits(run.limits_path), bench=run_bench(run))
    stats = {(m.metric, m.condition): m for m in grade.statistics.metrics}
    assert charts
    for chart in charts:
        expected = stats[(chart.metric, chart.condition)]
        (point,) = chart.points
        assert point.n == expected.n
        assert point.mean == pytest.approx(expected.mean, rel=1e-12)
        assert point.spread == pytest.approx(expected.std, rel=1e-12)
    catalog.close()


def test_store_older_than_the_live_tables(tmp_path):
    import sqlite3

    db = tmp_path / "old.db"
    with sqlite3.connect(db) as conn:
        conn.execute("CREATE TABLE runs (run_id TEXT PRIMARY KEY, part TEXT, lot TEXT, "
                     "started TEXT, finished TEXT, status TEXT, manifest TEXT)")
        conn.execute("CREATE TABLE reports (report_id TEXT, run_id TEXT, path TEXT, "
                     "sha256 TEXT, created TEXT, signer TEXT, disposition TEXT, details TEXT)")
    client = create_app(WebConfig(results=str(db), verify_in_background=False)).test_client()
    assert client.get("/live").status_code == 200
    assert client.get("/").status_code == 200


def test_check_upload_shows_a_check_that_does_not_apply_as_n_a(web_site, monkeypatch):  # noqa: F811
    # a characterisation report is not entered in the reports table: verify marks that
    # check not applicable (benchrun.report.verify_checks.Check.applicable); the page must
    # say "n/a", not "yes", and that every applicable check holds
    from benchrun.report.verify_checks import Check, VerificationResult
    from benchrun.web import verifying

    def fake(pdf, cert=None, data=None):
        return VerificationResult(str(pdf), (
            Check("signature intact", True, "intact"),
            Check("reports-table row", True, "not entered in the reports table",
                  applicable=False)))

    monkeypatch.setattr(verifying, "verify_report", fake)
    client = _client(web_site.app(), "ada")
    token = csrf_of(client, "/check")
    text = client.post("/check", data={
        "csrf": token, "report": (io.BytesIO(web_site.signed.pdf.read_bytes()), "c.pdf")},
        content_type="multipart/form-data").get_data(as_text=True)
    assert "VERIFIED: every applicable check holds." in text
    assert '<li class="na"><span class="mark">n/a</span> <strong>reports-table row' in text
