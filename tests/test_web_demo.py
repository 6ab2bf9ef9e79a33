"""The issue's acceptance case: after ``benchrun demo``, ``benchrun serve`` over its folder shows
both lots and their waveforms, verifies a report (trusting the demo's certificate from its
``keys`` folder), fails one with a byte flipped, and lists both runs' published progress."""

from __future__ import annotations

import re

import pytest

from benchrun.cli import main
from benchrun.commands.serve import trusted_certificates
from benchrun.web import WebConfig, create_app


@pytest.mark.slow
def test_serve_after_demo(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--no-progress"]) == 0
    capsys.readouterr()
    certs = trusted_certificates(str(out), [])
    assert [c.parent.name for c in certs] == ["keys"]
    app = create_app(WebConfig(results=str(out), trusted_certs=certs,
                               verify_in_background=False))
    client = app.test_client()
    lots = client.get("/").get_data(as_text=True)
    assert "LT-0117" in lots and "LT-0131" in lots
    run_ids = re.findall(r'href="/lots/([^"/]+)"', lots)
    assert len(run_ids) == 2
    for run_id in run_ids:
        page = client.get(f"/lots/{run_id}").get_data(as_text=True)
        shot = re.search(rf'href="/lots/{run_id}/shots/(\d+)"', page)
        assert shot, run_id
        png = client.get(f"/lots/{run_id}/shots/{shot.group(1)}.png")
        assert png.status_code == 200 and png.data.startswith(b"\x89PNG")
        token = re.search(r'name="csrf" value="([^"]+)"', page).group(1)
        verdict = client.post(f"/lots/{run_id}/verify", data={"csrf": token})
        assert "VERIFIED: every check holds." in verdict.get_data(as_text=True), run_id
    # the runner published both runs' progress through their stores
    live = client.get("/live").get_data(as_text=True)
    assert all(run_id in live for run_id in run_ids)
    assert live.count("<td>complete</td>") == 2

    report = next(p for p in (out / "runs").glob("LT-0117*/report.pdf"))
    data = bytearray(report.read_bytes())
    data[len(data) // 2] ^= 0x01
    report.write_bytes(bytes(data))
    run_id = report.parent.name
    token = re.search(r'name="csrf" value="([^"]+)"',
                      client.get(f"/lots/{run_id}").get_data(as_text=True)).group(1)
    verdict = client.post(f"/lots/{run_id}/verify", data={"csrf": token})
    assert "NOT VERIFIED." in verdict.get_data(as_text=True)
